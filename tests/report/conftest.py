"""A small synthetic session shared by the report tests (invented data)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest


@pytest.fixture(scope="module")
def session():
    t = (np.arange(1200) + 0.5) / 4.0  # 4 Hz frame centres, 300 s
    features = pd.DataFrame({
        "short_term_lufs": -30 + 5 * np.sin(t / 20),
        "tempo_bpm": 100 + 5 * np.sin(t / 30),
        "key_strength": 0.5 + 0.3 * np.cos(t / 10),
        "onset_rate_hz": 3 + np.sin(t / 7),
    }, index=t)
    marks = np.arange(5.0, 290.0, 9.0)
    kinds = (["dynamic", "key", "tempo", "section", "feature_change"] * 20)[:marks.size]
    piece_of = np.where(marks < 140.0, "First", np.where(marks >= 150.0, "Second", None))
    piece_of = [None if k == "feature_change" else p for k, p in zip(kinds, piece_of)]
    events = pd.DataFrame({
        "onset": np.r_[0.0, 150.0, marks, 40.0, 200.0] + 2.0,
        "duration": np.r_[140.0, 145.0, np.zeros(marks.size), 30.0, 0.0],
        "trial_type": ["piece", "piece"] + kinds + ["repeat", "repeat"],
        "piece": ["First", "Second"] + piece_of + ["First", "Second"],
        "label": [None, None] + ["<ff> & co"] + [f"mark {i}" for i in range(1, marks.size)]
        + ["taken: bars 5\u20138, repeat", "skipped: bars 20\u201324, repeat"],
        "measure": np.r_[np.nan, np.nan, np.arange(marks.size), 5, 20],
        "beat": np.r_[np.nan, np.nan, np.tile([1.0, 2.5, 1.0 + 1 / 3], 20)[:marks.size], 1.0, 1.0],
        "confidence": np.r_[np.nan, np.nan, np.linspace(0.2, 1.0, marks.size), np.nan, np.nan],
        "recording": np.r_[0.0, 150.0, marks, 40.0, 200.0],
        "source": ["alignment"] * (marks.size + 2) + ["alignment", "alignment"],
    })
    beat_t = np.arange(2.0, 296.0, 0.5)
    piece = np.where(beat_t < 142.0, "First", np.where(beat_t >= 152.0, "Second", None))
    keep = piece != None  # noqa: E711
    beats = pd.DataFrame({"onset": beat_t[keep], "recording": beat_t[keep] - 2.0, "piece": piece[keep]})
    beats["beat"] = beats.groupby("piece").cumcount() % 4 + 1
    beats["measure"] = beats.groupby("piece").cumcount() // 4 + 1
    beats["pass"] = 1
    beats["is_downbeat"] = beats["beat"] == 1
    pieces = pd.DataFrame({"piece": ["First", "Second"], "start": [2.0, 152.0], "end": [142.0, 297.0]})
    sync = pd.DataFrame({"onset": [3.0, 292.0], "residual_ms": [0.4, -0.4]})
    return dict(features=features, events=events, pieces=pieces, sync=sync, beats=beats,
                units={"tempo_bpm": "BPM", "short_term_lufs": "LUFS"})
