"""Score variants for hard evaluation: excerpts, transposing parts, parts out of step, no tempo.

Every function takes and returns MusicXML text (``score-partwise``); :func:`read_musicxml` reads
a ``.musicxml``/``.xml`` file or the root document of a compressed ``.mxl``. The variants are the
ways real score files differ from what a performance sounds like:

- :func:`excerpt` -- the first bars of every part, optionally without repeat marks, voltas and
  jump words (a passage played straight through).
- :func:`transposing_part` -- a part rewritten for a transposing instrument: written pitches a
  major second (B-flat clarinet) or a perfect fifth (horn in F) above sounding, the key signature
  moved with them, and the MusicXML ``<transpose>`` element that says how to get back to
  sounding pitch (MusicXML 4.0, ``transpose``: "the chromatic and diatonic steps to add to the
  written pitch to get the sounding pitch").
- :func:`out_of_step` -- one note dropped from a bar of one part (an under-full bar) or doubled
  in another (an over-full bar), as optical music recognition or a hand edit leaves them: the
  parts' bars no longer add up to the same lengths.
- :func:`without_tempo` -- no metronome marks, no ``<sound tempo>``, no words: a score whose
  tempo a reader must assume (stimkit assumes q = 100).
- :func:`misread` -- the kinds of error optical music recognition leaves in a file: parts
  called "Part 1", "Part 2" (no instrument names), pitches read a step off, lost accidentals,
  notes read as rests, ties lost, a key signature missed, a passage read in the wrong clef, and
  the metronome marks and tempo words lost.

The performance is always rendered from the *clean* score (what the players read correctly); the
aligner gets the variant.
"""

from __future__ import annotations

import copy
import re
import zipfile
import xml.etree.ElementTree as ET

from defusedxml.ElementTree import fromstring as _safe_fromstring
from pathlib import Path

__all__ = ["read_musicxml", "excerpt", "transposing_part", "out_of_step", "without_tempo",
           "part_ids", "concert_pitch", "misread", "TRANSPOSITIONS"]

#: instrument -> (name, diatonic, chromatic) of MusicXML ``<transpose>`` (written -> sounding).
TRANSPOSITIONS = {"clarinet_bb": ("Clarinet in B\u266d", -1, -2), "horn_f": ("Horn in F", -4, -7)}
_STEPS = "CDEFGAB"
_SEMI = [0, 2, 4, 5, 7, 9, 11]


def read_musicxml(path) -> str:
    """MusicXML text of a ``.musicxml``/``.xml`` file or of the root file of an ``.mxl``."""
    path = Path(path)
    if path.suffix.lower() == ".mxl":
        with zipfile.ZipFile(path) as z:
            root = None
            if "META-INF/container.xml" in z.namelist():
                c = _safe_fromstring(z.read("META-INF/container.xml"))
                rf = [e for e in c.iter() if e.tag.endswith("rootfile")]
                root = rf[0].get("full-path") if rf else None
            if root is None:
                root = next(n for n in z.namelist() if n.endswith((".xml", ".musicxml")) and "/" not in n)
            return _decode(z.read(root))
    return _decode(path.read_bytes())


def _decode(data: bytes) -> str:
    """XML bytes to text by their byte-order mark (UTF-16 files exist in the music21 corpus),
    the encoding declaration dropped (the text is written back as UTF-8)."""
    if data[:2] in (b"\xff\xfe", b"\xfe\xff"):
        text = data.decode("utf-16")
    else:
        text = data.decode("utf-8-sig")
    return re.sub(r"^(<\?xml[^>]*?)\s+encoding=[\"'][^\"']*[\"']", r"\1", text, count=1)


def _parse(text: str) -> ET.Element:
    text = re.sub(r"<!DOCTYPE[^>]*>", "", text, count=1)
    return _safe_fromstring(text.encode("utf-8") if text.lstrip().startswith("<?xml") else text)


def _dump(root: ET.Element) -> str:
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode")


def part_ids(text: str) -> list[tuple[str, str]]:
    """``(id, name)`` of every part in the part list."""
    root = _parse(text)
    return [(sp.get("id"), (sp.findtext("part-name") or "").strip()) for sp in root.iter("score-part")]


def excerpt(text: str, n_bars: int, *, plain: bool = True, first: int = 0) -> str:
    """Bars ``first .. first + n_bars - 1`` (positions, not numbers) of every part.

    With ``plain`` the repeat barlines, voltas, segni, codas and D.C./D.S./Fine words are removed,
    so the excerpt is played straight through. The attributes in force at ``first`` (divisions,
    key, time, clef) are copied into the excerpt's first bar.
    """
    root = _parse(text)
    for part in root.iter("part"):
        bars = part.findall("measure")
        keep = bars[first:first + n_bars]
        if first > 0 and keep:
            state = {}
            for b in bars[:first + 1]:
                for at in b.findall("attributes"):
                    for child in at:
                        state[child.tag] = child
            at0 = keep[0].find("attributes")
            if at0 is None:
                at0 = ET.Element("attributes")
                keep[0].insert(0, at0)
            have = {c.tag for c in at0}
            for tag in ("divisions", "key", "time", "staves", "clef", "transpose"):
                if tag in state and tag not in have:
                    at0.append(copy.deepcopy(state[tag]))
        for b in bars:
            if b not in keep:
                part.remove(b)
        if plain:
            for b in keep:
                for bl in b.findall("barline"):
                    for tag in ("repeat", "ending", "segno", "coda"):
                        for e in bl.findall(tag):
                            bl.remove(e)
                for d in b.findall("direction"):
                    words = " ".join((w.text or "") for w in d.iter("words")).lower()
                    jump = re.search(r"\b(d\.?\s?c\.?|d\.?\s?s\.?|fine|coda|segno|da capo|dal segno)\b", words)
                    if jump or d.find(".//segno") is not None or d.find(".//coda") is not None:
                        b.remove(d)
                        continue
                    for s in d.iter("sound"):
                        for k in ("dacapo", "dalsegno", "segno", "coda", "tocoda", "fine"):
                            s.attrib.pop(k, None)
    return _dump(root)


def _shift_pitch(pitch: ET.Element, diatonic: int, chromatic: int) -> None:
    step = pitch.findtext("step")
    octave = int(pitch.findtext("octave"))
    alter = float(pitch.findtext("alter") or 0)
    old = 12 * octave + _SEMI[_STEPS.index(step)] + alter
    i = _STEPS.index(step) + diatonic
    new_oct = octave + i // 7
    new_step = _STEPS[i % 7]
    new_alter = old + chromatic - (12 * new_oct + _SEMI[i % 7])
    pitch.find("step").text = new_step
    pitch.find("octave").text = str(new_oct)
    al = pitch.find("alter")
    if abs(new_alter) < 1e-9:
        if al is not None:
            pitch.remove(al)
    else:
        if al is None:
            al = ET.Element("alter")
            pitch.insert(1, al)
        al.text = f"{int(new_alter)}" if float(new_alter).is_integer() else f"{new_alter:g}"


def transposing_part(text: str, part_id: str, instrument: str = "clarinet_bb") -> str:
    """Rewrite ``part_id`` for a transposing instrument (see :data:`TRANSPOSITIONS`).

    Written pitches move up by the inverse of the instrument's transposition, the key signatures
    of the part move by the same interval on the circle of fifths, and ``<transpose>`` is added
    to the part's first ``<attributes>``; the sounding music is unchanged.
    """
    name, dia, chrom = TRANSPOSITIONS[instrument]
    root = _parse(text)
    for sp in root.iter("score-part"):
        if sp.get("id") == part_id:
            pn = sp.find("part-name")
            if pn is not None:
                pn.text = name
    part = next(p for p in root.iter("part") if p.get("id") == part_id)
    fifths_shift = {(-1, -2): 2, (-4, -7): 1}[(dia, chrom)]
    for pitch in part.iter("pitch"):
        _shift_pitch(pitch, -dia, -chrom)
    for key in part.iter("key"):
        f = key.find("fifths")
        if f is not None:
            f.text = str(int(f.text) + fifths_shift)
    first = part.find("measure").find("attributes")
    if first is None:
        first = ET.Element("attributes")
        part.find("measure").insert(0, first)
    tr = ET.Element("transpose")
    ET.SubElement(tr, "diatonic").text = str(dia)
    ET.SubElement(tr, "chromatic").text = str(chrom)
    after = [i for i, c in enumerate(first) if c.tag in ("divisions", "key", "time", "staves",
                                                          "part-symbol", "instruments", "clef",
                                                          "staff-details")]
    first.insert(after[-1] + 1 if after else 0, tr)
    return _dump(root)


def _simple_bars(part: ET.Element) -> list[int]:
    """Positions of bars with one voice (no backup/forward) and at least two pitched notes."""
    out = []
    for i, b in enumerate(part.findall("measure")):
        if b.find("backup") is not None or b.find("forward") is not None:
            continue
        heads = [n for n in b.findall("note") if n.find("pitch") is not None and n.find("chord") is None
                 and n.find("grace") is None]
        if len(heads) >= 2:
            out.append(i)
    return out


def out_of_step(text: str, edits: list[tuple[str, float, str]]) -> tuple[str, list[tuple[str, int]]]:
    """Break the bar lengths of some parts: ``edits`` are ``(part_id, where, kind)`` with
    ``where`` a fraction 0..1 of the piece and ``kind`` ``"drop"`` (the bar's last note is lost:
    under-full) or ``"double"`` (a note is written twice: over-full). The bar edited is the
    single-voice bar nearest ``where``. Returns the new text and ``(part_id, bar position)`` of
    each edit."""
    root = _parse(text)
    done = []
    for part_id, where, kind in edits:
        part = next(p for p in root.iter("part") if p.get("id") == part_id)
        bars = part.findall("measure")
        cands = _simple_bars(part)
        if not cands:
            continue
        target = where * (len(bars) - 1)
        pos = min(cands, key=lambda i: abs(i - target))
        bar = bars[pos]
        notes = list(bar.findall("note"))
        heads = [k for k, n in enumerate(notes) if n.find("pitch") is not None and n.find("chord") is None
                 and n.find("grace") is None]
        k = heads[-1]
        group = [notes[k]] + [n for n in notes[k + 1:] if n.find("chord") is not None]
        if kind == "drop":
            for n in group:
                bar.remove(n)
        else:
            idx = list(bar).index(group[-1]) + 1
            for j, n in enumerate(group):
                bar.insert(idx + j, copy.deepcopy(n))
        done.append((part_id, pos))
    return _dump(root), done


def without_tempo(text: str) -> str:
    """Remove metronome marks, ``<sound tempo>`` and every ``<words>`` direction (tempo words)."""
    root = _parse(text)
    for part in root.iter("part"):
        for bar in part.findall("measure"):
            for d in bar.findall("direction"):
                for s in d.iter("sound"):
                    s.attrib.pop("tempo", None)
                for dt in d.findall("direction-type"):
                    if dt.find("metronome") is not None or dt.find("words") is not None:
                        d.remove(dt)
                if not d.findall("direction-type"):
                    bar.remove(d)
            for s in bar.findall("sound"):
                s.attrib.pop("tempo", None)
    return _dump(root)


def concert_pitch(text: str) -> str:
    """The inverse of :func:`transposing_part`: every part with a ``<transpose>`` rewritten at
    sounding pitch (pitches and key signatures moved, ``<transpose>`` removed). Only the first
    ``<transpose>`` of a part is used (it is taken to hold for the whole part)."""
    root = _parse(text)
    for part in root.iter("part"):
        tr = next(part.iter("transpose"), None)
        if tr is None:
            continue
        dia = int(tr.findtext("diatonic") or 0)
        chrom = int(float(tr.findtext("chromatic") or 0))
        oc = int(tr.findtext("octave-change") or 0)
        dia, chrom = dia + 7 * oc, chrom + 12 * oc
        for pitch in part.iter("pitch"):
            _shift_pitch(pitch, dia, chrom)
        shift = (chrom * 7) % 12
        shift = shift - 12 if shift > 6 else shift
        for key in part.iter("key"):
            f = key.find("fifths")
            if f is not None:
                f.text = str(int(f.text) + shift)
        for at in part.iter("attributes"):
            for t in at.findall("transpose"):
                at.remove(t)
    return _dump(root)


def _move_head(pitch: ET.Element, diatonic: int, *, keep_alter: bool = False) -> None:
    """Move a note head ``diatonic`` lines/spaces (a plain head unless ``keep_alter``)."""
    i = _STEPS.index(pitch.findtext("step")) + diatonic
    octave = int(pitch.findtext("octave")) + i // 7
    pitch.find("step").text = _STEPS[i % 7]
    pitch.find("octave").text = str(octave)
    al = pitch.find("alter")
    if al is not None and not keep_alter:
        pitch.remove(al)


def misread(text: str, *, seed: int, rate: float = 0.06, clef_bars: int = 4, names: bool = True,
            tempo: bool = True) -> tuple[str, list[str]]:
    """A score as optical music recognition might leave it (the performers read the clean one).

    - every part renamed ``Part <n>`` with its instrument names removed (nothing says what
      plays it);
    - metronome marks, ``<sound tempo>`` and words lost (:func:`without_tempo`);
    - of the pitched notes, a share ``rate`` misread: half a diatonic step off (a head read on
      the next line or space), a quarter with a lost accidental, a quarter read as a rest of the
      same length (so bar lengths still add up);
    - every tie lost with probability ``rate``;
    - the key signature of the last part missed (its ``fifths`` set to 0, its pitches' written
      accidentals kept as MusicXML ``<alter>`` -- so only the part's key row changes);
    - ``clef_bars`` bars of the first part read in the wrong clef (every pitch two diatonic
      steps too low, as a treble passage read in alto clef).

    ``names`` / ``tempo`` False keep the part names / the tempo marks.
    Returns the text and one line per kind of change (counts).
    """
    import random

    rnd = random.Random(seed)
    root = _parse(without_tempo(text) if tempo else text)
    for k, sp in enumerate(root.iter("score-part") if names else (), start=1):
        pn = sp.find("part-name")
        if pn is not None:
            pn.text = f"Part {k}"
        for tag in ("part-abbreviation", "part-name-display", "part-abbreviation-display"):
            for e in sp.findall(tag):
                sp.remove(e)
        for si in sp.findall("score-instrument"):
            nm = si.find("instrument-name")
            if nm is not None:
                nm.text = f"Instrument {k}"
        for mi in sp.findall("midi-instrument"):
            sp.remove(mi)
    counts = {"step": 0, "accidental": 0, "rest": 0, "tie": 0}
    parts = root.findall("part")
    heads_of_chords = set()
    for bar in root.iter("measure"):
        ns = bar.findall("note")
        heads_of_chords.update(id(n) for n, nxt in zip(ns, ns[1:]) if nxt.find("chord") is not None)
    for part in parts:
        for note in part.iter("note"):
            pitch = note.find("pitch")
            for tag in ("tie",):
                for t in note.findall(tag):
                    if rnd.random() < rate:
                        note.remove(t)
                        counts["tie"] += 1
            notations = note.find("notations")
            if notations is not None:
                for t in notations.findall("tied"):
                    if rnd.random() < rate:
                        notations.remove(t)
            if pitch is None or note.find("grace") is not None or rnd.random() >= rate:
                continue
            u = rnd.random()
            if u < 0.5:
                _move_head(pitch, rnd.choice((-1, 1)))   # a plain head on the neighbouring line
                counts["step"] += 1
            elif u < 0.75:
                al = pitch.find("alter")
                if al is not None:
                    pitch.remove(al)
                    counts["accidental"] += 1
                else:
                    _shift_pitch(pitch, 0, rnd.choice((-1, 1)))
                    counts["accidental"] += 1
            elif note.find("chord") is None and id(note) not in heads_of_chords:
                note.remove(pitch)
                note.insert(0, ET.Element("rest"))
                for e in note.findall("tie") + note.findall("accidental") + note.findall("stem"):
                    note.remove(e)
                counts["rest"] += 1
    lines = [f"{v} {k} misreads" for k, v in counts.items()]
    if len(parts) > 1:
        for key in parts[-1].iter("key"):
            f = key.find("fifths")
            if f is not None:
                f.text = "0"
        lines.append("key signature of the last part missed")
    bars = parts[0].findall("measure")
    if clef_bars and len(bars) > clef_bars + 2:
        first = rnd.randrange(1, len(bars) - clef_bars)
        for b in bars[first:first + clef_bars]:
            for pitch in b.iter("pitch"):
                _move_head(pitch, -2, keep_alter=True)
        lines.append(f"bars {first + 1}-{first + clef_bars} (positions) of part 1 read in the wrong clef")
    return _dump(root), lines
