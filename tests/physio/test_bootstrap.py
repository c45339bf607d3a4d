"""The stationary bootstrap (Politis & Romano 1994) and its block length (Politis & White 2004,
corrected by Patton, Politis & White 2009), used by analysis A's optional ``bootstrap`` interval."""

import numpy as np
import pytest
from scipy import stats

from stimkit.physio.bootstrap import (block_length_constant, bootstrap_delta_ci, flat_top,
                                      optimal_block_length, stationary_indices)


def ar1(n, phi, rng):
    from scipy.signal import lfilter

    e = rng.normal(size=n)
    e[0] /= np.sqrt(1 - phi ** 2)  # start in the stationary distribution
    return lfilter([1.0], [1.0, -phi], e)


def test_stationary_bootstrap_blocks_are_geometric_with_mean_b():
    # Politis & Romano 1994: a new block starts with probability 1/b, so block lengths are
    # geometric with mean b, and every index is uniform on 0..n-1 (the resample is stationary)
    rng = np.random.default_rng(1)
    n, b = 50, 4.0
    idx = stationary_indices(n, 400, 200, b, rng)
    cont = (idx[:, 1:] == (idx[:, :-1] + 1) % n)
    # a step breaks the block with probability (1/b)(1 - 1/n): a new start is prev + 1 by chance 1/n
    assert 1 - cont.mean() == pytest.approx((1 / b) * (1 - 1 / n), abs=0.01)
    counts = np.bincount(idx.ravel(), minlength=n)
    assert stats.chisquare(counts).pvalue > 0.001          # uniform marginal
    assert np.all(idx >= 0) and np.all(idx < n)
    one = stationary_indices(n, 400, 50, 1.0, rng)          # b = 1: the iid bootstrap
    assert (one[:, 1:] == (one[:, :-1] + 1) % n).mean() < 0.05


def test_flat_top_window():
    # Politis & White 2004: lambda(t) = 1 for |t| <= 1/2, 2(1 - |t|) for 1/2 < |t| <= 1, else 0
    np.testing.assert_allclose(flat_top([0, 0.5, 0.75, 1.0, 1.5, -0.25]), [1, 1, 0.5, 0, 0, 1])


@pytest.mark.parametrize("phi", [0.3, 0.5, 0.7])
def test_block_constant_on_ar1_matches_its_closed_form(phi):
    # Politis & White 2004 / Patton et al. 2009: b_opt = (2 G^2 / D_SB)^(1/3) n^(1/3), D_SB =
    # 2 g(0)^2; for an AR(1), G = 2 s^2 phi / (1 - phi)^2 and g(0) = s^2 (1 + phi) / (1 - phi),
    # so C = (2 phi / (1 - phi^2))^(2/3) (derived from their formulas; the flat-top estimate
    # is consistent, hence close on a long series)
    rng = np.random.default_rng(int(phi * 10))
    c = np.mean([block_length_constant([ar1(10000, phi, rng)]) for _ in range(4)])
    assert c == pytest.approx((2 * phi / (1 - phi ** 2)) ** (2 / 3), rel=0.12)


def test_block_length_of_white_noise_is_short_and_capped():
    rng = np.random.default_rng(3)
    assert optimal_block_length(rng.normal(size=5000)) < 3      # no dependence: about 1
    # a random walk has a long block, never beyond Patton's cap min(3 sqrt n, n / 3)
    walk = optimal_block_length(np.cumsum(rng.normal(size=400)))
    assert 10 < walk <= np.ceil(min(3 * 20, 400 / 3))
    # segments are demeaned before pooling: a level offset between segments changes nothing
    x, y = ar1(3000, 0.5, rng), ar1(2000, 0.5, rng)
    assert block_length_constant([x, y + 50]) == pytest.approx(block_length_constant([x, y]), rel=1e-9)


def test_bootstrap_interval_on_independent_values_is_close_to_welch():
    # with no dependence the block is ~1 and the interval of a difference of means is the iid
    # bootstrap's, close to Welch's (scipy ttest_ind) at n = 80 (textbook large-sample agreement)
    rng = np.random.default_rng(5)
    a, b = rng.normal(3, 2, 80), rng.normal(0, 1, 80)
    lo, hi, block = bootstrap_delta_ci(a, b, constant=0.5, reps=4000, rng=rng)
    w = stats.ttest_ind(a, b, equal_var=False).confidence_interval(0.95)
    assert block == pytest.approx(0.5 * 80 ** (1 / 3))
    assert (hi - lo) == pytest.approx(w.high - w.low, rel=0.1)
    assert (lo + hi) / 2 == pytest.approx(a.mean() - b.mean(), abs=0.1)


def test_bootstrap_interval_refuses_long_blocks():
    # PHYSIO-STATS 2.2: use the stationary bootstrap only when the block is at most N/4
    rng = np.random.default_rng(6)
    lo, hi, block = bootstrap_delta_ci(rng.normal(size=20), rng.normal(size=20), constant=2.0, reps=100, rng=rng)
    assert np.isnan(lo) and np.isnan(hi) and block == pytest.approx(2.0 * 20 ** (1 / 3))  # 5.4 > 5


def test_relate_with_the_bootstrap_interval():
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).parent))
    from physio_sim import ar1_beats, events_for

    from stimkit.physio import BeatSeries, RelateSettings, relate

    rng = np.random.default_rng(12)
    t, rr = ar1_beats(600, 0.3, 25.0, rng)
    ev = events_for([(20.0, 470.0)], [100.0, 200.0, 300.0, 400.0], family="dynamic")
    s = BeatSeries(t=t, x=rr, valid=np.ones(t.size, bool), source="b.tsv")
    st = RelateSettings(analyses=("boundaries",), n_pseudo=200, n_share_null=50, n_bootstrap=300,
                        window_beats=(20, 80), ci_method="bootstrap")
    res = relate(ev, None, s, settings=st, seed=3)
    bt = res.tables["boundary_tests"]
    ok = bt[bt.status == "ok"]
    assert set(ok["ci_method"]) <= {"bootstrap", "pseudo"} and (ok["ci_method"] == "bootstrap").any()
    assert np.all(ok.ci_low <= ok.delta) and np.all(ok.delta <= ok.ci_high)
    assert res.meta["bootstrap_block_constant"] == pytest.approx((0.6 / 0.91) ** (2 / 3), rel=0.5)
    # the bootstrap child seed leaves every other number as it was
    plain = relate(ev, None, s, settings=RelateSettings(analyses=("boundaries",), n_pseudo=200, n_share_null=50,
                                                        window_beats=(20, 80)), seed=3)
    pb = plain.tables["boundary_tests"]
    np.testing.assert_array_equal(pb["p_cal"].to_numpy(), bt["p_cal"].to_numpy())
