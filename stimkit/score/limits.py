"""Resource limits for score files: bounded reading, element counts and notated length.

What it computes
----------------
Checks that run *before* the expensive work, so that a tiny hostile file cannot take the
machine (a 185 KB MXL that expands to 190 MB of elements, a zip member that lies about its size,
one note of a million quarter notes, a 44-byte MIDI file with one note of 2**28 ticks):

- :func:`read_bounded` reads a file or a zip member as a stream and stops at ``MAX_XML_BYTES``
  or at ``MAX_MARKUP`` tags (``<`` characters), whichever comes first -- the member's declared
  size is never trusted;
- :func:`check_xml_tree` counts ``<note>``, ``<measure>`` and ``<direction>`` elements of the
  checked XML tree and estimates the memory music21 would need for them before it builds its
  (much larger) objects;
- :func:`read_midi` reads a Standard MIDI File with music21's low-level reader, then bounds its
  length (ticks / ticks per quarter) and its note count before music21 makes bars of it;
- :func:`check_length` refuses a score longer than ``MAX_TOTAL_QN`` quarter notes;
- :func:`check_measure_number` refuses bar numbers beyond ``MAX_MEASURE_NUMBER``;
- :func:`check_xml_tree` and :func:`read_midi` refuse a time signature of more than
  ``MAX_BEATS_PER_BAR`` beats (its numerator, summed over a composite one such as 3+2).

Conventions (project limits, sized from measurements; raise them here if a real score needs it)
----------------------------------------------------------------------------------------------
- music21 10.5 holds about 4.7 KB per note, 7.5 KB per bar (even an empty one: a 25-byte
  ``<measure/>``) and 4 KB per ``<direction>`` (:data:`KB_PER_ELEMENT`, *measured* with 20,000 of
  each in a one-part score; 3.7 KB per note on ``beethoven/opus18no1/movement1.mxl``), and
  ElementTree about 240 bytes per element. A score whose estimate exceeds ``MAX_MODEL_MB`` =
  2,000 MB is refused, as are more than ``MAX_NOTES`` = 300,000 notes; ``MAX_MARKUP`` = 5 million
  tags keeps the XML tree near 1 GB even for empty elements. The largest scores we know (full
  orchestral movements: tens of thousands of notes and bars) have a small fraction of these.
- ``MAX_TOTAL_QN`` = 100,000 quarter notes is more than eight hours even at quarter = 208, the
  top of a metronome's scale (common knowledge): no performance is that long, so a longer score
  is a damaged file (typically one absurd ``<duration>``).
- ``MAX_BEATS_PER_BAR`` = 128: music21 builds a meter's accent pattern in a time that grows
  faster than the square of its beats (*measured*, music21 10.5: 64 beats 0.4 s, 128 beats
  1.5 s, 300 beats 8.5 s, 1000 beats 73 s; a 1,000,000/4 bar never finished), so a file of a
  few hundred bytes could hold the machine. Real meters have a few dozen beats at most, even
  the long unmeasured bars of cadenzas that notation programs export as one large meter.
- ``MAX_MIDI_BYTES`` = 4 MB: music21 makes two Python objects per MIDI event; a one-hour piano
  performance is about 1 MB (common experience with Standard MIDI Files).
All errors are :class:`stimkit.errors.InputError` (exit 2) naming the file and what to do.
"""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError

__all__ = ["MAX_XML_BYTES", "MAX_MARKUP", "MAX_BEATS_PER_BAR", "check_meter", "MAX_NOTES", "MAX_MODEL_MB", "KB_PER_ELEMENT", "MAX_TOTAL_QN", "MAX_MEASURE_NUMBER",
           "MAX_MIDI_BYTES", "read_bounded", "check_xml_tree", "read_midi", "check_length",
           "check_measure_number"]

MAX_XML_BYTES = 100_000_000
MAX_MARKUP = 5_000_000
MAX_NOTES = 300_000
MAX_MODEL_MB = 2_000.0
#: music21 memory per element, KB (measured on music21 10.5.1; see the module notes)
KB_PER_ELEMENT = {"note": 4.7, "measure": 7.5, "direction": 4.0}
MAX_TOTAL_QN = 100_000.0
MAX_MEASURE_NUMBER = 1_000_000
MAX_MIDI_BYTES = 4_000_000
MAX_BEATS_PER_BAR = 128
_CHUNK = 1 << 20


def read_bounded(fh, *, path: Path, what: str = "score") -> bytes:
    """Read the binary stream ``fh`` in 1 MB chunks; stop with an :class:`InputError` as soon as
    more than ``MAX_XML_BYTES`` bytes or ``MAX_MARKUP`` tags have come out."""
    chunks: list[bytes] = []
    total = tags = 0
    while True:
        b = fh.read(_CHUNK)
        if not b:
            break
        total += len(b)
        tags += b.count(b"<")
        if total > MAX_XML_BYTES:
            raise InputError(f"the {what} expands to more than {MAX_XML_BYTES // 1_000_000} MB of XML; "
                             "refused (a damaged or hostile file?); export the score again", path=path)
        if tags > MAX_MARKUP:
            raise InputError(f"the {what} holds more than {MAX_MARKUP:,} XML tags; refused (a damaged "
                             "or hostile file?); export the score again or split it", path=path)
        chunks.append(b)
    return b"".join(chunks)


def check_meter(beats: float, *, path: Path, where: str = "", shown: str = "") -> None:
    """Refuse a time signature of more than ``MAX_BEATS_PER_BAR`` beats (see the module notes)."""
    if not beats <= MAX_BEATS_PER_BAR:
        shown = shown if len(shown) <= 24 else shown[:20] + "..."
        raise InputError(f"the time signature {shown}{where} has more than {MAX_BEATS_PER_BAR} beats "
                         "in a bar, beyond any real meter (a damaged or hostile file?); fix that "
                         "time signature or export the score again", path=path)


def _numerator(text: str) -> float:
    """Beats of a MusicXML ``<beats>`` text (``3``, ``3+2``); NaN when unreadable."""
    try:
        return float(sum(float(x) for x in str(text).split("+")))
    except (TypeError, ValueError, OverflowError):
        return float("nan")


def _check_meters(root, *, path: Path) -> None:
    for m in root.iter("measure"):
        for t in m.iter("time"):
            nums = [(b.text or "").strip() for b in t.iter("beats")]
            beats = sum(_numerator(x) for x in nums if x) if nums else 0.0
            if beats != beats:  # NaN: music21 says what it cannot read
                continue
            kinds = [(b.text or "").strip() for b in t.iter("beat-type")]
            shown = " + ".join(f"{a}/{b}" for a, b in zip(nums, kinds)) or "+".join(nums)
            check_meter(beats, path=path, where=f" at bar {m.get('number', '?')}", shown=shown)


def check_xml_tree(root, *, path: Path) -> None:
    """Refuse a checked MusicXML tree with more than ``MAX_NOTES`` notes, or whose music21 objects
    would take more than ``MAX_MODEL_MB`` (estimated from its notes, bars and directions), or with a
    time signature of more than ``MAX_BEATS_PER_BAR`` beats."""
    _check_meters(root, path=path)
    counts = {tag: sum(1 for _ in root.iter(tag)) for tag in KB_PER_ELEMENT}
    n = counts["note"]
    if n > MAX_NOTES:
        raise InputError(f"the score holds {n:,} notes, more than the {MAX_NOTES:,} this tool reads "
                         "(a damaged file?); split the score into movements", path=path)
    mb = sum(KB_PER_ELEMENT[t] * c for t, c in counts.items()) / 1024.0
    if mb > MAX_MODEL_MB:
        raise InputError(f"the score would need about {mb:,.0f} MB to read ({counts['note']:,} notes, "
                         f"{counts['measure']:,} bars, {counts['direction']:,} directions), more than the "
                         f"{MAX_MODEL_MB:,.0f} MB this tool allows (a damaged file?); split the score",
                         path=path)


def check_length(total_qn: float, *, path: Path, where: str = "") -> None:
    """Refuse a notated length beyond ``MAX_TOTAL_QN`` quarter notes (or not a finite number)."""
    if not total_qn <= MAX_TOTAL_QN:  # also catches NaN
        raise InputError(f"the score{where} lasts {total_qn:,.0f} quarter notes, longer than any "
                         f"performance (limit {MAX_TOTAL_QN:,.0f}: over eight hours at quarter = 208); "
                         "a note or bar has an absurd length -- check the file's durations", path=path)


def check_measure_number(number, *, path: Path) -> None:
    """Refuse a bar number whose size is beyond ``MAX_MEASURE_NUMBER``."""
    try:
        ok = abs(int(number)) <= MAX_MEASURE_NUMBER
    except (TypeError, ValueError, OverflowError):
        ok = False
    if not ok:
        shown = str(number)
        shown = shown if len(shown) <= 24 else shown[:20] + "..."
        raise InputError(f"bar number {shown} is out of range (more than {MAX_MEASURE_NUMBER:,}); "
                         "renumber the bars", path=path)


def read_midi(path: Path):
    """Read a Standard MIDI File into a ``music21.midi.MidiFile`` after bounding its size, its
    length in quarter notes, its number of notes and its meters (before any bars are made)."""
    from music21 import midi

    size = path.stat().st_size
    if size > MAX_MIDI_BYTES:
        raise InputError(f"MIDI file is larger than {MAX_MIDI_BYTES // 1_000_000} MB; refused "
                         "(a score of one piece is far smaller)", path=path)
    mf = midi.MidiFile()
    try:
        mf.readstr(path.read_bytes())
    except Exception as exc:  # music21 raises many kinds on damaged files
        raise InputError(f"this MIDI file cannot be read ({type(exc).__name__}); export it again",
                         path=path) from None
    tpq = int(getattr(mf, "ticksPerQuarterNote", 0) or 0)
    if tpq <= 0:
        raise InputError("MIDI file has no ticks-per-quarter division; export it again", path=path)
    longest = 0
    notes = 0
    for tr in mf.tracks:
        ticks = 0
        for ev in tr.events:
            if isinstance(ev, midi.DeltaTime):
                ticks += int(ev.time or 0)
            elif getattr(ev, "type", None) == midi.ChannelVoiceMessages.NOTE_ON and getattr(ev, "velocity", 0):
                notes += 1
            elif getattr(ev, "type", None) == midi.MetaEvents.TIME_SIGNATURE and ev.data:
                data = bytes(ev.data, "latin-1") if isinstance(ev.data, str) else bytes(ev.data)
                nn, dd = data[0], (data[1] if len(data) > 1 else 2)
                check_meter(float(nn), path=path, shown=f"{nn}/{2 ** dd if dd <= 10 else f'2^{dd}'}")
        longest = max(longest, ticks)
    check_length(longest / tpq, path=path)
    if notes > MAX_NOTES:
        raise InputError(f"the MIDI file holds {notes:,} notes, more than the {MAX_NOTES:,} this tool "
                         "reads; split it into pieces", path=path)
    return mf
