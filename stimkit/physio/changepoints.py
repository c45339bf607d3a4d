"""Change points of the physiological series and the music's change-point trains.

What it computes
----------------
- **Detector**: penalised least squares over mean shifts (the l2 cost), solved exactly by PELT
  (Killick, Fearnhead & Eckley 2012). ruptures' ``KernelCPD(kernel="linear")`` optimises the
  same cost as ``Pelt(model="l2", jump=1)`` and is far faster; ``jump`` must be 1 (ruptures'
  ``Pelt`` default of 5 allows breaks only at every fifth sample). ``min_size`` is 10 beats
  (5 s for fixed-rate series; 2 s for music features at 2 Hz).
- **Penalty** ``bic_lrv`` (default): beta = 2 sigma_LR^2 ln n with the long-run variance of an
  AR(1) sigma_LR^2 = sigma_d^2 (1 + rho) / (1 - rho)^2, sigma_d = 1.4826 MAD(diff x) / sqrt 2
  and rho the lag-1 autocorrelation clipped to [0, 0.95]. rho is estimated from the
  differences (rho = 1 + 2 r_d for an AR(1), differences winsorised at 4 robust SDs), because
  the autocorrelation of the levels is inflated by the very level shifts being looked for
  (a series with a dozen 5-SD shifts gives rho near 1 and a penalty that hides them all);
  ``bic_iid`` drops the AR(1) factor
  (it over-segments autocorrelated series); a number is used as given. The rule is evaluated on
  every series it is applied to, surrogates included.
- **Times**: a break at index b (the first value of the new segment) lies at
  (t[b-1] + t[b]) / 2; the segment means on either side are kept.
- **Music trains**: ``events`` (default) -- the ``feature_change`` rows of the event table, one
  train per feature named in their labels; ``detect`` -- per feature column of the continuous
  file (names read from its sidecar), silent frames dropped, averaged to 2 Hz, robust z-scored
  and run through the same detector within each piece; score event kinds may be added as trains.
  Feature sets are each single train, every pair, and the union of all; unions merge events
  less than 0.5 s apart.

References
----------
Killick, R., Fearnhead, P., & Eckley, I. A. (2012). Optimal detection of changepoints with a
linear computational cost. JASA 107, 1590-1598.
Truong, C., Oudre, L., & Vayatis, N. (2020). Selective review of offline change point detection
methods. Signal Processing 167, 107299 (ruptures).
Zwiers, F. W., & von Storch, H. (1995). J Climate 8, 336-351 (AR(1) variance inflation).
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd

__all__ = ["penalty_value", "detect", "segment", "mbic_partition", "mbic_criterion", "crops", "segment_cost",
           "long_run_variance", "penalty_sweep", "detect_times", "physio_changepoints", "music_trains",
           "feature_sets", "co_change_times", "merge_close", "robust_sd_of_diff", "ar1_from_differences"]


def robust_sd_of_diff(x: np.ndarray) -> float:
    """sigma_d = 1.4826 MAD(diff x) / sqrt(2): the noise SD, robust to level shifts."""
    d = np.diff(np.asarray(x, dtype=np.float64))
    if d.size == 0:
        return 0.0
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2.0))


def ar1_from_differences(x: np.ndarray) -> float:
    """Lag-1 autocorrelation rho of an AR(1) estimated from its differences, clipped to [0, 0.95].

    For an AR(1) the differences have lag-1 autocorrelation -(1 - rho) / 2, so rho = 1 + 2 r_d.
    The differences are winsorised at 4 robust SDs first, so a few level shifts (one large
    difference each) do not inflate rho as they inflate the autocorrelation of the levels."""
    d = np.diff(np.asarray(x, dtype=np.float64))
    if d.size < 3:
        return 0.0
    med = np.median(d)
    mad = 1.4826 * np.median(np.abs(d - med))
    if mad > 0:
        d = np.clip(d, med - 4 * mad, med + 4 * mad)
    d = d - d.mean()
    den = float(np.dot(d, d))
    if den <= 0:
        return 0.0
    return float(np.clip(1.0 + 2.0 * np.dot(d[:-1], d[1:]) / den, 0.0, 0.95))


def long_run_variance(x: np.ndarray) -> float:
    """sigma_LR^2 = sigma_d^2 (1 + rho) / (1 - rho)^2 of an AR(1) (module notes)."""
    rho = ar1_from_differences(x)
    return robust_sd_of_diff(x) ** 2 * (1.0 + rho) / (1.0 - rho) ** 2


def penalty_value(x: np.ndarray, rule="bic_lrv") -> float:
    """The penalty beta per change point for series ``x`` by ``rule``: ``bic_lrv``, ``bic_iid``,
    ``mbic`` (its per-change part, 2 sigma_LR^2 ln n; the segment-length part is in the cost, see
    :func:`mbic_partition`), ``rate:R`` (NaN: chosen by the count, :func:`segment`) or a number."""
    if not isinstance(rule, str):
        return float(rule)
    n = max(int(np.size(x)), 2)
    if rule == "bic_iid":
        return 2.0 * robust_sd_of_diff(x) ** 2 * np.log(n)
    if rule in ("bic_lrv", "mbic"):
        return 2.0 * long_run_variance(x) * np.log(n)
    if rule.startswith("rate:"):
        return float("nan")
    raise ValueError(f"unknown penalty rule '{rule}' (bic_lrv, bic_iid, mbic, rate:R or a number)")


def detect(x: np.ndarray, *, min_size: int, pen: float) -> np.ndarray:
    """Break indices (first value of each new segment; the end index is dropped) by
    ``ruptures.KernelCPD(kernel="linear", min_size=min_size, jump=1)``."""
    import ruptures as rpt

    x = np.asarray(x, dtype=np.float64)
    if x.size < 2 * min_size or not np.isfinite(pen):
        return np.zeros(0, np.int64)
    if pen <= 0:
        pen = 1e-12
    bk = rpt.KernelCPD(kernel="linear", min_size=int(min_size), jump=1).fit(x.reshape(-1, 1)).predict(pen=pen)
    return np.asarray(bk[:-1], dtype=np.int64)


def segment_cost(x: np.ndarray, breaks) -> float:
    """The l2 cost of a segmentation: the sum over segments of (b - a) var(x[a:b])."""
    x = np.asarray(x, dtype=np.float64)
    edges = np.r_[0, np.asarray(breaks, dtype=np.int64), x.size]
    return float(sum(np.sum((x[a:b] - x[a:b].mean()) ** 2) for a, b in zip(edges[:-1], edges[1:]) if b > a))


def mbic_criterion(x: np.ndarray, breaks, *, sigma2: float) -> float:
    """Zhang & Siegmund's (2007) modified BIC as a cost to minimise, in the series' unit squared:
    SSE + sigma^2 (3 m ln n + sum_i ln(l_i / n)) for m breaks and segment lengths l_i (the
    penalty (3/2) m ln n + (1/2) sum ln(l_i / n) of the log likelihood, times 2 sigma^2)."""
    x = np.asarray(x, dtype=np.float64)
    n = x.size
    edges = np.r_[0, np.asarray(breaks, dtype=np.int64), n]
    lens = np.diff(edges)
    m = lens.size - 1
    return segment_cost(x, breaks) + sigma2 * (3.0 * m * np.log(n) + float(np.sum(np.log(lens / n))))


def mbic_partition(x: np.ndarray, *, min_size: int, sigma2: float) -> np.ndarray:
    """Break indices minimising :func:`mbic_criterion`, exactly, by optimal partitioning with the
    segment cost SSE + sigma^2 ln l and 2 sigma^2 ln n per break (the criterion less the constant
    sigma^2 ln n), pruned as in PELT (Killick et al. 2012) with K = -sigma^2 ln n: splitting a
    segment changes its length term by ln(l_1 l_2 / l) <= ln n, so a start s with
    F(s) + C(s, t) - sigma^2 ln n > F(t) can never be optimal later."""
    x = np.asarray(x, dtype=np.float64)
    n = x.size
    m = int(min_size)
    if n < 2 * m or not sigma2 > 0:
        return np.zeros(0, np.int64)
    c = x - x.mean()
    s1 = np.r_[0.0, np.cumsum(c)]
    s2 = np.r_[0.0, np.cumsum(c * c)]
    pen = 2.0 * sigma2 * np.log(n)
    K = -sigma2 * np.log(n)
    F = np.full(n + 1, np.inf)
    F[0] = -pen
    last = np.zeros(n + 1, np.int64)
    dead_at = np.full(n + 1, np.iinfo(np.int64).max // 2)
    cand = np.zeros(0, np.int64)
    for t in range(m, n + 1):
        s_new = t - m
        if s_new == 0 or (s_new >= m and np.isfinite(F[s_new])):
            cand = np.r_[cand, s_new]
        # a start pruned at time u stays usable for ends before u + m (the last segment after u
        # would be shorter than min_size), so it leaves only then
        cand = cand[dead_at[cand] + m > t]
        if cand.size == 0:
            continue
        L = (t - cand).astype(np.float64)
        cost = (s2[t] - s2[cand]) - (s1[t] - s1[cand]) ** 2 / L + sigma2 * np.log(L)
        tot = F[cand] + cost + pen
        j = int(np.argmin(tot))
        F[t] = tot[j]
        last[t] = cand[j]
        prune = cand[tot - pen + K > F[t]]
        dead_at[prune] = np.minimum(dead_at[prune], t)
    out = []
    t = n
    while t > 0:
        t = int(last[t])
        if t > 0:
            out.append(t)
    return np.asarray(sorted(out), dtype=np.int64)


def crops(x: np.ndarray, *, min_size: int, beta_min: float, beta_max: float, max_runs: int = 60) -> list[dict]:
    """Every optimal segmentation of the penalised l2 cost for penalties in [beta_min, beta_max]
    (CROPS, Haynes, Eckley & Fearnhead 2017): the solver runs at both ends; while an interval's
    ends differ by more than one change point, it runs again at the penalty where their
    penalised costs are equal, beta = (Q_few - Q_many) / (m_many - m_few), and splits the
    interval unless that run returns the fewer change points' solution. Returns one dict per
    segmentation, fewest change points first: ``n_changepoints``, ``cost`` (unpenalised),
    ``breaks``, ``penalty_low``, ``penalty_high`` (the penalties at which it is optimal)."""
    x = np.asarray(x, dtype=np.float64)
    runs: dict[float, np.ndarray] = {}

    def run(beta):
        if beta not in runs:
            runs[beta] = detect(x, min_size=min_size, pen=beta)
        return runs[beta]

    sols: dict[int, np.ndarray] = {}
    for b in (beta_min, beta_max):
        br = run(b)
        sols[br.size] = br
    todo = [(beta_min, beta_max)]
    while todo and len(runs) < max_runs:
        b0, b1 = todo.pop()
        many, few = run(b0), run(b1)
        if many.size <= few.size + 1:
            continue
        q_many, q_few = segment_cost(x, many), segment_cost(x, few)
        bi = (q_few - q_many) / (many.size - few.size)
        if not b0 < bi < b1:
            continue
        mid = run(bi)
        sols[mid.size] = mid
        if mid.size != few.size:
            todo += [(b0, bi), (bi, b1)]
    ms = sorted(sols)  # fewest first
    cost = {k: segment_cost(x, sols[k]) for k in ms}
    out = []
    for i, k in enumerate(ms):
        # optimal between the switch to the next-more and the switch to the next-fewer solution
        hi = beta_max if i == 0 else (cost[ms[i - 1]] - cost[k]) / (k - ms[i - 1])
        lo = beta_min if i == len(ms) - 1 else (cost[k] - cost[ms[i + 1]]) / (ms[i + 1] - k)
        out.append({"n_changepoints": int(k), "cost": cost[k], "breaks": sols[k],
                    "penalty_low": float(max(lo, beta_min)), "penalty_high": float(min(hi, beta_max))})
    return out


def penalty_sweep(segments, *, min_size: int, rule="bic_lrv", factors=(0.25, 4.0)) -> pd.DataFrame:
    """The penalty sweep of the detector (CROPS) on each gap-free segment, over ``factors`` times
    the rule's penalty per change (bic_lrv's for ``rate:R``): one row per segment x optimal
    segmentation with its penalty range, count and cost; ``chosen`` marks the one the rule's
    penalty gives (for ``mbic`` and ``rate:R``, whose choice is not a constant penalty, none)."""
    rows = []
    for k, seg in enumerate(segments):
        ref = penalty_value(seg.x, rule)
        constant = np.isfinite(ref) and not (isinstance(rule, str) and rule == "mbic")
        if not np.isfinite(ref):
            ref = penalty_value(seg.x, "bic_lrv")
        if not ref > 0 or seg.x.size < 2 * min_size:
            continue
        for sol in crops(seg.x, min_size=min_size, beta_min=factors[0] * ref, beta_max=factors[1] * ref):
            rows.append({"segment": k, "n_values": int(seg.x.size), "penalty_rule": ref,
                         "penalty_low": sol["penalty_low"], "penalty_high": sol["penalty_high"],
                         "factor_low": sol["penalty_low"] / ref, "factor_high": sol["penalty_high"] / ref,
                         "n_changepoints": sol["n_changepoints"], "cost": sol["cost"],
                         "chosen": bool(constant and sol["penalty_low"] <= ref <= sol["penalty_high"])})
    return pd.DataFrame(rows, columns=["segment", "n_values", "penalty_rule", "penalty_low", "penalty_high",
                                       "factor_low", "factor_high", "n_changepoints", "cost", "chosen"])


def segment(x: np.ndarray, *, min_size: int, rule="bic_lrv", duration_s: float | None = None
            ) -> tuple[np.ndarray, float]:
    """(break indices, penalty per change) of ``x`` by ``rule``: KernelCPD linear for
    ``bic_lrv``, ``bic_iid`` and numbers; :func:`mbic_partition` for ``mbic``; for ``rate:R``
    (R change points per minute of ``duration_s``) the CROPS solution (over penalties from
    0.01 to 100 times bic_lrv's) whose count is nearest R x minutes (the fewer on a tie)."""
    x = np.asarray(x, dtype=np.float64)
    if isinstance(rule, str) and rule == "mbic":
        return mbic_partition(x, min_size=min_size, sigma2=long_run_variance(x)), penalty_value(x, rule)
    if isinstance(rule, str) and rule.startswith("rate:"):
        per_min = float(rule.split(":", 1)[1])
        target = per_min * (duration_s if duration_s is not None else x.size) / 60.0
        ref = penalty_value(x, "bic_lrv")
        if not ref > 0 or x.size < 2 * min_size:
            return np.zeros(0, np.int64), float("nan")
        sols = crops(x, min_size=min_size, beta_min=0.01 * ref, beta_max=100.0 * ref)
        best = min(sols, key=lambda d: (abs(d["n_changepoints"] - target), d["n_changepoints"]))
        return best["breaks"], float(np.sqrt(best["penalty_low"] * best["penalty_high"]))
    pen = penalty_value(x, rule)
    return detect(x, min_size=min_size, pen=pen), pen


def detect_times(segments_t, segments_x, *, min_size: int, rule="bic_lrv") -> np.ndarray:
    """Change-point times over several gap-free segments (penalty evaluated per segment)."""
    out = []
    for t, x in zip(segments_t, segments_x):
        b, _ = segment(x, min_size=min_size, rule=rule, duration_s=float(t[-1] - t[0]) if t.size else 0.0)
        if b.size:
            out.append(0.5 * (t[b - 1] + t[b]))
    return np.sort(np.concatenate(out)) if out else np.zeros(0)


def physio_changepoints(segments, *, min_size: int, rule="bic_lrv") -> pd.DataFrame:
    """One row per change point: ``time``, ``cp_index`` (index in the series), ``segment``,
    ``mean_before``, ``mean_after``, ``penalty``."""
    rows = []
    for k, seg in enumerate(segments):
        b, pen = segment(seg.x, min_size=min_size, rule=rule, duration_s=float(seg.t[-1] - seg.t[0]))
        edges = np.r_[0, b, seg.x.size]
        means = [float(seg.x[a:c].mean()) for a, c in zip(edges[:-1], edges[1:])]
        for j, bi in enumerate(b):
            rows.append({"time": float(0.5 * (seg.t[bi - 1] + seg.t[bi])), "cp_index": int(seg.index[bi]),
                         "segment": k, "mean_before": means[j], "mean_after": means[j + 1], "penalty": pen})
    return pd.DataFrame(rows, columns=["time", "cp_index", "segment", "mean_before", "mean_after", "penalty"])


def merge_close(times, *, within_s: float) -> np.ndarray:
    """Sorted times with any time less than ``within_s`` after the last kept one removed."""
    t = np.sort(np.asarray(times, dtype=np.float64))
    if t.size == 0:
        return t
    keep = [t[0]]
    for v in t[1:]:
        if v - keep[-1] >= within_s:
            keep.append(v)
    return np.asarray(keep)


def _silence_mask(features: pd.DataFrame) -> np.ndarray:
    for c in features.columns:
        if str(c).lower() in ("silent", "silence", "is_silent"):
            return pd.to_numeric(features[c], errors="coerce").fillna(0).to_numpy() > 0.5
    return np.zeros(len(features), bool)


def _detect_feature_trains(features: pd.DataFrame, span, *, columns=None, rate_hz: float = 2.0,
                           min_size_s: float = 2.0, rule="bic_lrv") -> pd.DataFrame:
    from ..stats.roles import change_columns

    t = np.asarray(features.index, dtype=np.float64)
    silent = _silence_mask(features)
    if columns is None:
        columns = change_columns(features) or [
            c for c in features.columns if pd.api.types.is_numeric_dtype(features[c])
            and str(c).lower() not in ("silent", "silence", "is_silent")]
    m = max(2, int(round(min_size_s * rate_hz)))
    rows = []
    for c in columns:
        v = pd.to_numeric(features[c], errors="coerce").to_numpy(np.float64)
        v = np.where(silent | ~np.isfinite(v), np.nan, v)
        for s0, s1 in zip(span.starts, span.ends):
            nb = int(np.floor((s1 - s0) * rate_hz))
            if nb < 2 * m:
                continue
            edges = s0 + np.arange(nb + 1) / rate_hz
            idx = np.searchsorted(edges, t, "right") - 1
            inside = (idx >= 0) & (idx < nb) & np.isfinite(v)
            sums = np.bincount(idx[inside], weights=v[inside], minlength=nb)
            cnt = np.bincount(idx[inside], minlength=nb)
            good = cnt > 0
            if good.sum() < 2 * m:
                continue
            y = sums[good] / cnt[good]
            centre = 0.5 * (edges[:-1] + edges[1:])[good]
            med = np.median(y)
            mad = 1.4826 * np.median(np.abs(y - med))
            if not mad > 0:
                continue
            z = (y - med) / mad
            b, _ = segment(z, min_size=m, rule=rule, duration_s=float(centre[-1] - centre[0]))
            for bi in b:
                rows.append({"feature": str(c), "time": float(0.5 * (centre[bi - 1] + centre[bi])),
                             "source": "detect"})
    return pd.DataFrame(rows, columns=["feature", "time", "source"])


def music_trains(events: pd.DataFrame, features: pd.DataFrame | None, span, *, source: str = "events",
                 score_trains=(), columns=None) -> pd.DataFrame:
    """Music change points, one row per feature x time: ``feature``, ``time``, ``source``,
    restricted to Omega and sorted by feature then time."""
    parts = []
    if source == "events":
        fc = events[events["trial_type"].astype(str) == "feature_change"] if "trial_type" in events else events[:0]
        on = pd.to_numeric(fc["onset"], errors="coerce").to_numpy(np.float64)
        rows = []
        for t, lab in zip(on, fc["label"] if "label" in fc.columns else [None] * len(fc)):
            if not np.isfinite(t) or lab is None or (isinstance(lab, float) and np.isnan(lab)):
                continue
            for f in str(lab).split(","):
                if f.strip():
                    rows.append({"feature": f.strip(), "time": float(t), "source": "events"})
        parts.append(pd.DataFrame(rows, columns=["feature", "time", "source"]))
    elif source == "detect":
        if features is None:
            raise ValueError("music_source 'detect' needs the continuous features")
        parts.append(_detect_feature_trains(features, span, columns=columns))
    else:
        raise ValueError(f"unknown music source '{source}' (events, detect)")
    for kind in score_trains:
        ev = events[events["trial_type"].astype(str) == kind]
        on = pd.to_numeric(ev["onset"], errors="coerce").to_numpy(np.float64)
        on = np.unique(on[np.isfinite(on)])
        parts.append(pd.DataFrame({"feature": kind, "time": on, "source": "score"}))
    out = pd.concat([p for p in parts if len(p)], ignore_index=True) if any(len(p) for p in parts) else \
        pd.DataFrame(columns=["feature", "time", "source"])
    if len(out):
        out = out[span.contains(out["time"].to_numpy(np.float64))]
        out = out.drop_duplicates(["feature", "time"]).sort_values(["feature", "time"], kind="mergesort")
    return out.reset_index(drop=True)


def co_change_times(trains: pd.DataFrame, *, k: int, within_s: float = 1.0) -> np.ndarray:
    """Times where at least ``k`` different features change within ``within_s`` seconds: for
    every music change point, the change points of the next ``within_s`` seconds; where they
    name ``k`` or more features, a co-change at the middle of the first and last of them;
    co-changes closer than ``within_s`` are merged (the first kept)."""
    if not len(trains):
        return np.zeros(0)
    order = np.argsort(trains["time"].to_numpy(np.float64), kind="mergesort")
    t = trains["time"].to_numpy(np.float64)[order]
    f = trains["feature"].astype(str).to_numpy()[order]
    hi = np.searchsorted(t, t + within_s + 1e-9, "right")
    out = []
    for i in range(t.size):
        if len(set(f[i:hi[i]])) >= k:
            out.append(0.5 * (t[i] + t[hi[i] - 1]))
    return merge_close(out, within_s=within_s)


def feature_sets(trains: pd.DataFrame, *, pairs: bool = True, merge_s: float = 0.5, co_change=(),
                 co_change_s: float = 1.0) -> dict[str, np.ndarray]:
    """Feature set name -> sorted times: each feature, every pair (``a+b``), the union
    (``all``; unions merge events closer than ``merge_s``) and, for each k in ``co_change``, the
    co-change train ``co-change>=k`` (:func:`co_change_times`)."""
    feats = list(dict.fromkeys(trains["feature"])) if len(trains) else []
    single = {f: np.sort(trains.loc[trains["feature"] == f, "time"].to_numpy(np.float64)) for f in feats}
    out = dict(single)
    if pairs and len(feats) > 2:
        for a, b in itertools.combinations(feats, 2):
            out[f"{a}+{b}"] = merge_close(np.r_[single[a], single[b]], within_s=merge_s)
    if len(feats) > 1:
        out["all"] = merge_close(np.concatenate(list(single.values())), within_s=merge_s)
    for k in co_change:
        if 2 <= int(k) <= len(feats):
            out[f"co-change>={int(k)}"] = co_change_times(trains, k=int(k), within_s=co_change_s)
    return out
