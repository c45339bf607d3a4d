"""Published worked examples and closed forms behind the physiology statistics.

Sources are named beside each assertion; the values are those collected in PHYSIO-STATS.md
section 7 (shared specification), each traceable to the paper or page named.
"""

import numpy as np
import pytest
from scipy import stats

from stimkit.physio.coincidence import eca_analytic, exceedance_ranges, hit_counts, null_inference
from stimkit.physio.group import prevalence
from stimkit.physio.windows import _p_cal, _welch, adjust_pvalues, effective_n, hedges_g, hodges_lehmann

# Benjamini & Hochberg (1995), JRSS-B 57, p. 298: the 15 p-values of their worked example
BH_P = np.array([0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240,
                 0.4262, 0.5719, 0.6528, 0.7590, 1.0])
BH_ADJ = np.array([0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.0638571, 0.0638571, 0.0645, 0.0765,
                   0.486, 0.581182, 0.714875, 0.753231, 0.813214, 1.0])

# Welch's t-test examples (Wikipedia "Welch's t-test", Rosetta Code "Welch's t-test")
A1 = np.array([27.5, 21.0, 19.0, 23.6, 17.0, 17.9, 16.9, 20.1, 21.9, 22.6, 23.1, 19.6, 19.0, 21.7, 21.4])
A2 = np.array([27.1, 22.0, 20.8, 23.4, 23.4, 23.5, 25.8, 22.0, 24.8, 20.2, 21.9, 22.1, 22.9, 20.5, 24.4])


def test_benjamini_hochberg_worked_example():
    q = adjust_pvalues(BH_P, method="fdr_bh")
    np.testing.assert_allclose(q, BH_ADJ, atol=1e-6)          # BH 1995 adjusted values
    assert int(np.sum(q <= 0.05)) == 4                         # BH 1995: 4 rejections, cut-off 0.0095
    assert BH_P[q <= 0.05].max() == pytest.approx(0.0095)
    np.testing.assert_allclose(stats.false_discovery_control(BH_P), q, atol=1e-12)  # scipy agrees
    assert int(np.sum(adjust_pvalues(BH_P, method="holm") <= 0.05)) == 3    # Holm: 3 (BH 1995 table)
    assert int(np.sum(adjust_pvalues(BH_P, method="fdr_by") <= 0.05)) == 3  # BY 2001 on the same p: 3
    assert int(np.sum(np.minimum(BH_P * 15, 1) <= 0.05)) == 3               # Bonferroni: 3


def test_two_stage_bky_rejects_eight():
    # Benjamini, Krieger & Yekutieli (2006) two-stage procedure on the BH example: 8 rejections
    from statsmodels.stats.multitest import fdrcorrection_twostage

    rej, _, _, _ = fdrcorrection_twostage(BH_P, alpha=0.05, method="bky")
    assert int(rej.sum()) == 8


def test_welch_textbook_example():
    # Wikipedia / Rosetta Code Welch example 1: t = -2.455356, df = 24.98853, p = 0.0213780
    t, df, p = _welch(A1.mean(), A1.var(ddof=1), A1.size, A2.mean(), A2.var(ddof=1), A2.size)
    assert t == pytest.approx(-2.455356, abs=1e-6)
    assert df == pytest.approx(24.98853, abs=1e-5)
    assert p == pytest.approx(0.0213780, abs=1e-7)
    res = stats.ttest_ind(A1, A2, equal_var=False)            # the call windows.py makes for T1
    assert res.statistic == pytest.approx(t, abs=1e-12)
    ci = res.confidence_interval(0.95)                          # CI (-3.984096, -0.349237)
    assert (ci.low, ci.high) == pytest.approx((-3.984096, -0.349237), abs=1e-6)


@pytest.mark.parametrize("a, b, p_ref", [
    # Rosetta Code "Welch's t-test", further pairs and their two-sided p-values
    ([17.2, 20.9, 22.6, 18.1, 21.7, 21.4, 23.5, 24.2, 14.7, 21.8],
     [21.5, 22.8, 21.0, 23.0, 21.6, 23.6, 22.5, 20.7, 23.4, 21.8, 20.7, 21.7, 21.5, 22.5, 23.6, 21.5,
      22.5, 23.5, 21.5, 21.8], 0.1488417),
    ([19.8, 20.4, 19.6, 17.8, 18.5, 18.9, 18.3, 18.9, 19.5, 22.0],
     [28.2, 26.6, 20.1, 23.3, 25.2, 22.1, 17.7, 27.6, 20.6, 13.7, 23.2, 17.5, 20.6, 18.0, 23.9, 21.6,
      24.3, 20.4, 24.0, 13.2], 0.0359723),
    ([30.02, 29.99, 30.11, 29.97, 30.01, 29.99], [29.89, 29.93, 29.72, 29.98, 30.02, 29.98], 0.0907733),
    ([3.0, 4.0, 1.0, 2.1], [490.2, 340.0, 433.9], 0.0107516),
])
def test_welch_rosetta_pairs(a, b, p_ref):
    a, b = np.asarray(a), np.asarray(b)
    _, _, p = _welch(a.mean(), a.var(ddof=1), a.size, b.mean(), b.var(ddof=1), b.size)
    assert p == pytest.approx(p_ref, abs=2e-7)


def test_rank_and_effect_sizes_a1_a2():
    # PHYSIO-STATS 7.3 on the Welch example: U = 53.5, p = 0.0152013 (asymptotic, tie and
    # continuity corrected), r_rb = -0.524444, Hodges-Lehmann -2.3, Hedges g = -0.872338
    mw = stats.mannwhitneyu(A1, A2, alternative="two-sided", method="asymptotic")
    assert mw.statistic == 53.5
    assert mw.pvalue == pytest.approx(0.0152013, abs=1e-7)
    assert 2 * mw.statistic / (15 * 15) - 1 == pytest.approx(-0.524444, abs=1e-6)
    assert hodges_lehmann(A1, A2) == pytest.approx(-2.3, abs=1e-9)
    assert hedges_g(A1, A2) == pytest.approx(-0.872338, abs=1e-6)  # d = -0.896569 x J = 0.972973


def test_eca_one_sided_donges():
    # Donges et al. (2016) formula: T = 100, dT = 5, tau = 0, N_A = N_B = 10
    p_hit, p8 = eca_analytic(10, 10, 8, [5.0], T=100.0, window="music_leads")
    assert p_hit[0] == pytest.approx(0.4012631, abs=1e-7)
    assert p8[0] == pytest.approx(0.0125652, abs=1e-7)       # P(K >= 8)
    _, p4 = eca_analytic(10, 10, 4, [5.0], T=100.0, window="music_leads")
    assert p4[0] == pytest.approx(0.6208824, abs=1e-7)       # P(K >= 4)


def test_eca_symmetric_values():
    # PHYSIO-STATS 7.5: T = 1200 s, h = 2 s, n_P = 20, n_M = 40
    p_hit, p4 = eca_analytic(20, 40, 4, [2.0], T=1200.0)
    assert p_hit[0] == pytest.approx(0.1250216, abs=1e-7)
    assert 20 * p_hit[0] == pytest.approx(2.50043, abs=1e-5)  # E[K]
    assert p4[0] == pytest.approx(0.2347646, abs=1e-7)
    _, p8 = eca_analytic(20, 40, 8, [0.5, 1.0, 2.0, 5.0, 10.0], T=1200.0)
    np.testing.assert_allclose(p8, [1.18335e-7, 1.87334e-5, 0.00185431, 0.182739, 0.847075], rtol=1e-5)


def test_eca_uniform_circle_monte_carlo_matches_analytic():
    # PHYSIO-STATS 7.5: uniform-on-circle Monte Carlo of P(K >= 4) = 0.2358 (2e5 runs); +-0.01 at 2e4
    rng = np.random.default_rng(7)
    T, h, runs = 1200.0, 2.0, 20000
    p = rng.uniform(0, T, (runs, 20, 1))
    m = rng.uniform(0, T, (runs, 1, 40))
    d = np.abs(p - m)
    k = np.any(np.minimum(d, T - d) <= h, axis=2).sum(axis=1)  # on a circle: no edges
    assert np.mean(k >= 4) == pytest.approx(0.2358, abs=0.01)
    # the same count through hit_counts on one run (circle unrolled)
    mm = np.sort(m[0, 0])
    assert hit_counts(p[0, :, 0], np.r_[mm - T, mm, mm + T], [h])[0] == k[0]


def test_closed_forms():
    assert float(effective_n(80, 0.5)) == pytest.approx(26.667, abs=1e-3)  # Bayley & Hammersley 1946
    null = np.sort(np.abs(np.linspace(-1, 1, 999)))
    assert _p_cal([5.0], null)[0] == pytest.approx(0.001)  # Phipson & Smyth 2010: 0 of 999 -> 1/1000
    pv = prevalence(8, 20, alpha=0.05)                      # Ince et al. 2021 MAP; binomtest
    assert pv["prevalence_map"] == pytest.approx(0.368421, abs=1e-6)
    assert pv["p_binomial"] == pytest.approx(2.857e-6, rel=1e-3)


def test_global_test_and_ranges_behave():
    # a constructed case (no outside source): an observed curve far above a flat null is
    # significant at the Monte-Carlo floor 1/(R+1), and its exceedance range covers the grid
    rng = np.random.default_rng(0)
    h = np.arange(1, 21) * 0.5
    null = np.clip(rng.normal(0.2, 0.05, size=(199, h.size)), 0, 1)
    res = null_inference(np.full(h.size, 0.9), null, n_ref=10)
    assert res["p_global"] == pytest.approx(1 / 200)
    assert exceedance_ranges(h, np.full(h.size, 0.9), res["q95"]) == "0.5-10.0 s"


def test_vectorised_adjustment_matches_statsmodels():
    from stimkit.physio.windows import adjust_rows

    rng = np.random.default_rng(1)
    P = rng.uniform(size=(30, 9)) ** 2
    P[rng.uniform(size=P.shape) < 0.2] = np.nan
    P[0] = BH_P[:9]
    for method in ("fdr_bh", "fdr_by", "holm"):
        fast = adjust_rows(P, method=method)
        slow = np.vstack([adjust_pvalues(row, method=method) for row in P])
        np.testing.assert_allclose(fast, slow, atol=1e-12)  # statsmodels multipletests


def test_batched_rates_equal_pair_by_pair_counts():
    # internal consistency: the concatenated-offset counting equals hit_counts pair by pair
    from stimkit.physio.coincidence import _rates

    rng = np.random.default_rng(3)
    h = np.arange(1, 21) * 0.5
    refs = [np.sort(rng.uniform(0, 300, rng.integers(0, 12))) for _ in range(40)]
    others = [np.sort(rng.uniform(0, 300, rng.integers(1, 15))) for _ in range(40)]
    for window in ("symmetric", "music_leads", "music_follows"):
        fast = _rates(refs, others, h, window=window, lag_s=0.7)
        for r, o, row in zip(refs, others, fast):
            if r.size:
                np.testing.assert_allclose(row, hit_counts(r, o, h, window=window, lag_s=0.7) / r.size)
            else:
                assert np.all(np.isnan(row))
        np.testing.assert_allclose(_rates(refs, others, h, window=window, lag_s=0.7, block=7), fast)  # blocks
        shared = _rates(refs, others[0], h, window=window, lag_s=0.7)  # one shared train
        np.testing.assert_allclose(shared, _rates(refs, [others[0]] * len(refs), h, window=window, lag_s=0.7))
        shared = _rates(others[0], refs, h, window=window, lag_s=0.7)
        np.testing.assert_allclose(shared, _rates([others[0]] * len(refs), refs, h, window=window, lag_s=0.7))
