"""The two jobs of a study, as plain functions a worker process (local or on a Dask cluster) runs.

- :func:`performance_job` -- the recording analysis of one performance
  (:func:`stimkit.timeline.run.analyse_recording`), saved to the study's cache so every session
  that heard the performance reuses it.
- :func:`session_job` -- one participant × session: their recorder clock and the hand-off files
  (:func:`stimkit.timeline.run.annotate` given the shared analysis), the analysis of their
  physiological files (:mod:`stimkit.physio`, when the session lists any), the BIDS raw files of
  the session, and last the session's state record (:mod:`.state`), so an interrupted study
  resumes after the last finished session.

Conventions
-----------
- A job never raises for a problem of its own session: it returns a small dict
  (``status`` ``"ok"``/``"failed"``, ``reason`` on one line, ``exit_code``, ``seconds``), so one
  failing session does not sink the others. ``KeyboardInterrupt`` still propagates.
- Each job limits the numeric libraries to one thread (``threadpoolctl``): the executor supplies
  the parallelism, and results do not depend on how many threads a worker's BLAS would use.
- Workers on a cluster must see the study's inputs and its output folder at the same paths.
- Paths written into outputs are relative: inputs to the study file's folder, outputs to the
  study's output folder (``.`` in a session's provenance).
"""

from __future__ import annotations

import os
import pickle
import shutil
import time
from dataclasses import dataclass, replace
from pathlib import Path

from ..errors import StimkitError

__all__ = ["PerformanceTask", "SessionTask", "performance_job", "session_job", "RAW_SUFFIXES",
           "session_inputs", "check_session_outputs"]

#: Hand-off files copied into the BIDS raw part (``sub-X/ses-Y/beh/``); the rest stays in derivatives.
RAW_SUFFIXES = ("_events.tsv", "_events.json", "_stim.tsv.gz", "_stim.json")


#: Every hand-off file of a session (in derivatives; the raw part holds :data:`RAW_SUFFIXES`).
ALL_SUFFIXES = RAW_SUFFIXES + ("_beats.tsv", "_beats.json", "_report.html", "_report.png", "_provenance.json")


def session_inputs(spec, performance) -> list[Path]:
    """Every file a study session reads: the performance's recording, scores and session file,
    the participant's recorder sync file, physiological files and their sidecars."""
    from .layout import is_bids_physio

    paths = [performance.recording] + [p.score for p in performance.pieces]
    paths += [performance.source, spec.session_file, spec.sync.recorder_file]
    for p in spec.physio:
        paths += [p.file, is_bids_physio(p.file)]
    return [Path(p) for p in paths if p is not None]


def check_session_outputs(out_root: Path, spec, base: str, inputs) -> None:
    """Refuse (:class:`~stimkit.errors.InputError`, exit 2) before any work a session one of whose
    outputs in the dataset is, or links to, one of its inputs (a recorder log saved in the
    dataset under the session's events name, say)."""
    from ..errors import InputError
    from ..export.tables import input_clash
    from .layout import derivative_dir, physio_raw_files, raw_dir

    raw, deriv = raw_dir(out_root, spec), derivative_dir(out_root, spec)
    targets = [raw / f"{base}{s}" for s in RAW_SUFFIXES] + [deriv / f"{base}{s}" for s in ALL_SUFFIXES]
    # a physiological file already in its place in the dataset is left as it is (not copied over itself)
    targets += [raw / name for src, name in physio_raw_files(spec) if input_clash(raw / name, [src]) is None]
    for target in targets:
        clash = input_clash(target, inputs)
        if clash is not None:
            how = "is" if os.path.abspath(target) == os.path.abspath(clash) else "links to"
            raise InputError(f"this input {how} the study's output {Path(target).relative_to(out_root)}, "
                             f"which would replace it; move the file out of the output folder (or "
                             f"choose another output folder)", path=clash)


@dataclass
class PerformanceTask:
    """What a worker needs for one performance job (picklable)."""

    key: str
    session: object                 # stimkit.session.Session
    cache_file: Path


@dataclass
class SessionTask:
    """What a worker needs for one session job (picklable)."""

    key: str
    base: str
    spec: object                    # stimkit.study.studyfile.StudySession
    performance: object             # stimkit.session.Session of the performance heard
    analysis_file: Path             # the performance job's cache file
    out_root: Path                  # the study's output folder
    study_root: Path                # the study file's folder
    study_file: str | None          # the study file, relative to study_root (for the command)
    settings: dict                  # [analysis] settings
    seed: int
    state_file: Path


def _failed(exc: BaseException, t0: float) -> dict:
    if isinstance(exc, StimkitError):
        reason, code = " ".join(str(exc).split()), exc.exit_code
    else:
        reason, code = f"internal error: {type(exc).__name__}: {' '.join(str(exc).split())}", 1
    return {"status": "failed", "reason": reason, "exit_code": code, "seconds": time.perf_counter() - t0}


def performance_job(task: PerformanceTask) -> dict:
    """Analyse one performance's recording and save the result to ``task.cache_file``."""
    from threadpoolctl import threadpool_limits

    from ..export.tables import atomic_write_bytes
    from ..timeline.run import analyse_recording

    t0 = time.perf_counter()
    try:
        with threadpool_limits(limits=1):
            analysis = analyse_recording(task.session)
        atomic_write_bytes(task.cache_file, pickle.dumps(analysis, protocol=pickle.HIGHEST_PROTOCOL))
    except Exception as exc:  # reported per job (see module notes)
        return _failed(exc, t0)
    return {"status": "ok", "seconds": time.perf_counter() - t0,
            "warnings": list(analysis.score_warnings) + list(analysis.warnings)}


def session_job(task: SessionTask) -> dict:
    """Hand-off, physiology and BIDS raw files of one participant × session (see module notes)."""
    from threadpoolctl import threadpool_limits

    t0 = time.perf_counter()
    try:
        with threadpool_limits(limits=1):
            out = _session(task)
    except Exception as exc:  # reported per job (see module notes)
        return _failed(exc, t0)
    out["seconds"] = time.perf_counter() - t0
    return out


def _session(task: SessionTask) -> dict:
    from ..export.tables import OutputSet, input_clash
    from ..timeline.run import annotate
    from . import state
    from .layout import derivative_dir, physio_raw_files, raw_dir

    s = task.spec
    out_root = Path(os.path.abspath(task.out_root))
    deriv = derivative_dir(out_root, s)
    raw = raw_dir(out_root, s)
    staging = state.staging_dir(out_root, task.base)
    shutil.rmtree(staging, ignore_errors=True)
    with open(task.analysis_file, "rb") as fh:
        analysis = pickle.load(fh)
    old_record = state.read_session_record(task.state_file)
    bids = {"subject": s.participant, "session": s.session, "task": s.task}
    if s.run is not None:
        bids["run"] = str(s.run)
    # the click track for checking by ear is left out: it would be the same recording for every session
    # (the physiology is analysed below with the study's settings, not by annotate's own step)
    session = replace(task.performance, sync=s.sync, bids=bids, out_dir=staging, source=s.session_file,
                      check_audio=False, physio=[], relate={})
    command = ["stimkit", "study", task.study_file or "STUDY.toml"]
    try:
        result = annotate(session, analysis=analysis, command=command, paths_relative_to=task.study_root,
                          keep_timings=False)
        warnings = list(result.warnings)
        # every file of the session appears together, or none does
        with OutputSet(out_root, inputs=session_inputs(s, task.performance)) as outs:
            d_rel = deriv.relative_to(out_root).as_posix()
            r_rel = raw.relative_to(out_root).as_posix()
            for f in sorted(result.written, key=lambda p: p.name):
                if f.name in ("dataset_description.json", ".bidsignore"):
                    continue  # the dataset's own files are written once, at its root
                data = Path(f).read_bytes()
                outs.write_bytes(f"{d_rel}/{f.name}", data)
                if f.name.endswith(RAW_SUFFIXES):
                    outs.write_bytes(f"{r_rel}/{f.name}", data)
            if s.physio:
                warnings.extend(_physio(task, result, outs, d_rel))
            for src, name in physio_raw_files(s):
                if input_clash(raw / name, [src]) is None:  # not already in its place in the dataset
                    outs.write_bytes(f"{r_rel}/{name}", Path(src).read_bytes())
        written = list(outs.committed)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    state.write_session_record(task.state_file, key=task.key, out_root=out_root, files=written)
    state.remove_stale_files(out_root, old_record, state.read_session_record(task.state_file))
    return {"status": "ok", "warnings": warnings,
            "files": sorted(Path(p).relative_to(out_root).as_posix() for p in written),
            "clock": result.clock.method, "pieces": len(result.pieces)}


def _physio(task: SessionTask, result, outs, d_rel: str) -> list[str]:
    """The per-participant analysis of each physiological file of the session, staged into
    ``outs`` under ``d_rel`` (see :mod:`stimkit.study.physio_bridge`); returns notes for people."""
    from .physio_bridge import analyse_session_physio

    return analyse_session_physio(task, result, outs, d_rel)
