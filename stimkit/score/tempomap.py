"""Nominal tempo map: ``score_qn`` -> ``nominal`` seconds from the score's tempo indications.

What it computes
----------------
:func:`build_tempo_map` turns the performed list of tempo events (metronome marks, tempo words,
gradual and relative changes, returns) and fermatas into a :class:`stimkit.timemap.TimeMap`.
Between events the tempo (quarter-note BPM) is constant; a gradual change (rit., accel.) is a
linear ramp of BPM in score time from its mark to the next tempo event, so the seconds of a ramp
of length ``L`` qn from ``b0`` to ``b1`` BPM are ``60 L ln(b1/b0) / (b1 - b0)`` (exact integral of
``60 / bpm(q)``), sampled with knots every ``RAMP_STEP_QN``.

Conventions (project defaults, stated in every sidecar)
--------------------------------------------------------
- ``DEFAULT_BPM`` = 100 quarter notes per minute when the score has no tempo indication before
  its first notes.
- ``RAMP_DEPTH`` = 0.2: a rit. ends at 80 % of the tempo it started from, an accel. at 120 %,
  unless the next event is an absolute tempo in the same direction (then the ramp ends on it).
- ``FERMATA_FACTOR`` = 2.0: a note or rest under a fermata lasts twice its written length.
- ``a tempo`` returns to the last absolute tempo (metronome mark or tempo word); ``Tempo I`` to
  the first one; relative words multiply the tempo in force.
- The first absolute tempo applies from the start when it lies in the first bar or before the
  first note; otherwise the default tempo fills the gap (and a warning says so).
- A tempo mark outside ``MIN_BPM`` .. ``MAX_BPM`` quarter notes per minute (10 .. 1000) is ignored
  with a warning (:mod:`stimkit.score.markings`): a metronome's scale runs from about 40 to 208
  beats per minute (common knowledge), and a half- or eighth-note beat moves that by a factor of
  two either way; beyond another factor of two we take the number for damage, not music.
- A performed score longer than :data:`stimkit.score.limits.MAX_TOTAL_QN` is refused before any
  map is built.

References
----------
.. [1] Tempo as a function of score time and its integral: Müller, M. (2015). Fundamentals of
   Music Processing, ch. 6 (tempo curves), Springer.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..timemap import TimeMap

__all__ = ["build_tempo_map", "DEFAULT_BPM", "MIN_BPM", "MAX_BPM", "RAMP_DEPTH", "FERMATA_FACTOR", "RAMP_STEP_QN",
           "tempo_settings", "ramp_seconds"]

DEFAULT_BPM = 100.0
MIN_BPM = 10.0
MAX_BPM = 1000.0
RAMP_DEPTH = 0.2
FERMATA_FACTOR = 2.0
RAMP_STEP_QN = 0.25


def tempo_settings() -> dict:
    """The stated defaults, for sidecars."""
    return {
        "default_bpm": DEFAULT_BPM,
        "ramp_depth": RAMP_DEPTH,
        "fermata_factor": FERMATA_FACTOR,
        "ramp_step_qn": RAMP_STEP_QN,
        "plausible_bpm": [MIN_BPM, MAX_BPM],
        "note": "Project conventions: default tempo when the score has none, depth of rit./accel. "
                "ramps to the next mark, hold factor of fermatas.",
    }


def ramp_seconds(length_qn: float, b0: float, b1: float) -> float:
    """Seconds of a linear BPM ramp from ``b0`` to ``b1`` over ``length_qn`` quarter notes."""
    if abs(b1 - b0) < 1e-9 * max(b0, 1.0):
        return 60.0 * length_qn / b0
    return 60.0 * length_qn * math.log(b1 / b0) / (b1 - b0)


def build_tempo_map(events: list[dict], *, fermatas: list[tuple[float, float]], total_qn: float,
                    first_note_qn: float = 0.0, first_bar_end_qn: float | None = None,
                    path: Path | None = None) -> tuple[TimeMap, list[str]]:
    """Build the score_qn -> nominal TimeMap.

    Parameters
    ----------
    events : list of dict
        Sorted by ``qn``; each has ``kind`` in ``tempo`` (``bpm``), ``relative`` (``factor``),
        ``ramp`` (``direction`` -1/+1), ``return`` (``target`` ``previous``/``first``). Each dict
        gets ``bpm_after`` (the quarter BPM the event leads to; for a ramp its end) and, for
        ramps, ``end_qn``.
    fermatas : list of (qn, duration_qn)
        Spans held ``FERMATA_FACTOR`` times longer (overlaps are merged).
    total_qn : float
        End of the performed score.

    Returns
    -------
    (TimeMap, list of str)
        The map (``meta`` holds the settings and the BPM segments) and warnings.
    """
    from .limits import check_length

    warns: list[str] = []
    check_length(float(total_qn), path=path, where=" as performed")
    total_qn = max(float(total_qn), 1e-6)
    first_bar_end_qn = first_bar_end_qn if first_bar_end_qn is not None else 0.0
    for e in events:
        if e["kind"] == "tempo" and not (e["bpm"] > 0 and math.isfinite(e["bpm"])):
            raise InputError(f"tempo {e.get('label', '')!r} at bar {e.get('measure', '?')} is "
                             f"{e['bpm']} BPM; a tempo must be positive", path=path)
        if e["kind"] == "relative" and not e.get("factor", 1.0) > 0:
            raise InputError("relative tempo factor must be positive", path=path)
    absolutes = [e for e in events if e["kind"] == "tempo"]
    if not absolutes:
        start_bpm = DEFAULT_BPM
        warns.append(f"no tempo mark or tempo word; nominal tempo q = {DEFAULT_BPM:g} assumed "
                     "(project default)")
    else:
        a0 = absolutes[0]
        if a0["qn"] <= max(first_note_qn, first_bar_end_qn) + 1e-6:
            start_bpm = a0["bpm"]
        else:
            start_bpm = DEFAULT_BPM
            warns.append(f"first tempo mark is at bar {a0.get('measure', '?')}; q = "
                         f"{DEFAULT_BPM:g} assumed before it (project default)")
    # segments (q0, q1, b0, b1)
    segs: list[tuple[float, float, float, float]] = []
    pos, cur = 0.0, start_bpm
    reference = start_bpm
    first_abs = absolutes[0]["bpm"] if absolutes else start_bpm
    i = 0
    evs = sorted(events, key=lambda e: e["qn"])
    while i < len(evs):
        e = evs[i]
        q = min(max(float(e["qn"]), 0.0), total_qn)
        if q > pos:
            segs.append((pos, q, cur, cur))
            pos = q
        kind = e["kind"]
        if kind == "tempo":
            cur = reference = float(e["bpm"])
            e["bpm_after"] = cur
        elif kind == "relative":
            cur = cur * float(e["factor"])
            e["bpm_after"] = cur
        elif kind == "return":
            cur = reference if e.get("target") == "previous" else first_abs
            if e.get("target") != "previous":
                reference = first_abs
            e["bpm_after"] = cur
        elif kind == "ramp":
            d = int(e.get("direction", -1)) or -1
            nxt = next((x for x in evs[i + 1:] if x["qn"] > q + 1e-9), None)
            end = min(float(nxt["qn"]), total_qn) if nxt is not None else total_qn
            target = cur * (1.0 + d * RAMP_DEPTH)
            if nxt is not None and nxt["kind"] == "tempo" and (nxt["bpm"] - cur) * d > 0:
                target = float(nxt["bpm"])
            if end > pos + 1e-9:
                segs.append((pos, end, cur, target))
                pos = end
            cur = target
            e["bpm_after"] = target
            e["end_qn"] = end
        i += 1
    if total_qn > pos:
        segs.append((pos, total_qn, cur, cur))
    if not segs:
        segs.append((0.0, total_qn, cur, cur))
    # knots of the base map
    xs, ys = [0.0], [0.0]
    t = 0.0
    for q0, q1, b0, b1 in segs:
        if q1 <= q0:
            continue
        if abs(b1 - b0) < 1e-9:
            t += 60.0 * (q1 - q0) / b0
            xs.append(q1)
            ys.append(t)
        else:
            k = max(int(math.ceil((q1 - q0) / RAMP_STEP_QN)), 8)
            grid = np.linspace(q0, q1, k + 1)[1:]
            for g in grid:
                bg = b0 + (b1 - b0) * (g - q0) / (q1 - q0)
                xs.append(float(g))
                ys.append(t + ramp_seconds(g - q0, b0, bg))
            t = ys[-1]
    x = np.asarray(xs)
    y = np.asarray(ys)
    # fermata holds
    spans = sorted((float(a), float(a) + float(d)) for a, d in fermatas if d > 0)
    merged: list[list[float]] = []
    for a, b in spans:
        if merged and a <= merged[-1][1] + 1e-9:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([a, b])
    if merged:
        knots = np.union1d(x, np.array([v for s in merged for v in s]))
        base = np.interp(knots, x, y)
        extra = np.zeros_like(knots)
        for a, b in merged:
            ta, tb = np.interp(a, x, y), np.interp(b, x, y)
            inside = np.clip(base, ta, tb) - ta
            extra += (FERMATA_FACTOR - 1.0) * inside
        x, y = knots, base + extra
    keep = np.concatenate([[True], np.diff(x) > 1e-12])
    x, y = x[keep], y[keep]
    meta = {"settings": tempo_settings(), "start_bpm": start_bpm,
            "segments": [{"from_qn": a, "to_qn": b, "bpm_start": c, "bpm_end": d} for a, b, c, d in segs],
            "fermatas": [{"from_qn": a, "to_qn": b} for a, b in merged]}
    return TimeMap(x, y, src="score_qn", dst="nominal", meta=meta), warns
