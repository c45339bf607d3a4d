"""Analysis A: the series before vs after each score boundary, calibrated on pseudo-boundaries.

What it computes
----------------
For one series, one window size and one boundary family (``trial_type``):

- **Windows** (beats): ``before`` = the last N values with ``t < t_b``; ``after`` = the first N
  with ``t >= t_b + guard``. Fixed-rate series use seconds: ``[t_b - S, t_b)`` and
  ``[t_b + g, t_b + g + S)``. Flagged values are removed after counting; fewer than 80 % valid
  values gives status ``insufficient``; a window leaving the boundary's piece (Omega) gives
  ``edge``; another boundary of the family inside a window adds the flag ``overlap``.
- **Effects** (after - before): difference and per cent, Hodges-Lehmann shift (median of all
  pairwise differences), Hedges' g = J d with J = 1 - 3 / (4 (n_a + n_b) - 9) (Hedges 1981).
- **Tests**, all two-sided: T1 Welch t (Welch 1947; :func:`scipy.stats.ttest_ind`), T2
  Mann-Whitney U with rank-biserial r = 2U / (n_a n_b) - 1 (Mann & Whitney 1947;
  :func:`scipy.stats.mannwhitneyu`, asymptotic, tie and continuity corrected), T3 Welch with
  AR(1) effective sizes n_eff = n (1 - rho) / (1 + rho) (Bayley & Hammersley 1946; Zwiers & von
  Storch 1995), and **T4**, the primary test: T1's t at K pseudo-boundaries placed uniformly in
  Omega wherever both windows fit under the same rules; p_cal = (1 + #{|t_k| >= |t_obs|}) /
  (K + 1) (Phipson & Smyth 2010), z_null = (t_obs - mean t_k) / sd t_k. The null carries the
  participant's own autocorrelation, drift and artefact pattern. Pseudo-boundaries are placed
  where no boundary of the family lies inside their windows (``pseudo_placement`` ``away``),
  so that responses at the real boundaries do not enter their own null; under the null the
  boundary times are independent of the series, so this choice does not change the null
  distribution. When that leaves too little room (dense families: fewer than K/4 places), they
  are placed anywhere (``anywhere``), which is conservative when the participant responds.
- **CI** (default ``pseudo``): with c_k the centred pseudo-boundary differences,
  [delta - q97.5(c), delta - q2.5(c)]; ``iid`` gives Welch's interval instead; ``bootstrap``
  the stationary-bootstrap percentile interval (Politis & Romano 1994; block length by Politis
  & White 2004 from the session series, :mod:`.bootstrap`), only where the block is at most a
  quarter of the window, else the ``pseudo`` one.
- **Multiplicity**: Benjamini-Hochberg (1995) on p_cal within the family (or ``fdr_by``,
  ``holm`` through :func:`statsmodels.stats.multitest.multipletests`); ``significant`` is
  q < alpha. Only T4 sets the flag; T1-T3 are reported.
- **Share vs chance**: the share of the family's boundaries with p_T1 < alpha (and with
  q < alpha) against R pseudo sets made by one circular shift of all boundary times on the
  concatenated Omega axis (``circular_shift``, u ~ U(30 s, T - 30 s); keeps their spacing and
  overlap) or by uniform placement with the observed minimum spacing (``uniform``); the same
  per-boundary rule runs on every set; p_share = (1 + #{s_null >= s_obs}) / (R + 1).

The pseudo-boundary statistics are computed for all windows at once from prefix sums; the real
boundaries also go through scipy, and both agree to rounding (the tests check it).

References
----------
Welch, B. L. (1947). Biometrika 34, 28-35. Mann, H. B., & Whitney, D. R. (1947). Ann Math Stat
18, 50-60. Hedges, L. V. (1981). J Educ Stat 6, 107-128. Bayley, G. V., & Hammersley, J. M.
(1946). JRSS Suppl 8, 184-197. Zwiers, F. W., & von Storch, H. (1995). J Climate 8, 336-351.
Phipson, B., & Smyth, G. K. (2010). SAGMB 9(1), 39. Benjamini, Y., & Hochberg, Y. (1995). JRSS-B
57, 289-300. Benjamini, Y., & Yekutieli, D. (2001). Ann Stat 29, 1165-1188.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from .bootstrap import bootstrap_delta_ci
from .span import Span

__all__ = ["WindowSetup", "lag1_autocorrelation", "effective_n", "hedges_g", "hodges_lehmann",
           "adjust_pvalues", "adjust_rows", "boundary_table", "family_tests", "BOUNDARY_TEST_COLUMNS",
           "BOUNDARY_SUMMARY_COLUMNS"]

BOUNDARY_TEST_COLUMNS = [
    "participant", "series", "trial_type", "label", "measure", "beat", "piece", "confidence",
    "onset", "N", "window_unit", "n_before", "n_after", "mean_before", "mean_after", "delta",
    "delta_pct", "hl_shift", "ci_low", "ci_high", "ci_method", "hedges_g", "t_welch", "df_welch",
    "p_welch", "U", "p_mwu", "r_rb", "rho1", "n_eff", "t_ar1", "p_ar1", "z_null", "p_cal", "q_bh",
    "significant", "direction", "flags", "status"]
BOUNDARY_SUMMARY_COLUMNS = [
    "participant", "series", "trial_type", "N", "window_unit", "B", "n_boundaries", "K",
    "pseudo_placement", "s_obs", "null_q05", "null_q50", "null_q95", "p_share", "s_obs_q", "null_q95_q", "p_share_q",
    "share_null", "R", "n_significant", "n_up", "n_down", "chance_delta_q05", "chance_delta_q95",
    "rho1", "correction", "alpha"]


# ---------------------------------------------------------------------------------------------
# small closed forms
# ---------------------------------------------------------------------------------------------
def lag1_autocorrelation(segments) -> float:
    """Pooled lag-1 autocorrelation of gap-free segments (each demeaned), clipped to [0, 0.95]."""
    num = den = 0.0
    for x in segments:
        x = np.asarray(x, dtype=np.float64)
        if x.size < 3:
            continue
        d = x - x.mean()
        num += float(np.dot(d[:-1], d[1:]))
        den += float(np.dot(d, d))
    rho = num / den if den > 0 else 0.0
    return float(np.clip(rho, 0.0, 0.95))


def effective_n(n, rho: float):
    """AR(1) effective sample size n (1 - rho) / (1 + rho) (Bayley & Hammersley 1946)."""
    return np.asarray(n, dtype=np.float64) * (1.0 - rho) / (1.0 + rho)


def hedges_g(a, b) -> float:
    """Hedges' g of mean(a) - mean(b): J d, d on the pooled SD, J = 1 - 3 / (4 (n_a + n_b) - 9)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    na, nb = a.size, b.size
    sp = np.sqrt(((na - 1) * a.var(ddof=1) + (nb - 1) * b.var(ddof=1)) / (na + nb - 2))
    if not sp > 0:
        return float("nan")
    return float((1.0 - 3.0 / (4.0 * (na + nb) - 9.0)) * (a.mean() - b.mean()) / sp)


def hodges_lehmann(a, b) -> float:
    """Hodges-Lehmann shift of a over b: the median of all pairwise differences a_i - b_j."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    return float(np.median(a[:, None] - b[None, :]))


def adjust_pvalues(p, *, method: str = "fdr_bh", alpha: float = 0.05) -> np.ndarray:
    """Adjusted p-values (NaN kept) by :func:`statsmodels.stats.multitest.multipletests`:
    ``fdr_bh`` (Benjamini & Hochberg 1995), ``fdr_by`` (Benjamini & Yekutieli 2001) or ``holm``."""
    from statsmodels.stats.multitest import multipletests

    p = np.asarray(p, dtype=np.float64)
    out = np.full(p.shape, np.nan)
    ok = np.isfinite(p)
    if ok.any():
        out[ok] = multipletests(p[ok], alpha=alpha, method=method)[1]
    return out


def adjust_rows(p: np.ndarray, *, method: str = "fdr_bh") -> np.ndarray:
    """Row-wise adjusted p-values of a 2-D array (NaN = not tested), vectorised; the same
    step-up/step-down formulas as :func:`adjust_pvalues` (the tests check they agree)."""
    p = np.atleast_2d(np.asarray(p, dtype=np.float64))
    R, B = p.shape
    m = np.sum(np.isfinite(p), axis=1)[:, None].astype(np.float64)
    order = np.argsort(np.where(np.isfinite(p), p, np.inf), axis=1, kind="stable")
    ps = np.take_along_axis(p, order, axis=1)
    rank = np.arange(1, B + 1, dtype=np.float64)[None, :]
    valid = rank <= m
    if method in ("fdr_bh", "fdr_by"):
        c = np.ones_like(m)
        if method == "fdr_by":
            c = np.array([[np.sum(1.0 / np.arange(1, int(k) + 1)) if k else 1.0] for k in m[:, 0]])
        adj = np.where(valid, ps * m * c / rank, np.inf)
        adj = np.minimum.accumulate(adj[:, ::-1], axis=1)[:, ::-1]
    elif method == "holm":
        adj = np.where(valid, ps * (m - rank + 1), -np.inf)
        adj = np.maximum.accumulate(adj, axis=1)
    else:
        raise ValueError(f"unknown correction '{method}' (fdr_bh, fdr_by, holm)")
    adj = np.where(valid, np.minimum(adj, 1.0), np.nan)
    out = np.empty_like(adj)
    np.put_along_axis(out, order, adj, axis=1)
    return out


def _welch(ma, va, na, mb, vb, nb):
    """Welch t (a - b), Welch-Satterthwaite df and two-sided p, elementwise."""
    with np.errstate(invalid="ignore", divide="ignore"):
        sa, sb = va / na, vb / nb
        se2 = sa + sb
        t = (ma - mb) / np.sqrt(se2)
        df = se2 ** 2 / (sa ** 2 / (na - 1) + sb ** 2 / (nb - 1))
    p = 2.0 * stats.t.sf(np.abs(t), df)
    return t, df, p


# ---------------------------------------------------------------------------------------------
# windows
# ---------------------------------------------------------------------------------------------
@dataclass
class WindowSetup:
    """One series prepared for windowing: times, values, accepted mask, prefix sums, Omega."""

    t: np.ndarray
    x: np.ndarray
    ok: np.ndarray
    span: Span
    fixed_rate_hz: float | None
    guard_s: float = 0.0
    min_valid_share: float = 0.8

    def __post_init__(self):
        ok = self.ok & np.isfinite(self.x)
        self.ok = ok
        c = float(np.mean(self.x[ok])) if ok.any() else 0.0
        xc = np.where(ok, self.x - c, 0.0)
        self._c = c
        self._n = np.r_[0, np.cumsum(ok)]
        self._s1 = np.r_[0.0, np.cumsum(xc)]
        self._s2 = np.r_[0.0, np.cumsum(xc * xc)]

    def bounds(self, tb: np.ndarray, size) -> tuple[np.ndarray, ...]:
        """(i0, i1, j0, j1, status) per boundary time: before = [i0, i1), after = [j0, j1).

        status 0 ok, 1 edge, 2 insufficient."""
        t, n = self.t, self.t.size
        tb = np.asarray(tb, dtype=np.float64)
        i1 = np.searchsorted(t, tb, "left")
        j0 = np.searchsorted(t, tb + self.guard_s, "left")
        k = self.span.interval_of(tb)
        kk = np.clip(k, 0, None)
        lo, hi = self.span.starts[kk], self.span.ends[kk]
        if self.fixed_rate_hz is None:
            size = int(size)
            i0, j1 = i1 - size, j0 + size
            edge = (k < 0) | (i0 < 0) | (j1 > n)
            i0c, j1c = np.clip(i0, 0, n), np.clip(j1, 0, n)
            t_first = t[np.clip(i0c, 0, n - 1)]
            t_last = t[np.clip(j1c - 1, 0, n - 1)]
            edge |= (t_first < lo) | (t_last > hi)
            need = self.min_valid_share * size
        else:
            s = float(size)
            i0 = np.searchsorted(t, tb - s, "left")
            j1 = np.searchsorted(t, tb + self.guard_s + s, "left")
            i0c, j1c = i0, j1
            edge = (k < 0) | (tb - s < lo) | (tb + self.guard_s + s > hi) | (tb - s < t[0]) | \
                (tb + self.guard_s + s > t[-1])
            need = self.min_valid_share * s * self.fixed_rate_hz
        nb = self._n[i1] - self._n[i0c]
        na = self._n[j1c] - self._n[j0]
        insufficient = (nb < max(need, 2)) | (na < max(need, 2))
        status = np.where(edge, 1, np.where(insufficient, 2, 0))
        return i0c, i1, j0, j1c, status

    def moments(self, i0, i1, j0, j1):
        """(mean_b, var_b, n_b, mean_a, var_a, n_a) over accepted values of each window."""
        out = []
        for a, b in ((i0, i1), (j0, j1)):
            n = (self._n[b] - self._n[a]).astype(np.float64)
            s1 = self._s1[b] - self._s1[a]
            s2 = self._s2[b] - self._s2[a]
            with np.errstate(invalid="ignore", divide="ignore"):
                m = s1 / n
                v = np.maximum(s2 - n * m * m, 0.0) / (n - 1)
            out += [m + self._c, v, n]
        return tuple(out)

    def welch(self, tb, size):
        """Vectorised T1 at boundary times ``tb``: (t, df, p, delta, status)."""
        i0, i1, j0, j1, status = self.bounds(tb, size)
        mb, vb, nb, ma, va, na = self.moments(i0, i1, j0, j1)
        t, df, p = _welch(ma, va, na, mb, vb, nb)
        bad = status != 0
        for arr in (t, df, p):
            arr[bad] = np.nan
        delta = np.where(bad, np.nan, ma - mb)
        return t, df, p, delta, status

    def values(self, lo, hi) -> np.ndarray:
        sl = slice(int(lo), int(hi))
        return self.x[sl][self.ok[sl]]


def _window_spans(setup: WindowSetup, tb: np.ndarray, size):
    """(first, last) time covered by the before and after windows of each boundary."""
    i0, i1, j0, j1, _ = setup.bounds(tb, size)
    if setup.fixed_rate_hz is None:
        n = setup.t.size
        return setup.t[np.clip(i0, 0, n - 1)], setup.t[np.clip(j1 - 1, 0, n - 1)]
    return tb - float(size), tb + setup.guard_s + float(size)


def _pseudo_null(setup: WindowSetup, size, *, k: int, rng: np.random.Generator, avoid=None,
                 max_batches: int = 40):
    """T1 t and delta at up to ``k`` pseudo-boundaries placed uniformly in Omega where the
    windows fit (status ok); with ``avoid`` (the family's boundary times), only where no such
    boundary lies inside the windows, falling back to anywhere when that leaves fewer than
    ``k / 4``. Returns (t, delta, placement)."""
    T = setup.span.total_s
    av = np.sort(np.asarray(avoid, dtype=np.float64)) if avoid is not None else np.zeros(0)
    for placement in (("away",) if av.size else ()) + ("anywhere",):
        ts, ds = [], []
        got = 0
        for _ in range(max_batches):
            u = rng.uniform(0.0, T, size=4 * k)
            tb = setup.span.from_axis(u)
            t, _, _, d, status = setup.welch(tb, size)
            keep = (status == 0) & np.isfinite(t)
            if placement == "away":
                lo, hi = _window_spans(setup, tb, size)
                keep &= np.searchsorted(av, hi, "right") == np.searchsorted(av, lo, "left")
            ts.append(t[keep])
            ds.append(d[keep])
            got += int(keep.sum())
            if got >= k:
                break
        if got >= k / 4 or placement == "anywhere":
            t = np.concatenate(ts)[:k] if ts else np.zeros(0)
            d = np.concatenate(ds)[:k] if ds else np.zeros(0)
            return t, d, placement
    raise AssertionError("unreachable")


def _p_cal(t_obs, abs_null_sorted: np.ndarray):
    """Phipson-Smyth p of |t| against sorted |t_k|; NaN where t is NaN or there is no null."""
    t_obs = np.asarray(t_obs, dtype=np.float64)
    K = abs_null_sorted.size
    if K == 0:
        return np.full(t_obs.shape, np.nan)
    ge = K - np.searchsorted(abs_null_sorted, np.abs(t_obs), "left")
    return np.where(np.isfinite(t_obs), (1.0 + ge) / (K + 1.0), np.nan)


# ---------------------------------------------------------------------------------------------
# boundaries
# ---------------------------------------------------------------------------------------------
def boundary_table(events: pd.DataFrame, *, families, min_confidence: float = 0.5) -> pd.DataFrame:
    """The boundaries of each family: one row per family and distinct onset (labels of rows at
    the same time joined with ``; ``), rows whose ``confidence`` is below ``min_confidence``
    dropped (a missing confidence is kept)."""
    cols = ["trial_type", "label", "measure", "beat", "piece", "confidence", "onset"]
    if events is None or not len(events) or "trial_type" not in events.columns:
        return pd.DataFrame(columns=cols)
    ev = events.copy()
    for c in cols:
        if c not in ev.columns:
            ev[c] = np.nan
    ev["onset"] = pd.to_numeric(ev["onset"], errors="coerce")
    conf = pd.to_numeric(ev["confidence"], errors="coerce")
    keep = ev["trial_type"].astype(str).isin(list(families)) & np.isfinite(ev["onset"]) & \
        ~(conf < min_confidence)
    ev = ev[keep]
    rows = []
    for fam in families:
        f = ev[ev["trial_type"].astype(str) == fam].sort_values("onset", kind="mergesort")
        key = np.round(f["onset"].to_numpy(np.float64), 3)
        for kv in dict.fromkeys(key):
            g = f[key == kv]
            first = g.iloc[0]
            labels = list(dict.fromkeys(str(v) for v in g["label"] if not pd.isna(v)))
            c = pd.to_numeric(g["confidence"], errors="coerce")
            rows.append({"trial_type": fam, "label": "; ".join(labels) if labels else np.nan,
                         "measure": first["measure"], "beat": first["beat"], "piece": first["piece"],
                         "confidence": float(c.max()) if c.notna().any() else np.nan,
                         "onset": float(first["onset"])})
    return pd.DataFrame(rows, columns=cols)


def _direction(d: float) -> str:
    if not np.isfinite(d):
        return "n/a"
    return "up" if d > 0 else "down" if d < 0 else "none"


def _share_null_sets(setup: WindowSetup, tb: np.ndarray, *, method: str, r: int, min_shift_s: float,
                     rng: np.random.Generator) -> np.ndarray | None:
    """``r`` x B boundary times of the pseudo sets (None when Omega is too short)."""
    span = setup.span
    T = span.total_s
    pos = span.to_axis(tb)
    pos = pos[np.isfinite(pos)]
    if pos.size == 0 or T <= 2 * min_shift_s:
        return None
    if method == "circular_shift":
        u = rng.uniform(min_shift_s, T - min_shift_s, size=r)
        return span.from_axis(pos[None, :] + u[:, None])
    if method == "uniform":
        gap = float(np.min(np.diff(np.sort(pos)))) if pos.size > 1 else 0.0
        out = np.empty((r, pos.size))
        for i in range(r):
            for _ in range(200):
                u = np.sort(rng.uniform(0.0, T, size=pos.size))
                if pos.size < 2 or np.min(np.diff(u)) >= gap:
                    break
            out[i] = span.from_axis(u)
        return out
    raise ValueError(f"unknown share null '{method}'")


def family_tests(setup: WindowSetup, bounds: pd.DataFrame, *, size, rho1: float, k_pseudo: int,
                 share_null: str, r_share: int, min_shift_s: float, alpha: float, correction: str,
                 ci_method: str, rng_pseudo: np.random.Generator, rng_share: np.random.Generator,
                 participant: str, series: str, pseudo_away: bool = True, rng_boot=None,
                 block_constant: float = float("nan"), n_boot: int = 1000) -> tuple[pd.DataFrame, dict]:
    """Analysis A for one family and one window size: (boundary rows, summary row).

    ``ci_method`` ``bootstrap`` needs ``rng_boot`` and the session's ``block_constant``
    (:func:`stimkit.physio.bootstrap.block_length_constant`); a boundary whose block would be
    longer than a quarter of its window gets the ``pseudo`` interval, and ``ci_method`` says
    which interval each row has."""
    tb_all = bounds["onset"].to_numpy(np.float64)
    unit = "s" if setup.fixed_rate_hz is not None else "beats"
    t_null, d_null, placement = _pseudo_null(setup, size, k=k_pseudo, rng=rng_pseudo,
                                             avoid=tb_all if pseudo_away else None)
    abs_null = np.sort(np.abs(t_null))
    c = d_null - d_null.mean() if d_null.size else d_null
    t_obs, _, p1, delta, status = setup.welch(tb_all, size)
    i0, i1, j0, j1, _ = setup.bounds(tb_all, size)
    p_cal = _p_cal(t_obs, abs_null)
    has_null = abs_null.size >= 20
    if not has_null:
        p_cal[:] = np.nan
    q = adjust_pvalues(np.where(status == 0, p_cal, np.nan), method=correction, alpha=alpha)
    rows = []
    tb_sorted = np.sort(tb_all)
    for r, b in enumerate(bounds.itertuples(index=False)):
        row = {"participant": participant, "series": series, "trial_type": b.trial_type,
               "label": b.label, "measure": b.measure, "beat": b.beat, "piece": b.piece,
               "confidence": b.confidence, "onset": b.onset, "N": size, "window_unit": unit}
        st = int(status[r])
        a_v = setup.values(j0[r], j1[r]) if st != 1 else np.zeros(0)
        b_v = setup.values(i0[r], i1[r]) if st != 1 else np.zeros(0)
        row.update(n_before=int(b_v.size), n_after=int(a_v.size))
        flags = []
        if st != 1:
            lo_t = setup.t[i0[r]] if setup.fixed_rate_hz is None else b.onset - size
            hi_t = setup.t[j1[r] - 1] if setup.fixed_rate_hz is None else b.onset + setup.guard_s + size
            others = tb_sorted[(tb_sorted >= lo_t) & (tb_sorted <= hi_t) & (tb_sorted != b.onset)]
            if others.size:
                flags.append("overlap")
        if st == 0 and not has_null:
            stat_txt = "no_null"
        else:
            stat_txt = ("ok", "edge", "insufficient")[st]
        row["flags"] = ",".join(flags)
        row["status"] = stat_txt
        if st == 0:
            ma, mb = float(a_v.mean()), float(b_v.mean())
            d = ma - mb
            tt = stats.ttest_ind(a_v, b_v, equal_var=False)
            mw = stats.mannwhitneyu(a_v, b_v, alternative="two-sided", method="asymptotic")
            na_e, nb_e = effective_n(a_v.size, rho1), effective_n(b_v.size, rho1)
            t3, df3, p3 = _welch(ma, a_v.var(ddof=1), na_e, mb, b_v.var(ddof=1), nb_e)
            used = ci_method
            lo = hi = np.nan
            if ci_method == "iid":
                ci = tt.confidence_interval(0.95)
                lo, hi = float(ci.low), float(ci.high)
            elif ci_method == "bootstrap" and rng_boot is not None:
                lo, hi, _ = bootstrap_delta_ci(a_v, b_v, constant=block_constant, reps=n_boot, rng=rng_boot)
            if not np.isfinite(lo) and c.size >= 20:
                used = "pseudo"
                lo, hi = d - float(np.quantile(c, 0.975)), d - float(np.quantile(c, 0.025))
            z = (float(t_obs[r]) - float(t_null.mean())) / float(t_null.std(ddof=1)) \
                if has_null and t_null.std() > 0 else np.nan
            row.update(mean_before=mb, mean_after=ma, delta=d, delta_pct=100.0 * d / mb if mb else np.nan,
                       hl_shift=hodges_lehmann(a_v, b_v), ci_low=lo, ci_high=hi,
                       ci_method=used if np.isfinite(lo) else "n/a",
                       hedges_g=hedges_g(a_v, b_v), t_welch=float(tt.statistic), df_welch=float(tt.df),
                       p_welch=float(tt.pvalue), U=float(mw.statistic), p_mwu=float(mw.pvalue),
                       r_rb=2.0 * float(mw.statistic) / (a_v.size * b_v.size) - 1.0, rho1=rho1,
                       n_eff=float(min(na_e, nb_e)), t_ar1=float(t3), p_ar1=float(p3), z_null=z,
                       p_cal=float(p_cal[r]), q_bh=float(q[r]),
                       significant=bool(q[r] < alpha) if np.isfinite(q[r]) else np.nan,
                       direction=_direction(d))
        rows.append(row)
    table = pd.DataFrame(rows, columns=BOUNDARY_TEST_COLUMNS)

    # share of significant boundaries against its chance band
    ok = status == 0
    B = int(ok.sum())
    s_obs = float(np.mean(p1[ok] < alpha)) if B else np.nan
    s_obs_q = float(np.mean(q[ok] < alpha)) if B and has_null else np.nan
    null_s = null_sq = np.zeros(0)
    sets = _share_null_sets(setup, tb_all, method=share_null, r=r_share, min_shift_s=min_shift_s,
                            rng=rng_share) if B else None
    if sets is not None:
        R, nb = sets.shape
        tn, _, pn, _, stn = setup.welch(sets.ravel(), size)
        pn, stn, tn = pn.reshape(R, nb), stn.reshape(R, nb), tn.reshape(R, nb)
        okn = stn == 0
        cnt = okn.sum(axis=1)
        with np.errstate(invalid="ignore"):
            null_s = np.where(cnt > 0, np.sum((pn < alpha) & okn, axis=1) / np.maximum(cnt, 1), np.nan)
        if has_null:
            qq = adjust_rows(np.where(okn, _p_cal(tn, abs_null), np.nan), method=correction)
            with np.errstate(invalid="ignore"):
                null_sq = np.where(cnt > 0, np.sum((qq < alpha) & okn, axis=1) / np.maximum(cnt, 1), np.nan)
        null_s = null_s[np.isfinite(null_s)]
        null_sq = null_sq[np.isfinite(null_sq)]

    def qs(v, p):
        return float(np.quantile(v, p)) if v.size else np.nan

    def pshare(v, obs):
        return float((1 + np.sum(v >= obs - 1e-12)) / (v.size + 1)) if v.size and np.isfinite(obs) else np.nan

    sig = table["significant"].map(lambda v: v is True).to_numpy(bool)
    summary = {
        "participant": participant, "series": series, "trial_type": bounds["trial_type"].iloc[0]
        if len(bounds) else np.nan, "N": size, "window_unit": unit, "B": B,
        "n_boundaries": int(len(bounds)), "K": int(t_null.size), "pseudo_placement": placement,
        "s_obs": s_obs,
        "null_q05": qs(null_s, 0.05), "null_q50": qs(null_s, 0.5), "null_q95": qs(null_s, 0.95),
        "p_share": pshare(null_s, s_obs), "s_obs_q": s_obs_q, "null_q95_q": qs(null_sq, 0.95),
        "p_share_q": pshare(null_sq, s_obs_q), "share_null": share_null, "R": int(null_s.size),
        "n_significant": int(sig.sum()), "n_up": int(np.sum(sig & (table["direction"] == "up").to_numpy())),
        "n_down": int(np.sum(sig & (table["direction"] == "down").to_numpy())),
        "chance_delta_q05": qs(d_null, 0.05), "chance_delta_q95": qs(d_null, 0.95), "rho1": rho1,
        "correction": correction, "alpha": alpha,
    }
    return table, summary
