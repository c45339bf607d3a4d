"""Pieces inside a long recording, on the bundled session (speech, applause, two pieces).

Ground truth: example_audio/demo-truth.json, written by the renderer. The coarse search is
allowed one second (its frames are 0.25 s; the alignment that follows refines the start to the
task's +-0.5 s, checked in tests/test_demo.py).
"""

import json
from pathlib import Path

import pytest

from stimkit.errors import WorkFailed
from stimkit.score.parse import load_score
from stimkit.timeline.segment import find_pieces

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "example_audio"


@pytest.fixture(scope="module")
def truth():
    return json.loads((DEMO / "demo-truth.json").read_text())


@pytest.fixture(scope="module")
def scores(truth):
    return [load_score(ROOT / p["score"]) for p in truth["pieces"]]


def _duration():
    import soundfile as sf

    return sf.info(str(DEMO / "demo-session.flac")).duration


def test_both_pieces_found_in_order(truth, scores):
    spans = find_pieces(scores, [p["piece"] for p in truth["pieces"]], DEMO / "demo-session.flac",
                        duration_s=_duration())
    assert len(spans) == len(truth["pieces"]) == 2
    for sp, p in zip(spans, truth["pieces"]):
        assert abs(sp.start_s - p["start_recording_s"]) <= 1.0
        assert abs(sp.end_s - p["end_recording_s"]) <= 10.0  # a held last note fades slowly
    assert spans[0].end_s <= spans[1].start_s


def test_rough_start_narrows_the_search(truth, scores):
    p = truth["pieces"][1]
    spans = find_pieces(scores[1:], [p["piece"]], DEMO / "demo-session.flac",
                        rough_starts=[p["start_recording_s"] + 20], duration_s=_duration())
    assert abs(spans[0].start_s - p["start_recording_s"]) <= 1.0


def test_piece_after_the_end_cannot_be_found(truth, scores):
    # the first piece listed again after the second: nothing of it is left in the recording
    with pytest.raises(WorkFailed, match="lanterns-over-the-weir"):
        find_pieces([scores[1], scores[0]], ["kites-at-dusk", "lanterns-over-the-weir"],
                    DEMO / "demo-session.flac", duration_s=_duration())
