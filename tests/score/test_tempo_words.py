"""Tempo map arithmetic, the tempo-word table and the repeat rules, checked in isolation.

Durations are computed by hand from the definitions (seconds = 60 * quarters / BPM; a linear BPM
ramp integrates to 60 L ln(b1/b0) / (b1 - b0)); the word meanings are those of standard music
dictionaries (rit./rall. slower, accel. faster, "a tempo" back, "Tempo I" to the first tempo).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from stimkit.errors import InputError
from stimkit.score.repeats import BarMarks, RepeatError, performed_order
from stimkit.score.tempomap import DEFAULT_BPM, FERMATA_FACTOR, RAMP_DEPTH, build_tempo_map, ramp_seconds
from stimkit.score.words import classify_tempo_text, word_quarter_bpm


def ev(qn, kind, **kw):
    return dict(qn=qn, kind=kind, measure=1, **kw)


def test_constant_tempo_segments():
    tm, w = build_tempo_map([ev(0, "tempo", bpm=120.0), ev(8, "tempo", bpm=60.0)],
                            fermatas=[], total_qn=16)
    # 8 quarters at 120 = 4 s, then 8 at 60 = 8 s (hand computed)
    assert tm(8.0) == pytest.approx(4.0) and tm(16.0) == pytest.approx(12.0)
    assert not w


def test_ramp_to_next_absolute_mark():
    events = [ev(0, "tempo", bpm=120.0), ev(4, "ramp", direction=-1), ev(8, "tempo", bpm=60.0)]
    tm, _ = build_tempo_map(events, fermatas=[], total_qn=12)
    # rit. from 120 to the next mark (60, slower: the ramp ends on it) over 4 quarters
    expect = 2.0 + 60 * 4 * math.log(60 / 120) / (60 - 120)
    assert tm(8.0) == pytest.approx(expect, rel=1e-9)
    assert events[1]["bpm_after"] == 60.0 and events[1]["end_qn"] == 8


def test_ramp_default_depth_when_next_mark_is_not_in_its_direction():
    events = [ev(0, "tempo", bpm=100.0), ev(4, "ramp", direction=1), ev(8, "return", target="previous")]
    tm, _ = build_tempo_map(events, fermatas=[], total_qn=12)
    b1 = 100.0 * (1 + RAMP_DEPTH)  # accel. reaches +20 % (stated default) at the next mark
    # hand computed: a linear BPM ramp over L quarters lasts 60 L ln(b1/b0) / (b1 - b0) seconds
    assert tm(8.0) - tm(4.0) == pytest.approx(60 * 4 * math.log(b1 / 100.0) / (b1 - 100.0), rel=1e-9)
    assert ramp_seconds(4, 100.0, b1) == pytest.approx(60 * 4 * math.log(b1 / 100.0) / (b1 - 100.0))
    assert tm(12.0) - tm(8.0) == pytest.approx(60 * 4 / 100.0)  # a tempo: back to 100
    assert ramp_seconds(4, 100.0, 100.0) == pytest.approx(2.4)  # no change: 60 * 4 / 100


def test_relative_change_and_tempo_primo():
    events = [ev(0, "tempo", bpm=80.0), ev(4, "relative", factor=1.5), ev(8, "tempo", bpm=120.0),
              ev(12, "return", target="first")]
    tm, _ = build_tempo_map(events, fermatas=[], total_qn=16)
    assert tm(8.0) - tm(4.0) == pytest.approx(60 * 4 / 120.0)  # 80 * 1.5 = 120
    assert tm(16.0) - tm(12.0) == pytest.approx(60 * 4 / 80.0)  # Tempo I = 80


def test_default_tempo_and_fermata_factor():
    tm, w = build_tempo_map([], fermatas=[(4.0, 2.0)], total_qn=8)
    assert any("assumed" in x for x in w)
    per_q = 60 / DEFAULT_BPM
    assert tm(4.0) == pytest.approx(4 * per_q)
    assert tm(6.0) - tm(4.0) == pytest.approx(2 * per_q * FERMATA_FACTOR)
    assert tm(8.0) == pytest.approx(8 * per_q + 2 * per_q * (FERMATA_FACTOR - 1))
    # strictly monotone, invertible
    x = np.linspace(0, 8, 33)
    assert np.all(np.diff(tm(x)) > 0)
    assert np.allclose(tm.inverse()(tm(x)), x)


def test_first_mark_after_the_first_bar_is_warned():
    tm, w = build_tempo_map([ev(8, "tempo", bpm=60.0)], fermatas=[], total_qn=12,
                            first_note_qn=0.0, first_bar_end_qn=4.0)
    assert tm(8.0) == pytest.approx(8 * 60 / DEFAULT_BPM)
    assert any("first tempo mark" in x for x in w)


def test_non_positive_tempo_refused():
    with pytest.raises(InputError):
        build_tempo_map([ev(0, "tempo", bpm=0.0)], fermatas=[], total_qn=4)


@pytest.mark.parametrize("text,kind,sign", [
    ("rit.", "ramp", -1), ("rallentando", "ramp", -1), ("poco a poco accel.", "ramp", 1),
    ("stringendo", "ramp", 1), ("zurückhaltend", "ramp", -1), ("en pressant", "ramp", 1),
    ("a tempo", "return", 0), ("Tempo I", "return", 0), ("Tempo primo", "return", 0),
    ("più mosso", "relative", 1), ("meno mosso", "relative", -1), ("poco più lento", "relative", -1),
    ("Allegro", "tempo", 0), ("Langsam", "tempo", 0), ("Très lent", "tempo", 0), ("Moderately", "tempo", 0),
])
def test_word_classes(text, kind, sign):
    w = classify_tempo_text(text)
    assert w is not None and w.kind == kind
    if kind == "ramp":
        assert w.direction == sign
    if kind == "relative":
        assert (w.factor - 1) * sign > 0


def test_word_ordering_and_non_tempo_text():
    bpm = {t: classify_tempo_text(t).bpm for t in ("Largo", "Adagio", "Andante", "Moderato", "Allegro", "Presto")}
    # the conventional order of Italian tempo words, slowest to fastest (music dictionaries)
    assert list(bpm.values()) == sorted(bpm.values())
    assert classify_tempo_text("dolce") is None and classify_tempo_text("cresc.") is None
    assert classify_tempo_text("Allegro molto").bpm > classify_tempo_text("Allegro").bpm
    assert word_quarter_bpm(132, beat_qn=1.0) == 132
    assert word_quarter_bpm(132, beat_qn=1.5) == pytest.approx(132)  # 6/8: dotted quarter at 88


def test_repeat_times_and_voltas_one_two():
    b = [BarMarks() for _ in range(4)]
    b[0].repeat_start, b[1].repeat_end, b[1].times = True, True, 3
    # |: 1 2 :| x3 then 3 4
    assert performed_order(b) == [0, 1, 0, 1, 0, 1, 2, 3]
    c = [BarMarks() for _ in range(4)]
    c[1].voltas, c[1].repeat_end = (1, 2), True
    c[2].voltas = (3,)
    # 1 [1.,2. 2 :| [3. 3 | 4: endings "1, 2" play twice, so the section plays three times
    assert performed_order(c) == [0, 1, 0, 1, 0, 2, 3]


def test_repeat_errors():
    b = [BarMarks() for _ in range(3)]
    b[2].jump, b[2].jump_to = "dc", "coda"
    with pytest.raises(RepeatError):
        performed_order(b)
