"""Loaders of the hand-off files read back exactly what the BIDS writers wrote.

BIDS 1.11: events tables have a header and ``n/a`` for missing values; a continuous recording
(``*_stim.tsv.gz``) has no header, and row k lies at ``StartTime + k / SamplingFrequency``.
"""

from __future__ import annotations

import gzip

import numpy as np
import pandas as pd
import pytest

import stimkit
from stimkit.errors import InputError
from stimkit.export import bids
from stimkit.export.tables import OutputSet


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    out = tmp_path_factory.mktemp("handoff")
    events = pd.DataFrame({
        "onset": [1.5, 2.25, 10.0], "duration": [8.0, 0.0, 0.0],
        "trial_type": ["piece", "dynamic", "silence"], "piece": ["first", "first", None],
        "label": ["first", "NA", "silence"], "measure": [1, 3, None], "beat": [1.0, 2.5, None],
        "score_qn": [0.0, 9.5, None], "nominal": [0.0, 5.1, None], "recording": [1.0, 1.75, 9.5],
        "confidence": [0.9, 0.8, None], "source": ["alignment", "alignment", "audio"],
        "part": ["all", "all", None],
    })
    frame = pd.DataFrame({"short_term_lufs": [-30.0, -29.5, -29.0, -28.75],
                          "onset_rate_hz": [1.0, 2.0, 3.0, 4.0]})
    beats = pd.DataFrame({"onset": [1.5, 2.0, 2.5], "piece": "first", "measure": [1, 1, 2],
                          "pass": 1, "beat": [1.0, 2.0, 1.0], "score_qn": [0.0, 1.0, 2.0],
                          "recording": [1.0, 1.5, 2.0]})
    with OutputSet(out) as outs:
        bids.write_events(outs, "sub-1_task-x", events)
        bids.write_stim(outs, "sub-1_task-x", frame, sampling_hz=4.0, start_time_s=12.125,
                        units={"short_term_lufs": "LUFS", "onset_rate_hz": "1/s"}, descriptions={})
        bids.write_beats(outs, "sub-1_task-x", beats)
    return out, events, frame, beats


def test_read_events(written):
    out, events, _, _ = written
    ev = stimkit.read_events(out / "sub-1_task-x_events.tsv")
    assert ev["onset"].tolist() == [1.5, 2.25, 10.0]
    assert ev["measure"].dtype == "Int64" and ev["measure"].isna().tolist() == [False, False, True]
    assert ev.loc[1, "label"] == "NA"            # only the BIDS n/a is a missing value
    assert pd.isna(ev.loc[2, "piece"])
    assert ev.attrs["units"]["onset"] == "s"
    assert "trial_type" in ev.attrs["sidecar"]
    # either file of the pair names the table
    assert stimkit.read_events(out / "sub-1_task-x_events.json").equals(ev)


def test_read_stim_is_indexed_by_onset_with_units(written):
    out, _, frame, _ = written
    st = stimkit.read_stim(out / "sub-1_task-x_stim.tsv.gz")
    assert st.index.name == "onset"
    assert st.index.to_numpy() == pytest.approx(12.125 + np.arange(4) / 4.0)   # BIDS StartTime + k/fs
    assert list(st.columns) == ["short_term_lufs", "onset_rate_hz"]
    assert st["short_term_lufs"].to_numpy() == pytest.approx(frame["short_term_lufs"].to_numpy())
    assert st.attrs["units"] == {"short_term_lufs": "LUFS", "onset_rate_hz": "1/s"}
    with gzip.open(out / "sub-1_task-x_stim.tsv.gz", "rt") as fh:     # the file itself: no header
        assert fh.readline().split("\t")[0] == "-30"


def test_read_beats(written):
    out, _, _, beats = written
    bt = stimkit.read_beats(out / "sub-1_task-x_beats.tsv")
    assert bt["is_downbeat"].tolist() == [True, False, True]
    assert bt["measure"].tolist() == [1, 1, 2] and str(bt["pass"].dtype) == "Int64"


def test_missing_sidecar_or_mismatch_is_input_error(written, tmp_path):
    out, *_ = written
    lone = tmp_path / "x_stim.tsv.gz"
    lone.write_bytes((out / "sub-1_task-x_stim.tsv.gz").read_bytes())
    with pytest.raises(InputError, match="sidecar"):
        stimkit.read_stim(lone)
    (tmp_path / "x_stim.json").write_text('{"SamplingFrequency": 4, "StartTime": 0, "Columns": ["a"]}')
    with pytest.raises(InputError, match="columns"):
        stimkit.read_stim(lone)
    with pytest.raises(InputError):
        stimkit.read_events(tmp_path / "absent_events.tsv")
