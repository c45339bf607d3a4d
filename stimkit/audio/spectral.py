"""Streaming short-time Fourier transform and per-STFT-frame spectral descriptors.

What it computes
----------------
- :class:`StftStream` -- cuts a mono stream (analysis rate, default 22.05 kHz) into Hann-windowed
  frames of ``N_FFT`` samples every ``HOP`` samples and returns their power spectra. Frame ``j`` is
  centred on sample ``j * HOP`` (the stream is padded with ``N_FFT/2`` zeros at both ends, as
  ``librosa.stft(center=True, pad_mode="constant")``), so its time is ``j * HOP / sr`` seconds after
  the first analysed sample. Results do not depend on how the stream is cut into blocks.
- :func:`spectral_descriptors` -- centroid, bandwidth, roll-off (85 %), flatness and flux per
  frame, with the librosa definitions (centroid, bandwidth p=2, roll-off, flatness on the power
  spectrum), and positive spectral flux (sum of positive magnitude increases, L1, normalised by
  the number of bins) against the previous frame.

Conventions
-----------
Frequencies in Hz (up to the analysis Nyquist, 11.025 kHz by default); flatness is a ratio 0-1;
flux in linear magnitude per bin (full-scale sine = 1 at its bin).

References
----------
G. Peeters (2004), A large set of audio features for sound description (CUIDADO project report):
spectral centroid, spread, roll-off, flatness, flux. S. Dubnov (2004) on spectral flatness.
librosa (McFee et al. 2015) for the reference implementations.
"""

from __future__ import annotations

import numba
import numpy as np
import scipy.fft

__all__ = ["StftStream", "spectral_descriptors", "ANALYSIS_SR", "N_FFT", "HOP", "frequencies"]

ANALYSIS_SR = 22050
N_FFT = 2048
HOP = 512


def frequencies(*, sr: int = ANALYSIS_SR, n_fft: int = N_FFT) -> np.ndarray:
    return np.fft.rfftfreq(n_fft, 1.0 / sr)


class StftStream:
    """Streaming STFT of a mono signal; :meth:`push` returns the power spectra ``(frames, bins)``."""

    def __init__(self, *, n_fft: int = N_FFT, hop: int = HOP):
        self.n_fft, self.hop = int(n_fft), int(hop)
        self.window = np.hanning(self.n_fft + 1)[:-1].astype(np.float32)  # periodic Hann
        # magnitude normalisation: a full-scale sine gives magnitude 1 at its bin
        self.mag_scale = 2.0 / float(self.window.sum())
        self._buf = np.zeros(self.n_fft // 2, dtype=np.float32)  # leading zero padding
        self.n_frames = 0
        self.n_samples = 0

    def _frames(self, buf: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        n = (buf.shape[0] - self.n_fft) // self.hop + 1 if buf.shape[0] >= self.n_fft else 0
        if n <= 0:
            return np.zeros((0, self.n_fft // 2 + 1), np.float32), buf
        idx = np.lib.stride_tricks.sliding_window_view(buf, self.n_fft)[:: self.hop][:n]
        spec = scipy.fft.rfft(idx * self.window, axis=1)
        sq = spec.view(spec.real.dtype).reshape(n, -1, 2)  # (real, imag) pairs, no copy
        sq = sq * sq
        power = sq[..., 0] + sq[..., 1]
        del sq
        power = power.astype(np.float32, copy=False)
        power *= np.float32(self.mag_scale ** 2)
        self.n_frames += n
        return power, buf[n * self.hop:]

    def push(self, x: np.ndarray) -> np.ndarray:
        """Add samples; return the power spectra of the frames now complete."""
        x = np.asarray(x, dtype=np.float32)
        self.n_samples += x.shape[0]
        buf = np.concatenate([self._buf, x])
        power, self._buf = self._frames(buf)
        return power

    def finish(self) -> np.ndarray:
        """Pad the end with zeros and return the remaining frames (centres up to the last sample)."""
        n_total = 1 + self.n_samples // self.hop  # frames with centre <= last sample index
        remaining = n_total - self.n_frames
        if remaining <= 0:
            return np.zeros((0, self.n_fft // 2 + 1), np.float32)
        buf = np.concatenate([self._buf, np.zeros(self.n_fft // 2 + self.hop, np.float32)])
        power, _ = self._frames(buf)
        self.n_frames -= power.shape[0] - remaining
        return power[:remaining]


@numba.njit(cache=True, nogil=True)
def _descriptors(power, freqs, prev, roll, out):  # pragma: no cover - compiled
    """The per-frame loop of :func:`spectral_descriptors`: one pass over each frame's bins.
    ``prev`` (bins,) holds the previous frame's magnitude and is updated; ``out`` (frames, 5)."""
    n, nb = power.shape
    for i in range(n):
        total = 0.0
        m1 = 0.0
        m2 = 0.0
        flux = 0.0
        logsum = 0.0
        psum = 0.0
        for k in range(nb):
            p = power[i, k]
            m = np.sqrt(p)
            f = freqs[k]
            total += m
            m1 += m * f
            m2 += m * f * f
            d = m - prev[k]
            if d > 0:
                flux += d
            prev[k] = m
            q = max(p, np.float32(1e-10))
            logsum += np.log(q)
            psum += q
        # roll-off: first bin whose cumulative magnitude (float32, as numpy's cumsum) reaches
        # roll * total (bin 0 if rounding keeps it below)
        thresh = np.float32(roll * total)
        cum = np.float32(0.0)
        ridx = 0
        for k in range(nb):
            cum += np.sqrt(power[i, k])
            if cum >= thresh:
                ridx = k
                break
        if total > 0:
            c = m1 / total
            var = max(m2 / total - c * c, 0.0)
            out[i, 0] = c
            out[i, 1] = np.sqrt(var)
            out[i, 2] = freqs[ridx]
            out[i, 3] = np.exp(logsum / nb) / (psum / nb)
        else:
            out[i, 0] = out[i, 1] = out[i, 2] = out[i, 3] = 0.0
        out[i, 4] = flux / nb


def spectral_descriptors(power: np.ndarray, *, prev_mag: np.ndarray | None, freqs: np.ndarray,
                         roll_percent: float = 0.85) -> tuple[np.ndarray, np.ndarray]:
    """Per-frame ``[centroid_hz, bandwidth_hz, rolloff_hz, flatness, flux]`` (frames, 5).

    ``power`` is ``(frames, bins)``; ``prev_mag`` the magnitude of the frame before the first one
    (``None`` at the start of the stream: flux 0). Returns the descriptors and the last magnitude.
    Silent frames give centroid/bandwidth/roll-off 0 and flatness 1 is replaced by 0. Sums are
    accumulated in double precision over the float32 spectra (one compiled pass per frame).
    """
    power = np.ascontiguousarray(power, dtype=np.float32)
    n = power.shape[0]
    out = np.zeros((n, 5))
    if n == 0:
        last = np.zeros(power.shape[1], np.float32) if prev_mag is None else prev_mag
        return out, np.asarray(last, np.float32).copy()
    prev = (np.sqrt(power[0]) if prev_mag is None else np.asarray(prev_mag, np.float32)).copy()
    _descriptors(power, np.asarray(freqs, np.float64), prev, float(roll_percent), out)
    return out, prev
