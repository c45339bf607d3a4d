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


def spectral_descriptors(power: np.ndarray, *, prev_mag: np.ndarray | None, freqs: np.ndarray,
                         roll_percent: float = 0.85) -> tuple[np.ndarray, np.ndarray]:
    """Per-frame ``[centroid_hz, bandwidth_hz, rolloff_hz, flatness, flux]`` (frames, 5).

    ``power`` is ``(frames, bins)``; ``prev_mag`` the magnitude of the frame before the first one
    (``None`` at the start of the stream: flux 0). Returns the descriptors and the last magnitude.
    Silent frames give centroid/bandwidth/roll-off 0 and flatness 1 is replaced by 0.
    """
    mag = np.sqrt(power, dtype=np.float32)
    f32 = freqs.astype(np.float32)
    total = mag.sum(axis=1, dtype=np.float64)
    safe = np.where(total > 0, total, 1.0)
    m1 = (mag @ f32).astype(np.float64)
    m2 = (mag @ (f32 * f32)).astype(np.float64)
    centroid = m1 / safe
    # sum m (f - c)^2 = sum m f^2 - 2 c sum m f + c^2 sum m
    var = np.maximum(m2 / safe - centroid * centroid, 0.0)
    bandwidth = np.sqrt(var)
    cum = np.cumsum(mag, axis=1)
    thresh = (roll_percent * total).astype(np.float32)
    ridx = np.argmax(cum >= thresh[:, None], axis=1)
    rolloff = freqs[ridx]
    p = np.maximum(power, np.float32(1e-10))
    flatness = np.exp(np.mean(np.log(p), axis=1, dtype=np.float64)) / np.mean(p, axis=1, dtype=np.float64)
    silent = total <= 0
    if prev_mag is None:
        prev = np.concatenate([mag[:1], mag[:-1]], axis=0)
    else:
        prev = np.concatenate([prev_mag[None, :], mag[:-1]], axis=0)
    flux = np.maximum(mag - prev, 0.0).sum(axis=1) / mag.shape[1]
    out = np.stack([centroid, bandwidth, rolloff, flatness, flux], axis=1)
    out[silent, :4] = 0.0
    return out, mag[-1].copy()
