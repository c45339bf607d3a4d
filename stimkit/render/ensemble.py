"""A score played by an ensemble, in a hall, before an audience, with exact ground truth.

:func:`render_ensemble` performs a score (:func:`stimkit.render.performance.perform`), plays each
part with its own timbre (:func:`timbres_for` picks one from the part's name: strings bowed, a
voice sung by :func:`stimkit.render.voice.sing`, winds, piano, organ), mixes the parts, and
optionally places the mix in a hall (:func:`stimkit.render.room.add_hall`), adds an audience
(:func:`stimkit.render.audience.audience_noise`) and frames it with applause
(:func:`stimkit.render.audience.with_applause`).

Conventions
-----------
- Ground truth: ``perf.notes.onset_s`` is snapped to the output's sample grid and includes the
  applause lead-in, so it is the exact sample where each note's sound starts (the hall and the
  audience add sound but keep the dry path at delay 0).
- Mixing: each part is scaled to the same RMS while it sounds, the part with the highest mean
  pitch (the melody, or the voice) :data:`MELODY_GAIN_DB` louder; the mix is scaled down only if
  its peak would exceed 0.98.
- Attack times of the slow timbres are drawn per note from
  :data:`stimkit.render.timbres.ATTACK_S` (uniform), from the seed.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

from .audience import audience_noise, with_applause
from .performance import Performance, perform
from .room import add_hall
from .synth import PEAK_LIMIT, TIMBRES, synthesize
from .timbres import ATTACK_S
from .voice import sing

__all__ = ["render_ensemble", "timbres_for", "synthesize_parts", "ALL_TIMBRES", "MELODY_GAIN_DB"]

#: Every timbre a part can have: those of :func:`synthesize` and ``"voice"``.
ALL_TIMBRES = TIMBRES + ("voice",)
#: Level of the melody part above the others, dB.
MELODY_GAIN_DB = 3.0
_BY_NAME = [
    (r"violin|viola|cello|violoncello|contrabass|double bass|\bvl|\bvc|\bvla|string", "bowed"),
    (r"voice|soprano|alto|tenor|baritone|bass(?!oon)|choir|canto|singstimme|vocal|mezzo", "voice"),
    (r"clarinet|klarinette|clarinetto", "clarinet"),
    (r"flute|flauto|piccolo|fl\u00f6te", "flute"),
    (r"horn|corno|cor\b", "horn"),
    (r"organ|orgel", "organ"),
    (r"piano|klavier|pianoforte|harpsichord|cembalo|keyboard", "piano"),
]


def timbres_for(parts, *, default: str = "piano", override: dict | None = None) -> dict:
    """Timbre of each part from its name (``Violin 1`` -> bowed, ``Voice`` -> voice, ...);
    ``override`` maps part names (or ``"*"`` for all the others) to timbres."""
    override = dict(override or {})
    out = {}
    for p in parts:
        name = str(p)
        if name in override:
            out[name] = override[name]
            continue
        if "*" in override:
            out[name] = override["*"]
            continue
        t = default
        for pat, timbre in _BY_NAME:
            if re.search(pat, name.lower()):
                t = timbre
                break
        out[name] = t
    return out


def _active_rms(y: np.ndarray) -> float:
    a = np.abs(y)
    thr = 1e-3 * float(a.max()) if a.size else 0.0
    sel = y[a > thr]
    return float(np.sqrt(np.mean(sel.astype(np.float64) ** 2))) if sel.size else 0.0


def synthesize_parts(notes: pd.DataFrame, *, sr: int, timbres: dict, seed: int,
                     duration_s: float) -> np.ndarray:
    """Each part of ``notes`` (column ``part``) with its timbre, mixed (see module docstring)."""
    n_out = int(round(duration_s * sr))
    rng = np.random.default_rng([int(seed) & 0xFFFFFFFF, 31])
    parts = notes["part"].astype(str)
    means = notes.groupby(parts)["pitch"].mean()
    melody = str(means.idxmax()) if len(means) > 1 else None
    mix = np.zeros(n_out, dtype=np.float32)
    for k, (name, g) in enumerate(notes.groupby(parts, sort=True)):
        timbre = timbres.get(name, "piano")
        if timbre == "voice":
            y = sing(g, sr=sr, seed=seed + 101 * (k + 1), n_out=n_out)
        else:
            g = g.copy()
            if timbre in ATTACK_S:
                lo, hi = ATTACK_S[timbre]
                g["attack_s"] = rng.uniform(lo, hi, len(g))
            y = synthesize(g, sr=sr, timbre=timbre, seed=seed + 101 * (k + 1), duration_s=duration_s)
        r = _active_rms(y)
        if r <= 0:
            continue
        gain = 0.1 / r * (10 ** (MELODY_GAIN_DB / 20.0) if name == melody else 1.0)
        mix += (y * gain).astype(np.float32)
    pk = float(np.max(np.abs(mix))) if mix.size else 0.0
    if pk > PEAK_LIMIT:
        mix *= np.float32(PEAK_LIMIT / pk)
    return mix


def render_ensemble(score, *, seed: int, sr: int = 22050, timbres: dict | None = None,
                    perform_options: dict | None = None, start_s: float = 2.0,
                    hall_rt60_s: float | None = None, hall_wet: float = 0.5,
                    audience: bool = False, mains_hz: float = 50.0, applause: bool = False,
                    notes: pd.DataFrame | None = None) -> tuple[np.ndarray, Performance]:
    """Perform and play ``score`` as an ensemble; see the module docstring.

    Parameters
    ----------
    score : ScoreModel
        What the performers play (in their performed order).
    seed : int
        Seeds the performance (``seed``), the synthesis (``seed + 1``), the hall (``seed + 2``)
        and the audience (``seed + 3``).
    timbres : dict, optional
        Part name -> timbre (one of :data:`ALL_TIMBRES`); default :func:`timbres_for` the parts.
    perform_options : dict, optional
        Keyword options of :func:`stimkit.render.performance.perform`.
    start_s : float
        Silence before the first note, seconds.
    hall_rt60_s, hall_wet : float
        A hall of that reverberation time (None: dry).
    audience, mains_hz : bool, float
        Add coughs, chair noise and hum at ``mains_hz`` (0: no hum).
    applause : bool
        Clapping before and after the piece.

    Returns
    -------
    y : numpy.ndarray
        float32 mono signal.
    perf : Performance
        Ground truth; ``perf.settings`` records every option.
    """
    perf = perform(score, seed=seed, start_s=start_s, **(perform_options or {}))
    if timbres is None:
        timbres = timbres_for(perf.notes["part"].astype(str).unique())
    perf.notes["onset_s"] = np.rint(perf.notes["onset_s"].to_numpy() * sr) / sr
    on = perf.notes["onset_s"].to_numpy()
    perf.notes["offset_s"] = np.maximum(perf.notes["offset_s"].to_numpy(), on + 1.0 / sr)
    tail = 0.0 if hall_rt60_s is None else min(hall_rt60_s, 3.0)
    duration_s = perf.duration_s + tail
    y = synthesize_parts(perf.notes, sr=sr, timbres=timbres, seed=seed + 1, duration_s=duration_s)
    if hall_rt60_s is not None:
        y = add_hall(y, sr, rt60_s=hall_rt60_s, wet=hall_wet, seed=seed + 2)
    shift = 0.0
    if applause:
        y, shift = with_applause(y, sr, seed=seed + 3)
        k = int(round(shift * sr))
        shift = k / sr
        for c in ("onset_s", "offset_s"):
            perf.notes[c] = perf.notes[c] + shift
        perf.beats["recording"] = perf.beats["recording"] + shift
        from ..timemap import TimeMap

        tm = perf.timemap
        perf.timemap = TimeMap(tm.x, np.asarray(tm.y) + shift, src=tm.src, dst=tm.dst, meta=tm.meta)
    if audience:
        music = _active_rms(y)
        y = y + audience_noise(y.size, sr, seed=seed + 3, music_rms=music, mains_hz=mains_hz)
        pk = float(np.max(np.abs(y)))
        if pk > PEAK_LIMIT:
            y *= np.float32(PEAK_LIMIT / pk)
    perf.settings.update({"sr": int(sr), "timbres": dict(timbres), "hall_rt60_s": hall_rt60_s,
                          "hall_wet": float(hall_wet), "audience": bool(audience),
                          "mains_hz": float(mains_hz), "applause": bool(applause),
                          "lead_in_s": float(shift)})
    return y.astype(np.float32), perf
