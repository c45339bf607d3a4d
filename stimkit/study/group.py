"""Group statistics of a study, from the per-participant tables (PHYSIO-STATS §2.6).

What it computes
----------------
- **Prevalence of responders** (:func:`prevalence_table`). A participant *responds* in a family
  (series × window N × boundary kind, PHYSIO-STATS §2.4) when their share of significant
  boundaries beats its own chance band: ``p_share < alpha``. With several sessions the
  participant's p is the Bonferroni minimum over their sessions (``min(1, m * min p)``), so each
  participant keeps a false-positive rate of at most ``alpha``, as the binomial null needs. Of
  ``n`` participants ``k`` respond:

  * ``scipy.stats.binomtest(k, n, alpha, alternative="greater")`` -- could k be chance alone?
  * the Bayesian prevalence of Ince et al. (2021) with a uniform prior and full
    within-participant sensitivity (beta = 1): the maximum a posteriori estimate
    ``gamma_map = max(0, (k/n - alpha) / (1 - alpha))`` and the 95 % highest posterior density
    interval (:func:`bayesian_prevalence`).
- **Direction consistency** (:func:`direction_table`). For participants who heard the same
  performance, each boundary's ``z_null`` (the observed t against the participant's own
  pseudo-boundary null) is averaged over a participant's sessions and tested against 0 across
  participants with the Wilcoxon signed-rank test (``scipy.stats.wilcoxon``, two-sided), with
  Benjamini–Hochberg across the boundaries of one performance × series × N.
- **Mixed model by boundary kind** (:func:`mixed_model_table`). The before/after differences
  ``delta`` of every tested boundary, ``delta ~ 0 + C(trial_type)`` with a random intercept per
  participant (``statsmodels`` ``MixedLM``, REML): one mean difference per kind with its standard
  error, Wald z, p and 95 % CI, and the between-participant variance.

Conventions
-----------
Boundaries are matched across participants by ``(performance, piece, trial_type, label,
measure, beat)`` and their order of occurrence. Only rows with ``status == "ok"`` enter the
direction and mixed-model analyses. Responses may go either way and differ between participants
(PHYSIO-STATS §5.9): the prevalence needs no common sign; a mixed-model mean near 0 can hide
opposite responders, so read it beside the prevalence. Association, not cause.

References
----------
Ince, R. A. A., Paton, A. T., Kay, J. W. & Schyns, P. G. (2021). Bayesian inference of population
prevalence. eLife 10:e62461.
Wilcoxon, F. (1945). Individual comparisons by ranking methods. Biometrics Bulletin 1:80-83.
Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate. JRSS-B 57:289-300.
Laird, N. M. & Ware, J. H. (1982). Random-effects models for longitudinal data. Biometrics 38:963-974.
"""

from __future__ import annotations

import math
import warnings as _warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

__all__ = ["Prevalence", "bayesian_prevalence", "participant_p", "prevalence_table", "direction_table",
           "mixed_model_table", "GroupResult", "group_results", "write_group", "boundary_keys"]


@dataclass
class Prevalence:
    """Prevalence of an effect among ``n`` participants of whom ``k`` passed a test at ``alpha``."""

    k: int
    n: int
    alpha: float
    gamma_map: float
    hpdi_low: float
    hpdi_high: float
    p_binom: float


def bayesian_prevalence(k: int, n: int, *, alpha: float = 0.05, beta: float = 1.0,
                        level: float = 0.95) -> Prevalence:
    """Bayesian population prevalence (Ince et al. 2021) and the binomial test of ``k`` of ``n``.

    With a uniform prior on the prevalence gamma, the rate of positive tests is
    ``theta = alpha + (beta - alpha) * gamma`` and its posterior is Beta(k + 1, n - k + 1)
    truncated to ``[alpha, beta]``. The MAP is ``(clip(k/n, alpha, beta) - alpha) / (beta - alpha)``;
    the highest posterior density interval is the shortest interval holding ``level`` of the
    truncated posterior. ``p_binom`` is ``binomtest(k, n, alpha, alternative="greater")``.
    """
    from scipy import optimize, stats

    if n <= 0:
        return Prevalence(k, n, alpha, float("nan"), float("nan"), float("nan"), float("nan"))
    post = stats.beta(k + 1, n - k + 1)
    lo_c, hi_c = post.cdf(alpha), post.cdf(beta)
    mass = hi_c - lo_c

    def inv(u):
        return float(post.ppf(lo_c + u * mass))

    theta_map = min(max(k / n, alpha), beta)
    if theta_map <= alpha:
        a, b = alpha, inv(level)
    elif theta_map >= beta:
        a, b = inv(1 - level), beta
    else:
        res = optimize.minimize_scalar(lambda u: inv(u + level) - inv(u), bounds=(0.0, 1.0 - level),
                                       method="bounded", options={"xatol": 1e-10})
        a, b = inv(res.x), inv(res.x + level)
    g = (lambda t: (t - alpha) / (beta - alpha))
    p = float(stats.binomtest(int(k), int(n), alpha, alternative="greater").pvalue)
    return Prevalence(int(k), int(n), float(alpha), float(g(theta_map)), float(max(g(a), 0.0)),
                      float(min(g(b), 1.0)), p)


def participant_p(p_values) -> float:
    """One participant's p over their sessions: ``min(1, m * min p)`` (Bonferroni)."""
    p = np.asarray([v for v in p_values if v is not None and math.isfinite(v)], dtype=np.float64)
    return float(min(1.0, p.size * p.min())) if p.size else float("nan")


_FAMILY = ["series", "N", "trial_type"]


def prevalence_table(summary: pd.DataFrame, *, alpha: float) -> tuple[pd.DataFrame, pd.DataFrame]:
    """``(prevalence, responders)`` from the stacked ``boundary_summary`` tables.

    ``responders``: one row per participant × family (series × N × trial_type) with
    ``sessions``, ``p_share`` (per :func:`participant_p`) and ``responder``. ``prevalence``: one
    row per family with ``k``, ``n``, ``alpha``, ``gamma_map``, ``hpdi_low``, ``hpdi_high``,
    ``p_binom``.
    """
    cols_r = _FAMILY + ["participant", "sessions", "p_share", "responder"]
    cols_p = _FAMILY + ["k", "n", "alpha", "gamma_map", "hpdi_low", "hpdi_high", "p_binom"]
    if summary is None or not len(summary) or "p_share" not in summary.columns:
        return pd.DataFrame(columns=cols_p), pd.DataFrame(columns=cols_r)
    rows = []
    for (series, n_beats, kind, part), g in summary.groupby(_FAMILY + ["participant"], sort=True):
        p = participant_p(g["p_share"].to_numpy(dtype=np.float64))
        rows.append({"series": series, "N": int(n_beats), "trial_type": kind, "participant": part,
                     "sessions": int(g["p_share"].notna().sum()), "p_share": p,
                     "responder": bool(p < alpha) if math.isfinite(p) else None})
    resp = pd.DataFrame(rows, columns=cols_r)
    prev = []
    for (series, n_beats, kind), g in resp.groupby(_FAMILY, sort=True):
        g = g[g["responder"].notna()]
        k, n = int(g["responder"].astype(bool).sum()), int(len(g))
        if n == 0:
            continue
        r = bayesian_prevalence(k, n, alpha=alpha)
        prev.append({"series": series, "N": int(n_beats), "trial_type": kind, "k": k, "n": n, "alpha": alpha,
                     "gamma_map": r.gamma_map,
                     "hpdi_low": r.hpdi_low, "hpdi_high": r.hpdi_high, "p_binom": r.p_binom})
    return pd.DataFrame(prev, columns=cols_p), resp


def boundary_keys(tests: pd.DataFrame) -> pd.Series:
    """A text key per row that names the same boundary in every participant who heard the same
    performance: performance, piece, kind, label, bar, beat and its occurrence in time order."""
    ident = ["performance", "piece", "trial_type", "label", "measure", "beat"]
    t = tests.copy()
    for c in ident:
        if c not in t.columns:
            t[c] = None
    txt = t[ident].astype(str).agg("|".join, axis=1)
    t["_k"] = txt
    by = ["participant", "session", "series", "N"]
    order = t.sort_values(by + (["onset"] if "onset" in t.columns else []), kind="mergesort")
    occ = order.groupby(by + ["_k"], sort=False).cumcount() + 1
    return txt + "|" + occ.reindex(t.index).astype(str)


def _ok(tests: pd.DataFrame) -> pd.DataFrame:
    if tests is None or not len(tests):
        return pd.DataFrame()
    t = tests
    if "status" in t.columns:
        t = t[t["status"].astype(str) == "ok"]
    return t


def direction_table(tests: pd.DataFrame, *, alpha: float = 0.05) -> pd.DataFrame:
    """Direction consistency per boundary across participants who heard one performance (module notes)."""
    from scipy import stats

    cols = ["performance", "series", "N", "piece", "trial_type", "label", "measure", "beat", "boundary",
            "n", "n_up", "n_down", "mean_z", "W", "p_wilcoxon", "q_bh", "consistent"]
    t = _ok(tests)
    if not len(t) or "z_null" not in t.columns:
        return pd.DataFrame(columns=cols)
    t = t.copy()
    t["boundary"] = boundary_keys(t)
    # time order of the boundaries: each participant's rank of the boundary (clocks differ, order does not)
    t["_rank"] = t.groupby(["participant", "session", "series", "N"], sort=False)["onset"].rank(method="first") \
        if "onset" in t.columns else 0.0
    t = t[np.isfinite(t["z_null"].to_numpy(dtype=np.float64))]
    rows = []
    for (perf, series, n_beats, bkey), g in t.groupby(["performance", "series", "N", "boundary"], sort=True):
        z = g.groupby("participant", sort=True)["z_null"].mean().to_numpy(dtype=np.float64)
        first = g.iloc[0]
        row = {"performance": perf, "series": series, "N": int(n_beats), "piece": first.get("piece"),
               "trial_type": first.get("trial_type"), "label": first.get("label"),
               "measure": first.get("measure"), "beat": first.get("beat"), "boundary": bkey,
               "n": int(z.size), "n_up": int((z > 0).sum()), "n_down": int((z < 0).sum()),
               "mean_z": float(z.mean()), "W": float("nan"), "p_wilcoxon": float("nan"),
               "_rank": float(g["_rank"].mean())}
        if np.count_nonzero(z) >= 2:
            with _warnings.catch_warnings():
                _warnings.simplefilter("ignore")
                r = stats.wilcoxon(z, alternative="two-sided")
            row["W"], row["p_wilcoxon"] = float(r.statistic), float(r.pvalue)
        rows.append(row)
    out = pd.DataFrame(rows).sort_values(["performance", "series", "N", "_rank", "boundary"], kind="mergesort")
    out = out.reset_index(drop=True)
    out["q_bh"] = np.nan
    for _, idx in out.groupby(["performance", "series", "N"], sort=True).groups.items():
        p = out.loc[idx, "p_wilcoxon"].to_numpy(dtype=np.float64)
        ok = np.isfinite(p)
        if ok.any():
            q = np.full(p.size, np.nan)
            q[ok] = stats.false_discovery_control(p[ok], method="bh")
            out.loc[idx, "q_bh"] = q
    out["consistent"] = [bool(q < alpha) if math.isfinite(q) else None for q in out["q_bh"]]
    return out[cols]


def mixed_model_table(tests: pd.DataFrame, *, value: str = "delta") -> tuple[pd.DataFrame, list[str]]:
    """MixedLM of ``value`` by boundary kind, random intercept per participant, per series × N.

    Returns ``(table, warnings)``; the table has one row per series × N × kind: ``estimate``,
    ``se``, ``z``, ``p``, ``ci_low``, ``ci_high``, ``n_obs``, ``n_boundaries`` (of that kind),
    ``n_participants``, ``group_var`` (random-intercept variance), ``resid_var``, ``converged``.
    """
    cols = ["series", "N", "term", "estimate", "se", "z", "p", "ci_low", "ci_high", "n_obs", "n_boundaries",
            "n_participants", "group_var", "resid_var", "converged", "method"]
    notes: list[str] = []
    t = _ok(tests)
    if not len(t) or value not in t.columns or "trial_type" not in t.columns:
        return pd.DataFrame(columns=cols), notes
    rows = []
    for (series, n_beats), g in t.groupby(["series", "N"], sort=True):
        g = g[np.isfinite(g[value].to_numpy(dtype=np.float64))]
        g = g.sort_values(["participant", "session", "trial_type", "onset"] if "onset" in g.columns
                          else ["participant", "session", "trial_type"], kind="mergesort")
        fam = f"{series}, N = {int(n_beats)}"
        if g["participant"].nunique() < 2 or len(g) < 3:
            notes.append(f"mixed model {fam}: skipped (needs >= 2 participants and >= 3 boundaries; "
                         f"has {g['participant'].nunique()} and {len(g)})")
            continue
        fit, conv, ws = fit_mixed(g, value=value)
        notes.extend(f"mixed model {fam}: {w}" for w in ws)
        if fit is None:
            continue
        ci = fit.conf_int(alpha=0.05)
        for term in fit.fe_params.index:
            kind = term.split("[", 1)[-1].rstrip("]") if "[" in term else term
            rows.append({"series": series, "N": int(n_beats), "term": kind,
                         "estimate": float(fit.fe_params[term]), "se": float(fit.bse_fe[term]),
                         "z": float(fit.tvalues[term]), "p": float(fit.pvalues[term]),
                         "ci_low": float(ci.loc[term, 0]), "ci_high": float(ci.loc[term, 1]),
                         "n_obs": int(len(g)), "n_boundaries": int((g["trial_type"].astype(str) == kind).sum()),
                         "n_participants": int(g["participant"].nunique()),
                         "group_var": float(fit.cov_re.iloc[0, 0]), "resid_var": float(fit.scale),
                         "converged": bool(conv), "method": "REML"})
    return pd.DataFrame(rows, columns=cols), notes


def fit_mixed(data: pd.DataFrame, *, value: str = "delta"):
    """``statsmodels`` MixedLM ``value ~ 0 + C(trial_type)``, groups = participant, REML.

    Returns ``(result or None, converged, warnings)``.
    """
    import statsmodels.formula.api as smf
    from statsmodels.tools.sm_exceptions import ConvergenceWarning

    d = pd.DataFrame({"y": data[value].to_numpy(dtype=np.float64),
                      "trial_type": data["trial_type"].astype(str).to_numpy(),
                      "participant": data["participant"].astype(str).to_numpy()})
    notes = []
    with _warnings.catch_warnings(record=True) as caught:
        _warnings.simplefilter("always")
        try:
            fit = smf.mixedlm("y ~ 0 + C(trial_type)", d, groups=d["participant"]).fit(reml=True)
        except (np.linalg.LinAlgError, ValueError) as exc:
            return None, False, [f"not fitted ({type(exc).__name__}: {exc})"]
    conv = bool(getattr(fit, "converged", True))
    seen = set()
    for w in caught:
        if issubclass(w.category, (ConvergenceWarning, RuntimeWarning, UserWarning)):
            msg = " ".join(str(w.message).split())
            if msg not in seen:
                seen.add(msg)
                notes.append(msg)
                if issubclass(w.category, ConvergenceWarning):
                    conv = False
    return fit, conv, notes


@dataclass
class GroupResult:
    prevalence: pd.DataFrame
    responders: pd.DataFrame
    direction: pd.DataFrame
    mixed: pd.DataFrame
    alpha: float
    n_sessions: int = 0
    warnings: list[str] = field(default_factory=list)

    @property
    def empty(self) -> bool:
        return not (len(self.prevalence) or len(self.direction) or len(self.mixed))


def group_results(tables: dict, *, alpha: float = 0.05) -> GroupResult:
    """All group statistics from the stacked per-participant tables (see :func:`collect_tables`)."""
    summary = tables.get("boundary_summary", pd.DataFrame())
    tests = tables.get("boundary_tests", pd.DataFrame())
    prev, resp = prevalence_table(summary, alpha=alpha)
    direc = direction_table(tests, alpha=alpha)
    mixed, notes = mixed_model_table(tests)
    n_sessions = int(summary[["participant", "session"]].drop_duplicates().shape[0]) if len(summary) else 0
    return GroupResult(prevalence=prev, responders=resp, direction=direc, mixed=mixed, alpha=alpha,
                       n_sessions=n_sessions, warnings=notes)


_DESCRIPTIONS = {
    "prevalence": {
        "series": "physiological series (the recording label of its file)",
        "N": "beats per window before / after each boundary",
        "trial_type": "boundary family (kind of boundary)",
        "k": "participants whose share of significant boundaries beat their own chance band (p_share < alpha)",
        "n": "participants with a share test",
        "alpha": "the within-participant test level, also the binomial test's chance rate",
        "gamma_map": "Bayesian population prevalence, maximum a posteriori (Ince et al. 2021; uniform prior, full sensitivity)",
        "hpdi_low": "lower end of the 95 % highest posterior density interval of the prevalence",
        "hpdi_high": "upper end of the 95 % highest posterior density interval of the prevalence",
        "p_binom": "scipy.stats.binomtest(k, n, alpha, alternative='greater')",
    },
    "responders": {
        "series": "physiological series", "N": "beats per window", "trial_type": "boundary family",
        "participant": "BIDS subject label",
        "sessions": "sessions with a share test",
        "p_share": "the participant's p for the share of significant boundaries: min(1, sessions x min p_share)",
        "responder": "p_share < alpha",
    },
    "direction": {
        "performance": "the performance heard", "series": "physiological series", "N": "beats per window",
        "piece": "piece", "trial_type": "boundary kind", "label": "boundary label", "measure": "bar",
        "beat": "beat", "boundary": "key matching the boundary across participants",
        "n": "participants with a z for this boundary", "n_up": "participants with z > 0",
        "n_down": "participants with z < 0",
        "mean_z": "mean over participants of z_null (each participant's mean over sessions)",
        "W": "Wilcoxon signed-rank statistic (scipy.stats.wilcoxon)", "p_wilcoxon": "two-sided p",
        "q_bh": "Benjamini-Hochberg adjusted p across the boundaries of one performance x series x N",
        "consistent": "q_bh < alpha",
    },
    "mixed_model": {
        "series": "physiological series", "N": "beats per window", "term": "boundary kind (trial_type)",
        "estimate": "mean before/after difference (after - before) of this kind, in the series' units",
        "se": "standard error", "z": "Wald z", "p": "two-sided p of the Wald test",
        "ci_low": "95 % CI, lower", "ci_high": "95 % CI, upper", "n_obs": "boundaries in the model",
        "n_boundaries": "boundaries of this kind", "n_participants": "participants (random-intercept groups)",
        "group_var": "between-participant variance (random intercept)", "resid_var": "residual variance",
        "converged": "whether the REML optimiser converged", "method": "estimation method",
    },
}


def write_group(outs, group: GroupResult, *, folder: str) -> list:
    """Stage the group tables (``prevalence``, ``responders``, ``direction``, ``mixed_model``) as TSV
    with JSON sidecars into ``folder`` of ``outs``."""
    written = []
    for name, df in (("prevalence", group.prevalence), ("responders", group.responders),
                     ("direction", group.direction), ("mixed_model", group.mixed)):
        written.append(outs.write_tsv(f"{folder}/{name}.tsv", df))
        side = {c: {"Description": _DESCRIPTIONS[name].get(c, c)} for c in df.columns}
        written.append(outs.write_json(f"{folder}/{name}.json", side))
    return written
