"""BIDS hand-off files read back as a BIDS consumer would (BIDS specification 1.11).

Rules checked, with their source beside each assertion:
- BIDS 1.11 "Tabular files": tab-separated, UTF-8, header line required, missing values ``n/a``;
  columns described in the json sidecar (LongName, Description, Levels, Units, HED).
- BIDS 1.11 "Task events": ``onset`` and ``duration`` are required and the first two columns;
  duration is zero or positive (or n/a). Also read from the machine-readable BIDS schema
  (bidsschematools, a declared test dependency).
- BIDS 1.11 "Continuous recordings": ``*_stim.tsv.gz`` gzip, no header; ``*_stim.json`` with
  required SamplingFrequency, StartTime, Columns.
- HED: the sidecar's tags validated by the HED project's own validator (hedtools) against the
  standard schema declared in ``dataset_description.json``.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import re

import numpy as np
import pandas as pd
import pytest

from stimkit.errors import WorkFailed
from stimkit.export.bids import (BEAT_COLUMNS, dataset_description, events_sidecar,
                                 write_beats, write_events, write_stim)
from stimkit.export.tables import OutputSet
from stimkit.levels import EVENT_COLUMNS, TRIAL_TYPES

BASE = "sub-01_ses-1_task-listening_run-1"


def _events() -> pd.DataFrame:
    """A small table in scrambled order, with gaps, an extra column and non-ASCII text."""
    return pd.DataFrame({
        "trial_type": ["key", "piece", "dynamic", "feature_change", "sync", "hairpin", "tempo"],
        "onset": [62.5, 10.0, 10.0, 31.25, 0.5, 10.0, 45.000001],
        "duration": [0.0, 120.0, 0.0, 0.0, 0.0, 4.5, np.nan],
        "piece": ["Étude", "Étude", "Étude", "Étude", None, "Étude", "Étude"],
        "label": ["E minor", None, "f", "short_term_lufs", "click", "crescendo", "q = 96"],
        "measure": [25.0, np.nan, 1.0, np.nan, np.nan, 1.0, 12.0],
        "beat": [1.0, np.nan, 1.0, np.nan, np.nan, 2.5, 1.0],
        "recording": [61.0, 8.5, 8.5, 29.75, 0.0, 8.5, 43.5],
        "value": [np.nan, np.nan, 5.0, 1.7, np.nan, np.nan, 96.0],
    })


@pytest.fixture(scope="module")
def hed_schema():
    """The HED standard schema declared by dataset_description (hedtools bundles it)."""
    import hed.schema as schema_mod  # hedtools: a declared test dependency, never skipped

    return schema_mod.load_schema_version(dataset_description(name="x")["HEDVersion"])


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    out = tmp_path_factory.mktemp("bids")
    with OutputSet(out) as outs:
        paths = write_events(outs, BASE, _events(), synchronized=False,
                             extra={"value": {"LongName": "Value", "Description": "Numeric value."}})
    return out, paths


def test_events_tsv_with_pandas(written):
    out, paths = written
    assert [p.name for p in paths] == [f"{BASE}_events.tsv", f"{BASE}_events.json"]
    df = pd.read_csv(out / f"{BASE}_events.tsv", sep="\t", na_values="n/a", keep_default_na=False)
    # BIDS 1.11 Task events: onset, duration required and first
    assert list(df.columns[:2]) == ["onset", "duration"]
    # every shared column, in the shared order, then the extra column
    assert list(df.columns) == EVENT_COLUMNS + ["value"]
    assert len(df) == len(_events())
    # rows by onset (ties by trial_type order), so a consumer can rely on order
    assert (np.diff(df["onset"].to_numpy()) >= 0).all()
    at10 = df[df["onset"] == 10.0]["trial_type"].tolist()
    order = list(TRIAL_TYPES)
    assert at10 == sorted(["hairpin", "dynamic", "piece"], key=order.index)  # TRIAL_TYPES order
    assert at10[0] == "piece"                        # the piece row before its markings
    assert df["duration"].isna().sum() == 1          # BIDS: duration n/a when unavailable
    assert df.loc[df["trial_type"] == "piece", "piece"].iloc[0] == "Étude"  # UTF-8 round trip


def test_events_tsv_with_csv_module(written):
    out, _ = written
    raw = (out / f"{BASE}_events.tsv").read_bytes()
    assert b"\r" not in raw and raw.endswith(b"\n")
    rows = list(csv.reader(io.StringIO(raw.decode("utf-8")), delimiter="\t"))
    header, body = rows[0], rows[1:]
    assert header[:2] == ["onset", "duration"]      # BIDS 1.11: header line, onset/duration first
    assert all(len(r) == len(header) for r in body)
    cells = [c for r in body for c in r]
    assert "" not in cells                           # BIDS 1.11: missing is n/a, never empty
    assert "n/a" in cells and "nan" not in cells and "NaN" not in cells
    secs = re.compile(r"^-?\d+\.\d{6}$")             # our contract: seconds with 6 decimals
    for r in body:
        assert secs.match(r[0])
        assert r[1] == "n/a" or secs.match(r[1])
    # 45.000001 s keeps its microsecond
    assert "45.000001" in [r[0] for r in body]
    # whole bar numbers are written as integers
    assert "25" in [r[header.index("measure")] for r in body]


def test_events_json_describes_every_column(written):
    out, _ = written
    side = json.loads((out / f"{BASE}_events.json").read_text("utf-8"))
    header = (out / f"{BASE}_events.tsv").read_text("utf-8").split("\n")[0].split("\t")
    for col in header:  # BIDS 1.11 Tabular files: LongName / Description per column
        assert side[col]["LongName"] and side[col]["Description"], col
    assert side["onset"]["Units"] == "s" and side["duration"]["Units"] == "s"
    assert side["value"]["LongName"] == "Value"      # caller-given description is kept
    levels = side["trial_type"]["Levels"]
    present = set(_events()["trial_type"])
    assert set(levels) == present                    # the levels of this file, each described
    assert all(levels[k] == TRIAL_TYPES[k] for k in levels)
    assert set(side["trial_type"]["HED"]) == present  # HED per categorical value
    assert side["OnsetClock"]["Synchronized"] is False


def test_bids_schema_rules(written):
    import bidsschematools.schema as schema_mod  # a declared test dependency, never skipped

    schema = schema_mod.load_schema()
    rule = schema.rules.tabular_data.events.Events
    out, _ = written
    df = pd.read_csv(out / f"{BASE}_events.tsv", sep="\t", na_values="n/a", keep_default_na=False)
    # BIDS schema: initial columns and required columns of *_events.tsv
    assert list(df.columns[:len(rule.initial_columns)]) == list(rule.initial_columns)
    def level_of(v):
        return v if isinstance(v, str) else v.get("level")

    required = [col for col, v in rule.columns.items() if level_of(v) == "required"]
    assert required                                  # the schema does require columns (onset, duration)
    for col in required:
        assert col in df.columns
    # BIDS schema: duration minimum 0
    assert (df["duration"].dropna() >= schema.objects.columns.duration.minimum).all()
    desc = dataset_description(name="test")
    fields = schema.rules.json.dataset.dataset_description.fields
    needed = [f for f, v in fields.items() if level_of(v) == "required"]
    assert needed                                    # BIDS: Name and BIDSVersion at least
    for field in needed:
        assert field in desc, field


def test_hed_tags_valid(written, tmp_path, hed_schema):
    from hed.models import Sidecar, TabularInput

    out, _ = written
    schema = hed_schema
    sidecar = Sidecar(str(out / f"{BASE}_events.json"))
    assert sidecar.validate(schema) == []            # hedtools: every tag in the schema
    # hedtools assembles rows sharing an onset (piece, dynamic, hairpin at 10 s): still valid
    issues = TabularInput(str(out / f"{BASE}_events.tsv"), sidecar=sidecar).validate(schema)
    assert issues == []
    # and a broken tag is caught, so the check above can fail
    side = json.loads((out / f"{BASE}_events.json").read_text("utf-8"))
    side["trial_type"]["HED"]["key"] = "No-such-tag-here"
    bad = tmp_path / "bad_events.json"
    bad.write_text(json.dumps(side), "utf-8")
    assert Sidecar(str(bad)).validate(schema) != []


def test_all_levels_have_valid_hed(hed_schema):
    from hed import HedString

    from stimkit.export.bids import hed_annotation

    schema = hed_schema
    for level in TRIAL_TYPES:  # hedtools against the declared standard schema
        assert HedString(hed_annotation(level), schema).validate() == [], level


def test_byte_identical_rerun(tmp_path):
    ev = _events()
    shuffled = ev.sample(frac=1.0, random_state=7).reset_index(drop=True)
    for name, table in (("a", ev), ("b", shuffled)):
        with OutputSet(tmp_path / name) as outs:
            write_events(outs, BASE, table, synchronized=True)
    for suffix in ("_events.tsv", "_events.json"):
        a = (tmp_path / "a" / f"{BASE}{suffix}").read_bytes()
        b = (tmp_path / "b" / f"{BASE}{suffix}").read_bytes()
        assert a == b, suffix  # DESIGN.md: same inputs -> byte-identical outputs


@pytest.mark.parametrize("change", ["nan_onset", "negative_duration", "unknown_level", "no_duration"])
def test_bad_tables_refused_and_nothing_written(tmp_path, change):
    ev = _events()
    if change == "nan_onset":
        ev.loc[2, "onset"] = np.nan
    elif change == "negative_duration":
        ev.loc[1, "duration"] = -1.0
    elif change == "unknown_level":
        ev.loc[0, "trial_type"] = "not_a_kind"
    else:
        ev = ev.drop(columns="duration")
    with pytest.raises(WorkFailed):
        with OutputSet(tmp_path) as outs:
            outs.write_text("other.txt", "x")
            write_events(outs, BASE, ev)
    assert list(tmp_path.iterdir()) == []            # a failed run leaves no file


def test_sidecar_levels_only_from_vocabulary():
    side = events_sidecar(_events().iloc[:2])
    # the levels present (key, piece), listed in TRIAL_TYPES order
    assert list(side["trial_type"]["Levels"]) == sorted(["key", "piece"], key=list(TRIAL_TYPES).index)
    assert side["OnsetClock"]["Synchronized"] is None


def test_stim_file_read_back(tmp_path):
    rate = 10.0
    t = 0.05 + np.arange(40) / rate  # frame centres
    frame = pd.DataFrame({"short_term_lufs": np.linspace(-40, -20, 40),
                          "tempo_bpm": np.full(40, 96.0)}, index=t)
    with OutputSet(tmp_path) as outs:
        write_stim(outs, BASE, frame, sampling_hz=rate, start_time_s=0.05,
                   units={"short_term_lufs": "LUFS", "tempo_bpm": "BPM"},
                   descriptions={"tempo_bpm": "Local tempo."})
    side = json.loads((tmp_path / f"{BASE}_stim.json").read_text("utf-8"))
    for key in ("SamplingFrequency", "StartTime", "Columns"):  # BIDS 1.11: required
        assert key in side
    with gzip.open(tmp_path / f"{BASE}_stim.tsv.gz", "rt", encoding="utf-8") as fh:
        rows = list(csv.reader(fh, delimiter="\t"))
    assert len(rows) == 40                            # BIDS 1.11: no header line
    float(rows[0][0])                                 # first row is data, not names
    assert all(len(r) == len(side["Columns"]) for r in rows)
    assert side["SamplingFrequency"] == rate and side["StartTime"] == 0.05


def test_stim_file_is_numeric_text_columns_listed(tmp_path):
    frame = pd.DataFrame({"key": ["G major", "E minor"], "key_strength": [0.8, 0.6],
                          "silent": [False, True]})
    with OutputSet(tmp_path) as outs:
        write_stim(outs, BASE, frame, sampling_hz=1.0, start_time_s=0.5, units={}, descriptions={})
    side = json.loads((tmp_path / f"{BASE}_stim.json").read_text("utf-8"))
    assert side["Columns"] == ["key_strength", "silent"]
    assert list(side["ColumnsLeftOut"]) == ["key"]
    with gzip.open(tmp_path / f"{BASE}_stim.tsv.gz", "rt", encoding="utf-8") as fh:
        rows = list(csv.reader(fh, delimiter="\t"))
    assert [[float(v) for v in r] for r in rows] == [[0.8, 0.0], [0.6, 1.0]]


def test_beats_file(tmp_path):
    beats = pd.DataFrame({
        "onset": [1.0, 1.5, 2.0, 2.5, 10.0, 10.6],
        "piece": ["A", "A", "A", "A", "B", "B"],
        "measure": [1, 1, 1, 2, 1, 1],
        "pass": [1, 1, 1, 1, 1, 1],
        "beat": [1.0, 2.0, 3.0, 1.0, 1.0, 2.0],
        "score_qn": [0.0, 1.0, 2.0, 3.0, 0.0, 1.0],
        "recording": [1.0, 1.5, 2.0, 2.5, 10.0, 10.6],
    })
    with OutputSet(tmp_path) as outs:
        write_beats(outs, BASE, beats)
    df = pd.read_csv(tmp_path / f"{BASE}_beats.tsv", sep="\t", na_values="n/a", keep_default_na=False)
    assert list(df.columns) == BEAT_COLUMNS
    # duration = time to the next beat of the same piece; each piece's last beat has none
    assert df["duration"].tolist()[:3] == pytest.approx([0.5, 0.5, 0.5])
    assert np.isnan(df["duration"].iloc[3]) and np.isnan(df["duration"].iloc[5])
    assert df["duration"].iloc[4] == pytest.approx(0.6)
    text = (tmp_path / f"{BASE}_beats.tsv").read_text("utf-8")
    assert df["is_downbeat"].tolist() == [True, False, False, True, True, False]
    assert "\ttrue\t" in text                        # booleans written as true/false
    side = json.loads((tmp_path / f"{BASE}_beats.json").read_text("utf-8"))
    assert all(side[c]["Description"] for c in BEAT_COLUMNS)


def test_dataset_description_declares_hed():
    desc = dataset_description(name="Listening study", authors=["A. Author"])
    # BIDS 1.11: HEDVersion in dataset_description.json when HED is used; 8.x standard schema
    assert re.match(r"^8\.\d+\.\d+$", desc["HEDVersion"])
    assert desc["BIDSVersion"].startswith("1.11")
    assert desc["GeneratedBy"][0]["Name"] == "stimkit"


def test_same_kind_at_same_onset_is_merged_and_hed_valid(tmp_path, hed_schema):
    ev = pd.DataFrame({
        "onset": [20.0, 20.0, 20.0, 31.0],
        "duration": [0.0, 0.0, 0.0, 0.0],
        "trial_type": ["section", "section", "dynamic", "section"],
        "label": ["double bar", "rehearsal mark C", "mf", "final bar"],
        "measure": [25, 26, 26, 30],
        "beat": [5.0, 1.0, 1.0, 5.0],
        "part": ["all", "all", "Violin", "all"],
        "confidence": [0.9, 0.7, 0.8, 0.95],
    })
    with OutputSet(tmp_path) as outs:
        write_events(outs, BASE, ev)
    df = pd.read_csv(tmp_path / f"{BASE}_events.tsv", sep="\t", na_values="n/a", keep_default_na=False)
    assert len(df) == 3
    sec = df[(df["onset"] == 20.0) & (df["trial_type"] == "section")].iloc[0]
    assert sec["label"] == "double bar + rehearsal mark C" and sec["part"] == "all"
    assert sec["measure"] == 26 and sec["beat"] == 1   # the bar that starts at this instant
    assert sec["confidence"] == pytest.approx(0.7)   # the cautious value
    from hed.models import Sidecar, TabularInput

    schema = hed_schema
    sidecar = Sidecar(str(tmp_path / f"{BASE}_events.json"))
    # hedtools: no repeated group at 20 s once merged ...
    assert TabularInput(str(tmp_path / f"{BASE}_events.tsv"), sidecar=sidecar).validate(schema) == []
    with OutputSet(tmp_path / "raw") as outs:
        write_events(outs, BASE, ev, merge_same_kind=False)
    raw = TabularInput(str(tmp_path / "raw" / f"{BASE}_events.tsv"),
                       sidecar=Sidecar(str(tmp_path / "raw" / f"{BASE}_events.json"))).validate(schema)
    # ... while the unmerged rows are rejected (the reason for merging)
    assert any(i["code"] == "TAG_EXPRESSION_REPEATED" for i in raw)


def _descriptions(obj, where=""):
    """Every ``Description`` text in a sidecar, with where it is."""
    if isinstance(obj, dict):
        for k, v in obj.items():
            if k == "Description" and isinstance(v, str):
                yield where, v
            else:
                yield from _descriptions(v, f"{where}/{k}")


def test_every_description_is_a_full_sentence(tmp_path):
    # BIDS 1.11 "Tabular files": a Description is free text for people; the project's style (a
    # full sentence: capital first, a full stop last) so a sidecar reads the same as the README
    from pathlib import Path

    from stimkit.score.parse import load_score
    from stimkit.score.plan import boundaries_sidecar

    with OutputSet(tmp_path) as outs:
        write_events(outs, BASE, _events(), synchronized=True)
        write_beats(outs, BASE, pd.DataFrame({"onset": [1.0], "piece": ["A"], "measure": [1], "pass": [1],
                                              "beat": [1.0], "score_qn": [0.0], "recording": [1.0]}))
    sides = {f: json.loads((tmp_path / f"{BASE}_{f}.json").read_text("utf-8")) for f in ("events", "beats")}
    score = load_score(Path(__file__).resolve().parents[2] / "example_scores" / "kites-at-dusk.musicxml")
    sides["boundaries"] = boundaries_sidecar(score, name="kites", start_s=0.0)
    found = [(f, w, d) for f, side in sides.items() for w, d in _descriptions(side)]
    assert len(found) > 25
    bad = [(f, w, d[:60]) for f, w, d in found if not (d[:1].isupper() and d.rstrip().endswith("."))]
    assert bad == []
    # the confidence column says what the README says it is (a probability of being within 100 ms)
    assert "probability" in sides["events"]["confidence"]["Description"]
    assert "100 ms" in sides["events"]["confidence"]["Description"]
