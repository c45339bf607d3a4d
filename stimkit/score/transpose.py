"""Sounding pitch of transposing parts, read from MusicXML ``<transpose>``.

What it computes
----------------
MusicXML writes a transposing instrument's part at *written* pitch and gives, in
``<attributes><transpose>``, the interval from written to sounding pitch (``<chromatic>``
semitones, ``<diatonic>`` steps, ``<octave-change>``) [1]_. :func:`xml_transpositions` reads every
``<transpose>`` of every ``<part>`` (a part may change transposition, e.g. clarinet in B-flat to A),
and :class:`Transposer` gives the interval in force at a place of a music21 part, so the loader
stores notes at **sounding** pitch and key signatures at concert pitch (the written key is kept
for the boundary's detail).

Conventions and measured music21 behaviour (music21 10.5.1)
-----------------------------------------------------------
- A transposition applies from the start of the bar whose ``<attributes>`` carry it (music21
  puts the new instrument at the bar's offset too) until the next ``<transpose>`` of the part.
- music21 reads ``<transpose>`` into ``Instrument.transposition`` and sets
  ``Part.atSoundingPitch`` False, but it also gives an instrument *without* ``<transpose>`` its
  usual transposition when the part names a MIDI program (a ``<midi-program>`` 72 part without
  ``<transpose>`` gets a clarinet's major second down although its notes are at concert pitch,
  *measured*); ``toSoundingPitch()`` would then transpose a concert part. So the intervals are
  read from the XML itself, and nothing is transposed without a ``<transpose>`` element.
- ``toSoundingPitch()`` is not used: it copies the whole part (*measured*: 1.3 s CPU for the
  1,206-note clarinet part of ``weber/concertino_clarinet.mxl``, half the parse of the whole
  file; moving the MIDI numbers takes 0.01 s). Each note's MIDI number is moved by the interval's
  semitones, each key signature with ``KeySignature.transpose``; the test suite checks the
  result against ``toSoundingPitch()`` on that corpus file.
- music21 fails on a ``<transpose>`` with ``<octave-change>`` but no ``<diatonic>`` (the optional
  element is assumed present); :func:`xml_transpositions` writes the diatonic steps implied by
  the semitones into the tree before music21 reads it.
- A score marked ``<concert-score/>`` (MusicXML 4.0) is written at concert pitch; only whole-octave
  transpositions (piccolo, double bass, guitar) still apply there, as the specification says.
- ``<double/>`` (MusicXML 4.0: the part is doubled an octave below, or above with
  ``above="yes"``, as in a shared cello/bass or flute/piccolo staff) adds the doubling as notes
  of the same part; music21 ignores the element (a TODO in its importer).
- A transposition of more than ``MAX_SEMITONES`` is taken as damage and ignored (a warning says so).

References
----------
.. [1] MusicXML 4.0, ``<transpose>`` and ``<concert-score>`` (W3C Music Notation Community Group).
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass

__all__ = ["XmlTransposition", "xml_transpositions", "Transposer", "describe", "MAX_SEMITONES"]

MAX_SEMITONES = 36


@dataclass
class XmlTransposition:
    """One ``<transpose>``: the ``<part>`` index, the bar index within that part, the interval."""

    part: int
    part_id: str
    bar: int
    interval: object  # music21.interval.Interval, written -> sounding
    semitones: int
    double: int = 0  # semitones of a doubling (-12 below, +12 above, 0 none)


def _int(text, default=None):
    try:
        return int(str(text).strip())
    except (TypeError, ValueError):
        return default


def xml_transpositions(root, *, concert_score: bool) -> tuple[list[XmlTransposition], list[str]]:
    """Every ``<transpose>`` of a ``score-partwise`` tree, and plain-word warnings.

    Repairs, in the tree, ``<transpose>`` elements music21 cannot read (see module notes).
    """
    from music21 import interval
    from music21.musicxml.xmlToM21 import MeasureParser

    out: list[XmlTransposition] = []
    warns: list[str] = []
    names = {sp.get("id"): (sp.findtext("part-name") or "").strip()
             for sp in root.iterfind("part-list/score-part")}
    mp = None
    for pk, part in enumerate(root.findall("part")):
        pid = part.get("id") or ""
        pname = names.get(pid) or pid or f"part {pk + 1}"
        for bi, meas in enumerate(part.findall("measure")):
            for att in meas.findall("attributes"):
                tr = att.find("transpose")
                if tr is None:
                    continue
                chrom = _int(tr.findtext("chromatic"), 0 if tr.find("double") is not None else None)
                octv = _int(tr.findtext("octave-change"), 0)
                dia = _int(tr.findtext("diatonic"))
                if chrom is None:
                    warns.append(f"bar {meas.get('number', bi + 1)} of {pname}: a transposition without "
                                 "its semitones was ignored")
                    continue
                if dia is None:  # implied by the semitones (7 steps per 12 semitones)
                    el = tr.makeelement("diatonic", {})
                    el.text = str(int(round(chrom * 7 / 12)))
                    tr.insert(0, el)
                semis = chrom + 12 * octv
                if abs(semis) > MAX_SEMITONES:
                    warns.append(f"bar {meas.get('number', bi + 1)} of {pname}: a transposition of "
                                 f"{semis} semitones is out of range; ignored (written pitch used)")
                    for child in list(tr):
                        tr.remove(child)
                    att.remove(tr)
                    continue
                if concert_score and semis % 12:
                    warns.append(f"{pname}: the score says it is written at concert pitch, but the part "
                                 f"declares a transposition of {semis} semitones; taken as concert pitch")
                    semis = 0
                if mp is None:
                    mp = MeasureParser()
                try:
                    iv = mp.xmlTransposeToInterval(tr)
                except Exception:  # an impossible diatonic/chromatic pair: keep the semitones
                    iv = interval.Interval(semis)
                if concert_score:
                    iv = interval.Interval(semis) if semis else interval.Interval("P1")
                dbl = tr.find("double")
                double = 0 if dbl is None else (12 if dbl.get("above") == "yes" else -12)
                out.append(XmlTransposition(part=pk, part_id=pid, bar=bi, interval=iv, semitones=semis,
                                            double=double))
    return out, warns


class Transposer:
    """Interval in force at (bar index, offset in bar) of one part: ``semitones_at`` and
    ``interval_at`` (None where the part is not transposed)."""

    def __init__(self, changes: list[tuple]):
        """``changes``: (bar index, interval, semitones[, doubling semitones]) per ``<transpose>``."""
        changes = sorted(changes, key=lambda c: c[0])
        self._bars = [c[0] for c in changes]
        self._iv = [c[1] for c in changes]
        self._semi = [c[2] for c in changes]
        self._double = [c[3] if len(c) > 3 else 0 for c in changes]
        self._any = any(self._semi) or any(self._double)

    def __bool__(self) -> bool:
        return self._any

    def _k(self, bar: int) -> int:
        return bisect.bisect_right(self._bars, bar) - 1

    def semitones_at(self, bar: int) -> int:
        k = self._k(bar)
        return self._semi[k] if k >= 0 else 0

    def double_at(self, bar: int) -> int:
        """Semitones of the octave doubling in force (0 when the part is not doubled)."""
        k = self._k(bar)
        return self._double[k] if k >= 0 else 0

    def interval_at(self, bar: int):
        k = self._k(bar)
        return self._iv[k] if k >= 0 and self._semi[k] else None

    def changes_at(self, bar: int) -> bool:
        """True when a new transposition starts at this bar (not the part's first)."""
        k = bisect.bisect_left(self._bars, bar)
        return bar > 0 and k < len(self._bars) and self._bars[k] == bar

    def intervals(self) -> list[tuple[int, object, int]]:
        """(first bar index, interval, doubling semitones) of every change, the untransposed
        stretches included."""
        return list(zip(self._bars, self._iv, self._double))


_SIZES = {1: "unison", 2: "second", 3: "third", 4: "fourth", 5: "fifth", 6: "sixth", 7: "seventh",
          8: "octave"}


def describe(iv, double: int = 0) -> str:
    """Plain words for a written -> sounding interval: 'sounds a major second lower than written'
    (and ', doubled an octave below' for a ``<double/>``)."""
    if double:
        return describe(iv) + f", doubled an octave {'below' if double < 0 else 'above'}"
    if iv is None or iv.semitones == 0:
        return "sounds as written"
    direction = "lower" if iv.semitones < 0 else "higher"
    semis = abs(iv.semitones)
    if semis % 12 == 0:
        n = semis // 12
        what = "an octave" if n == 1 else f"{n} octaves"
    else:
        try:
            what = iv.niceName.lower()
            what = ("an " if what[0] in "aeiou" else "a ") + what
        except Exception:
            what = f"{semis} semitones"
    return f"sounds {what} {direction} than written"
