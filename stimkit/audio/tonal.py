"""Tonal descriptors: chroma, local key and key strength, harmonic change, sensory roughness.

What it computes
----------------
- :class:`ChromaStream` -- 12-bin chroma per STFT frame (librosa's STFT chroma filter bank, A440
  tuning, C first), each frame scaled to a maximum of 1 (silent frames: zeros).
- :func:`local_key` -- key and key strength at given times: the chroma summed over a centred window
  (``KEY_WINDOW_S``) is correlated (Pearson) with the 24 rotations of the Krumhansl-Kessler
  probe-tone profiles; the best one names the key, its correlation is the key strength (the
  name the key-finding literature gives it: Krumhansl 1990; Temperley 1999).
- :func:`harmonic_change` -- Harte, Sandler & Gasser's harmonic change detection function: the
  6-D tonal centroid of each frame's L1-normalised chroma (``librosa.feature.tonnetz``), smoothed
  over time with a Gaussian (sigma ``HCDF_SIGMA_FRAMES``), and the Euclidean distance between the
  centroids of the frames before and after each frame.
- :func:`roughness` -- sensory roughness per frame after Sethares (1993): the ``N_PEAKS``
  strongest spectral peaks below 5 kHz (where nearly all of the roughness of musical sounds lies) (magnitudes scaled so a full-scale sine is 1), summed over all pairs
  of ``a_i * a_j * (exp(-3.5 s df) - exp(-5.75 s df))`` with
  ``s = 0.24 / (0.0207 f_min + 18.96)`` (Plomp & Levelt's curve as parameterised by Sethares).

Conventions
-----------
Frame times as in :mod:`stimkit.audio.spectral`. Key names: pitch class with the usual spelling
(C, C#, D, Eb, E, F, F#, G, Ab, A, Bb, B) and "major"/"minor"; in column names ``#`` is written
``s`` (:func:`column_safe`). Key strength is a correlation
(-1..1). Harmonic change is a distance in tonal-centroid space (no unit); roughness is in
Sethares' dissonance units (no unit, not asper; grows with level squared). Key strength and
roughness keep the names the key-finding literature and psychoacoustics give them.

References
----------
C. L. Krumhansl (1990), Cognitive Foundations of Musical Pitch, Oxford UP (probe-tone profiles,
key-finding algorithm with E. J. Kessler / M. A. Schmuckler). D. Temperley (1999), What's key
for key? The Krumhansl-Schmuckler key-finding algorithm reconsidered, Music Perception 17(1). C. Harte, M. Sandler, M. Gasser
(2006), Detecting harmonic change in musical audio, ACM AMCMM. W. A. Sethares (1993), Local
consonance and the relationship between timbre and scale, JASA 94(3). R. Plomp, W. J. M. Levelt
(1965), Tonal consonance and critical bandwidth, JASA 38(4). P. N. Vassilakis (2001), Perceptual
and physical properties of amplitude fluctuation and their musical significance, PhD thesis,
UCLA ("roughness" as the psychoacoustic name of the sensation; its unit, the asper, is not what
this function returns).
"""

from __future__ import annotations

import numpy as np

__all__ = ["ChromaStream", "chroma_filterbank", "tonal_centroid", "column_safe", "local_key", "harmonic_change", "roughness", "KEY_NAMES",
           "PITCH_CLASSES", "KK_MAJOR", "KK_MINOR", "KEY_WINDOW_S", "N_PEAKS"]

PITCH_CLASSES = ["C", "C#", "D", "Eb", "E", "F", "F#", "G", "Ab", "A", "Bb", "B"]
KK_MAJOR = np.array([6.35, 2.23, 3.48, 2.33, 4.38, 4.09, 2.52, 5.19, 2.39, 3.66, 2.29, 2.88])
KK_MINOR = np.array([6.33, 2.68, 3.52, 5.38, 2.60, 3.53, 2.54, 4.75, 3.98, 2.69, 3.34, 3.17])
def column_safe(pitch_class: str) -> str:
    """A pitch-class name usable in a column name that R and MATLAB read without quoting:
    ``#`` becomes ``s`` (``C#`` -> ``Cs``); flats are already plain letters (``Eb``)."""
    return pitch_class.replace("#", "s")


KEY_NAMES = [f"{p} major" for p in PITCH_CLASSES] + [f"{p} minor" for p in PITCH_CLASSES]
KEY_WINDOW_S = 10.0
HCDF_SIGMA_FRAMES = 8.0
N_PEAKS = 20
ROUGHNESS_MAX_HZ = 5000.0


def chroma_filterbank(*, sr: int, n_fft: int) -> np.ndarray:
    """The STFT chroma filter bank ``(12, n_fft // 2 + 1)``, C first, A440 tuning: D. Ellis's
    chroma matrix as librosa builds it (``librosa.filters.chroma`` with ``tuning=0``,
    ``ctroct=5``, ``octwidth=2``, ``norm=2``, ``base_c=True``; the test compares the two). Each
    FFT bin spreads over the pitch classes with a Gaussian one bin-spacing wide (at least one
    semitone), the columns are L2-normalised, and a Gaussian over octaves centred on A5
    (880 Hz, half-width two octaves) weights the bins."""
    n_chroma = 12
    freqs = np.linspace(0, sr, n_fft, endpoint=False)[1:]
    # pitch in semitones above A0 (27.5 Hz, A440 tuning)
    frqbins = n_chroma * np.log2(freqs / (440.0 / 16))
    frqbins = np.concatenate(([frqbins[0] - 1.5 * n_chroma], frqbins))
    binwidth = np.concatenate((np.maximum(frqbins[1:] - frqbins[:-1], 1.0), [1.0]))
    D = np.subtract.outer(frqbins, np.arange(0, n_chroma, dtype="d")).T
    half = np.round(n_chroma / 2.0)
    D = np.remainder(D + half + 10 * n_chroma, n_chroma) - half
    wts = np.exp(-0.5 * (2 * D / binwidth[None, :]) ** 2)
    wts = wts / np.sqrt(np.sum(wts * wts, axis=0, keepdims=True))
    wts = wts * np.exp(-0.5 * ((frqbins / n_chroma - 5.0) / 2.0) ** 2)[None, :]
    wts = np.roll(wts, -3, axis=0)  # rows from A to rows from C
    return np.ascontiguousarray(wts[:, : n_fft // 2 + 1], dtype=np.float32)


class ChromaStream:
    """Chroma per frame from power spectra ``(frames, bins)``."""

    def __init__(self, *, sr: int, n_fft: int):
        self.fb = chroma_filterbank(sr=sr, n_fft=n_fft)

    def push(self, power: np.ndarray) -> np.ndarray:
        raw = power @ self.fb.T  # (frames, 12)
        mx = raw.max(axis=1, keepdims=True) if raw.shape[0] else raw
        return np.where(mx > 1e-12, raw / np.where(mx > 1e-12, mx, 1.0), 0.0).astype(np.float32)


def _key_templates() -> np.ndarray:
    prof = np.stack([np.roll(KK_MAJOR, k) for k in range(12)] + [np.roll(KK_MINOR, k) for k in range(12)])
    prof = prof - prof.mean(axis=1, keepdims=True)
    return prof / np.linalg.norm(prof, axis=1, keepdims=True)  # (24, 12)


def local_key(chroma: np.ndarray, *, frame_rate_hz: float, centres_s: np.ndarray,
              window_s: float = KEY_WINDOW_S) -> tuple[np.ndarray, np.ndarray]:
    """Key index (0-23 into :data:`KEY_NAMES`, -1 if no energy) and key strength at ``centres_s``."""
    from scipy.ndimage import uniform_filter1d

    ch = np.asarray(chroma, dtype=np.float32)
    c = np.asarray(centres_s, dtype=np.float64)
    n = ch.shape[0]
    if n == 0:
        return np.full(c.shape, -1), np.full(c.shape, np.nan)
    size = 2 * int(round(window_s * frame_rate_hz / 2)) + 1
    # running mean over the window (zeros beyond the ends; a scale factor does not change r)
    s_all = uniform_filter1d(ch, size=size, axis=0, mode="constant", cval=0.0)
    idx_c = np.clip(np.round(c * frame_rate_hz).astype(np.int64), 0, n - 1)
    s = s_all[idx_c].astype(np.float64)
    del s_all
    z = s - s.mean(axis=1, keepdims=True)
    norm = np.linalg.norm(z, axis=1)
    ok = norm > 1e-9
    r = (z / np.where(ok, norm, 1.0)[:, None]) @ _key_templates().T  # (m, 24)
    idx = np.argmax(r, axis=1)
    strength = r[np.arange(r.shape[0]), idx]
    idx = np.where(ok, idx, -1)
    strength = np.where(ok, strength, np.nan)
    return idx, strength


def _tonal_centroid_matrix() -> np.ndarray:
    """Harte et al.'s (2006) 6 x 12 projection of a chroma vector onto the circles of fifths,
    minor thirds and major thirds (radii 1, 1, 0.5), in the row order librosa's ``tonnetz``
    uses (sin, cos of each circle)."""
    dim_map = np.linspace(0, 12, num=12, endpoint=False)
    scale = np.array([7.0 / 6, 7.0 / 6, 3.0 / 2, 3.0 / 2, 2.0 / 3, 2.0 / 3])
    V = np.multiply.outer(scale, dim_map)
    V[::2] -= 0.5  # even rows: sine
    R = np.array([1.0, 1.0, 1.0, 1.0, 0.5, 0.5])
    return R[:, None] * np.cos(np.pi * V)


def tonal_centroid(chroma: np.ndarray) -> np.ndarray:
    """The 6-D tonal centroid ``(frames, 6)`` of each frame's L1-normalised chroma
    ``(frames, 12)`` (Harte et al. 2006; what ``librosa.feature.tonnetz(chroma=...)`` returns,
    transposed). All-zero frames give zeros."""
    ch = np.asarray(chroma, dtype=np.float64)
    total = np.abs(ch).sum(axis=1, keepdims=True)
    total = np.where(total < np.finfo(np.float64).tiny, 1.0, total)
    return (ch / total) @ _tonal_centroid_matrix().T


def harmonic_change(chroma: np.ndarray) -> np.ndarray:
    """Harte et al. (2006) harmonic change per frame (needs the whole chroma sequence)."""
    from scipy.ndimage import gaussian_filter1d

    ch = np.asarray(chroma)
    n = ch.shape[0]
    if n < 3:
        return np.zeros(n)
    d = np.zeros(n)
    pad = int(4 * HCDF_SIGMA_FRAMES) + 2
    step = 1 << 15  # frames per chunk (bounded memory); chunks overlap by the smoothing reach
    for a in range(0, n, step):
        lo, hi = max(0, a - pad), min(n, a + step + pad)
        tc = np.nan_to_num(tonal_centroid(ch[lo:hi]))
        tc = gaussian_filter1d(tc, HCDF_SIGMA_FRAMES, axis=0, mode="nearest")
        dd = np.zeros(hi - lo)
        dd[1:-1] = np.linalg.norm(tc[2:] - tc[:-2], axis=1)
        b = min(n, a + step)
        d[a:b] = dd[a - lo: b - lo]
    d[0] = d[-1] = 0.0
    return d


def _sethares(f_lo: np.ndarray, f_hi: np.ndarray) -> np.ndarray:
    s = np.float32(0.24) / (np.float32(0.0207) * f_lo + np.float32(18.96))
    x = s * (f_hi - f_lo)
    return np.exp(np.float32(-3.5) * x) - np.exp(np.float32(-5.75) * x)


def roughness(power: np.ndarray, *, freqs: np.ndarray, n_peaks: int = N_PEAKS) -> np.ndarray:
    """Sethares (1993) roughness per frame from the strongest spectral peaks of ``power``."""
    if power.shape[0] == 0:
        return np.zeros(0)
    nb = int(np.searchsorted(freqs, ROUGHNESS_MAX_HZ)) + 2
    mag = np.sqrt(power[:, :nb], dtype=np.float32)
    freqs = freqs[:nb]
    is_peak = np.zeros_like(mag, dtype=bool)
    is_peak[:, 1:-1] = (mag[:, 1:-1] > mag[:, :-2]) & (mag[:, 1:-1] >= mag[:, 2:])
    pk = np.where(is_peak, mag, 0.0)
    k = min(n_peaks, pk.shape[1])
    idx = np.argpartition(-pk, k - 1, axis=1)[:, :k]
    a = np.take_along_axis(pk, idx, axis=1)  # (frames, k), float32
    f = freqs.astype(np.float32)[idx]
    iu, ju = np.triu_indices(k, 1)
    fi, fj = f[:, iu], f[:, ju]
    lo, hi = np.minimum(fi, fj), np.maximum(fi, fj)
    d = _sethares(lo, hi)
    return np.sum(a[:, iu] * a[:, ju] * d, axis=1, dtype=np.float64)
