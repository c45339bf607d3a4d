"""Boundary / change-point coincidence against circular-shift chance."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stimkit.stats.coincidence import boundary_coincidence, count_hits


def test_count_hits_by_hand():
    # boundaries at 10, 20, 30; changes at 10.8 (hit), 21.5 (miss at 1 s), 29.0 (hit, edge)
    assert count_hits(np.array([10.0, 20.0, 30.0]), np.array([21.5, 10.8, 29.0]), tolerance_s=1.0) == 2


@pytest.fixture(scope="module")
def boundaries():
    rng = np.random.default_rng(11)
    return np.sort(rng.uniform(0.0, 600.0, 20))


def test_aligned_change_points_give_small_p(boundaries):
    rng = np.random.default_rng(12)
    changes = boundaries + rng.normal(0.0, 0.3, boundaries.size)
    r = boundary_coincidence(boundaries, changes, tolerance_s=1.0, n_shifts=999, seed=0)
    assert r["observed_hits"] >= 18
    # Phipson & Smyth 2010: smallest attainable p is 1 / (n + 1)
    assert r["p_value"] <= 0.01 and r["p_value"] >= 1.0 / 1000


def test_unrelated_change_points_give_large_p(boundaries):
    # a property under the null: for unrelated points p is uniform, so with this fixed seed
    # the test fails only if the permutation null were biased (or in 5 % of draws).
    rng = np.random.default_rng(13)
    changes = rng.uniform(0.0, 600.0, 20)
    r = boundary_coincidence(boundaries, changes, tolerance_s=1.0, n_shifts=999, seed=0)
    assert r["p_value"] > 0.05


def test_chance_level_matches_probability(boundaries):
    # Under random rotation each change point lands anywhere in the piece: a boundary has no
    # change within +-tol with probability (1 - 2 tol / L)^n_changes (elementary probability;
    # approximate because the rotated points are not independent).
    rng = np.random.default_rng(14)
    changes = np.sort(rng.uniform(0.0, 600.0, 30))
    spans = pd.DataFrame({"start": [0.0], "end": [600.0]})
    r = boundary_coincidence(boundaries, changes, spans=spans, tolerance_s=2.0, n_shifts=2000, seed=1)
    expected = boundaries.size * (1 - (1 - 4.0 / 600.0) ** changes.size)
    assert r["expected_hits"] == pytest.approx(expected, rel=0.15)


def test_same_seed_same_result_and_shifts_stay_in_pieces(boundaries):
    spans = pd.DataFrame({"start": [0.0, 300.0], "end": [300.0, 600.0]})
    a = boundary_coincidence(boundaries, boundaries + 0.2, spans=spans, seed=3)
    b = boundary_coincidence(boundaries, boundaries + 0.2, spans=spans, seed=3)
    assert a == b
    assert a["n_changes"] == boundaries.size
    # shifts stay in their piece: boundaries only in the first piece (10-290 s) and change points
    # only in the second (310-590 s) can never meet within 1 s when each change is rotated inside
    # 300-600 s, so chance is exactly zero; rotated over one 0-600 s span they do meet
    rng = np.random.default_rng(21)
    early = np.sort(rng.uniform(10.0, 290.0, 20))
    late = np.sort(rng.uniform(310.0, 590.0, 20))
    kept = boundary_coincidence(early, late, spans=spans, tolerance_s=1.0, n_shifts=499, seed=4)
    assert kept["observed_hits"] == 0 and kept["expected_hits"] == 0.0
    one = pd.DataFrame({"start": [0.0], "end": [600.0]})
    mixed = boundary_coincidence(early, late, spans=one, tolerance_s=1.0, n_shifts=499, seed=4)
    assert mixed["expected_hits"] > 0.5  # elementary probability: ~20 * (1 - (1 - 2/600)^20) = 1.3


def test_score_boundary_times_skip_detected_kinds():
    from stimkit.stats.coincidence import score_boundary_times

    ev = pd.DataFrame({"recording": [0.0, 5.0, 5.0, 9.0, 12.0, np.nan, 20.0],
                       "trial_type": ["piece", "dynamic", "key", "feature_change", "silence", "tempo", "sync"]})
    assert score_boundary_times(ev).tolist() == [5.0]  # distinct times of score markings only
    assert score_boundary_times(ev, kinds=["feature_change"]).tolist() == [9.0]
