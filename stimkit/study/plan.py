"""The jobs of a study and their content keys: what must be computed, what can be reused.

A study becomes two kinds of job:

- a **performance job** per distinct performance: the recording analysis of
  :func:`stimkit.timeline.run.analyse_recording` (pieces found, scores aligned, features, change
  points), done once however many participants heard it;
- a **session job** per participant × session: that participant's clock, the hand-off files on
  their recorder clock and the analysis of their physiological files.

Each job has a **key**: the SHA-256 of a canonical JSON of everything its result depends on --
the SHA-256 of every input file's content (recording, scores, sync and physiological files), the
settings, the seed and the stimkit version. Two ``[[performance]]`` entries (or session files)
with the same recording, pieces and settings get the same key, so they are analysed once. A
session whose key and outputs are unchanged since its last run is skipped (:mod:`.state`).

Conventions
-----------
- Keys never contain paths (moving a study folder keeps them), only content hashes and settings.
- A session's seed is a child of the study seed that depends only on its own labels
  (``numpy.random.SeedSequence(entropy=seed, spawn_key=(hash of sub/ses/task/run,))``), so adding a
  participant changes no other participant's numbers.
- File hashes are remembered by path, size and modification time (like git's index): a file that
  was only touched is hashed again, its content compared, and nothing is recomputed.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from pathlib import Path

from ..export.provenance import sha256_file

__all__ = ["PerformanceJob", "SessionJob", "StudyPlan", "plan_study", "HashCache", "session_seed",
           "bids_base", "physio_base"]


class HashCache:
    """SHA-256 of files, remembered by ``(size, mtime_ns)`` so unchanged files are not read again."""

    def __init__(self, known: dict | None = None):
        self.known: dict[str, list] = dict(known or {})
        self.used: set[str] = set()

    def __call__(self, path: Path) -> str:
        p = os.path.abspath(path)
        self.used.add(p)
        st = os.stat(p)
        hit = self.known.get(p)
        if hit and hit[0] == st.st_size and hit[1] == st.st_mtime_ns:
            return hit[2]
        digest = sha256_file(p)
        self.known[p] = [st.st_size, st.st_mtime_ns, digest]
        return digest


def _key(obj) -> str:
    return hashlib.sha256(json.dumps(obj, sort_keys=True, separators=(",", ":")).encode("utf-8")).hexdigest()


def session_seed(study_seed: int, name: str) -> int:
    """A 63-bit child seed of ``study_seed`` that depends only on ``name`` (see module notes)."""
    import numpy as np

    tag = int.from_bytes(hashlib.sha256(name.encode("utf-8")).digest()[:8], "big")
    ss = np.random.SeedSequence(entropy=int(study_seed), spawn_key=(tag,))
    return int(ss.generate_state(1, dtype=np.uint64)[0]) & ((1 << 63) - 1)


def bids_base(s) -> str:
    """``sub-<p>_ses-<s>_task-<t>[_run-<r>]`` of a :class:`~stimkit.study.studyfile.StudySession`."""
    base = f"sub-{s.participant}_ses-{s.session}_task-{s.task}"
    return base + (f"_run-{s.run}" if s.run is not None else "")


def physio_base(s, p) -> str:
    """The BIDS name (without suffix) of one physiological file: ``<base>[_recording-<label>]``."""
    return bids_base(s) + (f"_recording-{p.label}" if p.label else "")


@dataclass
class PerformanceJob:
    """One recording analysis: ``key`` and the ids of the ``[[performance]]`` entries it serves."""

    key: str
    ids: list[str]
    session: object                 # stimkit.session.Session (recording, pieces, rate, flags)
    inputs: dict                    # role -> sha256


@dataclass
class SessionJob:
    """One participant × session: ``key`` over its inputs, settings and its performance's key."""

    key: str
    name: str                       # sub-<p>_ses-<s>[_task-.._run-..] as shown to people
    base: str                       # BIDS base name
    spec: object                    # stimkit.study.studyfile.StudySession
    performance_key: str
    seed: int
    inputs: dict                    # role -> sha256


@dataclass
class StudyPlan:
    performances: dict[str, PerformanceJob]
    sessions: list[SessionJob]
    hashes: HashCache = field(default_factory=HashCache)


def _performance_settings(sess) -> dict:
    return {"pieces": [{"name": p.name, "start_s": p.start_s, "anchors": list(p.anchors),
                        "repeats": sess.repeats_of(p)} for p in sess.pieces],
            "feature_rate_hz": float(sess.rate_hz), "expand_repeats": bool(sess.expand_repeats),
            "force": bool(sess.force)}


def _sync_settings(sy) -> dict:
    return {"mode": sy.mode, "frequency_hz": sy.frequency_hz, "duration_s": sy.duration_s, "kind": sy.kind,
            "recorder_s": sy.recorder_s, "recorder_column": sy.recorder_column, "offset_s": sy.offset_s,
            "search_start_s": sy.search_start_s, "search_end_s": sy.search_end_s}


def plan_study(study, *, hashes: HashCache | None = None) -> StudyPlan:
    """The performance and session jobs of ``study`` with their keys (see module notes)."""
    from .. import __version__

    hashes = hashes or HashCache()
    perf_by_id: dict[str, str] = {}
    performances: dict[str, PerformanceJob] = {}
    for pid, perf in study.performances.items():
        sess = perf.session
        inputs = {"recording": hashes(sess.recording)}
        for p in sess.pieces:
            inputs[f"score:{p.name}"] = hashes(p.score)
        key = _key({"stimkit": __version__, "job": "performance", "inputs": inputs,
                    "settings": _performance_settings(sess)})
        perf_by_id[pid] = key
        if key in performances:
            performances[key].ids.append(pid)
        else:
            performances[key] = PerformanceJob(key=key, ids=[pid], session=sess, inputs=inputs)
    jobs = []
    for s in study.sessions:
        base = bids_base(s)
        inputs = {}
        if s.sync.recorder_file is not None:
            inputs["recorder_sync"] = hashes(s.sync.recorder_file)
        for p in s.physio:
            inputs[f"physio:{p.label or ''}"] = hashes(p.file)
            side = _sidecar(p.file)
            if side is not None and side.is_file():
                inputs[f"physio-sidecar:{p.label or ''}"] = hashes(side)
        seed = session_seed(study.seed, base)
        settings = {"sync": _sync_settings(s.sync), "analysis": study.analysis, "seed": seed,
                    "physio": [{"label": p.label, "kind": p.kind, "column": p.column, "mode": p.mode}
                               for p in s.physio]}
        key = _key({"stimkit": __version__, "job": "session", "base": base,
                    "performance": perf_by_id[s.performance], "inputs": inputs, "settings": settings})
        jobs.append(SessionJob(key=key, name=base, base=base, spec=s, performance_key=perf_by_id[s.performance],
                               seed=seed, inputs=inputs))
    return StudyPlan(performances=performances, sessions=jobs, hashes=hashes)


def _sidecar(path: Path) -> Path | None:
    """The JSON sidecar of a BIDS continuous file (``x_physio.tsv.gz`` -> ``x_physio.json``)."""
    name = Path(path).name
    for suf in (".tsv.gz", ".tsv"):
        if name.endswith(suf):
            return Path(path).with_name(name[: -len(suf)] + ".json")
    return None
