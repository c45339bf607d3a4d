"""Alignment under the conditions of real concert material, one test per condition.

Each case is a short excerpt of a music21 corpus work (used in place) performed by the project's
renderer (:mod:`stimkit.render`) with expressive timing (drift, rubato, agogic accents, long
final ritardando, melody lead, chord spread) and scored note by note against the exact ground
truth through printed bar, pass and offset (:mod:`stimkit.render.evaluate`; figures by
``mir_eval.alignment``). These renders are development material; held-out material lives in
``bench/align_material.py`` and ``bench/sampled.py`` (FluidR3_GM).

Thresholds are the task's goals: piano median <= 10 ms and >= 99 % of notes within 100 ms;
ensembles (strings, voice, winds, organ) median <= 13 ms and >= 95 %; every condition >= 99.5 %
within 300 ms (300 ms: mir_eval.alignment's default window), no note more than 2 s off (MIREX
gross-error bound) and the right piece not refused. Conditions the aligner does not meet yet are
marked ``xfail(strict=False)`` with the condition named; remove a mark when its condition passes.
"""

from __future__ import annotations

import pytest

from stimkit.render.cases import Case, prepare_case, run_case

EXPR = {"rubato": 0.15, "agogic_s": 0.08, "melody_lead_s": 0.03, "final_rit_qn": 8.0}
HALL = {"hall_rt60_s": 2.2, "hall_wet": 0.55, "audience": True, "applause": True}
PIANO = {"median_ms": 10.0, "within_100": 0.99}        # task goals, piano
ENSEMBLE = {"median_ms": 13.0, "within_100": 0.95}     # task goals, ensembles


def _xf(reason):
    return pytest.mark.xfail(strict=False, reason=reason)


# (id, case, goals, marks)
CASES = [
    ("piano-dry", Case("piano dry", "k545", "mozart/k545/movement1_exposition.mxl", 301, bars=12,
                       perform=EXPR), PIANO,
     ()),
    ("piano-hall-audience", Case("piano hall+audience", "polonaise1", "schumann_clara/polonaise_op1n1.mxl",
                                 302, bars=12, perform=EXPR, **HALL), PIANO,
     (_xf("piano in a 2.2 s hall with an audience: notes 15-45 ms late on average (reverberant chroma), "
         "median and 100 ms goals not met"),)),
    ("strings", Case("strings", "k458-3", "mozart/k458/movement3.mxl", 303, bars=10, perform=EXPR), ENSEMBLE,
     (_xf("bowed strings with 100-300 ms attacks: notes ~40 ms late (the attack prior is 0.1-0.2 s), "
         "median goal not met"),)),
    ("voice-piano", Case("voice+piano", "lindenbaum", "schubert/Lindenbaum.xml", 304, bars=14, perform=EXPR),
     ENSEMBLE, ()),
    ("winds", Case("winds", "bwv10.7-winds", "bach/bwv10.7", 305, bars=8, perform=EXPR,
                   timbres={"Soprano": "flute", "Alto": "clarinet", "Tenor": "horn", "Bass": "horn"}),
     ENSEMBLE, (_xf("winds (flute breath, soft attacks): median 14-28 ms, goal 13 ms"),)),
    ("organ", Case("organ", "bwv66.6-organ", "bach/bwv66.6", 306, bars=8, perform=EXPR,
                   timbres={"*": "organ"}), ENSEMBLE, (_xf("organ sustains: median 13-25 ms, goal 13 ms"),)),
    ("repeats-taken", Case("repeats taken", "la-donna", "verdi/laDonnaEMobile.mxl", 307, perform=EXPR),
     PIANO, (_xf("repeats taken, voice and piano: median ~18 ms, goal 10 ms"),)),
    ("repeats-skipped", Case("repeats skipped", "la-donna", "verdi/laDonnaEMobile.mxl", 308, perform=EXPR,
                             repeats="none"), PIANO,
     (_xf("repeats skipped, voice and piano: median ~17 ms, goal 10 ms"),)),
    ("tempo-0.4x", Case("tempo 0.4x", "k545", "mozart/k545/movement1_exposition.mxl", 309, bars=6,
                        perform={**EXPR, "tempo_factor": 0.4}), PIANO,
     ()),
    ("tempo-2.5x", Case("tempo 2.5x", "k545", "mozart/k545/movement1_exposition.mxl", 310, bars=28,
                        perform={**EXPR, "tempo_factor": 2.5}), PIANO,
     (_xf("tempo 2.5x the marks: median ~12 ms, goal 10 ms"),)),
    ("no-mark-half", Case("no mark 0.5x", "op74-2", "haydn/opus74no1/movement2.mxl", 311, bars=8,
                          perform={**EXPR, "tempo_factor": 0.5}), ENSEMBLE,
     (_xf("no metronome mark, bowed strings at half the assumed q = 100: sparse long notes, "
         "medians and 100 ms goals not met"),)),
    ("no-mark-double", Case("no mark 2x", "lindenbaum", "schubert/Lindenbaum.xml", 312, bars=28,
                            perform={**EXPR, "tempo_factor": 2.0}), ENSEMBLE,
     (_xf("no metronome mark, played at double the assumed q = 100: median ~15 ms, goal 13 ms"),)),
    ("transposing-part", Case("transposing part", "k458-3-clarinet", "mozart/k458/movement3.mxl", 313, bars=10,
                              perform=EXPR, timbres={"1st Violin": "clarinet"}, variant="clarinet_bb:0"),
     ENSEMBLE, (_xf("a B-flat clarinet part with bowed strings: notes ~20-30 ms late, median goal not met"),)),
    ("parts-out-of-step", Case("parts out of step", "bwv66.6", "bach/bwv66.6", 314, bars=8, perform=EXPR,
                               timbres={"*": "organ"}, variant="out_of_step"), ENSEMBLE,
     (_xf("parts out of step, organ: median ~12-22 ms, goal 13 ms"),)),
]


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    return tmp_path_factory.mktemp("conditions")


@pytest.fixture(scope="module")
def runs(workdir):
    """Renders and alignments shared by the tests of this module, made on first use."""
    cache = {}

    def get(key):
        if key not in cache:
            case = next(c for k, c, _, _ in CASES if k == key)
            cache[key] = run_case(prepare_case(case, workdir))
        return cache[key]
    return get


#: Conditions that still miss the hard goals (measured; remove when they pass).
ROBUST_XFAIL = {
    "strings": "bowed strings with 100-300 ms attacks: 97.8 % within 300 ms (a few late notes at soft entries)",
    "no-mark-half": "a slow movement's 8 bars of bowed strings at half the assumed tempo: sparse long notes, "
                    "58 % within 300 ms (flagged unreliable, confidence 0.1-0.2)",
}


@pytest.mark.parametrize("key", [pytest.param(k, id=k, marks=(_xf(ROBUST_XFAIL[k]),) if k in ROBUST_XFAIL else ())
                                 for k, _, _, _ in CASES])
def test_condition_is_robust(runs, key):
    """Every condition: no note lost, the right piece not refused, no gross error, >= 99.5 %
    within 300 ms -- hard goals; the conditions that still miss them are listed in
    ``ROBUST_XFAIL`` with the figures measured."""
    from stimkit.render.evaluate import summarize

    run = runs(key)
    d = summarize(run.scored)
    desc = f"{run.case.condition} {run.case.piece}: {d}"
    assert d["missing"] == 0, desc                            # every performed note has an estimate
    assert not run.refused, run.refusal                       # task: no right piece refused
    assert d["over_2s"] == 0, desc                            # MIREX gross-error bound, 2 s
    assert d["within_300"] >= 0.995, desc                     # task goal; mir_eval default window


@pytest.mark.parametrize("key,goals", [pytest.param(k, g, marks=m, id=k) for k, _, g, m in CASES])
def test_condition_meets_the_precision_goals(runs, key, goals):
    from stimkit.render.evaluate import summarize

    run = runs(key)
    d = summarize(run.scored)
    desc = f"{run.case.condition} {run.case.piece}: {d}"
    assert 1000 * d["median_s"] <= goals["median_ms"], desc   # task goal (piano 10 / ensembles 13 ms)
    assert d["within_100"] >= goals["within_100"], desc       # task goal (piano 99 % / ensembles 95 %)


def test_wrong_piece_is_still_refused(runs):
    """The score of one condition's piece with another piece's recording must be refused."""
    from stimkit.render.cases import wrong_piece_refused

    a, b = runs("piano-dry"), runs("strings")
    assert wrong_piece_refused(b.aligned_path, a.wav)      # quartet score, piano recording
    assert wrong_piece_refused(a.aligned_path, b.wav)      # piano score, quartet recording


def test_score_from_optical_music_recognition(workdir):
    """A score file as optical music recognition leaves it (:func:`stimkit.render.variants.misread`:
    parts called "Part 1/2", no tempo marks, 6 % of the pitches, accidentals, rests and ties
    misread, four bars of the right hand read in a wrong clef), a piano performance of the clean
    score. Outside the misread passage the hard goals hold (no gross error, >= 99.5 % within
    300 ms; mir_eval.alignment's window, MIREX's 2 s bound); inside it -- music the file does not
    describe -- positions may be a few hundred ms off, but the confidence says so (lower there
    than anywhere else)."""
    import re

    import numpy as np

    from stimkit.render.evaluate import summarize

    case = Case("score from OMR", "k545-omr", "mozart/k545/movement1_exposition.mxl", 301, bars=12,
                perform=EXPR, variant="misread:5")
    run = run_case(prepare_case(case, workdir))
    assert not run.refused, run.refusal                      # task: no right piece refused
    clef = next(n for n in run.notes if "wrong clef" in n)
    a, b = (int(v) for v in re.search(r"bars (\d+)-(\d+)", clef).groups())
    sc = run.scored
    inside = sc["index"].between(a - 1, b - 1).to_numpy()   # bar positions are 0-based in the truth
    whole = summarize(sc)
    rest = summarize(sc[~inside])
    assert whole["over_2s"] == 0 and whole["missing"] == 0, whole
    assert rest["within_300"] >= 0.995, rest
    assert np.nanmean(sc["confidence"][inside]) < np.nanmean(sc["confidence"][~inside]) - 0.2
