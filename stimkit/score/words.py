"""Tempo words: the nominal BPM the project assigns to a written tempo word.

A score's tempo words ("Allegro", "Langsam", "rit.", "a tempo") carry no number; to plan a
session we still need a nominal tempo. This module holds the project's own word table in several
languages and classifies a text as

- an **absolute** tempo word (``kind="tempo"``, a BPM),
- a **gradual** change (``kind="ramp"``, direction -1 slower / +1 faster: rit., rall., accel.),
- an **immediate relative** change (``kind="relative"``, a factor on the current tempo: più mosso,
  meno mosso, riten.),
- a **return** (``kind="return"``: ``a tempo`` -> the tempo before the last change, ``Tempo I`` ->
  the first tempo of the piece),
- or nothing (``None``).

Conventions
-----------
- BPM values are **project conventions** (rounded centres of the ranges printed on common
  mechanical metronomes), not facts: the sidecar says so. They count the notated beat. To turn
  them into quarter-note BPM, :func:`word_quarter_bpm` uses the bar's beat in quarter notes
  ``beat_qn``: for ``beat_qn <= 1`` the word's BPM is taken as quarter BPM; for longer beats
  (6/8, 2/2) the beat is counted at two thirds of the word's BPM (a dotted-quarter Allegro is
  slower per beat than a quarter Allegro), i.e. ``quarter = bpm * 2/3 * beat_qn``.
- Default factors (project conventions): relative faster x1.15, slower x0.87, ``riten.`` x0.85.
  Gradual changes are handled in :mod:`stimkit.score.tempomap` (default depth there).
- Matching is case- and accent-insensitive; the longest matching phrase wins; modifiers
  ``molto``/``assai`` push an absolute word 10 % away from Moderato, ``ma non troppo``/
  ``moderato`` (as a second word) 10 % towards it.

References
----------
.. [1] Common metronome markings (Maelzel-type metronome scales), used here as a convention only.
"""

from __future__ import annotations

import re
import unicodedata
from functools import lru_cache
from dataclasses import dataclass

__all__ = ["TempoWord", "classify_tempo_text", "word_quarter_bpm", "ABSOLUTE_WORDS",
           "RAMP_WORDS", "RELATIVE_WORDS", "RETURN_WORDS", "FASTER_FACTOR", "SLOWER_FACTOR"]

FASTER_FACTOR = 1.15
SLOWER_FACTOR = 0.87
MODERATO_BPM = 108.0

#: Absolute tempo words -> nominal beats per minute (project convention).
ABSOLUTE_WORDS: dict[str, float] = {
    # Italian
    "larghissimo": 24, "grave": 40, "lentissimo": 40, "largo": 50, "larghetto": 63, "lento": 56,
    "adagissimo": 40, "adagio": 70, "adagietto": 74, "andante": 84, "andantino": 92,
    "andante con moto": 96, "andante moderato": 96, "marcia moderato": 84,
    "moderato": MODERATO_BPM, "allegretto": 112, "allegro moderato": 120, "allegro": 132,
    "allegro ma non troppo": 120, "allegro assai": 152, "molto allegro": 152, "allegro vivace": 144,
    "vivace": 160, "vivacissimo": 172, "allegrissimo": 172, "presto": 176, "prestissimo": 200,
    "tempo di valse": 160, "tempo di minuetto": 112, "tempo di marcia": 112, "tempo giusto": 108,
    "maestoso": 80, "sostenuto": 72, "cantabile": 84, "comodo": 100, "tranquillo": 72,
    # German
    "sehr langsam": 44, "langsam": 60, "ziemlich langsam": 66, "getragen": 56, "gehend": 84,
    "massig": 100, "maessig": 100, "mässig": 100, "gemessen": 84, "bewegt": 112,
    "ziemlich bewegt": 108, "lebhaft": 144, "frisch": 132, "schnell": 152, "sehr schnell": 176,
    "rasch": 160, "ruhig": 72,
    # French
    "tres lent": 44, "lent": 56, "lentement": 58, "modere": 108, "modérément": 108, "modérement": 108,
    "moderement": 108, "allant": 104, "anime": 132, "vif": 152, "tres vif": 172, "vite": 160,
    "tres vite": 176, "gai": 132, "calme": 66,
    # English
    "very slowly": 44, "very slow": 44, "slowly": 60, "slow": 60, "moderately slow": 80,
    "moderately": 108, "moderate": 108, "moderately fast": 120, "walking pace": 84, "brisk": 132,
    "lively": 144, "fast": 152, "quick": 152, "quickly": 152, "very fast": 176, "steady": 96,
    "gently": 76, "calmly": 66, "with movement": 112,
}

#: Gradual changes -> direction (-1 slower, +1 faster).
RAMP_WORDS: dict[str, int] = {
    "rit": -1, "rit.": -1, "ritard": -1, "ritard.": -1, "ritardando": -1, "rall": -1, "rall.": -1,
    "rallentando": -1, "allarg": -1, "allarg.": -1, "allargando": -1, "slentando": -1,
    "calando": -1, "smorzando": -1, "morendo": -1, "poco rit.": -1, "poco a poco rit.": -1,
    "molto rit.": -1, "poco rall.": -1, "molto rall.": -1,
    "accel": 1, "accel.": 1, "accelerando": 1, "stringendo": 1, "string.": 1, "poco accel.": 1,
    "poco a poco accel.": 1, "affrettando": 1, "incalzando": 1,
    # German / French / English
    "zuruckhaltend": -1, "zurückhaltend": -1, "zurückgehalten": -1, "zuruckgehalten": -1,
    "langsamer werden": -1, "breiter": -1, "drangend": 1, "drängend": 1, "schneller werden": 1,
    "cedez": -1, "en retenant": -1, "retenez": -1, "en elargissant": -1, "en pressant": 1,
    "pressez": 1, "en animant": 1,
    "slowing": -1, "slowing down": -1, "gradually slower": -1, "broadening": -1,
    "getting faster": 1, "gradually faster": 1, "speeding up": 1,
}

#: Immediate relative changes -> factor on the current tempo (project convention).
RELATIVE_WORDS: dict[str, float] = {
    "piu mosso": FASTER_FACTOR, "più mosso": FASTER_FACTOR, "piu moto": FASTER_FACTOR,
    "piu allegro": FASTER_FACTOR, "più allegro": FASTER_FACTOR, "piu vivo": FASTER_FACTOR,
    "più vivo": FASTER_FACTOR, "piu presto": FASTER_FACTOR, "più presto": FASTER_FACTOR,
    "poco piu mosso": 1.08, "poco più mosso": 1.08,
    "meno mosso": SLOWER_FACTOR, "piu lento": SLOWER_FACTOR, "più lento": SLOWER_FACTOR,
    "meno allegro": SLOWER_FACTOR, "poco meno mosso": 0.93, "poco più lento": 0.93,
    "poco piu lento": 0.93, "riten": 0.85, "riten.": 0.85, "ritenuto": 0.85, "ritenente": 0.85,
    "doppio movimento": 2.0, "doppio piu mosso": 2.0,
    "schneller": FASTER_FACTOR, "etwas schneller": 1.08, "langsamer": SLOWER_FACTOR,
    "etwas langsamer": 0.93, "plus vite": FASTER_FACTOR, "plus anime": FASTER_FACTOR,
    "plus lent": SLOWER_FACTOR, "un peu plus lent": 0.93, "un peu plus vite": 1.08,
    "retenu": 0.85, "faster": FASTER_FACTOR, "slower": SLOWER_FACTOR, "a little faster": 1.08,
    "a little slower": 0.93, "l'istesso tempo": 1.0, "listesso tempo": 1.0,
}

#: Returns -> "previous" (a tempo) or "first" (Tempo I).
RETURN_WORDS: dict[str, str] = {
    "a tempo": "previous", "in tempo": "previous", "im tempo": "previous", "wieder im tempo": "previous",
    "au mouvement": "previous", "back to tempo": "previous", "in time": "previous",
    "tempo i": "first", "tempo 1": "first", "tempo primo": "first", "tempo 1o": "first",
    "tempo 1mo": "first", "1o tempo": "first", "primo tempo": "first", "1er mouvement": "first",
    "premier mouvement": "first", "erstes zeitmass": "first", "erstes tempo": "first",
    "tempo come prima": "first", "come prima": "first", "original tempo": "first",
}


@dataclass(frozen=True)
class TempoWord:
    """Result of :func:`classify_tempo_text`.

    ``kind`` is ``"tempo"`` (``bpm`` set, in the notated beat), ``"ramp"`` (``direction`` -1/+1),
    ``"relative"`` (``factor``), or ``"return"`` (``target`` ``"previous"``/``"first"``);
    ``matched`` is the table entry that matched.
    """

    kind: str
    matched: str
    bpm: float | None = None
    direction: int = 0
    factor: float | None = None
    target: str | None = None


def _fold(text: str) -> str:
    """Lower case, accents removed, whitespace collapsed."""
    t = unicodedata.normalize("NFKD", text)
    t = "".join(c for c in t if not unicodedata.combining(c)).lower()
    t = t.replace("’", "'").replace("ß", "ss")
    return " ".join(t.split())


def _table(d):
    return sorted(((_fold(k), v) for k, v in d.items()), key=lambda kv: -len(kv[0]))


def _compile(table):
    """One alternation per table, longest phrase first, matched on word boundaries."""
    alts = [re.escape(k) + (r"(?![a-z])" if k[-1].isalnum() else "") for k, _ in table]
    return re.compile(r"(?<![a-z])(?:" + "|".join(f"({a})" for a in alts) + ")"), table


_ABS = _compile(_table(ABSOLUTE_WORDS))
_RAMP = _compile(_table(RAMP_WORDS))
_REL = _compile(_table(RELATIVE_WORDS))
_RET = _compile(_table(RETURN_WORDS))


def _find(text: str, compiled) -> tuple[str, object] | None:
    rx, table = compiled
    best = None
    for mt in rx.finditer(text):
        k = mt.lastindex - 1
        if best is None or len(table[k][0]) > len(table[best][0]):
            best = k
    return None if best is None else table[best]


@lru_cache(maxsize=4096)
def classify_tempo_text(text: str) -> TempoWord | None:
    """Classify a score text as a tempo word, a tempo change, or ``None``.

    Relative and return phrases are checked before absolute words ("poco più lento" is relative,
    not "Lento"; "Tempo I" is a return), then gradual changes, then absolute words with
    modifiers. Text longer than 60 characters is not a tempo indication.
    """
    t = _fold(text or "")
    if not t or len(t) > 60:
        return None
    hit = _find(t, _RET)
    if hit:
        return TempoWord("return", hit[0], target=str(hit[1]))
    hit = _find(t, _REL)
    if hit:
        return TempoWord("relative", hit[0], factor=float(hit[1]))
    hit = _find(t, _RAMP)
    if hit:
        return TempoWord("ramp", hit[0], direction=int(hit[1]))
    hit = _find(t, _ABS)
    if hit:
        key, bpm = hit[0], float(hit[1])
        rest = t.replace(key, " ")
        if re.search(r"\b(molto|assai|sehr|tres|very)\b", rest):
            bpm = MODERATO_BPM + (bpm - MODERATO_BPM) * 1.1
        elif re.search(r"non troppo|non tanto|moderato|maessig|massig|modere", rest):
            bpm = MODERATO_BPM + (bpm - MODERATO_BPM) * 0.9
        return TempoWord("tempo", key, bpm=round(bpm, 1))
    return None


def word_quarter_bpm(bpm: float, *, beat_qn: float) -> float:
    """Quarter-note BPM of a tempo word's BPM in a bar whose beat is ``beat_qn`` quarters.

    ``beat_qn <= 1``: the word counts quarters. Longer beats (dotted quarter in 6/8, half in
    2/2) are counted at two thirds of the word's BPM (project convention, see module notes).
    """
    if beat_qn <= 1.0 + 1e-9:
        return float(bpm)
    return float(bpm) * (2.0 / 3.0) * float(beat_qn)
