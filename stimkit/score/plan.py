"""The session plan: boundaries and nominal timeline per score, a programme, and a cue sheet.

What it computes
----------------
:func:`make_plan` loads every score (all of them are parsed and validated before anything is
written), lays the pieces end to end with ``gap_s`` seconds between them, and writes through one
:class:`stimkit.export.tables.OutputSet` (all-or-nothing):

- ``<piece>.boundaries.tsv`` -- one row per boundary, columns :data:`PLAN_COLUMNS`;
- ``<piece>.boundaries.json`` -- sidecar describing every column and ``trial_type`` level, the
  meaning of ``value`` per level, the tempo map (knots and stated defaults) and the warnings;
- ``programme.tsv`` (+ ``.json``) when several scores are given -- per-piece start and end;
- ``cue-sheet.html`` -- always; the printable page an experimenter follows during a session.

:func:`summary_tables` gives rich tables for the CLI (the library never prints).

Conventions
-----------
``nominal`` is seconds from the start of the piece at the notated tempo (see
:mod:`stimkit.score.tempomap`); ``programme`` is seconds from the start of the first piece, with
``gap_s`` between pieces. Rows are sorted by ``score_qn``; floats are written with a fixed format.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..errors import InputError
from ..export.tables import OutputSet, check_output_dir
from ..levels import TRIAL_TYPES
from .markings import DYNAMIC_LEVELS, LEVEL_RANGE_DB, LEVEL_STEP_DB, LONG_SILENCE_S, VELOCITY
from .model import ScoreModel
from .parse import load_score
from .tempomap import tempo_settings

__all__ = ["make_plan", "summary_tables", "PlanResult", "PLAN_COLUMNS", "COLUMN_DESCRIPTIONS",
           "VALUE_MEANING", "SCORE_LEVELS", "piece_names", "boundaries_sidecar"]

PLAN_COLUMNS = ["trial_type", "label", "measure", "pass", "beat", "score_qn", "end_qn", "nominal",
                "nominal_end", "programme", "part", "value", "detail"]

#: column -> (LongName, Description, Units)
COLUMN_DESCRIPTIONS: dict[str, tuple[str, str, str | None]] = {
    "trial_type": ("Boundary kind", "Kind of marking; one of the Levels.", None),
    "label": ("Label", "What the marking says (e.g. 'mf', 'Andante (quarter = 84)', 'D major').", None),
    "measure": ("Measure", "Bar number as printed (a pickup may be 0); for a mark at the end of a bar "
                "(barline, Fine) the bar that carries it.", None),
    "pass": ("Pass", "Which playing of the printed bar this is: 1 the first time, 2 on its first "
             "repeat, and so on.", None),
    "beat": ("Beat", "Beat within the bar, counted from 1 in the bar's beat unit (6/8 has two "
             "beats); a mark at the end of a bar has the beat after the last one.", None),
    "score_qn": ("Score position", "Quarter notes from the start of the piece as performed "
                 "(repeats expanded unless --no-repeats).", "quarter notes"),
    "end_qn": ("Score end", "End of a marking that spans time (hairpin, ramp, fermata, pause, "
               "piece); n/a for point markings.", "quarter notes"),
    "nominal": ("Nominal time", "Seconds from the start of the piece at the notated tempo.", "s"),
    "nominal_end": ("Nominal end", "Nominal seconds at end_qn.", "s"),
    "programme": ("Programme time", "Seconds from the start of the first piece of the programme "
                  "(pieces end to end with the gap between them).", "s"),
    "part": ("Part", "Score part(s) carrying the marking, or 'all'.", None),
    "value": ("Value", "Numeric value of the marking; its meaning depends on trial_type "
              "(see ValueMeaning).", None),
    "detail": ("Detail", "How the value was obtained (notated, project convention, default).", None),
}

SCORE_LEVELS = ["piece", "dynamic", "hairpin", "accent", "tempo", "tempo_change", "fermata", "key",
                "meter", "section", "pause"]

VALUE_MEANING = {
    "piece": "performed length in quarter notes",
    "dynamic": "level 1..10 (pppp=1, ppp=2, pp=3, p=4, mp=5, mf=6, f=7, ff=8, fff=9, ffff=10)",
    "accent": "momentary level 1..10 of the accent (sf, sfz, fz, fp, ...); project convention",
    "hairpin": "+1 crescendo, -1 diminuendo",
    "tempo": "quarter-note BPM in force after the mark",
    "tempo_change": "quarter-note BPM in force after the change (for a ramp: at its end)",
    "fermata": "held span in quarter notes (written length)",
    "key": "sharps in the key signature (negative: flats)",
    "meter": "bar length in quarter notes",
    "section": "n/a",
    "pause": "silent length in quarter notes",
}


@dataclass
class PlanResult:
    """What :func:`make_plan` produced."""

    models: list[ScoreModel]
    names: list[str]
    programme: pd.DataFrame  # piece, order, start, end, duration, bars, boundaries
    tables: dict[str, pd.DataFrame]  # piece -> plan table (PLAN_COLUMNS)
    written: list[Path] = field(default_factory=list)
    gap_s: float = 30.0


def piece_names(paths: list[Path]) -> list[str]:
    """File stems, made unique with ``-2``, ``-3`` ... in order."""
    out, seen = [], {}
    for p in paths:
        stem = Path(p).stem
        seen[stem] = seen.get(stem, 0) + 1
        out.append(stem if seen[stem] == 1 else f"{stem}-{seen[stem]}")
    return out


def _precheck_out_dir(out_dir: Path) -> None:
    """Refuse an output folder that cannot be written, without creating anything."""
    p = Path(out_dir)
    if p.exists():
        if not p.is_dir():
            raise InputError("output path exists and is not a folder; give a folder", path=p)
        if not os.access(p, os.W_OK | os.X_OK):
            raise InputError("output folder is not writable; choose another folder with -o", path=p)
        return
    anc = p.parent
    while not anc.exists() and anc != anc.parent:
        anc = anc.parent
    if not anc.is_dir() or not os.access(anc, os.W_OK | os.X_OK):
        raise InputError("output folder cannot be created (parent not writable); choose another "
                         "folder with -o", path=p)


def _plan_table(model: ScoreModel, start_s: float) -> pd.DataFrame:
    b = model.boundaries.copy()
    b["programme"] = b["nominal"] + start_s
    return b[PLAN_COLUMNS].reset_index(drop=True)


def boundaries_sidecar(model: ScoreModel, *, name: str, start_s: float) -> dict:
    """The JSON sidecar of one ``<piece>.boundaries.tsv``."""
    cols = {}
    for c in PLAN_COLUMNS:
        ln, desc, unit = COLUMN_DESCRIPTIONS[c]
        d = {"LongName": ln, "Description": desc}
        if unit:
            d["Units"] = unit
        if c == "trial_type":
            d["Levels"] = {k: TRIAL_TYPES[k] for k in SCORE_LEVELS}
        cols[c] = d
    tm = model.tempo_map
    return {
        "Piece": name,
        "Title": model.title,
        "SourceFile": model.path.name,
        "RepeatsExpanded": bool(model.repeats_expanded),
        "Parts": list(model.parts),
        "TransposingParts": dict(getattr(getattr(model, "printed", None), "transpositions", None) or {}),
        "PrintedBars": int(model.measures["index"].nunique()) if "index" in model.measures else None,
        "PerformedBars": int(len(model.measures)),
        "TotalQuarterNotes": model.total_qn,
        "NominalDurationSeconds": model.nominal_duration_s,
        "ProgrammeStartSeconds": start_s,
        "Columns": cols,
        "ValueMeaning": VALUE_MEANING,
        "Conventions": {
            "time": "score_qn counts quarter notes as performed; nominal seconds come from the tempo "
                    "map below; n/a marks a missing value",
            "dynamics_velocity": {"levels": DYNAMIC_LEVELS, "midi_velocity": VELOCITY,
                                  "note": "project rule: the ten levels pppp..ffff are equal steps in dB "
                                          f"({LEVEL_STEP_DB:.2f} dB each) over the {LEVEL_RANGE_DB:g} dB "
                                          "of the velocity-to-level law (velocity 1..127, linear in dB); "
                                          "equal dB steps are equal loudness ratios (Stevens 1957)"},
            "tempo_words": "tempo words get a nominal BPM from the project's word table "
                           "(stimkit.score.words); these values are conventions, stated in 'detail'",
            "pitch": "notes and key rows are at sounding (concert) pitch; TransposingParts says how each "
                     "transposing part's written notes were moved (MusicXML <transpose>), and a key row's "
                     "detail gives the written key",
            "long_silence_s": LONG_SILENCE_S,
            "same_marking_merge": "the same marking at nearly the same place in several parts is one row",
        },
        "TempoMap": {
            **tm.to_dict(),
            "Description": "The map from score_qn to nominal seconds, piecewise linear between its knots.",
            "Settings": tempo_settings(),
            "Segments": tm.meta.get("segments", []),
            "Fermatas": tm.meta.get("fermatas", []),
        },
        "Warnings": list(model.warnings),
    }


def make_plan(paths, *, out_dir, expand_repeats: bool = True, gap_s: float = 30.0,
              cue_kinds=None) -> PlanResult:
    """Plan a session from one or more scores and write the plan files.

    Parameters
    ----------
    paths : list of str or Path
        Score files in programme order.
    out_dir : str or Path
        Output folder (created if needed).
    expand_repeats : bool
        Expand repeats into the performed order (default True).
    gap_s : float
        Seconds between pieces in the programme (>= 0).
    cue_kinds : list of str, optional
        Boundary kinds shown in the cue sheet (default all); the boundary tables keep every row.

    Returns
    -------
    PlanResult
        Models, per-piece plan tables, the programme table and the files written.

    Raises
    ------
    InputError
        Any score is invalid, ``gap_s`` is negative or not finite, or the output folder cannot be
        written. Nothing is written then.
    """
    paths = [Path(p) for p in (paths or [])]
    if not paths:
        raise InputError("give at least one score file")
    if not (isinstance(gap_s, (int, float)) and math.isfinite(gap_s) and gap_s >= 0):
        raise InputError(f"--gap must be a non-negative number of seconds, got {gap_s}")
    out = Path(out_dir)
    _precheck_out_dir(out)
    models = [load_score(p, expand_repeats=expand_repeats) for p in paths]
    names = piece_names(paths)
    rows, tables = [], {}
    t = 0.0
    for k, (nm, m) in enumerate(zip(names, models)):
        dur = m.nominal_duration_s
        rows.append({"order": k + 1, "piece": nm, "start": t, "end": t + dur, "duration": dur,
                     "bars": int(len(m.measures)), "boundaries": int(len(m.boundaries)),
                     "warnings": int(len(m.warnings)), "file": m.path.name})
        tables[nm] = _plan_table(m, t)
        t += dur + float(gap_s)
    programme = pd.DataFrame(rows, columns=["order", "piece", "start", "end", "duration", "bars",
                                            "boundaries", "warnings", "file"])
    from ..report.cuesheet import cue_sheet_html

    html = cue_sheet_html(models=models, names=names, tables=tables, programme=programme, gap_s=float(gap_s),
                          kinds=cue_kinds)
    check_output_dir(out, create=False)  # the set makes the folder when it writes (none on failure)
    fmt = {"column_formats": {"beat": "%.3f", "score_qn": "%.4f", "end_qn": "%.4f", "nominal": "%.3f",
                              "nominal_end": "%.3f", "programme": "%.3f", "value": "%.4g"}}
    with OutputSet(out) as outs:
        for nm, m in zip(names, models):
            outs.write_tsv(f"{nm}.boundaries.tsv", tables[nm], **fmt)
            outs.write_json(f"{nm}.boundaries.json",
                            boundaries_sidecar(m, name=nm, start_s=float(programme.loc[names.index(nm), "start"])))
        if len(models) > 1:
            outs.write_tsv("programme.tsv", programme, float_format="%.3f")
            outs.write_json("programme.json", {
                "GapSeconds": float(gap_s),
                "TotalNominalSeconds": float(programme["end"].iloc[-1]),
                "Columns": {
                    "order": "position in the programme", "piece": "piece name (file stem)",
                    "start": "programme seconds at the piece's start (nominal)",
                    "end": "programme seconds at the piece's end", "duration": "nominal seconds",
                    "bars": "performed bars", "boundaries": "rows in the boundaries table",
                    "warnings": "number of warnings for the piece", "file": "score file name"},
            })
        outs.write_text("cue-sheet.html", html)
    written = list(outs.committed)
    return PlanResult(models=models, names=names, programme=programme, tables=tables,
                      written=written, gap_s=float(gap_s))


def summary_tables(result: PlanResult) -> list:
    """rich tables for the terminal: one row per piece, then boundary counts by kind."""
    from rich.table import Table

    from ..report.cuesheet import _t as _mmss  # m:ss.s, the cue sheet's time format

    t1 = Table(title="Programme (nominal)")
    for c in ("#", "piece", "start", "duration", "bars", "boundaries", "warnings"):
        if c == "piece":
            t1.add_column(c, overflow="fold")
        else:
            t1.add_column(c, justify="right", no_wrap=True)
    for r in result.programme.itertuples(index=False):
        t1.add_row(str(r.order), r.piece, _mmss(r.start), _mmss(r.duration), str(r.bars),
                   str(r.boundaries), str(r.warnings))
    t2 = Table(title="Boundaries by kind")
    t2.add_column("kind")
    for k, nm in enumerate(result.names):
        t2.add_column(f"#{k + 1}", justify="right")
    counts = [result.tables[nm]["trial_type"].value_counts() for nm in result.names]
    for kind in SCORE_LEVELS:
        t2.add_row(kind, *[str(int(c.get(kind, 0))) for c in counts])
    out = [t1, t2]
    warn = [(nm, w) for nm, m in zip(result.names, result.models) for w in m.warnings]
    if warn:
        t3 = Table(title="Warnings")
        t3.add_column("piece", overflow="fold")
        t3.add_column("warning", overflow="fold")
        for nm, w in warn:
            t3.add_row(nm, w)
        out.append(t3)
    return out
