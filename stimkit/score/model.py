"""The score model shared by every stage after parsing.

Conventions
-----------
- ``score_qn``: quarter notes from the start of the score *as performed* (repeats expanded unless
  turned off). Every table here is sorted by ``score_qn``.
- ``measure``: the bar number as printed (music21 ``Measure.number``; a pickup may be 0);
  ``pass``: 1 for the first time a printed bar is played, 2 for its repeat, ...
- ``beat``: 1-based beat within the bar in the bar's own beat unit (``beat_qn`` quarter notes per
  beat; 6/8 has beat_qn = 1.5, 3/8 counts as one beat of 1.5 qn), pickups keep their real beat.

Tables (pandas DataFrames)
--------------------------
``notes``: one row per sounding note (ties merged, grace notes given a tiny duration), columns
    ``score_qn, duration_qn, pitch`` (MIDI number, int), ``velocity`` (1-127, from the dynamics in
    force), ``part`` (str), ``measure``, ``pass``, ``beat``.
``measures``: one row per performed bar, columns ``measure, pass, score_qn, duration_qn,
    numerator, denominator, beat_qn, first_beat`` (beat number of the bar's first sounding
    position: 1, or e.g. 3 for a 4/4 pickup of two beats).
``boundaries``: one row per structural marking (see :mod:`stimkit.score.markings`), columns
    ``trial_type, label, score_qn, measure, pass, beat, part, value, detail`` followed by
    :data:`BOUNDARY_EXTRA_COLUMNS` ``end_qn`` (end of a spanning marking, NaN for a point),
    ``nominal`` and ``nominal_end`` (seconds of the tempo map at ``score_qn`` / ``end_qn``).
    ``measures`` from :func:`stimkit.score.parse.load_score` also carries ``label`` (printed
    number with suffix) and ``index`` (position of the bar in printed order).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..timemap import TimeMap

__all__ = ["ScoreModel", "NOTE_COLUMNS", "MEASURE_COLUMNS", "BOUNDARY_COLUMNS", "BOUNDARY_EXTRA_COLUMNS"]

NOTE_COLUMNS = ["score_qn", "duration_qn", "pitch", "velocity", "part", "measure", "pass", "beat"]
MEASURE_COLUMNS = [
    "measure", "pass", "score_qn", "duration_qn", "numerator", "denominator", "beat_qn", "first_beat",
]
BOUNDARY_COLUMNS = ["trial_type", "label", "score_qn", "measure", "pass", "beat", "part", "value", "detail"]
BOUNDARY_EXTRA_COLUMNS = ["end_qn", "nominal", "nominal_end"]


@dataclass
class ScoreModel:
    """A parsed score in performed order, with its boundaries and nominal tempo map."""

    name: str
    path: Path
    notes: pd.DataFrame
    measures: pd.DataFrame
    boundaries: pd.DataFrame
    tempo_map: TimeMap  # score_qn -> nominal seconds
    warnings: list[str] = field(default_factory=list)
    repeats_expanded: bool = True
    parts: list[str] = field(default_factory=list)
    title: str = ""  # the score's own title (metadata), "" when it has none
    # set by stimkit.score.parse.load_score: the printed bars (PrintedScore), the repeat plan
    # (stimkit.score.repeats.RepeatPlan, None without repeat marks that could be read) and the
    # choice of repeats this model plays (option id -> taken); score_for_choice rebuilds it
    printed: object = None
    repeat_plan: object = None
    repeat_choice: dict = field(default_factory=dict)

    @property
    def total_qn(self) -> float:
        """Length of the performed score in quarter notes (end of the last bar)."""
        m = self.measures
        return float((m["score_qn"] + m["duration_qn"]).max())

    @property
    def nominal_duration_s(self) -> float:
        return float(self.tempo_map(self.total_qn))

    def locate(self, score_qn) -> pd.DataFrame:
        """``measure``, ``pass`` and ``beat`` of each position in ``score_qn`` (array-like)."""
        q = np.atleast_1d(np.asarray(score_qn, dtype=np.float64))
        m = self.measures
        starts = m["score_qn"].to_numpy()
        i = np.clip(np.searchsorted(starts, q + 1e-9, side="right") - 1, 0, len(m) - 1)
        beat = m["first_beat"].to_numpy()[i] + (q - starts[i]) / m["beat_qn"].to_numpy()[i]
        return pd.DataFrame(
            {"measure": m["measure"].to_numpy()[i], "pass": m["pass"].to_numpy()[i], "beat": beat}
        )

    def qn_at(self, measure: int, beat: float = 1.0, pass_: int = 1) -> float:
        """``score_qn`` of ``beat`` in printed bar ``measure`` on pass ``pass_``.

        Raises :class:`KeyError` when the bar is not in the score.
        """
        m = self.measures
        row = m[(m["measure"] == measure) & (m["pass"] == pass_)]
        if row.empty:
            raise KeyError(f"bar {measure} (pass {pass_}) is not in {self.name}")
        r = row.iloc[0]
        return float(r["score_qn"] + (beat - r["first_beat"]) * r["beat_qn"])

    def beat_grid(self) -> pd.DataFrame:
        """Every bar and beat position: ``score_qn, measure, pass, beat, is_downbeat``.

        ``is_downbeat`` is true on beat 1 only, so a pickup bar has no downbeat.
        """
        rows = []
        m = self.measures
        cols = zip(m["score_qn"], m["duration_qn"], m["beat_qn"], m["first_beat"], m["measure"], m["pass"])
        for start, dur, bq, first, meas, pas in cols:
            # a pickup starts on first_beat > 1 and holds only its own beats
            n = max(int(round(dur / bq + 1e-9)), 1)
            for k in range(n):
                rows.append((start + k * bq, int(meas), int(pas), float(first + k), abs(first + k - 1) < 1e-9))
        return pd.DataFrame(rows, columns=["score_qn", "measure", "pass", "beat", "is_downbeat"])
