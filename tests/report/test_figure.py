"""Overview figure: lanes chosen by role, every boundary drawn, deterministic PNG bytes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stimkit.report.figure import figure_png, overview_figure

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


def _fig(s, **kw):
    args = dict(features=s["features"], units=s["units"], events=s["events"], pieces=s["pieces"],
                low_confidence=[(200.0, 220.0)], sync=s["sync"], envelope=s["envelope"], title="t")
    args.update(kw)
    return overview_figure(**args)


def _titles(fig):
    return [ax.get_title(loc="left") for ax in fig.axes]


def test_lanes_and_rerun_bytes(session):
    a = figure_png(_fig(session))
    b = figure_png(_fig(session))
    assert a.startswith(PNG_SIGNATURE)
    assert a == b                                    # DESIGN.md: byte-identical reruns
    assert b"matplotlib" not in a.lower()            # no software-version text chunk


def test_lane_titles_and_skipped_lanes(session):
    titles = _titles(_fig(session))
    assert any(t.startswith("loudness") for t in titles)
    assert any(t.startswith("tempo") for t in titles)
    assert any("1 - key_strength" in t for t in titles)
    assert any(t.startswith("sync") for t in titles)
    f2 = session["features"].drop(columns=["tempo_bpm", "key_strength"])
    f2["roughness"] = 0.1
    titles2 = _titles(_fig(session, features=f2, sync=None, envelope=None))
    assert not any(t.startswith("tempo") for t in titles2)      # absent column: lane skipped
    assert any("roughness" in t for t in titles2)               # tonality falls back
    assert not any(t.startswith("sync") for t in titles2)
    assert not any(t.startswith("waveform") for t in titles2)


def test_every_boundary_drawn_even_when_labels_are_thinned(session):
    n = 300
    ev = pd.DataFrame({"recording": np.linspace(1.0, 299.0, n), "onset": np.linspace(1.0, 299.0, n),
                       "duration": 0.0, "trial_type": "dynamic", "label": "crescendo molto"})
    fig = _fig(session, events=ev, envelope=None, sync=None, label_rows=4)
    marks_ax = fig.axes[0]
    for ax in fig.axes:                              # every boundary has its line in every lane
        segs = [seg for c in ax.collections if str(c.get_label()).startswith("_marks:")
                for seg in c.get_segments()]
        assert len(segs) == n
        assert sorted(seg[0][0] for seg in segs) == pytest.approx(sorted(ev["recording"]))
    labels = [t for t in marks_ax.texts if "crescendo" in t.get_text()]
    assert 0 < len(labels) < n                       # labels thinned for space
    assert f"{n - len(labels)} labels left out" in marks_ax.get_title(loc="left")
    # no two drawn labels overlap (boxes measured by the renderer after drawing)
    fig.canvas.draw()
    boxes = [t.get_window_extent() for t in labels]
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            assert not boxes[i].overlaps(boxes[j])


def test_structure_labels_kept_before_detected_changes(session):
    # dense detected changes around one section mark: the section keeps its label
    n = 120
    t = np.linspace(100.0, 110.0, n)
    ev = pd.DataFrame({"recording": np.r_[t, 105.0], "duration": 0.0,
                       "trial_type": ["feature_change"] * n + ["section"],
                       "label": ["tempo_bpm"] * n + ["rehearsal mark B"]})
    fig = _fig(session, events=ev, envelope=None, sync=None, label_rows=3)
    texts = [x.get_text().strip() for x in fig.axes[0].texts]
    assert "rehearsal mark B" in texts
    assert sum(x == "tempo_bpm" for x in texts) < n


def test_empty_features_still_draws(session):
    fig = overview_figure(features=pd.DataFrame(index=pd.Index([], dtype=float)), units={},
                          events=session["events"])
    assert figure_png(fig).startswith(PNG_SIGNATURE)
