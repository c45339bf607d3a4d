"""Event table assembly on synthetic inputs: times through the alignment map and the clock.

The expected values follow from the definitions in DESIGN.md (four kinds of time) and the clock
formula of REFERENCES.md (onset = a + b * recording); every number below is computed in the test
from those definitions, not taken from the code.
"""

import numpy as np
import pandas as pd
import pytest

from stimkit.levels import EVENT_COLUMNS
from stimkit.score.model import ScoreModel
from stimkit.timemap import TimeMap
from stimkit.timeline.clock import fit_clock, identity_clock
from stimkit.timeline.events import beat_table, merge_events, piece_events, silence_events, sync_events


@pytest.fixture()
def score():
    # two bars of 4/4 after a one-beat pickup; notes from the pickup on
    measures = pd.DataFrame({
        "measure": [0, 1, 2], "pass": [1, 1, 1], "score_qn": [0.0, 1.0, 5.0],
        "duration_qn": [1.0, 4.0, 4.0], "numerator": [4, 4, 4], "denominator": [4, 4, 4],
        "beat_qn": [1.0, 1.0, 1.0], "first_beat": [4, 1, 1],
    })
    notes = pd.DataFrame({
        "score_qn": [0.0, 1.0, 3.0, 5.0, 7.0], "duration_qn": [1.0, 2.0, 2.0, 2.0, 2.0],
        "pitch": [60, 62, 64, 65, 67], "velocity": [64] * 5, "part": ["P1"] * 5,
        "measure": [0, 1, 1, 2, 2], "pass": [1] * 5, "beat": [4.0, 1.0, 3.0, 1.0, 3.0],
    })
    bounds = pd.DataFrame({
        "trial_type": ["piece", "dynamic", "hairpin", "key"], "label": ["x", "p", "crescendo", "G major"],
        "score_qn": [0.0, 1.0, 3.0, 5.0], "measure": [0, 1, 1, 2], "pass": [1] * 4, "beat": [4.0, 1.0, 3.0, 1.0],
        "part": ["all", "P1", "P1", "all"], "value": [np.nan] * 4, "detail": [""] * 4,
        "end_qn": [9.0, np.nan, 5.0, np.nan],
    })
    return ScoreModel(name="s", path=None, notes=notes, measures=measures, boundaries=bounds,
                      tempo_map=TimeMap([0, 9], [0, 4.5], src="score_qn", dst="nominal"))


def test_piece_and_boundaries_on_the_recorder_clock(score):
    align = TimeMap([0, 9], [20.0, 26.3], src="score_qn", dst="recording")  # 0.7 s per quarter
    clock = fit_clock([0.0, 100.0], [5.0, 105.004])  # 40 ppm fast, 5 s offset
    ev = piece_events(score, piece="s", to_recording=align, clock=clock, confidence=lambda q: np.full(len(q), 0.8))
    assert list(ev.columns) == EVENT_COLUMNS
    # the score's own "piece" marking is replaced by one row at the first note
    assert (ev.trial_type == "piece").sum() == 1
    piece = ev[ev.trial_type == "piece"].iloc[0]
    b = 1 + 40e-6
    assert piece.recording == pytest.approx(20.0)
    assert piece.onset == pytest.approx(5.0 + b * 20.0, abs=1e-9)
    # last note ends at qn 9 -> recording 26.3; duration is measured on the recorder clock
    assert piece.duration == pytest.approx(b * 6.3, abs=1e-9)
    assert piece.measure == 0 and piece.beat == 4  # pickup beat 4
    hp = ev[ev.trial_type == "hairpin"].iloc[0]
    assert hp.recording == pytest.approx(20.0 + 3 * 0.7)
    assert hp.duration == pytest.approx(b * 2 * 0.7, abs=1e-9)  # end_qn 5
    assert hp.nominal == pytest.approx(1.5)   # tempo map: 0.5 s per quarter
    assert ev[ev.trial_type == "key"].duration.iloc[0] == 0
    assert set(ev.source) == {"alignment"} and np.allclose(ev.confidence, 0.8)


def test_merge_sorts_and_keeps_missing_values(score):
    clock = identity_clock()
    align = TimeMap([0, 9], [2.0, 11.0], src="score_qn", dst="recording")
    parts = [
        sync_events([0.5, 30.0], clock=clock),
        piece_events(score, piece="s", to_recording=align, clock=clock),
        silence_events(pd.DataFrame({"start_s": [0.0, 12.0], "end_s": [2.0, 14.5]}), clock=clock),
    ]
    ev = merge_events(parts)
    assert list(ev.columns) == EVENT_COLUMNS
    assert np.all(np.diff(ev.onset.to_numpy()) >= 0)
    # at one onset the piece row comes before the markings (TRIAL_TYPES order)
    at2 = ev[ev.onset == 2.0].trial_type.tolist()
    assert at2[0] == "piece"
    sil = ev[ev.trial_type == "silence"]
    assert sil.duration.tolist() == [2.0, 2.5] and sil.score_qn.isna().all()
    assert ev[ev.trial_type == "sync"].source.tolist() == ["sync", "sync"]
    # the same rows in another order give the same table
    again = merge_events(parts[::-1])
    pd.testing.assert_frame_equal(ev, again)


def test_beat_table_counts_every_beat(score):
    align = TimeMap([0, 9], [2.0, 11.0], src="score_qn", dst="recording")
    bt = beat_table(score, piece="s", to_recording=align, clock=identity_clock())
    assert len(bt) == 1 + 4 + 4  # pickup beat + two 4/4 bars
    assert bt.is_downbeat.sum() == 2  # beat 1 of each full bar; a pickup has no downbeat
    np.testing.assert_allclose(bt.onset, 2.0 + bt.score_qn)


def test_held_last_note_is_not_cut_short(score):
    # the notated tempo map holds the last note (qn 7..9) twice as long as its written value,
    # while the alignment map just runs on at the performed tempo: the piece must last at
    # least the notated hold scaled by the performed/notated ratio of the last 4 quarters
    score.tempo_map = TimeMap([0, 7, 9], [0, 3.5, 5.5], src="score_qn", dst="nominal")
    align = TimeMap([0, 9], [10.0, 16.3], src="score_qn", dst="recording")  # 0.7 s per quarter
    ev = piece_events(score, piece="s", to_recording=align, clock=identity_clock())
    piece = ev[ev.trial_type == "piece"].iloc[0]
    ratio = (0.7 * 4) / (0.5 * 4)               # performed / notated seconds over qn 3..7
    end = 10.0 + 7 * 0.7 + (5.5 - 3.5) * ratio  # last onset + notated hold * ratio
    assert piece.onset + piece.duration == pytest.approx(end)
    # before the last onset the alignment map is used as it is
    hp = ev[ev.trial_type == "hairpin"].iloc[0]
    assert hp.recording == pytest.approx(10.0 + 3 * 0.7)


def test_pass_dynamic_level_and_end_of_bar_markings(score):
    # a final bar line at the end of bar 2 (qn 9) is written by the score at "beat 5" of the 4/4
    # bar, a beat no player counts: the events table keeps bar 2 and gives no beat, while its time
    # is the bar's end. The dynamic keeps its number (p = 4 on the pppp = 1 ... ffff = 10 scale)
    extra = pd.DataFrame({
        "trial_type": ["section", "dynamic"], "label": ["final bar", "f"], "score_qn": [9.0, 5.0],
        "measure": [2, 2], "pass": [1, 2], "beat": [5.0, 1.0], "part": ["all", "P1"],
        "value": [np.nan, 7.0], "detail": ["", ""], "end_qn": [np.nan, np.nan],
    })
    score.boundaries.loc[score.boundaries.trial_type == "dynamic", "value"] = 4.0
    score.boundaries = pd.concat([score.boundaries, extra], ignore_index=True)
    align = TimeMap([0, 9], [2.0, 11.0], src="score_qn", dst="recording")
    ev = piece_events(score, piece="s", to_recording=align, clock=identity_clock())
    fin = ev[ev.label == "final bar"].iloc[0]
    assert fin.measure == 2 and np.isnan(fin.beat) and fin.recording == pytest.approx(11.0)
    dyn = ev[ev.trial_type == "dynamic"].sort_values("score_qn")
    assert dyn.dynamic_level.tolist() == [4.0, 7.0] and dyn["pass"].tolist() == [1, 2]
    assert ev[ev.trial_type == "key"].dynamic_level.isna().all()


def test_report_and_tsv_show_the_same_merged_rows(tmp_path):
    # two parts marked differently at one moment: one row (HED), each label with its part, the
    # dynamic level n/a (they disagree), confidence with three decimals
    from stimkit.export.bids import events_for_writing, write_events
    from stimkit.export.tables import OutputSet
    ev = pd.DataFrame({"onset": [1.0, 1.0, 2.0], "duration": [0.0] * 3,
                       "trial_type": ["dynamic", "dynamic", "dynamic"], "label": ["p", "mf", "f"],
                       "dynamic_level": [4.0, 6.0, 7.0], "part": ["Violin", "Cello", "all"],
                       "confidence": [0.91234, 1.0, 0.5]})
    shown = events_for_writing(ev)
    assert shown.label.tolist() == ["mf (Cello) + p (Violin)", "f"]   # rows sorted by label
    assert pd.isna(shown.dynamic_level.iloc[0]) and shown.dynamic_level.iloc[1] == 7
    with OutputSet(tmp_path) as outs:
        write_events(outs, "x", ev)
    tsv = pd.read_csv(tmp_path / "x_events.tsv", sep="\t", na_values="n/a", keep_default_na=False, dtype=str)
    assert tsv.label.tolist() == shown.label.tolist()
    assert tsv.confidence.tolist() == ["0.912", "0.500"]   # one format: three decimals
