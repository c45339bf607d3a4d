"""What a study remembers between runs, in the hidden folder ``.stimkit-study/`` of its output.

- ``sessions/<base>.json`` -- one record per finished session: its key (:mod:`.plan`) and the
  SHA-256 of every file it wrote. Written by the session job as its very last step, after the
  session's files are in place, so a record means "this session is complete".
- ``performances/<key>.pickle`` -- the recording analysis of each performance, reused by every
  session that heard it and by later runs (pruned when no session of the study needs it).
- ``hashes.json`` -- the file-hash memory of :class:`~stimkit.study.plan.HashCache`, by path
  relative to the study file's folder.
- ``finish.json`` -- the record of the study's last step (:mod:`.finish`): its key and the SHA-256 of
  every dataset-level, group and report file it wrote.
- ``staging/`` -- a session job's scratch folder, removed when the job ends.

A session is **current** when its record exists, holds the same key, and every file it lists is
still there with the same content; anything else recomputes it. The folder starts with a dot, so
BIDS tools ignore it.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from ..export.provenance import sha256_file
from ..export.tables import atomic_write_bytes, to_json_text

__all__ = ["STATE_DIR", "session_record_file", "finish_record_file", "is_current_record", "performance_cache_file", "staging_dir", "write_session_record",
           "read_session_record", "is_current", "load_hashes", "save_hashes", "remove_stale_files"]

STATE_DIR = ".stimkit-study"


def session_record_file(out_root: Path, base: str) -> Path:
    return Path(out_root) / STATE_DIR / "sessions" / f"{base}.json"


def finish_record_file(out_root: Path) -> Path:
    return Path(out_root) / STATE_DIR / "finish.json"


def performance_cache_file(out_root: Path, key: str) -> Path:
    return Path(out_root) / STATE_DIR / "performances" / f"{key}.pickle"


def staging_dir(out_root: Path, base: str) -> Path:
    return Path(out_root) / STATE_DIR / "staging" / base


def write_session_record(path: Path, *, key: str, out_root: Path, files) -> None:
    """Record a finished session: its key and the hash of every file it wrote (relative paths)."""
    out_root = Path(os.path.abspath(out_root))
    rows = {Path(os.path.abspath(f)).relative_to(out_root).as_posix(): sha256_file(f) for f in files}
    atomic_write_bytes(path, to_json_text({"key": key, "files": dict(sorted(rows.items()))}).encode("utf-8"))


def read_session_record(path: Path) -> dict | None:
    try:
        rec = json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return rec if isinstance(rec, dict) and isinstance(rec.get("files"), dict) else None


def is_current(out_root: Path, base: str, key: str) -> bool:
    """True when the session's record matches ``key`` and all its files are intact."""
    return is_current_record(out_root, session_record_file(out_root, base), key)


def is_current_record(out_root: Path, record: Path, key: str) -> bool:
    """True when the record at ``record`` holds ``key`` and every file it lists is intact."""
    rec = read_session_record(record)
    if rec is None or rec.get("key") != key:
        return False
    for rel, digest in rec["files"].items():
        f = Path(out_root) / rel
        try:
            if sha256_file(f) != digest:
                return False
        except Exception:
            return False
    return True


def remove_stale_files(out_root: Path, old: dict | None, new: dict | None) -> list[str]:
    """Delete files an earlier run of a session wrote that its new run did not; returns them."""
    if not old:
        return []
    keep = set((new or {}).get("files", {}))
    gone = []
    for rel in sorted(set(old.get("files", {})) - keep):
        f = Path(out_root) / rel
        if f.is_file():
            f.unlink()
            gone.append(rel)
    return gone


def load_hashes(out_root: Path, study_root: Path) -> dict:
    """The remembered file hashes, keyed by absolute path again."""
    try:
        raw = json.loads((Path(out_root) / STATE_DIR / "hashes.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    out = {}
    for rel, v in raw.items() if isinstance(raw, dict) else ():
        if isinstance(v, list) and len(v) == 3:
            out[os.path.abspath(Path(study_root) / rel)] = v
    return out


def save_hashes(out_root: Path, study_root: Path, known: dict) -> None:
    rows = {}
    for p, v in known.items():
        rows[Path(os.path.relpath(p, study_root)).as_posix()] = v
    atomic_write_bytes(Path(out_root) / STATE_DIR / "hashes.json",
                       to_json_text(dict(sorted(rows.items()))).encode("utf-8"))
