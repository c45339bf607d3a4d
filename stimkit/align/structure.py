"""How a recording performs a score: its global tempo and which repeats it takes.

:func:`fit_structure` runs before the fine alignment. It aligns the score's chroma template in
its *longest* performed order (every repeat taken, :class:`stimkit.score.repeats.RepeatPlan`) to
the recording by jump-aware subsequence DTW (:mod:`stimkit.align.jumpdtw`; Fremerey, Müller &
Clausen 2010), for a grid of global time scales (recording seconds per nominal second, 0.33 to
3: performances at 0.33-3 times the notated or assumed tempo), keeps the scale whose path matches
best (lowest mean local cost), refines it from the slope of that path, and aligns once more at
five frames per second to decide every repeat: an option whose span the path jumps over was left
out. The result gives the chosen repeats, the time scale and, per option, a decision margin: the
relative cost increase when the decision is reversed (small margins are doubtful).

Conventions
-----------
- Time scale ``k``: the score template is stretched so that nominal second ``t`` sits at ``k * t``;
  ``k = 2`` is a performance at half the notated tempo. The template's silent head and tail
  (:data:`stimkit.align.template.HEAD_S`) are stretched too.
- Recording frames are those of :func:`stimkit.align.chroma.audio_features` (49.2 Hz), averaged to
  the coarser rates used here; frame times are window centres.

References
----------
.. [1] C. Fremerey, M. Müller, M. Clausen. "Handling repeats and jumps in score-performance
   synchronization", ISMIR 2010.
.. [2] C. Raffel, D. P. W. Ellis. "Optimizing DTW-based audio-to-MIDI alignment and matching",
   ICASSP 2016 (mean path cost as a match measure).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .dtw import StepWeights, _unit, downsample, path_costs
from .jumpdtw import jump_dtw
from .template import HEAD_S, score_features

__all__ = ["Structure", "fit_structure", "SCALE_MIN", "SCALE_MAX", "N_SCALES"]

#: Range of global time scales searched (recording s per nominal s) and the number of grid points.
SCALE_MIN, SCALE_MAX = 0.33, 3.0
#: Starting scales of the fixed-point search and its largest number of steps.
STARTS = (0.4, 0.63, 1.0, 1.6, 2.5)
MAX_ITER = 6

#: Frame period of the scale search (s) and of the repeat decision (s); raised for long inputs so
#: that a matrix stays under MAX_CELLS cells (one byte each).
SCAN_PERIOD_S = 0.5
DECIDE_PERIOD_S = 0.2
MAX_CELLS = 40_000_000
#: Cost of a recording frame left out before or after the piece, as a fraction of the mean local
#: cost of the whole matrix (times the recording-only step weight).
SKIP_FRACTION = 0.5
#: A decision whose reversal raises the path cost by less than this (per frame of the span, in units
#: of the mean local cost) is called doubtful.
DOUBTFUL_MARGIN = 0.01


@dataclass
class Structure:
    """What :func:`fit_structure` found (see module docstring)."""

    time_scale: float
    choice: dict                 # option id -> taken
    decided: dict                # option id -> True when the recording decided it
    margins: dict                # option id -> relative cost increase when reversed (nan: not tested)
    scan: list = field(default_factory=list)     # (scale, mean path cost) of the grid
    cost_ratio: float = float("nan")             # mean path cost / mean cost of the matrix (Raffel & Ellis)
    start_s: float = float("nan")                # recording time of the template's first note row
    end_s: float = float("nan")


def _resample(fine: np.ndarray, rate_hz: float, *, scale: float, period_s: float) -> np.ndarray:
    """Window means of template frames stretched by ``scale``, one row per ``period_s``."""
    n = fine.shape[0]
    cum = np.vstack([np.zeros((1, fine.shape[1])), np.cumsum(fine, axis=0)])
    dur = n / rate_hz * scale
    rows = max(int(np.ceil(dur / period_s)), 1)
    edges = np.minimum(np.arange(rows + 1) * period_s / scale * rate_hz, n)

    def at(u):
        k = np.clip(np.floor(u).astype(np.int64), 0, n - 1)
        return cum[k] + (u - k)[:, None] * (cum[k + 1] - cum[k])

    sums = at(edges[1:]) - at(edges[:-1])
    return _unit(sums / np.maximum(edges[1:] - edges[:-1], 1e-9)[:, None])


def _background(cs, cr) -> float:
    """Mean local cost of the whole matrix (Raffel & Ellis 2016's reference), from the means."""
    return float(1.0 - cs.mean(axis=0) @ cr.mean(axis=0))


def _period(base_s: float, n_rows_at_1: float, n_cols: int, scale: float) -> float:
    """``base_s`` or longer, so that rows x cols stays under MAX_CELLS."""
    cells = n_rows_at_1 * scale * n_cols
    return base_s * max(1.0, np.sqrt(cells / MAX_CELLS))


def _bar_rows(max_score, scale: float, period_s: float) -> np.ndarray:
    """Template row of the start of every bar position of the longest order (and its end)."""
    m = max_score.measures
    starts = np.append(m["score_qn"].to_numpy(np.float64), max_score.total_qn)
    nom = np.asarray(max_score.tempo_map(starts), dtype=np.float64)
    return np.floor(scale * (nom + HEAD_S) / period_s + 1e-9).astype(np.int64)


def _edges(plan, bar_rows: np.ndarray):
    """Jumps ``(src, dst)`` and the option each one leaves out."""
    jumps, owner = [], []
    for o in plan.options:
        src = int(bar_rows[o.start]) - 1
        dst = int(bar_rows[o.stop])
        if src >= 0 and dst - src > 1:
            jumps.append((src, dst))
            owner.append(o.id)
    return jumps, owner


def _decide(plan, bar_rows, jumps, owner, path) -> tuple[dict, dict]:
    visited = np.zeros(int(bar_rows[-1]) + 2, dtype=bool)
    rows = path[:, 0]
    visited[rows[rows < visited.size]] = True
    choice, decided = plan.conventional(), {}
    for (src, dst), oid in zip(jumps, owner):
        o = plan.options[oid]
        first = int(bar_rows[o.start])
        if first < visited.size:
            choice[oid] = bool(visited[first])
            decided[oid] = True
    return choice, decided


def fit_structure(score, A, *, j0: int = 0, j1: int | None = None, weights: StepWeights = StepWeights(),
                  decide_repeats: bool = True, max_score=None, progress=None) -> Structure:
    """Global time scale and repeat choice of ``score`` in recording features ``A`` (frames j0..j1).

    Parameters
    ----------
    score : ScoreModel
        From :func:`stimkit.score.parse.load_score` (it carries the repeat plan).
    A : AlignFeatures
        Recording features (:func:`stimkit.align.chroma.audio_features`).
    j0, j1 : int
        Recording frames to search (default: all).
    decide_repeats : bool
        Decide the repeats from the recording (jump-aware DTW over the longest order); ``False``
        keeps the repeats ``score`` plays and fits the time scale only.
    max_score : ScoreModel, optional
        The longest order of ``score`` if already built.
    """
    from ..score.parse import score_for_choice

    plan = getattr(score, "repeat_plan", None)
    has_options = decide_repeats and plan is not None and len(plan.options) > 0 and \
        getattr(score, "printed", None) is not None
    if max_score is None:
        max_score = score_for_choice(score, "max") if has_options else score
    rate = A.rate_hz
    j1 = A.n_frames if j1 is None else j1
    fine_s = score_features(max_score, rate_hz=rate).chroma
    n_rows_1 = fine_s.shape[0] / rate
    cr_fine = A.chroma[j0:j1]
    rec_s = cr_fine.shape[0] / rate

    def run(scale, base_period, with_jumps=True):
        period = _period(base_period, n_rows_1 / base_period, int(rec_s / base_period) + 1, scale)
        f = max(int(round(period * rate)), 1)
        period = f / rate
        cs = _resample(fine_s, rate, scale=scale, period_s=period)
        cr = _unit(downsample(cr_fine, f))
        bar_rows = _bar_rows(max_score, scale, period)
        jumps, owner = _edges(plan, bar_rows) if (has_options and with_jumps) else ([], [])
        bg = max(_background(cs, cr), 1e-9)
        skip = SKIP_FRACTION * weights.rec * bg
        path, _ = jump_dtw(cs, cr, jumps=jumps, weights=weights, skip_cost=skip)
        # how well the frames the path puts together match, at full rate, times (1 + the share of
        # one-axis steps): a path that bends to and fro picks its frames and looks better than
        # it is; at the right scale and repeats it runs nearly diagonal
        steps = np.diff(path, axis=0)
        bent = float(np.mean((steps[:, 0] == 0) | (steps[:, 1] == 0))) if len(steps) else 0.0
        cost = _fine_cost(path, fine_s, cr_fine, rate=rate, scale=scale, period=period, f=f) * (1.0 + bent)
        return dict(scale=scale, period=period, f=f, cs=cs, cr=cr, path=path, cost=cost, skip=skip,
                    bar_rows=bar_rows, jumps=jumps, owner=owner)

    # the scale: from several starting scales, decide the repeats and set the scale to the
    # recording time the music spans over the nominal length of the order decided, until it
    # settles (a fixed point: the template then spans what the recording spans). Tempo and
    # repeats trade off -- leaving repeats out also fits a slower tempo -- so there may be
    # several fixed points; they are compared at the decision rate, where the right one matches
    # the recording frame for frame and a wrong one does not.
    bar_nom = np.diff(np.asarray(max_score.tempo_map(np.append(max_score.measures["score_qn"].to_numpy(np.float64),
                                                               max_score.total_qn)), dtype=np.float64))
    scan, found = [], []
    for n, k0 in enumerate(STARTS):
        k = float(k0)
        r = run(k, SCAN_PERIOD_S)
        scan.append((round(k, 4), round(r["cost"], 4)))
        for _ in range(MAX_ITER):
            k_new = _span_scale(r, plan, bar_nom, rate, has_options, max_score)
            if not np.isfinite(k_new):
                break
            k_new = float(np.clip(k_new, SCALE_MIN, SCALE_MAX))
            if abs(np.log(k_new / k)) < 0.02:
                break
            r2 = run(k_new, SCAN_PERIOD_S)
            scan.append((round(k_new, 4), round(r2["cost"], 4)))
            if r2["cost"] > r["cost"]:
                break          # a step that matches worse is not taken
            k, r = k_new, r2
        if not any(abs(np.log(k / q)) < 0.03 for q in found):
            found.append(k)
        if progress is not None:
            progress("structure", 0.6 * (n + 1) / len(STARTS))
    fine = None
    for q in found:
        r = run(q, DECIDE_PERIOD_S)
        k2 = _span_scale(r, plan, bar_nom, rate, has_options, max_score)
        if np.isfinite(k2) and abs(np.log(k2 / q)) > 0.03:
            r2 = run(float(np.clip(k2, SCALE_MIN, SCALE_MAX)), DECIDE_PERIOD_S)
            if r2["cost"] < r["cost"]:
                r = r2
        if fine is None or r["cost"] < fine["cost"]:
            fine = r
    scale = fine["scale"]
    if progress is not None:
        progress("structure", 0.9)
    choice, decided = (_decide(plan, fine["bar_rows"], fine["jumps"], fine["owner"], fine["path"])
                       if has_options else (dict(getattr(score, "repeat_choice", {}) or {}), {}))
    margins = {}
    if decided:
        margins = _margins(fine, plan, choice, decided, weights)
    p = fine["path"]
    rows = fine["bar_rows"]
    music = (p[:, 0] >= rows[0]) & (p[:, 0] < rows[-1])
    jj = p[music, 1] if music.any() else p[:, 1]
    t0 = A.start_s + (j0 + jj.min() * fine["f"] + (fine["f"] - 1) / 2) / rate
    t1 = A.start_s + (j0 + (jj.max() + 1) * fine["f"] + (fine["f"] - 1) / 2) / rate
    if progress is not None:
        progress("structure", 1.0)
    return Structure(time_scale=float(scale), choice=choice, decided=decided, margins=margins,
                     scan=scan, cost_ratio=fine["cost"],
                     start_s=float(t0), end_s=float(t1))


def _fine_cost(path, fine_s, fine_r, *, rate, scale, period, f, samples: int = 4) -> float:
    """Mean cosine distance along a coarse path, measured between the full-rate frames the path
    puts together (a few per cell, along the cell's diagonal): unlike the coarse frames' own
    distances it does not favour a scale by averaging more music into each template row."""
    p = np.asarray(path, dtype=np.float64)
    w = (np.arange(samples) + 0.5) / samples
    u = ((p[:, 0:1] + w[None, :]) * period / scale * rate).ravel()
    v = ((p[:, 1:2] + w[None, :]) * f).ravel()
    u = np.clip(u.astype(np.int64), 0, len(fine_s) - 1)
    v = np.clip(v.astype(np.int64), 0, len(fine_r) - 1)
    return float(1.0 - np.einsum("ij,ij->i", fine_s[u], fine_r[v]).mean())


def _span_scale(r, plan, bar_nom, rate, has_options, max_score) -> float:
    """Recording seconds the path's music rows span over the nominal seconds of the bars the path
    plays (the repeats it decided); NaN for a path with too little music."""
    p = r["path"]
    rows = r["bar_rows"]
    music = (p[:, 0] >= rows[0]) & (p[:, 0] < rows[-1])
    if music.sum() < 4:
        return float("nan")
    q = p[music]
    span = (q[-1, 1] - q[0, 1] + 1) * r["period"]
    if has_options:
        choice, _ = _decide(plan, rows, r["jumps"], r["owner"], p)
        nom = float(bar_nom[plan.kept_positions(choice)].sum())
    else:
        nom = float(bar_nom.sum())
    return span / nom if nom > 0 else float("nan")


def _path_slope(r, scale, rate) -> float:
    """Recording frames per played template row along the middle 80 % of the music part of a path
    (1 = the scale is right). The ends are left out: applause, a final ritardando or a held last
    chord must not set the tempo of the whole piece."""
    p = r["path"]
    rows = r["bar_rows"]
    music = (p[:, 0] >= rows[0]) & (p[:, 0] < rows[-1])
    if music.sum() < 8:
        return float("nan")
    q = p[music]
    ur, start = np.unique(q[:, 0], return_index=True)
    cols = np.add.reduceat(q[:, 1].astype(np.float64), start) / np.diff(np.append(start, len(q)))
    a, b = int(0.1 * len(ur)), int(0.9 * len(ur))
    if b - a < 4:
        return float("nan")
    return float((cols[b] - cols[a]) / (b - a))


def _margins(fine, plan, choice, decided, weights) -> dict:
    """How much dearer the best path gets when one decision is reversed, per frame of the span
    that decision plays or leaves out, in units of the matrix's mean local cost: about the share
    of that span's frames that would then match no better than chance."""
    cs, cr = fine["cs"], fine["cr"]
    rows = fine["bar_rows"]
    unit = max(_background(cs, cr), 1e-9)
    base = _cost_of(plan, choice, fine, weights)
    out = {}
    for oid in decided:
        o = plan.options[oid]
        flipped = dict(choice)
        flipped[oid] = not choice[oid]
        c = _cost_of(plan, flipped, fine, weights)
        span = max(int(rows[o.stop] - rows[o.start]), 1)
        out[oid] = float((c - base) / (unit * span)) if np.isfinite(c) and np.isfinite(base) else float("nan")
    return out


def _cost_of(plan, choice, fine, weights) -> float:
    """Accumulated cost of the best path through the template rows ``choice`` plays."""
    rows = fine["bar_rows"]
    keep = plan.kept_positions(choice)
    sel = [np.arange(0, rows[0])]
    for p in keep:
        sel.append(np.arange(rows[p], rows[p + 1]))
    sel.append(np.arange(rows[-1], fine["cs"].shape[0]))
    idx = np.concatenate(sel)
    cs = fine["cs"][idx]
    try:
        _, cost = jump_dtw(cs, fine["cr"], weights=weights, skip_cost=fine["skip"])
    except ValueError:
        return float("inf")
    return cost
