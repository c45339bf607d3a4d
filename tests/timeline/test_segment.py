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


def test_piece_played_four_times_is_found_at_each_performance(monkeypatch):
    # A programme block (A then B) played four times, every piece listed in the order played: the
    # matcher scores equal renditions about equally (here the last A scores best by a hair), so
    # the first A must not be taken from the last block -- that left "not found" for every later
    # piece (seen by bench/bench_session.py on a one-hour session). The matcher is replaced by
    # its contract: the best (lowest cost ratio) performance of the score lying inside the span.
    import types

    import stimkit.align.chroma as chroma
    import stimkit.align.locate as locate

    block = [("A", 10.0, 160.0), ("B", 170.0, 240.0)]
    played = [(n, s + 850.0 * k, e + 850.0 * k, 0.31 - 0.005 * k) for k in range(4) for n, s, e in block]

    def fake_locate(score, audio_path=None, *, search_span_s, features, **kw):
        lo, hi = search_span_s
        inside = [p for p in played if p[0] == score.name and lo <= p[1] and p[2] <= hi]
        if not inside:
            return lo, min(hi, lo + 150.0), 0.7          # a piece searched where it was not played
        best = min(inside, key=lambda p: p[3])
        return best[1], best[2], best[3]

    monkeypatch.setattr(chroma, "audio_features", lambda *a, **k: None)
    monkeypatch.setattr(locate, "locate_piece", fake_locate)
    scores = [types.SimpleNamespace(name=n, nominal_duration_s=e - s) for _ in range(4) for n, s, e in block]
    spans = find_pieces(scores, [f"{s.name}{i}" for i, s in enumerate(scores)], "x.flac", duration_s=3600.0)
    assert [s.start_s for s in spans] == [p[1] for p in played]
