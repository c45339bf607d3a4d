"""Repeats as performed and tempo far from the marks, decided from the recording.

A small two-part score written here (arpeggios over a different triad in every bar) with a repeat with first and second endings, a plain repeat and a
D.C. al Fine, performed by the project's renderer in several ways -- repeats taken as notated,
none taken, only one of them, the repeats taken again after the D.C., a tempo far from the mark
-- is aligned with ``repeats="auto"``. Every decision must match what was played (the
jump-aware alignment of Fremerey, Müller & Clausen 2010) and every note must be placed, scored
by printed bar and pass against the renderer's ground truth (``mir_eval.alignment`` figures via
:mod:`stimkit.render.evaluate`; 2 s is the MIREX gross-error bound, 300 ms mir_eval's default
window).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parents[1] / "score"))
from xmlfix import attributes, barline, measure, metronome, note, score, words, write  # noqa: E402

from stimkit.score.parse import load_score, score_for_choice  # noqa: E402

STEPS = ["C", "D", "E", "F", "G", "A", "B"]


def _bar(i, rng, root, pre="", post=""):
    """A bar: the upper part arpeggiates the bar's triad (a pattern drawn per bar), the lower
    part holds the triad."""
    tones = [(root + d) % 7 for d in (0, 2, 4, 7)]
    pattern = rng.permutation(8) % 4
    up = "".join(note(STEPS[tones[k] % 7], 5 + (1 if k == 3 else 0), 0.5) for k in pattern)
    triad = [STEPS[(root + d) % 7] for d in (0, 2, 4)]
    low = note(triad[0], 3, 4) + note(triad[1], 3, 4, chord=True) + note(triad[2], 3, 4, chord=True)
    return measure(i, pre + up + post), measure(i, pre + low + post)


def _write_score(tmp_path):
    rng = np.random.default_rng(5)
    # section A (bars 1-5) on C, F, G, a, d; B (6-9) on e, b, D, A; the rest on other roots
    roots = [None, 0, 3, 4, 5, 1, 2, 6, 1, 5, 3, 0, 6, 2]
    upper, lower = [], []
    head = attributes(beats=4, beat_type=4, fifths=0) + metronome("quarter", 132)
    marks = {
        1: (head + barline("left", repeat="forward"), ""),
        4: (barline("left", ending=("1", "start")),
            barline("right", "light-heavy", repeat="backward", ending=("1", "stop"))),
        5: (barline("left", ending=("2", "start")), barline("right", "light-light", ending=("2", "stop"))),
        6: (barline("left", repeat="forward"), ""),
        9: ("", barline("right", "light-heavy", repeat="backward") + words("Fine")),
        13: ("", words("D.C. al Fine")),
    }
    # bars 1-3 |: [1. 4 :| [2. 5 || |: 6-9 :| Fine || 10-13 D.C. al Fine
    for i in range(1, 14):
        pre, post = marks.get(i, ("", ""))
        u, lo = _bar(i, rng, roots[i], pre, post)
        upper.append(u)
        lower.append(lo)
    return write(tmp_path, "forms.musicxml", score([("Upper", upper), ("Lower", lower)]))


@pytest.fixture(scope="module")
def form(tmp_path_factory):
    d = tmp_path_factory.mktemp("forms")
    return d, load_score(_write_score(d))


def _perform(form, choice, *, seed, tempo=1.0):
    from stimkit.render.cases import Case, CaseRun, run_case
    from stimkit.render.ensemble import render_ensemble
    from stimkit.render.evaluate import note_truth
    import soundfile as sf

    d, base = form
    truth_score = score_for_choice(base, choice)
    y, perf = render_ensemble(truth_score, seed=seed, timbres={"Upper": "piano", "Lower": "organ"},
                              perform_options={"rubato": 0.1, "tempo_factor": tempo})
    wav = d / f"form-{seed}.wav"
    sf.write(str(wav), y, 22050)
    run = CaseRun(case=Case("structure", "forms", "forms", seed), wav=wav, truth_score=truth_score,
                  aligned_path=base.path, perf=perf, truth=note_truth(perf, truth_score))
    return truth_score, run_case(run)


def _check_notes(run):
    from stimkit.render.evaluate import summarize

    d = summarize(run.scored)
    assert d["missing"] == 0, d           # every performed note found in the performed order chosen
    assert d["over_2s"] == 0, d           # MIREX gross-error bound
    assert d["within_300"] >= 0.995, d    # mir_eval.alignment default window
    return d


@pytest.mark.parametrize("choice,seed,tempo", [
    ("all", 41, 1.0),        # as notated
    ("none", 42, 1.0),       # no repeat sign taken
    ("max", 43, 1.0),        # the repeats taken again after the D.C. as well
    ("none", 44, 0.45),      # and far slower than the mark
])
def test_repeats_decided_from_the_recording(form, choice, seed, tempo):
    truth_score, run = _perform(form, choice, seed=seed, tempo=tempo)
    res = run.result
    assert not run.refused, run.refusal
    # the performed order found is the order played, bar by bar
    got = list(zip(res.score.measures["measure"], res.score.measures["pass"]))
    want = list(zip(truth_score.measures["measure"], truth_score.measures["pass"]))
    assert got == want, (choice, [r["label"] + (" taken" if r["taken"] else " skipped") for r in res.repeats])
    assert all(r["decided"] == "recording" for r in res.repeats)
    _check_notes(run)
    if tempo != 1.0:
        # the tempo found is the tempo played (within 10 %; the renderer adds rubato)
        assert res.confidence["tempo_ratio"] == pytest.approx(tempo, rel=0.1)


def test_one_repeat_taken_the_other_not(form):
    base = form[1]
    plan = base.repeat_plan
    first = next(o for o in plan.options if o.kind == "volta" and not o.after_jump)
    choice = {o.id: (o.id == first.id or o.kind == "dc") for o in plan.options}
    truth_score, run = _perform(form, choice, seed=45)
    got = list(zip(run.result.score.measures["measure"], run.result.score.measures["pass"]))
    assert got == list(zip(truth_score.measures["measure"], truth_score.measures["pass"]))
    _check_notes(run)


def test_repeats_setting_overrides_the_recording(form):
    """``repeats="all"`` aligns the notated order even when the performers skipped: the setting
    is the user's, and the result says it came from the setting."""
    from stimkit.align.run import align_score

    _, run = _perform(form, "all", seed=46)
    res = align_score(form[1], run.wav, repeats="all")
    assert res.repeats and all(r["decided"] == "setting" and r["taken"] == r["notated"] for r in res.repeats)
