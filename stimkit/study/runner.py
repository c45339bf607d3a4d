"""Running a study: every session as an independent job over one ``concurrent.futures.Executor``.

:func:`run_study` plans the jobs (:mod:`.plan`), skips the sessions that are current
(:mod:`.state`), runs the needed performance jobs and, as each finishes, the session jobs that
depend on it (:mod:`.jobs`), then combines the sessions' tables into the group results, the study
report and the dataset-level BIDS files (:mod:`.group`, :mod:`.report`, :mod:`.layout`).

Where the jobs run is only a choice of executor (:func:`open_executor`): local processes
(``concurrent.futures.ProcessPoolExecutor``, the default), this process (one worker), or an
existing Dask cluster through ``dask.distributed.Client(address).get_executor()``, which offers
the same ``submit`` interface -- there is no second code path.

Conventions
-----------
- A session that fails is reported with its reason (``StudyResult.failed``); the others go on and
  the group results use the sessions that finished. The CLI exits 1 at the end, naming it.
- Progress is reported per session through ``progress(task, fraction)``: 0 when the session is
  queued, 0.5 when its performance is ready and it runs, 1 when it is finished (or skipped).
- Ctrl-C cancels the queued jobs; finished sessions keep their outputs and records, so the next
  run resumes where this one stopped.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError, WorkFailed
from . import state
from .jobs import PerformanceTask, SessionTask, check_session_outputs, performance_job, session_job, \
    session_inputs
from .plan import HashCache, plan_study

__all__ = ["SessionOutcome", "StudyResult", "run_study", "open_executor", "SerialExecutor"]


@dataclass
class SessionOutcome:
    """What happened to one session in this run."""

    name: str
    status: str                      # "computed", "skipped" (current) or "failed"
    reason: str = ""
    seconds: float = 0.0
    warnings: list[str] = field(default_factory=list)


@dataclass
class StudyResult:
    out_dir: Path
    sessions: list[SessionOutcome]
    performances_computed: int
    performances_total: int
    where: str                       # "this process", "N local processes", "Dask cluster at ..."
    written: list[Path] = field(default_factory=list)
    group: object = None             # stimkit.study.group.GroupResult
    warnings: list[str] = field(default_factory=list)

    @property
    def computed(self) -> list[str]:
        return [s.name for s in self.sessions if s.status == "computed"]

    @property
    def skipped(self) -> list[str]:
        return [s.name for s in self.sessions if s.status == "skipped"]

    @property
    def failed(self) -> list[SessionOutcome]:
        return [s for s in self.sessions if s.status == "failed"]


class SerialExecutor(cf.Executor):
    """An executor that runs each job at once, in this process (``workers = 1``)."""

    def submit(self, fn, /, *args, **kwargs):
        f = cf.Future()
        try:
            f.set_result(fn(*args, **kwargs))
        except BaseException as exc:  # noqa: BLE001 - handed to the caller through the future
            if isinstance(exc, KeyboardInterrupt):
                raise
            f.set_exception(exc)
        return f


@contextmanager
def open_executor(*, scheduler: str | None = None, workers: int | None = None):
    """Yield ``(executor, description)``: a Dask cluster's executor when ``scheduler`` is given,
    else ``workers`` local processes (default: one per core; 1 runs in this process)."""
    if scheduler:
        try:
            from distributed import Client
        except ImportError:  # pragma: no cover - dask[distributed] is a dependency
            raise InputError("--scheduler needs dask.distributed; install it with pip install "
                             "'dask[distributed]'") from None
        try:
            client = Client(scheduler, timeout="20s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise WorkFailed(f"cannot reach the Dask scheduler at {scheduler} ({type(exc).__name__}: "
                             f"{' '.join(str(exc).split())}); check the address, or leave --scheduler out "
                             "to run on this machine") from None
        try:
            yield client.get_executor(pure=False), f"Dask cluster at {scheduler}"
        finally:
            client.close()
        return
    n = workers or os.cpu_count() or 1
    if n == 1:
        yield SerialExecutor(), "this process"
        return
    ex = cf.ProcessPoolExecutor(max_workers=n, mp_context=multiprocessing.get_context("spawn"))
    try:
        yield ex, f"{n} local processes"
    finally:
        ex.shutdown(wait=True, cancel_futures=True)


def run_study(study, *, scheduler: str | None = None, workers: int | None = None, executor=None,
              progress=None, force: bool = False, command: list[str] | None = None) -> StudyResult:
    """Run every session of ``study`` that is not current, then the group stage (module notes).

    ``scheduler`` / ``workers`` override the study file's settings; ``executor`` (any
    ``concurrent.futures.Executor``) overrides both. ``force`` recomputes every session.

    Raises
    ------
    InputError
        The output folder cannot be written (exit 2).
    WorkFailed
        The Dask scheduler cannot be reached (exit 1). A failing session does not raise: it is
        listed in ``StudyResult.failed``.
    """
    from ..export.tables import check_output_dir

    out_root = check_output_dir(study.out_dir)
    progress = progress or (lambda task, fraction: None)
    hashes = HashCache(state.load_hashes(out_root, study.root))
    plan = plan_study(study, hashes=hashes)
    for job in plan.sessions:  # before any work: no output of a session may replace one of its inputs
        check_session_outputs(out_root, job.spec, job.base,
                              session_inputs(job.spec, plan.performances[job.performance_key].session))
    state.save_hashes(out_root, study.root, {k: v for k, v in hashes.known.items() if k in hashes.used})
    study_file = study.show(study.source) if study.source is not None else None

    outcomes: dict[str, SessionOutcome] = {}
    todo = []
    for job in plan.sessions:
        if not force and state.is_current(out_root, job.base, job.key):
            outcomes[job.name] = SessionOutcome(job.name, "skipped")
            progress(job.name, 1.0)
        else:
            todo.append(job)
            progress(job.name, 0.0)
    needed = {j.performance_key for j in todo}
    perf_ready = {k for k in needed if not force and state.performance_cache_file(out_root, k).is_file()}
    perf_run = sorted(needed - perf_ready)
    where = "nothing to run"
    perf_failed: dict[str, str] = {}

    def session_task(job) -> SessionTask:
        perf = plan.performances[job.performance_key]
        return SessionTask(key=job.key, base=job.base, spec=job.spec, performance=perf.session,
                           analysis_file=state.performance_cache_file(out_root, job.performance_key),
                           out_root=out_root, study_root=study.root, study_file=study_file,
                           settings=dict(study.analysis), seed=job.seed,
                           state_file=state.session_record_file(out_root, job.base))

    if todo:
        sched = scheduler if scheduler is not None else study.scheduler
        wk = workers if workers is not None else study.workers
        with (_given(executor) if executor is not None else open_executor(scheduler=sched, workers=wk)) as (ex, where):
            running: dict = {}
            for key in perf_run:
                perf = plan.performances[key]
                t = PerformanceTask(key=key, session=perf.session,
                                    cache_file=state.performance_cache_file(out_root, key))
                running[ex.submit(performance_job, t)] = ("performance", key)
            waiting = {}
            for job in todo:
                if job.performance_key in perf_ready:
                    running[ex.submit(session_job, session_task(job))] = ("session", job)
                    progress(job.name, 0.5)
                else:
                    waiting.setdefault(job.performance_key, []).append(job)
            while running:
                done, _ = cf.wait(list(running), return_when=cf.FIRST_COMPLETED)
                for fut in sorted(done, key=lambda f: _order(running[f])):
                    kind, what = running.pop(fut)
                    res = _result(fut)
                    if kind == "performance":
                        if res["status"] == "ok":
                            for job in waiting.pop(what, []):
                                running[ex.submit(session_job, session_task(job))] = ("session", job)
                                progress(job.name, 0.5)
                        else:
                            perf_failed[what] = res["reason"]
                            ids = ", ".join(plan.performances[what].ids)
                            for job in waiting.pop(what, []):
                                outcomes[job.name] = SessionOutcome(
                                    job.name, "failed", f"performance '{ids}': {res['reason']}")
                                progress(job.name, 1.0)
                    else:
                        if res["status"] == "ok":
                            outcomes[what.name] = SessionOutcome(what.name, "computed", seconds=res["seconds"],
                                                                 warnings=list(res.get("warnings", [])))
                        else:
                            outcomes[what.name] = SessionOutcome(what.name, "failed", res["reason"],
                                                                 seconds=res["seconds"])
                        progress(what.name, 1.0)

    # the cached analyses no session of this study needs any more
    keep = {j.performance_key for j in plan.sessions}
    cache_dir = state.performance_cache_file(out_root, "x").parent
    if cache_dir.is_dir():
        for f in sorted(cache_dir.glob("*.pickle")):
            if f.stem not in keep:
                f.unlink()
    ordered = [outcomes[j.name] for j in plan.sessions]

    from .finish import finish_study

    written, group, warnings = finish_study(study, plan, ordered, out_root=out_root, command=command)
    return StudyResult(out_dir=out_root, sessions=ordered, performances_computed=len(perf_run) - len(perf_failed),
                       performances_total=len(plan.performances), where=where, written=written, group=group,
                       warnings=warnings)


@contextmanager
def _given(executor):
    yield executor, type(executor).__name__


def _order(item) -> tuple:
    kind, what = item
    return (0, what) if kind == "performance" else (1, what.name)


def _result(fut) -> dict:
    """A job's dict; an exception that escaped the job (a lost worker, say) becomes a failure."""
    try:
        return fut.result()
    except KeyboardInterrupt:
        raise
    except BaseException as exc:  # noqa: BLE001 - reported as that session's failure
        return {"status": "failed", "reason": f"the worker failed: {type(exc).__name__}: "
                                              f"{' '.join(str(exc).split())}", "seconds": 0.0}
