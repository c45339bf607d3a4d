"""Bars that line up across parts: bar lengths, bar matching between parts, plain-word warnings.

What it computes
----------------
Scores from optical music recognition or hand edits often have bars whose parts disagree: one
part's bar holds a beat too many (a misread duration, a voice that overfills the bar), another a
beat too few, or a part has more or fewer bars than the others. Laying each part end to end would
let its notes drift against the other parts for the rest of the piece. Instead every part is
**re-synchronised at every barline**: a note's position is its offset in its own bar plus the
start of that bar, and the bar's length is decided once for all parts:

- :func:`bar_lengths` -- the notated length (time signature) when at least one part fills it
  exactly, otherwise the longest part's content (a pickup, a short bar before a repeat sign, a
  cadenza bar, or a score without time signature). A part whose bar holds more than that
  overlaps the next bar with its excess; a part holding less is silent for the rest of the bar.
  Every disagreement is reported in plain words, naming the bars and the parts.
- :func:`match_bars` -- for a part with a different number of bars: by printed bar number when
  its numbers are a gapped subsequence of the reference part's (a bar left out, numbering kept),
  otherwise by running time (music21's offset of each bar in its part).

Conventions
-----------
Lengths in quarter notes; ``TOL_QN`` = 1/1000 quarter note for equality. Content of a part in a
bar = the end of its last note or rest (grace notes and full-bar rests do not count); a bar of
rests only has no say (it fits any length: music21 even fills an empty bar with a rest as long as
the time signature, which would turn a pickup into a full bar). Warnings list at most ``MAX_LISTED`` bars per part.
"""

from __future__ import annotations

import numpy as np

__all__ = ["bar_lengths", "match_bars", "TOL_QN", "MAX_LISTED", "bar_list"]

TOL_QN = 1e-3
MAX_LISTED = 8


def bar_list(labels: list[str]) -> str:
    """'bar 12' / 'bars 12, 14, 20' / 'bars 1, 2, ... and 9 more'."""
    if len(labels) == 1:
        return f"bar {labels[0]}"
    shown = ", ".join(labels[:MAX_LISTED])
    more = len(labels) - MAX_LISTED
    return f"bars {shown}" + (f" and {more} more" if more > 0 else "")


def _fmt(q: float) -> str:
    return f"{q:.3g}"


def bar_lengths(notated: np.ndarray, contents: np.ndarray, *, names: list[str], labels: list[str],
                meters: list[str], meter_known: bool = True) -> tuple[np.ndarray, list[str]]:
    """Length of every bar for all parts, and warnings about parts that disagree.

    Parameters
    ----------
    notated : array (n_bars,)
        Bar length of the time signature in force, quarter notes.
    contents : array (n_parts, n_bars)
        Content length of each part's bar; NaN where the part does not take part in the decision
        (no bar there, or bars matched by running time), 0 where it holds only full-bar rests.
    names, labels, meters
        Part names, printed bar labels and meter strings ('3/4') for the messages.
    meter_known : bool
        False when the score has no time signature at all (then bars are as long as their notes
        and no bar is reported as longer than its time signature).
    """
    notated = np.asarray(notated, dtype=float)
    c = np.asarray(contents, dtype=float)
    n = len(notated)
    lengths = notated.copy()
    has = np.isfinite(c) & (c > TOL_QN)
    fits = has & (np.abs(c - notated[None, :]) <= TOL_QN)
    any_has = has.any(axis=0)
    any_fits = fits.any(axis=0)
    longest = np.where(has, c, 0.0).max(axis=0) if len(c) else np.zeros(n)
    use_long = any_has & ~any_fits
    lengths[use_long] = longest[use_long]
    warns: list[str] = []
    # bars longer than their time signature in every part that has notes there
    longer = [i for i in np.flatnonzero(use_long & (longest > notated + TOL_QN))]
    if longer and meter_known:
        warns.append(f"{bar_list([labels[i] for i in longer])}: longer than the time signature in every "
                     "part; kept at their written length")
    # one line per part and kind (the staves of a piano share the part's name)
    found: dict[tuple[str, str], dict[int, float]] = {}
    for k, nm in enumerate(names):
        for kind, bad in (("over", has[k] & (c[k] > lengths + TOL_QN)),
                          ("under", has[k] & (c[k] < lengths - TOL_QN))):
            for i in np.flatnonzero(bad):
                found.setdefault((nm, kind), {}).setdefault(int(i), float(c[k, i]))
    for (nm, kind), bars in found.items():
        idx = sorted(bars)
        i = idx[0]
        what = ("longer", "the excess overlaps the next bar") if kind == "over" else \
            ("shorter", "silent to the end of the bar")
        warns.append(f"{bar_list([labels[j] for j in idx])} of {nm}: {what[0]} than the other parts' bar "
                     f"(bar {labels[i]}: {_fmt(bars[i])} quarter notes where the bar in {meters[i]} is "
                     f"{_fmt(lengths[i])}); notes placed from the barline, {what[1]}")
    return lengths, warns


def match_bars(ref_labels: list[str], ref_offsets: np.ndarray, labels: list[str],
               offsets: np.ndarray) -> tuple[list[tuple[int, float]], str]:
    """Reference bar index and offset into it of each bar of a part with a different bar count.

    Returns ``([(ref index, quarter notes from that bar's start), ...], method)`` with method
    ``"number"`` or ``"time"``.
    """
    pos = {lab: i for i, lab in enumerate(ref_labels)}
    unique = len(pos) == len(ref_labels) and len(set(labels)) == len(labels)
    if unique and labels and all(lab in pos for lab in labels):
        idx = [pos[lab] for lab in labels]
        increasing = all(b > a for a, b in zip(idx, idx[1:]))
        gapped = any(b > a + 1 for a, b in zip(idx, idx[1:]))
        if increasing and gapped:
            return [(i, 0.0) for i in idx], "number"
    ref_offsets = np.asarray(ref_offsets, dtype=float)
    offsets = np.asarray(offsets, dtype=float)
    i = np.clip(np.searchsorted(ref_offsets, offsets + TOL_QN, side="right") - 1, 0, len(ref_offsets) - 1)
    delta = np.maximum(offsets - ref_offsets[i], 0.0)
    return [(int(a), float(d)) for a, d in zip(i, delta)], "time"
