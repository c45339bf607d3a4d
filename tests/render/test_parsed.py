"""End to end with the project's parser: a small MusicXML score with a fermata, rendered and checked."""

from __future__ import annotations

import librosa
import mir_eval
import numpy as np
import pytest

from stimkit.render import render_score
from stimkit.render.performance import perform
from stimkit.score.parse import load_score

# An original 3-bar melody in 4/4 at q = 120 with a fermata on the A4 of bar 2, beat 2.
FERMATA_XML = """<?xml version="1.0" encoding="UTF-8"?>
<score-partwise version="3.1">
  <part-list><score-part id="P1"><part-name>Piano</part-name></score-part></part-list>
  <part id="P1">
    <measure number="1">
      <attributes><divisions>1</divisions><key><fifths>0</fifths></key><time><beats>4</beats><beat-type>4</beat-type></time><clef><sign>G</sign><line>2</line></clef></attributes>
      <direction placement="above"><direction-type><metronome><beat-unit>quarter</beat-unit><per-minute>120</per-minute></metronome></direction-type><sound tempo="120"/></direction>
      <note><pitch><step>C</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>D</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>E</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>F</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
    </measure>
    <measure number="2">
      <note><pitch><step>G</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>A</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type><notations><fermata type="upright"/></notations></note>
      <note><pitch><step>B</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>C</step><octave>5</octave></pitch><duration>1</duration><type>quarter</type></note>
    </measure>
    <measure number="3">
      <note><pitch><step>E</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>G</step><octave>4</octave></pitch><duration>1</duration><type>quarter</type></note>
      <note><pitch><step>C</step><octave>5</octave></pitch><duration>2</duration><type>half</type></note>
      <barline location="right"><bar-style>light-heavy</bar-style></barline>
    </measure>
  </part>
</score-partwise>"""


@pytest.fixture(scope="module")
def fermata_score(tmp_path_factory):
    path = tmp_path_factory.mktemp("render") / "fermata.musicxml"
    path.write_text(FERMATA_XML, encoding="utf-8")
    return load_score(path)


def test_fermata_note_is_held_longer_than_written(fermata_score):
    # the note under the fermata is bar 2 beat 2 (MusicXML <fermata> on that note)
    perf = perform(fermata_score, seed=1, drift=0.0, phrase_rit=0.0, jitter_s=0.0, fermata_factor=1.5)
    n = perf.notes.set_index("score_qn")
    q0 = fermata_score.qn_at(2, 2.0)
    ioi = n.loc[q0 + 1, "onset_s"] - n.loc[q0, "onset_s"]
    written = 60.0 / 120.0                       # one quarter at q = 120
    nominal = fermata_score.tempo_map(q0 + 1) - fermata_score.tempo_map(q0)
    assert nominal > written                     # the parser's nominal map holds it already
    assert ioi == pytest.approx(1.5 * nominal)   # and the performer holds it 1.5 times longer
    # the neighbours are played at the written tempo
    assert n.loc[q0, "onset_s"] - n.loc[q0 - 1, "onset_s"] == pytest.approx(written)
    assert n.loc[q0 + 2, "onset_s"] - n.loc[q0 + 1, "onset_s"] == pytest.approx(written)


def test_corpus_piece_positions_are_found_in_the_audio():
    # music21 corpus (used in place): the Mozart K. 545 exposition, rendered with the piano timbre;
    # every distinct onset position's first note is checked against librosa's detector with
    # mir_eval's onset F-measure (50 ms window)
    import music21
    score = load_score(music21.corpus.getWork("mozart/k545/movement1_exposition.mxl"))
    y, perf = render_score(score, seed=2, timbre="piano")
    pos = perf.positions()
    assert len(pos) == score.notes["score_qn"].nunique()
    est = librosa.onset.onset_detect(y=y, sr=22050, units="time")
    f, _, _ = mir_eval.onset.f_measure(pos["onset_s"].to_numpy(), est, window=0.05)
    assert f >= 0.9
    assert y.size == int(round(perf.duration_s * 22050))
    assert perf.beats["measure"].iloc[0] == score.measures["measure"].iloc[0]
    # the performed first onset of each position is never later than its mean, and the smooth
    # curve stays within the jitter + chord spread bound of it (jitter truncated at 2.5 sd, as the
    # renderer documents; the amounts are the ones this performance used)
    assert np.all(pos["onset_s"] <= pos["onset_mean_s"] + 1e-12)
    jit, spread = perf.settings["jitter_s"], perf.settings["chord_spread_s"]
    assert jit > 0 and spread > 0                    # the bound below is not trivially zero
    assert np.max(np.abs(pos["onset_s"] - pos["smooth_s"])) < 2.5 * jit + spread + 1e-9
