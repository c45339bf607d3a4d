"""relate() end to end on simulated series: calibration under the null, power on planted
responses of stated size, determinism, and refusal of a series that does not cover the music.

The simulations are AR(1) beat-interval series (a common first model of RR fluctuations;
PHYSIO-STATS 2.3). The binomial bands are exact (scipy.stats.binom), not rules of thumb.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from stimkit.errors import InputError
from stimkit.physio import BeatSeries, RelateSettings, relate
from stimkit.physio.span import Span
from stimkit.physio.windows import WindowSetup, boundary_table, family_tests

from physio_sim import ar1_beats, events_for


def binomial_band(n, p=0.05, level=0.99):
    lo, hi = stats.binom.interval(level, n, p)
    return lo / n, hi / n


def test_null_series_reject_at_the_nominal_rate():
    # PHYSIO-STATS 7.9: on null AR(1) series the calibrated tests (T4 per boundary, and the share
    # test p_share) reject within the binomial 99 % band around 0.05; naive Welch (T1) does not
    # (the spec's simulation: 32 % at phi = 0.6)
    rng = np.random.default_rng(2024)
    runs = 160
    span = Span(np.array([10.0]), np.array([390.0]))
    rej_t4 = rej_share = rej_t1 = 0
    covered = []
    for r in range(runs):
        t, rr = ar1_beats(520, 0.6, 30.0, rng)
        b = np.sort(rng.uniform(40, 360, 6))
        bounds = boundary_table(events_for([(10.0, 390.0)], b), families=("dynamic",))
        setup = WindowSetup(t=t, x=rr, ok=np.ones(t.size, bool), span=span, fixed_rate_hz=None)
        tab, summ = family_tests(setup, bounds, size=20, rho1=0.6, k_pseudo=300, share_null="circular_shift",
                                 r_share=200, min_shift_s=30.0, alpha=0.05, correction="fdr_bh",
                                 ci_method="pseudo", rng_pseudo=np.random.default_rng(rng.integers(1 << 32)),
                                 rng_share=np.random.default_rng(rng.integers(1 << 32)), participant="x",
                                 series="rr")
        first = tab[tab["status"] == "ok"].iloc[0]
        covered.append(first["ci_low"] <= 0 <= first["ci_high"])
        rej_t4 += first["p_cal"] < 0.05
        rej_t1 += first["p_welch"] < 0.05
        rej_share += summ["p_share"] < 0.05
    lo, hi = binomial_band(runs)
    assert lo <= rej_t4 / runs <= hi
    assert lo <= rej_share / runs <= hi
    assert rej_t1 / runs > hi  # the naive test is anti-conservative under autocorrelation
    # the default (pseudo) 95 % interval covers the true zero difference at its nominal rate
    # (PHYSIO-STATS 2.2 measured 94 % on AR(1), phi 0.7, N 20): one boundary per series, so
    # the runs are independent, within the binomial 99 % band around 0.95. (Over all boundaries
    # of a run, which share one null, the measured coverage is 91-93 %: see docs/physiology.md.)
    lo, hi = binomial_band(runs, 0.95)
    assert lo <= np.mean(covered) <= hi


@pytest.fixture(scope="module")
def planted():
    # planted: sustained level steps of 90 ms (3 marginal SDs of the AR(1) noise, phi 0.5)
    # at six "section" boundaries, each followed 1 s later by a loudness change; a second,
    # unrelated feature train ("centroid_hz") at random times
    rng = np.random.default_rng(77)
    steps = np.array([70.0, 130.0, 190.0, 260.0, 330.0, 400.0])

    def level(now):
        return 800.0 + 90.0 * ((np.searchsorted(steps, now) % 2) * 2 - 1) / 2

    t, rr = ar1_beats(640, 0.5, 30.0, rng, level=level)
    changes = [(s + 1.0, "short_term_lufs") for s in steps] + \
        [(float(c), "centroid_hz") for c in np.sort(rng.uniform(30, 480, 12))]
    ev = events_for([(20.0, 500.0)], steps, family="section", changes=changes)
    series = BeatSeries(t=t, x=rr, valid=np.ones(t.size, bool), kind="rr", source="planted.tsv", column="rr")
    settings = RelateSettings(n_pseudo=500, n_share_null=300, n_surrogates=199, window_beats=(20,))
    return ev, series, settings


def test_planted_responses_are_found(planted):
    ev, series, settings = planted
    res = relate(ev, None, series, settings=settings, seed=5)
    bt = res.tables["boundary_tests"]
    ok = bt[bt["status"] == "ok"]
    assert len(ok) >= 5 and ok["significant"].astype(bool).sum() >= len(ok) - 1
    assert np.all(np.abs(ok["delta"]) > 45)  # each step is +-90 ms
    summ = res.tables["coincidence_summary"]
    loud = summ[(summ.feature_set == "short_term_lufs") & (summ.reference == "physio") &
                (summ.null_method == "iaaft")].iloc[0]
    assert loud["p_global"] < 0.05 and loud["significant"]
    curve = res.tables["coincidence_curve"]
    c = curve[(curve.feature_set == "short_term_lufs") & (curve.reference == "physio") &
              (curve.null_method == "iaaft")]
    assert c.loc[c.h >= 2.0, "rate_obs"].min() >= 0.8  # CPs within ~2 s of the loudness change


def test_deterministic_and_independent_of_workers(planted):
    ev, series, settings = planted
    from dataclasses import replace

    s = replace(settings, n_surrogates=60, n_pseudo=200, n_share_null=100)
    a = relate(ev, None, series, settings=s, seed=11)
    b = relate(ev, None, series, settings=replace(s, n_jobs=2), seed=11)
    for k in a.tables:
        pd.testing.assert_frame_equal(a.tables[k], b.tables[k])
    c = relate(ev, None, series, settings=s, seed=12)
    assert not a.tables["coincidence_curve"]["q95"].equals(c.tables["coincidence_curve"]["q95"])


def test_series_that_misses_the_music_is_refused(planted):
    ev, series, settings = planted
    late = series.shifted(300.0)
    with pytest.raises(InputError) as e:
        relate(ev, None, late, settings=settings, seed=1)
    assert "planted.tsv" in str(e.value) and "covers" in str(e.value)
