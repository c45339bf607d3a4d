"""Performed order of printed bars: repeats, voltas, D.C./D.S., Fine and Coda -- and the choices a
performer has among them.

Input is one :class:`BarMarks` per printed bar (in printed order, index 0..n-1). :func:`repeat_plan`
returns a :class:`RepeatPlan`: the *longest* performed order (every repeat taken, also after a
D.C./D.S.) and the spans of it a performer may leave out, one :class:`RepeatOption` per choice:

- a plain repeat ``|: ... :|``: the second (third, ...) pass;
- a repeat with first and second endings: the first ending and the second pass, so that the
  section is followed directly by the last ending;
- a D.C./D.S.: everything after the jump (the piece then ends at the bar carrying it);
- every repeat met again after a D.C./D.S. (by convention *not* taken, but some performers do).

The notated performance (:meth:`RepeatPlan.conventional`) takes every repeat before a jump and
none after it, and follows the D.C./D.S.; :meth:`RepeatPlan.order_for` gives the order for any
choice. The spans nest (a repeat inside a D.C. pass lies inside the D.C. span), so the set of
orders is the set of paths through a graph of segments whose edges skip a span: the structure a
jump-aware alignment searches (Fremerey, Müller & Clausen 2010).

The notation rules are the conventions of music notation (common practice, as taught in notation
handbooks):

- ``|:`` ... ``:|`` plays the enclosed bars ``times`` times (default 2). An end repeat with no
  start repeat before it goes back to the bar after the last double bar or completed repeat
  section before it, else to the start of the piece; a warning says so.
- Volta (ending) bars play only on the passes their numbers list; a repeat end inside a volta
  whose numbers are ``1, 2`` plays the section three times.
- D.C. jumps to the first bar, D.S. to the bar carrying the segno, at the end of the bar that
  carries the instruction; *al Fine* stops at the end of the bar with Fine (a plain D.C./D.S. also
  stops there when a Fine exists); *al Coda* jumps from the bar with the first coda sign ("To
  Coda") to the bar with the last coda sign. After the jump, the notated performance takes no
  repeat and plays the last ending of a volta group.

music21 has :class:`music21.repeat.Expander`, but it plays the first volta again after a D.C.
(measured on music21 10.5.1), and it renumbers bars under D.S.; the order is computed here from
the marks instead, and the caller keeps every printed bar's number and offset.

Anything ambiguous (a D.S. without a segno, two segni, an al Coda without two coda signs, a
runaway loop) raises :class:`RepeatError`; the caller then keeps the printed order and warns.

References
----------
.. [1] C. Fremerey, M. Müller, M. Clausen. "Handling repeats and jumps in score-performance
   synchronization", ISMIR 2010.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["BarMarks", "RepeatError", "RepeatOption", "RepeatPlan", "repeat_plan", "performed_order"]


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
    double_bar: bool = False  # the bar ends with a double bar (not a repeat sign)


@dataclass(frozen=True)
class RepeatOption:
    """One choice of the performer: a span of the longest order that may be left out.

    ``start`` and ``stop`` are positions in :attr:`RepeatPlan.order` (``stop`` exclusive; equal to
    ``len(order)`` when leaving the span out ends the piece). ``first_bar`` and ``last_bar`` are the
    printed-bar indices of the repeated material (for labels). ``conventional`` is whether the
    notated performance plays the span.
    """

    id: int
    kind: str            # "repeat", "volta", "dc", "ds"
    start: int
    stop: int
    first_bar: int
    last_bar: int
    conventional: bool
    after_jump: bool = False


@dataclass
class RepeatPlan:
    """The longest performed order and the spans a performer may leave out (see module doc)."""

    order: list[int]
    options: list[RepeatOption] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    def conventional(self) -> dict[int, bool]:
        """The notated performance: option id -> taken."""
        return {o.id: o.conventional for o in self.options}

    def choice(self, which) -> dict[int, bool]:
        """A full choice from ``"all"`` (notated), ``"none"`` (no repeat sign taken, D.C./D.S.
        followed), ``"max"`` (everything taken) or a mapping of option id -> taken (ids left out
        take their notated value)."""
        if isinstance(which, str):
            if which == "all":
                return self.conventional()
            if which == "none":
                return {o.id: o.kind in ("dc", "ds") for o in self.options}
            if which == "max":
                return {o.id: True for o in self.options}
            raise ValueError(f"unknown repeat choice {which!r} (expected all, none or max)")
        out = self.conventional()
        for k, v in dict(which).items():
            if int(k) not in out:
                raise ValueError(f"no repeat option {k}")
            out[int(k)] = bool(v)
        return out

    def kept_positions(self, choice: dict[int, bool]) -> list[int]:
        """Positions of :attr:`order` played under ``choice`` (left-out spans removed)."""
        drop = [False] * len(self.order)
        for o in self.options:
            if not choice.get(o.id, o.conventional):
                for p in range(o.start, o.stop):
                    drop[p] = True
        return [p for p, d in enumerate(drop) if not d]

    def order_for(self, choice) -> list[int]:
        """Printed-bar indices in performed order under ``choice`` (see :meth:`choice`)."""
        if not isinstance(choice, dict) or any(not isinstance(v, bool) for v in choice.values()):
            choice = self.choice(choice)
        return [self.order[p] for p in self.kept_positions(choice)]

    def effective(self, choice: dict[int, bool]) -> list[RepeatOption]:
        """The options that matter under ``choice``: those not inside a span left out."""
        kept = set(self.kept_positions(choice))
        out = []
        for o in self.options:
            inside_dropped = any(
                not choice.get(q.id, q.conventional) and q.start <= o.start and o.stop <= q.stop
                and (q.start, q.stop) != (o.start, o.stop)
                for q in self.options)
            if not inside_dropped and (o.start in kept or not choice.get(o.id, o.conventional)):
                out.append(o)
        return out


def _check(bars: list[BarMarks]) -> tuple[list[int], list[int], list[int], list[int]]:
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
    return segnos, coda_bars, fines, jumps


def repeat_plan(bars: list[BarMarks], *, max_factor: int = 16, labels: list[str] | None = None) -> RepeatPlan:
    """The longest performed order of ``bars`` and the performer's options (see module doc).

    ``labels`` (printed bar numbers as text, one per bar) are used in warnings only.
    """
    n = len(bars)
    if n == 0:
        return RepeatPlan(order=[])
    if not any(b.repeat_start or b.repeat_end or b.voltas or b.jump for b in bars):
        return RepeatPlan(order=list(range(n)))
    name = (lambda i: labels[i]) if labels is not None and len(labels) == n else (lambda i: str(i + 1))
    segnos, coda_bars, fines, jumps = _check(bars)
    jump_bar = bars[jumps[0]] if jumps else None

    order: list[int] = []
    warnings: list[str] = []
    options: list[dict] = []
    i = 0
    rep_start = 0            # printed bar a repeat sign goes back to
    explicit_start = False   # rep_start carries a start-repeat sign
    pass_no = 1
    taken: dict[int, int] = {}
    jumped = False
    pass_pos: dict[int, int] = {}    # pass -> position where it began (passes 2, 3, ...)
    volta_pos: dict[int, int] = {}   # pass -> position where it entered its ending
    warned: set[int] = set()

    def new_section(start_bar: int, explicit: bool):
        nonlocal rep_start, explicit_start, pass_pos, volta_pos
        rep_start, explicit_start = start_bar, explicit
        pass_pos, volta_pos = {}, {}

    def volta_group_end(k: int) -> int:
        while k + 1 < n and bars[k + 1].voltas:
            k += 1
        return k

    after_group = -1     # first bar after a volta group whose last ending is being played
    while i < n:
        if len(order) > max_factor * n:
            raise RepeatError("repeat structure does not terminate")
        b = bars[i]
        if i == after_group:
            new_section(i, False)
            pass_no = 1
            after_group = -1
        if b.repeat_start and not (rep_start == i and explicit_start):
            new_section(i, True)
            pass_no = 1
        if b.voltas:
            if pass_no not in b.voltas:
                i += 1
                continue
            if i == 0 or not bars[i - 1].voltas or pass_no not in bars[i - 1].voltas:
                # this pass enters its ending here; the last ending closes the section
                volta_pos[pass_no] = len(order)
                j, last = i, True
                while j < n and bars[j].voltas and pass_no in bars[j].voltas:
                    last = last and not bars[j].repeat_end
                    j += 1
                if last and pass_no > 1:
                    for p in range(1, pass_no):
                        if p in volta_pos:
                            options.append(dict(kind="volta", start=volta_pos[p], stop=len(order),
                                                first_bar=rep_start, last_bar=i - 1, after_jump=jumped))
                    for k in taken:
                        if rep_start <= k <= volta_group_end(i):
                            taken[k] = 1
                    after_group = volta_group_end(i) + 1
        order.append(i)
        if b.repeat_end:
            times = b.times or (max(b.voltas) + 1 if b.voltas else 2)
            done = taken.get(i, 1)
            if not explicit_start and i not in warned:
                warned.add(i)
                if rep_start == 0:
                    back, why = "the start of the piece", "no double bar or repeat before it"
                else:
                    back = f"bar {name(rep_start)}"
                    why = ("after the last double bar" if bars[rep_start - 1].double_bar
                           else "after the previous repeat")
                warnings.append(f"the repeat sign at the end of bar {name(i)} has no start repeat; "
                                f"it is played again from {back} ({why}), as players do")
            if done < times:
                taken[i] = done + 1
                pass_no = done + 1
                pass_pos[pass_no] = len(order)
                i = rep_start
                continue
            taken[i] = 1
            if not b.voltas:
                for p in range(2, done + 1):
                    if p in pass_pos:
                        options.append(dict(kind="repeat", start=pass_pos[p], stop=len(order),
                                            first_bar=rep_start, last_bar=i, after_jump=jumped))
                new_section(i + 1, False)
                pass_no = 1
        if jumped and b.fine and jump_bar.jump_to in (None, "fine"):
            break
        if jumped and jump_bar.jump_to == "coda" and b.coda and i == coda_bars[0]:
            i = coda_bars[-1]
            new_section(i, bars[i].repeat_start)
            pass_no = 1
            after_group = -1
            continue
        if b.jump and not jumped:
            jumped = True
            target = 0 if b.jump == "dc" else segnos[0]
            options.append(dict(kind=b.jump, start=len(order), stop=None, first_bar=target, last_bar=i,
                                after_jump=False))
            i = target
            new_section(i, bars[i].repeat_start)
            # landing on an ending (a segno under a volta bracket): play that ending
            pass_no = max(bars[i].voltas) if bars[i].voltas else 1
            after_group = -1
            continue
        if b.double_bar and not b.repeat_end and not b.voltas and pass_no == 1:
            new_section(i + 1, False)
        if not b.voltas and not b.repeat_end and pass_no > 1 and i > max(taken, default=-1):
            pass_no = 1
        i += 1

    out = []
    for o in sorted(options, key=lambda d: (d["start"], -(len(order) if d["stop"] is None else d["stop"]))):
        stop = len(order) if o["stop"] is None else o["stop"]
        if stop <= o["start"]:
            continue
        conventional = True if o["kind"] in ("dc", "ds") else not o["after_jump"]
        out.append(RepeatOption(id=len(out), kind=o["kind"], start=int(o["start"]), stop=int(stop),
                                first_bar=int(o["first_bar"]), last_bar=int(o["last_bar"]),
                                conventional=conventional, after_jump=bool(o["after_jump"])))
    return RepeatPlan(order=order, options=out, warnings=warnings)


def performed_order(bars: list[BarMarks], *, max_factor: int = 16) -> list[int]:
    """Printed-bar indices in the notated performed order (see module docstring for the rules)."""
    return repeat_plan(bars, max_factor=max_factor).order_for("all")
