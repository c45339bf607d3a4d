"""Plain words for what music21 says while it reads a score.

What it computes
----------------
:func:`plain_reader_warnings` turns the warnings music21 10.5 raises while importing a file into
sentences a musician reads (bar, part, what was done), drops those the loader itself reports
better (a bar longer than its time signature: :mod:`stimkit.score.barsync` names it with the part
and what was done about it; transpositions: :mod:`stimkit.score.transpose`) or that change
nothing we use (instrument sounds, staff types), and sums up the rest in one sentence. No raw
library text reaches the model's warnings, hence the cue sheet or the terminal; the raw messages
are returned separately for debugging.

The patterns are those of ``music21/musicxml/xmlToM21.py`` in music21 10.5.1 (*read from its
source*); a message of another version that matches none of them is counted, not shown.
"""

from __future__ import annotations

import re

__all__ = ["plain_reader_warnings"]

_DROP = (
    re.compile(r"is\s*overfull", re.I),                      # barsync reports it, per part and bar
    re.compile(r"transposition tag, but no instrument", re.I),  # transpose reads <transpose> itself
    re.compile(r"following exception took place", re.I),    # an error follows (InputError)
    re.compile(r"^Current voice", re.I),                     # detail lines of 'Cannot find voice'
    re.compile(r"staff-type", re.I),
    re.compile(r"percussion|instrument|midi program", re.I),  # sounds of a playback device
)
_RULES = (
    (re.compile(r"Line <(?P<tag>[\w-]+)> stop without start", re.I),
     lambda m: f"a line ({m['tag']}) ends without a start in the file; it was left out"),
    (re.compile(r"Could not import (?P<tag>[\w-]+)", re.I),
     lambda m: f"a {m['tag']} marking could not be read; it was left out"),
    (re.compile(r"Cannot find voice (?P<v>\S+?);?\s+putting outside", re.I),
     lambda m: f"notes of an undeclared voice {m['v'].strip(chr(39))} were read into the bar's main "
               "voice; check that bar's rhythm"),
    (re.compile(r"missing voice tag", re.I),
     lambda m: "notes without a voice number were read as voice 1"),
)


def plain_reader_warnings(messages: list[str]) -> tuple[list[str], list[str]]:
    """(plain-word warnings, raw messages) for music21's import warnings, in order, deduplicated."""
    plain: list[str] = []
    raw: list[str] = []
    other = 0
    for msg in dict.fromkeys(" ".join(str(m).split()) for m in messages):
        raw.append(msg)
        if any(p.search(msg) for p in _DROP):
            continue
        for pat, say in _RULES:
            hit = pat.search(msg)
            if hit:
                plain.append(say(hit))
                break
        else:
            other += 1
    plain = list(dict.fromkeys(plain))
    if other:
        plain.append(f"the score reader worked around {other} other problem"
                     f"{'s' if other > 1 else ''} in the file; compare the result with the printed score")
    return plain, raw
