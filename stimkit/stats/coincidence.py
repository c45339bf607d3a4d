"""Do score boundaries coincide with feature change points more often than chance?

What it computes
----------------
The number of score boundaries that have a feature change point within ``tolerance_s``
(default +-1 s, common practice for musical boundary detection at this time scale), and the
chance level of that count from a circular-shift permutation test: within each piece the
change points are all rotated by one random offset (uniform over ``[min_shift_s, length -
min_shift_s]``, wrapping around the piece's end; a near-zero rotation would hardly move the
points and is excluded), which keeps their number and spacing but breaks any tie to the score. The
p-value is ``(1 + #{shifted hits >= observed}) / (1 + n_shifts)``, which is never zero and is
exact as a Monte-Carlo test (Phipson & Smyth 2010).

Conventions
-----------
All times in seconds on one clock (normally recording time). Boundaries and change points
outside every piece span are ignored. A fixed ``seed`` (numpy ``default_rng``) makes the
result reproducible.

References
----------
Phipson, B., & Smyth, G. K. (2010). Permutation p-values should never be zero. Statistical
Applications in Genetics and Molecular Biology, 9(1), Article 39.
Good, P. (2005). Permutation, Parametric, and Bootstrap Tests of Hypotheses (3rd ed.).
Springer (randomization tests; circular shifts preserve autocorrelation).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["count_hits", "boundary_coincidence", "score_boundary_times", "DETECTED_KINDS"]

#: Event kinds that come from the audio or the sync, not from the score.
DETECTED_KINDS = frozenset({"piece", "silence", "feature_change", "sync"})


def score_boundary_times(events: pd.DataFrame, *, time_column: str = "recording",
                         kinds=None) -> np.ndarray:
    """Sorted, distinct times of the score boundaries in an event table.

    ``kinds`` defaults to every ``trial_type`` except those detected in the audio or the sync
    (:data:`DETECTED_KINDS`) and whole pieces; rows without a finite ``time_column`` are
    skipped.
    """
    if time_column not in events.columns or "trial_type" not in events.columns:
        return np.array([])
    tt = events["trial_type"].map(lambda v: None if pd.isna(v) else str(v))
    keep = tt.isin(list(kinds)) if kinds is not None else (tt.notna() & ~tt.isin(list(DETECTED_KINDS)))
    t = pd.to_numeric(events.loc[keep, time_column], errors="coerce").to_numpy(np.float64)
    return np.unique(t[np.isfinite(t)])


def count_hits(boundaries: np.ndarray, changes: np.ndarray, *, tolerance_s: float) -> int:
    """Number of boundaries with at least one change point within ``tolerance_s``."""
    b = np.asarray(boundaries, dtype=np.float64)
    c = np.sort(np.asarray(changes, dtype=np.float64))
    if b.size == 0 or c.size == 0:
        return 0
    lo = np.searchsorted(c, b - tolerance_s, "left")
    hi = np.searchsorted(c, b + tolerance_s, "right")
    return int(np.sum(hi > lo))


def boundary_coincidence(
    boundaries,
    changes,
    *,
    spans: pd.DataFrame | None = None,
    tolerance_s: float = 1.0,
    n_shifts: int = 999,
    seed: int = 0,
    min_shift_s: float | None = None,
) -> dict:
    """Observed boundary/change-point coincidences against circular-shift chance.

    Parameters
    ----------
    boundaries, changes : array_like
        Times (s) of the score boundaries and of the feature change points.
    spans : DataFrame, optional
        ``start``, ``end`` of each piece (s); change points are shifted within their piece.
        Default: one span from the earliest to the latest time given.
    tolerance_s : float
        Half width of the coincidence window.
    n_shifts : int
        Number of random circular shifts.
    seed : int
        Seed of ``numpy.random.default_rng``.
    min_shift_s : float, optional
        Smallest rotation (default ``5 * tolerance_s``); a piece shorter than twice this is
        rotated over its full length.

    Returns
    -------
    dict
        ``n_boundaries``, ``n_changes`` (inside the spans), ``tolerance_s``, ``observed_hits``,
        ``expected_hits`` (mean over shifts), ``hit_share`` (observed / boundaries),
        ``p_value``, ``n_shifts``, ``seed``, ``min_shift_s``.
    """
    b = np.asarray(boundaries, dtype=np.float64)
    c = np.asarray(changes, dtype=np.float64)
    b, c = b[np.isfinite(b)], c[np.isfinite(c)]
    if spans is None:
        allt = np.concatenate([b, c])
        if allt.size == 0:
            sp = np.zeros((0, 2))
        else:
            sp = np.array([[allt.min(), allt.max() + 1e-9]])
    else:
        sp = np.column_stack([spans["start"].to_numpy(np.float64), spans["end"].to_numpy(np.float64)])
    bs, cs = [], []
    for s, e in sp:
        bs.append(b[(b >= s) & (b < e)])
        cs.append(c[(c >= s) & (c < e)])
    b_in = np.concatenate(bs) if bs else np.array([])
    c_in = np.concatenate(cs) if cs else np.array([])
    observed = count_hits(b_in, c_in, tolerance_s=tolerance_s)
    min_shift = 5.0 * tolerance_s if min_shift_s is None else float(min_shift_s)
    rng = np.random.default_rng(seed)
    null = np.zeros(n_shifts, dtype=np.int64)
    for k in range(n_shifts):
        total = 0
        for (s, e), bk, ck in zip(sp, bs, cs):
            length = e - s
            if ck.size == 0 or bk.size == 0 or length <= 0:
                # still draw, so each piece consumes the same random numbers whatever the data
                rng.uniform(0.0, 1.0)
                continue
            lo = min_shift if length > 2 * min_shift else 0.0
            off = lo + rng.uniform(0.0, 1.0) * (length - 2 * lo)
            shifted = s + np.mod(ck - s + off, length)
            total += count_hits(bk, shifted, tolerance_s=tolerance_s)
        null[k] = total
    nb = int(b_in.size)
    return {
        "n_boundaries": nb,
        "n_changes": int(c_in.size),
        "tolerance_s": float(tolerance_s),
        "observed_hits": int(observed),
        "expected_hits": float(null.mean()) if n_shifts else float("nan"),
        "hit_share": float(observed / nb) if nb else float("nan"),
        "p_value": float((1 + np.sum(null >= observed)) / (1 + n_shifts)),
        "n_shifts": int(n_shifts),
        "seed": int(seed),
        "min_shift_s": float(min_shift),
    }
