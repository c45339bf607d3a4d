"""Analysis B: do physiological change points coincide with music change points beyond chance?

What it computes
----------------
- **Rates** over the h grid (0.5-10 s): S_P(h), the share of physiological change points (CPs)
  with at least one music CP within the window (the precursor-type coincidence rate of Donges
  et al. 2016 with physiology as reference; primary), and S_M(h), the share of music CPs with
  at least one physiological CP (trigger type). Windows: ``symmetric`` |p - m| <= h, or
  ``music_leads`` 0 <= p - m - lag <= h. Both trains are restricted to Omega.
- **Analytic value** (Donges et al. 2016): p_hit = 1 - (1 - w/T)^n_other with w = 2h
  (symmetric) or h (one-sided); K = n_ref S(h); p_poisson = P(Bin(n_ref, p_hit) >= K)
  (:func:`scipy.stats.binom.sf`). Reported and drawn, never used for decisions: it ignores
  edges, minimum CP spacing and clustering.
- **Nulls**: ``iaaft`` (default) -- IAAFT surrogates of each gap-free segment placed on the
  original beat times and re-detected with the same detector and penalty rule, rates computed
  against the real music train; ``circular_shift`` -- the music train rotated by u ~ U(30 s,
  T - 30 s) on the concatenated Omega axis (robustness).
- **Inference over h**: pointwise q05/q50/q95 and p(h) = (1 + #{S* >= S_obs}) / (R + 1); the
  ranges of h where S_obs > q95; the global max-statistic test Z(h) = (S_obs - mean*) /
  max(sd*, 1/n_ref), Z_max = max_h Z(h), each surrogate's Z*_max against the others,
  p_global = (1 + #{Z*_max >= Z_max}) / (R + 1) (a global envelope test, Myllymaki et al.
  2017); Benjamini-Hochberg on p_global across feature sets. The ranges are descriptive unless
  p_global < alpha. No inference when n_P < 5 or n_M < 3.

Surrogates run in chunks through a :class:`concurrent.futures.Executor` (local processes by
default); each surrogate draws from its own child seed, so the result does not depend on the
number of workers.

References
----------
Donges, J. F., Schleussner, C.-F., Siegmund, J. F., & Donner, R. V. (2016). Event coincidence
analysis for quantifying statistical interrelationships between event time series. Eur Phys J
Spec Top 225, 471-487. Myllymaki, M., et al. (2017). Global envelope tests for spatial
processes. JRSS-B 79, 381-404. Phipson, B., & Smyth, G. K. (2010). SAGMB 9(1), 39.
Schreiber, T., & Schmitz, A. (1996). PRL 77, 635-638.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from .changepoints import detect_times, feature_sets, music_trains, penalty_sweep, physio_changepoints
from .surrogates import iaaft
from .windows import adjust_pvalues

__all__ = ["hit_counts", "eca_analytic", "null_inference", "exceedance_ranges", "surrogate_changepoints",
           "coincidence_analysis", "CURVE_COLUMNS", "SUMMARY_COLUMNS"]

CURVE_COLUMNS = ["participant", "series", "feature_set", "reference", "window", "h", "n_P", "n_M", "T",
                 "k_obs", "rate_obs", "null_method", "R", "q05", "q50", "q95", "p_pointwise", "p_hit",
                 "p_poisson", "exceeds_q95", "status"]
SUMMARY_COLUMNS = ["participant", "series", "feature_set", "reference", "null_method", "window", "n_P",
                   "n_M", "T", "R", "exceedance_ranges", "z_max", "h_at_max", "p_global", "q_bh",
                   "significant", "status"]


def hit_counts(ref, other, h_grid, *, window: str = "symmetric", lag_s: float = 0.0) -> np.ndarray:
    """For each h, the number of ``ref`` events with at least one ``other`` event in the window.

    ``symmetric``: |r - o| <= h. ``music_leads`` (ref = physiology, other = music):
    0 <= r - o - lag <= h; ``physio_follows_reversed`` is handled by the caller swapping roles.
    """
    r = np.asarray(ref, dtype=np.float64)
    o = np.sort(np.asarray(other, dtype=np.float64))
    h = np.asarray(h_grid, dtype=np.float64)
    if r.size == 0 or o.size == 0:
        return np.zeros(h.size, np.int64)
    if window == "symmetric":
        lo, hi = r[None, :] - h[:, None], r[None, :] + h[:, None]
    elif window == "music_leads":
        lo, hi = r[None, :] - lag_s - h[:, None], np.broadcast_to(r[None, :] - lag_s, (h.size, r.size))
    elif window == "music_follows":  # ref = music: physiology at m + lag .. m + lag + h
        lo, hi = np.broadcast_to(r[None, :] + lag_s, (h.size, r.size)), r[None, :] + lag_s + h[:, None]
    else:
        raise ValueError(f"unknown window '{window}' (symmetric, music_leads)")
    n = np.searchsorted(o, hi, "right") - np.searchsorted(o, lo, "left")
    return np.sum(n > 0, axis=1)


def eca_analytic(n_ref: int, n_other: int, k, h_grid, *, T: float, window: str = "symmetric"):
    """(p_hit, p_poisson) per h by the Donges et al. (2016) binomial approximation."""
    h = np.asarray(h_grid, dtype=np.float64)
    w = 2.0 * h if window == "symmetric" else h
    p_hit = 1.0 - np.power(np.clip(1.0 - w / T, 0.0, 1.0), n_other)
    k = np.asarray(k)
    p = stats.binom.sf(k - 1, n_ref, p_hit)
    return p_hit, p


def exceedance_ranges(h, obs, q95) -> str:
    """Maximal runs of h where obs > q95, as text (``1.5-4.0 s; 6.0-6.0 s``); ``none``."""
    h, above = np.asarray(h), np.asarray(obs) > np.asarray(q95)
    out = []
    i = 0
    while i < h.size:
        if above[i]:
            j = i
            while j + 1 < h.size and above[j + 1]:
                j += 1
            out.append(f"{h[i]:.1f}-{h[j]:.1f} s")
            i = j + 1
        else:
            i += 1
    return "; ".join(out) if out else "none"


def null_inference(obs: np.ndarray, null: np.ndarray, *, n_ref: int) -> dict:
    """Pointwise band and p(h), and the global max-statistic test (module notes).

    ``obs`` has shape (H,), ``null`` (R, H); rows of ``null`` with NaN are left out."""
    null = null[np.all(np.isfinite(null), axis=1)]
    R = null.shape[0]
    H = obs.size
    if R < 2:
        nan = np.full(H, np.nan)
        return {"R": R, "q05": nan, "q50": nan, "q95": nan, "p": nan, "z_max": np.nan, "h_index": -1,
                "p_global": np.nan}
    q05, q50, q95 = np.quantile(null, [0.05, 0.5, 0.95], axis=0)
    p = (1.0 + np.sum(null >= obs[None, :] - 1e-12, axis=0)) / (R + 1.0)
    floor = 1.0 / max(n_ref, 1)
    mean, sd = null.mean(axis=0), null.std(axis=0, ddof=1)
    z = (obs - mean) / np.maximum(sd, floor)
    s1, s2 = null.sum(axis=0), (null ** 2).sum(axis=0)
    m_loo = (s1[None, :] - null) / (R - 1)
    if R > 2:
        v_loo = np.maximum(((s2[None, :] - null ** 2) - (R - 1) * m_loo ** 2) / (R - 2), 0.0)
    else:
        v_loo = np.zeros_like(null)
    z_star = (null - m_loo) / np.maximum(np.sqrt(v_loo), floor)
    zmax_star = z_star.max(axis=1)
    zmax = float(np.max(z))
    return {"R": R, "q05": q05, "q50": q50, "q95": q95, "p": p, "z_max": zmax, "h_index": int(np.argmax(z)),
            "p_global": float((1.0 + np.sum(zmax_star >= zmax - 1e-12)) / (R + 1.0))}


# ---------------------------------------------------------------------------------------------
# surrogates (picklable worker)
# ---------------------------------------------------------------------------------------------
def _surrogate_chunk(segments_t, segments_x, seeds, min_size, rule, max_iter, tol, method="iaaft"):
    out = []
    for ss in seeds:
        rng = np.random.default_rng(ss)
        if method == "value_shuffle":
            xs = [rng.permutation(x) for x in segments_x]
        else:
            xs = [iaaft(x, rng, max_iter=max_iter, tol=tol)[0] for x in segments_x]
        out.append(detect_times(segments_t, xs, min_size=min_size, rule=rule))
    return out


def surrogate_changepoints(segments, *, n: int, seed: np.random.SeedSequence, min_size: int, rule,
                           max_iter: int = 500, tol: float = 1e-6, executor=None, n_jobs: int = 1,
                           chunk: int = 25, progress=None, method: str = "iaaft") -> list[np.ndarray]:
    """CP times of ``n`` surrogates of the segments (surrogate r uses ``seed.spawn(n)[r]``):
    IAAFT (``method="iaaft"``) or the values shuffled within each segment (``value_shuffle``)."""
    seeds = seed.spawn(n)
    ts = [s.t for s in segments]
    xs = [s.x for s in segments]
    chunks = [seeds[i:i + chunk] for i in range(0, n, chunk)]
    args = (min_size, rule, max_iter, tol, method)
    own = None
    if executor is None and n_jobs > 1 and len(chunks) > 1:
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        own = executor = ProcessPoolExecutor(max_workers=n_jobs, mp_context=mp.get_context("fork"))
    try:
        results: list = [None] * len(chunks)
        if executor is None:
            for i, c in enumerate(chunks):
                results[i] = _surrogate_chunk(ts, xs, c, *args)
                if progress:
                    progress("surrogates", (i + 1) / len(chunks))
        else:
            futs = {executor.submit(_surrogate_chunk, ts, xs, c, *args): i for i, c in enumerate(chunks)}
            from concurrent.futures import as_completed

            done = 0
            for f in as_completed(futs):
                results[futs[f]] = f.result()
                done += 1
                if progress:
                    progress("surrogates", done / len(chunks))
    finally:
        if own is not None:
            own.shutdown()
    return [cp for r in results for cp in r]


# ---------------------------------------------------------------------------------------------
def music_null_trains(M, span, *, method: str, r: int, rng: np.random.Generator) -> list[np.ndarray]:
    """``r`` null music trains on the concatenated Omega axis (sorted times): ``uniform`` --
    n_M times uniform on Omega (the Monte Carlo twin of the analytic value); ``iei_shuffle`` --
    the inter-event intervals of M on the circle of length T (the wrap-round interval included)
    in a random order from a uniform start (keeps the interval distribution, not their order)."""
    T = span.total_s
    pos = np.sort(span.to_axis(np.asarray(M, dtype=np.float64)))
    pos = pos[np.isfinite(pos)]
    n = pos.size
    if n == 0:
        return [np.zeros(0)] * r
    if method == "uniform":
        new = np.sort(rng.uniform(0.0, T, size=(r, n)), axis=1)
    elif method == "iei_shuffle":
        gaps = np.r_[np.diff(pos), T - pos[-1] + pos[0]]
        perm = rng.permuted(np.tile(gaps, (r, 1)), axis=1)
        start = rng.uniform(0.0, T, size=(r, 1))
        new = np.sort(np.mod(start + np.c_[np.zeros(r), np.cumsum(perm[:, :-1], axis=1)], T), axis=1)
    else:
        raise ValueError(f"unknown music null '{method}' (uniform, iei_shuffle)")
    return list(np.sort(span.from_axis(new), axis=1))


def _windows(ref, h, window, lag_s):
    if window == "symmetric":
        return ref[None, :] - h[:, None], ref[None, :] + h[:, None]
    if window == "music_leads":
        return ref[None, :] - lag_s - h[:, None], np.broadcast_to(ref[None, :] - lag_s, (h.size, ref.size))
    return np.broadcast_to(ref[None, :] + lag_s, (h.size, ref.size)), ref[None, :] + lag_s + h[:, None]


def _rates(ref_list, other_list, h, *, window, lag_s, block: int = 200):
    """:func:`_rates_block` over blocks of ``block`` pairs (memory flat in the number of pairs)."""
    shared_ref = isinstance(ref_list, np.ndarray)
    R = len(other_list) if shared_ref else len(ref_list)
    if R <= block:
        return _rates_block(ref_list, other_list, h, window=window, lag_s=lag_s)
    parts = []
    for i in range(0, R, block):
        r = ref_list if shared_ref else ref_list[i:i + block]
        o = other_list if isinstance(other_list, np.ndarray) else other_list[i:i + block]
        parts.append(_rates_block(r, o, h, window=window, lag_s=lag_s))
    return np.vstack(parts)


def _rates_block(ref_list, other_list, h, *, window, lag_s):
    """(R, H) rates of each pair (ref_r, other_r); NaN where ref_r is empty.

    ``ref_list`` or ``other_list`` may be one array shared by every pair. All pairs are
    counted at once: with a shared ``other``, every reference event queries it directly; else
    pair r is moved by r x a gap far larger than any time, so one concatenated, sorted array
    answers every query (the same counts as :func:`hit_counts` pair by pair)."""
    shared_ref = isinstance(ref_list, np.ndarray)
    shared_oth = isinstance(other_list, np.ndarray)
    R = len(other_list) if shared_ref else len(ref_list)
    out = np.full((R, h.size), np.nan)
    if R == 0:
        return out
    refs = [ref_list] * R if shared_ref else [np.asarray(r, np.float64) for r in ref_list]
    n_ref = np.array([r.size for r in refs])
    if n_ref.sum() == 0:
        return out
    owner = np.repeat(np.arange(R), n_ref)
    if shared_oth:
        ref = np.concatenate(refs)
        oth = np.sort(np.asarray(other_list, np.float64))
    else:
        tops = [float(np.max(np.abs(a))) for a in refs + list(other_list) if np.size(a)]
        gap = 4.0 * (max(tops + [1.0]) + float(np.max(h)) + abs(lag_s) + 1.0)
        off = gap * np.arange(R, dtype=np.float64)
        ref = np.concatenate([r + o for r, o in zip(refs, off)])
        oth = np.concatenate([np.sort(np.asarray(a, np.float64)) + o for a, o in zip(other_list, off)])
    k = np.zeros((R, h.size))
    if oth.size:
        lo, hi = _windows(ref, h, window, lag_s)
        hit = (np.searchsorted(oth, hi, "right") - np.searchsorted(oth, lo, "left")) > 0
        for j in range(h.size):
            k[:, j] = np.bincount(owner, weights=hit[j], minlength=R)
    ok = n_ref > 0
    out[ok] = k[ok] / n_ref[ok, None]
    return out


def coincidence_analysis(events, features, series, segments, span, *, settings, min_size: int,
                         seed_surrogates, seed_shifts, participant: str, series_name: str, seed_other=None,
                         executor=None, progress=None):
    """Analysis B for one series: (tables, meta, warnings); see module notes."""
    s = settings
    warnings: list[str] = []
    h = np.asarray(s.h_grid_s, dtype=np.float64)
    T = span.total_s
    cps = physio_changepoints(segments, min_size=min_size, rule=s.penalty)
    cps.insert(0, "series", series_name)
    cps.insert(0, "participant", participant)
    sweep = penalty_sweep(segments, min_size=min_size, rule=s.penalty)
    sweep.insert(0, "series", series_name)
    sweep.insert(0, "participant", participant)
    P_all = cps["time"].to_numpy(np.float64)
    P = np.sort(P_all[span.contains(P_all)])
    trains = music_trains(events, features, span, source=s.music_source, score_trains=s.score_trains)
    sets = feature_sets(trains, pairs=s.feature_pairs, merge_s=s.union_merge_s, co_change=s.co_change,
                        co_change_s=s.co_change_s)
    music = trains.copy()
    music.insert(0, "series", series_name)
    music.insert(0, "participant", participant)
    nP = int(P.size)
    win_P = s.coincidence_window
    win_M = "symmetric" if win_P == "symmetric" else "music_follows"
    meta = {"n_changepoints": nP, "n_changepoints_all": int(P_all.size), "feature_sets_tested": 0,
            "n_feature_sets": len(sets), "penalty_rule": s.penalty if isinstance(s.penalty, str) else float(s.penalty)}
    if not segments:
        warnings.append("no gap-free segment long enough for change points")
    if nP < s.min_cp_physio:
        warnings.append(f"{nP} physiological change point(s) inside the pieces (< {s.min_cp_physio}): "
                        f"no coincidence inference")
    testable = {k: v for k, v in sets.items() if v.size >= s.min_cp_music}
    infer = nP >= s.min_cp_physio and bool(testable)

    nulls: dict[str, tuple[list, list]] = {}
    if infer and "iaaft" in s.null_methods:
        sur = surrogate_changepoints(segments, n=s.n_surrogates, seed=seed_surrogates, min_size=min_size,
                                     rule=s.penalty, max_iter=s.iaaft_max_iter, tol=s.iaaft_tol,
                                     executor=executor, n_jobs=s.n_jobs, progress=progress)
        sur = [np.sort(c[span.contains(c)]) for c in sur]
        meta["surrogate_changepoints_mean"] = float(np.mean([c.size for c in sur])) if sur else np.nan
        nulls["iaaft"] = (sur, None)
    if infer and "circular_shift" in s.null_methods and T > 2 * s.min_shift_s:
        rng = np.random.default_rng(seed_shifts)
        u = rng.uniform(s.min_shift_s, T - s.min_shift_s, size=s.n_surrogates)
        nulls["circular_shift"] = (None, u)
    # the optional nulls draw from children of their own seed (none of the above changes)
    other = dict(zip(("uniform", "iei_shuffle", "value_shuffle"), seed_other.spawn(3))) \
        if seed_other is not None else {}
    if infer and "value_shuffle" in s.null_methods and other:
        sh = surrogate_changepoints(segments, n=s.n_surrogates, seed=other["value_shuffle"], min_size=min_size,
                                    rule=s.penalty, executor=executor, n_jobs=s.n_jobs, method="value_shuffle")
        sh = [np.sort(c[span.contains(c)]) for c in sh]
        meta["shuffle_changepoints_mean"] = float(np.mean([c.size for c in sh])) if sh else np.nan
        nulls["value_shuffle"] = (sh, None)
    for method in ("uniform", "iei_shuffle"):
        if infer and method in s.null_methods and other:
            nulls[method] = (None, np.random.default_rng(other[method]))

    curve_rows, summ_rows = [], []
    for name, M in sets.items():
        nM = int(M.size)
        for ref in ("physio", "music"):
            if ref == "physio":
                k_obs = hit_counts(P, M, h, window=win_P, lag_s=s.lag_s)
                n_ref, n_oth = nP, nM
            else:
                k_obs = hit_counts(M, P, h, window=win_M, lag_s=s.lag_s)
                n_ref, n_oth = nM, nP
            rate = k_obs / n_ref if n_ref else np.full(h.size, np.nan)
            p_hit, p_poi = eca_analytic(n_ref, n_oth, k_obs, h, T=T, window=win_P) if n_ref else \
                (np.full(h.size, np.nan), np.full(h.size, np.nan))
            status = "ok" if (nP >= s.min_cp_physio and nM >= s.min_cp_music) else \
                ("too_few_physio_changepoints" if nP < s.min_cp_physio else "too_few_music_changepoints")
            methods = list(nulls) if status == "ok" else ["none"]
            for method in methods:
                inf = None
                if status == "ok":
                    sur, u = nulls[method]
                    if method in ("uniform", "iei_shuffle"):
                        trains = music_null_trains(M, span, method=method, r=s.n_surrogates, rng=u)
                        if ref == "physio":
                            null = _rates(P, trains, h, window=win_P, lag_s=s.lag_s)
                        else:
                            null = _rates(trains, P, h, window=win_M, lag_s=s.lag_s)
                    elif sur is not None:
                        if ref == "physio":
                            null = _rates(sur, M, h, window=win_P, lag_s=s.lag_s)
                        else:
                            null = _rates(M, sur, h, window=win_M, lag_s=s.lag_s)
                    else:
                        shifted = list(np.sort(span.from_axis(span.to_axis(M)[None, :] + u[:, None]), axis=1))
                        if ref == "physio":
                            null = _rates(P, shifted, h, window=win_P, lag_s=s.lag_s)
                        else:
                            null = _rates(shifted, P, h, window=win_M, lag_s=s.lag_s)
                    inf = null_inference(rate, null, n_ref=n_ref)
                for j, hj in enumerate(h):
                    curve_rows.append({
                        "participant": participant, "series": series_name, "feature_set": name,
                        "reference": ref, "window": s.coincidence_window, "h": float(hj), "n_P": nP,
                        "n_M": nM, "T": T, "k_obs": int(k_obs[j]), "rate_obs": float(rate[j]),
                        "null_method": method, "R": inf["R"] if inf else 0,
                        "q05": float(inf["q05"][j]) if inf else np.nan,
                        "q50": float(inf["q50"][j]) if inf else np.nan,
                        "q95": float(inf["q95"][j]) if inf else np.nan,
                        "p_pointwise": float(inf["p"][j]) if inf else np.nan,
                        "p_hit": float(p_hit[j]), "p_poisson": float(p_poi[j]),
                        "exceeds_q95": bool(rate[j] > inf["q95"][j]) if inf and np.isfinite(inf["q95"][j]) else np.nan,
                        "status": status})
                summ_rows.append({
                    "participant": participant, "series": series_name, "feature_set": name, "reference": ref,
                    "null_method": method, "window": s.coincidence_window, "n_P": nP, "n_M": nM, "T": T,
                    "R": inf["R"] if inf else 0,
                    "exceedance_ranges": exceedance_ranges(h, rate, inf["q95"]) if inf else "n/a",
                    "z_max": inf["z_max"] if inf else np.nan,
                    "h_at_max": float(h[inf["h_index"]]) if inf and inf["h_index"] >= 0 else np.nan,
                    "p_global": inf["p_global"] if inf else np.nan, "q_bh": np.nan, "significant": np.nan,
                    "status": status})
    summary = pd.DataFrame(summ_rows, columns=SUMMARY_COLUMNS)
    summary["significant"] = summary["significant"].astype(object)
    if len(summary):
        for (ref, method), g in summary.groupby(["reference", "null_method"], sort=False):
            q = adjust_pvalues(g["p_global"].to_numpy(np.float64), method="fdr_bh", alpha=s.alpha)
            summary.loc[g.index, "q_bh"] = q
            summary.loc[g.index, "significant"] = [bool(v < s.alpha) if np.isfinite(v) else np.nan for v in q]
    meta["feature_sets_tested"] = int(len(testable)) if infer else 0
    tables = {"changepoints_physio": cps, "penalty_sweep": sweep, "changepoints_music": music,
              "coincidence_curve": pd.DataFrame(curve_rows, columns=CURVE_COLUMNS),
              "coincidence_summary": summary}
    return tables, meta, warnings
