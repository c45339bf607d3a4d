"""Fixtures for the renderer tests: small hand-built scores."""

from __future__ import annotations

import pytest
from render_scores import build_score

from stimkit.score.model import ScoreModel


@pytest.fixture(scope="module")
def melody_score() -> ScoreModel:
    """A sparse 8-bar melody of quarter and half notes with one rest, at 100 BPM."""
    pitches = [60, 62, 64, 65, 67, None, 69, 71, 72, 71, 69, 67, 65, 64, 62, 60,
               64, 67, 72, 67, 64, 60, 62, 64, 65, 67, 69, 60]
    durs = [1, 1, 1, 1, 2, 2, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1,
            1, 1, 2, 1, 1, 2, 1, 1, 1, 1, 2, 2]
    return build_score(pitches, durs, bpm=100.0)
