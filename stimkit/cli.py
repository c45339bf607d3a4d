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
from .errors import InputError, StimkitError

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


def _with_progress(fn, *args, **kwargs):
    """Call ``fn(*args, progress=..., **kwargs)`` with a rich progress bar on a terminal; without
    a terminal (CI, pipes) call it with ``progress=None`` and stay quiet."""
    if not _interactive():
        return fn(*args, progress=None, **kwargs)
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
    scores: List[Path] = typer.Argument(..., help="Score files (.musicxml, .xml, .mxl, .mid)."),
    out: Path = typer.Option(Path("."), "-o", "--out", help="Output folder."),
    no_repeats: bool = typer.Option(False, "--no-repeats", help="Keep printed order; do not expand repeats."),
    gap_s: float = typer.Option(30.0, "--gap", help="Seconds between pieces in the programme plan."),
):
    """Boundaries and nominal timeline per score, programme plan and cue sheet."""
    from .score.plan import make_plan, summary_tables

    result = make_plan(scores, out_dir=out, expand_repeats=not no_repeats, gap_s=gap_s)
    con = _console()
    for table in summary_tables(result):
        con.print(table)
    for p in result.written:
        con.print(f"wrote {p}")


@app.command()
def features(
    audio: Path = typer.Argument(..., help="Recording (WAV, FLAC, OGG, AIFF)."),
    out: Path = typer.Option(Path("."), "-o", "--out", help="Output folder."),
    rate: float = typer.Option(1.0, "--rate", help="Frames per second of the feature table (up to 100)."),
):
    """Per-frame loudness, rhythm, spectral, tonal and silence features of a recording."""
    from .audio.pipeline import compute_features, summary_table, write_features

    result = _with_progress(compute_features, audio, rate_hz=rate)
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
    score: Path = typer.Argument(..., help="Score file."),
    audio: Path = typer.Argument(..., help="Recording of a performance of that score."),
    out: Path = typer.Option(Path("."), "-o", "--out", help="Output folder."),
    anchor: List[str] = typer.Option([], "--anchor", help="MEASURE[.BEAT]\\[@PASS]=SECONDS (e.g. 12.3=45.6; 12.3@2=95.0 for the repeat), repeatable."),
    force: bool = typer.Option(False, "--force", help="Write the alignment even when it looks like a wrong piece."),
    repeats: str = typer.Option("auto", "--repeats", metavar="auto|all|none",
                                help="Which repeats were played: decide from the recording (auto), all as written, or none."),
    strict: bool = typer.Option(False, "--strict", help="Fail (exit 1, nothing written) when any part of the alignment is unreliable."),
):
    """Align the score to the recording: the recording time of every note-onset position."""
    from .align.run import align_files, check_strict, summary_lines, write_alignment

    result = _with_progress(align_files, score, audio, anchors=anchor, force=force,
                            repeats=_repeats_option(repeats))
    if strict:
        check_strict(result)
    written = write_alignment(result, out_dir=out)
    con = _console()
    for line in summary_lines(result):
        con.print(line)
    for p in written:
        con.print(f"wrote {p}")


@app.command()
def annotate(
    session: Optional[Path] = typer.Argument(None, help="Session file (TOML)."),
    score: List[Path] = typer.Option([], "--score", help="One-piece shortcut: the score (repeat for several)."),
    audio: Optional[Path] = typer.Option(None, "--audio", help="One-piece shortcut: the recording."),
    out: Optional[Path] = typer.Option(None, "-o", "--out", help="Output folder (overrides the session file)."),
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
        sess = session_from_files(score, audio, out_dir=out)
        command = ["stimkit", "annotate"] + [a for s in score for a in ("--score", str(s))] + ["--audio", str(audio)]
    else:
        sess = load_session(session, out_dir=out)
        command = ["stimkit", "annotate", str(session)]
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


@app.command()
def demo(
    out: Path = typer.Option(Path("demo-output"), "-o", "--out", help="Output folder."),
):
    """Run the main job on the bundled scenario (two original pieces, a rendered session)."""
    from .demo.run import run_demo

    lines = _with_progress(run_demo, out_dir=out)
    con = _console()
    for line in lines:
        con.print(line)


def main(argv: list[str] | None = None) -> int:
    """Console entry point; returns the exit code (0 ok, 1 work failed, 2 bad input/usage)."""
    try:
        app(args=argv, standalone_mode=True)  # click prints usage errors itself (exit 2)
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
        if code == 130:  # typer turns Ctrl-C into exit 130; outputs are staged, so none appeared
            print("stimkit: interrupted; no output was written", file=sys.stderr)
        return code
    except StimkitError as exc:
        if _STATE["debug"]:
            traceback.print_exc()
        print(f"stimkit: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("stimkit: interrupted; no output was written", file=sys.stderr)
        return 130
    except Exception as exc:  # the unexpected: still one line unless --debug
        if _STATE["debug"]:
            traceback.print_exc()
        msg = " ".join(str(exc).split())
        print(f"stimkit: internal error: {type(exc).__name__}: {msg} (rerun with --debug and report it)",
              file=sys.stderr)
        return 1
    return 0


def run() -> None:  # pragma: no cover - the console script
    """Console script: exit with :func:`main`'s code. Once the work is done (outputs committed or
    refused), a late Ctrl-C during interpreter shutdown has nothing left to interrupt: ignore it
    rather than die by the signal."""
    code = main()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    sys.exit(code)


if __name__ == "__main__":  # pragma: no cover
    run()
