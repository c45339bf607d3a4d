"""Additive synthesis of a note list into a mono signal: piano-, organ- and strings-like timbres.

:func:`synthesize` renders notes given in ``recording`` seconds (``onset_s``, ``offset_s``; e.g.
:attr:`stimkit.render.performance.Performance.notes`) into a float32 signal at ``sr`` Hz.

Conventions
-----------
- A note's sound starts exactly at sample ``round(onset_s * sr)`` (its first non-zero sample;
  the attack ramps up from there), so ground truth is sample-accurate (error <= half a sample).
- A note sounds until ``offset_s`` and then dies away with the timbre's release time constant
  (dampers); its tail is cut after five time constants.
- The level of a note scales with ``(velocity / 127) ** 2``; the whole signal is scaled down only
  if its peak would exceed :data:`PEAK_LIMIT` (one gain for the whole signal, no limiter).
- Each pitch (piano: each pitch and velocity band of 16) is rendered once as a template and
  overlap-added at every onset (rendering cost grows with the number of distinct pitches, not
  notes). Templates are seeded from ``(seed, pitch, timbre)`` (partial phases) and ``(seed,
  pitch, band, timbre)`` (noise), so a note sounds the same whatever else is in the list.
- Piano partials are computed in blocks of 2048 samples as decaying complex phasors (the value
  at each block start times one precomputed block of phasors), which is exact up to float32
  rounding and costs one matrix product per pitch.

Timbres
-------
``"piano"``
    Inharmonic partials of a stiff string, ``f_n = n f0 sqrt(1 + B n^2)`` (Fletcher, Blackham &
    Stratton 1962; Fletcher & Rossing 1998, ch. 12), with ``B`` rising with pitch; stretched
    octaves following the shape of the Railsback curve (bass flat, treble sharp, about 30 cents at
    the ends); partial amplitudes shaped by the hammer strike position (1/8 of the string: the
    ``|sin(pi n / 8)|`` comb) and a velocity-dependent spectral slope and low-pass (louder = brighter);
    a two-stage decay per partial, fast "prompt sound" then slow "aftersound" (Weinreich 1977),
    higher partials decaying faster; and a short band-passed noise burst for the hammer.
``"organ"``
    Exactly harmonic partials in a fixed registration (foundation, octave, twelfth, fifteenth and
    mixture ranks), no velocity brightness, a 12 ms attack, a flat sustain and a short release:
    a steady spectrum clearly different from the piano's decaying, inharmonic one.
``"strings"``
    A bowed-string-like tone: a band-limited sawtooth (the Helmholtz motion of a bowed string has
    partial amplitudes 1/n; Fletcher & Rossing 1998, ch. 10) with a 5.5 Hz, ±25 cent vibrato
    fading in after 0.1 s, bow noise, three broad body resonances, a 30 ms attack and a 0.12 s
    release.
``"bowed"``, ``"clarinet"``, ``"flute"``, ``"horn"``
    Sustained tones with slow or soft attacks from :mod:`stimkit.render.timbres`; their attack
    is applied per note (the note list's optional ``attack_s`` column, else the middle of
    :data:`stimkit.render.timbres.ATTACK_S`), so it can differ from note to note.

References
----------
.. [1] H. Fletcher, E. D. Blackham and R. Stratton, "Quality of piano tones", JASA 34(6), 1962.
.. [2] N. H. Fletcher and T. D. Rossing, *The Physics of Musical Instruments*, 2nd ed., Springer,
   1998, ch. 10 (bowed strings), ch. 12 (piano) and ch. 17 (organ pipes).
.. [3] G. Weinreich, "Coupled piano strings", JASA 62(6), 1977.
.. [4] O. L. Railsback, "Scale temperament as applied to piano tuning", JASA 9(3), 1938.
"""

from __future__ import annotations

import librosa
import numpy as np
import pandas as pd
from scipy.signal import butter, sosfilt

from ..errors import InputError
from .timbres import ATTACK_S, TEMPLATES

__all__ = ["synthesize", "TIMBRES", "PEAK_LIMIT", "midi_to_hz", "piano_partials"]

TIMBRES = ("piano", "organ", "strings", "bowed", "clarinet", "flute", "horn")
#: Largest absolute sample value of the output; above it the whole signal is scaled down.
PEAK_LIMIT = 0.98
_MASTER = 0.25          # gain of one velocity-127 note
_BAND = 16              # velocity band width for templates
_BLOCK = 2048           # block length of the piano partial bank, samples
_NEEDED = ("onset_s", "offset_s", "pitch", "velocity")

# (release time constant s, longest template s, attack s)
_SHAPE = {"piano": (0.09, 5.0, 0.0015), "organ": (0.05, 120.0, 0.012), "strings": (0.12, 120.0, 0.03),
          "bowed": (0.15, 120.0, 0.0), "clarinet": (0.06, 120.0, 0.0), "flute": (0.08, 120.0, 0.0),
          "horn": (0.10, 120.0, 0.0)}
_ORGAN_RANKS = np.array([[1, 1.0], [2, 0.55], [3, 0.30], [4, 0.28], [5, 0.10], [6, 0.14], [8, 0.10]])


#: Equal-tempered frequency of a MIDI number, A4 = MIDI 69 = 440 Hz (librosa's own function).
midi_to_hz = librosa.midi_to_hz


def _stretch_cents(pitch: float) -> float:
    """Octave stretch of piano tuning in cents (Railsback-like shape, 0 at A4)."""
    d = float(pitch) - 69.0
    return 30.0 * (d / 39.0) ** 3 if d > 0 else 30.0 * (d / 48.0) ** 3


def _inharmonicity(pitch: float) -> float:
    """Stiffness coefficient B: about 1e-4 in the bass, 5e-4 at A4, a few 1e-3 at the top.

    Order of magnitude from Fletcher & Rossing (1998, ch. 12) -- values from memory, shape assumed.
    """
    return float(np.clip(5e-4 * 2.0 ** ((float(pitch) - 69.0) / 12.0 * 0.9), 1e-4, 8e-3))


def piano_partials(pitch: float, *, sr: int, velocity: float = 80.0):
    """Frequencies (Hz) and amplitudes of the piano partials for one note.

    Parameters
    ----------
    pitch : float
        MIDI number.
    sr : int
        Sampling rate; partials above ``0.45 * sr`` are left out.
    velocity : float
        1-127; higher values give a flatter, brighter spectrum.

    Returns
    -------
    freqs_hz, amps : numpy.ndarray
        ``f_n = n f0 sqrt(1 + B n^2)`` (Fletcher et al. 1962) and relative amplitudes, ``n = 1..N``.
    """
    f0 = midi_to_hz(pitch) * 2.0 ** (_stretch_cents(pitch) / 1200.0)
    b = _inharmonicity(pitch)
    v = np.clip(velocity / 127.0, 0.0, 1.0)
    n = np.arange(1, 41, dtype=np.float64)
    f = n * f0 * np.sqrt(1.0 + b * n * n)
    keep = f < min(0.45 * sr, 9000.0)
    n, f = n[keep], f[keep]
    slope = 1.5 - 0.7 * v                       # louder -> flatter spectrum
    cutoff = 900.0 + 4500.0 * v ** 1.5          # louder -> higher brightness corner
    comb = np.abs(np.sin(np.pi * n / 8.0)) + 0.08   # strike at 1/8 of the string length
    a = comb * n ** (-slope) / (1.0 + (f / cutoff) ** 2)
    return f, a / a.max()


def _piano_templates(pitch: int, vels: list[float], n_samps: list[int], sr: int,
                     rng_phase, rngs_noise) -> list[np.ndarray]:
    """Piano tones of one pitch at several velocities (one float32 array each).

    Every partial is a sum of two decaying complex exponentials (prompt sound and aftersound).
    The signal is built in blocks of :data:`_BLOCK` samples: inside a block each partial is its
    value at the block start times a precomputed block-long decaying phasor, so a block of all
    velocities is two small complex matrix products.
    """
    f, _ = piano_partials(pitch, sr=sr)
    amps = np.stack([piano_partials(pitch, sr=sr, velocity=v)[1] for v in vels])   # bands x partials
    tau2 = float(np.clip(9.0 * 2.0 ** (-(pitch - 21) / 22.0), 0.35, 9.0))   # aftersound, s
    tau1 = tau2 / 7.0                                                        # prompt sound, s
    fac = 1.0 + f / 2500.0                                                   # high partials decay faster
    w = 2 * np.pi * f
    k1, k2 = fac / tau1, fac / tau2
    phase = rng_phase.uniform(0, 2 * np.pi, f.size)
    tau = np.arange(_BLOCK) / sr
    # block-long decaying phasors of both stages, stacked: (2 partials, block)
    bank = np.concatenate([np.exp((1j * w[:, None] - k[:, None]) * tau[None, :]) for k in (k1, k2)])
    n_max = max(n_samps)
    n_blk = -(-n_max // _BLOCK)
    t0 = (np.arange(n_blk) * _BLOCK / sr)[:, None]                           # block starts, s
    rot = np.exp(1j * (w[None, :] * t0 + phase[None, :]))                    # (blocks, partials)
    start = np.concatenate([0.7 * np.exp(-k1[None, :] * t0) * rot, 0.3 * np.exp(-k2[None, :] * t0) * rot],
                           axis=1)                                           # (blocks, 2 partials)
    amps2 = np.concatenate([amps, amps], axis=1)                             # (bands, 2 partials)
    coef = (start[:, None, :] * amps2[None, :, :]).reshape(n_blk * len(vels), -1)
    # one matrix product for every block and velocity: (blocks * bands, block)
    y = (coef.astype(np.complex64) @ bank.astype(np.complex64)).real
    y = y.reshape(n_blk, len(vels), _BLOCK).transpose(1, 0, 2).reshape(len(vels), n_blk * _BLOCK)
    out = []
    for row, vel, n_samp, rng in zip(y, vels, n_samps, rngs_noise):
        tone = row[:n_samp].copy()
        # hammer: band-passed noise burst, brighter when louder
        v = vel / 127.0
        n_h = min(n_samp, int(0.03 * sr))
        hi = min(1500.0 + 5000.0 * v, 0.45 * sr)
        sos = butter(2, [300.0, hi], btype="bandpass", fs=sr, output="sos")
        burst = sosfilt(sos, rng.standard_normal(n_h)) * np.exp(-np.arange(n_h) / (0.005 * sr))
        level = (0.25 + 0.35 * v) * np.max(np.abs(tone[: max(n_h, 1)]))
        tone[:n_h] += level * burst / max(np.max(np.abs(burst)), 1e-12)
        out.append(tone)
    return out


def _organ_template(pitch: int, vel: float, n_samp: int, sr: int, rng) -> np.ndarray:
    f0 = float(midi_to_hz(pitch))
    t = np.arange(n_samp, dtype=np.float32) / np.float32(sr)
    y = np.zeros(n_samp, dtype=np.float32)
    for k, w in _ORGAN_RANKS:
        fk = k * f0
        if fk >= 0.45 * sr:
            continue
        y += np.float32(w) * np.cos(np.float32(2 * np.pi * fk) * t + np.float32(rng.uniform(0, 2 * np.pi)))
    # a little wind noise, low-passed
    sos = butter(2, min(3000.0, 0.45 * sr), btype="lowpass", fs=sr, output="sos")
    y += 0.01 * sosfilt(sos, rng.standard_normal(n_samp)).astype(np.float32)
    return y


def _strings_template(pitch: int, vel: float, n_samp: int, sr: int, rng) -> np.ndarray:
    f0 = float(midi_to_hz(pitch))
    t = np.arange(n_samp) / sr
    # vibrato: 5.5 Hz, +-25 cents, fading in over the first 0.3 s
    depth = 0.25 / 12.0 * np.log(2.0) * np.clip((t - 0.1) / 0.3, 0.0, 1.0)
    inst = f0 * np.exp(depth * np.sin(2 * np.pi * 5.5 * t + rng.uniform(0, 2 * np.pi)))
    phase = np.cumsum(inst) / sr
    # one period of a band-limited sawtooth (Helmholtz motion, amplitudes 1/n)
    n_h = int(max(1, min(30, 0.45 * sr / (f0 * 1.02))))
    grid = np.arange(2048) / 2048.0
    k = np.arange(1, n_h + 1)[:, None]
    table = (np.sin(2 * np.pi * k * grid[None, :]) / k).sum(axis=0)
    x = (phase % 1.0) * 2048.0
    i = x.astype(np.int64)
    fr = x - i
    y = table[i] * (1.0 - fr) + table[(i + 1) % 2048] * fr
    y += 0.02 * rng.standard_normal(n_samp)                       # bow noise
    # body: broad resonances near 280 Hz, 550 Hz and 2.8 kHz over a gentle low-pass
    out = np.zeros(n_samp)
    for fc, g in ((280.0, 1.0), (550.0, 0.8), (2800.0, 0.5)):
        if fc * 1.4 < 0.45 * sr:
            sos = butter(1, [fc / 1.4, fc * 1.4], btype="bandpass", fs=sr, output="sos")
            out += g * sosfilt(sos, y)
    sos = butter(2, min(6000.0, 0.45 * sr), btype="lowpass", fs=sr, output="sos")
    out += 0.3 * sosfilt(sos, y)
    return out.astype(np.float32)


def _attack(y: np.ndarray, n_att: int) -> None:
    """Raised-cosine rise over ``n_att`` samples starting at sample 0 (sample 0 stays non-zero)."""
    n_att = min(max(n_att, 1), y.size)
    y[:n_att] *= (0.5 - 0.5 * np.cos(np.pi * (np.arange(n_att) + 1) / (n_att + 1))).astype(np.float32)


def _validate(notes: pd.DataFrame, sr: int, timbre: str, duration_s) -> None:
    if timbre not in TIMBRES:
        raise InputError(f"unknown timbre {timbre!r}; use one of {', '.join(TIMBRES)}")
    if not isinstance(sr, (int, np.integer)) or sr < 8000:
        raise InputError(f"sr must be an integer >= 8000 Hz, got {sr!r}")
    missing = [c for c in _NEEDED if c not in notes.columns]
    if missing:
        raise InputError(f"notes table lacks column(s) {', '.join(missing)}; pass Performance.notes")
    if len(notes):
        on = notes["onset_s"].to_numpy(dtype=np.float64)
        off = notes["offset_s"].to_numpy(dtype=np.float64)
        if not (np.all(np.isfinite(on)) and np.all(on >= 0) and np.all(off > on)):
            raise InputError("notes need finite onset_s >= 0 and offset_s > onset_s")
        p = notes["pitch"].to_numpy(dtype=np.float64)
        if np.any((p < 0) | (p > 127)):
            raise InputError("note pitch must be a MIDI number 0..127")
    if duration_s is not None and not duration_s > 0:
        raise InputError(f"duration_s must be > 0, got {duration_s}")


def synthesize(
    notes: pd.DataFrame,
    *,
    sr: int = 22050,
    timbre: str = "piano",
    seed: int = 0,
    duration_s: float | None = None,
) -> np.ndarray:
    """Render a note list to a mono float32 signal.

    Parameters
    ----------
    notes : pandas.DataFrame
        Columns ``onset_s, offset_s`` (recording seconds), ``pitch`` (MIDI), ``velocity`` (1-127).
    sr : int
        Sampling rate, Hz.
    timbre : str
        One of :data:`TIMBRES`; see the module docstring.
    seed : int
        Seed of the partial phases and noise; the same seed gives the same array.
    duration_s : float, optional
        Length of the output; default: last offset plus the release tail plus 0.5 s. Notes
        reaching past the end are cut.

    Returns
    -------
    numpy.ndarray
        float32, shape ``(round(duration_s * sr),)``; note ``i`` starts at sample
        ``round(onset_s[i] * sr)``.

    Raises
    ------
    stimkit.errors.InputError
        Unknown timbre, missing columns or impossible note times.

    Examples
    --------
    >>> import pandas as pd
    >>> notes = pd.DataFrame({"onset_s": [0.5], "offset_s": [1.5], "pitch": [69], "velocity": [90]})
    >>> y = synthesize(notes, sr=22050, timbre="piano")
    >>> int(np.flatnonzero(y)[0])   # the note starts on sample round(0.5 * 22050)
    11025
    """
    _validate(notes, sr, timbre, duration_s)
    rel_s, cap_s, att_s = _SHAPE[timbre]
    on = notes["onset_s"].to_numpy(dtype=np.float64)
    off = notes["offset_s"].to_numpy(dtype=np.float64)
    pitch = np.rint(notes["pitch"].to_numpy(dtype=np.float64)).astype(np.int64)
    vel = np.clip(notes["velocity"].to_numpy(dtype=np.float64), 1.0, 127.0)
    if duration_s is None:
        duration_s = (float(off.max()) if off.size else 0.0) + 5 * rel_s + 0.5
    n_out = int(round(duration_s * sr))
    out = np.zeros(n_out, dtype=np.float32)
    if not on.size:
        return out

    i0 = np.rint(on * sr).astype(np.int64)
    n_hold = np.maximum(np.rint((off - on) * sr).astype(np.int64), 1)
    n_rel = int(round(5 * rel_s * sr))
    cap = int(round(cap_s * sr))
    if timbre == "piano":   # brightness follows velocity: one template per velocity band
        band = np.clip((vel - 1) // _BAND, 0, 127 // _BAND).astype(np.int64)
    else:                   # spectrum independent of velocity: one template per pitch
        band = np.zeros(vel.size, dtype=np.int64)
    gain = (_MASTER * (vel / 127.0) ** 2).astype(np.float32)
    n_need = np.minimum(n_hold + n_rel, cap)
    release = np.exp(-np.arange(n_rel, dtype=np.float32) / np.float32(rel_s * sr))
    make = {"organ": _organ_template, "strings": _strings_template, **TEMPLATES}.get(timbre)
    per_note_attack = timbre in ATTACK_S
    if per_note_attack:
        lo, hi = ATTACK_S[timbre]
        att = (notes["attack_s"].to_numpy(dtype=np.float64) if "attack_s" in notes.columns
               else np.full(on.size, 0.5 * (lo + hi)))
        att_len = np.maximum(np.rint(att * sr).astype(np.int64), 1)
        ramps: dict[int, np.ndarray] = {}
    tid = TIMBRES.index(timbre)
    n_fade = int(0.02 * sr)

    scratch = np.empty(int(n_need.max()), dtype=np.float32)
    key = pitch * 64 + band
    order = np.lexsort((i0, key))
    keys, first = np.unique(key[order], return_index=True)
    bounds = np.r_[first, order.size]
    n_key = np.maximum.reduceat(n_need[order], first)   # longest sound needed per key
    seed32 = int(seed) & 0xFFFFFFFF
    att_n = int(round(att_s * sr))
    templates: dict[int, np.ndarray] = {}
    for j, k in enumerate(keys):
        idx = order[bounds[j]:bounds[j + 1]]
        p = int(k // 64)
        if int(k) not in templates:   # keys are sorted by pitch: build all bands of a pitch at once
            templates.clear()
            todo = [(int(kk), int(n_key[jj])) for jj, kk in enumerate(keys) if int(kk // 64) == p]
            centres = [float(min((kk % 64) * _BAND + _BAND / 2 + 1, 127)) for kk, _ in todo]
            rngs = [np.random.default_rng([seed32, p, kk % 64, tid]) for kk, _ in todo]
            if timbre == "piano":
                tones = _piano_templates(p, centres, [n for _, n in todo], sr,
                                         np.random.default_rng([seed32, p, tid]), rngs)
            else:
                tones = [make(p, c, n, sr, r) for (_, n), c, r in zip(todo, centres, rngs)]
            for (kk, n_t), tmpl in zip(todo, tones):
                _attack(tmpl, att_n)
                m = min(n_fade, n_t)
                tmpl[n_t - m:] *= np.linspace(1.0, 0.0, m, dtype=np.float32)   # never end abruptly
                pk = float(np.max(np.abs(tmpl[: max(1, min(n_t, int(0.2 * sr)))])))
                tmpl /= max(pk, 1e-9)
                templates[kk] = tmpl
        tmpl = templates[int(k)]
        for i in idx:
            s0 = int(i0[i])
            if s0 >= n_out:
                continue
            n = int(min(n_need[i], n_out - s0))
            h = min(int(n_hold[i]), n)
            seg = scratch[:n]
            np.multiply(tmpl[:n], gain[i], out=seg)
            if per_note_attack:
                na = int(min(att_len[i], n))
                if na not in ramps:
                    ramps[na] = (0.5 - 0.5 * np.cos(np.pi * (np.arange(na) + 1) / (na + 1))).astype(np.float32)
                np.multiply(seg[:na], ramps[na], out=seg[:na])
            if h < n:
                np.multiply(seg[h:], release[: n - h], out=seg[h:])
            dst = out[s0:s0 + n]
            np.add(dst, seg, out=dst)
    pk = float(np.max(np.abs(out)))
    if pk > PEAK_LIMIT:
        out *= np.float32(PEAK_LIMIT / pk)
    return out
