"""Tiny hand-written MusicXML fixtures (MusicXML 4.0 partwise), built as strings.

Each helper returns plain MusicXML text so every test shows exactly what the file says.
Durations use ``<divisions>`` = 4 per quarter note.
"""

from __future__ import annotations

DIV = 4


def note(step="C", octave=5, quarters=1.0, *, alter=0, tie=None, chord=False, rest=False,
         fermata=False, extra_notations="", grace=False) -> str:
    """One <note>; ``tie`` in (None, 'start', 'stop', 'both')."""
    parts = ["<note>"]
    if grace:
        parts.append("<grace/>")
    if chord:
        parts.append("<chord/>")
    if rest:
        parts.append("<rest/>")
    else:
        alt = f"<alter>{alter}</alter>" if alter else ""
        parts.append(f"<pitch><step>{step}</step>{alt}<octave>{octave}</octave></pitch>")
    if not grace:
        parts.append(f"<duration>{int(round(quarters * DIV))}</duration>")
    ties = {"start": ["start"], "stop": ["stop"], "both": ["stop", "start"]}.get(tie, [])
    parts += [f'<tie type="{t}"/>' for t in ties]
    nots = "".join(f'<tied type="{t}"/>' for t in ties)
    if fermata:
        nots += "<fermata/>"
    nots += extra_notations
    if nots:
        parts.append(f"<notations>{nots}</notations>")
    parts.append("</note>")
    return "".join(parts)


def rest(quarters=1.0, *, fermata=False, measure=False) -> str:
    r = '<rest measure="yes"/>' if measure else "<rest/>"
    n = f"<note>{r}<duration>{int(round(quarters * DIV))}</duration>"
    if fermata:
        n += "<notations><fermata/></notations>"
    return n + "</note>"


def direction(inner: str, *, sound: str = "") -> str:
    """A <direction> holding direction-type children ``inner`` (and an optional <sound>)."""
    return f'<direction placement="above"><direction-type>{inner}</direction-type>{sound}</direction>'


def words(text: str) -> str:
    return direction(f"<words>{text}</words>")


def dyn(name: str) -> str:
    return direction(f"<dynamics><{name}/></dynamics>")


def metronome(beat_unit="quarter", per_minute=120, *, dotted=False, text=None, sound=True) -> str:
    dot = "<beat-unit-dot/>" if dotted else ""
    inner = f"<words>{text}</words></direction-type><direction-type>" if text else ""
    inner += f"<metronome><beat-unit>{beat_unit}</beat-unit>{dot}<per-minute>{per_minute}</per-minute></metronome>"
    return direction(inner)


def attributes(*, beats=None, beat_type=None, fifths=None, mode=None, divisions=True) -> str:
    out = "<attributes>"
    if divisions:
        out += f"<divisions>{DIV}</divisions>"
    if fifths is not None:
        out += f"<key><fifths>{fifths}</fifths>" + (f"<mode>{mode}</mode>" if mode else "") + "</key>"
    if beats is not None:
        out += f"<time><beats>{beats}</beats><beat-type>{beat_type}</beat-type></time>"
    return out + "</attributes>"


def barline(location="right", style=None, repeat=None, ending=None) -> str:
    out = f'<barline location="{location}">'
    if style:
        out += f"<bar-style>{style}</bar-style>"
    if ending:
        out += f'<ending number="{ending[0]}" type="{ending[1]}"/>'
    if repeat:
        out += f'<repeat direction="{repeat}"/>'
    return out + "</barline>"


def measure(number, body: str, *, implicit=False) -> str:
    imp = ' implicit="yes"' if implicit else ""
    return f'<measure number="{number}"{imp}>{body}</measure>'


def score(parts: list[tuple[str, list[str]]], *, doctype: str = "") -> str:
    """A score-partwise document from ``[(part name, [measure xml, ...]), ...]``."""
    plist = "".join(f'<score-part id="P{k + 1}"><part-name>{name}</part-name></score-part>'
                    for k, (name, _) in enumerate(parts))
    body = "".join(f'<part id="P{k + 1}">' + "".join(ms) + "</part>" for k, (_, ms) in enumerate(parts))
    return ('<?xml version="1.0" encoding="UTF-8"?>\n' + doctype
            + f'<score-partwise version="4.0"><part-list>{plist}</part-list>{body}</score-partwise>\n')


def bars_of(n, *, first_attrs=None, note_q=1.0, per_bar=4, step="C", octave=5, extra=None) -> list[str]:
    """``n`` bars of ``per_bar`` notes of ``note_q`` quarters; ``extra`` maps bar -> xml prepended."""
    extra = extra or {}
    out = []
    for i in range(1, n + 1):
        body = (first_attrs if i == 1 and first_attrs else "") + extra.get(i, "")
        body += "".join(note(step, octave, note_q) for _ in range(per_bar))
        out.append(measure(i, body))
    return out


def write(tmp_path, name: str, text: str):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p
