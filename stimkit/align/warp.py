"""From a warping path to times: the score_qn -> recording map, tempo, confidence, flagged runs.

Conventions
-----------
- A path is an ``(L, 2)`` array of cells ``(i, j)``: score frame ``i`` (``nominal`` seconds
  ``i / rate_hz``) matched to recording frame ``j`` (``recording`` seconds
  ``rec_start_s + j / rate_hz``); frames are window centres.
- :func:`path_to_timemap` keeps a strictly monotone subset of the path: the mean recording frame
  of each score frame, then the mean score frame of each run of equal recording positions
  (runs of one-axis steps collapse to their midpoint), and maps nominal seconds to ``score_qn``
  with the inverse of the score's tempo map.
- Tempo (:func:`tempo_curve`): seconds per quarter note between consecutive beats, smoothed with a
  Hann window over ``window_beats`` beats (Müller 2015, FMP ch. 3 practice), reported as
  ``bpm`` (beats of the bar's own beat unit per minute) and ``quarter_bpm``.
- Confidence: the Raffel & Ellis (2016) ratio ``mean path cost / mean cost of the matrix`` (low is
  good); its mapping to 0..1 is ``clip((RATIO_BAD - r) / (RATIO_BAD - RATIO_GOOD), 0, 1)``, the
  same for the overall value and for the local ratio of the path cost smoothed over
  ``window_s`` seconds of score.
- Flagged regions (:func:`flag_runs`): stretches of more than ``min_s`` seconds where the path
  advances in one axis only -- in score only (a cut in the recording, or a repeat not taken) or
  in recording only (an inserted passage, a long pause).

References
----------
.. [1] C. Raffel, D. P. W. Ellis. "Optimizing DTW-based audio-to-MIDI alignment and matching",
   ICASSP 2016.
.. [2] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 3.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..timemap import TimeMap

__all__ = [
    "RATIO_GOOD",
    "RATIO_BAD",
    "ratio_to_confidence",
    "monotone_knots",
    "path_to_timemap",
    "tempo_curve",
    "local_ratio",
    "flag_runs",
    "mismatch_regions",
    "recording_cost_ratio",
    "merge_regions",
]

#: Raffel--Ellis ratio treated as a certain match (confidence 1) and as no match (confidence 0);
#: set from the distribution measured on rendered test pieces (tests/align).
RATIO_GOOD = 0.35
RATIO_BAD = 0.85


def ratio_to_confidence(ratio):
    """Map a path-cost ratio (low = good) to a confidence in 0..1."""
    r = np.asarray(ratio, dtype=np.float64)
    out = np.clip((RATIO_BAD - r) / (RATIO_BAD - RATIO_GOOD), 0.0, 1.0)
    return out if out.ndim else float(out)


def monotone_knots(path):
    """Strictly increasing ``(x, y)`` (float frame indices) from a monotone path."""
    p = np.asarray(path, dtype=np.float64)
    i, j = p[:, 0], p[:, 1]
    ui, start = np.unique(i, return_index=True)
    sums = np.add.reduceat(j, start)
    counts = np.diff(np.append(start, len(j)))
    y = sums / counts
    # collapse runs of equal y
    uy, ystart = np.unique(y, return_index=True)  # y is non-decreasing, so runs are contiguous
    order = np.argsort(ystart)
    ystart = ystart[order]
    uy = uy[order]
    xs = np.add.reduceat(ui, ystart) / np.diff(np.append(ystart, len(ui)))
    return xs, uy


def path_to_timemap(path, *, rate_hz: float, rec_start_s: float, tempo_map: TimeMap,
                    score_start_s: float = 0.0) -> TimeMap:
    """The map ``score_qn -> recording`` along a warping path (see module conventions)."""
    x, y = monotone_knots(path)
    nominal = score_start_s + x / rate_hz
    rec = rec_start_s + y / rate_hz
    if len(x) < 2:  # degenerate: one cell
        nominal = np.array([nominal[0], nominal[0] + 1.0 / rate_hz])
        rec = np.array([rec[0], rec[0] + 1.0 / rate_hz])
    qn = np.asarray(tempo_map.inverse()(nominal), dtype=np.float64)
    keep = np.concatenate([[True], np.diff(qn) > 1e-12])
    keep &= np.concatenate([[True], np.diff(rec) > 1e-12])
    return TimeMap(qn[keep], rec[keep], src="score_qn", dst="recording",
                   meta={"knots": int(keep.sum())})


def tempo_curve(timemap: TimeMap, beats: pd.DataFrame, *, window_beats: int = 6) -> pd.DataFrame:
    """Local tempo at every beat: ``score_qn, recording, bpm, quarter_bpm``.

    ``beats`` needs ``score_qn`` and ``beat_qn`` (quarter notes per beat of the bar).
    """
    qn = beats["score_qn"].to_numpy(np.float64)
    bq = beats["beat_qn"].to_numpy(np.float64)
    rec = np.asarray(timemap(qn), dtype=np.float64)
    if len(qn) < 2:
        return pd.DataFrame({"score_qn": qn, "recording": rec, "bpm": np.full(len(qn), np.nan),
                             "quarter_bpm": np.full(len(qn), np.nan)})
    spq = np.diff(rec) / np.diff(qn)                      # seconds per quarter note, per interval
    spq = np.append(spq, spq[-1])
    smooth = _hann_smooth(spq, window_beats)
    qbpm = 60.0 / smooth
    return pd.DataFrame({"score_qn": qn, "recording": rec, "bpm": qbpm / bq, "quarter_bpm": qbpm})


def _hann_smooth(values: np.ndarray, n: int) -> np.ndarray:
    """Moving Hann-weighted mean over ``n`` samples, edges padded with the edge value."""
    if n <= 1 or len(values) <= 1:
        return values
    w = np.hanning(n + 2)[1:-1]
    w = w / w.sum()
    pad = len(w) // 2
    return np.convolve(np.pad(values, (pad, len(w) - 1 - pad), mode="edge"), w, mode="valid")


def _axis_cost_ratio(path, costs, *, axis: int, ref_cost: float, rate_hz: float, window_s: float):
    """Mean path cost per distinct frame along ``axis`` (0 score, 1 recording), Hann-smoothed
    over ``window_s`` seconds, divided by ``ref_cost``."""
    k = np.asarray(path, dtype=np.int64)[:, axis]
    uk, start = np.unique(k, return_index=True)
    c = np.add.reduceat(np.asarray(costs, np.float64), start) / np.diff(np.append(start, len(k)))
    c = _hann_smooth(c, max(int(round(window_s * rate_hz)), 1))
    return uk, c / max(ref_cost, 1e-9)


def local_ratio(path, costs, *, ref_cost: float, rate_hz: float, window_s: float = 2.0):
    """Path cost smoothed over ``window_s`` seconds of score, divided by ``ref_cost``.

    Returns ``(score_frames, ratio)``: one value per distinct score frame of the path.
    """
    return _axis_cost_ratio(path, costs, axis=0, ref_cost=ref_cost, rate_hz=rate_hz, window_s=window_s)


def flag_runs(path, *, rate_hz: float, rec_start_s: float, tempo_map: TimeMap, min_s: float = 2.0,
              slack_s: float = 0.3, score_start_s: float = 0.0):
    """Stretches where the path moves in one axis only for more than ``min_s`` seconds.

    Steps in the other axis are tolerated up to ``slack_s`` seconds per gap and 10 % of the run
    in total (or ``slack_s``, whichever is larger). Returns a list of
    dicts ``kind`` ("cut" or "insertion"), ``start``/``end`` (recording s), ``score_qn_start``/
    ``score_qn_end``, ``duration_s`` (length along the moving axis) and ``reason``.
    """
    p = np.asarray(path, dtype=np.int64)
    if len(p) < 2:
        return []
    di = np.diff(p[:, 0])
    dj = np.diff(p[:, 1])
    inv = tempo_map.inverse()
    min_f = min_s * rate_hz
    slack = slack_s * rate_hz
    out = []
    for kind, moving, other in (("cut", di, dj), ("insertion", dj, di)):
        # cumulative progress along each axis
        cm = np.concatenate([[0], np.cumsum(moving)])
        co = np.concatenate([[0], np.cumsum(other)])
        only = (moving > 0) & (other == 0)
        k = 0
        L = len(only)
        while k < L:
            if not only[k]:
                k += 1
                continue
            # grow a run of one-axis steps, allowing short excursions in the other axis
            e = k
            while True:
                e2 = e
                while e2 < L and only[e2]:
                    e2 += 1
                # try to bridge a gap of other-axis steps
                g = e2
                while (g < L and not only[g] and co[g + 1] - co[e2] <= slack
                       and co[g + 1] - co[k] <= max(slack, 0.1 * (cm[g + 1] - cm[k]))):
                    g += 1
                if g < L and only[g] and g > e2:
                    e = g
                    continue
                e = e2
                break
            run_m = cm[e] - cm[k]
            if run_m > min_f:
                a, b = p[k], p[e]
                ra = rec_start_s + a[1] / rate_hz
                rb = rec_start_s + b[1] / rate_hz
                qa = float(inv(score_start_s + a[0] / rate_hz))
                qb = float(inv(score_start_s + b[0] / rate_hz))
                dur = run_m / rate_hz
                if kind == "cut":
                    reason = (f"{dur:.1f} s of score (score_qn {qa:.2f}-{qb:.2f}) match no recording time "
                              f"near {ra:.2f} s: a cut, or a repeat not taken")
                else:
                    reason = (f"{dur:.1f} s of recording ({ra:.2f}-{rb:.2f} s) match no score near "
                              f"score_qn {qa:.2f}: an inserted passage or a long pause")
                out.append({"kind": kind, "start": ra, "end": rb, "score_qn_start": qa,
                            "score_qn_end": qb, "duration_s": dur, "reason": reason})
            k = max(e, k + 1)
    out.sort(key=lambda r: (r["start"], r["kind"]))
    return out


def recording_cost_ratio(path, costs, *, ref_cost: float, rate_hz: float, window_s: float = 2.0):
    """Path cost per recording frame (mean over its path cells), Hann-smoothed over ``window_s``,
    divided by ``ref_cost``; returns ``(recording_frames, ratio)``."""
    return _axis_cost_ratio(path, costs, axis=1, ref_cost=ref_cost, rate_hz=rate_hz, window_s=window_s)


def mismatch_regions(path, costs, *, ref_cost: float, rate_hz: float, rec_start_s: float,
                     score_start_s: float, tempo_map: TimeMap, min_ratio: float = 0.8,
                     min_s: float = 2.0, window_s: float = 2.0):
    """Stretches of recording where the path cost stays high, classified by the path's slope.

    The path cost per recording frame (mean over the path cells of that frame) is smoothed over
    ``window_s`` and divided by ``ref_cost``; runs above ``min_ratio`` longer than ``min_s``
    are kept. A run is an ``insertion`` when it covers more than 1.5 times (and ``min_s`` more
    than) the recording time its score span takes at the piece's mean tempo, a ``cut`` in the
    opposite case, else a
    ``mismatch`` (played differently, or not matched reliably). Same dict keys as
    :func:`flag_runs`.
    """
    p = np.asarray(path, dtype=np.int64)
    j = p[:, 1]
    uj, r = recording_cost_ratio(p, costs, ref_cost=ref_cost, rate_hz=rate_hz, window_s=window_s)
    high = r > min_ratio
    inv = tempo_map.inverse()
    nominal_span = (p[-1, 0] - p[0, 0]) / rate_hz
    slope = max((p[-1, 1] - p[0, 1]) / rate_hz, 1e-9) / max(nominal_span, 1e-9)  # rec s per nominal s
    out = []
    k = 0
    while k < len(high):
        if not high[k]:
            k += 1
            continue
        e = k
        while e + 1 < len(high) and high[e + 1]:
            e += 1
        ja, jb = uj[k], uj[e]
        if (jb - ja) / rate_hz > min_s:
            rows = p[(j >= ja) & (j <= jb), 0]
            ia, ib = int(rows.min()), int(rows.max())
            rec_len = (jb - ja) / rate_hz
            exp_len = slope * (ib - ia) / rate_hz     # recording time the score span should take
            ra, rb = rec_start_s + ja / rate_hz, rec_start_s + jb / rate_hz
            qa = float(inv(score_start_s + ia / rate_hz))
            qb = float(inv(score_start_s + ib / rate_hz))
            if rec_len > 1.5 * exp_len and rec_len - exp_len > min_s:
                kind, dur = "insertion", rec_len - exp_len
                reason = (f"{rec_len:.1f} s of recording ({ra:.2f}-{rb:.2f} s) match the score poorly and "
                          f"take {rec_len / max(exp_len, 1e-9):.1f} times the expected time: an inserted "
                          "passage or an interruption")
            elif exp_len > 1.5 * rec_len and exp_len - rec_len > min_s:
                kind, dur = "cut", exp_len - rec_len
                reason = (f"score_qn {qa:.2f}-{qb:.2f} is squeezed into {rec_len:.1f} s of recording near "
                          f"{ra:.2f} s: a cut, or a repeat not taken")
            else:
                kind, dur = "mismatch", rec_len
                reason = (f"{rec_len:.1f} s of recording ({ra:.2f}-{rb:.2f} s, score_qn {qa:.2f}-{qb:.2f}) "
                          "match the score poorly")
            out.append({"kind": kind, "start": ra, "end": rb, "score_qn_start": qa, "score_qn_end": qb,
                        "duration_s": float(dur), "reason": reason, "cost_ratio": float(r[k:e + 1].mean())})
        k = e + 1
    return out


def merge_regions(regions, *, gap_s: float = 1.0):
    """Merge regions that overlap or lie within ``gap_s`` in recording time; the longer one's
    kind and reason win. Returns a new sorted list."""
    regs = sorted((dict(r) for r in regions), key=lambda r: (r["start"], r["end"]))
    out = []
    for r in regs:
        if out and r["start"] <= out[-1]["end"] + gap_s and (
                r["kind"] == out[-1]["kind"] or "mismatch" in (r["kind"], out[-1]["kind"])
                or r["start"] <= out[-1]["end"]):
            o = out[-1]
            keep = o if (o["end"] - o["start"]) >= (r["end"] - r["start"]) else r
            merged = dict(keep)
            merged["start"] = min(o["start"], r["start"])
            merged["end"] = max(o["end"], r["end"])
            merged["score_qn_start"] = min(o["score_qn_start"], r["score_qn_start"])
            merged["score_qn_end"] = max(o["score_qn_end"], r["score_qn_end"])
            out[-1] = merged
        else:
            out.append(r)
    return out
