"""Change-point detection and surrogates against ruptures' own behaviour and the published
surrogate invariants (Schreiber & Schmitz 1996; Theiler et al. 1992)."""

import numpy as np
import pytest
import ruptures as rpt

from stimkit.physio.changepoints import (ar1_from_differences, detect, feature_sets, merge_close,
                                         penalty_value)
from stimkit.physio.span import Span
from stimkit.physio.surrogates import iaaft, phase_randomised, shift_train


def ar1(n, phi, rng):
    e = rng.normal(size=n)
    x = np.empty(n)
    x[0] = e[0] / np.sqrt(1 - phi ** 2)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


def test_step_signals_and_the_jump_trap():
    # ruptures on noiseless steps (PHYSIO-STATS 7.7): breaks at the step positions
    x = np.r_[np.zeros(50), 5 * np.ones(50), np.zeros(50)]
    assert list(detect(x, min_size=2, pen=1.0)) == [50, 100]
    y = np.r_[np.zeros(52), 5 * np.ones(50), np.zeros(48)]
    assert list(detect(y, min_size=2, pen=1.0)) == [52, 102]
    # the trap: ruptures' Pelt default jump=5 can only break at multiples of 5
    assert rpt.Pelt(model="l2").fit(y).predict(pen=1.0) == [50, 55, 100, 105, 150]


def test_kernel_linear_equals_pelt_l2_and_dynp():
    # KernelCPD(linear) optimises the l2 cost: same breaks as Pelt(l2, jump=1) and, at the same
    # number of breaks, as the exact dynamic programme (Truong, Oudre & Vayatis 2020)
    rng = np.random.default_rng(3)
    x = np.r_[rng.normal(0, 1, 61), rng.normal(3, 1, 51), rng.normal(-1, 1, 68)]
    pen = 3 * 2 * np.log(x.size)
    kb = rpt.KernelCPD(kernel="linear", min_size=5, jump=1).fit(x).predict(pen=pen)
    pb = rpt.Pelt(model="l2", min_size=5, jump=1).fit(x).predict(pen=pen)
    assert kb == pb
    db = rpt.Dynp(model="l2", min_size=5, jump=1).fit(x).predict(n_bkps=len(kb) - 1)
    assert kb == db
    assert kb[:-1] == pytest.approx([61, 112], abs=2)
    cost = rpt.costs.CostL2().fit(x)
    assert cost.error(10, 50) == pytest.approx(40 * np.var(x[10:50]))  # (b - a) var(x[a:b])


def test_bic_lrv_does_not_oversegment_autocorrelated_noise():
    # PHYSIO-STATS 3.1: on AR(1) phi = 0.6 with no change the iid BIC finds dozens of CPs,
    # bic_lrv none; both find 2-SD shifts
    rng = np.random.default_rng(11)
    x = ar1(2500, 0.6, rng)
    assert len(detect(x, min_size=10, pen=penalty_value(x, "bic_lrv"))) <= 1
    assert len(detect(x, min_size=10, pen=penalty_value(x, "bic_iid"))) > 20
    y = x.copy()
    sd = x.std()
    y[800:1600] += 2 * sd
    y[2000:] += 2 * sd
    found = detect(y, min_size=10, pen=penalty_value(y, "bic_lrv"))
    for b in (800, 1600, 2000):
        assert np.min(np.abs(found - b)) <= 10


def test_ar1_estimate_from_differences():
    # for an AR(1) the differences have lag-1 autocorrelation -(1 - phi) / 2 (textbook identity)
    rng = np.random.default_rng(5)
    for phi in (0.3, 0.6, 0.8):
        assert ar1_from_differences(ar1(20000, phi, rng)) == pytest.approx(phi, abs=0.03)


def test_iaaft_invariants():
    # Schreiber & Schmitz 1996: values identical (ends with the rank step), spectrum close;
    # PHYSIO-STATS 7.6: relative RMS error of |rfft| < 0.01, lag-1 ACF within 0.01
    rng = np.random.default_rng(2)
    x = np.exp(ar1(2048, 0.7, rng) / 2)
    s, iters = iaaft(x, np.random.default_rng(9))
    assert np.array_equal(np.sort(s), np.sort(x))
    a, b = np.abs(np.fft.rfft(x)), np.abs(np.fft.rfft(s))
    assert np.sqrt(np.mean((a - b) ** 2)) / np.sqrt(np.mean(a ** 2)) < 0.01
    acf = lambda v: np.corrcoef(v[:-1], v[1:])[0, 1]  # noqa: E731
    assert abs(acf(s) - acf(x)) < 0.01
    assert not np.array_equal(s, x)
    assert iters <= 500


def test_iaaft_agrees_with_neurokit2_reference_on_spectrum():
    # neurokit2's signal_surrogate("IAAFT") as an outside reference: both keep the values and
    # reach a spectral error of the same order
    import neurokit2 as nk

    rng = np.random.default_rng(4)
    x = np.exp(ar1(1024, 0.7, rng) / 2)
    ours, _ = iaaft(x, np.random.default_rng(1))
    ref = nk.signal_surrogate(x, method="IAAFT", random_state=1)
    a = np.abs(np.fft.rfft(x))
    err = lambda s: np.sqrt(np.mean((np.abs(np.fft.rfft(s)) - a) ** 2)) / np.sqrt(np.mean(a ** 2))  # noqa: E731
    assert np.allclose(np.sort(ref), np.sort(x))
    assert err(ours) < 0.01 and err(ref) < 0.01


def test_other_surrogate_invariants():
    rng = np.random.default_rng(8)
    x = ar1(1000, 0.5, rng) + 3
    # circular shift (of a series): |rfft| and sorted values unchanged (PHYSIO-STATS 7.6)
    c = np.roll(x, 137)
    np.testing.assert_allclose(np.abs(np.fft.rfft(c)), np.abs(np.fft.rfft(x)), rtol=1e-10)
    assert np.array_equal(np.sort(c), np.sort(x))
    # phase randomisation (Theiler et al. 1992): |rfft| and mean unchanged
    p = phase_randomised(x, rng)
    np.testing.assert_allclose(np.abs(np.fft.rfft(p)), np.abs(np.fft.rfft(x)), rtol=1e-8, atol=1e-8)
    assert p.mean() == pytest.approx(x.mean())
    # value shuffle: |lag-1 ACF| < 3 / sqrt(n)
    v = rng.permutation(x)
    assert abs(np.corrcoef(v[:-1], v[1:])[0, 1]) < 3 / np.sqrt(v.size)


def test_train_shift_stays_inside_the_pieces():
    span = Span(np.array([10.0, 100.0]), np.array([60.0, 130.0]))  # T = 80 s
    m = np.array([12.0, 50.0, 110.0, 129.0])
    s = shift_train(m, span, 35.0)
    assert s.size == 4 and np.all(span.contains(s))
    pos = np.sort(span.to_axis(s))
    np.testing.assert_allclose(pos, np.sort(np.mod(span.to_axis(m) + 35.0, 80.0)))


def test_feature_sets_and_unions():
    import pandas as pd

    tr = pd.DataFrame({"feature": ["a", "a", "b", "c"], "time": [1.0, 5.0, 1.3, 9.0]})
    sets = feature_sets(tr)
    assert set(sets) == {"a", "b", "c", "a+b", "a+c", "b+c", "all"}
    np.testing.assert_allclose(sets["a+b"], [1.0, 5.0])   # 1.3 merged into 1.0 (< 0.5 s)
    np.testing.assert_allclose(sets["all"], [1.0, 5.0, 9.0])
    np.testing.assert_allclose(merge_close([0, 0.4, 0.8, 2], within_s=0.5), [0, 0.8, 2])


def test_music_change_points_detected_from_the_features():
    # music_source "detect": a loudness column with level steps at known times (and silent frames
    # flagged) gives change points at those times, within the 2 Hz grid's half-second
    import pandas as pd

    from stimkit.physio.changepoints import music_trains

    rng = np.random.default_rng(1)
    t = np.arange(0, 200, 0.1)
    loud = -30 + np.where((t > 60) & (t < 120), 8.0, 0.0) + np.where(t > 160, -6.0, 0.0) + rng.normal(0, 0.5, t.size)
    silent = ((t > 95) & (t < 97)).astype(float)
    loud[silent > 0] = -120.0  # undefined in silence: must be ignored, not seen as a change
    feats = pd.DataFrame({"short_term_lufs": loud, "silent": silent}, index=pd.Index(t, name="onset"))
    span = Span(np.array([5.0]), np.array([195.0]))
    tr = music_trains(pd.DataFrame({"trial_type": [], "onset": []}), feats, span, source="detect")
    got = tr.loc[tr.feature == "short_term_lufs", "time"].to_numpy()
    assert got.size == 3
    np.testing.assert_allclose(got, [60.0, 120.0, 160.0], atol=0.6)


def test_co_change_trains():
    # constructed case (no outside source): two of three features within 1 s at 10 s, all
    # three at 50 s, one alone at 30 s; co-changes at the middle of the first and last change
    import pandas as pd

    from stimkit.physio.changepoints import co_change_times

    tr = pd.DataFrame({"feature": ["a", "b", "a", "a", "b", "c", "c"],
                       "time": [10.0, 10.6, 30.0, 50.0, 50.2, 50.9, 70.0]})
    np.testing.assert_allclose(co_change_times(tr, k=2), [10.3, 50.45])  # 50.0 opens a 1 s window to 50.9
    np.testing.assert_allclose(co_change_times(tr, k=3), [50.45])
    assert co_change_times(tr, k=2, within_s=0.5).size == 1  # 10.0 and 10.6 are 0.6 s apart
    sets = feature_sets(tr, co_change=(2, 3, 4))
    assert "co-change>=2" in sets and "co-change>=3" in sets and "co-change>=4" not in sets


def test_music_train_nulls_keep_what_they_promise():
    # uniform: the Monte Carlo twin of Donges et al.'s analytic p_hit, 1 - (1 - 2h/T)^n_M, for
    # reference events away from the edges; iei_shuffle: the multiset of inter-event intervals
    # on the circle is kept (PHYSIO-STATS 3.4)
    from stimkit.physio.coincidence import _rates, eca_analytic, music_null_trains

    span = Span(np.array([0.0]), np.array([1200.0]))
    rng = np.random.default_rng(3)
    M = np.sort(rng.uniform(0, 1200, 40))
    P = np.linspace(100, 1100, 20)
    h = np.array([1.0, 2.0, 5.0])
    null = _rates(P, music_null_trains(M, span, method="uniform", r=4000, rng=rng), h, window="symmetric", lag_s=0)
    p_hit, _ = eca_analytic(20, 40, np.zeros(3, int), h, T=1200.0)
    np.testing.assert_allclose(null.mean(axis=0), p_hit, atol=0.006)
    for tr in music_null_trains(M, span, method="iei_shuffle", r=20, rng=rng):
        g = np.sort(np.r_[np.diff(tr), 1200 - tr[-1] + tr[0]])
        np.testing.assert_allclose(g, np.sort(np.r_[np.diff(M), 1200 - M[-1] + M[0]]), atol=1e-9)
