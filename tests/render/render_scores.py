"""Small hand-built scores for the renderer tests (no parser needed); imported by name."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from stimkit.score.model import BOUNDARY_COLUMNS, MEASURE_COLUMNS, NOTE_COLUMNS, ScoreModel
from stimkit.timemap import TimeMap


def build_score(pitches, durations_qn, *, bpm=120.0, beats_per_bar=4, velocity=80,
                chords=None, fermata_qn=(), name="hand") -> ScoreModel:
    """A one-part score in 4/4 from a list of pitches (None = rest) and durations.

    ``chords`` maps a note index to extra pitches sounding with it.
    """
    rows, q = [], 0.0
    chords = chords or {}
    for i, (p, d) in enumerate(zip(pitches, durations_qn)):
        if p is not None:
            for pp in [p, *chords.get(i, [])]:
                rows.append([q, d, int(pp), velocity, "P1", 0, 1, 0.0])
        q += d
    n_bars = int(np.ceil(q / beats_per_bar))
    notes = pd.DataFrame(rows, columns=NOTE_COLUMNS)
    measures = pd.DataFrame(
        [[k + 1, 1, k * beats_per_bar, float(beats_per_bar), beats_per_bar, 4, 1.0, 1]
         for k in range(n_bars)], columns=MEASURE_COLUMNS)
    bnd = pd.DataFrame(
        [["fermata", "fermata", float(f), 0, 1, 1.0, "P1", np.nan, ""] for f in fermata_qn],
        columns=BOUNDARY_COLUMNS)
    spq = 60.0 / bpm
    total = n_bars * beats_per_bar
    score = ScoreModel(name=name, path=Path(f"{name}.musicxml"), notes=notes, measures=measures,
                       boundaries=bnd, tempo_map=TimeMap([0.0, total], [0.0, total * spq]),
                       parts=["P1"])
    loc = score.locate(notes["score_qn"].to_numpy())
    score.notes["measure"] = loc["measure"].to_numpy()
    score.notes["beat"] = loc["beat"].to_numpy()
    return score
