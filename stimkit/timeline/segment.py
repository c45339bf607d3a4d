"""Pieces inside a long recording: where each listed piece starts and ends.

What it computes
----------------
:func:`find_pieces` takes the scores in the order they were played and returns, for each, the
span of the recording it occupies (``recording`` seconds, start and end) and the matching cost.
Pieces are searched one after another, each after the end of the previous one; a rough start
given by the user narrows the search to a window around it. A match that leaves too little
room for the pieces still to come (less than 0.3 of their notated length) is searched again
before that room, and a match is searched again before itself (a nearly as good match there,
within :data:`EARLIER_MARGIN`, is taken), so a piece played several times is found at its first
performance. Silence, speech
and applause between pieces are skipped because the score is matched as a *subsequence* of the
recording: the path may start and end anywhere (subsequence DTW, Müller 2015, ch. 7.2).

The matching itself is the alignment stage's :func:`stimkit.align.locate.locate_piece` (chroma
of the score template against chroma of the recording at about 2 Hz), with the recording's
features computed once for all pieces; a match whose Raffel-Ellis cost ratio exceeds
:data:`MAX_RATIO` counts as not found. Its answer is good to about half a second; each piece's
alignment, on the span found plus a margin, then places the first note precisely.

Conventions
-----------
``recording`` seconds from the first sample of the recording; a span is ``(start_s, end_s)``
with ``start_s`` at the first note and ``end_s`` at the end of the last note.

References
----------
.. [1] M. Müller, *Fundamentals of Music Processing*, Springer 2015, ch. 3 (chroma) and 7.2
   (subsequence DTW).
.. [2] C. Raffel and D. P. W. Ellis, "Optimizing DTW-based audio-to-MIDI alignment and
   matching", ICASSP 2016 (the cost ratio).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..errors import InputError, WorkFailed

__all__ = ["PieceSpan", "find_pieces", "MAX_RATIO"]


@dataclass(frozen=True)
class PieceSpan:
    """Where one piece sounds in the recording."""

    piece: str
    start_s: float
    end_s: float
    cost: float
    method: str


#: Largest Raffel-Ellis cost ratio of the alignment stage's matcher that counts as found
#: (measured on the bundled session: the pieces played 0.29-0.33, a piece searched where it was
#: not played 0.66-0.72; the matcher's own notes give about 0.7 or more for a different piece).
MAX_RATIO = 0.5
#: A match before the best one is taken instead when its cost ratio is at most this much higher
#: (and within :data:`MAX_RATIO`): a piece played several times is found at its first performance.
#: The costs of the same piece performed twice differ by a few hundredths on the bundled session,
#: a piece searched where it was not played costs 0.3 more.
EARLIER_MARGIN = 0.1


def find_pieces(scores, names, audio_path, *, rough_starts=None, duration_s: float,
                max_ratio: float = MAX_RATIO, progress=None) -> list[PieceSpan]:
    """The span of every piece, in the order given.

    Parameters
    ----------
    scores : list of ScoreModel, in the order they were played.
    names : list of str, one per score.
    audio_path : the recording.
    rough_starts : list of float or None per piece (recording seconds), optional.
    duration_s : length of the recording.
    max_ratio : largest accepted cost ratio of the match (Raffel & Ellis 2016).

    Raises
    ------
    WorkFailed
        When a piece cannot be found after the previous one.
    """
    from ..align.chroma import audio_features
    from ..align.locate import locate_piece

    rough_starts = rough_starts or [None] * len(scores)
    feats = audio_features(audio_path, progress=progress)  # once for all pieces
    spans: list[PieceSpan] = []
    floor = 0.0
    for k, (score, name, rough) in enumerate(zip(scores, names, rough_starts)):
        nominal = float(score.nominal_duration_s)
        if rough is not None:
            lo = max(floor, float(rough) - 30.0)
            hi = min(duration_s, float(rough) + 1.6 * nominal + 30.0)
        else:
            lo, hi = floor, duration_s
        if hi - lo < 0.3 * nominal:
            where = " after the previous piece" if k else ""
            raise WorkFailed(f"piece '{name}' cannot fit in the recording{where} "
                             f"(only {max(hi - lo, 0):.0f} s left, the score lasts about {nominal:.0f} s "
                             f"at its notated tempo); check the order of the pieces and the recording",
                             path=audio_path)
        try:
            start, end, cost = locate_piece(score, audio_path, search_span_s=(lo, hi), features=feats)
        except WorkFailed as exc:
            raise WorkFailed(f"piece '{name}' was not found in the recording ({exc})") from None
        # a match that leaves no room for the pieces still to come may be a later performance
        # of the same (or a similar) piece: look again before the room they need
        room_end = duration_s - 0.3 * sum(float(sc.nominal_duration_s) for sc in scores[k + 1:])
        if k + 1 < len(scores) and end > room_end and room_end - lo >= 0.3 * nominal:
            try:
                again = locate_piece(score, audio_path, search_span_s=(lo, min(hi, room_end)),
                                     features=feats)
            except WorkFailed:
                again = None
            if again is not None and again[2] <= max_ratio:
                start, end, cost = again
        # the best match may be a later performance of a piece played several times (equal
        # renditions match about equally well): take the earliest one that matches nearly as well
        while cost <= max_ratio and start - lo >= 0.3 * nominal:
            try:
                earlier = locate_piece(score, audio_path, search_span_s=(lo, start), features=feats)
            except (WorkFailed, InputError):
                break
            if not (earlier[2] <= max_ratio and earlier[2] <= cost + EARLIER_MARGIN and earlier[1] <= start):
                break
            start, end, cost = earlier
        if cost > max_ratio:
            raise WorkFailed(f"piece '{name}' was not found in the recording between {lo:.0f} s "
                             f"and {hi:.0f} s (best match cost ratio {cost:.2f} > {max_ratio:.2f}); "
                             f"check the score, the order of the pieces, or give start_s")
        spans.append(PieceSpan(piece=name, start_s=float(start), end_s=float(end), cost=float(cost),
                               method="subsequence DTW (stimkit.align.locate)"))
        floor = float(end)
        if progress is not None:
            progress("finding pieces", (k + 1) / len(scores))
    return spans
