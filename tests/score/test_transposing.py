"""Transposing instruments: notes at sounding pitch, keys at concert pitch with the written key.

External facts (orchestration handbooks, e.g. S. Adler, *The Study of Orchestration*, the tables
of transposing instruments; common knowledge of the trade): a B-flat clarinet sounds a major
second below written, a horn in F a perfect fifth below, an A clarinet a minor third below, the
double bass and the guitar an octave below, the piccolo an octave above. The MusicXML 4.0
specification defines ``<transpose>`` (``<diatonic>``, ``<chromatic>``, ``<octave-change>``) as the
interval from written to sounding pitch and ``<concert-score>`` as "written at concert pitch,
octave transpositions still apply". The corpus check uses music21's own ``toSoundingPitch`` on
``weber/concertino_clarinet.mxl`` (a part for B-flat clarinet and a piano part), used in place.
"""

from __future__ import annotations

import collections
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from xmlfix import attributes, measure, note, score, write  # noqa: E402

from stimkit.score.parse import load_score  # noqa: E402


def transpose(diatonic=None, chromatic=0, octave=None) -> str:
    out = "<transpose>"
    if diatonic is not None:
        out += f"<diatonic>{diatonic}</diatonic>"
    out += f"<chromatic>{chromatic}</chromatic>"
    if octave is not None:
        out += f"<octave-change>{octave}</octave-change>"
    return out + "</transpose>"


def part_bars(tr: str, *, fifths=0, mode=None, step="C", octave=5, bars=3, later=None):
    """Bars of one whole note each; ``tr`` is the <transpose> of bar 1; ``later`` maps bar -> attrs."""
    first = attributes(beats=4, beat_type=4, fifths=fifths, mode=mode)[: -len("</attributes>")] + tr + "</attributes>"
    out = []
    for i in range(1, bars + 1):
        body = first if i == 1 else (later or {}).get(i, "")
        out.append(measure(i, body + note(step, octave, 4)))
    return out


def pitches(model, part):
    n = model.notes
    return n[n["part"] == part]["pitch"].tolist()


def keys(model):
    b = model.boundaries
    return b[b["trial_type"] == "key"].reset_index(drop=True)


@pytest.fixture(scope="module")
def band(tmp_path_factory):
    """Clarinet in B-flat (written D major), horn in F, double bass, piccolo, guitar (octave change
    without <diatonic>), a flute (not transposing), and a clarinet that changes from B-flat to A."""
    tmp = tmp_path_factory.mktemp("band")
    parts = [
        ("Clarinet in Bb", part_bars(transpose(-1, -2), fifths=2, mode="major", step="D")),  # D5 written
        ("Horn in F", part_bars(transpose(-4, -7), step="G", octave=4)),                     # G4 written
        ("Double Bass", part_bars(transpose(0, 0, -1), step="A", octave=3)),                  # A3 written
        ("Piccolo", part_bars(transpose(0, 0, 1), step="C", octave=6)),                       # C6 written
        ("Guitar", part_bars(transpose(None, 0, -1), step="E", octave=4)),                    # E4 written
        ("Flute", part_bars("", step="C", octave=5)),
        ("Clarinet (Bb, then A)", part_bars(transpose(-1, -2), step="E", octave=5, bars=3,
                                            later={3: "<attributes>" + transpose(-2, -3) + "</attributes>"})),
    ]
    return load_score(write(tmp, "band.musicxml", score(parts)))


def test_sounding_pitch_of_each_instrument(band):
    # handbook intervals (module docstring), MIDI numbers C4 = 60
    assert pitches(band, "Clarinet in Bb") == [74 - 2] * 3    # D5 written -> C5 (major second down)
    assert pitches(band, "Horn in F") == [67 - 7] * 3         # G4 written -> C4 (perfect fifth down)
    assert pitches(band, "Double Bass") == [57 - 12] * 3      # A3 written -> A2 (octave down)
    assert pitches(band, "Piccolo") == [84 + 12] * 3          # C6 written -> C7 (octave up)
    assert pitches(band, "Guitar") == [64 - 12] * 3           # E4 written -> E3 (octave down)
    assert pitches(band, "Flute") == [72] * 3                 # no <transpose>: as written


def test_transposition_changing_mid_part(band):
    # B-flat clarinet (major second down) for bars 1-2, A clarinet (minor third down) from bar 3
    assert pitches(band, "Clarinet (Bb, then A)") == [76 - 2, 76 - 2, 76 - 3]


def test_key_rows_at_concert_pitch_with_written_key(band):
    k = keys(band)
    first = k[k["score_qn"] == 0.0]
    # D major written for a B-flat clarinet is C major at concert pitch (major second down)
    row = first[first["label"] == "C major"]
    assert len(row) == 1
    assert "written D major in Clarinet in Bb" in row["detail"].iloc[0]
    assert "major second lower" in row["detail"].iloc[0]
    assert "D major" not in first["label"].tolist()
    # the no-sharps written key of the horn in F sounds with one flat (a fifth down: C -> F)
    assert any(lab.startswith("1 flat") for lab in first["label"])
    # at bar 3 the second clarinet changes from B-flat (a written C sounds B-flat: 2 flats) to A
    # (a written C sounds A: 3 sharps): a concert key change under the same written key
    assert k[k["part"] == "Clarinet (Bb, then A)"]["value"].tolist() == [-2, 3]
    assert k[k["measure"] == 3]["value"].tolist() == [3]


def test_midi_program_without_transpose_is_not_transposed(tmp_path):
    # music21 gives a part naming MIDI program 72 (clarinet) a clarinet's transposition although
    # the file has no <transpose> (measured on music21 10.5.1); MusicXML says: no <transpose>,
    # no transposition
    text = score([("Clarinet", part_bars("", step="D"))]).replace(
        "<part-name>Clarinet</part-name>",
        '<part-name>Clarinet</part-name><score-instrument id="P1-I1"><instrument-name>Clarinet'
        '</instrument-name></score-instrument><midi-instrument id="P1-I1"><midi-program>72'
        "</midi-program></midi-instrument>")
    m = load_score(write(tmp_path, "concert.musicxml", text))
    assert pitches(m, "Clarinet") == [74] * 3


def test_concert_score_keeps_only_octave_transpositions(tmp_path):
    # MusicXML 4.0 <concert-score/>: written at concert pitch; octave transpositions still apply
    text = score([("Piccolo", part_bars(transpose(0, 0, 1), step="C", octave=6)),
                  ("Clarinet in Bb", part_bars(transpose(-1, -2), step="D"))])
    text = text.replace("<part-list>", "<defaults><concert-score/></defaults><part-list>")
    m = load_score(write(tmp_path, "cs.musicxml", text))
    assert pitches(m, "Piccolo") == [96] * 3
    assert pitches(m, "Clarinet in Bb") == [74] * 3
    assert any("concert pitch" in w and "Clarinet in Bb" in w for w in m.warnings)


def test_absurd_transposition_is_ignored_with_a_warning(tmp_path):
    m = load_score(write(tmp_path, "far.musicxml", score([("X", part_bars(transpose(-700, -1200)))])))
    assert pitches(m, "X") == [72] * 3
    assert any("out of range" in w for w in m.warnings)


@pytest.fixture(scope="module")
def weber():
    from music21 import corpus

    path = corpus.getWork("weber/concertino_clarinet.mxl")
    return load_score(path, expand_repeats=False), corpus.parse(path)


def test_corpus_clarinet_part_at_sounding_pitch(weber):
    model, m21 = weber
    # reference: music21's own toSoundingPitch() of the clarinet part of the same file; every
    # sounding note (a tie continuation is not a new note), chords note by note
    clar = m21.parts[0].toSoundingPitch()
    ref = collections.Counter(p.midi for n in clar.recurse().notes
                              if n.tie is None or n.tie.type == "start" for p in n.pitches)
    ours = collections.Counter(pitches(model, model.parts[0]))
    assert sum(ref.values()) > 1000
    assert ours == ref


def test_corpus_clarinet_key_equals_piano_key(weber):
    model, m21 = weber
    # the piano part of the same file prints the concert key: the clarinet's concert key equals it
    piano = next(p for p in m21.parts if "Piano" in (p.partName or ""))
    concert = piano.getElementsByClass("Measure").first().keySignature.sharps
    k = keys(model)
    first = k[k["score_qn"] == 0.0]
    assert first["value"].tolist() == [concert]
    assert first["part"].tolist() == ["all"]                     # one row: clarinet and piano agree
    assert "in Bb Clarinet" in first["detail"].iloc[0]          # the written key is still said


def test_corpus_piano_bars_out_of_step_are_named_and_resynchronised(weber):
    model, m21 = weber
    # music21's own reading of the same file: in bars 237-239 one piano staff holds 6 quarter
    # notes in 6/8 (a bar holds 3), so its bars drift against the clarinet in music21's offsets
    long_bars = set()
    for p in m21.parts:
        for m in p.getElementsByClass("Measure"):
            ts = m.timeSignature or m.getContextByClass("TimeSignature")
            end = max((float(n.offset + n.quarterLength) for n in m.recurse().notesAndRests), default=0.0)
            if end > float(ts.barDuration.quarterLength) + 1e-6:
                long_bars.add((p.partName, m.number))
    assert sorted(long_bars) == [("Piano", 237), ("Piano", 238), ("Piano", 239)]
    long_bars = [237, 238, 239]
    from stimkit.report.cuesheet import plain_remarks

    assert plain_remarks(model.warnings)[1] == 0          # no raw library text (cue sheet's check)
    w = [x for x in model.warnings if "of Piano" in x and "longer" in x]
    assert w and all(str(b) in " ".join(w) for b in long_bars)
    # re-synchronised: every bar lasts 3 quarter notes from bar 237 on, the piano's final chord
    # starts on the downbeat of the last bar, where the clarinet's bar starts too
    meas = model.measures.set_index("measure")
    assert (meas.loc[237:, "duration_qn"] == 3.0).all()
    last = int(meas.index.max())
    piano = model.notes[(model.notes["part"] == "Piano") & (model.notes["measure"] == last)]
    assert piano["score_qn"].min() == pytest.approx(meas.loc[last, "score_qn"])


def test_plan_sidecar_says_which_parts_were_moved(band):
    from stimkit.score.plan import boundaries_sidecar

    tp = boundaries_sidecar(band, name="band", start_s=0.0)["TransposingParts"]
    assert tp["Horn in F"] == "sounds a perfect fifth lower than written from bar 1"
    assert tp["Piccolo"] == "sounds an octave higher than written from bar 1"
    assert tp["Clarinet (Bb, then A)"] == ("sounds a major second lower than written from bar 1; "
                                           "sounds a minor third lower than written from bar 3")
    assert "Flute" not in tp


def test_double_adds_the_octave_doubling(tmp_path):
    # MusicXML 4.0 <double/>: the part sounds as written and an octave below (above="yes": above)
    below = part_bars("<transpose><diatonic>0</diatonic><chromatic>0</chromatic><double/></transpose>",
                      step="A", octave=3)
    above = part_bars(transpose(0, 0, 1)[: -len("</transpose>")] + '<double above="yes"/></transpose>',
                      step="C", octave=6)
    m = load_score(write(tmp_path, "dbl.musicxml", score([("Vc e Cb", below), ("Fl e Picc", above)])))
    assert sorted(pitches(m, "Vc e Cb")) == [45] * 3 + [57] * 3     # A3 and A2
    assert sorted(pitches(m, "Fl e Picc")) == [96] * 3 + [108] * 3  # C7 (octave up) and C8 above it
    from stimkit.score.plan import boundaries_sidecar

    tp = boundaries_sidecar(m, name="dbl", start_s=0.0)["TransposingParts"]
    assert tp["Vc e Cb"] == "sounds as written, doubled an octave below from bar 1"
