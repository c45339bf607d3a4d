"""The repeat plan: the longest performed order and the performer's options.

The notation rules are the conventions taught in notation handbooks (common practice): a repeat
sign plays its section twice, first/second endings replace the section's end on the second
pass, D.C./D.S. go back and (by convention) take no repeat after the jump; the plan adds the
choices a performer has -- leave a repeat out, take it after a jump -- which the jump-aware
alignment (Fremerey, Müller & Clausen 2010) decides from the recording.
"""

from __future__ import annotations

import sys
from pathlib import Path

import music21
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from xmlfix import attributes, barline, measure, note, score, words, write  # noqa: E402

from stimkit.score.parse import load_score, score_for_choice  # noqa: E402
from stimkit.score.repeats import BarMarks, RepeatError, performed_order, repeat_plan  # noqa: E402

A44 = attributes(beats=4, beat_type=4, fifths=0)


def whole(i, pre="", post="", step="C"):
    return measure(i, pre + note(step, 5, 4) + post)


def _bars(n):
    return [BarMarks() for _ in range(n)]


def test_plain_repeat_options():
    b = _bars(3)
    b[0].repeat_start, b[1].repeat_end = True, True
    plan = repeat_plan(b)
    assert plan.order == [0, 1, 0, 1, 2]                  # |: 1 2 :| 3, every repeat taken
    assert [(o.kind, o.start, o.stop, o.conventional) for o in plan.options] == [("repeat", 2, 4, True)]
    assert plan.order_for("all") == [0, 1, 0, 1, 2]
    assert plan.order_for("none") == [0, 1, 2]
    assert plan.order_for({0: False}) == [0, 1, 2]


def test_three_times_gives_two_nested_options():
    b = _bars(3)
    b[0].repeat_start, b[1].repeat_end, b[1].times = True, True, 3
    plan = repeat_plan(b)
    assert plan.order == [0, 1, 0, 1, 0, 1, 2]
    # leave out the third pass only, or the second and third
    assert sorted(plan.order_for(c) for c in ({0: True, 1: False}, {0: False, 1: True})) == \
        [[0, 1, 0, 1, 2], [0, 1, 2]]


def test_endings_skipped_go_to_the_last_ending():
    b = _bars(4)
    b[0].repeat_start = True
    b[1].voltas, b[1].repeat_end = (1,), True
    b[2].voltas = (2,)
    plan = repeat_plan(b)
    assert plan.order == [0, 1, 0, 2, 3]
    assert plan.order_for("none") == [0, 2, 3]            # a performer who skips plays the 2nd ending


def test_repeats_after_da_capo_are_options_not_taken_by_convention():
    # |: 1 :| 2 D.C. (no Fine: to the end again) -- after the jump the repeat is not taken
    # (convention), but may be
    b = _bars(2)
    b[0].repeat_start, b[0].repeat_end = True, True
    b[1].jump = "dc"
    plan = repeat_plan(b)
    assert plan.order_for("all") == [0, 0, 1, 0, 1]
    assert plan.order_for("max") == [0, 0, 1, 0, 0, 1]
    kinds = {(o.kind, o.after_jump, o.conventional) for o in plan.options}
    assert kinds == {("repeat", False, True), ("dc", False, True), ("repeat", True, False)}
    no_dc = {o.id: o.kind != "dc" for o in plan.options}
    assert plan.order_for(no_dc) == [0, 0, 1]              # D.C. not taken: the piece ends at bar 2


def test_end_repeat_without_start_goes_back_to_the_double_bar_and_says_so():
    b = _bars(4)
    b[1].double_bar = True
    b[3].repeat_end = True
    plan = repeat_plan(b, labels=["1", "2", "3", "4"])
    assert plan.order == [0, 1, 2, 3, 2, 3]                # players repeat from after the double bar
    assert any("bar 4" in w and "bar 3" in w for w in plan.warnings)


def test_conventional_order_matches_performed_order_and_errors_stay():
    b = _bars(3)
    b[2].jump, b[2].jump_to = "dc", "coda"
    with pytest.raises(RepeatError):
        repeat_plan(b)
    c = _bars(4)
    c[1].voltas, c[1].repeat_end = (1, 2), True
    c[2].voltas = (3,)
    # endings "1, 2" play twice, so the section plays three times (notation convention)
    assert performed_order(c) == [0, 1, 0, 1, 0, 2, 3]


def test_score_for_choice_rebuilds_the_model(tmp_path):
    ms = [whole(1, A44 + barline("left", repeat="forward")), whole(2, words("Fine")),
          whole(3, barline("left", ending=("1", "start")),
                barline("right", "light-heavy", repeat="backward", ending=("1", "stop"))),
          whole(4, barline("left", ending=("2", "start")), barline("right", ending=("2", "discontinue"))),
          whole(5, "", words("D.C. al Fine"))]
    path = write(tmp_path, "rep.musicxml", score([("P", ms)]))
    m = load_score(path)
    none = score_for_choice(m, "none")
    # no repeat: 1 2 [2nd ending] 4 5, D.C. back to 1 2 (Fine)
    assert list(zip(none.measures["measure"], none.measures["pass"])) == \
        [(1, 1), (2, 1), (4, 1), (5, 1), (1, 2), (2, 2)]
    assert load_score(path, repeats="none").measures["measure"].tolist() == none.measures["measure"].tolist()
    assert none.total_qn == pytest.approx(6 * 4.0)
    assert m.total_qn == pytest.approx(9 * 4.0)


def test_corpus_piece_with_da_capo_and_endings():
    # music21 corpus, used in place: a quartet scherzo with first/second endings and a D.C.
    m = load_score(music21.corpus.getWork("beethoven/opus59no2/movement3.mxl"))
    kinds = [o.kind for o in m.repeat_plan.options]
    assert kinds.count("dc") == 1 and kinds.count("volta") >= 2
    after = [o for o in m.repeat_plan.options if o.after_jump]
    assert after and not any(o.conventional for o in after)   # no repeats after the D.C. by convention
    assert score_for_choice(m, "max").total_qn > m.total_qn > score_for_choice(m, "none").total_qn
