"""Local alignment confidence: how likely a score position is placed within 100 ms, and where an
alignment is unreliable.

:func:`local_confidence` maps six measurements of the alignment near a position to a probability
by a logistic model (Cox 1958) fitted on rendered performances with known note times:

- ``margin_100ms``, ``margin_300ms``: how much dearer the best path through that score frame
  becomes when the frame is moved 0.1 s / 0.3 s in the recording (:func:`stimkit.align.dtw.band_margins`,
  in units of the mean local cost: about one mismatching frame each). A small margin means
  another placement fits nearly as well -- a held chord, a soft onset, a slow attack;
- ``margin_coarse``: the same at the coarsest level for a move of about 2 s (a repeated passage
  that could be matched elsewhere);
- ``ratio``: the local path cost over the mean cost of the matrix (Raffel & Ellis 2016);
- ``pass_gap_s``: how far the second pass moved the position from the first (two alignments
  that disagree cannot both be right);
- ``tempo_dev``: how far the local tempo of the path strays from the tempo around it, relative
  to the notated tempo (a path that rushes or stalls where the music does not).

Each margin enters as ``log(1 + m)`` (capped at :data:`MARGIN_CAP`). The coefficients
(:data:`COEFFICIENTS`) were fitted by ``bench/fit_confidence.py`` on the *development* renders of
``bench/align_material.py`` (the project's renderer and fluidsynth with TimGM6mb; every
condition; 61 288 notes) with the label "error <= 100 ms", each condition weighted equally; no
offset was needed for the first calibration goal (on that material 97.4 % of positions with
confidence >= 0.9 are within 100 ms). :func:`neighbourhood_min` then gives each note the
smallest confidence within :data:`NEIGHBOUR_S` of it (on that material: 98.6 % of notes with
confidence >= 0.9 within 100 ms, and 45 % of the notes more than 300 ms off under 0.5 -- the
second goal, 90 %, is not met: the measurements do not tell many of those errors apart from
good placements). The held-out renders (FluidR3_GM, the held-out cases) were only measured.
:func:`unreliable_spans` joins positions under :data:`UNRELIABLE_BELOW` into spans to name on the
terminal.

References
----------
.. [1] D. R. Cox. "The regression analysis of binary sequences", JRSS-B 20, 1958.
.. [2] C. Raffel, D. P. W. Ellis. "Optimizing DTW-based audio-to-MIDI alignment and matching",
   ICASSP 2016.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["FEATURES", "COEFFICIENTS", "design", "neighbourhood_min", "NEIGHBOUR_S", "OFFSET", "MARGIN_CAP", "UNRELIABLE_BELOW", "local_confidence",
           "unreliable_spans", "bridge_unsure", "BRIDGE_KEEP_S"]

FEATURES = ("margin_100ms", "margin_300ms", "margin_coarse", "ratio", "pass_gap_s", "tempo_dev")
#: Margins above this (in mean-cost units) count as this much (a path 50 mismatching frames
#: dearer is as sure as it gets; the band edge gives infinity).
MARGIN_CAP = 50.0
#: Intercept and one weight per feature (log1p of the capped margins, the ratio as is, log1p of the
#: pass gap in units of 50 ms, the tempo deviation as is).
COEFFICIENTS = (2.3, 2.939, 0.638, 0.152, -7.463, -0.313, -2.327)
#: Added to the linear predictor (negative: more cautious).
OFFSET = 0.0
#: A position is only as sure as its neighbourhood: the confidence of a note is the smallest over
#: this many seconds either side (wrong placements come in stretches).
NEIGHBOUR_S = 1.0
#: Positions under this confidence are unreliable; spans of them are named to the user.
UNRELIABLE_BELOW = 0.5
#: Spans of unreliable positions closer than this (s) are joined; shorter ones are dropped.
JOIN_S = 1.0
MIN_SPAN_S = 1.0


def design(local: pd.DataFrame) -> np.ndarray:
    """The model's design matrix (intercept, then one column per :data:`FEATURES`)."""
    cols = [np.ones(len(local))]
    for f in FEATURES:
        v = local[f].to_numpy(np.float64) if f in local else np.full(len(local), np.nan)
        if f.startswith("margin"):
            v = np.log1p(np.minimum(np.where(np.isfinite(v), v, MARGIN_CAP), MARGIN_CAP))
        elif f == "pass_gap_s":
            v = np.log1p(np.where(np.isfinite(v), v, 0.0) / 0.05)
        elif f == "ratio":
            v = np.where(np.isfinite(v), v, 1.0)
        else:
            v = np.where(np.isfinite(v), v, 0.0)
        cols.append(v)
    return np.stack(cols, axis=1)


def local_confidence(local: pd.DataFrame, *, coefficients=COEFFICIENTS, offset: float = OFFSET) -> np.ndarray:
    """Probability (0..1) that each position of ``local`` is placed within 100 ms."""
    if len(local) == 0:
        return np.zeros(0)
    z = design(local) @ np.asarray(coefficients, dtype=np.float64) + offset
    return 1.0 / (1.0 + np.exp(-z))


def neighbourhood_min(times_s, confidence, *, window_s: float = NEIGHBOUR_S) -> np.ndarray:
    """Each value replaced by the smallest within ``window_s`` seconds of its time."""
    t = np.asarray(times_s, dtype=np.float64)
    c = np.asarray(confidence, dtype=np.float64)
    if t.size == 0:
        return c.copy()
    o = np.argsort(t, kind="stable")
    ts, cs = t[o], c[o]
    lo = np.searchsorted(ts, ts - window_s, side="left")
    hi = np.searchsorted(ts, ts + window_s, side="right")
    out = np.empty_like(cs)
    for k in range(ts.size):
        out[k] = cs[lo[k]:hi[k]].min()
    res = np.empty_like(c)
    res[o] = out
    return res


def unreliable_spans(times_s, confidence, score_qn, *, below: float = UNRELIABLE_BELOW,
                     join_s: float = JOIN_S, min_s: float = MIN_SPAN_S) -> list[dict]:
    """Spans of consecutive positions with confidence under ``below``: ``start``, ``end``
    (recording s), ``score_qn_start``, ``score_qn_end``, ``min_confidence``, ``positions``.
    Runs closer than ``join_s`` are joined; a span shorter than ``min_s`` with a single position
    is dropped (one soft note is not a region)."""
    t = np.asarray(times_s, dtype=np.float64)
    c = np.asarray(confidence, dtype=np.float64)
    q = np.asarray(score_qn, dtype=np.float64)
    order = np.argsort(q, kind="stable")
    t, c, q = t[order], c[order], q[order]
    bad = np.where(c < below)[0]
    spans: list[dict] = []
    for k in bad:
        if spans and t[k] - spans[-1]["end"] <= join_s:
            s = spans[-1]
            s["end"] = float(max(s["end"], t[k]))
            s["score_qn_end"] = float(q[k])
            s["min_confidence"] = float(min(s["min_confidence"], c[k]))
            s["positions"] += 1
        else:
            spans.append({"start": float(t[k]), "end": float(t[k]), "score_qn_start": float(q[k]),
                          "score_qn_end": float(q[k]), "min_confidence": float(c[k]), "positions": 1})
    return [s for s in spans if s["positions"] > 1 or s["end"] - s["start"] >= min_s]


#: Bridging: positions under UNSURE_BELOW between two positions of at least SURE_FROM are placed by
#: the notated tempo between those two, for spans of at most BRIDGE_MAX_S of recording.
UNSURE_BELOW = 0.5
SURE_FROM = 0.7
BRIDGE_MAX_S = 60.0
#: A span is bridged only where the path strays from the bridge by more than this (s) somewhere
#: inside it: closer than that, the path -- which follows the performers' rubato -- is kept (the
#: notated tempo between two sure ends is a fallback for paths that wander by seconds, not a
#: better guess than a path that stays near it). Measured on the quick development renders
#: (bench_align --quick, ours and TimGM6mb): a mismatch-flagged hall passage whose path was
#: 20-40 ms off was bridged to 300 ms off.
BRIDGE_KEEP_S = 0.4


def bridge_unsure(timemap, score_qn, confidence, *, nominal, avoid=(), unsure_below: float = UNSURE_BELOW,
                  sure_from: float = SURE_FROM, max_s: float = BRIDGE_MAX_S, keep_s: float = BRIDGE_KEEP_S):
    """Replace the alignment across unsure stretches by the notated tempo between sure neighbours.

    Where the music gives the path nothing to hold on to (a pedal note, held chords, a soft
    passage in a reverberant hall), a warping path may wander by seconds at almost no cost. If
    the positions just before and after such a stretch are sure, the performers most likely
    kept the tempo in between: the positions inside are placed by the score's own nominal timing
    (``nominal``: score_qn -> nominal seconds, its ritardandi and fermatas included) scaled to
    fit the two sure ends. Stretches touching ``avoid`` (score_qn intervals of flagged
    insertions or cuts) are left alone, and so are stretches where the path stays within
    ``keep_s`` of the bridge. Returns ``(new timemap, [(qn_start, qn_end), ...])``.
    """
    from ..timemap import TimeMap

    q = np.asarray(score_qn, dtype=np.float64)
    c = np.asarray(confidence, dtype=np.float64)
    if q.size < 3:
        return timemap, []
    t = np.asarray(timemap(q), dtype=np.float64)
    spans = []
    k = 0
    while k < q.size:
        if c[k] >= unsure_below:
            k += 1
            continue
        e = k
        while e + 1 < q.size and c[e + 1] < sure_from:
            e += 1
        a, b = k - 1, e + 1
        while a >= 0 and c[a] < sure_from:
            a -= 1
        k = e + 1
        if a < 0 or b >= q.size or t[b] - t[a] > max_s:
            continue
        if any(lo <= q[b] and hi >= q[a] for lo, hi in avoid):
            continue
        na, nb = float(nominal(q[a])), float(nominal(q[b]))
        if nb > na and t[b] > t[a]:
            inner = np.linspace(q[a], q[b], 64)
            bridge = t[a] + (np.asarray(nominal(inner), dtype=np.float64) - na) / (nb - na) * (t[b] - t[a])
            if np.max(np.abs(np.asarray(timemap(inner), dtype=np.float64) - bridge)) <= keep_s:
                continue
        spans.append((a, b))
    if not spans:
        return timemap, []
    x, y = list(np.asarray(timemap.x)), list(np.asarray(timemap.y))
    keep = np.ones(len(x), dtype=bool)
    add_x, add_y = [], []
    for a, b in spans:
        qa, qb, ta, tb = q[a], q[b], t[a], t[b]
        na, nb = float(nominal(qa)), float(nominal(qb))
        if not (nb > na and tb > ta):
            continue
        inside = (np.asarray(x) > qa) & (np.asarray(x) < qb)
        keep &= ~inside
        knots = np.concatenate([[qa], [v for v in nominal.x if qa < v < qb], [qb]])
        add_x.extend(knots.tolist())
        add_y.extend((ta + (np.asarray(nominal(knots)) - na) / (nb - na) * (tb - ta)).tolist())
    xs = np.concatenate([np.asarray(x)[keep], add_x])
    ys = np.concatenate([np.asarray(y)[keep], add_y])
    order = np.argsort(xs, kind="stable")
    xs, ys = xs[order], ys[order]
    ok = np.concatenate([[True], (np.diff(xs) > 1e-9) & (np.diff(ys) > 1e-9)])
    xs, ys = xs[ok], ys[ok]
    # keep it monotone: drop knots that would go backwards
    m = np.concatenate([[True], ys[1:] > np.maximum.accumulate(ys)[:-1]])
    xs, ys = xs[m], ys[m]
    return TimeMap(xs, ys, src=timemap.src, dst=timemap.dst, meta=dict(timemap.meta)), \
        [(float(q[a]), float(q[b])) for a, b in spans]
