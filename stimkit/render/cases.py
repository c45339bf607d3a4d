"""Evaluation cases: one score, one way of performing and recording it, one scored alignment.

A :class:`Case` says which score (a music21 corpus work used in place, or a file), which bars,
which variant the aligner is given (:mod:`stimkit.render.variants`), how the performers play it
(:func:`stimkit.render.performance.perform` options, repeats taken or not), with which timbres,
in which room and before which audience (:func:`stimkit.render.ensemble.render_ensemble`).
:func:`run_case` renders it, aligns it and scores every note
(:func:`stimkit.render.evaluate.score_notes`).

Conventions
-----------
- The performance is rendered from the clean score in the performed order the case asks for
  (``repeats``: ``"all"`` or ``"none"``); the aligner gets the variant file loaded with every
  repeat (the order a reader of the score would assume) and decides for itself.
- A right piece the aligner refuses is aligned again with ``force=True``: its errors are scored
  and its refusal is reported (``refused``).
"""

from __future__ import annotations

import inspect
import time
from dataclasses import dataclass, field
from pathlib import Path

import soundfile as sf

from ..errors import WorkFailed
from .ensemble import render_ensemble
from .evaluate import note_truth, score_notes
from .variants import (concert_pitch, excerpt, misread, out_of_step, part_ids, read_musicxml, transposing_part,
                       without_tempo)

__all__ = ["Case", "CaseRun", "prepare_case", "run_case", "load_as_performed", "corpus_path", "align_kwargs",
           "wrong_piece_refused", "SR"]

SR = 22050


def corpus_path(source) -> Path:
    """A file path, or the path of a music21 corpus work (used in place, never copied)."""
    p = Path(str(source))
    if p.exists():
        return p
    import music21

    return Path(str(music21.corpus.getWork(str(source))))


def load_as_performed(path, repeats: str = "all"):
    """``load_score`` with the repeats taken (``"all"``) or not (``"none"``).

    Uses the loader's ``repeats`` option when it has one; otherwise ``"none"`` is the printed
    order (``expand_repeats=False``), which equals "no repeat taken" only for plain repeats
    (no voltas, no jumps)."""
    from ..score.parse import load_score

    if "repeats" in inspect.signature(load_score).parameters:
        return load_score(path, repeats=repeats)
    return load_score(path, expand_repeats=(repeats == "all"))


@dataclass
class Case:
    """One evaluation case (see the module docstring)."""

    condition: str
    piece: str                       # short label
    source: str                      # corpus work or file
    seed: int
    bars: int | None = None          # excerpt of the first bars (played straight through)
    first_bar: int = 0
    timbres: dict | None = None      # part -> timbre overrides ({"*": "organ"} for all)
    perform: dict = field(default_factory=dict)
    hall_rt60_s: float | None = None
    hall_wet: float = 0.5
    audience: bool = False
    applause: bool = False
    mains_hz: float = 50.0
    repeats: str = "all"             # what the performers do
    variant: str | None = None       # "clarinet_bb:<part index>", "horn_f:<i>", "out_of_step", "no_tempo",
    #                                  "misread:<seed>" (as optical music recognition leaves a file),
    #                                  "concert" (the source has transposing parts: play them sounding)
    held_out: bool = False

    @property
    def key(self) -> str:
        return f"{self.condition}--{self.piece}--{self.seed}".replace("/", "_").replace(" ", "_")


@dataclass
class CaseRun:
    """What :func:`prepare_case` and :func:`run_case` produced."""

    case: Case
    wav: Path
    truth_score: object
    aligned_path: Path
    perf: object
    truth: object = None
    scored: object = None
    result: object = None
    refused: bool = False
    refusal: str = ""
    align_s: float = float("nan")
    notes: list = field(default_factory=list)


def _variant_text(text: str, variant: str | None) -> tuple[str, list[str]]:
    if not variant:
        return text, []
    if variant == "no_tempo":
        return text, []            # applied to the clean score too (see prepare_case)
    if variant.startswith("misread"):
        _, _, seed = variant.partition(":")
        return misread(text, seed=int(seed or 0))
    if variant == "out_of_step":
        ids = [p for p, _ in part_ids(text)]
        edits = [(ids[-1], 0.35, "drop"), (ids[0], 0.7, "double")] if len(ids) > 1 else [(ids[0], 0.5, "drop")]
        new, done = out_of_step(text, edits)
        return new, [f"{kind} in part {p} bar position {b}" for (p, b), (_, _, kind) in zip(done, edits)]
    instrument, _, idx = variant.partition(":")
    ids = part_ids(text)
    pid, name = ids[int(idx or 0)]
    return transposing_part(text, pid, instrument), [f"part {pid} ({name}) written for {instrument}"]


def prepare_case(case: Case, workdir, *, sr: int = SR, render=None) -> CaseRun:
    """Write the clean and variant scores and the rendering of ``case`` into ``workdir``."""
    workdir = Path(workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    text = read_musicxml(corpus_path(case.source))
    if case.bars:
        text = excerpt(text, case.bars, first=case.first_bar)
    if case.variant == "no_tempo":
        text = without_tempo(text)
    if case.variant == "concert":      # a score with real transposing parts: play it at sounding pitch
        vtext, notes, text = text, ["transposing parts as written in the source"], concert_pitch(text)
    else:
        vtext, notes = _variant_text(text, case.variant)
    clean = workdir / f"{case.key}.clean.musicxml"
    clean.write_text(text, encoding="utf-8")
    aligned = workdir / f"{case.key}.musicxml"
    aligned.write_text(vtext, encoding="utf-8")
    truth_score = load_as_performed(clean, case.repeats)
    if render is None:
        y, perf = render_ensemble(truth_score, seed=case.seed, sr=sr, timbres=_timbres(case, truth_score),
                                  perform_options=case.perform, hall_rt60_s=case.hall_rt60_s,
                                  hall_wet=case.hall_wet, audience=case.audience, applause=case.applause,
                                  mains_hz=case.mains_hz)
    else:
        y, perf = render(case, truth_score, sr=sr)
    wav = workdir / f"{case.key}.wav"
    sf.write(str(wav), y, sr)
    return CaseRun(case=case, wav=wav, truth_score=truth_score, aligned_path=aligned, perf=perf,
                   truth=note_truth(perf, truth_score), notes=notes)


def _timbres(case: Case, score) -> dict | None:
    from .ensemble import timbres_for

    if case.timbres is None:
        return None
    return timbres_for(score.notes["part"].astype(str).unique(), override=case.timbres)


def align_kwargs() -> dict:
    """Options this aligner needs to decide the repeats itself (``repeats="auto"`` when it has it)."""
    from ..align.run import align_score

    return {"repeats": "auto"} if "repeats" in inspect.signature(align_score).parameters else {}


def run_case(run: CaseRun, *, aligner=None) -> CaseRun:
    """Align ``run``'s recording with its variant score and score every note.

    ``aligner(score, wav, force=...)`` defaults to :func:`stimkit.align.run.align_score` (with
    ``repeats="auto"`` when it has that option)."""
    from ..score.parse import load_score

    if aligner is None:
        from ..align.run import align_score

        kw = align_kwargs()

        def aligner(score, wav, force=False):
            return align_score(score, wav, force=force, **kw)

    score = load_score(run.aligned_path)
    t0 = time.perf_counter()
    try:
        res = aligner(score, run.wav, force=False)
    except WorkFailed as exc:
        run.refused, run.refusal = True, str(exc)
        res = aligner(score, run.wav, force=True)
    run.align_s = time.perf_counter() - t0
    run.result = res
    run.scored = score_notes(run.truth, res)
    return run


def wrong_piece_refused(score_path, wav, *, aligner=None) -> bool:
    """Whether the aligner refuses ``wav`` (a recording of another piece) for ``score_path``."""
    from ..score.parse import load_score

    if aligner is None:
        from ..align.run import align_score

        kw = align_kwargs()

        def aligner(score, w, force=False):
            return align_score(score, w, force=force, **kw)
    try:
        aligner(load_score(score_path), wav, force=False)
    except WorkFailed:
        return True
    return False

