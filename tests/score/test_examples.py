"""The project's example scores: committed files are current, round-trip, and cover every kind.

The requirements checked are the project's own (task: a 2-4 minute piano piece exercising
every boundary kind and a contrasting piece of about 1-1.5 minutes); the facts checked are the
scores' own notation, as written by ``stimkit.demo.scores``.
"""

from __future__ import annotations

import pytest

from stimkit.demo.scores import PIECE_ONE, PIECE_TWO, SCORE_FILES, write_scores
from stimkit.score.markings import DYNAMIC_LEVELS
from stimkit.score.parse import load_score


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    out = tmp_path_factory.mktemp("ex")
    write_scores(out)
    return out


@pytest.fixture(scope="module")
def one(written):
    return load_score(written / f"{PIECE_ONE}.musicxml")


@pytest.fixture(scope="module")
def two(written):
    return load_score(written / f"{PIECE_TWO}.musicxml")


def test_committed_files_are_current(written, repo_root):
    for name in SCORE_FILES:
        committed = repo_root / "example_scores" / name
        assert committed.read_bytes() == (written / name).read_bytes(), f"regenerate {name}"


def test_piece_one_covers_every_kind(one):
    b = one.boundaries
    kinds = set(b["trial_type"])
    assert {"piece", "dynamic", "hairpin", "accent", "tempo", "tempo_change", "fermata", "key",
            "meter", "section", "pause"} <= kinds
    assert 120 <= one.nominal_duration_s <= 240
    assert not one.warnings
    tempo_rows = b[b["trial_type"].isin(["tempo", "tempo_change"]) & (b["pass"] == 1)]
    assert len(tempo_rows) >= 3  # at least two changes after the first mark
    assert (b["trial_type"] == "key").sum() >= 2 and (b["trial_type"] == "meter").sum() >= 2
    lv = b[b["trial_type"] == "dynamic"]["label"].map(DYNAMIC_LEVELS)
    assert lv.min() <= DYNAMIC_LEVELS["pp"] and lv.max() >= DYNAMIC_LEVELS["ff"]
    sec = set(b[b["trial_type"] == "section"]["label"])
    assert {"rehearsal mark A", "rehearsal mark B", "repeat start", "repeat end", "final bar"} <= sec
    assert (one.measures["pass"] == 2).any()  # the notated repeat is expanded
    assert (b["label"] == "general pause").any()


def test_piece_two_is_short_and_contrasting(one, two):
    assert 55 <= two.nominal_duration_s <= 95
    b = two.boundaries
    assert b[b["trial_type"] == "meter"]["label"].tolist() == ["6/8"]
    first = b[b["trial_type"] == "tempo"].iloc[0]
    assert "dotted quarter" in first["label"]
    assert set(b[b["trial_type"] == "tempo_change"]["label"]) >= {"meno mosso", "a tempo", "accel."}
    assert not two.warnings


def test_music_is_varied(one, two):
    for m in (one, two):
        n = m.notes
        # a melody and an accompaniment: a wide pitch range and many distinct pitches
        assert n["pitch"].max() - n["pitch"].min() >= 24
        assert n["pitch"].nunique() >= 20
        # no two printed bars of the first pass have the same note content, apart from chords
        first = n[n["pass"] == 1]
        contents = first.groupby("measure").apply(
            lambda g: tuple(zip((g["score_qn"] - g["score_qn"].min()).round(3), g["pitch"])),
            include_groups=False)
        assert contents.nunique() >= 0.8 * len(contents)
