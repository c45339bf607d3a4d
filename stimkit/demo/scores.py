"""The project's original example scores, written with music21.

What it computes
----------------
:func:`build_scores` returns two original piano pieces as music21 scores; :func:`write_scores`
writes them as MusicXML into a folder (``python -m stimkit.demo.scores [DIR]``, default
``example_scores/``). The music is generated deterministically (fixed seed) from diatonic chord
progressions: a melody of chord tones on strong beats and scale steps between them in the right
hand, broken-chord or waltz accompaniment in the left hand.

- :data:`PIECE_ONE` ``lanterns-over-the-weir.musicxml``: about 2.5 minutes nominal; four sections
  (rehearsal marks A-D), a repeat of section A, keys G major -> D major -> E-flat major -> G
  major, meter 4/4 -> 3/4 -> 4/4, tempos Andante q = 84, più mosso, Allegretto q = 112, rit.,
  Tempo I q = 84; dynamics pp..ff with hairpins, accents (sfz, sf, fp), fermatas and a general
  pause bar.
- :data:`PIECE_TWO` ``kites-at-dusk.musicxml``: about 70 seconds; 6/8 in D minor with a
  middle section in F major (meno mosso), a tempo, accel. to the end; dotted-quarter metronome
  marks.

Conventions: tempo marks are written as ``<metronome>`` elements with their tempo word; gradual
and relative changes as words. Bar numbers start at 1.
"""

from __future__ import annotations

import random
import re
import sys
from pathlib import Path

__all__ = ["build_scores", "write_scores", "PIECE_ONE", "PIECE_TWO", "SCORE_FILES"]

PIECE_ONE = "lanterns-over-the-weir"
PIECE_TWO = "kites-at-dusk"
SCORE_FILES = (f"{PIECE_ONE}.musicxml", f"{PIECE_TWO}.musicxml")
TITLES = {PIECE_ONE: "Lanterns over the Weir", PIECE_TWO: "Kites at Dusk"}

# rhythm patterns of the melody, in quarter notes, by bar length
_RH_PATTERNS = {
    4.0: [[1, 1, 1, 1], [1.5, 0.5, 1, 1], [1, 0.5, 0.5, 2], [2, 1, 1], [0.5, 0.5, 1, 1, 1],
          [1, 1, 0.5, 0.5, 1], [1.5, 0.5, 2], [1, 0.5, 0.5, 1, 1]],
    3.0: [[1, 1, 1], [2, 1], [1.5, 0.5, 1], [1, 0.5, 0.5, 1], [0.5, 0.5, 1, 1]],
    # 6/8: dotted-quarter beats at 0 and 1.5
    6.0: [[1.5, 1.5], [1, 0.5, 1.5], [1, 0.5, 1, 0.5], [0.5, 0.5, 0.5, 1.5], [1.5, 1, 0.5]],
}
_CADENCE = {4.0: [1, 1, 2], 3.0: [1, 2], 6.0: [3.0]}


def _chord_midis(key_obj, figure):
    from music21 import roman

    rn = roman.RomanNumeral(figure, key_obj)
    return rn, sorted({p.midi % 12 for p in rn.pitches}), rn.bass().midi % 12


def _scale_midis(key_obj, lo, hi):
    pcs = {p.midi % 12 for p in key_obj.getScale().getPitches("C1", "C2")}
    return [m for m in range(lo, hi + 1) if m % 12 in pcs]


def _melody(rng, key_obj, figure, bar_qn, cur, *, cadence=False, lo=67, hi=84):
    """(midi, ql) pairs for one bar of melody; returns the notes and the last pitch."""
    _, pcs, _ = _chord_midis(key_obj, figure)
    scale = _scale_midis(key_obj, lo - 2, hi + 2)
    pats = [_CADENCE[bar_qn]] if cadence else _RH_PATTERNS[bar_qn]
    pat = rng.choice(pats)
    out = []
    pos = 0.0
    direction = rng.choice([-1, 1])
    for ql in pat:
        strong = abs(pos - round(pos)) < 1e-9 and (bar_qn != 6.0 or pos in (0.0, 1.5, 3.0, 4.5))
        if strong or cadence:
            cands = [m for m in range(lo, hi + 1) if m % 12 in pcs]
            target = cur + direction * rng.choice([2, 3, 4, 5])
            moving = [c for c in cands if c != cur and (c - cur) * direction > 0] or cands
            m = min(moving, key=lambda c: (abs(c - target), c))
            if cadence and pos + ql >= bar_qn - 1e-9:
                roots = [c for c in cands if c % 12 == pcs[0]] or cands
                m = min(roots, key=lambda c: abs(c - cur))
        else:
            i = min(range(len(scale)), key=lambda j: abs(scale[j] - cur))
            i = max(0, min(len(scale) - 1, i + direction))
            m = scale[i]
        if m >= hi - 1:
            direction = -1
        elif m <= lo + 1:
            direction = 1
        elif rng.random() < 0.3:
            direction = -direction
        out.append((m, float(ql)))
        cur = m
        pos += ql
    return out, cur


def _accomp(key_obj, figure, bar_qn, style, *, lo=40):
    """(midi list, ql) events of the left hand for one bar."""
    _, pcs, bass = _chord_midis(key_obj, figure)
    root = lo + ((bass - lo) % 12)
    upper = sorted({root + ((pc - root) % 12) + 12 for pc in pcs})[:3]
    if style == "broken":
        seq = [root, upper[0], upper[1] if len(upper) > 1 else upper[0] + 7, upper[0]]
        n = int(round(bar_qn / 0.5))
        return [([seq[k % 4]], 0.5) for k in range(n)]
    if style == "waltz":
        return [([root], 1.0), (upper, 1.0), (upper, 1.0)]
    if style == "barcarolle":  # 6/8: bass and two chord eighths, twice
        return [([root], 0.5), (upper[:2], 0.5), (upper[1:], 0.5),
                ([root + 7 if root + 7 < 60 else root], 0.5), (upper[:2], 0.5), (upper[1:], 0.5)]
    if style == "block":
        return [([root] + upper, bar_qn / 2), ([root] + upper, bar_qn / 2)]
    # sustained
    return [([root, root + 12], bar_qn)]


def _make_piece(spec, *, title, seed):
    """Build a two-staff piano score from a section spec list."""
    from music21 import (bar, clef, dynamics, expressions, instrument, key, layout, meter, metadata,
                         note, chord, stream)

    rng = random.Random(seed)
    sc = stream.Score()
    sc.insert(0, metadata.Metadata())
    sc.metadata.title = title
    sc.metadata.composer = "stimkit example"
    rh, lh = stream.PartStaff(), stream.PartStaff()
    rh.partName = lh.partName = "Piano"
    rh.id, lh.id = "P1", "P1-staff2"  # fixed ids: equal music gives equal bytes
    inst = instrument.Piano()
    inst.partId, inst.instrumentId = "P1", "P1-I1"
    rh.insert(0, inst)
    number = 0
    cur = 74
    wedge_marks = []  # (kind, start bar number, end bar number)
    rh_bars, lh_bars = {}, {}
    prev_key, prev_ts = None, None
    for sec in spec:
        k = key.Key(sec["key"]) if sec["key"][0].isupper() else key.Key(sec["key"][0].upper() + sec["key"][1:], "minor")
        ts_text = sec["meter"]
        bar_qn = meter.TimeSignature(ts_text).barDuration.quarterLength
        figs = sec["chords"]
        for j, fig in enumerate(figs):
            number += 1
            mr, ml = stream.Measure(number=number), stream.Measure(number=number)
            if j == 0:
                if prev_key is None or prev_key != sec["key"]:
                    mr.insert(0, key.Key(k.tonic.name, k.mode))
                    ml.insert(0, key.Key(k.tonic.name, k.mode))
                if prev_ts != ts_text:
                    mr.insert(0, meter.TimeSignature(ts_text))
                    ml.insert(0, meter.TimeSignature(ts_text))
                if number == 1:
                    mr.insert(0, clef.TrebleClef())
                    ml.insert(0, clef.BassClef())
                if sec.get("rehearsal"):
                    mr.insert(0, expressions.RehearsalMark(sec["rehearsal"]))
                prev_key, prev_ts = sec["key"], ts_text
            if fig == "GP":
                mr.append(note.Rest(quarterLength=bar_qn))
                ml.append(note.Rest(quarterLength=bar_qn))
                mr.insert(0, expressions.TextExpression("G.P."))
            else:
                last = j == len(figs) - 1
                cad = last or (j % 4 == 3 and sec.get("phrase_cadences", True))
                mel, cur = _melody(rng, k, fig, float(bar_qn), cur, cadence=cad,
                                   lo=sec.get("lo", 67), hi=sec.get("hi", 84))
                for m, ql in mel:
                    mr.append(note.Note(m, quarterLength=ql))
                style = sec["lh"] if not (last and sec.get("final")) else "sustained"
                for ms, ql in _accomp(k, fig, float(bar_qn), style):
                    ml.append(chord.Chord(ms, quarterLength=ql) if len(ms) > 1 else note.Note(ms[0], quarterLength=ql))
            for off, text in sec.get("marks", {}).get(j + 1, []):
                _mark(mr, off, text)
            rh_bars[number], lh_bars[number] = mr, ml
            rh.append(mr)
            lh.append(ml)
        for kind, a, b in sec.get("wedges", []):
            wedge_marks.append((kind, number - len(figs) + a, number - len(figs) + b))
        if sec.get("repeat"):
            first = number - len(figs) + 1
            for bars_ in (rh_bars, lh_bars):
                bars_[first].leftBarline = bar.Repeat(direction="start")
                bars_[number].rightBarline = bar.Repeat(direction="end")
        elif sec.get("double_bar_after"):
            for bars_ in (rh_bars, lh_bars):
                bars_[number].rightBarline = bar.Barline("double")
        if sec.get("fermata_last"):
            for bars_ in (rh_bars, lh_bars):
                nn = list(bars_[number].notes)
                if nn:
                    nn[-1].expressions.append(expressions.Fermata())
    for bars_ in (rh_bars, lh_bars):
        bars_[number].rightBarline = bar.Barline("final")
    for kind, a, b in wedge_marks:
        na = list(rh_bars[a].notes)
        nb = list(rh_bars[b].notes)
        if na and nb:
            w = dynamics.Crescendo(na[0], nb[-1]) if kind == "<" else dynamics.Diminuendo(na[0], nb[-1])
            rh.insert(0, w)
    sc.insert(0, rh)
    sc.insert(0, lh)
    sc.insert(0, layout.StaffGroup([rh, lh], name="Piano", abbreviation="Pno.", symbol="brace"))
    return sc


def _mark(m, off, text):
    """Insert a dynamic, accent, tempo mark or tempo word into a measure at ``off``."""
    from music21 import dynamics, expressions, tempo, duration

    if text.startswith("mm:"):
        _, word, ref, num = text.split(":")
        mm = tempo.MetronomeMark(text=word or None, number=float(num),
                                 referent=duration.Duration(float(ref)))
        m.insert(off, mm)
    elif text.startswith("w:"):
        m.insert(off, expressions.TextExpression(text[2:]))
    else:
        m.insert(off, dynamics.Dynamic(text))


def _spec_one():
    q = "1"
    return [
        dict(key="G", meter="4/4", rehearsal="A", lh="broken", repeat=True,
             chords=["I", "vi", "IV", "V", "I", "ii6", "V7", "I"],
             marks={1: [(0, f"mm:Andante:{q}:84"), (0, "p")], 5: [(0, "mf")], 8: [(0, "p")]},
             wedges=[("<", 3, 4), (">", 7, 8)]),
        dict(key="D", meter="4/4", rehearsal="B", lh="block", fermata_last=True,
             chords=["I", "V6", "vi", "iii", "IV", "I6", "ii", "V", "vi", "IV", "I64", "V",
                     "ii7", "V7", "vi", "V"],
             marks={1: [(0, "w:più mosso"), (0, "f")], 4: [(0, "sfz")], 8: [(0, "ff")],
                    9: [(0, "mf")], 13: [(2, "sfz")], 16: [(0, "mp")]},
             wedges=[("<", 5, 7), ("<", 10, 12), (">", 14, 15)], lo=69, hi=86),
        dict(key="D", meter="4/4", lh="sustained", chords=["GP"], double_bar_after=True),
        dict(key="E-", meter="3/4", rehearsal="C", lh="waltz",
             chords=["I", "vi", "ii6", "V", "I", "IV", "V7", "I", "vi", "IV", "ii", "V",
                     "I", "ii6", "V7", "I"],
             marks={1: [(0, f"mm:Allegretto:{q}:112"), (0, "pp")], 5: [(0, "mp")], 9: [(0, "mf")],
                    11: [(0, "sf")], 13: [(0, "f")], 14: [(0, "fp")], 15: [(0, "ff"), (0, "w:rit.")]},
             wedges=[("<", 3, 4), ("<", 7, 8), ("<", 12, 12)], double_bar_after=True),
        dict(key="G", meter="4/4", rehearsal="D", lh="broken", final=True, fermata_last=True,
             chords=["I", "IV", "I6", "V", "vi", "IV", "ii", "V7", "I", "I"],
             marks={1: [(0, f"mm:Tempo I:{q}:84"), (0, "p")], 5: [(0, "mp")], 7: [(0, "p")],
                    10: [(0, "pp")]},
             wedges=[("<", 3, 4), (">", 6, 6), (">", 8, 9)], lo=64, hi=81),
    ]


def _spec_two():
    dq = "1.5"
    return [
        dict(key="d", meter="6/8", rehearsal="A", lh="barcarolle",
             chords=["i", "iv", "V", "i", "VI", "iv", "V", "i", "i", "VII", "III", "VI", "iv",
                     "ii°6", "V", "i"],
             marks={1: [(0, f"mm:Allegro moderato:{dq}:72"), (0, "mf")], 5: [(0, "f")],
                    8: [(0, "p")], 12: [(0, "sfz")], 16: [(0, "mf")]},
             wedges=[("<", 3, 4), (">", 6, 7), ("<", 13, 15)], double_bar_after=True),
        dict(key="F", meter="6/8", rehearsal="B", lh="barcarolle",
             chords=["I", "IV", "ii", "V", "I", "vi", "ii", "V", "IV", "I64", "V7", "I"],
             marks={1: [(0, "w:meno mosso"), (0, "p")], 5: [(0, "pp")], 8: [(0, "mp")],
                    11: [(0, "p")]},
             wedges=[("<", 3, 4), ("<", 7, 8), (">", 10, 11)], double_bar_after=True, lo=65, hi=81),
        dict(key="d", meter="6/8", rehearsal="C", lh="barcarolle", final=True,
             chords=["i", "iv", "V", "i", "VI", "ii°6", "V", "i", "iv", "i64", "V", "i"],
             marks={1: [(0, "w:a tempo"), (0, "mf")], 5: [(0, "w:accel.")], 9: [(0, "f")],
                    11: [(0, "ff")], 12: [(0, "sfz")]},
             wedges=[("<", 6, 8), ("<", 9, 10)]),
    ]


def build_scores() -> dict:
    """The two example pieces as music21 scores, keyed by file stem."""
    return {
        PIECE_ONE: _make_piece(_spec_one(), title=TITLES[PIECE_ONE], seed=11),
        PIECE_TWO: _make_piece(_spec_two(), title=TITLES[PIECE_TWO], seed=23),
    }


def write_scores(out_dir: str | Path = "example_scores") -> list[Path]:
    """Write the example scores as MusicXML into ``out_dir`` (atomic, all-or-nothing)."""
    from ..export.tables import OutputSet, check_output_dir
    from music21.musicxml.m21ToXml import GeneralObjectExporter

    out = check_output_dir(out_dir)
    with OutputSet(out) as outs:
        for stem, sc in build_scores().items():
            data = GeneralObjectExporter(sc).parse()
            # drop the export date so equal music gives equal bytes
            data = re.sub(rb"<encoding-date>[^<]*</encoding-date>", b"", data)
            outs.write_bytes(f"{stem}.musicxml", data)
    return list(outs.committed)


if __name__ == "__main__":  # pragma: no cover
    for p in write_scores(sys.argv[1] if len(sys.argv) > 1 else "example_scores"):
        sys.stdout.write(f"wrote {p}\n")
