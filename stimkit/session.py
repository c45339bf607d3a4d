"""The session file (TOML): what was recorded, which pieces were played, how the clocks relate.

A session file names one recording (it may hold a whole concert), the pieces in the order they
were played, the sync between the recording and the physiological recorder, the BIDS naming
entities, the feature rate and the output folder. :func:`load_session` reads and validates it,
reporting every problem at once with its line number; :func:`session_from_files` is the
one-recording shortcut of ``stimkit annotate --score S --audio A``; :func:`template_text` is a
commented starter file; :func:`annotate_session` runs the main job (see
:mod:`stimkit.timeline.run`); :func:`summary_lines` turns its result into short lines for people.

Conventions
-----------
- Paths in the session file are relative to the session file's folder.
- Times given in the session file are ``recording`` seconds (``start_s``, anchors) or ``onset``
  seconds on the recorder's clock (``recorder_times_s``, ``offset_s``), see DESIGN.md.
- Python's ``tomllib`` keeps no line numbers, so a small index from each key to the line where
  it is written is built by scanning the text (:func:`key_lines`).

The format is documented for users in ``docs/session-and-outputs.md``.
"""

from __future__ import annotations

import math
import os
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError

__all__ = [
    "Session", "PieceSpec", "SyncSpec", "SessionFileError",
    "load_session", "parse_session_text", "parse_sync_table", "session_from_files", "template_text",
    "annotate_session", "summary_lines", "key_lines", "DEFAULT_FEATURE_RATE_HZ",
]

#: Frames per second of the continuous features when neither the session file nor ``--rate``
#: says otherwise; the same default for ``stimkit features`` and ``stimkit annotate``. Ten rows
#: per second resolve the 0.4 s momentary-loudness window (EBU Tech 3341) and are a common
#: sampling rate for skin-conductance and respiration analyses, while a 2-hour session stays at
#: 72 000 rows.
DEFAULT_FEATURE_RATE_HZ = 10.0

AUDIO_SUFFIXES = (".wav", ".flac", ".ogg", ".aif", ".aiff", ".mp3")
SCORE_SUFFIXES = (".musicxml", ".xml", ".mxl", ".mid", ".midi")
_ANCHOR = re.compile(r"^\s*(\d+)(?:\.(\d+(?:\.\d+)?))?(?:@(\d+))?\s*=\s*([0-9]+(?:\.[0-9]*)?)\s*$")
_TOP_KEYS = {"recording", "output", "feature_rate_hz", "expand_repeats", "repeats", "force", "check_audio",
             "bids", "sync", "piece",
             "physio", "relate"}
_BIDS_KEYS = {"subject", "session", "task", "run"}
_SYNC_KEYS = {"frequency_hz", "duration_s", "kind", "recorder_times_s", "recorder_file", "recorder_column",
              "offset_s", "search_start_s", "search_end_s"}
_PIECE_KEYS = {"score", "name", "start_s", "anchors", "repeats"}
#: Values of ``repeats`` (session-wide or per piece): decide from the recording, or play all / none.
REPEAT_VALUES = ("auto", "all", "none")
#: Largest recorder time or offset (s) a session may state (stimkit.timeline.clock.MAX_OFFSET_S).
_MAX_CLOCK_S = 1e6


class SessionFileError(InputError):
    """Several problems in one session file: the message keeps one line per problem."""

    #: What the file is called in the message.
    what = "session file"

    def __init__(self, path: Path | None, problems: list[tuple[int | None, str]]):
        where = f"{path}: " if path is not None else ""
        head = (f"{where}{len(problems)} problem{'s' if len(problems) != 1 else ''} in the {self.what}; "
                f"fix {'them' if len(problems) != 1 else 'it'} and rerun:")
        problems = sorted(problems, key=lambda p: (p[0] is None, p[0] or 0))
        body = [f"  line {ln}: {msg}" if ln else f"  {msg}" for ln, msg in problems]
        Exception.__init__(self, "\n".join([head] + body))
        self.path = path
        self.problems = list(problems)


@dataclass
class PieceSpec:
    """One piece in the session: its score, a display name, an optional rough start and anchors."""

    score: Path
    name: str
    start_s: float | None = None
    anchors: list[str] = field(default_factory=list)
    repeats: str | None = None  # "auto", "all", "none"; None: the session's setting


@dataclass
class SyncSpec:
    """How ``recording`` maps to ``onset``: sync ``marks``, a plain ``offset`` or ``none``."""

    mode: str = "none"
    frequency_hz: float = 1000.0
    duration_s: float = 0.02
    kind: str | None = None  # "burst" or "click"; None: from duration_s
    recorder_s: list[float] | None = None
    recorder_file: Path | None = None
    recorder_column: str = "onset"
    offset_s: float = 0.0
    search_start_s: float = 0.0
    search_end_s: float | None = None


@dataclass
class Session:
    """A validated session: every path absolute or relative to the current folder."""

    recording: Path
    pieces: list[PieceSpec]
    sync: SyncSpec = field(default_factory=SyncSpec)
    bids: dict = field(default_factory=dict)
    rate_hz: float = DEFAULT_FEATURE_RATE_HZ
    out_dir: Path = Path("annotated")
    expand_repeats: bool = True
    force: bool = False
    check_audio: bool = True   # write check-by-ear.flac beside the report
    source: Path | None = None  # the session file, when there is one
    repeats: str = "auto"      # "auto" (decide from the recording), "all", "none"
    strict: bool = False       # fail when an alignment is doubtful (unreliable spans, doubtful repeats)
    physio: list = field(default_factory=list)   # stimkit.physio.inputs.PhysioSpec, one per [[physio]]
    relate: dict = field(default_factory=dict)   # [relate] options (seed, surrogates, ...)

    def repeats_of(self, piece: "PieceSpec") -> str:
        """The repeats setting of ``piece``: its own, else the session's; ``printed`` when the
        session turns repeat expansion off (``expand_repeats = false``)."""
        if not self.expand_repeats:
            return "printed"
        return piece.repeats or self.repeats


# ---------------------------------------------------------------------------------------------
# key -> line index
# ---------------------------------------------------------------------------------------------
_HDR_ARRAY = re.compile(r"^\s*\[\[\s*([A-Za-z0-9_.\-]+)\s*\]\]")
_HDR_TABLE = re.compile(r"^\s*\[\s*([A-Za-z0-9_.\-]+)\s*\]")
_KEY = re.compile(r"^\s*([A-Za-z0-9_\-]+)\s*=")


def key_lines(text: str) -> dict[tuple, int]:
    """Line number (1-based) of each key: ``(table, index, key)``; tables map to ``key=None``.

    ``table`` is ``""`` for top-level keys, ``index`` counts ``[[table]]`` entries from 0 (0 for
    plain tables). Lines inside multi-line strings are not special-cased (good enough for the
    files this reads).
    """
    out: dict[tuple, int] = {}
    table, index = "", 0
    counts: dict[str, int] = {}
    for ln, line in enumerate(text.splitlines(), start=1):
        m = _HDR_ARRAY.match(line)
        if m:
            table = m.group(1)
            index = counts.get(table, -1) + 1
            counts[table] = index
            out.setdefault((table, index, None), ln)
            continue
        m = _HDR_TABLE.match(line)
        if m:
            table, index = m.group(1), 0
            out.setdefault((table, index, None), ln)
            continue
        m = _KEY.match(line)
        if m:
            out.setdefault((table, index, m.group(1)), ln)
    return out


# ---------------------------------------------------------------------------------------------
# loading and validation
# ---------------------------------------------------------------------------------------------
def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(float(v))


def load_session(path: str | Path, *, out_dir: str | Path | None = None, rate_hz: float | None = None,
                 force: bool | None = None) -> Session:
    """Read and validate a session file; ``out_dir``, ``rate_hz`` and ``force`` (when given)
    override its ``output``, ``feature_rate_hz`` and ``force``.

    Raises :class:`SessionFileError` (an :class:`InputError`, exit 2) listing every problem with
    its line, or :class:`InputError` when the file cannot be read or is not TOML.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("session file not found; check the path (stimkit annotate --template "
                         "prints a starter file)", path=path) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read the session file ({exc}); it must be UTF-8 TOML", path=path) from None
    sess = parse_session_text(text, base_dir=path.parent, source=path, out_dir=out_dir)
    if rate_hz is not None:
        sess.rate_hz = _check_rate(rate_hz)
    if force is not None:
        sess.force = bool(force)
    return sess


def _check_rate(rate_hz) -> float:
    if not _is_number(rate_hz) or not 0 < float(rate_hz) <= 100:
        raise InputError(f"--rate must be a number of frames per second in (0, 100], got {rate_hz}")
    return float(rate_hz)


def parse_session_text(text: str, *, base_dir: Path, source: Path | None = None,
                       out_dir: str | Path | None = None) -> Session:
    """Validate session TOML ``text``; relative paths are taken from ``base_dir``."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", path=source) from None
    lines = key_lines(text)
    problems: list[tuple[int | None, str]] = []

    def line(table="", index=0, key=None):
        return lines.get((table, index, key)) or lines.get((table, index, None))

    def bad(msg, table="", index=0, key=None):
        problems.append((line(table, index, key), msg))

    def rel(p: str) -> Path:
        q = Path(p).expanduser()
        return Path(os.path.normpath(q if q.is_absolute() else base_dir / q))

    for k in sorted(set(data) - _TOP_KEYS):
        bad(f"unknown key '{k}' (known: {', '.join(sorted(_TOP_KEYS))})", key=k)

    # recording
    recording = None
    rec = data.get("recording")
    if rec is None:
        problems.append((None, "missing 'recording = \"file.flac\"' (the audio file of the session)"))
    elif not isinstance(rec, str) or not rec.strip():
        bad("'recording' must be a file name in quotes", key="recording")
    else:
        recording = rel(rec)
        if not recording.is_file():
            bad(f"recording '{rec}' not found (looked for {recording})", key="recording")
        elif recording.suffix.lower() not in AUDIO_SUFFIXES:
            bad(f"recording '{rec}' is not an audio file ({', '.join(AUDIO_SUFFIXES)})", key="recording")

    # scalars
    rate = data.get("feature_rate_hz", DEFAULT_FEATURE_RATE_HZ)
    if not _is_number(rate) or not 0 < float(rate) <= 100:
        bad("'feature_rate_hz' must be a number of frames per second in (0, 100]", key="feature_rate_hz")
        rate = DEFAULT_FEATURE_RATE_HZ
    output = data.get("output", "annotated")
    if not isinstance(output, str) or not output.strip():
        bad("'output' must be a folder name in quotes", key="output")
        output = "annotated"
    flags = {}
    for k, default in (("expand_repeats", True), ("force", False), ("check_audio", True)):
        v = data.get(k, default)
        if not isinstance(v, bool):
            bad(f"'{k}' must be true or false", key=k)
            v = default
        flags[k] = v
    repeats = data.get("repeats", "auto")
    if repeats not in REPEAT_VALUES:
        bad(f"'repeats' must be one of {', '.join(REPEAT_VALUES)} (auto: decide from the recording)",
            key="repeats")
        repeats = "auto"

    # bids
    bids = {}
    b = data.get("bids", {})
    if not isinstance(b, dict):
        bad("'bids' must be a table: [bids] with subject, session, task, run", key="bids")
        b = {}
    for k in sorted(set(b) - _BIDS_KEYS):
        bad(f"unknown key '{k}' in [bids] (known: {', '.join(sorted(_BIDS_KEYS))})", "bids", 0, k)
    for k in ("subject", "session", "task", "run"):
        if k in b:
            v = b[k]
            if isinstance(v, bool) or not isinstance(v, (str, int)):
                bad(f"[bids] {k} must be a text or a whole number", "bids", 0, k)
                continue
            s = str(v)
            if k == "run" and not re.fullmatch(r"[0-9]+", s):
                # BIDS 1.11 entity table: run-<index>, an index is a non-negative integer
                bad(f"[bids] run = {v!r} must be a whole number such as 1 (BIDS run index)", "bids", 0, k)
                continue
            if not re.fullmatch(r"[A-Za-z0-9]+", s):
                bad(f"[bids] {k} = '{s}' may hold only letters and digits (BIDS labels)", "bids", 0, k)
                continue
            bids[k] = s

    # sync
    sync = SyncSpec()
    sy = data.get("sync")
    if sy is not None and not isinstance(sy, dict):
        bad("'sync' must be a table: [sync]", key="sync")
        sy = None
    if sy is not None:
        sync = parse_sync_table(sy, rel=rel, bad=lambda msg, key=None: bad(msg, "sync", 0, key))

    # pieces
    pieces: list[PieceSpec] = []
    pl = data.get("piece")
    if pl is None:
        problems.append((None, "no pieces: add one [[piece]] table with score = \"file.musicxml\" per piece"))
        pl = []
    elif not isinstance(pl, list) or not all(isinstance(p, dict) for p in pl):
        bad("'piece' must be written as [[piece]] tables", key="piece")
        pl = []
    names_seen: set[str] = set()
    for i, p in enumerate(pl):
        where = f"[[piece]] #{i + 1}"
        for k in sorted(set(p) - _PIECE_KEYS):
            bad(f"{where}: unknown key '{k}' (known: {', '.join(sorted(_PIECE_KEYS))})", "piece", i, k)
        sc = p.get("score")
        score_path = None
        if sc is None:
            bad(f"{where}: missing score = \"file.musicxml\"", "piece", i)
        elif not isinstance(sc, str) or not sc.strip():
            bad(f"{where}: score must be a file name in quotes", "piece", i, "score")
        else:
            score_path = rel(sc)
            if not score_path.is_file():
                bad(f"{where}: score '{sc}' not found (looked for {score_path})", "piece", i, "score")
            elif score_path.suffix.lower() not in SCORE_SUFFIXES:
                bad(f"{where}: score '{sc}' is not a score file ({', '.join(SCORE_SUFFIXES)})",
                    "piece", i, "score")
        name = p.get("name")
        if name is not None and (not isinstance(name, str) or not name.strip()):
            bad(f"{where}: name must be a text in quotes", "piece", i, "name")
            name = None
        if name is None and score_path is not None:
            name = _stem(score_path)
        if name in names_seen:
            bad(f"{where}: name '{name}' is used twice; give each piece its own name", "piece", i,
                "name" if "name" in p else "score")
        names_seen.add(name or "")
        start = p.get("start_s")
        if start is not None and (not _is_number(start) or float(start) < 0):
            bad(f"{where}: start_s must be a number of seconds >= 0 (rough start in the recording)",
                "piece", i, "start_s")
            start = None
        anchors = p.get("anchors", [])
        if not isinstance(anchors, list) or not all(isinstance(a, str) for a in anchors):
            bad(f"{where}: anchors must be a list of \"MEASURE[.BEAT][@PASS]=SECONDS\" texts", "piece", i, "anchors")
            anchors = []
        else:
            for a in anchors:
                if not _ANCHOR.match(a):
                    bad(f"{where}: anchor '{a}' is not MEASURE[.BEAT][@PASS]=SECONDS (e.g. \"12.3=61.5\" or \"8@2=40\")",
                        "piece", i, "anchors")
        prep = p.get("repeats")
        if prep is not None and prep not in REPEAT_VALUES:
            bad(f"{where}: repeats must be one of {', '.join(REPEAT_VALUES)} (auto: decide from the recording)",
                "piece", i, "repeats")
            prep = None
        if score_path is not None:
            pieces.append(PieceSpec(score=score_path, name=name or _stem(score_path),
                                    start_s=None if start is None else float(start),
                                    anchors=list(anchors), repeats=prep))
    starts = [(p.start_s, p.name) for p in pieces if p.start_s is not None]
    if any(b2[0] <= a2[0] for a2, b2 in zip(starts, starts[1:])):
        problems.append((None, "the pieces' start_s must increase in the order the pieces are listed"))

    physio, relate_opts = _physio_tables(data, bad, rel)

    if problems:
        raise SessionFileError(source, problems)
    out = Path(out_dir) if out_dir is not None else rel(output)
    return Session(recording=recording, pieces=pieces, sync=sync, bids=bids, rate_hz=float(rate),
                   out_dir=out, expand_repeats=flags["expand_repeats"], force=flags["force"],
                   check_audio=flags["check_audio"],
                   source=source, repeats=repeats, physio=physio, relate=relate_opts)


_PHYSIO_KEYS = {"file", "kind", "column", "participant", "mode", "offset_s"}
_RELATE_KEYS = {"seed", "surrogates", "pseudo_boundaries", "window_beats", "window_s", "jobs", "guard_s"}


def _physio_tables(data: dict, bad, rel) -> tuple[list, dict]:
    """The ``[[physio]]`` tables (one physiological file each) and the ``[relate]`` options."""
    from .physio.inputs import PhysioSpec
    from .physio.read import READ_KINDS

    out = []
    pl = data.get("physio", [])
    if not isinstance(pl, list) or not all(isinstance(p, dict) for p in pl):
        bad("'physio' must be written as [[physio]] tables (file, kind, column, participant)", key="physio")
        pl = []
    seen = set()
    for i, p in enumerate(pl):
        where = f"[[physio]] #{i + 1}"
        for k in sorted(set(p) - _PHYSIO_KEYS):
            bad(f"{where}: unknown key '{k}' (known: {', '.join(sorted(_PHYSIO_KEYS))})", "physio", i, k)
        f = p.get("file")
        if not isinstance(f, str) or not f.strip():
            bad(f"{where}: missing file = \"participant_physio.tsv.gz\" (or a beat table)", "physio", i, "file")
            continue
        path = rel(f)
        if not path.is_file():
            bad(f"{where}: file '{f}' not found (looked for {path})", "physio", i, "file")
        kind = p.get("kind", "rr")
        if kind not in READ_KINDS:
            bad(f"{where}: kind must be one of {', '.join(READ_KINDS)}", "physio", i, "kind")
        for k in ("column", "participant", "mode"):
            if k in p and (not isinstance(p[k], str) or not p[k].strip()):
                bad(f"{where}: {k} must be a text in quotes", "physio", i, k)
        if "mode" in p and p["mode"] not in ("value_at_beat", "marker", "waveform"):
            bad(f"{where}: mode must be value_at_beat, marker or waveform", "physio", i, "mode")
        off = p.get("offset_s", 0.0)
        if not _is_number(off):
            bad(f"{where}: offset_s must be a number of seconds (added to the file's times)", "physio", i,
                "offset_s")
            off = 0.0
        elif abs(float(off)) > _MAX_CLOCK_S:
            bad(f"{where}: offset_s = {float(off):.6g} is beyond +-{_MAX_CLOCK_S:.0e} s; give the shift "
                f"between the file's clock and the recorder's in seconds", "physio", i, "offset_s")
            off = 0.0
        label = p.get("participant")
        key = (label or path.name, kind, p.get("column"))
        if key in seen:
            bad(f"{where}: the same participant and series is listed twice", "physio", i, "participant")
        seen.add(key)
        out.append(PhysioSpec(file=path, kind=kind, column=p.get("column"), participant=label,
                              mode=p.get("mode"), offset_s=float(off)))
    opts = data.get("relate", {})
    if not isinstance(opts, dict):
        bad("'relate' must be a table: [relate] with seed, surrogates, ...", key="relate")
        opts = {}
    for k in sorted(set(opts) - _RELATE_KEYS):
        bad(f"unknown key '{k}' in [relate] (known: {', '.join(sorted(_RELATE_KEYS))})", "relate", 0, k)
    for k, lo in (("seed", 0), ("surrogates", 19), ("pseudo_boundaries", 19), ("jobs", 1)):
        if k in opts and (isinstance(opts[k], bool) or not isinstance(opts[k], int) or opts[k] < lo):
            bad(f"[relate] {k} must be a whole number >= {lo}", "relate", 0, k)
    for k in ("window_beats", "window_s"):
        if k in opts and (not isinstance(opts[k], list) or not opts[k]
                          or not all(_is_number(v) and v > 0 for v in opts[k])):
            bad(f"[relate] {k} must be a list of positive numbers", "relate", 0, k)
    if "guard_s" in opts and (not _is_number(opts["guard_s"]) or opts["guard_s"] < 0):
        bad("[relate] guard_s must be a number of seconds >= 0", "relate", 0, "guard_s")
    return out, dict(opts)


def parse_sync_table(sy: dict, *, rel, bad, where: str = "[sync]") -> SyncSpec:
    """Validate one ``[sync]`` table (already read from TOML) into a :class:`SyncSpec`.

    ``rel(text) -> Path`` resolves a file name; ``bad(message, key=None)`` records a problem
    (``key`` = the offending key, ``None`` = the table itself); ``where`` names the table in the
    messages. Every problem is reported, none raised; the returned spec is then incomplete.
    """
    sync = SyncSpec()
    for k in sorted(set(sy) - _SYNC_KEYS):
        bad(f"unknown key '{k}' in {where} (known: {', '.join(sorted(_SYNC_KEYS))})", k)
    has_times = "recorder_times_s" in sy
    has_file = "recorder_file" in sy
    has_offset = "offset_s" in sy
    if sum([has_times, has_file, has_offset]) > 1:
        bad(f"{where} give only one of recorder_times_s, recorder_file, offset_s")
    elif has_offset:
        if not _is_number(sy["offset_s"]):
            bad(f"{where} offset_s must be a number of seconds (onset = recording + offset_s)", "offset_s")
        elif abs(float(sy["offset_s"])) > _MAX_CLOCK_S:
            bad(f"{where} offset_s = {float(sy['offset_s']):.6g} is beyond +-{_MAX_CLOCK_S:.0e} s; onset "
                f"counts seconds from the start of the physiological recording", "offset_s")
        else:
            sync = SyncSpec(mode="offset", offset_s=float(sy["offset_s"]))
    elif has_times or has_file:
        sync = SyncSpec(mode="marks")
        if has_times:
            v = sy["recorder_times_s"]
            if not isinstance(v, list) or not v or not all(_is_number(t) for t in v):
                bad(f"{where} recorder_times_s must be a list of numbers (seconds on the recorder "
                    "clock, one per mark, in order)", "recorder_times_s")
            elif any(b2 <= a2 for a2, b2 in zip(v, v[1:])):
                bad(f"{where} recorder_times_s must increase", "recorder_times_s")
            elif any(abs(float(t)) > _MAX_CLOCK_S for t in v):
                bad(f"{where} recorder_times_s must be seconds from the start of the physiological "
                    f"recording (within +-{_MAX_CLOCK_S:.0e} s)", "recorder_times_s")
            else:
                sync.recorder_s = [float(t) for t in v]
        if has_file:
            v = sy["recorder_file"]
            if not isinstance(v, str) or not v.strip():
                bad(f"{where} recorder_file must be a file name in quotes", "recorder_file")
            else:
                f = rel(v)
                if not f.is_file():
                    bad(f"{where} recorder_file '{v}' not found (looked for {f})", "recorder_file")
                sync.recorder_file = f
            col = sy.get("recorder_column", "onset")
            if not isinstance(col, str) or not col:
                bad(f"{where} recorder_column must be a column name in quotes", "recorder_column")
            else:
                sync.recorder_column = col
        elif "recorder_column" in sy:
            bad(f"{where} recorder_column needs recorder_file", "recorder_column")
        for k, lo, hi in (("frequency_hz", 20.0, 48000.0), ("duration_s", 0.001, 1.0)):
            if k in sy:
                if not _is_number(sy[k]) or not lo <= float(sy[k]) <= hi:
                    bad(f"{where} {k} must be a number in [{lo:g}, {hi:g}]", k)
                else:
                    setattr(sync, k, float(sy[k]))
            else:
                bad(f"{where} missing {k} (the sync marks' tone "
                    f"{'frequency' if k == 'frequency_hz' else 'length'})")
        if "kind" in sy:
            if sy["kind"] not in ("burst", "click"):
                bad(f"{where} kind must be \"burst\" (a steady tone) or \"click\" (a short decaying tone)",
                    "kind")
            else:
                sync.kind = sy["kind"]
        for k in ("search_start_s", "search_end_s"):
            if k in sy:
                if not _is_number(sy[k]) or float(sy[k]) < 0:
                    bad(f"{where} {k} must be a number of seconds >= 0", k)
                else:
                    setattr(sync, k, float(sy[k]))
    else:
        bad(f"{where} needs recorder_times_s, recorder_file or offset_s (or leave {where} out: "
            "onset = recording time)")
    return sync


def _stem(p: Path) -> str:
    name = p.name
    for suf in SCORE_SUFFIXES:
        if name.lower().endswith(suf):
            return name[: -len(suf)]
    return p.stem


def session_from_files(scores, audio, *, out_dir=None, rate_hz: float | None = None,
                       anchors=(), force: bool = False) -> Session:
    """The ``--score S --audio A`` shortcut: pieces in the order given, no sync.

    ``rate_hz`` (default :data:`DEFAULT_FEATURE_RATE_HZ`), ``anchors`` (``MEASURE[.BEAT][@PASS]=SECONDS``
    texts, only with one score) and ``force`` mean what the session file's keys of the same
    names mean."""
    scores = [Path(s) for s in scores]
    anchors = list(anchors)
    rate = DEFAULT_FEATURE_RATE_HZ if rate_hz is None else _check_rate(rate_hz)
    if anchors and len(scores) != 1:
        raise InputError("--anchor needs exactly one --score; for several pieces write anchors = [...] "
                         "in each [[piece]] table of a session file (see --template)")
    for a in anchors:
        if not _ANCHOR.match(a):
            raise InputError(f"--anchor '{a}' is not MEASURE[.BEAT][@PASS]=SECONDS "
                             "(e.g. 12.3=61.5, or 8@2=40 for the repeat of bar 8)")
    audio = Path(audio)
    problems: list[tuple[int | None, str]] = []
    if not audio.is_file():
        raise InputError("recording not found; check the --audio path", path=audio)
    for s in scores:
        if not s.is_file():
            raise InputError("score not found; check the --score path", path=s)
    names = [_stem(s) for s in scores]
    if len(set(names)) != len(names):
        problems.append((None, "two scores have the same file name; use a session file to name them"))
    if problems:
        raise SessionFileError(None, problems)
    pieces = [PieceSpec(score=s, name=n, anchors=list(anchors) if len(scores) == 1 else [])
              for s, n in zip(scores, names)]
    return Session(recording=audio, pieces=pieces, rate_hz=rate, force=bool(force),
                   out_dir=Path(out_dir) if out_dir is not None else Path("."), source=None)


def template_text() -> str:
    """A commented starter session file."""
    return _TEMPLATE


_TEMPLATE = '''\
# stimkit session file (TOML). Paths are relative to this file's folder.
# Run it with:  stimkit annotate this-file.toml

# The recording of the whole session (one file may hold several pieces, speech, applause, pauses).
recording = "session.flac"

# Where the outputs go (created if needed; `-o DIR` on the command line overrides it).
output = "annotated"

# Rows per second of the continuous feature file (_stim.tsv.gz), up to 100 (default 10).
feature_rate_hz = 10

# Which repeats the performers played: "auto" (decide from the recording, for every repeat sign,
# first/second ending and D.C./D.S.), "all" (as written) or "none" (no repeat sign taken).
# A [[piece]] may set its own. (The older expand_repeats = false aligns the printed order.)
repeats = "auto"

# Keep an alignment that looks like the wrong piece instead of stopping (use with care).
force = false

# Write check-by-ear.flac beside the report: the recording with clicks at the placed bars and
# boundaries, to verify the alignment by listening (about 1.2 MB per minute of recording).
check_audio = true

# BIDS naming of the outputs: sub-<subject>_ses-<session>_task-<task>_run-<run>_events.tsv.
# All optional; letters and digits only.
[bids]
subject = "01"
session = "1"
task = "music"
run = 1

# Clock sync between this recording and the physiological recorder. Pick ONE of:
#  a) sync marks (short tone bursts / clicks) in the recording, plus the recorder's times of them:
[sync]
frequency_hz = 1000          # tone of the marks
duration_s = 0.02            # length of one mark
# kind = "burst"             # "burst" (steady tone) or "click" (short decaying tone);
#                            # default: click below 10 ms, burst from 10 ms
recorder_times_s = [12.500, 1840.250]   # recorder clock, one per mark, in order
#    or read them from a column of the recorder's CSV/TSV export instead of recorder_times_s:
# recorder_file = "recorder-sync.tsv"
# recorder_column = "onset"
#    optional: look for marks only in this part of the recording (recording seconds)
# search_start_s = 0
# search_end_s = 3600
#  b) a plain offset: onset = recording + offset_s
# offset_s = 3.25
#  c) no [sync] table at all: onset = recording time (the sidecar says so).

# The pieces, in the order they were played. One [[piece]] table each.
[[piece]]
score = "first-piece.musicxml"
name = "first"               # optional; default: the score's file name
start_s = 45                 # optional rough start in the recording (seconds)
# anchors = ["17.1=123.4"]   # optional: bar 17, beat 1 sounded at 123.4 s of the recording
# repeats = "all"            # optional: this piece's repeats ("auto", "all", "none")

[[piece]]
score = "second-piece.musicxml"

# Optional: physiological recordings of the participants, one [[physio]] table per file, on the
# recorder clock (BIDS *_physio.tsv.gz with its .json, or a beat table: time s, interval ms).
# annotate then relates each to the music (docs/physiology.md): results in <output>/physio/.
# [[physio]]
# file = "sub-01_physio.tsv.gz"
# kind = "rr"                # rr, ari, other, ecg, eda, rsp
# participant = "01"
# [relate]
# seed = 1
# surrogates = 1000
'''


def annotate_session(session: Session, *, progress=None, command: list[str] | None = None):
    """Run the main job on a validated session; see :func:`stimkit.timeline.run.annotate`.

    ``command`` is recorded in ``provenance.json`` (default: an equivalent command line)."""
    from .timeline.run import annotate

    return annotate(session, progress=progress, command=command)


def summary_lines(result) -> list[str]:
    """Short lines for people: pieces found, boundaries placed, confidence, drift, outputs."""
    from .timeline.run import summary_lines as _lines

    return _lines(result)
