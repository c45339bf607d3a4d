"""Scenario sounds for the demo session: sync clicks, speech babble, applause and room tone.

Functions
---------
- :func:`sync_click` -- a click or tone burst whose onset is sample 0 of the returned array.
- :func:`babble` -- speech-like babble of a few synthetic voices.
- :func:`applause` -- dense random hand claps with a rise and a decay.
- :func:`room_tone` -- pink background noise at a given RMS level (:func:`pink_blocks` gives the
  same noise block by block, unscaled).

Conventions
-----------
All functions return mono float32 arrays of ``round(dur_s * sr)`` samples; levels are RMS in
dBFS (0 dB = RMS 1) except :func:`sync_click`, whose ``level_db`` is its peak. Randomness comes
from ``numpy.random.default_rng(seed)``; the same arguments give the same array.

Methods
-------
- Babble: a parallel formant synthesizer (Klatt 1980) -- a glottal source (band-limited
  sawtooth at a slowly drifting speaking pitch of 95-230 Hz, plus aspiration noise) through three
  resonators at vowel formant frequencies (Peterson & Barney 1952 averages), shaped syllable by
  syllable with a smooth envelope at a syllable rate of about 4 Hz, the peak of the modulation
  spectrum of running speech (Houtgast & Steeneken 1985); some syllables begin with a fricative
  noise burst and some are pauses.
- Applause: each clapper claps at 2-5 Hz with timing jitter (Néda et al. 2000); a clap is a short
  band-passed noise burst with a clapper-specific resonance of 0.8-2.5 kHz (Repp 1987). Clappers
  start within the first half second and stop at random times in the last 40 %, which gives the
  rise and the decay.
- Room tone: white Gaussian noise through the three-pole pinking filter given by J. O. Smith
  (*Spectral Audio Signal Processing*, "Example: Synthesis of 1/f noise"), scaled to ``level_db``.

References
----------
.. [1] D. H. Klatt, "Software for a cascade/parallel formant synthesizer", JASA 67(3), 1980.
.. [2] G. E. Peterson and H. L. Barney, "Control methods used in a study of the vowels", JASA
   24(2), 1952.
.. [3] T. Houtgast and H. J. M. Steeneken, "A review of the MTF concept in room acoustics and its
   use for estimating speech intelligibility in auditoria", JASA 77(3), 1985.
.. [4] Z. Néda, E. Ravasz, T. Vicsek, Y. Brechet and A.-L. Barabási, "Physics of the rhythmic
   applause", Phys. Rev. E 61(6), 2000.
.. [5] B. H. Repp, "The sound of two hands clapping: an exploratory study", JASA 81(4), 1987.
.. [6] J. O. Smith III, *Spectral Audio Signal Processing*, W3K Publishing, 2011.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import butter, lfilter, lfilter_zi, sosfilt

from ..errors import InputError

__all__ = ["sync_click", "babble", "applause", "room_tone", "pink_blocks", "VOWEL_FORMANTS_HZ"]

#: (F1, F2, F3) averages of adult male speakers, Peterson & Barney (1952), Hz.
VOWEL_FORMANTS_HZ = np.array([
    [270, 2290, 3010], [390, 1990, 2550], [530, 1840, 2480], [660, 1720, 2410],
    [730, 1090, 2440], [570, 840, 2410], [440, 1020, 2240], [300, 870, 2240],
    [640, 1190, 2390], [490, 1350, 1690],
], dtype=np.float64)

# pinking filter (J. O. Smith, Spectral Audio Signal Processing)
_PINK_B = np.array([0.049922035, -0.095993537, 0.050612699, -0.004408786])
_PINK_A = np.array([1.0, -2.494956002, 2.017265875, -0.522189400])


def _n(sr: int, dur_s: float) -> int:
    if not (isinstance(sr, (int, np.integer)) and sr >= 8000):
        raise InputError(f"sr must be an integer >= 8000 Hz, got {sr!r}")
    if not dur_s >= 0:
        raise InputError(f"dur_s must be >= 0, got {dur_s}")
    return int(round(dur_s * sr))


def _set_rms(y: np.ndarray, level_db: float) -> np.ndarray:
    """Scale ``y`` in place to RMS ``level_db`` dBFS (sum of squares in float64, by blocks)."""
    block = 1 << 20
    energy = 0.0
    for s in range(0, y.size, block):
        b = y[s:s + block].astype(np.float64)
        energy += float(np.dot(b, b))
    rms = float(np.sqrt(energy / y.size)) if y.size else 0.0
    if rms > 0:
        y *= np.float32(10.0 ** (level_db / 20.0) / rms)
    return y


def sync_click(sr: int, *, kind: str = "click", freq_hz: float = 1000.0, dur_s: float | None = None,
               level_db: float = -3.0) -> np.ndarray:
    """A sync mark whose onset is exactly sample 0 of the returned array.

    Parameters
    ----------
    sr : int
        Sampling rate, Hz.
    kind : {"click", "burst"}
        ``"click"``: a cosine at ``freq_hz`` under a 0.5 ms exponential decay (broadband, default
        5 ms long). ``"burst"``: a steady cosine tone burst at ``freq_hz`` (default 50 ms) with a
        2 ms raised-cosine fade at its end only.
    freq_hz : float
        Carrier frequency, Hz.
    dur_s : float, optional
        Length of the array, seconds.
    level_db : float
        Peak level, dBFS.

    Returns
    -------
    numpy.ndarray
        float32; sample 0 is the onset and holds the peak value ``10 ** (level_db / 20)`` (cosine
        phase 0), so inserting the array at sample ``k`` puts the sync onset at ``k / sr`` seconds.
    """
    if kind not in ("click", "burst"):
        raise InputError(f"unknown sync kind {kind!r}; use 'click' or 'burst'")
    if not 0 < freq_hz < sr / 2:
        raise InputError(f"freq_hz must be between 0 and sr/2, got {freq_hz}")
    if dur_s is None:
        dur_s = 0.005 if kind == "click" else 0.05
    n = max(_n(sr, dur_s), 1)
    t = np.arange(n) / sr
    y = np.cos(2 * np.pi * freq_hz * t)
    if kind == "click":
        y *= np.exp(-t / 0.0005)
    else:
        m = min(int(round(0.002 * sr)), n - 1)
        if m > 0:
            y[n - m:] *= 0.5 + 0.5 * np.cos(np.pi * np.arange(1, m + 1) / m)
    return (10.0 ** (level_db / 20.0) * y).astype(np.float32)


def pink_blocks(sr: int, n: int, seed: int, *, block: int = 1 << 20):
    """Unscaled pink noise of ``n`` samples as ``(start, float32 block)`` pairs, deterministic.

    The same ``(sr, n, seed)`` always gives the same blocks, so a caller can make two passes (one
    to measure the level, one to use it) without holding the whole signal.
    """
    rng = np.random.default_rng(seed)
    zi = lfilter_zi(_PINK_B, _PINK_A) * 0.0
    _, zi = lfilter(_PINK_B, _PINK_A, rng.standard_normal(sr), zi=zi)   # settle the filter
    for s in range(0, n, block):
        e = min(s + block, n)
        b, zi = lfilter(_PINK_B, _PINK_A, rng.standard_normal(e - s), zi=zi)
        yield s, b.astype(np.float32)


def room_tone(sr: int, dur_s: float, level_db: float = -50.0, seed: int = 0) -> np.ndarray:
    """Pink background noise with RMS ``level_db`` dBFS (see the module docstring)."""
    n = _n(sr, dur_s)
    out = np.empty(n, dtype=np.float32)
    for s, b in pink_blocks(sr, n, seed):
        out[s:s + b.size] = b
    return _set_rms(out, level_db)


def babble(sr: int, dur_s: float, *, seed: int, n_voices: int = 4, level_db: float = -23.0) -> np.ndarray:
    """Speech-like babble of ``n_voices`` synthetic voices, RMS ``level_db`` dBFS.

    Syllables last 0.15-0.4 s (mean about 0.25 s, i.e. a syllable rate near 4 Hz); see the module
    docstring for the method.
    """
    n = _n(sr, dur_s)
    rng = np.random.default_rng(seed)
    out = np.zeros(n, dtype=np.float32)
    if n == 0:
        return out
    t = np.arange(n) / sr
    nyq = 0.45 * sr
    fric_sos = butter(2, min(3500.0, nyq * 0.9), btype="highpass", fs=sr, output="sos")
    for _ in range(max(int(n_voices), 1)):
        base = rng.uniform(95.0, 230.0)
        # slow intonation: smoothed random walk, +-12 %
        knots = rng.uniform(-1, 1, int(dur_s / 0.5) + 3)
        f0 = base * (1.0 + 0.12 * np.interp(t, np.arange(knots.size) * 0.5, knots))
        phase = np.cumsum(f0) / sr
        n_harm = int(min(4000.0, nyq) / base)
        # band-limited sawtooth read from a one-period wavetable at the running phase
        grid = np.arange(2048) / 2048.0
        k = np.arange(1, max(n_harm, 1) + 1)[:, None]
        table = (np.sin(2 * np.pi * k * grid[None, :]) / k).sum(axis=0)
        x = (phase % 1.0) * 2048.0
        i = x.astype(np.int64)
        fr = x - i
        src = table[i] * (1.0 - fr) + table[(i + 1) % 2048] * fr
        src += 0.25 * rng.standard_normal(n)                   # aspiration
        scale = rng.uniform(0.85, 1.2)                         # vocal-tract length
        track = np.zeros(n)
        pos = int(rng.uniform(0, 0.3) * sr)
        while pos < n:
            L = int(np.clip(rng.gamma(6.0, 0.25 / 6.0), 0.15, 0.4) * sr)
            e = min(pos + L, n)
            if rng.random() > 0.15:                            # 15 % pauses between words
                seg = src[pos:e]
                fm = VOWEL_FORMANTS_HZ[rng.integers(len(VOWEL_FORMANTS_HZ))] * scale
                voiced = np.zeros(e - pos)
                for fk, bw, g in zip(fm, (90.0, 110.0, 170.0), (1.0, 0.5, 0.25)):
                    lo, hi = max(fk - bw, 50.0), min(fk + bw, nyq)
                    if hi > lo:
                        sos = butter(2, [lo, hi], btype="bandpass", fs=sr, output="sos")
                        voiced += g * sosfilt(sos, seg)
                voiced /= max(float(np.sqrt(np.mean(voiced ** 2))), 1e-12)   # even syllable levels
                env = np.sin(np.pi * np.arange(e - pos) / max(L, 1)) ** 2
                track[pos:e] += rng.uniform(0.7, 1.0) * voiced * env
                if rng.random() < 0.5:                         # fricative onset
                    m = min(int(rng.uniform(0.03, 0.07) * sr), e - pos)
                    track[pos:pos + m] += 0.4 * sosfilt(fric_sos, rng.standard_normal(m)) * np.hanning(m)
            pos = e
        out += (track * rng.uniform(0.6, 1.0)).astype(np.float32)
    return _set_rms(out, level_db)


def applause(sr: int, dur_s: float, *, seed: int, n_clappers: int = 40,
             level_db: float = -20.0) -> np.ndarray:
    """Applause of ``n_clappers`` people with a rise and a decay, RMS ``level_db`` dBFS.

    See the module docstring for the method.
    """
    n = _n(sr, dur_s)
    rng = np.random.default_rng(seed)
    out = np.zeros(n, dtype=np.float32)
    if n == 0:
        return out
    clap_n = int(0.04 * sr)
    tc = np.arange(clap_n) / sr
    nyq = 0.45 * sr
    for _ in range(max(int(n_clappers), 1)):
        fc = rng.uniform(800.0, 2500.0)
        sos = butter(2, [fc / 1.6, min(fc * 1.6, nyq)], btype="bandpass", fs=sr, output="sos")
        kernels = [sosfilt(sos, rng.standard_normal(clap_n)) * np.exp(-tc / rng.uniform(0.004, 0.009))
                   for _ in range(4)]
        kernels = [k / np.max(np.abs(k)) for k in kernels]
        rate = rng.uniform(2.0, 5.0)
        start = rng.uniform(0.0, min(0.5, 0.2 * dur_s))
        stop = dur_s * rng.uniform(0.6, 1.0)
        loud = rng.uniform(0.4, 1.0)
        tt = start
        while tt < stop:
            s0 = int(tt * sr)
            m = min(clap_n, n - s0)
            if m <= 0:
                break
            out[s0:s0 + m] += (loud * rng.uniform(0.7, 1.0) * kernels[rng.integers(4)][:m]).astype(np.float32)
            tt += (1.0 / rate) * rng.uniform(0.85, 1.15)
    return _set_rms(out, level_db)
