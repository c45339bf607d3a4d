"""Alignment accuracy on rendered performances, scored note by note with mir_eval.alignment.

Each piece is performed with seeded expressive timing (tempo drift, phrase-end ritardandi,
fermatas, per-note jitter, chord spread) by the project's renderer, synthesized with a piano or
organ timbre (the score side is a note-based harmonic template, not a rendering), preceded by
3 s of silence, and aligned. Every note's estimated time is the alignment's time of its score
position; the ground truth is the renderer's ``onset_s``.

Thresholds are those of the task (published systems: median 20 ms, Dixon 2005; Dixon & Widmer
2005). The per-piece table is written to ``align_accuracy.tsv`` in pytest's temporary folder and
attached with ``record_property``.
"""

from __future__ import annotations

from pathlib import Path

import mir_eval
import numpy as np
import pytest

from align_render import render

ROOT = Path(__file__).resolve().parents[2]

# (label, source, timbre, seed, room)
PIECES = [
    ("lanterns", ROOT / "example_scores" / "lanterns-over-the-weir.musicxml", "piano", 11, False),
    ("kites-at-dusk", ROOT / "example_scores" / "kites-at-dusk.musicxml", "organ", 12, True),
    ("bwv66.6", "bach/bwv66.6", "organ", 13, False),
    ("k545", "mozart/k545/movement1_exposition.mxl", "piano", 14, True),
    ("prayer", "beach/prayer_of_a_tired_child.musicxml", "piano", 15, False),
]


def _load(src):
    from stimkit.score.parse import load_score

    if isinstance(src, Path):
        return load_score(src)
    import music21

    return load_score(music21.corpus.getWork(src))  # music21 corpus file used in place


@pytest.fixture(scope="module")
def evaluations(tmp_path_factory):
    from stimkit.align.run import align_score

    out = tmp_path_factory.mktemp("align_accuracy")
    rows = []
    for label, src, timbre, seed, room in PIECES:
        score = _load(src)
        wav = out / f"{label}.wav"
        perf, _ = render(score, wav, seed=seed, timbre=timbre, room=room)
        res = align_score(score, wav)
        notes = perf.notes.sort_values(["score_qn", "onset_s"], kind="stable")
        ref = notes["onset_s"].to_numpy()
        est = np.asarray(res.timemap(notes["score_qn"].to_numpy()), dtype=np.float64)
        median, mean = mir_eval.alignment.absolute_error(ref, est)
        within = {w: mir_eval.alignment.percentage_correct(ref, est, window=w) for w in (0.05, 0.1, 0.3)}
        rows.append({"piece": label, "notes": len(ref), "mean_ms": 1000 * mean, "median_ms": 1000 * median,
                     "within_50ms": 100 * within[0.05], "within_100ms": 100 * within[0.1],
                     "within_300ms": 100 * within[0.3], "max_s": float(np.max(np.abs(ref - est))),
                     "confidence": res.confidence["overall"], "flagged": len(res.regions)})
    lines = ["\t".join(rows[0].keys())] + [
        "\t".join(f"{v:.3f}" if isinstance(v, float) else str(v) for v in r.values()) for r in rows]
    (out / "align_accuracy.tsv").write_text("\n".join(lines) + "\n")
    return rows


def test_every_piece_was_evaluated(evaluations, record_property):
    record_property("align_accuracy", evaluations)
    # task: several scores, project examples and corpus pieces; every listed one is committed or in
    # the music21 corpus, so every one must have been evaluated
    assert [r["piece"] for r in evaluations] == [p[0] for p in PIECES]


@pytest.mark.parametrize("label", [p[0] for p in PIECES])
def test_accuracy_thresholds(evaluations, label):
    row = next(r for r in evaluations if r["piece"] == label)
    # thresholds of the task; median 20 ms is the published bar (Dixon 2005, Dixon & Widmer 2005)
    assert row["median_ms"] <= 20.0, row
    assert row["within_100ms"] >= 90.0, row
    assert row["within_300ms"] >= 98.0, row   # 300 ms: mir_eval.alignment default window
    assert row["max_s"] <= 2.0, row           # 2 s: gross-failure bound (MIREX practice)
    assert row["flagged"] == 0, row           # the renderer plays every note: no cut, no insertion
