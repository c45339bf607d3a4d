"""Atomic, deterministic writing of TSV, JSON and gzip files.

Conventions
-----------
- Every output of a run is written through an :class:`OutputSet`, a transaction over the
  run's files: they are first written into one hidden staging folder inside the output folder
  (``.stimkit-stage.<host>.<pid>.<random>``) and moved into place only when the whole run
  succeeded (``commit``). The commit is all-or-nothing: every file it replaces is kept aside
  until all files are in place, and any error during the commit puts every old file back and
  removes every new one (roll-back). An exception -- including ``KeyboardInterrupt`` and the
  CLI's SIGTERM / SIGHUP -- removes the staging folder, so a failed or interrupted run leaves
  neither a half-written file nor a temporary. Interrupt signals are held back during the
  (sub-second) commit so it cannot be cut in the middle; they take effect right after it.
- A run never writes over one of its inputs: a target that is, or links to, a file given as an
  input (``OutputSet(inputs=...)`` or :func:`protect_inputs`) is refused with
  :class:`~stimkit.errors.InputError` before anything is written.
- Temporaries of our own naming left by a run that was killed (``SIGKILL``, power loss) are
  removed at the start of the next run in that folder (:func:`sweep_stale`): staging folders of
  processes of this host that no longer exist, and the ``.<name>.XXXXXXXX.part`` files and
  ``.stimkit-probe.*`` files of earlier versions.
- Operating-system errors (disk full, a name too long, no permission) become one-line stimkit
  errors (:func:`stimkit.errors.from_os_error`).
- Same data -> same bytes: fixed float format, ``n/a`` for missing values, ``\\n`` line ends,
  UTF-8, JSON with a fixed key order and indent, gzip with mtime 0 and no embedded file name.
"""

from __future__ import annotations

import contextlib
import contextvars
import errno
import gzip
import io
import json
import math
import os
import re
import shutil
import signal
import socket
import tempfile
import threading
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, StimkitError, WorkFailed, from_os_error

__all__ = [
    "OutputSet",
    "format_tsv",
    "to_json_text",
    "gzip_bytes",
    "check_output_dir",
    "check_targets",
    "atomic_write_bytes",
    "is_missing",
    "protect_inputs",
    "sweep_stale",
    "COMMIT_LOG",
]

NA = "n/a"


def is_missing(v) -> bool:
    """True for ``None`` and for what :func:`pandas.isna` calls missing (NaN, NaT, ``pd.NA``)."""
    if v is None:
        return True
    try:
        return bool(pd.isna(v))
    except (TypeError, ValueError):
        return False


def _fmt_value(v, float_format: str) -> str:
    if v is None:
        return NA
    if isinstance(v, (float, np.floating)):
        if not math.isfinite(float(v)):
            return NA
        s = float_format % float(v)
        return "0" + s[2:] if s.startswith("-0") and float(s) == 0 else s  # no "-0.000"
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if is_missing(v):
        return NA
    s = str(v)
    return s.replace("\t", " ").replace("\n", " ").replace("\r", " ") or NA


def format_tsv(
    df: pd.DataFrame,
    *,
    float_format: str = "%.6f",
    column_formats: dict[str, str] | None = None,
    header: bool = True,
) -> str:
    """Tab-separated text of ``df`` (index not written); missing values are ``n/a``."""
    column_formats = column_formats or {}
    lines = []
    if header:
        lines.append("\t".join(str(c) for c in df.columns))
    cols = list(df.columns)
    fmts = [column_formats.get(c, float_format) for c in cols]
    for row in df.itertuples(index=False, name=None):
        lines.append("\t".join(_fmt_value(v, f) for v, f in zip(row, fmts)))
    return "\n".join(lines) + "\n"


def _clean_json(obj, decimals: int):
    if isinstance(obj, dict):
        return {str(k): _clean_json(v, decimals) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean_json(v, decimals) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_clean_json(v, decimals) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        if not math.isfinite(f):
            return None
        r = round(f, decimals)
        return 0.0 if r == 0 else r
    if isinstance(obj, Path):
        return str(obj)
    return obj


def to_json_text(obj, *, decimals: int = 6) -> str:
    """Deterministic JSON (insertion key order, indent 2, floats rounded, NaN -> null)."""
    return json.dumps(_clean_json(obj, decimals), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def gzip_bytes(data: bytes) -> bytes:
    """gzip with mtime 0 and no file name, so equal data gives equal bytes."""
    buf = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=buf, mtime=0, compresslevel=6) as gz:
        gz.write(data)
    return buf.getvalue()


def _nearest_existing(path: Path) -> Path:
    p = path
    while not p.exists() and p.parent != p:
        p = p.parent
    return p


def _probe_writable(folder: Path, *, shown: Path) -> None:
    # probe with a real file: os.access says yes to root even where the folder refuses files
    try:
        fd, probe = tempfile.mkstemp(prefix=".stimkit-probe.", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        if exc.errno in (errno.ENOSPC, getattr(errno, "EDQUOT", -1)):
            raise from_os_error(exc, path=shown, doing="checking the output folder") from None
        raise InputError(f"output folder is not writable ({exc.strerror or exc}); choose another "
                         f"one with -o", path=shown) from None


def check_output_dir(out_dir: str | Path, *, create: bool = True) -> Path:
    """Check that ``out_dir`` can receive the outputs; raise :class:`InputError` if not.

    With ``create`` (default) the folder is made when missing. With ``create=False`` nothing is
    made: a missing folder is checked through its nearest existing parent (which must be a
    writable folder), so a run can check its output folder before the work and create it only
    when it writes. An existing folder is swept of stale temporaries (:func:`sweep_stale`).
    """
    out = Path(out_dir)
    try:
        if out.exists() and not out.is_dir():
            raise InputError("output path exists and is not a folder; choose another with -o", path=out)
        if create:
            try:
                out.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                if exc.errno == errno.ENAMETOOLONG:
                    raise from_os_error(exc, path=out, doing="creating the output folder") from None
                raise InputError(f"cannot create output folder ({exc.strerror})", path=out) from None
        if out.is_dir():
            _probe_writable(out, shown=out)
            sweep_stale(out)
            return out
        anc = _nearest_existing(out.absolute())
        if not anc.is_dir():
            raise InputError(f"cannot create output folder: '{anc}' is a file, not a folder", path=out)
        _probe_writable(anc, shown=out)
    except OSError as exc:  # e.g. a component longer than the file system allows
        raise from_os_error(exc, path=out, doing="checking the output folder") from None
    return out


def check_targets(out_dir: str | Path, names) -> None:
    """Refuse, before the work, output names the run could not write: a name longer than the file
    system allows, a folder where a file goes, a file where a folder goes (:class:`InputError`).
    The same checks run again when the outputs are written (:class:`OutputSet`)."""
    out = Path(out_dir)
    limit = _name_max(_nearest_existing(out.absolute()))
    for name in names:
        target = out / name
        for part in Path(name).parts:
            if len(part.encode("utf-8")) > limit:
                raise InputError(f"output file name too long ({len(part.encode('utf-8'))} bytes, the "
                                 f"file system allows {limit}); use shorter [bids] labels or names, or "
                                 f"a shorter recording file name", path=target)
        if target.is_dir() and not target.is_symlink():
            raise InputError("a folder is in the way of this output; move or rename it and rerun",
                             path=target)
        parent = target.parent
        while parent != out and parent != parent.parent:
            if os.path.lexists(parent) and not parent.is_dir():
                raise InputError("a file is in the way of an output folder; move or rename it and rerun",
                                 path=parent)
            parent = parent.parent


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Write one file atomically (temporary file in the same folder, then rename)."""
    with OutputSet(Path(path).parent) as outs:
        outs.write_bytes(Path(path).name, data)


# ---------------------------------------------------------------------------------------------
# inputs protected from being overwritten
# ---------------------------------------------------------------------------------------------
_PROTECTED: contextvars.ContextVar[tuple[Path, ...]] = contextvars.ContextVar("stimkit_inputs", default=())


@contextlib.contextmanager
def protect_inputs(paths):
    """Within the block, every :class:`OutputSet` refuses targets that are or link to ``paths``."""
    token = _PROTECTED.set(_PROTECTED.get() + tuple(Path(p) for p in paths if p is not None))
    try:
        yield
    finally:
        _PROTECTED.reset(token)


def _same_file(a: Path, b: Path) -> bool:
    """True when ``a`` and ``b`` name the same file (same path after resolving links, or the same
    inode through a hard link)."""
    try:
        if os.path.lexists(a) and os.path.exists(b) and os.path.samefile(a, b):
            return True
    except OSError:
        pass
    try:
        return a.resolve() == b.resolve()
    except (OSError, RuntimeError):
        return os.path.abspath(a) == os.path.abspath(b)


def input_clash(target: Path, inputs) -> Path | None:
    """The input among ``inputs`` that ``target`` is, or links to; ``None`` when there is none."""
    for src in inputs:
        if _same_file(Path(target), Path(src)):
            return Path(src)
    return None


# ---------------------------------------------------------------------------------------------
# stale temporaries
# ---------------------------------------------------------------------------------------------
STAGE_PREFIX = ".stimkit-stage."
#: ``.<name>.XXXXXXXX.part``: the per-file temporaries of earlier stimkit versions (mkstemp's
#: eight random characters).
_OLD_PART = re.compile(r"^\..+\.[a-z0-9_]{8}\.part$")
_OLD_PROBE = re.compile(r"^\.stimkit-probe\.[a-z0-9_]{8}$")
_STAGE = re.compile(r"^\.stimkit-stage\.(?P<host>[^.]*)\.(?P<pid>\d+)\.[A-Za-z0-9_]+$")


def _host() -> str:
    return re.sub(r"[^A-Za-z0-9-]", "-", socket.gethostname())[:40] or "host"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True  # exists, owned by someone else
    return True


def sweep_stale(folder: str | Path) -> list[Path]:
    """Remove temporaries of our own naming that no running process owns; returns what was removed.

    Staging folders are removed when they were made on this host by a process that no longer
    runs (so a concurrent run's staging folder is left alone). The ``.part`` and probe files of
    earlier versions are removed. Nothing else is touched; errors are ignored (a sweep is a
    courtesy, never a reason to fail).
    """
    folder = Path(folder)
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    host = _host()
    for e in entries:
        name = e.name
        try:
            m = _STAGE.match(name)
            if m and e.is_dir(follow_symlinks=False):
                if m.group("host") == host and not _alive(int(m.group("pid"))):
                    shutil.rmtree(e.path, ignore_errors=True)
                    removed.append(Path(e.path))
            elif (_OLD_PART.match(name) or _OLD_PROBE.match(name)) and e.is_file(follow_symlinks=False):
                os.unlink(e.path)
                removed.append(Path(e.path))
        except OSError:
            continue
    return removed


# ---------------------------------------------------------------------------------------------
# the transaction
# ---------------------------------------------------------------------------------------------
#: Every file committed by an :class:`OutputSet` in this process, in order (the CLI reads it to
#: say truthfully whether an interrupted run had already written its outputs).
COMMIT_LOG: list[Path] = []

_HOLD_SIGNALS = tuple(s for s in (getattr(signal, n, None) for n in ("SIGINT", "SIGTERM", "SIGHUP")) if s)


@contextlib.contextmanager
def _signals_held():
    """Hold back SIGINT / SIGTERM / SIGHUP during the block and deliver them to their own
    handlers when it ends. Python runs signal handlers in the main thread whichever thread
    received the signal, so the handlers are swapped for one that only notes the signal (a
    thread mask would not do: other threads, e.g. a BLAS pool, would still take the signal)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    pending: list[int] = []
    saved = {}
    for sig in _HOLD_SIGNALS:
        try:
            saved[sig] = signal.signal(sig, lambda signum, frame: pending.append(signum))
        except (OSError, ValueError):
            pass
    try:
        yield
    finally:
        for sig, old in saved.items():
            signal.signal(sig, old if old is not None else signal.SIG_DFL)
        for sig in dict.fromkeys(pending):
            signal.raise_signal(sig)


def _name_max(folder: Path) -> int:
    try:
        return int(os.pathconf(folder, "PC_NAME_MAX"))
    except (OSError, ValueError, AttributeError):
        return 255


class OutputSet:
    """A transaction over the files of one run (see the module notes).

    Use as a context manager; files written through it appear only when the block ends without
    an exception, all of them or none::

        with OutputSet(out_dir, inputs=[score_path]) as outs:
            outs.write_tsv("piece.boundaries.tsv", table)
            outs.write_json("piece.boundaries.json", meta)

    ``name`` may hold sub-folders (``sub-01/ses-1/beh/x.tsv``); folders the set had to create
    are removed again when it aborts. ``inputs`` (plus those of :func:`protect_inputs`) are
    files the set must never replace.
    """

    def __init__(self, out_dir: str | Path, *, inputs=()):
        self.out_dir = Path(out_dir)
        self.inputs: tuple[Path, ...] = tuple(Path(p) for p in inputs if p is not None) + _PROTECTED.get()
        self._stage: Path | None = None
        self._staged: list[tuple[Path, Path]] = []  # (staged file, target)
        self._created: list[Path] = []              # folders made by this set, outermost first
        self.committed: list[Path] = []

    # -- staging -------------------------------------------------------------------------
    def _mkdirs(self, folder: Path) -> None:
        missing = []
        p = folder
        while not p.exists() and p.parent != p:
            missing.append(p)
            p = p.parent
        for d in reversed(missing):
            if d.is_symlink() or (d.exists() and not d.is_dir()):
                raise InputError("a file is in the way of an output folder; move it or choose "
                                 "another output folder", path=d)
            d.mkdir()
            self._created.append(d)

    def _stage_dir(self) -> Path:
        if self._stage is None:
            try:
                self._mkdirs(self.out_dir)
                sweep_stale(self.out_dir)
                self._stage = Path(tempfile.mkdtemp(prefix=f"{STAGE_PREFIX}{_host()}.{os.getpid()}.",
                                                    dir=self.out_dir))
            except StimkitError:
                raise
            except OSError as exc:
                raise from_os_error(exc, path=self.out_dir, doing="preparing the output folder") from None
        return self._stage

    def write_bytes(self, name: str, data: bytes) -> Path:
        rel = Path(name)
        if rel.is_absolute() or ".." in rel.parts or not rel.parts:
            raise ValueError(f"output name {name!r} must be a relative path inside the output folder")
        target = self.out_dir / rel
        if any(t == target for _, t in self._staged):
            raise ValueError(f"{target} staged twice in one run")
        clash = input_clash(target, self.inputs)
        if clash is not None:
            how = "is" if os.path.abspath(target) == os.path.abspath(clash) else "links to"
            raise InputError(f"this output {how} the input '{clash}', which would be overwritten; "
                             f"choose another output folder (-o) or move the input", path=target)
        limit = _name_max(_nearest_existing(self.out_dir.absolute()))
        for part in rel.parts:
            if len(part.encode("utf-8")) > limit:
                raise InputError(f"output file name too long ({len(part.encode('utf-8'))} bytes, the "
                                 f"file system allows {limit}); use shorter [bids] labels or names",
                                 path=target)
        stage = self._stage_dir()
        tmp = stage / f"{len(self._staged):04d}.new"
        try:
            with open(tmp, "wb") as fh:
                fh.write(data)
            os.chmod(tmp, 0o644)
        except OSError as exc:
            tmp.unlink(missing_ok=True)
            raise from_os_error(exc, path=self.out_dir, doing="writing the outputs (nothing was written)") from None
        self._staged.append((tmp, target))
        return target

    def write_text(self, name: str, text: str) -> Path:
        return self.write_bytes(name, text.encode("utf-8"))

    def write_tsv(self, name: str, df: pd.DataFrame, **fmt) -> Path:
        return self.write_text(name, format_tsv(df, **fmt))

    def write_tsv_gz(self, name: str, df: pd.DataFrame, **fmt) -> Path:
        fmt.setdefault("header", False)
        return self.write_bytes(name, gzip_bytes(format_tsv(df, **fmt).encode("utf-8")))

    def write_json(self, name: str, obj, *, decimals: int = 6) -> Path:
        return self.write_text(name, to_json_text(obj, decimals=decimals))

    # -- transaction ---------------------------------------------------------------------
    def commit(self) -> list[Path]:
        """Move every staged file into place, all or none (see the module notes)."""
        if not self._staged:
            self._cleanup(remove_created=False)
            return list(self.committed)
        from ..errors import raise_if_stopped

        raise_if_stopped()      # a stop signal whose exception was lost on its way up
        with _signals_held():  # a signal held back here arrives once the set is whole and logged
            self._commit_all()
            done = [t for _, t in self._staged]
            self.committed.extend(done)
            COMMIT_LOG.extend(done)
            self._staged.clear()
            self._cleanup(remove_created=False)
        return list(self.committed)

    def _commit_all(self) -> None:
        stage = self._stage
        # 1. nothing may stand in the way: refuse before any file is touched
        for _, target in self._staged:
            if target.is_dir() and not target.is_symlink():
                self.abort()
                raise InputError("a folder is in the way of this output; move or rename it and "
                                 "rerun (nothing was written)", path=target)
            parent = target.parent
            while parent != self.out_dir and parent != parent.parent:
                if os.path.lexists(parent) and not parent.is_dir():
                    self.abort()
                    raise InputError("a file is in the way of an output folder; move or rename it "
                                     "and rerun (nothing was written)", path=parent)
                parent = parent.parent
            clash = input_clash(target, self.inputs)  # a link may have appeared since staging
            if clash is not None:
                self.abort()
                raise InputError(f"this output links to the input '{clash}'; choose another output "
                                 f"folder (nothing was written)", path=target)
        placed: list[tuple[Path, Path]] = []   # (staged file, target) now in place
        kept: list[tuple[Path, Path]] = []     # (backup, target) of replaced files
        try:
            for i, (tmp, target) in enumerate(self._staged):
                self._mkdirs(target.parent)
                if os.path.lexists(target):
                    backup = stage / f"{i:04d}.old"
                    try:
                        os.link(target, backup, follow_symlinks=False)  # the old file stays in place
                    except OSError:
                        os.replace(target, backup)
                    kept.append((backup, target))
                os.replace(tmp, target)
                placed.append((tmp, target))
        except BaseException as exc:
            problems = self._roll_back(placed, kept)
            self._cleanup(remove_created=True)
            self._staged.clear()
            if problems:
                raise WorkFailed(f"the commit failed ({_why(exc)}) and {len(problems)} earlier "
                                 f"file(s) could not be put back: {', '.join(problems[:3])}; the "
                                 f"output folder now mixes old and new files", path=self.out_dir) from None
            if isinstance(exc, OSError):
                raise from_os_error(exc, path=self.out_dir,
                                    doing="moving the outputs into place (nothing was written; the "
                                          "previous files are unchanged)") from None
            raise

    def _roll_back(self, placed, kept) -> list[str]:
        problems = []
        kept_for = {t: b for b, t in kept}
        for tmp, target in reversed(placed):
            try:
                if target in kept_for:
                    os.replace(kept_for.pop(target), target)
                else:
                    os.unlink(target)
            except OSError:
                problems.append(str(target))
        for target, backup in list(kept_for.items()):
            try:  # moved aside (no hard link) but its replacement never arrived
                if not os.path.lexists(target):
                    os.replace(backup, target)
            except OSError:
                problems.append(str(target))
        return problems

    def _cleanup(self, *, remove_created: bool) -> None:
        if self._stage is not None:
            shutil.rmtree(self._stage, ignore_errors=True)
            self._stage = None
        if remove_created:
            for d in reversed(self._created):
                try:
                    d.rmdir()  # only when empty
                except OSError:
                    pass
            self._created.clear()

    def abort(self) -> None:
        """Drop every staged file and the folders this set created (when left empty)."""
        self._staged.clear()
        self._cleanup(remove_created=True)

    def __enter__(self) -> "OutputSet":
        return self

    def __exit__(self, exc_type, exc, tb) -> bool:
        if exc_type is None:
            self.commit()
        else:
            self.abort()
        return False


def _why(exc: BaseException) -> str:
    if isinstance(exc, OSError):
        return exc.strerror or type(exc).__name__
    return type(exc).__name__
