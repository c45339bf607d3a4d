"""Expressive timing: drift bounds, phrase ritardandi, fermata holds, chord spread, reproducibility."""

from __future__ import annotations

import numpy as np
import pytest

from stimkit.errors import InputError
from stimkit.render.performance import perform

from render_scores import build_score


def _local_tempo_ratio(perf, score):
    """Performed tempo / nominal tempo on each segment of the performance's timemap."""
    q = perf.timemap.x
    mid = 0.5 * (q[1:] + q[:-1])
    return score.tempo_map.slope(mid) / perf.timemap.slope(mid)


@pytest.mark.parametrize("drift", [0.1, 0.25])
def test_drift_stays_within_its_bounds(melody_score, drift):
    # the task's contract: smooth drift bounded to +-drift of the nominal tempo
    perf = perform(melody_score, seed=7, drift=drift, phrase_rit=0.0, fermata_factor=1.0)
    r = _local_tempo_ratio(perf, melody_score)
    assert r.min() >= 1 - drift - 1e-9 and r.max() <= 1 + drift + 1e-9
    # and it is really used (not a test that cannot fail): the extreme reaches the bound
    assert np.max(np.abs(r - 1)) == pytest.approx(drift, rel=0.05)


def test_drift_is_smooth(melody_score):
    # smooth = no jumps: tempo changes by under 5 % between adjacent eighth-note cells (the
    # project's bound; a rule of thumb, common practice)
    perf = perform(melody_score, seed=3, phrase_rit=0.0, fermata_factor=1.0)
    r = _local_tempo_ratio(perf, melody_score)
    assert np.max(np.abs(np.diff(r))) < 0.05


def test_no_expression_gives_the_nominal_timing(melody_score):
    perf = perform(melody_score, seed=1, drift=0.0, phrase_rit=0.0, fermata_factor=1.0,
                   jitter_s=0.0, chord_spread_s=0.0, start_s=0.5)
    q = perf.notes["score_qn"].to_numpy()
    np.testing.assert_allclose(perf.notes["onset_s"], 0.5 + melody_score.tempo_map(q), atol=1e-12)
    np.testing.assert_allclose(perf.beats["recording"], 0.5 + melody_score.tempo_map(perf.beats["score_qn"]))


def test_phrase_end_is_slower(melody_score):
    # ritardando at phrase ends (Friberg & Sundberg 1999): the last beat before the end of the
    # piece is played at (1 - phrase_rit * w) of the tempo, w -> 1 at the end
    perf = perform(melody_score, seed=1, drift=0.0, phrase_rit=0.4, fermata_factor=1.0, jitter_s=0.0)
    end = melody_score.total_qn
    nominal = melody_score.tempo_map(end) - melody_score.tempo_map(end - 1)
    played = perf.timemap(end) - perf.timemap(end - 1)
    assert played / nominal > 1.0 / (1 - 0.4 * 2 / 3)   # mean of 1/(1 - 0.4 w) over w in [2/3, 1]
    # an inner phrase end (the rest at qn 6) slows down too, but less than the end of the piece
    inner = (perf.timemap(6.0) - perf.timemap(5.0)) / (melody_score.tempo_map(6.0) - melody_score.tempo_map(5.0))
    assert 1.0 < inner < played / nominal
    # the middle of a phrase (bar 3, far from the phrase ends at qn 6 and 32) keeps the nominal tempo
    assert perf.timemap(11.0) - perf.timemap(10.0) == pytest.approx(
        melody_score.tempo_map(11.0) - melody_score.tempo_map(10.0))


def test_fermata_lengthens_the_marked_note_only():
    score = build_score([60, 62, 64, 65, 67, 69, 71, 72] * 2, [1] * 16, fermata_qn=[4.0])
    plain = perform(score, seed=5, fermata_factor=1.0)
    held = perform(score, seed=5, fermata_factor=2.0)
    ioi = lambda p, a, b: p.timemap(b) - p.timemap(a)  # noqa: E731
    # the fermata note (qn 4 -> 5) doubles; the notes before and after keep their length
    assert ioi(held, 4, 5) == pytest.approx(2 * ioi(plain, 4, 5))
    assert ioi(held, 3, 4) == pytest.approx(ioi(plain, 3, 4))
    assert ioi(held, 5, 6) == pytest.approx(ioi(plain, 5, 6))


def test_chord_spread_melody_leads():
    # melody lead (Palmer 1996): the highest chord note sounds first, the others follow within
    # chord_spread_s
    score = build_score([72, 74, 76, 77], [1, 1, 1, 1], chords={0: [60, 64, 67], 2: [55, 60]})
    perf = perform(score, seed=2, jitter_s=0.0, chord_spread_s=0.02)
    checked = 0
    for q, g in perf.notes.groupby("score_qn"):
        if len(g) > 1:
            top = g.loc[g["pitch"].idxmax(), "onset_s"]
            others = g.loc[g["pitch"] != g["pitch"].max(), "onset_s"]
            assert np.all(others > top) and np.all(others <= top + 0.02 + 1e-12)
            checked += 1
    assert checked == 2                              # the two chords built above were checked


def test_positions_stay_in_order_and_jitter_is_bounded(melody_score):
    perf = perform(melody_score, seed=11, jitter_s=0.015)
    n = perf.notes.sort_values("score_qn")
    assert np.all(np.diff(n["onset_s"].to_numpy()) > 0)
    dev = n["onset_s"].to_numpy() - perf.timemap(n["score_qn"].to_numpy())
    assert np.max(np.abs(dev)) <= 2.5 * 0.015 + 1e-12
    assert np.std(dev) > 0.005   # the jitter is present
    assert np.all(n["offset_s"] > n["onset_s"])


def test_reproducible_from_the_seed(melody_score):
    a = perform(melody_score, seed=42)
    b = perform(melody_score, seed=42)
    c = perform(melody_score, seed=43)
    np.testing.assert_array_equal(a.notes["onset_s"], b.notes["onset_s"])
    assert a.settings == b.settings
    assert np.max(np.abs(a.notes["onset_s"].to_numpy() - c.notes["onset_s"].to_numpy())) > 0.05


def test_beats_table_and_duration(melody_score):
    perf = perform(melody_score, seed=1, start_s=1.0)
    assert list(perf.beats.columns) == ["score_qn", "measure", "pass", "beat", "recording"]
    assert len(perf.beats) == len(melody_score.beat_grid())
    assert perf.beats["recording"].iloc[0] == pytest.approx(1.0)
    assert np.all(np.diff(perf.beats["recording"]) > 0)
    assert perf.duration_s > perf.notes["offset_s"].max()


def test_options_are_validated(melody_score):
    with pytest.raises(InputError):
        perform(melody_score, seed=1, drift=1.5)
    with pytest.raises(InputError):
        perform(melody_score, seed=1, fermata_factor=0.5)
