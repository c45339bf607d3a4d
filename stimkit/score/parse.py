"""Load a score file (MusicXML, compressed MusicXML, MIDI) into a :class:`ScoreModel`.

What it computes
----------------
:func:`load_score` validates the file, parses it with music21, records every printed bar (number,
offset, length, meter) and every marking and note *relative to its printed bar*, works out the
performed order of the printed bars (:mod:`stimkit.score.repeats`), lays the bars end to end in
that order and maps notes and markings through it. Boundaries (:mod:`stimkit.score.markings`) and
the nominal tempo map (:mod:`stimkit.score.tempomap`) are built from the performed markings.

Conventions
-----------
- ``score_qn`` counts quarter notes from the start of the score as performed; printed bar
  numbers are kept (``measure``) with the ``pass`` through the bar (1, 2, ...).
- Notes: one row per sounding note at **sounding pitch** (transposing parts moved by their
  MusicXML ``<transpose>``, :mod:`stimkit.score.transpose`); tied notes are merged *in performed
  order* (a tie into a first ending and its repeat both resolve); grace notes get ``GRACE_QN``
  quarter notes; chords give one row per pitch; unpitched notes and chord symbols are left out.
- Bars: one length for all parts, every part re-synchronised at every barline
  (:mod:`stimkit.score.barsync`: the notated length when a part fills it, else the longest
  part); parts with another number of bars are matched by number or running time; each
  disagreement is a warning in plain words naming bars and parts.
- Velocity: the dynamic in force in the note's part (:data:`stimkit.score.markings.VELOCITY`,
  default ``mf`` before the first dynamic), ramped through hairpins, raised on accents; a MIDI
  file's own note velocities are kept. MIDI files carry tempo, meter and key markings only.
- Safety: XML is parsed with :mod:`defusedxml` (DOCTYPE entity declarations are refused) and the
  checked tree is handed to music21's MusicXML importer, so the file is read once. Sizes,
  element counts and notated length are bounded before the expensive steps
  (:mod:`stimkit.score.limits`); music21's import warnings reach the model in plain words only
  (:mod:`stimkit.score.notices`).
- Known music21 pitfalls handled here (measured on music21 10.5.1): ``<other-dynamics>`` loses its
  text (the tag is renamed before import); ``getContextByClass(TimeSignature)`` returns the
  previous meter on a bar that changes meter (the bar's own elements are read first); wedges are
  bound to the note after their start and end at the last note's *start*, so their written
  positions are read from the XML tree (:func:`xml_wedges`; music21's wedges, with the last
  note's duration added, are the fallback); ``expandRepeats`` is not used; the playback tempo
  (``<sound tempo>``) of a direction that also prints a ``<metronome>`` is dropped by music21, so
  it is read from the tree too (a disagreement with the printed mark is reported).

References
----------
.. [1] Cuthbert, M. S. & Ariza, C. (2010). music21: A toolkit for computer-aided musicology and
   symbolic music data. Proc. ISMIR.
.. [2] MusicXML 4.0 specification (W3C Music Notation Community Group).
"""

from __future__ import annotations

import re
import warnings as _warnings
import zipfile
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from .model import BOUNDARY_COLUMNS, NOTE_COLUMNS, ScoreModel
from . import barsync, limits, notices, transpose
from .repeats import BarMarks, RepeatError, RepeatPlan, repeat_plan

__all__ = ["load_score", "score_for_choice", "SCORE_SUFFIXES", "GRACE_QN", "REPEAT_CHOICES", "read_music21",
           "PrintedScore", "collect_printed"]

XML_SUFFIXES = (".musicxml", ".xml")
MXL_SUFFIXES = (".mxl",)
MIDI_SUFFIXES = (".mid", ".midi")
SCORE_SUFFIXES = XML_SUFFIXES + MXL_SUFFIXES + MIDI_SUFFIXES
GRACE_QN = 0.0625
MAX_XML_BYTES = limits.MAX_XML_BYTES
#: Named repeat choices of :func:`load_score` (see :meth:`stimkit.score.repeats.RepeatPlan.choice`).
REPEAT_CHOICES = ("all", "none", "max", "printed")


# --------------------------------------------------------------------------------------------
# reading and validation
# --------------------------------------------------------------------------------------------
def _xml_bytes_from_mxl(path: Path) -> bytes:
    """The root score of a compressed MusicXML file, read as a bounded stream
    (:func:`stimkit.score.limits.read_bounded`: the member's declared size is not trusted)."""
    try:
        with zipfile.ZipFile(path) as zf:
            names = zf.namelist()
            root_name = None
            if "META-INF/container.xml" in names:
                with zf.open("META-INF/container.xml") as fh:
                    cont = _safe_xml(limits.read_bounded(fh, path=path, what="container file"), path)
                for el in cont.iter():
                    if el.tag.endswith("rootfile") and el.get("full-path"):
                        root_name = el.get("full-path")
                        break
            if root_name is None:
                cands = [n for n in names if n.lower().endswith(XML_SUFFIXES) and not n.startswith("META-INF")]
                if not cands:
                    raise InputError("compressed MusicXML holds no score file", path=path)
                root_name = cands[0]
            with zf.open(root_name) as fh:
                return limits.read_bounded(fh, path=path, what="score inside the .mxl")
    except (zipfile.BadZipFile, KeyError, OSError, EOFError, RuntimeError, NotImplementedError,
            zlib.error) as exc:
        raise InputError(f"not a readable compressed MusicXML (.mxl) file ({exc}); "
                         "export the score again", path=path) from None


def _safe_xml(data: bytes, path: Path):
    """Parse XML bytes with defusedxml; refuse entity declarations; one-line errors."""
    import defusedxml.ElementTree as DET
    from defusedxml import DefusedXmlException
    from xml.etree.ElementTree import ParseError

    try:
        return DET.fromstring(data, forbid_dtd=False, forbid_entities=True, forbid_external=True)
    except DefusedXmlException:
        raise InputError("the XML declares DOCTYPE entities (refused for safety, e.g. an entity "
                         "bomb); remove the entity declarations", path=path) from None
    except ParseError as exc:
        raise InputError(f"malformed XML ({exc}); check the file is a complete MusicXML export",
                         path=path) from None


def read_music21(path: str | Path):
    """Validate ``path`` and parse it with music21; returns a ``music21.stream.Score``.

    Raises :class:`InputError` for a missing file, an unknown extension, non-XML or malformed
    XML, XML with entity declarations, a non-MusicXML root, or a file music21 cannot read.
    """
    path = Path(path)
    if not path.exists():
        raise InputError("score file not found; check the path", path=path)
    if not path.is_file():
        raise InputError("score path is not a file", path=path)
    suffix = path.suffix.lower()
    if suffix not in SCORE_SUFFIXES:
        raise InputError(f"unsupported score extension '{path.suffix}'; use one of "
                         + ", ".join(SCORE_SUFFIXES), path=path)
    if suffix in MIDI_SUFFIXES:
        with open(path, "rb") as fh:
            head = fh.read(4)
        if head != b"MThd":
            raise InputError("not a standard MIDI file (no MThd header)", path=path)
        mf = limits.read_midi(path)  # bounded before music21 makes bars of it
        try:
            from music21.midi import translate

            return translate.midiFileToStream(mf)
        except Exception as exc:  # music21 raises many kinds
            raise InputError(f"this MIDI file could not be made into a score ({type(exc).__name__}); "
                             "export it again", path=path) from None
    if suffix in MXL_SUFFIXES:
        data = _xml_bytes_from_mxl(path)
    else:
        with open(path, "rb") as fh:
            data = limits.read_bounded(fh, path=path, what="score file")
    if data.startswith(b"PK\x03\x04"):
        raise InputError("this is a compressed MusicXML (zip) file; rename it to .mxl", path=path)
    head = data[3:] if data.startswith(b"\xef\xbb\xbf") else data
    if not (head.lstrip()[:1] == b"<" or data.startswith((b"\xff\xfe", b"\xfe\xff"))):
        raise InputError("not an XML file; give a MusicXML export (.musicxml, .xml, .mxl)", path=path)
    root = _safe_xml(data, path)
    if root.tag == "score-timewise":
        raise InputError("score-timewise MusicXML is not supported; export as partwise", path=path)
    if root.tag != "score-partwise":
        raise InputError(f"XML root is <{root.tag}>, not a MusicXML <score-partwise>", path=path)
    limits.check_xml_tree(root, path=path)
    # music21 looks for <other-dynamic>; the MusicXML element is <other-dynamics>
    for el in root.iter("other-dynamics"):
        el.tag = "other-dynamic"
    # written -> sounding intervals, read before music21 (which needs some <transpose> repaired)
    concert = root.find("defaults/concert-score") is not None
    transpositions = transpose.xml_transpositions(root, concert_score=concert)
    from music21.musicxml.xmlToM21 import MusicXMLImporter

    with _warnings.catch_warnings(record=True) as caught:
        _warnings.simplefilter("always")
        try:
            imp = MusicXMLImporter()
            imp.xmlRootToScore(root, imp.stream)  # staves and spanners are added to imp.stream
            sc = imp.stream
            exc = None
        except Exception as e:
            exc = e
    if exc is None:
        for w in caught:  # handed on to the caller (load_score words them plainly)
            _warnings.warn(w.message, w.category, stacklevel=2)
    else:
        # music21 says where it failed in a warning ("... took place in m. 12 in part Viola.")
        where = ""
        for w in caught:
            hit = re.search(r"in m\. (\S+) in part (.*?)\.?$", " ".join(str(w.message).split()))
            if hit:
                where = f" at bar {hit[1]}" + (f" of {hit[2]}" if hit[2].strip() else "")
        raise InputError(f"the MusicXML could not be read{where} ({type(exc).__name__}); check that "
                         "bar in the file, or export the score again", path=path) from None
    sc._stimkit_transpositions = transpositions
    sc._stimkit_sound_tempos = []
    try:
        sc._stimkit_wedges = xml_wedges(root, sc._stimkit_sound_tempos)  # written wedge positions (see xml_wedges)
    except Exception:  # a best-effort refinement; music21's wedges are used without it
        sc._stimkit_wedges = None
    return sc


def xml_wedges(root, sounds: list | None = None) -> list[dict]:
    """Wedges at their written positions, read from the MusicXML tree.

    music21 binds a wedge to the note *after* its start and ends it at the last note's start;
    here the ``<direction><wedge>`` elements are placed by walking each ``<part>`` with its
    ``<divisions>``, ``<backup>``, ``<forward>`` and note durations (chord and grace notes do
    not advance; a direction's ``<offset>`` is added). Returns dicts with ``part`` (index of the
    ``<part>``), ``part_id``, ``kind``, ``bar``/``off`` (start: printed bar index, quarters into the bar) and
    ``end_bar``/``end_off``.

    When ``sounds`` is a list, every ``<sound tempo>`` (in a ``<direction>`` or alone in the bar)
    is appended to it as a dict with ``part_id``, ``part``, ``bar``, ``off`` and ``tempo``: music21
    drops the playback tempo of a ``<direction>`` that also prints a ``<metronome>`` (measured on
    10.5.1), so a printed mark that disagrees with it would go unnoticed.
    """
    out = []
    for pk, part in enumerate(root.findall("part")):
        div = 1.0
        open_: dict[str, tuple] = {}
        for bi, meas in enumerate(part.findall("measure")):
            pos = 0.0
            for el in meas:
                tag = el.tag
                if tag == "attributes":
                    d = el.findtext("divisions")
                    if d:
                        div = float(d)
                elif tag == "note":
                    if el.find("chord") is None and el.find("grace") is None:
                        pos += float(el.findtext("duration") or 0) / div
                elif tag == "backup":
                    pos -= float(el.findtext("duration") or 0) / div
                elif tag == "forward":
                    pos += float(el.findtext("duration") or 0) / div
                elif tag == "sound" and sounds is not None and el.get("tempo"):
                    sounds.append(dict(part=pk, part_id=part.get("id") or "", bar=bi, off=pos,
                                       tempo=el.get("tempo")))
                elif tag == "direction":
                    shift = float(el.findtext("offset") or 0) / div
                    snd = el.find("sound")
                    if sounds is not None and snd is not None and snd.get("tempo"):
                        sounds.append(dict(part=pk, part_id=part.get("id") or "", bar=bi,
                                           off=max(pos + shift, 0.0), tempo=snd.get("tempo")))
                    for w in el.iter("wedge"):
                        typ, num = w.get("type"), w.get("number", "1")
                        at = max(pos + shift, 0.0)
                        if typ in ("crescendo", "diminuendo"):
                            open_[num] = (typ, bi, at)
                        elif typ == "stop" and num in open_:
                            typ0, b0, o0 = open_.pop(num)
                            out.append(dict(part=pk, part_id=part.get("id") or "", kind=typ0, bar=b0,
                                            off=o0, end_bar=bi, end_off=at))
    return out


# --------------------------------------------------------------------------------------------
# printed-order collection
# --------------------------------------------------------------------------------------------
@dataclass
class PrintedScore:
    """Everything read from the score, positioned by (printed bar index, offset in bar)."""

    bars: pd.DataFrame  # index, measure, label, offset, duration_qn, numerator, denominator, beat_qn, first_beat, bar_qn, key...
    marks: list[BarMarks]
    notes: pd.DataFrame  # part, bar, off, dur, pitch, tie, accent
    events: pd.DataFrame  # kind, part, bar, off, end_bar, end_off, text, num, num2, ...
    parts: list[str]
    warnings: list[str] = field(default_factory=list)
    is_midi: bool = False
    title: str = ""
    #: part name -> how it sounds against its written notes, for transposing parts only
    #: (e.g. 'sounds a major second lower than written from bar 1'); notes are at sounding pitch
    transpositions: dict = field(default_factory=dict)


_DOUBLE_BARS = ("double", "final", "heavy-light", "heavy-heavy", "light-light", "light-heavy")


def _part_names(parts) -> list[str]:
    names = []
    for k, p in enumerate(parts):
        nm = (getattr(p, "partName", None) or "").strip()
        if not nm:
            inst = p.getInstrument(returnDefault=False) if hasattr(p, "getInstrument") else None
            nm = ((getattr(inst, "partName", None) or getattr(inst, "instrumentName", None) or "")
                  if inst is not None else "").strip()
        if not nm:
            nm = p.id if isinstance(p.id, str) and p.id else f"part {k + 1}"
        names.append(nm)
    # PartStaff objects of one instrument share a name: keep it (a part = an instrument);
    # distinct Parts with equal names are told apart by a number
    from music21 import stream

    out = []
    seen: dict[str, int] = {}
    for p, nm in zip(parts, names):
        if isinstance(p, stream.PartStaff) and nm in seen and out and out[-1].split(" #")[0] == nm:
            out.append(out[-1])
            continue
        seen[nm] = seen.get(nm, 0) + 1
        out.append(nm if seen[nm] == 1 else f"{nm} #{seen[nm]}")
    return out


def _volta_numbers(rb) -> tuple[int, ...]:
    try:
        nums = list(rb.numberRange)
    except Exception:
        nums = []
    return tuple(int(n) for n in nums if n is not None)


def _music21_part_of(parts, part_id: str, xml_index: int) -> int:
    """The first music21 part (staff) built from the MusicXML ``<part id=part_id>``."""
    for j, p in enumerate(parts):
        x = str(getattr(p, "id", ""))
        if part_id and (x == part_id or x.startswith(part_id + "-Staff")):
            return j
    return min(xml_index, len(parts) - 1)


def _key_tuple(ks) -> tuple[int, str, str]:
    """(sharps, mode, tonic name) of a music21 Key or KeySignature ('' when not notated)."""
    from music21 import key

    if isinstance(ks, key.Key):  # a Key carries its mode and tonic, a KeySignature not
        return int(ks.sharps), str(ks.mode or ""), str(ks.tonic.name)
    return int(ks.sharps), "", ""


def _transposers(score, parts, warnings: list[str]) -> list:
    """One :class:`~stimkit.score.transpose.Transposer` per music21 part; every staff of a
    MusicXML part (music21 ids ``P2-Staff1``, ``P2-Staff2``) shares the part's transpositions."""
    raw, warns = getattr(score, "_stimkit_transpositions", None) or ([], [])
    warnings.extend(warns)
    bases = [str(getattr(p, "id", "")).split("-Staff")[0] for p in parts]
    by_id = any(t.part_id in bases for t in raw)
    return [transpose.Transposer([(t.bar, t.interval, t.semitones, t.double) for t in raw
                                  if (t.part_id == base if by_id else t.part == k)])
            for k, base in enumerate(bases)]


def _attach_sound_tempos(ev: list[dict], sounds: list[dict], parts, part_measures) -> None:
    """Give a printed metronome mark the playback tempo (``<sound tempo>``) written at its place,
    when music21 dropped it (``num2`` NaN), so that a disagreement can be reported."""
    marks = {}
    for e in ev:
        if e["kind"] == "metronome":
            marks.setdefault((e["part"], e["bar"]), []).append(e)
    for snd in sounds:
        try:
            bpm = float(snd["tempo"])
        except (TypeError, ValueError):
            continue
        k = _music21_part_of(parts, snd["part_id"], snd["part"])
        pm = part_measures[k]
        if snd["bar"] >= len(pm):
            continue
        i, d, _m = pm[snd["bar"]]
        for e in marks.get((k, i), []):
            if abs(e["off"] - (d + snd["off"])) < 1e-3 and not np.isfinite(e.get("num2", np.nan)):
                e["num2"] = bpm


def collect_printed(score, *, path: Path, keep_velocity: bool = False) -> PrintedScore:
    """Read bars, notes and markings of a music21 score in printed order.

    ``keep_velocity`` records each note's own velocity (column ``vel``, NaN when absent), used for
    MIDI files, whose notes carry a played velocity rather than notated dynamics.
    """
    from music21 import (bar, chord, dynamics, expressions, harmony, key, meter, note, repeat, spanner,
                         stream, tempo, articulations)

    parts = list(score.parts)
    if not parts:
        if score.getElementsByClass(stream.Measure):
            parts = [score]
        else:
            raise InputError("score has no parts or bars", path=path)
    names = _part_names(parts)
    warnings: list[str] = []
    measures_of = [list(p.getElementsByClass(stream.Measure)) for p in parts]
    if not any(measures_of):
        # e.g. a flat MIDI part: make bars
        parts = [p.makeMeasures() for p in parts]
        measures_of = [list(p.getElementsByClass(stream.Measure)) for p in parts]
        if not any(measures_of):
            raise InputError("score has no bars", path=path)
    for ms in measures_of:
        for m in ms:
            limits.check_measure_number(m.number, path=path)
    # the reference bar list: the bar count most parts share (ties: the larger count, then the
    # first part); parts with another count are matched to it (barsync.match_bars)
    counts = [len(ms) for ms in measures_of]
    common = max(set(c for c in counts if c), key=lambda c: (counts.count(c), c))
    r = counts.index(common)
    ref = measures_of[r]
    n = len(ref)
    ref_labels = [str(m.measureNumberWithSuffix()) for m in ref]
    raw_offsets = np.array([float(m.offset) for m in ref])
    part_measures = []  # per part: [(reference bar index, quarter notes into that bar, Measure)]
    in_step = []  # parts whose bars are matched one to one (they decide bar lengths)
    for k, ms in enumerate(measures_of):
        if len(ms) == n:
            part_measures.append([(i, 0.0, m) for i, m in enumerate(ms)])
            in_step.append(True)
            continue
        in_step.append(False)
        if not ms:
            part_measures.append([])
            warnings.append(f"{names[k]} has no bars in the file; it is left out")
            continue
        matched, how = barsync.match_bars(ref_labels, raw_offsets,
                                          [str(m.measureNumberWithSuffix()) for m in ms],
                                          np.array([float(m.offset) for m in ms]))
        part_measures.append([(i, d, m) for (i, d), m in zip(matched, ms)])
        warnings.append(f"{names[k]} has {len(ms)} bars where {names[r]} has {n}; its bars are matched "
                        + ("by their printed numbers" if how == "number" else
                           "by their running time, so they may be a bar or more out of place after a "
                           "missing or extra bar")
                        + "; check the file against the printed score")
    # transpositions (MusicXML <transpose>), per part, indexed by the part's own bar position
    transposers = _transposers(score, parts, warnings)

    # --- meter per bar (the reference part's, else any part's) ----------------------------------
    ts_of = [None] * n
    for k in [r] + [j for j in range(len(parts)) if j != r and in_step[j]]:
        for i, _d, m in part_measures[k]:
            if ts_of[i] is None:
                ts_of[i] = next((el for el in m.elements if isinstance(el, meter.TimeSignature)), None)
    if ts_of[0] is None:
        ts_of[0] = ref[0].getContextByClass(meter.TimeSignature)
    meter_known = ts_of[0] is not None
    if not meter_known:
        ts_of[0] = meter.TimeSignature("4/4")
        warnings.append("the score has no time signature; bars are as long as their notes and beats are "
                        "counted in quarter notes (4/4 assumed)")
    ts_cur = None
    for i in range(n):
        ts_cur = ts_of[i] = ts_of[i] if ts_of[i] is not None else ts_cur
    notated = np.array([float(ts.barDuration.quarterLength) for ts in ts_of])
    content = np.full((len(parts), n), np.nan)

    # --- per-part walk ------------------------------------------------------------------------
    marks = [BarMarks() for _ in range(n)]
    note_rows: list[tuple] = []
    ev: list[dict] = []
    where: dict[int, tuple[int, int, float, float]] = {}  # id(general note) -> (part, bar, off, dur)

    def add(kind, k, i, off, **kw):
        d = dict(kind=kind, part=k, bar=i, off=float(off))
        d.update(kw)
        ev.append(d)

    def add_key(k, i, off, ks, iv=None):
        """A key signature at concert pitch; for a transposing part the written key goes to
        ``written`` as (sharps, mode, tonic) and the interval's words to ``text3``."""
        written = None
        if iv is not None:
            written = _key_tuple(ks)
            ks = ks.transpose(iv)
        sharps, mode, tonic = _key_tuple(ks)
        add("key", k, i, off, num=float(sharps), text=mode, text2=tonic, written=written,
            text3=transpose.describe(iv) if iv is not None else "")

    right_barlines: list[int] = []  # positions in ev of end-of-bar barlines (offset set below)
    tail = 0.0
    for k, pm in enumerate(part_measures):
        key_cur = None
        tr = transposers[k]
        for j, (i, delta, m) in enumerate(pm):
            shift = tr.semitones_at(j) if tr else 0
            iv = tr.interval_at(j) if tr else None
            doubled = tr.double_at(j) if tr else 0
            # barlines and repeats
            for side, bl in (("left", m.leftBarline), ("right", m.rightBarline)):
                if bl is None:
                    continue
                if isinstance(bl, bar.Repeat):
                    if bl.direction == "start":
                        marks[i].repeat_start = True
                    elif bl.direction == "end":
                        marks[i].repeat_end = True
                        if bl.times is not None:
                            marks[i].times = int(bl.times)
                btype = getattr(bl, "type", None)
                if not isinstance(bl, bar.Repeat) and btype in _DOUBLE_BARS:
                    # a double bar ends this bar (right side) or the bar before (left side)
                    j_ = i if side == "right" else i - 1
                    if j_ >= 0:
                        marks[j_].double_bar = True
                if side == "right":
                    right_barlines.append(len(ev))
                add("barline", k, i, 0.0, text=f"{side}:{btype}:{getattr(bl, 'direction', '') or ''}")
            key_here = False
            end, sounding = 0.0, False  # a bar of rests only does not decide the bar's length
            stack = [(m, delta)]
            while stack:
                container, base = stack.pop()
                for el in container.elements:
                    off = base + float(container.elementOffset(el))
                    if isinstance(el, key.KeySignature):
                        add_key(k, i, off, el, iv)
                        key_cur = el
                        key_here = True
                        continue
                    if isinstance(el, stream.Voice):
                        stack.append((el, off))
                        continue
                    if isinstance(el, note.GeneralNote):
                        if isinstance(el, harmony.Harmony):
                            continue  # a chord symbol names the harmony; it is not a sounding note
                        dur = float(el.duration.quarterLength)
                        grace = dur <= 0 or el.duration.isGrace
                        if grace:
                            dur = GRACE_QN
                        elif not (isinstance(el, note.Rest) and el.fullMeasure is True):
                            end = max(end, off - delta + dur)
                            sounding = sounding or not isinstance(el, note.Rest)
                        where[id(el)] = (k, i, off, dur)
                        ferm = any(isinstance(x, expressions.Fermata) for x in el.expressions)
                        if isinstance(el, note.Rest):
                            if ferm:
                                add("fermata", k, i, off, dur=dur, text="rest")
                            continue
                        if ferm:
                            add("fermata", k, i, off, dur=dur, text="note")
                        acc = 0
                        for a in el.articulations:
                            if isinstance(a, articulations.StrongAccent):
                                acc = max(acc, 2)
                            elif isinstance(a, articulations.Accent):
                                acc = max(acc, 1)
                        vel = np.nan
                        if keep_velocity:
                            v = getattr(el.volume, "velocity", None)
                            vel = float(v) if v is not None else np.nan
                        if isinstance(el, chord.Chord):
                            heads = [(cn.pitch, cn.tie if cn.tie is not None else el.tie) for cn in el.notes]
                        elif isinstance(el, note.Note):
                            heads = [(el.pitch, el.tie)]
                        else:
                            heads = []
                        for pitch, t in heads:
                            row = (k, i, off, dur, int(pitch.midi) + shift, t.type if t is not None else "",
                                   acc, vel)
                            note_rows.append(row)
                            if doubled:  # <transpose><double/>: the same line an octave away
                                note_rows.append(row[:4] + (row[4] + doubled,) + row[5:])
                        continue
                    if isinstance(el, dynamics.Dynamic):
                        add("dynamic", k, i, off, text=str(el.value))
                    elif isinstance(el, tempo.MetronomeMark):
                        txt = "" if getattr(el, "textImplicit", True) else (el.text or "")
                        num = el.number
                        snd = el.numberSounding
                        ref_ql = float(el.referent.quarterLength) if el.referent is not None else 1.0
                        add("metronome", k, i, off, num=float(num) if num is not None else np.nan,
                            num2=float(snd) if snd is not None else np.nan, ref_ql=ref_ql,
                            text=txt, text2=el.referent.fullName if el.referent is not None else "")
                    elif isinstance(el, tempo.TempoText):
                        add("words", k, i, off, text=str(el.text or ""))
                    elif isinstance(el, repeat.RepeatExpression):
                        b = marks[i]
                        if isinstance(el, repeat.Segno):
                            b.segno = True
                        elif isinstance(el, repeat.Coda):
                            b.coda += 1
                        elif isinstance(el, repeat.Fine):
                            b.fine = True
                        elif isinstance(el, (repeat.DaCapoAlFine, repeat.DaCapoAlCoda, repeat.DaCapo)):
                            b.jump = "dc"
                            b.jump_to = ("fine" if isinstance(el, repeat.DaCapoAlFine) else
                                         "coda" if isinstance(el, repeat.DaCapoAlCoda) else None)
                        elif isinstance(el, (repeat.DalSegnoAlFine, repeat.DalSegnoAlCoda,
                                             repeat.DalSegno, repeat.AlSegno)):
                            b.jump = "ds"
                            b.jump_to = ("fine" if isinstance(el, repeat.DalSegnoAlFine) else
                                         "coda" if isinstance(el, repeat.DalSegnoAlCoda) else None)
                        add("repeatmark", k, i, off, text=type(el).__name__)
                    elif isinstance(el, expressions.RehearsalMark):
                        add("rehearsal", k, i, off, text=str(el.content))
                    elif isinstance(el, expressions.TextExpression):
                        add("words", k, i, off, text=str(el.content or ""))
            if tr and not key_here and key_cur is not None and tr.changes_at(j):
                add_key(k, i, 0.0, key_cur, iv)  # same written key, new concert key
            if in_step[k]:
                content[k, i] = end if sounding else 0.0
            elif i == n - 1:
                tail = max(tail, delta + end)  # bars matched past the reference's last bar
            if key_cur is None and not key_here and j == 0:
                ctx = m.getContextByClass(key.KeySignature)
                if ctx is not None:
                    key_cur = ctx
                    add_key(k, i, 0.0, ctx, iv)
    # --- bars: one length for all parts, parts re-synchronised at every barline ----------------
    meters = [ts.ratioString for ts in ts_of]
    lengths, sync_warns = barsync.bar_lengths(notated, content, names=names, labels=ref_labels,
                                              meters=meters, meter_known=meter_known)
    warnings.extend(sync_warns)
    lengths = np.where(lengths > barsync.TOL_QN, lengths, notated)
    lengths[-1] = max(lengths[-1], tail)  # nothing is lost at the end
    limits.check_length(float(lengths.sum()), path=path)
    offsets = np.concatenate([[0.0], np.cumsum(lengths)[:-1]])
    rows = []
    for i, m in enumerate(ref):
        ts = ts_of[i]
        bar_qn, beat_qn = float(notated[i]), float(ts.beatDuration.quarterLength)
        dur = float(lengths[i])
        pad = float(getattr(m, "paddingLeft", 0.0) or 0.0)
        first_beat = 1.0
        if pad > 1e-9:
            first_beat = 1.0 + pad / beat_qn
        elif i == 0 and dur < bar_qn - 1e-6:
            first_beat = 1.0 + (bar_qn - dur) / beat_qn
        rows.append(dict(index=i, measure=int(m.number), label=ref_labels[i], offset=float(offsets[i]),
                         duration_qn=dur, numerator=int(ts.numerator), denominator=int(ts.denominator),
                         beat_qn=beat_qn, first_beat=first_beat, bar_qn=bar_qn, meter=ts.ratioString))
    bars = pd.DataFrame(rows)
    for e in right_barlines:
        ev[e]["off"] = float(lengths[ev[e]["bar"]])

    # marks from later parts collapse to one entry per bar (the union is what matters)
    for b in marks:
        if b.coda > 2:
            b.coda = 2 if b.coda % 2 == 0 else 1

    # --- spanners: wedges and voltas -----------------------------------------------------------
    bar_of_measure = {id(mm): i for pm in part_measures for i, _d, mm in pm}  # music21 Measure -> bar
    raw_wedges = getattr(score, "_stimkit_wedges", None)
    if raw_wedges:
        for w in raw_wedges:
            k = _music21_part_of(parts, w["part_id"], w["part"])
            pm = part_measures[k]
            if w["bar"] < len(pm) and w["end_bar"] < len(pm):
                (i0, d0, _m0), (i1, d1, _m1) = pm[w["bar"]], pm[w["end_bar"]]
                add("wedge", k, i0, d0 + w["off"], text=w["kind"], end_bar=i1, end_off=d1 + w["end_off"])
    _attach_sound_tempos(ev, getattr(score, "_stimkit_sound_tempos", None) or [], parts, part_measures)
    for sp in score.spannerBundle:
        if isinstance(sp, dynamics.DynamicWedge) and not raw_wedges:
            first, last = sp.getFirst(), sp.getLast()
            a, b_ = where.get(id(first)), where.get(id(last))
            if a is None or b_ is None:
                continue
            kind = "crescendo" if isinstance(sp, dynamics.Crescendo) else "diminuendo"
            add("wedge", a[0], a[1], a[2], text=kind, end_bar=b_[1], end_off=b_[2] + b_[3])
        elif isinstance(sp, spanner.RepeatBracket):
            nums = _volta_numbers(sp)
            for m in sp.getSpannedElements():
                i = bar_of_measure.get(id(m))
                if i is not None:
                    marks[i].voltas = tuple(sorted(set(marks[i].voltas) | set(nums)))
    notes = pd.DataFrame(note_rows, columns=["part", "bar", "off", "dur", "pitch", "tie", "accent", "vel"])
    events = pd.DataFrame(ev)
    for c in ("text", "text2", "text3"):
        if c not in events:
            events[c] = ""
    for c in ("num", "num2", "ref_ql", "dur", "end_bar", "end_off"):
        if c not in events:
            events[c] = np.nan
    if "written" not in events:
        events["written"] = None
    if events.empty:
        events = pd.DataFrame(columns=["kind", "part", "bar", "off", "text", "text2", "text3", "num", "num2",
                                       "ref_ql", "dur", "end_bar", "end_off", "written"])
    for c in ("text", "text2", "text3"):
        events[c] = events[c].fillna("")
    sounding: dict[str, str] = {}
    for k, tr in enumerate(transposers):
        if tr and names[k] not in sounding:
            sounding[names[k]] = "; ".join(
                f"{transpose.describe(iv, dbl)} from bar {part_measures[k][j][2].measureNumberWithSuffix()}"
                for j, iv, dbl in tr.intervals() if j < len(part_measures[k]))
    return PrintedScore(bars=bars, marks=marks, notes=notes, events=events, parts=names,
                        warnings=warnings, transpositions=sounding)


# --------------------------------------------------------------------------------------------
# performed order
# --------------------------------------------------------------------------------------------
def plan_repeats(printed: PrintedScore) -> tuple[RepeatPlan | None, list[str]]:
    """The repeat plan of the printed bars (:func:`stimkit.score.repeats.repeat_plan`), or ``None``
    with a warning when the marks are ambiguous (the printed order is then played)."""
    labels = [str(x) for x in printed.bars["label"]] if "label" in printed.bars else None
    try:
        plan = repeat_plan(printed.marks, labels=labels)
    except RepeatError as exc:
        return None, [f"repeats not expanded ({exc}); bars kept in printed order"]
    if not plan.order:
        return None, []
    return plan, list(plan.warnings)


def performed_bars(printed: PrintedScore, order: list[int]) -> pd.DataFrame:
    """Performed bars in ``order`` (printed-bar indices): ``index`` (printed), ``measure``,
    ``pass``, ``score_qn`` and the bar columns."""
    b = printed.bars.iloc[list(order)].reset_index(drop=True)
    b["pass"] = b.groupby("index").cumcount() + 1
    b["score_qn"] = np.concatenate([[0.0], np.cumsum(b["duration_qn"].to_numpy())[:-1]])
    return b


def jump_points(perf: pd.DataFrame) -> list[tuple[float, float, int]]:
    """Where the performed order leaves the printed order: ``(score_qn of the bar played after the
    jump, score_qn of that printed bar's first performance, printed bar number)``; only jumps to a
    bar already played (repeats, D.C., D.S.)."""
    idx = perf["index"].to_numpy()
    starts = perf["score_qn"].to_numpy(dtype=float)
    first: dict[int, float] = {}
    out = []
    for j, i in enumerate(idx):
        if j and i != idx[j - 1] + 1 and int(i) in first:
            out.append((float(starts[j]), first[int(i)], int(perf["measure"].iloc[j])))
        first.setdefault(int(i), float(starts[j]))
    return out


def _place(df: pd.DataFrame, perf: pd.DataFrame, *, bar_col="bar", off_col="off") -> pd.DataFrame:
    """Repeat each printed-bar row for every performed occurrence of its bar; adds ``score_qn``,
    ``measure``, ``pass_``, ``perf`` (performed bar position)."""
    occ = pd.DataFrame({"bar": perf["index"].to_numpy(), "perf": np.arange(len(perf)),
                        "bar_start": perf["score_qn"].to_numpy(), "measure": perf["measure"].to_numpy(),
                        "pass_": perf["pass"].to_numpy()})
    out = df.merge(occ, left_on=bar_col, right_on="bar", how="inner", suffixes=("", "_o"))
    out["score_qn"] = out["bar_start"] + out[off_col].astype(float)
    return out


def _merge_ties(notes: pd.DataFrame) -> pd.DataFrame:
    """Merge tied notes (same part and pitch, tie stop/continue meeting an open tie)."""
    if notes.empty:
        return notes
    notes = notes.sort_values(["part", "pitch", "score_qn"], kind="mergesort").reset_index(drop=True)
    part = notes["part"].to_numpy()
    pitch = notes["pitch"].to_numpy()
    q = notes["score_qn"].to_numpy()
    dur = notes["dur"].to_numpy().copy()
    tie = notes["tie"].to_numpy()
    keep = np.ones(len(notes), dtype=bool)
    open_i = -1
    for j in range(len(notes)):
        if open_i >= 0 and (part[open_i] != part[j] or pitch[open_i] != pitch[j]):
            open_i = -1
        t = tie[j]
        if t in ("stop", "continue") and open_i >= 0 and abs(q[open_i] + dur[open_i] - q[j]) < 1e-3:
            dur[open_i] = q[j] + dur[j] - q[open_i]
            keep[j] = False
            if t == "stop":
                open_i = -1
            continue
        open_i = j if t in ("start", "continue") else -1
    notes["dur"] = dur
    return notes[keep].reset_index(drop=True)


def load_score(path: str | Path, *, expand_repeats: bool = True, repeats="all") -> ScoreModel:
    """Load a score file into a :class:`~stimkit.score.model.ScoreModel` in performed order.

    Parameters
    ----------
    path : str or Path
        ``.musicxml``, ``.xml``, ``.mxl`` or ``.mid``/``.midi``.
    expand_repeats : bool
        ``False`` keeps the printed order (the same as ``repeats="printed"``).
    repeats : str or dict
        Which repeats are played: ``"all"`` (the notated performance: every repeat sign taken,
        D.C./D.S. followed, no repeat after the jump; the default), ``"none"`` (no repeat sign
        taken, D.C./D.S. followed), ``"max"`` (everything taken, also after a jump),
        ``"printed"`` (printed order) or a mapping of repeat-option id -> taken (see
        :class:`stimkit.score.repeats.RepeatPlan`; ``ScoreModel.repeat_plan.options`` lists
        them). When the marks are ambiguous the printed order is kept and a warning says so.

    Returns
    -------
    ScoreModel
        ``notes``, ``measures``, ``boundaries`` (:mod:`stimkit.score.markings`), ``tempo_map``
        (score_qn -> nominal seconds, :mod:`stimkit.score.tempomap`), ``warnings``, ``parts``;
        ``printed``, ``repeat_plan`` and ``repeat_choice`` let :func:`score_for_choice` build the
        same score for another choice of repeats without reading the file again.

    Raises
    ------
    InputError
        Missing or unreadable file, wrong extension, non-XML / malformed XML, entity
        declarations, no notes, a zero or negative tempo, a file beyond the limits of
        :mod:`stimkit.score.limits` (size, tags, notes, length, bar numbers).
    """
    import warnings as _warnings

    path = Path(path)
    if isinstance(repeats, str) and repeats not in REPEAT_CHOICES:
        raise ValueError(f"repeats must be one of {', '.join(REPEAT_CHOICES)} or a mapping, not {repeats!r}")
    with _warnings.catch_warnings(record=True) as caught:
        _warnings.simplefilter("always")
        score = read_music21(path)
    m21_warnings, _raw = notices.plain_reader_warnings(
        [str(w.message) for w in caught if type(w.message).__module__.startswith("music21")
         and not issubclass(w.category, (DeprecationWarning, PendingDeprecationWarning))])
    is_midi = path.suffix.lower() in MIDI_SUFFIXES
    printed = collect_printed(score, path=path, keep_velocity=is_midi)
    printed.is_midi = is_midi
    if printed.notes.empty:
        raise InputError("score has no pitched notes; nothing to plan or align (percussion-only and "
                         "empty scores are not supported)", path=path)
    plan, plan_warnings = plan_repeats(printed)
    printed.warnings = list(printed.warnings) + m21_warnings + plan_warnings
    md = getattr(score, "metadata", None)
    title = (getattr(md, "title", None) or getattr(md, "movementName", None) or "") if md is not None else ""
    printed.title = " ".join(str(title).split())
    if not expand_repeats:
        repeats = "printed"
    return build_score(printed, plan=plan, repeats=repeats, path=path)


def score_for_choice(score: ScoreModel, repeats) -> ScoreModel:
    """The same score as ``score`` (from :func:`load_score`) with another choice of repeats
    (``"all"``, ``"none"``, ``"max"``, ``"printed"`` or a mapping option id -> taken)."""
    if score.printed is None:
        raise ValueError("score_for_choice needs a score from load_score (it keeps the printed bars)")
    return build_score(score.printed, plan=score.repeat_plan, repeats=repeats, path=score.path)


def build_score(printed: PrintedScore, *, plan: RepeatPlan | None, repeats, path: Path) -> ScoreModel:
    """A :class:`ScoreModel` of the printed score played in the order that ``repeats`` chooses."""
    from . import markings, tempomap

    n = len(printed.bars)
    if repeats == "printed" or plan is None:
        order, choice = list(range(n)), {}
    else:
        choice = plan.choice(repeats)
        order = plan.order_for(choice)
    perf = performed_bars(printed, order)
    warnings = list(printed.warnings)

    measures = perf[["measure", "pass", "score_qn", "duration_qn", "numerator", "denominator",
                     "beat_qn", "first_beat"]].copy()
    measures["label"] = perf["label"].to_numpy()
    measures["index"] = perf["index"].to_numpy()
    measures = measures.astype({"measure": int, "pass": int, "numerator": int, "denominator": int})

    # notes in performed order
    pn = _place(printed.notes, perf)
    pn = _merge_ties(pn)
    part_names = printed.parts
    pn["part_name"] = [part_names[int(k)] for k in pn["part"]]
    # events in performed order
    ev = _place(printed.events, perf) if not printed.events.empty else printed.events.assign(
        score_qn=[], measure=[], perf=[], pass_=[])
    if not ev.empty:
        ev["part_name"] = [part_names[int(k)] for k in ev["part"]]
        # wedge ends: same printed distance from the start occurrence
        w = ev["kind"] == "wedge"
        if w.any():
            off_start = printed.bars["offset"].to_numpy()
            eb = ev.loc[w, "end_bar"].astype(int).to_numpy()
            sb = ev.loc[w, "bar"].astype(int).to_numpy()
            span = off_start[eb] + ev.loc[w, "end_off"].to_numpy() - (off_start[sb] + ev.loc[w, "off"].to_numpy())
            ev.loc[w, "end_qn"] = ev.loc[w, "score_qn"].to_numpy() + np.maximum(span, 0.0)

    model_tmp = ScoreModel(name=path.stem, path=path, notes=pd.DataFrame(columns=NOTE_COLUMNS),
                           measures=measures, boundaries=pd.DataFrame(columns=BOUNDARY_COLUMNS),
                           tempo_map=_dummy_map(measures), warnings=warnings,
                           repeats_expanded=repeats != "printed", parts=list(dict.fromkeys(part_names)))
    ctx = markings.MarkingContext(model=model_tmp, events=ev, notes=pn, printed=printed, path=path,
                                  jumps=jump_points(perf))
    tempo_events, fermatas = markings.tempo_events(ctx)
    first_bar_end = float(measures["score_qn"].iloc[0] + measures["duration_qn"].iloc[0])
    build = dict(fermatas=fermatas, total_qn=model_tmp.total_qn, first_note_qn=float(pn["score_qn"].min()),
                 first_bar_end_qn=first_bar_end, path=path)
    tmap, tnotes = tempomap.build_tempo_map(tempo_events, **build)
    restored = markings.restore_after_jumps(ctx, tempo_events, tmap)
    if restored:
        tempo_events = sorted(tempo_events + restored, key=lambda e: e["qn"])
        tmap, tnotes = tempomap.build_tempo_map(tempo_events, **build)
    warnings.extend(tnotes)
    model_tmp.tempo_map = tmap
    notes = markings.note_table(ctx)
    model_tmp.notes = notes
    model_tmp.boundaries = markings.boundaries(ctx, tempo_events=tempo_events)
    model_tmp.warnings[:] = list(dict.fromkeys(model_tmp.warnings))
    model_tmp.title = getattr(printed, "title", "")
    model_tmp.printed = printed
    model_tmp.repeat_plan = plan
    model_tmp.repeat_choice = choice
    return model_tmp


def _dummy_map(measures):
    from ..timemap import TimeMap

    total = float((measures["score_qn"] + measures["duration_qn"]).max())
    return TimeMap([0.0, max(total, 1.0)], [0.0, max(total, 1.0) * 0.6])
