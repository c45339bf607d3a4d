"""Reverberation and background noise for a rendered signal, keeping the dry path at delay 0.

:func:`add_room` convolves the signal with a synthetic room impulse response and adds noise.

Conventions
-----------
- The dry signal passes at delay 0 and the reverberant (wet) path starts ``predelay_s`` later, so
  every note's sound still starts at the sample where the dry signal starts it: the ground truth of
  :mod:`stimkit.render.performance` is unchanged.
- ``y_out = (1 - wet) * y + wet * (h * y)`` where ``h`` has unit energy; the output keeps the
  input's length (the caller leaves room for the tail, e.g. ``Performance.duration_s``).
- ``noise_db`` is the RMS of the added noise in dB relative to full scale (dBFS, 0 dB = RMS 1).

Method
------
The impulse response is exponentially decaying Gaussian noise (the statistical model of late
reverberation: Moorer 1979; Schroeder 1962), with amplitude envelope ``10 ** (-3 t / rt60_s)``
(60 dB of energy decay in ``rt60_s``). High frequencies decay faster: the noise is split into a
low and a high band whose high band decays with half the RT60 -- a simple form of air and wall
absorption. A few sparse early reflections in the first 30 ms follow the pre-delay. The
convolution is a block FFT overlap-add convolution in float32 (Oppenheim & Schafer, overlap-add
method), added into the output in place so memory stays at a few blocks beyond the signal.
The noise is the pink room tone of :func:`stimkit.render.sounds.room_tone`, added block by block.

References
----------
.. [1] M. R. Schroeder, "Frequency-correlation functions of frequency responses in rooms", JASA
   34(12), 1962.
.. [2] J. A. Moorer, "About this reverberation business", Computer Music Journal 3(2), 1979.
.. [3] A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal Processing*, 3rd ed., 2010,
   sec. 8.7 (block convolution, overlap-add).
"""

from __future__ import annotations

import numpy as np
from scipy import fft as sfft
from scipy.signal import butter, sosfilt

from ..errors import InputError
from .sounds import pink_blocks

__all__ = ["add_room", "impulse_response", "add_hall", "hall_response", "HALL_BAND_RT"]


def impulse_response(sr: int, *, rt60_s: float = 0.8, predelay_s: float = 0.012, seed: int = 0) -> np.ndarray:
    """Synthetic reverberant impulse response (wet path only), unit energy, float32.

    Parameters
    ----------
    sr : int
        Sampling rate, Hz.
    rt60_s : float
        Time for the energy to fall by 60 dB, seconds (low band; the high band decays twice as fast).
    predelay_s : float
        Delay of the first reflection after the direct sound, seconds (> 0).
    seed : int
        Seed of ``numpy.random.default_rng``.

    Returns
    -------
    numpy.ndarray
        ``h`` with ``h[:round(predelay_s * sr)] == 0`` and ``sum(h ** 2) == 1``.
    """
    rng = np.random.default_rng(seed)
    n_pre = max(int(round(predelay_s * sr)), 1)
    n = int(round(1.2 * rt60_s * sr))
    t = np.arange(n) / sr
    noise = rng.standard_normal(n)
    sos = butter(2, 2500.0, btype="lowpass", fs=sr, output="sos")
    low = sosfilt(sos, noise)
    high = noise - low
    tail = low * 10.0 ** (-3.0 * t / rt60_s) + high * 10.0 ** (-6.0 * t / rt60_s)
    # sparse early reflections in the first 30 ms
    n_early = min(int(0.03 * sr), n)
    k = rng.integers(0, n_early, 6)
    tail[k] += rng.choice([-1.0, 1.0], 6) * rng.uniform(1.5, 3.0, 6) * np.std(tail[:n_early])
    h = np.concatenate([np.zeros(n_pre), tail])
    return (h / np.sqrt(np.sum(h * h))).astype(np.float32)


def _add_convolved(out: np.ndarray, y: np.ndarray, h: np.ndarray, gain: float) -> None:
    """``out += gain * (y * h)[:len(out)]`` by overlap-add of FFT blocks (float32, in place)."""
    n_fft = 1 << int(np.ceil(np.log2(max(4 * h.size, 1 << 14))))
    step = n_fft - h.size + 1
    spec_h = sfft.rfft(h.astype(np.float32), n_fft) * np.float32(gain)
    n = out.size
    for s in range(0, y.size, step):
        seg = y[s:s + step]
        c = sfft.irfft(sfft.rfft(seg, n_fft) * spec_h, n_fft)
        e = min(s + seg.size + h.size - 1, n)
        dst = out[s:e]
        np.add(dst, c[: e - s].astype(np.float32, copy=False), out=dst)


def add_room(
    y: np.ndarray,
    sr: int,
    *,
    rt60_s: float = 0.8,
    wet: float = 0.25,
    noise_db: float = -60.0,
    predelay_s: float = 0.012,
    seed: int = 0,
) -> np.ndarray:
    """Add reverberation and background noise to a mono signal without shifting its onsets.

    Parameters
    ----------
    y : numpy.ndarray
        Mono signal (float), e.g. from :func:`stimkit.render.synth.synthesize`.
    sr : int
        Sampling rate, Hz.
    rt60_s : float
        Reverberation time, seconds (0 turns reverberation off).
    wet : float
        Mix of the reverberant path, 0..1 (the dry path gets ``1 - wet``).
    noise_db : float
        RMS of the added pink noise, dBFS; ``-inf`` adds none.
    predelay_s : float
        Delay of the reverberant path after the dry one, seconds (> 0).
    seed : int
        Seed for the impulse response and the noise.

    Returns
    -------
    numpy.ndarray
        float32, same length as ``y``.
    """
    y = np.asarray(y, dtype=np.float32)
    if y.ndim != 1:
        raise InputError(f"add_room needs a mono signal, got shape {y.shape}")
    if not (0.0 <= wet <= 1.0 and rt60_s >= 0.0 and predelay_s > 0.0):
        raise InputError("add_room needs 0 <= wet <= 1, rt60_s >= 0 and predelay_s > 0")
    out = y * np.float32(1.0 - wet) if rt60_s > 0 and wet > 0 else y.copy()
    if rt60_s > 0 and wet > 0 and y.size:
        h = impulse_response(sr, rt60_s=rt60_s, predelay_s=predelay_s, seed=seed)
        _add_convolved(out, y, h, wet)
    if np.isfinite(noise_db) and y.size:
        # the pink room tone of sounds.room_tone, added block by block: pass 1 measures its
        # level, pass 2 adds it scaled to noise_db (no second full-length array)
        energy = sum(float(np.dot(b.astype(np.float64), b)) for _, b in pink_blocks(sr, y.size, seed + 1))
        g = np.float32(10.0 ** (noise_db / 20.0) / max(np.sqrt(energy / y.size), 1e-30))
        for s, b in pink_blocks(sr, y.size, seed + 1):
            dst = out[s:s + b.size]
            np.add(dst, g * b, out=dst)
    return out


#: Reverberation time of the low (< 500 Hz) and high (> 4 kHz) bands relative to the mid band.
HALL_BAND_RT = (1.25, 1.0, 0.5)


def hall_response(sr: int, *, rt60_s: float = 2.0, predelay_s: float = 0.02, seed: int = 0) -> np.ndarray:
    """Impulse response of a concert hall (wet path only), unit energy, float32.

    Frequency-dependent decay: three bands (below 500 Hz, 500 Hz-4 kHz, above 4 kHz) of Gaussian
    noise decay with reverberation times ``rt60_s`` times :data:`HALL_BAND_RT` (halls have
    longer bass and much shorter treble reverberation: Beranek 2004, *Concert Halls and Opera
    Houses*, ch. 4, values from memory), after 10-14 discrete early reflections over the first
    80 ms (side walls and ceiling) whose level falls with their delay. The late tail starts
    ``predelay_s`` after the direct sound and builds up over 50 ms.
    """
    rng = np.random.default_rng(seed)
    n_pre = max(int(round(predelay_s * sr)), 1)
    n = int(round(1.1 * rt60_s * max(HALL_BAND_RT) * sr))
    t = np.arange(n) / sr
    bands = [butter(4, 500.0, btype="lowpass", fs=sr, output="sos"),
             butter(4, [500.0, min(4000.0, 0.4 * sr)], btype="bandpass", fs=sr, output="sos"),
             butter(4, min(4000.0, 0.4 * sr), btype="highpass", fs=sr, output="sos")]
    # each band: its own decaying noise, filtered after the envelope so the band keeps its decay
    tail = sum(sosfilt(sos, rng.standard_normal(n) * 10.0 ** (-3.0 * t / (rt60_s * f)))
               for sos, f in zip(bands, HALL_BAND_RT))
    tail *= 1.0 - np.exp(-t / 0.05)                 # diffuse build-up
    n_early = min(int(0.08 * sr), n)
    k = np.sort(rng.integers(0, n_early, rng.integers(10, 15)))
    level = np.std(tail[n_early:n_early + int(0.05 * sr)]) * 6.0
    tail[k] += rng.choice([-1.0, 1.0], k.size) * level * np.exp(-k / (0.04 * sr)) * rng.uniform(0.5, 1.0, k.size)
    h = np.concatenate([np.zeros(n_pre), tail])
    return (h / np.sqrt(np.sum(h * h))).astype(np.float32)


def add_hall(y: np.ndarray, sr: int, *, rt60_s: float = 2.0, wet: float = 0.5, seed: int = 0) -> np.ndarray:
    """Place a mono signal in a concert hall (:func:`hall_response`), dry path at delay 0.

    ``y_out = (1 - wet) * y + wet * (h * y)``; same length as ``y`` (leave room for the tail).
    """
    y = np.asarray(y, dtype=np.float32)
    if y.ndim != 1:
        raise InputError(f"add_hall needs a mono signal, got shape {y.shape}")
    if not (0.0 <= wet <= 1.0 and rt60_s > 0.0):
        raise InputError("add_hall needs 0 <= wet <= 1 and rt60_s > 0")
    out = y * np.float32(1.0 - wet)
    if wet > 0 and y.size:
        _add_convolved(out, y, hall_response(sr, rt60_s=rt60_s, seed=seed), wet)
    return out
