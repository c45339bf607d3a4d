"""The study's bridge to the per-participant physiology analysis (:mod:`stimkit.physio`).

For each physiological file of a session it reads the series (:func:`stimkit.physio.read_physio`),
runs :func:`stimkit.physio.relate` on the session's events as written (on that participant's
recorder clock, read back with :func:`stimkit.physio.inputs.read_events`) and stages its outputs
(:func:`stimkit.physio.outputs.write_relate`) into the session's derivatives folder, named after
the physiological file: ``<sub>_<ses>_<task>[_run-<r>][_recording-<label>]_<table>.tsv``.

Conventions
-----------
- The analysis runs in the session's worker (``n_jobs = 1``): the study's executor already
  spreads the sessions over the cores.
- Each file's seed is a child of the session's seed that depends only on the file's label
  (:func:`stimkit.study.plan.session_seed`), so results do not depend on the order of files.
- Inputs are recorded relative to the study file's folder (never absolute), with their SHA-256.
- A file the analysis refuses (too short, not covering the music, wrong units) fails the session
  with the analysis' one-line message, which names the file.
"""

from __future__ import annotations

__all__ = ["analyse_session_physio", "table_file_name", "relate_settings", "TABLES"]

#: The per-participant tables the group statistics read (PHYSIO-STATS §2.7, §3.6).
TABLES = ("boundary_tests", "boundary_summary", "coincidence_curve", "coincidence_summary")


def table_file_name(s, p, table: str) -> str:
    """``<physio file's BIDS name>_<table>.tsv`` (e.g. ``sub-01_ses-1_task-music_boundary_tests.tsv``)."""
    from .plan import physio_base

    return f"{physio_base(s, p)}_{table}.tsv"


def relate_settings(analysis: dict):
    """The :class:`stimkit.physio.RelateSettings` of a study's ``[analysis]`` table."""
    from ..physio import RelateSettings

    return RelateSettings(window_beats=tuple(int(n) for n in analysis["window_beats"]),
                          n_pseudo=int(analysis["pseudo_boundaries"]), n_share_null=int(analysis["share_sets"]),
                          n_surrogates=int(analysis["surrogates"]), alpha=float(analysis["alpha"]), n_jobs=1)


def analyse_session_physio(task, result, outs, d_rel: str) -> list[str]:
    """Stage the physiology outputs of every physiological file of ``task``'s session; return notes."""
    from ..physio import read_physio, relate
    from ..physio.inputs import read_events
    from ..physio.outputs import write_relate
    from .layout import is_bids_physio
    from .plan import physio_base, session_seed

    s = task.spec
    events_file = next(f for f in result.written if f.name.endswith("_events.tsv"))
    events = read_events(events_file)
    settings = relate_settings(task.settings)
    notes: list[str] = []
    for p in s.physio:
        label = p.label or p.kind or "series"
        series = read_physio(p.file, kind=p.kind or "rr", column=p.column, mode=p.mode, offset_s=p.offset_s)
        res = relate(events, None, series, settings=settings, seed=session_seed(task.seed, label),
                     participant=s.participant, series_name=label)
        notes.extend(res.warnings)
        inputs = {f"physio:{label}": p.file}
        side = is_bids_physio(p.file)
        if side is not None:
            inputs[f"physio_sidecar:{label}"] = side
        write_relate(outs, [res], inputs=inputs, paths_base=task.study_root, prefix=f"{d_rel}/{physio_base(s, p)}_",
                     command=["stimkit", "study", task.study_file or "STUDY.toml"])
    return notes
