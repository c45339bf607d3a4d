"""Penalty options of the change-point detector: Zhang & Siegmund's (2007) modified BIC, the
penalty sweep CROPS (Haynes, Eckley & Fearnhead 2017) and the rate rule built on it, checked
against brute-force enumeration and ruptures' exact solvers."""

import itertools

import numpy as np
import pytest
import ruptures as rpt

from stimkit.physio.artefacts import Segment
from stimkit.physio.changepoints import (crops, detect, long_run_variance, mbic_criterion, mbic_partition,
                                         penalty_sweep, penalty_value, segment, segment_cost)


def brute_mbic(x, m, sigma2, kmax=3):
    # the criterion as the R package wbs documents Zhang & Siegmund (2007): maximise the log
    # likelihood minus (3/2) k ln n + (1/2) sum ln(l_i / n); with known variance sigma^2 that is
    # minimising SSE + sigma^2 (3 k ln n + sum ln(l_i / n)), enumerated here over every placement
    n = x.size
    sse = {(a, b): float(np.sum((x[a:b] - x[a:b].mean()) ** 2)) for a in range(n) for b in range(a + m, n + 1)}
    best, where = np.inf, None
    for k in range(kmax + 1):
        for br in itertools.combinations(range(m, n - m + 1), k):
            e = (0,) + br + (n,)
            if any(b - a < m for a, b in zip(e[:-1], e[1:])):
                continue
            v = sum(sse[a, b] + sigma2 * np.log((b - a) / n) for a, b in zip(e[:-1], e[1:])) + \
                sigma2 * 3 * k * np.log(n)
            if v < best - 1e-9:
                best, where = v, list(br)
    return best, where


@pytest.mark.parametrize("seed", range(3))
def test_mbic_solver_is_the_exact_minimiser(seed):
    rng = np.random.default_rng(seed)
    x = np.r_[rng.normal(0, 1, 17), rng.normal(1.6, 1, 13), rng.normal(0, 1, 15)]
    got = mbic_partition(x, min_size=4, sigma2=1.0)
    best, where = brute_mbic(x, 4, 1.0)
    assert list(got) == where
    assert mbic_criterion(x, got, sigma2=1.0) == pytest.approx(best)


def test_mbic_penalises_more_than_bic_and_finds_real_shifts():
    # mBIC's segment-length term adds ln(l1 l2 / l) > 0 to every split of a long segment, so on
    # the same scale it never keeps more breaks than the BIC's 2 ln n alone would need
    # (Zhang & Siegmund 2007); both find 3-SD shifts
    rng = np.random.default_rng(4)
    x = rng.normal(0, 1, 900)
    x[300:600] += 3
    s2 = long_run_variance(x)
    b_m = mbic_partition(x, min_size=10, sigma2=s2)
    b_b = detect(x, min_size=10, pen=2 * s2 * np.log(x.size))
    assert b_m.size <= b_b.size
    assert np.min(np.abs(b_m - 300)) <= 5 and np.min(np.abs(b_m - 600)) <= 5
    br, pen = segment(x, min_size=10, rule="mbic")
    assert list(br) == list(b_m) and pen == pytest.approx(penalty_value(x, "bic_lrv"))


def test_crops_finds_every_optimal_segmentation_in_the_range():
    # Haynes, Eckley & Fearnhead 2017: CROPS returns every segmentation that is optimal for
    # some penalty in [beta_min, beta_max]; checked against the solver run on a fine grid, and
    # each one's cost against ruptures' exact dynamic programme (Dynp) at the same count
    rng = np.random.default_rng(2)
    x = np.r_[rng.normal(0, 1, 61), rng.normal(3, 1, 51), rng.normal(-1, 1, 68), rng.normal(1, 1, 40)]
    sols = crops(x, min_size=5, beta_min=2.0, beta_max=200.0)
    counts = [d["n_changepoints"] for d in sols]
    assert counts == sorted(counts) and len(set(counts)) == len(counts) and counts[0] == 0
    for beta in np.geomspace(2.0, 200.0, 40):
        k = detect(x, min_size=5, pen=beta).size
        inside = [d["n_changepoints"] for d in sols if d["penalty_low"] - 1e-9 <= beta <= d["penalty_high"] + 1e-9]
        assert k in inside
    for d in sols[1:4]:
        dp = rpt.Dynp(model="l2", min_size=5, jump=1).fit(x).predict(n_bkps=d["n_changepoints"])
        assert d["cost"] == pytest.approx(segment_cost(x, dp[:-1]), rel=1e-9)
    three = next(d for d in sols if d["n_changepoints"] == 3)
    assert list(three["breaks"]) == pytest.approx([61, 112, 180], abs=2)  # the planted steps


def test_rate_rule_and_sweep_table():
    rng = np.random.default_rng(8)
    x = np.r_[rng.normal(0, 1, 300), rng.normal(2, 1, 300), rng.normal(0, 1, 300), rng.normal(2, 1, 300)]
    br, pen = segment(x, min_size=10, rule="rate:0.15", duration_s=1200.0)  # 20 min -> 3 changes
    assert br.size == 3 and np.isfinite(pen)
    assert detect(x, min_size=10, pen=pen).size == 3  # its penalty gives that segmentation
    seg = Segment(index=np.arange(x.size), t=np.arange(x.size) * 1.0, x=x)
    sw = penalty_sweep([seg], min_size=10)
    assert sw["chosen"].sum() == 1
    chosen = sw[sw["chosen"]].iloc[0]
    assert chosen["n_changepoints"] == detect(x, min_size=10, pen=penalty_value(x)).size
    assert sw["factor_low"].min() == pytest.approx(0.25) and sw["factor_high"].max() == pytest.approx(4.0)
    assert np.all(np.diff(sw["n_changepoints"]) > 0) and np.all(np.diff(sw["cost"]) < 0)
