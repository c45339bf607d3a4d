"""An audience and its room: coughs, chair noise, mains hum, clapping between pieces.

:func:`audience_noise` returns a signal to add to a performance (it never shifts a note: the
ground truth is unchanged); :func:`with_applause` frames a performance with clapping before and
after, as between the movements of a concert, and shifts the ground truth by the lead-in.

Models
------
- Cough: two phases, an explosive broadband burst (30-60 ms) followed by a voiced, band-passed
  noise (0.15-0.35 s, 300-3000 Hz) -- the phases of a cough sound described by Korpáš et al.
  (1996); sometimes two or three in a row. Level: ``cough_db`` re the music's RMS, ±6 dB.
- Chair noise: a creak, resonant noise at 300-1500 Hz with a rising or falling centre over
  0.2-0.8 s, and a thump (low-passed burst).
- Mains hum: the mains frequency (50 or 60 Hz) and its harmonics 2-7 with amplitudes falling as
  ``1/k`` (odd harmonics stronger, as from a transformer or a ground loop; common practice).
- Applause: :func:`stimkit.render.sounds.applause`.

References
----------
.. [1] J. Korpáš, J. Sadloňová and M. Vrabec, "Analysis of the cough sound: an overview",
   Pulmonary Pharmacology 9(5-6), 1996.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import butter, sosfilt

from .sounds import applause

__all__ = ["audience_noise", "with_applause"]


def _rms(y: np.ndarray) -> float:
    nz = y[np.abs(y) > 1e-6]
    return float(np.sqrt(np.mean(nz.astype(np.float64) ** 2))) if nz.size else 1e-3


def _cough(sr: int, rng) -> np.ndarray:
    n1 = int(rng.uniform(0.03, 0.06) * sr)
    n2 = int(rng.uniform(0.15, 0.35) * sr)
    burst = rng.standard_normal(n1) * np.exp(-np.arange(n1) / (0.3 * n1))
    sos = butter(2, [300.0, min(3000.0, 0.45 * sr)], btype="bandpass", fs=sr, output="sos")
    voiced = sosfilt(sos, rng.standard_normal(n2)) * np.hanning(n2) * 2.0
    c = np.concatenate([burst, voiced])
    return c / max(np.max(np.abs(c)), 1e-9)


def _chair(sr: int, rng) -> np.ndarray:
    n = int(rng.uniform(0.2, 0.8) * sr)
    f0, f1 = rng.uniform(300.0, 1500.0, 2)
    out = np.zeros(n)
    src = rng.standard_normal(n)
    step = max(n // 8, 1)
    for s in range(0, n, step):      # a resonance whose centre moves from f0 to f1
        fc = f0 + (f1 - f0) * s / n
        sos = butter(2, [fc / 1.15, min(fc * 1.15, 0.45 * sr)], btype="bandpass", fs=sr, output="sos")
        out[s:s + step] = sosfilt(sos, src[s:s + step])
    out *= np.hanning(n)
    nt = int(0.05 * sr)
    thump = sosfilt(butter(2, 200.0, btype="lowpass", fs=sr, output="sos"), rng.standard_normal(nt))
    out[:nt] += 2.0 * thump * np.exp(-np.arange(nt) / (0.01 * sr))
    return out / max(np.max(np.abs(out)), 1e-9)


def audience_noise(n: int, sr: int, *, seed: int, music_rms: float, coughs_per_min: float = 3.0,
                   chairs_per_min: float = 2.0, cough_db: float = -10.0, chair_db: float = -22.0,
                   mains_hz: float = 50.0, hum_db: float = -40.0) -> np.ndarray:
    """Coughs, chair noise and mains hum for ``n`` samples, float32.

    Levels are dB re ``music_rms`` (the RMS of the music while it sounds). Events are placed at
    uniformly random times (a Poisson process with the given rates).
    """
    rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, 23])
    out = np.zeros(n, dtype=np.float64)
    dur_min = n / sr / 60.0
    for rate, make, level in ((coughs_per_min, _cough, cough_db), (chairs_per_min, _chair, chair_db)):
        for _ in range(rng.poisson(rate * dur_min)):
            repeats = rng.integers(1, 4) if make is _cough else 1
            s0 = int(rng.uniform(0, max(n - sr, 1)))
            g = music_rms * 10 ** ((level + rng.uniform(-6.0, 6.0)) / 20.0) * 3.0   # peak ~ 3x RMS
            for _ in range(repeats):
                ev = make(sr, rng)
                e = min(s0 + ev.size, n)
                out[s0:e] += g * ev[: e - s0]
                s0 = e + int(rng.uniform(0.1, 0.3) * sr)
                if s0 >= n:
                    break
    if mains_hz > 0 and np.isfinite(hum_db):
        t = np.arange(n) / sr
        hum = sum((1.0 if k % 2 else 0.5) / k * np.sin(2 * np.pi * k * mains_hz * t + rng.uniform(0, 6.3))
                  for k in range(1, 8) if k * mains_hz < 0.45 * sr)
        hum *= music_rms * 10 ** (hum_db / 20.0) / max(float(np.sqrt(np.mean(hum ** 2))), 1e-12)
        out += hum
    return out.astype(np.float32)


def with_applause(y: np.ndarray, sr: int, *, seed: int, before_s: float = 6.0, after_s: float = 6.0,
                  gap_s: float = 1.5, level_db: float = 0.0) -> tuple[np.ndarray, float]:
    """Applause, a pause, the performance, a pause, applause (as between movements).

    Returns the new signal and the shift (seconds) to add to every ground-truth time.
    ``level_db`` is the applause RMS re the music's RMS.
    """
    g = _rms(y)
    lvl = 20 * np.log10(max(g, 1e-9)) + level_db
    pre = applause(sr, before_s, seed=seed, level_db=lvl) if before_s > 0 else np.zeros(0, np.float32)
    post = applause(sr, after_s, seed=seed + 1, level_db=lvl) if after_s > 0 else np.zeros(0, np.float32)
    gap = np.zeros(int(gap_s * sr), dtype=np.float32)
    out = np.concatenate([pre, gap, np.asarray(y, np.float32), gap, post])
    return out, (pre.size + gap.size) / sr
