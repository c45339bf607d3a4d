"""The stimkit command line: a thin typer app.

Each verb parses its options, calls one library function and prints the result. No science
lives here. Errors from the library (:class:`stimkit.errors.StimkitError`) become one line on
stderr and the exit code of their class (2 bad input, 1 work failed); ``--debug`` shows the
traceback instead.
"""

from __future__ import annotations

import os
import signal
import sys
import traceback
from pathlib import Path
from typing import List, Optional

import typer

from . import __version__
from .errors import InputError, StimkitError, WorkFailed
from .session import DEFAULT_FEATURE_RATE_HZ

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="stimkit: score + performance recording -> time-stamped stimulus events for physiology.",
    pretty_exceptions_enable=False,
)

_STATE = {"debug": False}


def _interactive() -> bool:
    """Progress bars only on a terminal, never in CI or pipes."""
    return sys.stderr.isatty() and not os.environ.get("CI")


class _StageLines:
    """Progress for pipes, notebooks and logs: one line on stdout per stage as it finishes
    (stderr stays for the one-line error).

    A stage is one run of a ``progress(task, fraction)`` task up to ``fraction == 1``; a task
    that starts again (its fraction falls) is a new stage and gets its own line."""

    def __init__(self, stream=None):
        import time

        self._clock = time.perf_counter
        self._t0 = self._clock()
        self._last: dict[str, float] = {}
        self._stream = stream

    def __call__(self, task: str, fraction: float) -> None:
        before = self._last.get(task)
        self._last[task] = fraction
        if fraction >= 1.0 and (before is None or before < 1.0):
            print(f"stimkit: {task} done ({self._clock() - self._t0:.1f} s)",
                  file=self._stream or sys.stdout, flush=True)


def _with_progress(fn, *args, **kwargs):
    """Call ``fn(*args, progress=..., **kwargs)`` with a rich progress bar on a terminal; without
    a terminal (CI, pipes, notebooks) print one line per stage as it finishes
    (:class:`_StageLines`)."""
    if not _interactive():
        return fn(*args, progress=_StageLines(), **kwargs)
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    bar = Progress(TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(), transient=True)
    tasks: dict[str, int] = {}

    def update(task: str, fraction: float) -> None:
        if task not in tasks:
            tasks[task] = bar.add_task(task, total=1.0)
        bar.update(tasks[task], completed=max(0.0, min(1.0, fraction)))

    with bar:
        return fn(*args, progress=update, **kwargs)


def _console():
    from rich.console import Console

    return Console(highlight=False, soft_wrap=True)


def _plain_metavars(cmd):
    """Show plain metavars in help (``DIR``, ``HZ``; nothing for flags) instead of type names
    such as ``<bool>`` or ``<list[Path]>``; arguments show their name in the usage line."""
    from typer.core import TyperArgument

    for p in cmd.params:
        if isinstance(p, TyperArgument):
            piece = (p.metavar or p.name.upper()) + ("..." if p.nargs != 1 else "")
            p.get_usage_pieces = (lambda ctx, _s=piece if p.required else f"[{piece}]": [_s])
            p.display_type_rich = lambda ctx: ""
        else:
            shown = "" if getattr(p, "is_flag", False) else (p.metavar or p.name.upper())
            p.display_type_rich = lambda ctx, _m=shown: _m
    help_option = cmd.get_help_option

    def plain_help_option(ctx, _get=help_option):
        opt = _get(ctx)
        if opt is not None:
            opt.display_type_rich = lambda ctx: ""
        return opt

    cmd.get_help_option = plain_help_option
    for sub in getattr(cmd, "commands", {}).values():
        _plain_metavars(sub)
    return cmd


def cli_command():
    """The click command behind :data:`app`, with plain metavars in its help."""
    return _plain_metavars(typer.main.get_command(app))


def _print_version(value: bool):
    if value:
        typer.echo(f"stimkit {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    debug: bool = typer.Option(False, "--debug", help="Show the full traceback on errors."),
    version: bool = typer.Option(False, "--version", help="Print the version and exit.",
                                 callback=_print_version, is_eager=True),
):
    _STATE["debug"] = debug


@app.command()
def plan(
    scores: List[Path] = typer.Argument(..., metavar="SCORE", help="Score files (.musicxml, .xml, .mxl, .mid)."),
    out: Path = typer.Option(Path("."), "-o", "--out", metavar="DIR", help="Output folder."),
    no_repeats: bool = typer.Option(False, "--no-repeats", help="Keep printed order; do not expand repeats."),
    gap_s: float = typer.Option(30.0, "--gap", metavar="S", help="Seconds between pieces in the programme plan."),
    kinds: Optional[str] = typer.Option(None, "--kinds", metavar="KIND,KIND",
                                        help="Cue sheet: show only these boundary kinds, e.g. "
                                             "dynamic,tempo,tempo_change (the tables keep all)."),
):
    """Boundaries and nominal timeline per score, programme plan and cue sheet."""
    from .export.tables import protect_inputs
    from .report.cuesheet import parse_kinds
    from .score.plan import make_plan, summary_tables

    shown = parse_kinds(kinds) if kinds is not None else None
    with protect_inputs(scores):
        result = make_plan(scores, out_dir=out, expand_repeats=not no_repeats, gap_s=gap_s,
                           cue_kinds=shown)
    con = _console()
    for table in summary_tables(result):
        con.print(table)
    for p in result.written:
        con.print(f"wrote {p}")


@app.command()
def features(
    audio: Path = typer.Argument(..., metavar="AUDIO", help="Recording (WAV, FLAC, OGG, AIFF)."),
    out: Path = typer.Option(Path("."), "-o", "--out", metavar="DIR", help="Output folder."),
    rate: float = typer.Option(DEFAULT_FEATURE_RATE_HZ, "--rate", metavar="HZ",
                               help="Frames per second of the feature table (up to 100)."),
):
    """Per-frame loudness, rhythm, spectral, tonal and silence features of a recording."""
    from .audio.pipeline import compute_features, summary_table, write_features
    from .audio.read import audio_info
    from .export.tables import check_output_dir, check_targets, input_clash, protect_inputs

    info = audio_info(audio)                 # the input first, then the folder, then the work
    check_output_dir(out, create=False)
    names = [f"{info.path.stem}.features.tsv", f"{info.path.stem}_stim.tsv.gz", f"{info.path.stem}_stim.json"]
    check_targets(out, names)
    for name in names:
        if input_clash(out / name, [audio]) is not None:
            raise InputError("this output is or links to the recording, which would be overwritten; choose "
                           "another output folder (-o) or move the recording", path=out / name)
    result = _with_progress(compute_features, audio, rate_hz=rate)
    with protect_inputs([audio]):
        written = write_features(result, out_dir=out)
    con = _console()
    con.print(summary_table(result))
    for p in written:
        con.print(f"wrote {p}")


def _repeats_option(value: str) -> str:
    if value not in ("auto", "all", "none"):
        raise InputError(f"--repeats must be auto, all or none, not {value!r}")
    return value


@app.command()
def align(
    score: Path = typer.Argument(..., metavar="SCORE", help="Score file."),
    audio: Path = typer.Argument(..., metavar="AUDIO", help="Recording of a performance of that score."),
    out: Path = typer.Option(Path("."), "-o", "--out", metavar="DIR", help="Output folder."),
    anchor: List[str] = typer.Option([], "--anchor", metavar="M[.B][@P]=S", help="MEASURE[.BEAT]\\[@PASS]=SECONDS (e.g. 12.3=45.6; 12.3@2=95.0 for the repeat), repeatable."),
    force: bool = typer.Option(False, "--force", help="Write the alignment even when it looks like a wrong piece."),
    repeats: str = typer.Option("auto", "--repeats", metavar="auto|all|none",
                                help="Which repeats were played: decide from the recording (auto), all as written, or none."),
    strict: bool = typer.Option(False, "--strict", help="Fail (exit 1, nothing written) when any part of the alignment is unreliable."),
):
    """Align the score to the recording: the recording time of every note-onset position."""
    from .align.run import align_files, check_strict, summary_lines, write_alignment
    from .export.tables import check_output_dir, protect_inputs

    check_output_dir(out, create=False)      # the folder before the work (nothing is made yet)
    result = _with_progress(align_files, score, audio, anchors=anchor, force=force,
                            repeats=_repeats_option(repeats))
    if strict:
        check_strict(result)
    with protect_inputs([score, audio]):
        written = write_alignment(result, out_dir=out)
    con = _console()
    for line in summary_lines(result):
        con.print(line)
    for p in written:
        con.print(f"wrote {p}")


@app.command()
def annotate(
    session: Optional[Path] = typer.Argument(None, metavar="SESSION", help="Session file (TOML)."),
    score: List[Path] = typer.Option([], "--score", metavar="FILE",
                                     help="Shortcut without a session file: a score (repeat for several, in the order played)."),
    audio: Optional[Path] = typer.Option(None, "--audio", metavar="FILE", help="Shortcut: the recording."),
    out: Optional[Path] = typer.Option(None, "-o", "--out", metavar="DIR", help="Output folder (overrides the session file)."),
    rate: Optional[float] = typer.Option(None, "--rate", metavar="HZ",
                                         help=f"Frames per second of the continuous features (default "
                                              f"{DEFAULT_FEATURE_RATE_HZ:g}; overrides the session file)."),
    anchor: List[str] = typer.Option([], "--anchor", metavar="M[.B][@P]=S",
                                     help="Shortcut with one --score: bar M (beat B, pass P) sounded at S "
                                          "seconds of the recording; repeatable."),
    force: bool = typer.Option(False, "--force",
                               help="Keep an alignment that looks like a wrong piece (a warning says so)."),
    template: bool = typer.Option(False, "--template", help="Print a commented starter session file."),
    repeats: Optional[str] = typer.Option(None, "--repeats", metavar="auto|all|none",
                                          help="Which repeats were played (overrides the session file; default auto)."),
    strict: bool = typer.Option(False, "--strict", help="Fail (exit 1, nothing written) when a piece's alignment is unreliable."),
):
    """The main job: events on the recorder clock, continuous features, beat grid, report."""
    from .session import annotate_session, load_session, session_from_files, summary_lines, template_text

    if template:
        typer.echo(template_text(), nl=False)
        return
    if session is not None and (score or audio is not None):
        raise InputError("give either a session file or --score/--audio, not both")
    if session is None:
        if not score or audio is None:
            raise InputError("give a session file, or both --score and --audio (see --template)")
        sess = session_from_files(score, audio, out_dir=out, rate_hz=rate, anchors=anchor, force=force)
        command = ["stimkit", "annotate"] + [a for s in score for a in ("--score", str(s))] + ["--audio", str(audio)]
        command += [a for x in anchor for a in ("--anchor", x)]
    else:
        if anchor:
            raise InputError("--anchor goes with --score/--audio; in a session file write anchors = [...] "
                             "in the piece's [[piece]] table", path=session)
        sess = load_session(session, out_dir=out, rate_hz=rate, force=force or None)
        command = ["stimkit", "annotate", str(session)]
    if rate is not None:
        command += ["--rate", f"{rate:g}"]
    if force:
        command.append("--force")
    if out is not None:
        command += ["-o", str(out)]
    if repeats is not None:
        sess.repeats = _repeats_option(repeats)
        for p in sess.pieces:
            p.repeats = None
        command += ["--repeats", sess.repeats]
    if strict:
        sess.strict = True
        command += ["--strict"]
    result = _with_progress(annotate_session, sess, command=command)
    con = _console()
    for line in summary_lines(result):
        con.print(line)


def _numbers(text: str, what: str, cast=float) -> tuple:
    try:
        return tuple(cast(v) for v in text.split(",") if v.strip())
    except ValueError:
        raise InputError(f"{what} must be comma-separated numbers, got '{text}'") from None


@app.command()
def relate(
    handoff: Path = typer.Argument(..., help="The _events.tsv written by annotate, or its output folder."),
    physio: List[Path] = typer.Argument(..., help="Physiological files: BIDS *_physio.tsv.gz (with .json) "
                                        "or a beat table (time s, interval ms); one per participant."),
    out: Path = typer.Option(Path("relate"), "-o", "--out", help="Output folder."),
    stim: Optional[Path] = typer.Option(None, "--stim", help="The _stim.tsv.gz features (found beside the "
                                        "events when a folder is given)."),
    kind: str = typer.Option("rr", "--kind", help="rr, ari, other (per-beat values), ecg, eda or rsp (signals)."),
    column: Optional[str] = typer.Option(None, "--column", help="Column of the physiological file."),
    mode: Optional[str] = typer.Option(None, "--mode", help="BIDS beat column: value_at_beat, marker or waveform."),
    participant: List[str] = typer.Option([], "--participant", help="Label per file, in order (default: "
                                          "sub-<label> of the file name, else its name)."),
    offset_s: float = typer.Option(0.0, "--offset-s", help="Seconds added to the file's times to put them on "
                                   "the events' recorder clock."),
    window_beats: str = typer.Option("20,80", "--window-beats", help="Window sizes in beats (comma-separated)."),
    window_s: str = typer.Option("10,30", "--window-s", help="Window sizes in seconds for fixed-rate series."),
    guard_s: float = typer.Option(0.0, "--guard-s", help="Gap after the boundary before the after window (s)."),
    pseudo_boundaries: int = typer.Option(1000, "--pseudo-boundaries", help="K for the calibrated test."),
    surrogates: int = typer.Option(1000, "--surrogates", help="R for every null (surrogates, shifts, sets)."),
    music_source: str = typer.Option("events", "--music-changes", help="events (feature_change rows) or detect "
                                     "(from the continuous features)."),
    max_radius_s: float = typer.Option(10.0, "--max-radius-s", help="Largest coincidence radius h (grid of 0.5 s)."),
    music_leads: bool = typer.Option(False, "--music-leads", help="Count a coincidence only when the physiological "
                                     "change follows the music change (by --lag-s to --lag-s + h)."),
    lag_s: float = typer.Option(0.0, "--lag-s", help="Physiological latency for --music-leads (s)."),
    correction: str = typer.Option("fdr_bh", "--correction", help="Across boundaries of a family: fdr_bh "
                                   "(Benjamini-Hochberg), fdr_by (any dependence) or holm."),
    share_null: str = typer.Option("circular_shift", "--share-null", help="Pseudo boundary sets for the share "
                                   "test: circular_shift or uniform."),
    ci: str = typer.Option("pseudo", "--ci", help="Interval of each boundary's difference: pseudo (from the "
                           "pseudo-boundaries), bootstrap (stationary bootstrap) or iid (Welch)."),
    penalty: str = typer.Option("bic_lrv", "--penalty", help="Change-point penalty: bic_lrv (autocorrelation-"
                                "aware), mbic (the same scale, Zhang & Siegmund's segment-length term), bic_iid, "
                                "rate:R (the CROPS solution nearest R changes per minute), or a number (in the "
                                "series' unit squared)."),
    nulls: str = typer.Option("iaaft,circular_shift", "--nulls", help="Coincidence nulls (comma-separated): "
                              "iaaft, circular_shift, uniform, iei_shuffle, value_shuffle (a sanity check)."),
    co_change: str = typer.Option("", "--co-change", help="Add co-change trains: K[,K...] = K or more "
                                  "features changing within 1 s."),
    seed: int = typer.Option(0, "--seed", help="Root seed; every random step draws from a child of it."),
    jobs: int = typer.Option(1, "--jobs", help="Worker processes for the surrogates."),
):
    """Relate physiological series to the music: boundary windows and change-point coincidence."""
    from dataclasses import replace

    from .physio.inputs import PhysioSpec, find_handoff, relate_files
    from .physio.relate import RelateSettings

    if handoff.is_dir():
        events_path, found_stim = find_handoff(handoff)
        stim = stim or found_stim
    else:
        events_path = handoff
    if participant and len(participant) != len(physio):
        raise InputError(f"give one --participant per physiological file ({len(physio)}), or none")
    if not 1 <= jobs <= 64 or surrogates < 19 or pseudo_boundaries < 19:
        raise InputError("--jobs must be 1-64; --surrogates and --pseudo-boundaries at least 19")
    from .timeline.clock import MAX_OFFSET_S

    if not abs(offset_s) <= MAX_OFFSET_S:
        raise InputError(f"--offset-s must be seconds within +-{MAX_OFFSET_S:.0e}, got {offset_s:.6g}")
    if not 0.5 <= max_radius_s <= 60:
        raise InputError("--max-radius-s must be between 0.5 and 60 s")
    h = tuple(round(0.5 * k, 1) for k in range(1, int(round(max_radius_s / 0.5)) + 1))
    settings = replace(RelateSettings(), window_beats=_numbers(window_beats, "--window-beats", int),
                       window_s=_numbers(window_s, "--window-s"), guard_s=guard_s, n_pseudo=pseudo_boundaries,
                       n_share_null=surrogates, n_surrogates=surrogates, music_source=music_source,
                       h_grid_s=h, n_jobs=jobs, coincidence_window="music_leads" if music_leads else "symmetric",
                       lag_s=lag_s)
    if music_source not in ("events", "detect"):
        raise InputError("--music-changes must be events or detect")
    if not settings.window_beats or min(settings.window_beats) < 3 or not settings.window_s or \
            min(settings.window_s) <= 0:
        raise InputError("--window-beats must be whole numbers of at least 3 and --window-s positive seconds")
    if correction not in ("fdr_bh", "fdr_by", "holm"):
        raise InputError("--correction must be fdr_bh, fdr_by or holm")
    if share_null not in ("circular_shift", "uniform"):
        raise InputError("--share-null must be circular_shift or uniform")
    if ci not in ("pseudo", "bootstrap", "iid"):
        raise InputError("--ci must be pseudo, bootstrap or iid")
    bad_penalty = "--penalty must be bic_lrv, mbic, bic_iid, rate:R (R > 0 changes per minute) or a positive number"
    if penalty.startswith("rate:"):
        try:
            ok_rate = float(penalty[5:]) > 0
        except ValueError:
            ok_rate = False
        if not ok_rate:
            raise InputError(bad_penalty)
    elif penalty not in ("bic_lrv", "bic_iid", "mbic"):
        try:
            penalty = float(penalty)
        except ValueError:
            raise InputError(bad_penalty) from None
        if not penalty > 0:
            raise InputError(bad_penalty)
    null_list = tuple(v.strip() for v in nulls.split(",") if v.strip())
    known = ("iaaft", "circular_shift", "uniform", "iei_shuffle", "value_shuffle")
    if not null_list or any(v not in known for v in null_list):
        raise InputError(f"--nulls must be a comma-separated list of {', '.join(known)}")
    co = _numbers(co_change, "--co-change", int) if co_change.strip() else ()
    if any(k < 2 for k in co):
        raise InputError("--co-change must be whole numbers of at least 2 (features changing together)")
    settings = replace(settings, correction=correction, share_null=share_null, penalty=penalty, ci_method=ci,
                       null_methods=tuple(dict.fromkeys(null_list)), co_change=co)
    specs = [PhysioSpec(file=f, kind=kind, column=column, mode=mode, offset_s=offset_s,
                        participant=participant[i] if participant else None) for i, f in enumerate(physio)]
    command = ["stimkit", "relate", str(handoff)] + [str(p) for p in physio] + ["-o", str(out)]
    run = _with_progress(relate_files, events_path, specs, out_dir=out, stim_path=stim, settings=settings,
                         seed=seed, command=command)
    con = _console()
    from .physio.summary import summary_lines

    for line in summary_lines(run):
        con.print(line)


@app.command()
def demo(
    out: Path = typer.Option(Path("demo-output"), "-o", "--out", metavar="DIR", help="Output folder."),
):
    """Run the main job on the bundled scenario (two original pieces, a rendered session)."""
    from .demo.run import run_demo

    lines = _with_progress(run_demo, out_dir=out)
    con = _console()
    for line in lines:
        con.print(line)


@app.command()
def study(
    study_file: Optional[Path] = typer.Argument(None, help="Study file (TOML)."),
    out: Optional[Path] = typer.Option(None, "-o", "--out", help="Output folder (overrides the study file)."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler",
                                            help="Run on an existing Dask cluster at ADDRESS (e.g. tcp://10.0.0.5:8786)."),
    workers: Optional[int] = typer.Option(None, "--workers", min=1,
                                          help="Local worker processes (default: one per core; 1 runs in this process)."),
    rerun_all: bool = typer.Option(False, "--rerun-all", help="Recompute every session, even the current ones."),
    template: bool = typer.Option(False, "--template", help="Print a commented starter study file."),
    demo: bool = typer.Option(False, "--demo", help="Write the bundled demo study into the output folder and run it."),
):
    """Many participants and sessions: every session's hand-off and physiology, group results, a BIDS dataset."""
    from .study import load_study, run_study, summary_lines, template_text

    if template:
        typer.echo(template_text(), nl=False)
        return
    if demo:
        if study_file is not None:
            raise InputError("give either a study file or --demo, not both")
        from .demo.study import write_demo_study

        target = out or Path("demo-study")
        study_file = write_demo_study(target / "sourcedata" / "demo-study")
        out = target
    if study_file is None:
        raise InputError("give a study file (stimkit study --template prints a starter file), or --demo")
    st = load_study(study_file, out_dir=out)
    command = ["stimkit", "study", st.show(study_file)] + (["--demo"] if demo else [])
    result = _with_progress(run_study, st, scheduler=scheduler, workers=workers, force=rerun_all, command=command)
    con = _console()
    for line in summary_lines(result):
        con.print(line)
    if result.failed:
        names = ", ".join(o.name for o in result.failed)
        raise WorkFailed(f"{len(result.failed)} of {len(result.sessions)} session(s) failed: {names} "
                         "(reasons above; the other sessions and the group results are written)")


class Stopped(BaseException):
    """Raised in the main thread by a SIGTERM or SIGHUP: unwinds like Ctrl-C, so every pending
    output set is dropped, then :func:`main` returns 128 + the signal number."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


def _on_stop_signal(signum, frame):  # pragma: no cover - exercised through a subprocess
    from .errors import STOP_SIGNALS

    STOP_SIGNALS.append(signum)
    if signum == signal.SIGINT:
        raise KeyboardInterrupt
    raise Stopped(signum)


def _stop_signals_installed():
    """Handle SIGTERM and SIGHUP like Ctrl-C while a command runs (main thread only), and record
    every stop signal (Ctrl-C included) in :data:`stimkit.errors.STOP_SIGNALS` so that one whose
    exception got lost still stops the work before a commit; the previous handlers come back
    afterwards (tests call :func:`main` in-process)."""
    import contextlib
    import threading

    @contextlib.contextmanager
    def cm():
        if threading.current_thread() is not threading.main_thread():
            yield
            return
        from .errors import STOP_SIGNALS

        STOP_SIGNALS.clear()
        saved = {}
        for name in ("SIGINT", "SIGTERM", "SIGHUP"):
            sig = getattr(signal, name, None)
            if sig is None:
                continue
            try:
                saved[sig] = signal.signal(sig, _on_stop_signal)
            except (OSError, ValueError):
                pass
        try:
            yield
        finally:
            for sig, old in saved.items():
                signal.signal(sig, old)
            STOP_SIGNALS.clear()

    return cm()


def _stopped_line(what: str, n_before: int) -> str:
    """What an interrupted run says about its outputs, truthfully: the commit log of
    :mod:`stimkit.export.tables` tells whether any file was written in this call."""
    from .export.tables import COMMIT_LOG

    written = COMMIT_LOG[n_before:]
    if not written:
        return f"stimkit: {what}; no output was written"
    folders = sorted({str(p.parent) for p in written})
    return (f"stimkit: {what} after {len(written)} output file(s) had been written completely "
            f"(in {', '.join(folders[:3])})")


def _usage_line(exc) -> str:
    """One line for a usage error: click's message and where to find help."""
    ctx = getattr(exc, "ctx", None)
    path = ctx.command_path if ctx is not None else "stimkit"
    msg = " ".join(exc.format_message().split())
    return f"stimkit: usage error: {msg} (see '{path} --help')"


def _click_errors():
    """The command-line parser's exception classes: typer's own copy of click (recent typer) and
    click itself (older typer), whichever are present."""
    mods = []
    try:
        from typer._click import exceptions as vendored

        mods.append(vendored)
    except ImportError:  # pragma: no cover - older typer uses click directly
        pass
    try:
        import click.exceptions as plain

        mods.append(plain)
    except ImportError:  # pragma: no cover
        pass
    import typer.exceptions as tx

    def grab(name, *extra):
        return tuple(getattr(m, name) for m in mods if hasattr(m, name)) + extra

    return (grab("NoArgsIsHelpError"), grab("UsageError"), grab("ClickException"),
            grab("Abort", getattr(tx, "Abort", KeyboardInterrupt)))


def main(argv: list[str] | None = None) -> int:
    """Console entry point; returns the exit code (0 ok, 1 work failed, 2 bad input/usage,
    130 interrupted by Ctrl-C, 143 stopped by SIGTERM, 129 by SIGHUP)."""
    no_args, usage, click_error, abort = _click_errors()

    from .errors import from_os_error
    from .export.tables import COMMIT_LOG

    n_before = len(COMMIT_LOG)
    _STATE["debug"] = False
    try:
        with _stop_signals_installed():
            code = cli_command()(args=argv, prog_name="stimkit", standalone_mode=False)
    except no_args as exc:  # bare `stimkit` or a verb without args
        exc.show()
        return 0
    except usage as exc:
        print(_usage_line(exc), file=sys.stderr)
        return 2
    except click_error as exc:  # e.g. a file option that cannot be opened
        print(f"stimkit: error: {' '.join(exc.format_message().split())}", file=sys.stderr)
        return exc.exit_code or 2
    except (KeyboardInterrupt, *abort):
        print(_stopped_line("interrupted", n_before), file=sys.stderr)
        return 130
    except Stopped as exc:
        name = signal.Signals(exc.signum).name
        print(_stopped_line(f"stopped by {name}", n_before), file=sys.stderr)
        return 128 + exc.signum
    except StimkitError as exc:
        if _STATE["debug"]:
            traceback.print_exc()
        print(f"stimkit: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except OSError as exc:  # disk full, name too long, ...: one line, never "internal error"
        if _STATE["debug"]:
            traceback.print_exc()
        err = from_os_error(exc)
        print(f"stimkit: error: {err}", file=sys.stderr)
        return err.exit_code
    except MemoryError:
        if _STATE["debug"]:
            traceback.print_exc()
        print("stimkit: error: out of memory; close other programs or analyse a shorter part of "
              "the recording (see the README's limits for long sessions)", file=sys.stderr)
        return 1
    except Exception as exc:  # the unexpected: still one line unless --debug
        if _STATE["debug"]:
            traceback.print_exc()
        msg = " ".join(str(exc).split())
        print(f"stimkit: internal error: {type(exc).__name__}: {msg} (rerun with --debug and report it)",
              file=sys.stderr)
        return 1
    if code == 130:  # typer turns Ctrl-C inside a command into exit 130
        print(_stopped_line("interrupted", n_before), file=sys.stderr)
    return code if isinstance(code, int) else 0


def run() -> None:  # pragma: no cover - the console script
    """Console script: exit with :func:`main`'s code. Once the work is done (outputs committed or
    refused), a late Ctrl-C during interpreter shutdown has nothing left to interrupt: ignore it
    rather than die by the signal."""
    code = main()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    sys.exit(code)


if __name__ == "__main__":  # pragma: no cover
    run()
