"""Performed order of printed bars: repeats, voltas, D.C./D.S., Fine and Coda.

Input is one :class:`BarMarks` per printed bar (in printed order, index 0..n-1); output is the
list of printed-bar indices in the order performed. The rules are the conventions of music
notation (common practice, as taught in notation handbooks):

- ``|:`` ... ``:|`` plays the enclosed bars ``times`` times (default 2); an end repeat with no
  start repeat before it goes back to the start of the piece (or to the bar after the previous
  completed repeat section).
- Volta (ending) bars play only on the passes their numbers list; a repeat end inside a volta
  whose numbers are ``1, 2`` plays the section three times.
- D.C. jumps to the first bar, D.S. to the bar carrying the segno, at the end of the bar that
  carries the instruction; after the jump repeats are not taken again and the last volta is
  played; *al Fine* stops at the end of the bar with Fine (a plain D.C./D.S. also stops there
  when a Fine exists); *al Coda* jumps from the bar with the first coda sign ("To Coda") to the
  bar with the last coda sign.

music21 has :class:`music21.repeat.Expander`, but it plays the first volta again after a D.C.
(measured on music21 10.5.1), and it renumbers bars under D.S.; the order is computed here from
the marks instead, and the caller keeps every printed bar's number and offset.

Anything ambiguous (a D.S. without a segno, two segni, an al Coda without two coda signs, a
runaway loop) raises :class:`RepeatError`; the caller then keeps the printed order and warns.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["BarMarks", "RepeatError", "performed_order"]


class RepeatError(ValueError):
    """The repeat marks cannot be expanded unambiguously."""


@dataclass
class BarMarks:
    """Repeat-related marks of one printed bar (union over all parts)."""

    repeat_start: bool = False
    repeat_end: bool = False
    times: int | None = None
    voltas: tuple[int, ...] = ()
    segno: bool = False
    coda: int = 0  # number of coda signs / "To Coda" marks in the bar
    fine: bool = False
    jump: str | None = None  # "dc", "ds"
    jump_to: str | None = None  # None, "fine", "coda"


def performed_order(bars: list[BarMarks], *, max_factor: int = 16) -> list[int]:
    """Printed-bar indices in performed order (see module docstring for the rules)."""
    n = len(bars)
    if n == 0:
        return []
    has_marks = any(b.repeat_start or b.repeat_end or b.voltas or b.jump for b in bars)
    if not has_marks:
        return list(range(n))

    segnos = [i for i, b in enumerate(bars) if b.segno]
    coda_bars = [i for i, b in enumerate(bars) for _ in range(b.coda)]
    fines = [i for i, b in enumerate(bars) if b.fine]
    jumps = [i for i, b in enumerate(bars) if b.jump]
    if len(jumps) > 1:
        raise RepeatError(f"{len(jumps)} D.C./D.S. instructions (expected at most one)")
    if jumps:
        jb = bars[jumps[0]]
        if jb.jump == "ds" and len(segnos) != 1:
            raise RepeatError(f"D.S. needs exactly one segno, found {len(segnos)}")
        if jb.jump_to == "coda" and len(coda_bars) < 2:
            raise RepeatError("al Coda needs a 'To Coda' sign and a coda sign")
        if jb.jump_to == "fine" and not fines:
            raise RepeatError("al Fine without a Fine")

    order: list[int] = []
    i = 0
    rep_start = 0
    pass_no = 1
    taken: dict[int, int] = {}
    jumped = False
    while i < n:
        if len(order) > max_factor * n:
            raise RepeatError("repeat structure does not terminate")
        b = bars[i]
        if b.repeat_start and not jumped:
            if rep_start != i:
                pass_no = 1
            rep_start = i
        if b.voltas:
            want = pass_no
            if jumped:
                # after a jump play the highest-numbered ending of this group
                j = i
                while j < n and bars[j].voltas:
                    j += 1
                want = max(max(bars[k].voltas) for k in range(i, j))
            if want not in b.voltas:
                i += 1
                continue
        order.append(i)
        if jumped and b.fine and (bars[jumps[0]].jump_to in (None, "fine")):
            break
        if jumped and bars[jumps[0]].jump_to == "coda" and b.coda and i == coda_bars[0]:
            i = coda_bars[-1]
            continue
        if b.repeat_end and not jumped:
            times = b.times or (max(b.voltas) + 1 if b.voltas else 2)
            done = taken.get(i, 1)
            if done < times:
                taken[i] = done + 1
                pass_no = done + 1
                i = rep_start
                continue
            taken[i] = 1
            rep_start = i + 1
            if not b.voltas:
                pass_no = 1
        if b.jump and not jumped:
            jumped = True
            pass_no = 1
            i = 0 if b.jump == "dc" else segnos[0]
            continue
        if not b.voltas and not b.repeat_end and pass_no > 1 and i > max(taken, default=-1):
            pass_no = 1
        i += 1
    return order
