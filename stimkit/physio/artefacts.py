"""Artefact and ectopic-beat rules R0-R4, each flag with its reason code, and gap-free segments.

What it computes
----------------
:func:`flag_artefacts` applies the rules in order; a value keeps the code of the first rule that
flagged it, and later rules see only the values still accepted:

====  =====================================================================================
R0    the input marks it invalid (``valid == 0``, ``artefact == 1``, ``beat_type`` not normal
      or paced), or the value is missing
R1    range: rr outside 300-2000 ms; other interval kinds outside 0.6-1.4 x the session median
R2    successive change, rr only: ``|x_i - x_ref| > 0.2 x_ref`` with ``x_ref`` the last
      accepted value (the 20 % rule, Malik et al. 1989); ``kamath`` uses +32.5 % / -24.5 %
      (Kamath & Fallen 1995). The first reference is the median of the first five accepted
      values; after five rejections in a row that agree within the same rule, the reference
      moves to the newest value (a lasting change of rate is not an artefact).
R3    Hampel filter: ``|x_i - median| > 4 x 1.4826 x MAD`` over a centred 21-value window of
      the accepted values (Hampel 1974)
R4    beats from a raw ECG that the Kubios beat classification marks ectopic, missed, extra or
      long-short (:func:`neurokit2.signal_fixpeaks`, Lipponen & Tarvainen 2019)
====  =====================================================================================

A fixed-rate series (tonic skin conductance) gets R0 only. :func:`gap_free_segments` prepares
the gap-free input of the change-point analysis: runs of at most ``max_run`` flagged values are
linearly interpolated over the value index, longer runs split the series, and segments shorter
than ``min_length`` values are dropped. The artefact share and its verdict (``> 5 %`` warn,
``> 20 %`` unreliable) come from :func:`artefact_share`.

References
----------
Malik, M., et al. (1989). Heart rate variability in relation to prognosis after myocardial
infarction: selection of optimal processing techniques. Eur Heart J 10, 1060-1074.
Kamath, M. V., & Fallen, E. L. (1995). Correction of the heart rate variability signal for
ectopics and missing beats. In Malik & Camm (eds.), Heart Rate Variability, 75-85.
Hampel, F. R. (1974). The influence curve and its role in robust estimation. JASA 69, 383-393.
Lipponen, J. A., & Tarvainen, M. P. (2019). J Med Eng Technol 43(3), 173-181.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .series import BeatSeries

__all__ = ["flag_artefacts", "gap_free_segments", "artefact_share", "Segment", "REASONS",
           "WARN_SHARE", "UNRELIABLE_SHARE"]

#: Reason code -> description (written to the sidecars).
REASONS = {
    "R0": "marked invalid in the input (valid 0, artefact 1, beat_type not normal/paced) or missing",
    "R1": "outside the plausible range (rr 300-2000 ms; other kinds 0.6-1.4 x the session median)",
    "R2": "successive change above the rule (20 % of the last accepted value; Malik et al. 1989)",
    "R3": "Hampel outlier (> 4 x 1.4826 x MAD from the median of a centred 21-value window)",
    "R4": "ectopic, missed, extra or long-short beat by the Kubios classification of the raw ECG",
}
WARN_SHARE = 0.05
UNRELIABLE_SHARE = 0.20
RR_RANGE_MS = (300.0, 2000.0)
OTHER_RANGE = (0.6, 1.4)


def _r2(x: np.ndarray, accepted: np.ndarray, *, method: str) -> np.ndarray:
    """Indices flagged by the successive-change rule (see module table)."""
    up, down = (0.2, 0.2) if method == "malik" else (0.325, 0.245)
    idx = np.flatnonzero(accepted)
    flagged = []
    if idx.size == 0:
        return np.zeros(0, np.int64)
    ref = float(np.median(x[idx[:5]]))
    run: list[int] = []
    for i in idx:
        v = x[i]
        if ref * (1 - down) <= v <= ref * (1 + up):
            ref = v
            run = []
            continue
        run.append(i)
        flagged.append(i)
        if len(run) >= 5:
            r = x[np.asarray(run)]
            if np.all(np.abs(np.diff(r)) <= up * r[:-1]):
                for j in run:  # a lasting change of level: accept it
                    flagged.remove(j)
                ref = float(r[-1])
                run = []
    return np.asarray(flagged, dtype=np.int64)


def _hampel(x: np.ndarray, *, half: int = 10, k: float = 4.0) -> np.ndarray:
    """Boolean outliers of ``x`` by the Hampel rule over a centred ``2 half + 1`` window."""
    n = x.size
    if n < 3:
        return np.zeros(n, bool)
    from numpy.lib.stride_tricks import sliding_window_view

    pad = np.pad(x, half, mode="reflect") if n > half else np.pad(x, half, mode="edge")
    w = sliding_window_view(pad, 2 * half + 1)[:n]
    med = np.median(w, axis=1)
    mad = np.median(np.abs(w - med[:, None]), axis=1)
    return np.abs(x - med) > k * 1.4826 * mad + 1e-12


def flag_artefacts(series: BeatSeries, *, successive: str = "malik",
                   hampel_half_width: int = 10, hampel_k: float = 4.0) -> np.ndarray:
    """Reason code per value (``""`` where accepted), rules R0-R4 in order (module table).

    Parameters
    ----------
    series : BeatSeries
    successive : str
        ``malik`` (20 %, default) or ``kamath`` (+32.5 % / -24.5 %) for R2.
    hampel_half_width, hampel_k : int, float
        R3 window half width (values) and threshold in robust SDs.

    Returns
    -------
    ndarray of str
        ``""``, ``"R0"`` ... ``"R4"`` per value.
    """
    x = series.x
    reason = np.full(series.n, "", dtype=object)
    reason[~series.valid | ~np.isfinite(x)] = "R0"
    if series.fixed_rate:
        return reason.astype(str)
    acc = reason == ""
    if series.kind == "rr":
        lo, hi = RR_RANGE_MS
    else:
        med = float(np.median(x[acc])) if acc.any() else np.nan
        lo, hi = OTHER_RANGE[0] * med, OTHER_RANGE[1] * med
    r1 = acc & ((x < lo) | (x > hi))
    reason[r1] = "R1"
    acc = reason == ""
    if series.kind == "rr":
        reason[_r2(x, acc, method=successive)] = "R2"
        acc = reason == ""
    ia = np.flatnonzero(acc)
    if ia.size:
        out = _hampel(x[ia], half=hampel_half_width, k=hampel_k)
        reason[ia[out]] = "R3"
    if series.suspect is not None:
        reason[(reason == "") & series.suspect] = "R4"
    return reason.astype(str)


def artefact_share(reasons: np.ndarray) -> tuple[float, str]:
    """Share of flagged values and the verdict: ``ok``, ``warn`` (> 5 %) or ``unreliable`` (> 20 %)."""
    r = np.asarray(reasons)
    share = float(np.mean(r != "")) if r.size else 0.0
    verdict = "unreliable" if share > UNRELIABLE_SHARE else "warn" if share > WARN_SHARE else "ok"
    return share, verdict


@dataclass(frozen=True)
class Segment:
    """A gap-free stretch of the series: ``index`` into the series, ``t``, ``x`` (interpolated)."""

    index: np.ndarray
    t: np.ndarray
    x: np.ndarray


def gap_free_segments(series: BeatSeries, reasons: np.ndarray, *, max_run: int = 3,
                      min_length: int = 40) -> list[Segment]:
    """Gap-free segments for change-point analysis (see module notes)."""
    bad = np.asarray(reasons) != ""
    n = series.n
    # runs of flagged values
    edges = np.diff(np.r_[0, bad.astype(np.int8), 0])
    starts, ends = np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)
    cut = np.zeros(n, bool)  # values that end up outside every segment
    for s, e in zip(starts, ends):
        if e - s > max_run or s == 0 or e == n:
            cut[s:e] = True
    x = series.x.copy()
    good = ~bad
    gi = np.flatnonzero(good)
    if gi.size >= 2:
        fill = bad & ~cut
        x[fill] = np.interp(np.flatnonzero(fill), gi, series.x[gi])
    out = []
    e2 = np.diff(np.r_[0, (~cut).astype(np.int8), 0])
    for s, e in zip(np.flatnonzero(e2 == 1), np.flatnonzero(e2 == -1)):
        if e - s >= min_length:
            idx = np.arange(s, e)
            out.append(Segment(index=idx, t=series.t[idx], x=x[idx]))
    return out
