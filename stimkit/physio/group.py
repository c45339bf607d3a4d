"""Prevalence of an effect across participants, for group summaries of per-participant tests.

What it computes
----------------
With k of n participants significant at level alpha (each tested within themselves, e.g.
``p_share < alpha`` or ``p_global < alpha``): the one-sided binomial test of k against alpha
(:func:`scipy.stats.binomtest`, ``alternative="greater"``) and the Bayesian prevalence MAP
gamma = max(0, (k/n - alpha) / (1 - alpha)) (Ince et al. 2021, assuming full within-participant
sensitivity). Responses may go either way: no common sign is imposed.

References
----------
Ince, R. A. A., Paton, A. T., Kay, J. W., & Schyns, P. G. (2021). Bayesian inference of
population prevalence. eLife 10, e62461.
"""

from __future__ import annotations

from scipy import stats

__all__ = ["prevalence"]


def prevalence(k: int, n: int, *, alpha: float = 0.05) -> dict:
    """``{"k", "n", "alpha", "p_binomial", "prevalence_map"}`` (see module notes)."""
    if n <= 0:
        return {"k": int(k), "n": int(n), "alpha": alpha, "p_binomial": float("nan"),
                "prevalence_map": float("nan")}
    p = stats.binomtest(int(k), int(n), alpha, alternative="greater").pvalue
    return {"k": int(k), "n": int(n), "alpha": float(alpha), "p_binomial": float(p),
            "prevalence_map": max(0.0, (k / n - alpha) / (1.0 - alpha))}
