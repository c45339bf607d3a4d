"""The study file (TOML): participants, sessions, performances and physiological files of a study.

A study file lists who took part (``[[participant]]``), what they heard (``[[performance]]``: one
recording and the pieces in it, or an ``annotate`` session file) and, for each participant and
session (``[[session]]``), which performance they heard, how their recorder's clock relates to
the recording (``[session.sync]``) and which physiological files were recorded
(``[[session.physio]]``). A session may instead name a whole ``annotate`` session file
(``session_file``). :func:`load_study` reads and validates it, reporting every problem at once
with its line number (exit 2, nothing run); :func:`template_text` is a commented starter file.

Conventions
-----------
- Paths in the study file are relative to its folder; outputs name inputs relative to it too.
- Participant and session labels are BIDS labels (letters and digits); ``sub-<participant>``,
  ``ses-<session>``, ``task-<task>``, ``run-<run>`` name the outputs.
- Times are ``recording`` seconds (piece starts, anchors) or ``onset`` seconds on the
  participant's recorder clock (sync), as in DESIGN.md.
- ``tomllib`` keeps no line numbers, so :func:`toml_lines` indexes the text itself; it follows
  nested array tables (``[[session.physio]]`` belongs to the ``[[session]]`` above it).

The format is documented for users in ``docs/study.md``.
"""

from __future__ import annotations

import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import InputError
from ..session import (_ANCHOR, AUDIO_SUFFIXES, REPEAT_VALUES, SCORE_SUFFIXES, PieceSpec, Session,
                       SessionFileError, SyncSpec, _stem, load_session, parse_sync_table)

__all__ = ["Study", "PerformanceSpec", "StudySession", "PhysioSpec", "StudyFileError", "load_study",
           "parse_study_text", "template_text", "toml_lines", "ANALYSIS_DEFAULTS", "GROUP_DEFAULTS"]

_LABEL = re.compile(r"^[A-Za-z0-9]+$")
_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_\-]*$")
_COLUMN = re.compile(r"^[a-z][a-z0-9_]*$")
_TOP_KEYS = {"name", "output", "task", "seed", "workers", "scheduler", "feature_rate_hz", "analysis", "group",
             "performance", "participant", "session", "authors", "license"}
_PERF_KEYS = {"id", "recording", "session_file", "feature_rate_hz", "expand_repeats", "repeats", "force", "piece"}
_PIECE_KEYS = {"score", "name", "start_s", "anchors", "repeats"}
_SESSION_KEYS = {"participant", "session", "performance", "session_file", "task", "run", "sync", "physio"}

#: Settings of the per-participant analysis (``[analysis]``), with their defaults (PHYSIO-STATS §4).
ANALYSIS_DEFAULTS = {
    "window_beats": [20, 80],      # N beats before / after each boundary
    "pseudo_boundaries": 1000,     # K, calibration of each boundary test (T4)
    "share_sets": 1000,            # R, pseudo-boundary sets for the share of significant boundaries
    "surrogates": 1000,            # R, IAAFT surrogates for change-point coincidence
    "alpha": 0.05,
}
#: Settings of the group statistics (``[group]``).
GROUP_DEFAULTS = {
    "alpha": 0.05,                 # responder threshold on p_share, and the binomial test's chance rate
}


class StudyFileError(SessionFileError):
    """Several problems in one study file: the message keeps one line per problem."""

    what = "study file"


@dataclass
class PhysioSpec:
    """One physiological file of a session: ``file`` and how to read it (passed to the analysis)."""

    file: Path
    kind: str = "rr"
    column: str | None = None
    label: str | None = None       # BIDS recording-<label>; default: none for one file, else the kind
    mode: str | None = None
    offset_s: float = 0.0          # added to the file's times (when its clock is the recorder's plus a known shift)


@dataclass
class PerformanceSpec:
    """One performance: a recording and the pieces played in it (aligned once for every session
    that heard it). ``session`` holds recording, pieces, feature rate, repeats and force."""

    id: str
    session: Session


@dataclass
class StudySession:
    """One participant in one session: what they heard, their recorder clock, their physiology."""

    participant: str
    session: str
    performance: str               # id of a PerformanceSpec
    task: str
    run: int | None = None
    sync: SyncSpec = field(default_factory=SyncSpec)
    physio: list[PhysioSpec] = field(default_factory=list)
    session_file: Path | None = None

    @property
    def name(self) -> str:
        """``sub-<participant>_ses-<session>`` (plus task and run when they tell sessions apart)."""
        return f"sub-{self.participant}_ses-{self.session}"


@dataclass
class Study:
    """A validated study: every path absolute (the study file's folder is ``root``)."""

    name: str
    root: Path
    source: Path | None
    out_dir: Path
    performances: dict[str, PerformanceSpec]
    participants: list[dict]
    sessions: list[StudySession]
    task: str = "music"
    seed: int = 0
    workers: int | None = None
    scheduler: str | None = None
    analysis: dict = field(default_factory=lambda: dict(ANALYSIS_DEFAULTS))
    group: dict = field(default_factory=lambda: dict(GROUP_DEFAULTS))
    authors: list[str] = field(default_factory=list)
    license: str | None = None

    def show(self, path) -> str:
        """``path`` as written into outputs: relative to the study file's folder, ``/``-separated."""
        return Path(os.path.relpath(Path(path), self.root)).as_posix()


# ---------------------------------------------------------------------------------------------
# key -> line index
# ---------------------------------------------------------------------------------------------
_HDR_ARRAY = re.compile(r"^\s*\[\[\s*([A-Za-z0-9_.\-]+)\s*\]\]")
_HDR_TABLE = re.compile(r"^\s*\[\s*([A-Za-z0-9_.\-]+)\s*\]")
_KEY = re.compile(r"^\s*([A-Za-z0-9_\-]+)\s*=")


def toml_lines(text: str) -> dict[tuple, int]:
    """Line number (1-based) of each table and key, by path.

    A path alternates names and array indices: ``("session", 2, "sync", "offset_s")`` is the
    ``offset_s`` key of the ``[session.sync]`` table of the third ``[[session]]``;
    ``("session", 2, "physio", 0)`` is the first ``[[session.physio]]`` under it. Top-level keys
    are ``(key,)``. Lines inside multi-line strings are not special-cased.
    """
    out: dict[tuple, int] = {}
    counts: dict[tuple, int] = {}
    current: tuple = ()

    def resolve(dotted: str) -> tuple:
        # each dotted part that is an array already seen refers to its latest entry
        path: tuple = ()
        for part in dotted.split("."):
            path = path + (part,)
            if path in counts:
                path = path + (counts[path],)
        return path

    for ln, line in enumerate(text.splitlines(), start=1):
        m = _HDR_ARRAY.match(line)
        if m:
            parts = m.group(1).split(".")
            parent = resolve(".".join(parts[:-1])) if len(parts) > 1 else ()
            arr = parent + (parts[-1],)
            counts[arr] = counts.get(arr, -1) + 1
            current = arr + (counts[arr],)
            out.setdefault(current, ln)
            continue
        m = _HDR_TABLE.match(line)
        if m:
            current = resolve(m.group(1))
            out.setdefault(current, ln)
            continue
        m = _KEY.match(line)
        if m:
            out.setdefault(current + (m.group(1),), ln)
    return out


# ---------------------------------------------------------------------------------------------
# loading and validation
# ---------------------------------------------------------------------------------------------
def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(float(v))


def _label(table: dict, key: str, missing: str, where: str, bad, at) -> str | None:
    """``table[key]`` as a BIDS label (an integer is taken as its digits), or ``None`` after
    reporting it missing (``missing``) or malformed."""
    v = table.get(key)
    if _is_int(v):
        v = str(v)
    if v is None:
        bad(missing, *at)
        return None
    if not isinstance(v, str) or not _LABEL.match(v):
        bad(f"{where}: {key} must be a BIDS label (letters and digits only)", *at, key)
        return None
    return v


def _is_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def load_study(path: str | Path, *, out_dir: str | Path | None = None) -> Study:
    """Read and validate a study file; ``out_dir`` overrides its ``output``.

    Raises :class:`StudyFileError` (an :class:`InputError`, exit 2) listing every problem with its
    line, or :class:`InputError` when the file cannot be read or is not TOML.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("study file not found; check the path (stimkit study --template prints a "
                         "starter file)", path=path) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the study file ({exc}); it must be UTF-8 TOML", path=path) from None
    return parse_study_text(text, base_dir=path.resolve().parent, source=path, out_dir=out_dir)


def parse_study_text(text: str, *, base_dir: Path, source: Path | None = None,
                     out_dir: str | Path | None = None) -> Study:
    """Validate study TOML ``text``; relative paths are taken from ``base_dir``."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", path=source) from None
    base_dir = Path(os.path.abspath(base_dir))
    lines = toml_lines(text)
    problems: list[tuple[int | None, str]] = []

    def line(path: tuple):
        while path:
            if path in lines:
                return lines[path]
            path = path[:-1]
        return None

    def bad(msg: str, *path):
        problems.append((line(tuple(path)), msg))

    def rel(p: str) -> Path:
        q = Path(p).expanduser()
        return Path(os.path.normpath(q if q.is_absolute() else base_dir / q))

    def text_value(v) -> bool:
        return isinstance(v, str) and bool(v.strip())

    for k in sorted(set(data) - _TOP_KEYS):
        bad(f"unknown key '{k}' (known: {', '.join(sorted(_TOP_KEYS))})", k)

    # -- top-level settings ------------------------------------------------------------------
    name = data.get("name", "stimkit study")
    if not text_value(name):
        bad("'name' must be a text in quotes (the dataset's name)", "name")
        name = "stimkit study"
    output = data.get("output", "study-output")
    if not text_value(output):
        bad("'output' must be a folder name in quotes", "output")
        output = "study-output"
    task = data.get("task", "music")
    if not isinstance(task, str) or not _LABEL.match(task):
        bad("'task' must be a BIDS label (letters and digits only), e.g. \"listening\"", "task")
        task = "music"
    seed = data.get("seed", 0)
    if not _is_int(seed) or seed < 0:
        bad("'seed' must be a whole number >= 0 (the study's random seed)", "seed")
        seed = 0
    workers = data.get("workers")
    if workers is not None and (not _is_int(workers) or workers < 1):
        bad("'workers' must be a whole number >= 1 (local processes; leave it out for one per core)",
            "workers")
        workers = None
    scheduler = data.get("scheduler")
    if scheduler is not None and not text_value(scheduler):
        bad("'scheduler' must be a Dask scheduler address in quotes, e.g. \"tcp://10.0.0.5:8786\"",
            "scheduler")
        scheduler = None
    rate = data.get("feature_rate_hz", 10.0)
    if not _is_number(rate) or not 0 < float(rate) <= 100:
        bad("'feature_rate_hz' must be a number of frames per second in (0, 100]", "feature_rate_hz")
        rate = 10.0
    authors = data.get("authors", [])
    if not isinstance(authors, list) or not all(text_value(a) for a in authors):
        bad("'authors' must be a list of names in quotes", "authors")
        authors = []
    lic = data.get("license")
    if lic is not None and not text_value(lic):
        bad("'license' must be a text in quotes (e.g. \"CC0\")", "license")
        lic = None

    analysis = dict(ANALYSIS_DEFAULTS)
    an = data.get("analysis", {})
    if not isinstance(an, dict):
        bad("'analysis' must be a table: [analysis]", "analysis")
        an = {}
    for k in sorted(set(an) - set(ANALYSIS_DEFAULTS)):
        bad(f"unknown key '{k}' in [analysis] (known: {', '.join(sorted(ANALYSIS_DEFAULTS))})", "analysis", k)
    if "window_beats" in an:
        v = an["window_beats"]
        if not isinstance(v, list) or not v or not all(_is_int(n) and n >= 2 for n in v):
            bad("[analysis] window_beats must be a list of whole numbers >= 2 (beats per window)",
                "analysis", "window_beats")
        else:
            analysis["window_beats"] = sorted(set(int(n) for n in v))
    for k in ("pseudo_boundaries", "share_sets", "surrogates"):
        if k in an:
            if not _is_int(an[k]) or not 19 <= an[k] <= 100000:
                bad(f"[analysis] {k} must be a whole number in [19, 100000]", "analysis", k)
            else:
                analysis[k] = int(an[k])
    group = dict(GROUP_DEFAULTS)
    for tbl, target in (("analysis", analysis), ("group", group)):
        t = data.get(tbl, {})
        if not isinstance(t, dict):
            if tbl == "group":
                bad("'group' must be a table: [group]", "group")
            continue
        if tbl == "group":
            for k in sorted(set(t) - set(GROUP_DEFAULTS)):
                bad(f"unknown key '{k}' in [group] (known: {', '.join(sorted(GROUP_DEFAULTS))})", "group", k)
        if "alpha" in t:
            if not _is_number(t["alpha"]) or not 0 < float(t["alpha"]) < 0.5:
                bad(f"[{tbl}] alpha must be a number in (0, 0.5)", tbl, "alpha")
            else:
                target["alpha"] = float(t["alpha"])

    # -- performances ------------------------------------------------------------------------
    performances: dict[str, PerformanceSpec] = {}
    declared: set[str] = set()     # ids written, valid or not (a bad one is reported once, where it is)
    pl = data.get("performance", [])
    if not isinstance(pl, list) or not all(isinstance(p, dict) for p in pl):
        bad("'performance' must be written as [[performance]] tables", "performance")
        pl = []
    for i, p in enumerate(pl):
        where = f"[[performance]] #{i + 1}"
        at = ("performance", i)
        for k in sorted(set(p) - _PERF_KEYS):
            bad(f"{where}: unknown key '{k}' (known: {', '.join(sorted(_PERF_KEYS))})", *at, k)
        pid = p.get("id")
        if pid is None:
            bad(f"{where}: missing id = \"...\" (the name sessions use to say they heard it)", *at)
            pid = f"#{i + 1}"
        elif not isinstance(pid, str) or not _ID.match(pid):
            bad(f"{where}: id must be letters, digits, '-' or '_' in quotes", *at, "id")
            pid = f"#{i + 1}"
        elif pid in declared:
            bad(f"{where}: id '{pid}' is used twice; give each performance its own id", *at, "id")
        declared.add(pid)
        where = f"[[performance]] '{pid}'"
        sess = _performance_session(p, where=where, at=at, rate=float(rate), rel=rel, bad=bad)
        if sess is not None:
            performances.setdefault(pid, PerformanceSpec(id=pid, session=sess))

    # -- participants ------------------------------------------------------------------------
    participants: list[dict] = []
    seen_p: set[str] = set()
    pp = data.get("participant", [])
    if not isinstance(pp, list) or not all(isinstance(p, dict) for p in pp):
        bad("'participant' must be written as [[participant]] tables", "participant")
        pp = []
    for i, p in enumerate(pp):
        at = ("participant", i)
        pid = p.get("id")
        if pid is None:
            bad(f"[[participant]] #{i + 1}: missing id = \"01\" (the BIDS subject label)", *at)
            continue
        if _is_int(pid):
            pid = str(pid)
        if not isinstance(pid, str) or not _LABEL.match(pid):
            bad(f"[[participant]] #{i + 1}: id must be a BIDS label (letters and digits only)", *at, "id")
            continue
        if pid in seen_p:
            bad(f"[[participant]] '{pid}' is listed twice", *at, "id")
            continue
        seen_p.add(pid)
        row = {"participant_id": f"sub-{pid}"}
        for k, v in p.items():
            if k == "id":
                continue
            if not _COLUMN.match(k) or k == "participant_id":
                bad(f"[[participant]] '{pid}': column name '{k}' must be lower-case letters, digits and '_'",
                    *at, k)
            elif isinstance(v, (dict, list)) or (isinstance(v, float) and not math.isfinite(v)):
                bad(f"[[participant]] '{pid}': {k} must be a single text, number or true/false", *at, k)
            else:
                row[k] = v
        participants.append(row)

    # -- sessions ----------------------------------------------------------------------------
    sessions: list[StudySession] = []
    seen_s: dict[tuple, int] = {}
    implicit: dict[Path, str] = {}
    sl = data.get("session")
    if sl is None:
        problems.append((None, "no sessions: add one [[session]] table per participant and session"))
        sl = []
    elif not isinstance(sl, list) or not all(isinstance(s, dict) for s in sl):
        bad("'session' must be written as [[session]] tables", "session")
        sl = []
    for i, s in enumerate(sl):
        at = ("session", i)
        where = f"[[session]] #{i + 1}"
        for k in sorted(set(s) - _SESSION_KEYS):
            bad(f"{where}: unknown key '{k}' (known: {', '.join(sorted(_SESSION_KEYS))})", *at, k)
        part = _label(s, "participant", f"{where}: missing participant = \"01\"", where, bad, at)
        if part is not None and part not in seen_p:
            bad(f"{where}: participant '{part}' is not listed in a [[participant]] table", *at, "participant")
        ses = _label(s, "session", f"{where}: missing session = \"1\" (the BIDS session label)", where, bad, at)
        if part and ses:
            where = f"[[session]] sub-{part} ses-{ses}"
        stask = s.get("task", task)
        if not isinstance(stask, str) or not _LABEL.match(stask):
            bad(f"{where}: task must be a BIDS label (letters and digits only)", *at, "task")
            stask = task
        run = s.get("run")
        if run is not None and (not _is_int(run) or run < 1):
            bad(f"{where}: run must be a whole number >= 1", *at, "run")
            run = None
        key = (part, ses, stask, run)
        if part and ses:
            if key in seen_s:
                bad(f"{where}: the same participant, session, task and run as [[session]] #{seen_s[key] + 1}; "
                    "give a run number to tell them apart", *at)
            seen_s[key] = i

        perf_id = s.get("performance")
        sfile = s.get("session_file")
        sync = SyncSpec()
        session_file = None
        if (perf_id is None) == (sfile is None):
            bad(f"{where}: give exactly one of performance = \"<id>\" (a [[performance]] above) or "
                "session_file = \"file.toml\" (an annotate session file)", *at)
        elif perf_id is not None:
            if not isinstance(perf_id, str) or perf_id not in declared:
                known = ", ".join(sorted(declared)) or "none"
                bad(f"{where}: performance '{perf_id}' is not a [[performance]] id (known: {known})",
                    *at, "performance")
                perf_id = None
        else:
            if not text_value(sfile):
                bad(f"{where}: session_file must be a file name in quotes", *at, "session_file")
            else:
                session_file = rel(sfile)
                try:
                    from_file = load_session(session_file)
                except InputError as exc:
                    bad(f"{where}: session_file '{sfile}': {' '.join(str(exc).split())}", *at, "session_file")
                else:
                    # one implicit performance per session file (identical ones are shared later,
                    # by content); its id is the file's name, kept apart from the declared ids
                    perf_id = implicit.get(session_file)
                    if perf_id is None:
                        stem, k = _stem_id(session_file), 1
                        perf_id = stem
                        while perf_id in declared or perf_id in performances:
                            k += 1
                            perf_id = f"{stem}-{k}"
                        implicit[session_file] = perf_id
                        performances[perf_id] = PerformanceSpec(id=perf_id, session=from_file)
                    sync = from_file.sync
                    if "sync" in s:
                        bad(f"{where}: [session.sync] and session_file both give a clock; keep one", *at, "sync")
        sy = s.get("sync")
        if sy is not None and sfile is None:
            if not isinstance(sy, dict):
                bad(f"{where}: 'sync' must be a table: [session.sync]", *at, "sync")
            else:
                sync = parse_sync_table(sy, rel=rel, where=f"{where} [session.sync]",
                                        bad=lambda msg, key=None, _at=at: bad(msg, *_at, "sync", *(
                                            (key,) if key else ())))
        physio = _physio_tables(s.get("physio", []), where=where, at=at, rel=rel, bad=bad)
        if session_file is not None and perf_id is not None:
            # the session file's own [[physio]] tables of this participant (or of nobody in particular)
            own = [q for q in getattr(performances[perf_id].session, "physio", []) or []
                   if getattr(q, "participant", None) in (None, part)]
            physio += [PhysioSpec(file=q.file, kind=q.kind, column=q.column, mode=q.mode, offset_s=q.offset_s,
                                  label=(re.sub(r"[^A-Za-z0-9]", "", q.kind) if len(own) + len(physio) > 1 else None))
                       for q in own]
        if part and ses and perf_id:
            sessions.append(StudySession(participant=part, session=ses, performance=perf_id, task=stask,
                                         run=run, sync=sync, physio=physio, session_file=session_file))

    if not performances and not problems:
        problems.append((None, "no performances: add a [[performance]] table (recording and pieces) or give "
                               "sessions a session_file"))
    if problems:
        raise StudyFileError(source, problems)
    out = Path(out_dir) if out_dir is not None else rel(output)
    return Study(name=name, root=base_dir, source=source, out_dir=Path(os.path.abspath(out)),
                 performances=performances, participants=participants, sessions=sessions, task=task,
                 seed=int(seed), workers=workers, scheduler=scheduler, analysis=analysis, group=group,
                 authors=list(authors), license=lic)


def _stem_id(path: Path) -> str:
    s = re.sub(r"[^A-Za-z0-9_\-]", "-", path.name.rsplit(".", 1)[0]).strip("-")
    return s or "session"


def _performance_session(p: dict, *, where, at, rate, rel, bad) -> Session | None:
    """The ``Session`` (recording, pieces, feature rate, repeats, force) of one ``[[performance]]``."""
    sfile = p.get("session_file")
    rec = p.get("recording")
    has_pieces = "piece" in p
    if sfile is not None:
        if rec is not None or has_pieces:
            bad(f"{where}: give either session_file or recording with [[performance.piece]] tables, not both", *at)
            return None
        if not isinstance(sfile, str) or not sfile.strip():
            bad(f"{where}: session_file must be a file name in quotes", *at, "session_file")
            return None
        try:
            return load_session(rel(sfile))
        except InputError as exc:
            bad(f"{where}: session_file '{sfile}': {' '.join(str(exc).split())}", *at, "session_file")
            return None
    ok = True
    recording = None
    if rec is None:
        bad(f"{where}: missing recording = \"file.flac\" (or session_file = \"session.toml\")", *at)
        ok = False
    elif not isinstance(rec, str) or not rec.strip():
        bad(f"{where}: recording must be a file name in quotes", *at, "recording")
        ok = False
    else:
        recording = rel(rec)
        if not recording.is_file():
            bad(f"{where}: recording '{rec}' not found (looked for {recording})", *at, "recording")
            ok = False
        elif recording.suffix.lower() not in AUDIO_SUFFIXES:
            bad(f"{where}: recording '{rec}' is not an audio file ({', '.join(AUDIO_SUFFIXES)})", *at, "recording")
            ok = False
    prate = p.get("feature_rate_hz", rate)
    if not _is_number(prate) or not 0 < float(prate) <= 100:
        bad(f"{where}: feature_rate_hz must be a number of frames per second in (0, 100]", *at, "feature_rate_hz")
        prate = rate
    flags = {}
    for k, default in (("expand_repeats", True), ("force", False)):
        v = p.get(k, default)
        if not isinstance(v, bool):
            bad(f"{where}: {k} must be true or false", *at, k)
            v = default
        flags[k] = v
    repeats = p.get("repeats", "auto")
    if repeats not in REPEAT_VALUES:
        bad(f"{where}: repeats must be one of {', '.join(REPEAT_VALUES)} (auto: decide from the recording)",
            *at, "repeats")
        repeats = "auto"
    pl = p.get("piece")
    if pl is None:
        bad(f"{where}: no pieces: add one [[performance.piece]] table with score = \"file.musicxml\" per piece", *at)
        return None
    if not isinstance(pl, list) or not all(isinstance(q, dict) for q in pl):
        bad(f"{where}: pieces must be written as [[performance.piece]] tables", *at, "piece")
        return None
    pieces: list[PieceSpec] = []
    names: set[str] = set()
    for j, q in enumerate(pl):
        pat = at + ("piece", j)
        pw = f"{where} piece #{j + 1}"
        for k in sorted(set(q) - _PIECE_KEYS):
            bad(f"{pw}: unknown key '{k}' (known: {', '.join(sorted(_PIECE_KEYS))})", *pat, k)
        sc = q.get("score")
        score = None
        if sc is None:
            bad(f"{pw}: missing score = \"file.musicxml\"", *pat)
        elif not isinstance(sc, str) or not sc.strip():
            bad(f"{pw}: score must be a file name in quotes", *pat, "score")
        else:
            score = rel(sc)
            if not score.is_file():
                bad(f"{pw}: score '{sc}' not found (looked for {score})", *pat, "score")
                score = None
            elif score.suffix.lower() not in SCORE_SUFFIXES:
                bad(f"{pw}: score '{sc}' is not a score file ({', '.join(SCORE_SUFFIXES)})", *pat, "score")
                score = None
        nm = q.get("name")
        if nm is not None and (not isinstance(nm, str) or not nm.strip()):
            bad(f"{pw}: name must be a text in quotes", *pat, "name")
            nm = None
        if nm is None and score is not None:
            nm = _stem(score)
        if nm is not None and nm in names:
            bad(f"{pw}: name '{nm}' is used twice; give each piece its own name", *pat,
                "name" if "name" in q else "score")
        names.add(nm or "")
        start = q.get("start_s")
        if start is not None and (not _is_number(start) or float(start) < 0):
            bad(f"{pw}: start_s must be a number of seconds >= 0 (rough start in the recording)", *pat, "start_s")
            start = None
        anchors = q.get("anchors", [])
        if not isinstance(anchors, list) or not all(isinstance(a, str) for a in anchors):
            bad(f"{pw}: anchors must be a list of \"MEASURE[.BEAT][@PASS]=SECONDS\" texts", *pat, "anchors")
            anchors = []
        for a in anchors:
            if not _ANCHOR.match(a):
                bad(f"{pw}: anchor '{a}' is not MEASURE[.BEAT][@PASS]=SECONDS (e.g. \"12.3=61.5\")", *pat, "anchors")
        prep = q.get("repeats")
        if prep is not None and prep not in REPEAT_VALUES:
            bad(f"{pw}: repeats must be one of {', '.join(REPEAT_VALUES)} (auto: decide from the recording)",
                *pat, "repeats")
            prep = None
        if score is None:
            ok = False
            continue
        pieces.append(PieceSpec(score=score, name=nm, start_s=None if start is None else float(start),
                                anchors=list(anchors), repeats=prep))
    starts = [q.start_s for q in pieces if q.start_s is not None]
    if any(b <= a for a, b in zip(starts, starts[1:])):
        bad(f"{where}: the pieces' start_s must increase in the order the pieces are listed", *at)
    if not ok:
        return None
    return Session(recording=recording, pieces=pieces, rate_hz=float(prate), out_dir=Path("."),
                   expand_repeats=flags["expand_repeats"], force=flags["force"], source=None, repeats=repeats)


def _physio_tables(pl, *, where, at, rel, bad) -> list[PhysioSpec]:
    """The ``[[session.physio]]`` tables of one session: each is validated as a session file's
    ``[[physio]]`` table (:func:`stimkit.session._physio_tables`), plus ``label``, the BIDS
    ``recording-<label>`` of its outputs. The participant is the session's, never the table's."""
    from ..session import _physio_tables as session_physio

    if not isinstance(pl, list) or not all(isinstance(q, dict) for q in pl):
        bad(f"{where}: physiological files must be written as [[session.physio]] tables", *at, "physio")
        return []
    labels, tables = [], []
    for j, q in enumerate(pl):
        pat = at + ("physio", j)
        q = dict(q)
        lab = q.pop("label", None)
        if "participant" in q:
            bad(f"{where} physio #{j + 1}: leave participant out (the session's participant is the owner)",
                *pat, "participant")
            q.pop("participant")
        if lab is not None and (not isinstance(lab, str) or not re.fullmatch(r"[A-Za-z0-9]+", lab)):
            bad(f"{where} physio #{j + 1}: label must be letters and digits only (BIDS recording-<label>)",
                *pat, "label")
            lab = None
        labels.append(lab)
        tables.append(q)

    def relay(msg, table="", index=0, key=None):
        bad(f"{where} {msg.replace('[[physio]]', 'physio')}", *(at + ("physio", index) + ((key,) if key else ())))

    specs = session_physio({"physio": tables}, relay, rel)[0] if tables else []
    out: list[PhysioSpec] = []
    seen: set[str] = set()
    for j, (spec, lab) in enumerate(zip(specs, labels)):
        label = lab or (re.sub(r"[^A-Za-z0-9]", "", spec.kind or "") if len(specs) > 1 else None) or None
        if len(specs) > 1 and label in seen:
            bad(f"{where} physio #{j + 1}: two physiological files of this session share the label '{label}'; "
                "give each its own label = \"...\"", *(at + ("physio", j)))
        seen.add(label or "")
        out.append(PhysioSpec(file=spec.file, kind=spec.kind, column=spec.column, label=label, mode=spec.mode,
                              offset_s=spec.offset_s))
    return out


def template_text() -> str:
    """A commented starter study file."""
    return _TEMPLATE


_TEMPLATE = '''\
# stimkit study file (TOML). Paths are relative to this file's folder.
# Run it with:  stimkit study this-file.toml
# Every participant x session is one job; jobs run in parallel on this machine's cores, or on a
# Dask cluster (scheduler below). A rerun recomputes only the sessions whose inputs or settings
# changed (content hashes), and an interrupted run resumes where it stopped.

name = "Listening study"        # the BIDS dataset's name
output = "study-output"         # the BIDS dataset folder (`-o DIR` overrides it)
task = "listening"              # BIDS task label of every session (a session may override it)
seed = 1                        # random seed of the statistics (each session gets its own child seed)
# authors = ["A. Researcher"]   # dataset_description.json Authors
# workers = 2                   # local processes (default: one per core)
# scheduler = "tcp://10.0.0.5:8786"   # run on an existing Dask cluster instead (--scheduler overrides);
#                                     # the workers must see this folder and the outputs at the same paths
feature_rate_hz = 10            # rows per second of the continuous feature files

# The per-participant statistics (see docs/study.md); defaults shown.
[analysis]
window_beats = [20, 80]         # beats before / after each boundary
pseudo_boundaries = 1000        # calibration of each boundary test
share_sets = 1000               # chance band of the share of significant boundaries
surrogates = 1000               # surrogate series for change-point coincidence
alpha = 0.05

# The group statistics.
[group]
alpha = 0.05                    # a participant "responds" when their share test gives p < alpha

# What was heard. Each performance is aligned once, however many participants heard it.
[[performance]]
id = "concert1"
recording = "recordings/concert-1.flac"
# repeats = "auto"            # which repeats were played: "auto" (from the recording), "all", "none"
# force = false
[[performance.piece]]
score = "scores/first-piece.musicxml"
# name = "first"              # optional; default: the score's file name
# start_s = 45                # optional rough start in the recording (seconds)
# anchors = ["17.1=123.4"]    # optional: bar 17, beat 1 sounded at 123.4 s of the recording
# repeats = "all"             # optional: this piece's own repeats setting
[[performance.piece]]
score = "scores/second-piece.musicxml"

# Or take the recording and pieces from an annotate session file:
# [[performance]]
# id = "day2"
# session_file = "sessions/day2.toml"

# Who took part. Keys other than id become columns of participants.tsv.
[[participant]]
id = "01"
age = 54
group = "patient"

[[participant]]
id = "02"
age = 61
group = "control"

# One [[session]] per participant and session.
[[session]]
participant = "01"
session = "1"
performance = "concert1"
# run = 1                     # when a participant has several runs of one task in a session
[session.sync]                # this participant's recorder clock: as [sync] in a session file
frequency_hz = 1000
duration_s = 0.05
recorder_times_s = [12.500, 1840.250]
[[session.physio]]            # one per physiological file of this participant in this session
file = "physio/sub-01_ses-1_physio.tsv.gz"   # BIDS physio (+ .json sidecar) or a beat table
# kind = "rr"                 # rr, ari, other (a beat series), ecg, eda, rsp (a signal)
# column = "rr"               # which column holds the series
# mode = "value_at_beat"      # BIDS physio: value_at_beat, marker or waveform
# offset_s = 0                # added to the file's times when its clock is the recorder's shifted
# label = "heart"             # BIDS recording-<label> of this file (needed when a session has several)

[[session]]
participant = "02"
session = "1"
performance = "concert1"
[session.sync]
offset_s = 3.25               # or a plain offset: onset = recording + offset_s
[[session.physio]]
file = "physio/sub-02_ses-1_beats.tsv"

# A session may instead name a whole annotate session file (recording, pieces and clock):
# [[session]]
# participant = "02"
# session = "2"
# session_file = "sessions/sub-02-day2.toml"
'''
