"""Sustained instrument tones with slow or soft attacks: bowed strings, clarinet, flute, horn.

Each ``*_template(pitch, vel, n_samp, sr, rng)`` returns one float32 tone of ``n_samp`` samples
at the MIDI pitch ``pitch`` with a flat sustain; :func:`stimkit.render.synth.synthesize` shapes
it per note (attack, hold, release) and overlap-adds it. The attack is *not* part of the
template: these timbres have a per-note attack time (:data:`ATTACK_S`, or the note list's
``attack_s`` column) applied at every onset, so the same pitch can start slowly or quickly.

Models (steady spectra from the acoustics handbooks; shapes simplified, values from memory)
---------------------------------------------------------------------------------------------
``"bowed"``
    Helmholtz motion of a bowed string: a sawtooth with partial amplitudes ``1/n`` (Fletcher &
    Rossing 1998, sec. 10.2), vibrato of 5-6 Hz and ±20-35 cents starting 0.15 s into the note
    (violinists' vibrato: 5.5-7 Hz, Fletcher & Rossing sec. 10.7), bow noise (broadband noise
    at about -26 dB), and three broad body resonances (about 280 Hz, 550 Hz and 2.8 kHz).
    Attacks of 100-300 ms (:data:`ATTACK_S`).
``"clarinet"``
    A cylindrical bore closed at one end: odd harmonics dominate in the low register (even ones
    about 25 dB down below written C5, 10 dB down above), a spectral roll-off above about
    1.5 kHz, a little breath noise, no vibrato (Fletcher & Rossing sec. 15.3).
``"flute"``
    Nearly sinusoidal with weaker 2nd-5th harmonics, breath noise band-passed at 2-6 kHz that
    is three times louder during the attack ("chiff"), vibrato 5 Hz ±15 cents (Fletcher &
    Rossing sec. 16.10).
``"horn"``
    A brass tone with harmonic amplitudes ``1/n^1.5`` under a 1.2 kHz low-pass (a horn played
    mezzo-forte is dark: Fletcher & Rossing sec. 14.6).

References
----------
.. [1] N. H. Fletcher and T. D. Rossing, *The Physics of Musical Instruments*, 2nd ed.,
   Springer, 1998.
"""

from __future__ import annotations

import librosa
import numpy as np
from scipy.signal import butter, sosfilt

__all__ = ["TEMPLATES", "ATTACK_S", "wavetable_tone"]

#: (shortest, longest) attack, seconds, drawn per note by the ensemble renderer; the middle is
#: the default when a note list has no ``attack_s`` column.
ATTACK_S = {"bowed": (0.10, 0.30), "clarinet": (0.03, 0.08), "flute": (0.06, 0.12),
            "horn": (0.05, 0.10), "voice": (0.06, 0.14)}
_TABLE = 2048


def wavetable_tone(f0: float, amps: np.ndarray, n_samp: int, sr: int, rng, *, vib_hz: float = 0.0,
                   vib_cents: float = 0.0, vib_delay_s: float = 0.15) -> np.ndarray:
    """A periodic tone with harmonic amplitudes ``amps`` (``amps[k]`` for harmonic ``k + 1``),
    band-limited to ``0.45 sr``, with an optional vibrato fading in after ``vib_delay_s``."""
    k = np.arange(1, amps.size + 1)
    a = np.where(k * f0 * (1.0 + vib_cents / 1200.0) < 0.45 * sr, amps, 0.0)
    grid = np.arange(_TABLE) / _TABLE
    table = (a[:, None] * np.sin(2 * np.pi * k[:, None] * grid[None, :]
                                 + rng.uniform(0, 2 * np.pi, a.size)[:, None])).sum(axis=0)
    t = np.arange(n_samp) / sr
    if vib_hz > 0 and vib_cents > 0:
        depth = vib_cents / 1200.0 * np.log(2.0) * np.clip((t - vib_delay_s) / 0.3, 0.0, 1.0)
        inst = f0 * np.exp(depth * np.sin(2 * np.pi * vib_hz * t + rng.uniform(0, 2 * np.pi)))
        phase = np.cumsum(inst) / sr
    else:
        phase = f0 * t
    x = (phase % 1.0) * _TABLE
    i = x.astype(np.int64)
    fr = x - i
    return table[i] * (1.0 - fr) + table[(i + 1) % _TABLE] * fr


def _bowed(pitch: int, vel: float, n_samp: int, sr: int, rng) -> np.ndarray:
    f0 = float(librosa.midi_to_hz(pitch))
    n_h = 40
    y = wavetable_tone(f0, 1.0 / np.arange(1, n_h + 1), n_samp, sr, rng,
                       vib_hz=rng.uniform(5.0, 6.0), vib_cents=rng.uniform(20.0, 35.0))
    y = y + 0.05 * rng.standard_normal(n_samp)                    # bow noise
    out = np.zeros(n_samp)
    for fc, g in ((280.0, 1.0), (550.0, 0.8), (2800.0, 0.5)):
        if fc * 1.4 < 0.45 * sr:
            sos = butter(1, [fc / 1.4, fc * 1.4], btype="bandpass", fs=sr, output="sos")
            out += g * sosfilt(sos, y)
    sos = butter(2, min(6000.0, 0.45 * sr), btype="lowpass", fs=sr, output="sos")
    out += 0.3 * sosfilt(sos, y)
    return out.astype(np.float32)


def _clarinet(pitch: int, vel: float, n_samp: int, sr: int, rng) -> np.ndarray:
    f0 = float(librosa.midi_to_hz(pitch))
    k = np.arange(1, 31)
    even = 10 ** ((-25.0 if pitch < 70 else -10.0) / 20.0)      # sounding Bb4 = written C5
    amps = np.where(k % 2 == 1, 1.0, even) / k / (1.0 + (k * f0 / 1500.0) ** 2)
    y = wavetable_tone(f0, amps, n_samp, sr, rng)
    sos = butter(2, [1000.0, min(5000.0, 0.45 * sr)], btype="bandpass", fs=sr, output="sos")
    y = y + 0.015 * sosfilt(sos, rng.standard_normal(n_samp))
    return y.astype(np.float32)


def _flute(pitch: int, vel: float, n_samp: int, sr: int, rng) -> np.ndarray:
    f0 = float(librosa.midi_to_hz(pitch))
    amps = np.array([1.0, 0.45, 0.22, 0.10, 0.05])
    y = wavetable_tone(f0, amps, n_samp, sr, rng, vib_hz=5.0, vib_cents=15.0, vib_delay_s=0.2)
    sos = butter(2, [2000.0, min(6000.0, 0.45 * sr)], btype="bandpass", fs=sr, output="sos")
    breath = sosfilt(sos, rng.standard_normal(n_samp))
    breath *= 0.05 / max(np.std(breath), 1e-12)
    chiff = 1.0 + 2.0 * np.exp(-np.arange(n_samp) / (0.08 * sr))
    return (y + breath * chiff).astype(np.float32)


def _horn(pitch: int, vel: float, n_samp: int, sr: int, rng) -> np.ndarray:
    f0 = float(librosa.midi_to_hz(pitch))
    k = np.arange(1, 31)
    amps = k ** -1.5 / (1.0 + (k * f0 / 1200.0) ** 2)
    y = wavetable_tone(f0, amps, n_samp, sr, rng, vib_hz=4.5, vib_cents=5.0, vib_delay_s=0.3)
    return y.astype(np.float32)


#: Template builders of the timbres of this module.
TEMPLATES = {"bowed": _bowed, "clarinet": _clarinet, "flute": _flute, "horn": _horn}
