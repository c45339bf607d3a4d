"""A small synthetic session shared by the report tests."""

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
    events = pd.DataFrame({
        "onset": np.r_[0.0, 150.0, marks] + 2.0,
        "duration": np.r_[140.0, 145.0, np.zeros(marks.size)],
        "trial_type": ["piece", "piece"] + kinds,
        "piece": ["First", "Second"] + [None] * marks.size,
        "label": [None, None] + ["<ff> & co"] + [f"mark {i}" for i in range(1, marks.size)],
        "measure": np.r_[np.nan, np.nan, np.arange(marks.size)],
        "recording": np.r_[0.0, 150.0, marks],
    })
    pieces = pd.DataFrame({"piece": ["First", "Second"], "start": [0.0, 150.0], "end": [140.0, 295.0]})
    sync = pd.DataFrame({"recording": [1.0, 290.0], "residual_ms": [0.4, -0.4]})
    envelope = (t, -np.abs(np.sin(t)), np.abs(np.sin(t)))
    return dict(features=features, events=events, pieces=pieces, sync=sync, envelope=envelope,
                units={"tempo_bpm": "BPM", "short_term_lufs": "LUFS"})
