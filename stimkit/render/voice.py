"""A singing voice: vibrato, vowel formants, legato with portamento, consonant noise.

:func:`sing` renders the notes of one vocal part into a mono float32 signal. Unlike
:func:`stimkit.render.synth.synthesize` it renders *lines*, not independent notes: a note that
follows the previous one without a gap (legato) glides into its pitch and is not attacked again.

Conventions
-----------
- A note's sound starts at sample ``round(onset_s * sr)`` (ground truth, as in ``synthesize``):
  a consonant's noise or the vowel's soft attack begins there; in legato the glide from the
  previous pitch begins there.
- Notes that overlap in time are split greedily into monophonic lines (a part with chords
  becomes several lines).

Model
-----
A source-filter model (Fant 1960) in the form of a parallel formant synthesizer (Klatt 1980):
the glottal source is a band-limited pulse train with harmonic amplitudes falling 12 dB per
octave (``1/n^2``), plus aspiration noise; it drives five resonators (F1-F5 of the vowel; vowel
averages of Peterson & Barney 1952, raised by 15 % for a high voice and with the singer's formant
cluster near 2.8 kHz, Sundberg 1987). Each note sings one vowel drawn at random. Vibrato: 5-6 Hz,
±40-70 cents (Sundberg 1987: 5.5-7.5 Hz, ±50-100 cents in opera; here milder), fading in after
0.2 s. Legato: when a note starts less than :data:`LEGATO_GAP_S` after the previous one ends, its
pitch glides from the previous pitch over 50-150 ms (portamento) and its amplitude rises only
from 70 % of the sustain; otherwise it is attacked over 60-140 ms. Syllables: a random
:data:`CONSONANT_SHARE` of attacked notes start with 30-80 ms of band-passed consonant noise
(fricative, 2.5-7 kHz). Each note ends with a 60 ms release.

References
----------
.. [1] G. Fant, *Acoustic Theory of Speech Production*, Mouton, 1960.
.. [2] D. H. Klatt, "Software for a cascade/parallel formant synthesizer", JASA 67(3), 1980.
.. [3] G. E. Peterson and H. L. Barney, "Control methods used in a study of the vowels", JASA
   24(2), 1952.
.. [4] J. Sundberg, *The Science of the Singing Voice*, Northern Illinois University Press, 1987.
"""

from __future__ import annotations

import librosa
import numpy as np
import pandas as pd
from scipy.signal import butter, lfilter, sosfilt

from .sounds import VOWEL_FORMANTS_HZ

__all__ = ["sing", "LEGATO_GAP_S", "CONSONANT_SHARE"]

#: A note starting less than this after the previous note of its line ends is sung legato.
LEGATO_GAP_S = 0.05
#: Share of attacked (non-legato) notes that start with a consonant.
CONSONANT_SHARE = 0.6
_RELEASE_S = 0.06
_N_HARM = 60


def _lines(on: np.ndarray, off: np.ndarray) -> list[list[int]]:
    """Greedy split of notes (sorted by onset) into non-overlapping lines."""
    ends: list[float] = []
    lines: list[list[int]] = []
    for i in np.argsort(on, kind="stable"):
        for k, e in enumerate(ends):
            if on[i] >= e - 1e-6:
                lines[k].append(int(i))
                ends[k] = off[i]
                break
        else:
            lines.append([int(i)])
            ends.append(off[i])
    return lines


def _resonator(fc: float, bw: float, sr: int):
    """Second-order resonator (Klatt 1980) with unit gain at DC replaced by peak gain ~1."""
    r = np.exp(-np.pi * bw / sr)
    c = -r * r
    b = 2 * r * np.cos(2 * np.pi * fc / sr)
    a = 1.0 - b - c
    return np.array([a]), np.array([1.0, -b, -c])


def _source(f0_track: np.ndarray, phase0: float, sr: int, amps: np.ndarray) -> tuple[np.ndarray, float]:
    """Band-limited glottal pulses along an instantaneous frequency track; returns the signal and
    the phase (cycles) at its end."""
    phase = phase0 + np.cumsum(f0_track) / sr
    y = np.zeros(f0_track.size)
    f_max = float(f0_track.max()) if f0_track.size else 0.0
    for k, a in enumerate(amps, start=1):
        if k * f_max >= 0.45 * sr:
            break
        y += a * np.sin(2 * np.pi * k * phase)
    return y, float(phase[-1] % 1.0) if phase.size else phase0


def sing(notes: pd.DataFrame, *, sr: int, seed: int, n_out: int, high: bool | None = None) -> np.ndarray:
    """Render one vocal part (``onset_s, offset_s, pitch, velocity``) into ``n_out`` samples.

    Parameters
    ----------
    notes : pandas.DataFrame
        The part's notes in recording seconds.
    sr : int
        Sampling rate, Hz.
    seed : int
        Seeds vowels, vibrato, glides, consonants and noise.
    n_out : int
        Length of the output, samples.
    high : bool, optional
        Formants of a high voice (raised 15 %); default: mean pitch at or above MIDI 60.

    Returns
    -------
    numpy.ndarray
        float32, peak-normalised to 0.5 times the loudest note's velocity gain (the caller mixes).
    """
    out = np.zeros(n_out, dtype=np.float32)
    if not len(notes):
        return out
    rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, 11])
    on = notes["onset_s"].to_numpy(np.float64)
    off = notes["offset_s"].to_numpy(np.float64)
    pitch = notes["pitch"].to_numpy(np.float64)
    vel = np.clip(notes["velocity"].to_numpy(np.float64), 1, 127)
    if high is None:
        high = float(np.mean(pitch)) >= 60.0
    scale = 1.15 if high else 1.0
    harm = 1.0 / np.arange(1, _N_HARM + 1) ** 2.0
    rel_n = int(_RELEASE_S * sr)
    for line in _lines(on, off):
        phase = 0.0
        prev_pitch, prev_off = None, -np.inf
        for i in line:
            s0 = int(round(on[i] * sr))
            if s0 >= n_out:
                break
            s1 = min(int(round(off[i] * sr)) + rel_n, n_out)
            n = max(s1 - s0, 1)
            t = np.arange(n) / sr
            legato = prev_pitch is not None and on[i] - prev_off < LEGATO_GAP_S
            f_target = float(librosa.midi_to_hz(pitch[i]))
            log_f = np.full(n, np.log(f_target))
            if legato and prev_pitch != pitch[i]:
                g = max(int(rng.uniform(0.05, 0.15) * sr), 1)
                f_prev = np.log(float(librosa.midi_to_hz(prev_pitch)))
                w = np.clip(np.arange(n) / g, 0.0, 1.0)
                log_f = f_prev + (np.log(f_target) - f_prev) * (0.5 - 0.5 * np.cos(np.pi * w))
            vib = rng.uniform(40.0, 70.0) / 1200.0 * np.log(2.0) * np.clip((t - 0.2) / 0.3, 0.0, 1.0)
            log_f = log_f + vib * np.sin(2 * np.pi * rng.uniform(5.0, 6.0) * t + rng.uniform(0, 2 * np.pi))
            src, phase = _source(np.exp(log_f), phase, sr, harm)
            src += 0.02 * rng.standard_normal(n)              # aspiration
            vowel = VOWEL_FORMANTS_HZ[rng.integers(len(VOWEL_FORMANTS_HZ))] * scale
            formants = [(vowel[0], 80.0, 1.0), (vowel[1], 100.0, 0.6), (vowel[2], 140.0, 0.4),
                        (2800.0, 200.0, 0.35), (3500.0, 250.0, 0.2)]
            y = np.zeros(n)
            for fc, bw, gain in formants:
                if fc < 0.45 * sr:
                    b, a = _resonator(fc, bw, sr)
                    y += gain * lfilter(b, a, src)
            # envelope: soft attack (or a legato swell), hold, release
            env = np.ones(n)
            if legato:
                na = max(int(0.04 * sr), 1)
                env[:na] = 0.7 + 0.3 * np.arange(na) / na
            else:
                na = max(int(rng.uniform(0.06, 0.14) * sr), 1)
                env[:min(na, n)] = (0.5 - 0.5 * np.cos(np.pi * (np.arange(min(na, n)) + 1) / (na + 1)))
            h = max(n - rel_n, 0)
            env[h:] *= np.exp(-np.arange(n - h) / (0.25 * rel_n))
            y *= env / max(np.max(np.abs(y[: min(n, int(0.5 * sr))])), 1e-9)
            if not legato and rng.random() < CONSONANT_SHARE:
                nc = min(int(rng.uniform(0.03, 0.08) * sr), n)
                lo = rng.uniform(2500.0, 4000.0)
                sos = butter(2, [lo, min(lo + 3000.0, 0.45 * sr)], btype="bandpass", fs=sr, output="sos")
                burst = sosfilt(sos, rng.standard_normal(nc))
                burst *= 0.5 / max(np.max(np.abs(burst)), 1e-9) * np.hanning(2 * nc)[nc:]
                y[:nc] += burst
            y[0] = y[0] if y[0] != 0 else 1e-4                  # the sound starts on this sample
            dst = out[s0:s0 + n]
            dst += (y[: dst.size] * (vel[i] / 127.0) ** 2).astype(np.float32)
            prev_pitch, prev_off = pitch[i], off[i]
    return out
