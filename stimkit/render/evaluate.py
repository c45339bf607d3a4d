"""Score an alignment note by note against the renderer's exact ground truth.

:func:`note_truth` lists every rendered note with its *printed* address: the printed bar
(``index``, the bar's position in printed order, and ``measure``, its printed number), the
``pass`` (1 the first time the bar is played, 2 its repeat, ...) and the offset in the bar
(``offset_qn``, quarter notes from the bar's start). :func:`score_notes` looks each address up in
the alignment's own score -- the aligner may choose another performed order (repeats taken or
not), so the comparison never goes through ``score_qn`` -- and returns the estimated time and
confidence of every note. :func:`summarize` reduces a table of scored notes to the figures the
alignment goals are stated in.

Conventions
-----------
- Times are ``recording`` seconds. ``error_s`` is ``estimate - truth`` (positive: late).
- A truth note whose (printed bar, pass) does not exist in the alignment's performed order (for
  example a repeat the aligner thinks was skipped) gets ``found = False``, ``error_s = inf`` and
  ``confidence = NaN``: it counts as a gross error (beyond 2 s) and, in the calibration, as a
  large error that was *not* given a low confidence. Nothing is dropped.
- A right piece refused by the aligner is scored from the forced alignment (``refused = True``
  on its rows), so its errors are counted as well as its refusal.

Metrics
-------
The error figures are those of ``mir_eval.alignment`` (Raffel et al. 2014): median and mean
absolute error (:func:`mir_eval.alignment.absolute_error`) and the share of events within a
window (:func:`mir_eval.alignment.percentage_correct`, default window 300 ms). mir_eval requires
both time series to be increasing; when the estimates are (no note missing, no order reversed)
:func:`alignment_figures` takes its figures from mir_eval itself, else it computes the same
formulas directly and says so (``via_mir_eval = False``). The gross-failure bound of 2 s is MIREX
score-following practice. The calibration figures are those of the alignment goals: the share of
notes with confidence >= 0.9 that are within 100 ms, the share of notes more than 300 ms off that
have confidence < 0.5, and Spearman's rank correlation between confidence and absolute error
(:func:`scipy.stats.spearmanr`; a truthful confidence gives a clearly negative value).

References
----------
.. [1] C. Raffel, B. McFee, E. J. Humphrey, J. Salamon, O. Nieto, D. Liang and D. P. W. Ellis,
   "mir_eval: a transparent implementation of common MIR metrics", ISMIR 2014.
.. [2] A. Cont, D. Schwarz, N. Schnell and C. Raphael, "Evaluation of real-time audio-to-score
   alignment", ISMIR 2007 (the MIREX score-following measures).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["note_truth", "score_notes", "alignment_figures", "summarize", "GROSS_S",
           "TRUTH_COLUMNS", "SCORED_COLUMNS"]

#: Gross-error bound, seconds (MIREX score-following practice).
GROSS_S = 2.0
TRUTH_COLUMNS = ["part", "pitch", "index", "measure", "pass", "offset_qn", "score_qn", "truth_s"]
SCORED_COLUMNS = TRUTH_COLUMNS + ["found", "est_qn", "est_s", "error_s", "confidence"]
_ROUND = 6


def _bar_rows(measures: pd.DataFrame, score_qn: np.ndarray) -> np.ndarray:
    """Row of ``measures`` (sorted by ``score_qn``) holding each position."""
    starts = measures["score_qn"].to_numpy(np.float64)
    return np.clip(np.searchsorted(starts, score_qn + 1e-9, side="right") - 1, 0, len(measures) - 1)


def _bar_key(measures: pd.DataFrame) -> np.ndarray:
    """The printed-bar key of each row: ``index`` when the loader gives it, else ``measure``."""
    col = "index" if "index" in measures.columns else "measure"
    return measures[col].to_numpy()


def note_truth(perf, score) -> pd.DataFrame:
    """Every rendered note with its printed address and its true onset.

    Parameters
    ----------
    perf : stimkit.render.performance.Performance
        The rendering (``perf.notes`` with ``score_qn`` and ``onset_s``).
    score : ScoreModel
        The score *as rendered* (the performed order the renderer played).

    Returns
    -------
    pandas.DataFrame
        :data:`TRUTH_COLUMNS`, sorted by ``truth_s``.
    """
    m = score.measures.sort_values("score_qn", kind="stable").reset_index(drop=True)
    n = perf.notes
    q = n["score_qn"].to_numpy(np.float64)
    rows = _bar_rows(m, q)
    out = pd.DataFrame({
        "part": n["part"].astype(str).to_numpy(),
        "pitch": n["pitch"].to_numpy(),
        "index": _bar_key(m)[rows],
        "measure": m["measure"].to_numpy()[rows],
        "pass": m["pass"].to_numpy()[rows],
        "offset_qn": np.round(q - m["score_qn"].to_numpy(np.float64)[rows], _ROUND),
        "score_qn": q,
        "truth_s": n["onset_s"].to_numpy(np.float64),
    })
    return out.sort_values(["truth_s", "pitch"], kind="stable").reset_index(drop=True)


def score_notes(truth: pd.DataFrame, result) -> pd.DataFrame:
    """Look every truth note up in the alignment ``result`` by printed bar, pass and offset.

    Parameters
    ----------
    truth : pandas.DataFrame
        From :func:`note_truth`.
    result : stimkit.align.run.AlignResult
        Uses ``result.score.measures`` (the performed order the aligner chose), ``result.timemap``
        (``score_qn -> recording``) and ``result.notes`` (``score_qn``, ``confidence``).

    Returns
    -------
    pandas.DataFrame
        :data:`SCORED_COLUMNS`, in the order of ``truth``.
    """
    m = result.score.measures
    key = _bar_key(m)
    starts = {}
    for k, p, s in zip(key, m["pass"].to_numpy(), m["score_qn"].to_numpy(np.float64)):
        starts.setdefault((k, int(p)), float(s))
    bar0 = np.array([starts.get((k, int(p)), np.nan)
                     for k, p in zip(truth["index"].to_numpy(), truth["pass"].to_numpy())])
    found = np.isfinite(bar0)
    est_qn = bar0 + truth["offset_qn"].to_numpy(np.float64)
    est_s = np.full(len(truth), np.inf)
    conf = np.full(len(truth), np.nan)
    if found.any():
        est_s[found] = np.asarray(result.timemap(est_qn[found]), dtype=np.float64)
        rn = result.notes.sort_values("score_qn")
        conf[found] = np.interp(est_qn[found], rn["score_qn"].to_numpy(np.float64),
                                rn["confidence"].to_numpy(np.float64))
    out = truth.copy()
    out["found"] = found
    out["est_qn"] = est_qn
    out["est_s"] = est_s
    out["error_s"] = est_s - truth["truth_s"].to_numpy(np.float64)
    out["confidence"] = conf
    return out[SCORED_COLUMNS]


def alignment_figures(truth_s, est_s) -> dict:
    """Median/mean absolute error and shares within 50/100/300 ms, by ``mir_eval.alignment``.

    ``est_s`` may hold ``inf`` (a note the alignment does not have). Returns ``median_s``,
    ``mean_s``, ``within_50``, ``within_100``, ``within_300`` (fractions 0..1), ``over_2s``
    (count), ``max_s`` and ``via_mir_eval`` (whether mir_eval computed the figures: it needs both
    series increasing and finite).
    """
    import mir_eval

    ref = np.asarray(truth_s, dtype=np.float64)
    est = np.asarray(est_s, dtype=np.float64)
    order = np.lexsort((est, ref))
    ref, est = ref[order], est[order]
    dev = np.abs(est - ref)
    out = {"n": int(ref.size), "over_2s": int(np.sum(dev > GROSS_S)),
           "max_s": float(dev.max()) if dev.size else float("nan")}
    ok = (ref.size > 0 and np.all(np.isfinite(est)) and np.all(np.diff(est) >= 0)
          and np.all(est >= 0) and np.all(ref >= 0))
    if ok:
        med, mean = mir_eval.alignment.absolute_error(ref, est)
        w = {k: mir_eval.alignment.percentage_correct(ref, est, window=k / 1000.0) for k in (50, 100, 300)}
    elif ref.size:
        med, mean = float(np.median(dev)), float(np.mean(dev))
        w = {k: float(np.mean(dev <= k / 1000.0)) for k in (50, 100, 300)}
    else:
        med = mean = float("nan")
        w = {k: float("nan") for k in (50, 100, 300)}
    out.update({"median_s": float(med), "mean_s": float(mean), "within_50": float(w[50]),
                "within_100": float(w[100]), "within_300": float(w[300]), "via_mir_eval": bool(ok)})
    return out


def calibration_figures(error_s, confidence) -> dict:
    """The confidence goals: ``sure_within_100`` (share of notes with confidence >= 0.9 within
    100 ms; NaN when none is that sure), ``n_sure``, ``off_flagged`` (share of notes > 300 ms off
    with confidence < 0.5; a missing note has NaN confidence and counts as not flagged; NaN when
    no note is that far off), ``n_off`` and ``spearman`` (rank correlation of confidence with
    absolute error over the notes found)."""
    from scipy.stats import spearmanr

    err = np.abs(np.asarray(error_s, dtype=np.float64))
    conf = np.asarray(confidence, dtype=np.float64)
    sure = conf >= 0.9
    off = err > 0.3
    fin = np.isfinite(err) & np.isfinite(conf)
    rho = float("nan")
    if fin.sum() > 2 and np.ptp(conf[fin]) > 0 and np.ptp(err[fin]) > 0:
        rho = float(spearmanr(conf[fin], err[fin]).statistic)
    return {"n_sure": int(sure.sum()),
            "sure_within_100": float(np.mean(err[sure] <= 0.1)) if sure.any() else float("nan"),
            "n_off": int(off.sum()),
            "off_flagged": float(np.mean(np.nan_to_num(conf[off], nan=1.0) < 0.5)) if off.any() else float("nan"),
            "spearman": rho}


def summarize(scored: pd.DataFrame, *, by=None) -> pd.DataFrame | dict:
    """Figures of a table of scored notes (from :func:`score_notes`, with any extra columns).

    Without ``by``: one dict, :func:`alignment_figures` + :func:`calibration_figures`, plus
    ``missing`` (notes whose pass the alignment lacks). The figures pool every note; per-piece
    medians come from ``by="piece"``. With ``by`` (a column name or list): one row per group.
    """
    if by is not None:
        rows = []
        for key, g in scored.groupby(by, sort=False):
            d = summarize(g)
            d.update(dict(zip([by] if isinstance(by, str) else by, key if isinstance(key, tuple) else (key,))))
            rows.append(d)
        return pd.DataFrame(rows)
    d = alignment_figures(scored["truth_s"], scored["est_s"])
    d.update(calibration_figures(scored["error_s"], scored["confidence"]))
    d["missing"] = int((~scored["found"].astype(bool)).sum())
    return d
