"""music21's import warnings become plain words; no raw library text reaches the model.

The raw messages are those of ``music21/musicxml/xmlToM21.py`` (music21 10.5.1, read from its
source). The cue sheet's own test of raw wording (``stimkit.report.cuesheet.plain_remarks``, which
hides any remark naming a library, class or object) is used as the outside check.
"""

from __future__ import annotations

from stimkit.report.cuesheet import plain_remarks
from stimkit.score.notices import plain_reader_warnings

RAW = [
    "Warning: measure 3 in part Violin IIis overfull: 3.1064453125 > 3.0,assuming 3.0 is correct.",
    "Line <dashes> stop without start",
    "Could not import wedge: <music21.musicxml.xmlObjects.MusicXMLImportException>",
    "Cannot find voice '3'; putting outside of voices.",
    "Current voiceIds: ['1', '2']",
    "Current voices: [<music21.stream.Voice 1>] in m. 4",
    "Received a transposition tag, but no instrument to put it on!",
    "something new in another version <music21.stream.Measure 5 offset=0.0>",
]


def test_plain_words_and_nothing_raw():
    plain, raw = plain_reader_warnings(RAW + RAW[:2])
    assert raw == list(dict.fromkeys(" ".join(m.split()) for m in RAW))   # kept for debugging only
    assert plain == [
        "a line (dashes) ends without a start in the file; it was left out",
        "a wedge marking could not be read; it was left out",
        "notes of an undeclared voice 3 were read into the bar's main voice; check that bar's rhythm",
        "the score reader worked around 1 other problem in the file; compare the result with the printed score",
    ]
    shown, n_raw = plain_remarks(plain)
    assert shown == plain and n_raw == 0
