"""Boundaries, notes and performed order on small hand-written MusicXML fixtures.

Each fixture is written out in the test (see ``xmlfix.py``); the expected values follow from the
MusicXML 4.0 specification (element meanings) and the notation conventions named beside each
assertion. Pitfalls of music21 10.5.1 listed in the project's reference notes are covered:
``<other-dynamics>``, pickup bars, per-part marks, wedge ends, meter change on a bar, repeats.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))
from xmlfix import (attributes, bars_of, barline, direction, dyn, measure, metronome, note,  # noqa: E402
                    rest, score, words, write)

from stimkit.levels import TRIAL_TYPES  # noqa: E402
from stimkit.score.markings import BOUNDARY_TABLE_COLUMNS  # noqa: E402
from stimkit.score.parse import load_score  # noqa: E402

A44 = attributes(beats=4, beat_type=4, fifths=0)


def whole(i, pre="", post="", step="C"):
    return measure(i, pre + note(step, 5, 4) + post)


def rows(model, trial_type):
    b = model.boundaries
    return b[b["trial_type"] == trial_type].reset_index(drop=True)


def order(model):
    return list(zip(model.measures["measure"], model.measures["pass"]))


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    """A one-part piece with a pickup, other-dynamics sfz, a wedge, a dotted-quarter metronome,
    a tie, rit. / a tempo, a fermata and a final bar."""
    tmp = tmp_path_factory.mktemp("mixed")
    ms = [measure(0, attributes(beats=3, beat_type=4, fifths=2, mode="major")
                  + metronome("quarter", 60, dotted=True, text="Allegro")
                  + direction("<dynamics><other-dynamics>sfz</other-dynamics></dynamics>")
                  + note("D", 5, 1), implicit=True),
          measure(1, direction('<wedge type="crescendo"/>') + note("E", 5, 1) + note("F", 5, 1, alter=1)
                  + direction('<wedge type="stop"/>') + note("G", 5, 1)),
          measure(2, dyn("ff") + note("A", 5, 2, tie="start") + note("A", 5, 1, tie="stop")),
          measure(3, words("rit.") + note("A", 5, 3)),
          measure(4, words("a tempo") + note("A", 5, 2, fermata=True) + rest(1)
                  + barline("right", "light-heavy"))]
    return load_score(write(tmp, "mixed.musicxml", score([("Flute", ms)])))


def test_columns_and_levels(mixed):
    b = mixed.boundaries
    assert list(b.columns) == BOUNDARY_TABLE_COLUMNS
    assert set(b["trial_type"]) <= set(TRIAL_TYPES)  # the shared vocabulary (stimkit.levels)
    assert list(b["score_qn"]) == sorted(b["score_qn"])


def test_pickup_bar(mixed):
    m = mixed.measures
    # MusicXML: <measure number="0" implicit="yes"> of one quarter in 3/4 is a pickup on beat 3
    assert int(m["measure"].iloc[0]) == 0
    assert m["first_beat"].iloc[0] == pytest.approx(3.0)
    assert mixed.notes["beat"].iloc[0] == pytest.approx(3.0)
    assert mixed.qn_at(1, 1.0) == pytest.approx(1.0)  # bar 1 starts after the 1-quarter pickup


def test_other_dynamics_text_kept(mixed):
    # <other-dynamics>sfz</other-dynamics> (MusicXML 4.0) must come back as the accent "sfz"
    acc = rows(mixed, "accent")
    assert list(acc["label"]) == ["sfz"]
    assert acc["score_qn"].iloc[0] == pytest.approx(0.0)


def test_dotted_quarter_metronome(mixed):
    t = rows(mixed, "tempo")
    # dotted quarter = 60 is 60 * 1.5 = 90 quarter notes per minute (definition of the referent)
    assert t["value"].iloc[0] == pytest.approx(90.0)
    assert "dotted quarter = 60" in t["label"].iloc[0]
    assert "Allegro" in t["label"].iloc[0]


def test_wedge_end_includes_last_note(mixed):
    h = rows(mixed, "hairpin")
    # wedge from the E (qn 1) to the stop before G: spans E and F# -> ends at qn 3 (music21's
    # getLast() is the F# *start*, qn 2; its duration must be added)
    assert h["score_qn"].iloc[0] == pytest.approx(1.0)
    assert h["end_qn"].iloc[0] == pytest.approx(3.0)
    assert h["value"].iloc[0] == 1


def test_tie_merged(mixed):
    n = mixed.notes
    a = n[(n["pitch"] == 81) & (n["measure"] == 2)]
    # tied half + quarter A5 is one sounding note of 3 quarters (MusicXML <tie>)
    assert len(a) == 1 and a["duration_qn"].iloc[0] == pytest.approx(3.0)


def test_velocity_follows_dynamics(mixed):
    n = mixed.notes.set_index("score_qn")
    # ff in force at bar 2 is louder than the mf default at bar 1 (ordering of dynamic levels)
    assert n.loc[4.0, "velocity"] > n.loc[1.0, "velocity"]
    # sfz accent raises the accented pickup note above the default level
    assert n.loc[0.0, "velocity"] > n.loc[1.0, "velocity"]


def test_rit_ramp_and_a_tempo(mixed):
    tc = rows(mixed, "tempo_change")
    assert list(tc["label"]) == ["rit.", "a tempo"]
    # rit. ramps from 90 over bar 3 (3 qn) to 90 * (1 - RAMP_DEPTH) (the stated default depth):
    # seconds = 60 * 3 * ln(b1/90) / (b1 - 90) (integral of 60/bpm over a linear ramp), by hand
    from stimkit.score.tempomap import RAMP_DEPTH

    b1 = 90 * (1 - RAMP_DEPTH)
    assert b1 < 90                                   # rit. means slower (music dictionaries)
    expect = 60 * 3 * np.log(b1 / 90) / (b1 - 90)
    tm = mixed.tempo_map
    assert tm(10.0) - tm(7.0) == pytest.approx(expect, rel=1e-3)
    assert tc["value"].iloc[1] == pytest.approx(90.0)  # a tempo: back to the last absolute tempo


def test_fermata_hold(mixed):
    f = rows(mixed, "fermata")
    assert len(f) == 1 and f["score_qn"].iloc[0] == pytest.approx(10.0)
    tm = mixed.tempo_map
    # half note at quarter = 90 is 2 * 60 / 90 = 4/3 s; held by the stated FERMATA_FACTOR
    # (hand computed from the definition)
    from stimkit.score.tempomap import FERMATA_FACTOR

    assert FERMATA_FACTOR > 1                        # a fermata lengthens (notation convention)
    assert tm(12.0) - tm(10.0) == pytest.approx(FERMATA_FACTOR * 2 * 60 / 90, rel=1e-6)


def test_key_meter_final_bar(mixed):
    k = rows(mixed, "key")
    assert list(k["label"]) == ["D major"] and k["value"].iloc[0] == 2  # <fifths>2</fifths> + mode
    assert list(rows(mixed, "meter")["label"]) == ["3/4"]
    s = rows(mixed, "section")
    assert "final bar" in list(s["label"])  # <bar-style>light-heavy</bar-style>


def test_tempo_map_hand_computed(tmp_path):
    # 32 bars of 3/4 at quarter = 96: 96 quarters at 96 per minute = 60 s (hand computed)
    ms = bars_of(32, first_attrs=attributes(beats=3, beat_type=4, fifths=0) + metronome("quarter", 96),
                 per_bar=3)
    m = load_score(write(tmp_path, "t.musicxml", score([("P", ms)])))
    assert m.nominal_duration_s == pytest.approx(60.0, abs=1e-9)
    assert m.total_qn == pytest.approx(96.0)
    inv = m.tempo_map.inverse()
    assert inv(30.0) == pytest.approx(48.0)  # invertible: half the time is half the quarters


def test_six_eight_and_half_note_referents(tmp_path):
    # 8 bars of 6/8 at dotted quarter = 60: 8 * 2 beats at 60 per minute = 16 s (hand computed)
    ms = bars_of(8, first_attrs=attributes(beats=6, beat_type=8, fifths=0)
                 + metronome("quarter", 60, dotted=True), note_q=1.5, per_bar=2)
    m = load_score(write(tmp_path, "t68.musicxml", score([("P", ms)])))
    assert m.nominal_duration_s == pytest.approx(16.0)
    assert m.measures["beat_qn"].iloc[0] == pytest.approx(1.5)  # music21 beat of 6/8 = dotted quarter
    # half = 60 in 2/2: 4 bars = 8 half notes = 8 s
    ms = bars_of(4, first_attrs=attributes(beats=2, beat_type=2, fifths=0) + metronome("half", 60),
                 note_q=2, per_bar=2)
    m = load_score(write(tmp_path, "t22.musicxml", score([("P", ms)])))
    assert m.nominal_duration_s == pytest.approx(8.0)


def test_meter_change_on_its_bar(tmp_path):
    # 2 bars 4/4 then 2 bars 3/4: the meter row sits on bar 3 and bar 3 lasts 3 quarters
    ms = [whole(1, A44), whole(2),
          measure(3, attributes(beats=3, beat_type=4, divisions=False) + note("C", 5, 3)),
          measure(4, note("C", 5, 3))]
    m = load_score(write(tmp_path, "mc.musicxml", score([("P", ms)])))
    met = rows(m, "meter")
    assert list(met["label"]) == ["4/4", "3/4"]
    assert int(met["measure"].iloc[1]) == 3
    assert m.measures["duration_qn"].tolist() == [4.0, 4.0, 3.0, 3.0]
    assert m.measures["numerator"].tolist() == [4, 4, 3, 3]


def test_same_dynamic_in_two_parts_is_one_row_and_conflicts_warned(tmp_path):
    p1 = [whole(1, A44 + dyn("p") + metronome("quarter", 100)), whole(2, dyn("f"))]
    p2 = [whole(1, A44 + dyn("p") + metronome("quarter", 80)), whole(2)]
    m = load_score(write(tmp_path, "two.musicxml", score([("Oboe", p1), ("Horn", p2)])))
    d = rows(m, "dynamic")
    assert list(d["label"]) == ["p", "f"]
    assert d["part"].tolist() == ["all", "Oboe"]  # p in both parts -> one row, part 'all'
    # 100 vs 80 at the same place: said in plain words with the one used
    assert any("tempo marks disagree" in w and "100" in w and "80" in w for w in m.warnings)


def test_tempo_mark_in_one_part_only_is_warned(tmp_path):
    p1 = [whole(1, A44 + metronome("quarter", 100)), whole(2)]
    p2 = [whole(1, A44), whole(2)]
    m = load_score(write(tmp_path, "one.musicxml", score([("Oboe", p1), ("Horn", p2)])))
    assert rows(m, "tempo")["value"].tolist() == [100.0]
    assert any("one part only" in w for w in m.warnings)


def test_repeat_volta_and_da_capo_al_fine(tmp_path):
    ms = [whole(1, A44 + barline("left", repeat="forward")), whole(2, words("Fine")),
          whole(3, barline("left", ending=("1", "start")),
                barline("right", "light-heavy", repeat="backward", ending=("1", "stop"))),
          whole(4, barline("left", ending=("2", "start")), barline("right", ending=("2", "discontinue"))),
          whole(5, "", words("D.C. al Fine"))]
    path = write(tmp_path, "rep.musicxml", score([("P", ms)]))
    m = load_score(path)
    # notation convention: |: 1 2 [1. 3 :| [2. 4 | 5 D.C. al Fine -> 1 2 3 1 2 4 5 1 2 (Fine)
    assert order(m) == [(1, 1), (2, 1), (3, 1), (1, 2), (2, 2), (4, 1), (5, 1), (1, 3), (2, 3)]
    assert m.qn_at(1, 1.0, pass_=2) == pytest.approx(12.0)
    assert len(m.notes) == 9
    printed = load_score(path, expand_repeats=False)
    assert order(printed) == [(1, 1), (2, 1), (3, 1), (4, 1), (5, 1)]
    labels = set(rows(m, "section")["label"])
    assert {"repeat start", "repeat end", "Fine", "D.C. al Fine"} <= labels


def test_dal_segno_al_coda(tmp_path):
    ms = [whole(1, A44), whole(2, direction("<segno/>")), whole(3, words("To Coda")), whole(4),
          whole(5, "", words("D.S. al Coda")), whole(6, direction("<coda/>"))]
    m = load_score(write(tmp_path, "ds.musicxml", score([("P", ms)])))
    # convention: D.S. back to the segno (bar 2), at "To Coda" (bar 3) jump to the coda (bar 6)
    assert order(m) == [(1, 1), (2, 1), (3, 1), (4, 1), (5, 1), (2, 2), (3, 2), (6, 1)]


def test_ambiguous_repeats_fall_back_with_warning(tmp_path):
    ms = [whole(1, A44), whole(2), whole(3, "", words("D.S. al Fine")), whole(4)]
    m = load_score(write(tmp_path, "bad.musicxml", score([("P", ms)])))
    assert order(m) == [(1, 1), (2, 1), (3, 1), (4, 1)]
    assert any("repeats not expanded" in w for w in m.warnings)


def test_general_pause_and_fermata_rest(tmp_path):
    ms = [whole(1, A44 + metronome("quarter", 60)), measure(2, rest(4, measure=True)), whole(3),
          measure(4, note("C", 5, 2) + rest(2, fermata=True)), whole(5)]
    m = load_score(write(tmp_path, "gp.musicxml", score([("P", ms)])))
    p = rows(m, "pause")
    # bar 2 silent in every part (>= one bar) -> general pause; the fermata rest in bar 4 too
    assert p["score_qn"].tolist() == [4.0, 14.0]
    assert p["end_qn"].tolist() == [8.0, 16.0]
    assert p["label"].tolist() == ["general pause", "general pause (fermata)"]


def test_rehearsal_double_bar_key_change_with_mode(tmp_path):
    ms = [whole(1, attributes(beats=4, beat_type=4, fifths=-3, mode="minor")
                + direction("<rehearsal>A</rehearsal>"), barline("right", "light-light")),
          whole(2, attributes(fifths=1, divisions=False) + direction("<rehearsal>B</rehearsal>")), whole(3)]
    m = load_score(write(tmp_path, "rk.musicxml", score([("P", ms)])))
    k = rows(m, "key")
    assert k["label"].tolist() == ["C minor", "1 sharp (G major / E minor)"]  # 3 flats + minor = c
    assert int(k["measure"].iloc[1]) == 2
    s = rows(m, "section")
    assert ["rehearsal mark A", "double bar", "rehearsal mark B"] == s["label"].tolist()
    db = s[s["label"] == "double bar"].iloc[0]
    assert int(db["measure"]) == 1 and db["score_qn"] == pytest.approx(4.0)  # end of bar 1


def test_tempo_words_relative_and_tempo_primo(tmp_path):
    ms = [whole(1, A44 + words("Andante")), whole(2, words("più mosso")),
          whole(3, words("Tempo I")), whole(4, words("poco più lento"))]
    m = load_score(write(tmp_path, "w.musicxml", score([("P", ms)])))
    t = m.boundaries[m.boundaries["trial_type"].isin(["tempo", "tempo_change"])]
    v = t["value"].to_numpy()
    # the project's word table gives Andante; it lies in the usual metronome range of Andante,
    # about 76-108 quarters per minute (common practice, value from memory); più mosso faster;
    # Tempo I back to it; poco più lento is a relative slowing (not the absolute "Lento",
    # music21's TempoText pitfall)
    from stimkit.score.words import classify_tempo_text

    assert v[0] == pytest.approx(classify_tempo_text("Andante").bpm)
    assert 76.0 <= v[0] <= 108.0
    assert v[1] > v[0]
    assert v[2] == pytest.approx(v[0])
    assert v[0] * 0.8 < v[3] < v[0]
    assert t["trial_type"].tolist() == ["tempo", "tempo_change", "tempo_change", "tempo_change"]


def test_hairpin_words_and_grace_notes(tmp_path):
    ms = [measure(1, A44 + words("cresc.") + note("D", 5, grace=True) + note("C", 5, 4)),
          whole(2, dyn("f"))]
    m = load_score(write(tmp_path, "cr.musicxml", score([("P", ms)])))
    h = rows(m, "hairpin")
    assert h["label"].tolist() == ["crescendo"] and h["end_qn"].iloc[0] == pytest.approx(4.0)
    assert (m.notes["duration_qn"] > 0).all()  # grace notes get a small positive length
    assert len(m.notes) == 3


def test_midi_file_markings_and_velocities(tmp_path):
    from music21 import key, meter, note, stream, tempo

    s, p = stream.Score(), stream.Part()
    p.append(tempo.MetronomeMark(number=90))
    p.append(meter.TimeSignature("3/4"))
    p.append(key.KeySignature(2))
    for i in range(12):
        n = note.Note(62 + (i % 5), quarterLength=1)
        n.volume.velocity = 40 + 5 * i
        p.append(n)
    p.insert(12, tempo.MetronomeMark(number=60))
    for _ in range(6):
        p.append(note.Note(60, quarterLength=1))
    s.insert(0, p)
    path = tmp_path / "t.mid"
    s.write("midi", fp=str(path))
    m = load_score(path)
    # Standard MIDI File: set-tempo, time-signature and key-signature meta events survive
    assert rows(m, "tempo")["value"].tolist() == [90.0, 60.0]
    assert rows(m, "meter")["label"].tolist() == ["3/4"]
    assert rows(m, "key")["value"].tolist() == [2]
    # 12 quarters at 90 + 6 at 60 = 8 s + 6 s (hand computed)
    assert m.nominal_duration_s == pytest.approx(14.0)
    # the file's own velocities are kept (MIDI velocity 40, 45, ...)
    assert m.notes["velocity"].iloc[:3].tolist() == [40, 45, 50]
    assert len(m.parts) == 1 and not m.parts[0].isdigit()  # a readable name, not an object id


def test_wedge_starting_inside_a_held_note(tmp_path):
    # MusicXML <offset> (in divisions, here 8 = 2 quarters) places the wedge start half-way through
    # a whole note; music21 binds it to the next note (qn 4) -- the written start is qn 2
    start = ('<direction><direction-type><wedge type="crescendo"/></direction-type>'
             "<offset>8</offset></direction>")
    ms = [measure(1, A44 + start + note("C", 5, 4)),
          measure(2, note("D", 5, 4) + direction('<wedge type="stop"/>')),
          whole(3, dyn("f"))]
    m = load_score(write(tmp_path, "wo.musicxml", score([("P", ms)])))
    h = rows(m, "hairpin")
    assert h["score_qn"].tolist() == [2.0] and h["end_qn"].tolist() == [8.0]
    assert h["measure"].tolist() == [1] and h["beat"].tolist() == [3.0]


def test_long_silence_shorter_than_a_bar(tmp_path):
    # at quarter = 30 a two-quarter rest lasts 4 s: not a whole bar, but a long silence (>= 2 s)
    ms = [whole(1, A44 + metronome("quarter", 30)), measure(2, note("C", 5, 2) + rest(2)), whole(3)]
    m = load_score(write(tmp_path, "ls.musicxml", score([("P", ms)])))
    p = rows(m, "pause")
    assert p["label"].tolist() == ["long silence"]
    assert p["nominal_end"].iloc[0] - p["nominal"].iloc[0] == pytest.approx(4.0)


def test_three_eight_is_one_beat(tmp_path):
    # music21 counts 3/8 as one beat of a dotted quarter; at dotted quarter = 60 a bar lasts 1 s
    ms = bars_of(6, first_attrs=attributes(beats=3, beat_type=8, fifths=0)
                 + metronome("quarter", 60, dotted=True), note_q=0.5, per_bar=3)
    m = load_score(write(tmp_path, "t38.musicxml", score([("P", ms)])))
    assert m.measures["beat_qn"].iloc[0] == pytest.approx(1.5)
    assert m.nominal_duration_s == pytest.approx(6.0)
    assert m.notes["beat"].iloc[1] == pytest.approx(1 + 0.5 / 1.5)


def test_repeat_resumes_tempo_and_dynamic_of_its_first_pass(tmp_path):
    # |: bar 2 (p, q = 120 in force) ... bar 4 rit., f :| -- on the repeat the section starts again
    # at its own tempo and dynamic (performance practice), not at the end-of-rit. tempo
    ms = [whole(1, A44 + metronome("quarter", 120) + dyn("p")), whole(2, barline("left", repeat="forward")),
          whole(3, dyn("f")), whole(4, words("rit."), barline("right", repeat="backward")),
          whole(5, words("a tempo"))]
    m = load_score(write(tmp_path, "rr.musicxml", score([("P", ms)])))
    tc = rows(m, "tempo_change")
    resumed = tc[tc["label"] == "tempo of bar 2 resumed"]
    assert resumed["score_qn"].tolist() == [16.0] and resumed["value"].tolist() == [120.0]
    tm = m.tempo_map
    assert tm(20.0) - tm(16.0) == pytest.approx(2.0)  # 4 quarters at 120 again
    n = m.notes.set_index(["measure", "pass"])
    assert n.loc[(2, 2), "velocity"] == n.loc[(2, 1), "velocity"]  # p again on the repeat


def test_dal_segno_resumes_the_key_of_the_segno_bar(tmp_path):
    # segno in bar 2 (G major in force, no key printed there); key change to D in bar 4; D.S. at
    # bar 4 -> bar 2 sounds in G again, although bar 2 prints no key signature
    ms = [whole(1, attributes(beats=4, beat_type=4, fifths=1, mode="major")), whole(2, direction("<segno/>")),
          whole(3, words("Fine")),
          whole(4, attributes(fifths=2, mode="major", divisions=False), words("D.S. al Fine"))]
    m = load_score(write(tmp_path, "dsk.musicxml", score([("P", ms)])))
    assert order(m) == [(1, 1), (2, 1), (3, 1), (4, 1), (2, 2), (3, 2)]
    k = rows(m, "key")
    assert k["label"].tolist() == ["G major", "D major", "G major"]
    assert k["score_qn"].tolist() == [0.0, 12.0, 16.0]


def test_music21_import_warnings_become_model_warnings(tmp_path, recwarn):
    # a 3/4 bar overfull by 0.1 quarter (31 of 30 divisions): music21 warns while importing; the
    # library keeps the message in the model's warnings instead of letting it reach the terminal
    odd = ("<attributes><divisions>10</divisions><time><beats>3</beats><beat-type>4</beat-type></time>"
           "</attributes><note><pitch><step>C</step><octave>5</octave></pitch><duration>31</duration></note>")
    ms = [measure(1, odd), measure(2, "<note><pitch><step>D</step><octave>5</octave></pitch>"
                                      "<duration>30</duration></note>")]
    m = load_score(write(tmp_path, "over.musicxml", score([("P", ms)])))
    # said in plain words (bar, what was kept), no raw library text
    assert any(w.startswith("bar 1:") and "longer than the time signature" in w for w in m.warnings)
    assert not any("music21" in w or "overfull" in w for w in m.warnings)
    assert not [w for w in recwarn if "overfull" in str(w.message)]
