"""Where a study's files go: a BIDS dataset with the study's results under ``derivatives/``.

Layout (BIDS 1.11, "Common principles" and "Derivatives")::

    OUT/
      dataset_description.json        raw dataset (DatasetType raw, HEDVersion for the events' HED tags)
      README.md                       what the dataset is, how it was made, the cautions
      participants.tsv, participants.json
      sub-<p>/ses-<s>/beh/
        sub-<p>_ses-<s>_task-<t>[_run-<r>]_events.tsv/.json    boundaries on this participant's clock
        sub-<p>_ses-<s>_task-<t>[_run-<r>]_stim.tsv.gz/.json   music features on the same clock
        sub-<p>_ses-<s>_task-<t>[_run-<r>][_recording-<l>]_physio.tsv.gz/.json
                                                                the physiological file, when given as BIDS physio
      derivatives/stimkit/
        dataset_description.json      DatasetType derivative, GeneratedBy stimkit
        sub-<p>/ses-<s>/beh/          everything else of the session: beats, report, provenance, and
                                      the physiology tables named after their physiological file
                                      (``<physio name>_boundarytests.tsv``, ...)
        group/                        the study-level results and the study report
        study.json                    the study's provenance (inputs, settings, sessions, keys)
      .stimkit-study/                 state for incremental runs (hidden; BIDS tools ignore it)

A physiological file given as a plain table (not BIDS physio) is not copied into the raw part;
its hash and path are in the session's ``provenance.json``.

References
----------
Brain Imaging Data Structure 1.11: "Modality agnostic files" (dataset_description, README,
participants), "Behavioral experiments (with no neural recordings)", "Physiological recordings",
"BIDS Derivatives".
"""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd

__all__ = ["DERIVATIVES", "raw_dir", "derivative_dir", "group_dir", "physio_raw_files", "is_bids_physio",
           "participants_table", "participants_sidecar", "readme_text", "write_dataset_files"]

#: The pipeline folder of the study's derivatives.
DERIVATIVES = Path("derivatives") / "stimkit"


def raw_dir(out_root: Path, s) -> Path:
    """``OUT/sub-<p>/ses-<s>/beh`` of a study session."""
    return Path(out_root) / f"sub-{s.participant}" / f"ses-{s.session}" / "beh"


def derivative_dir(out_root: Path, s) -> Path:
    """``OUT/derivatives/stimkit/sub-<p>/ses-<s>/beh`` of a study session."""
    return Path(out_root) / DERIVATIVES / f"sub-{s.participant}" / f"ses-{s.session}" / "beh"


def group_dir(out_root: Path) -> Path:
    return Path(out_root) / DERIVATIVES / "group"


def is_bids_physio(path: Path) -> Path | None:
    """The JSON sidecar when ``path`` is a BIDS physio file (``*.tsv.gz`` with a sidecar holding
    ``SamplingFrequency``, ``StartTime`` and ``Columns``), else ``None``."""
    name = Path(path).name
    if not name.endswith(".tsv.gz"):
        return None
    side = Path(path).with_name(name[: -len(".tsv.gz")] + ".json")
    try:
        meta = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if isinstance(meta, dict) and {"SamplingFrequency", "StartTime", "Columns"} <= set(meta):
        return side
    return None


def physio_raw_files(s) -> list[tuple[Path, str]]:
    """``(source, BIDS name)`` of the physiological files of session ``s`` that go into the raw part."""
    from .plan import physio_base

    out = []
    for p in s.physio:
        side = is_bids_physio(p.file)
        if side is not None:
            base = physio_base(s, p)
            out.append((Path(p.file), f"{base}_physio.tsv.gz"))
            out.append((side, f"{base}_physio.json"))
    return out


def participants_table(study) -> pd.DataFrame:
    """``participants.tsv``: ``participant_id`` then the study file's columns in first-seen order."""
    cols = ["participant_id"]
    for row in study.participants:
        for k in row:
            if k not in cols:
                cols.append(k)
    return pd.DataFrame([{c: row.get(c) for c in cols} for row in study.participants], columns=cols)


def participants_sidecar(table: pd.DataFrame) -> dict:
    side = {"participant_id": {"Description": "BIDS subject label (sub-<label>), as listed in the study file"}}
    for c in table.columns[1:]:
        side[c] = {"Description": f"'{c}' as given for each participant in the study file"}
    return side


def readme_text(study) -> str:
    from .. import __version__

    return (f"# {study.name}\n\n"
            f"A BIDS dataset written by stimkit {__version__} (`stimkit study`) from the study file "
            f"`{Path(study.source).name if study.source else 'STUDY.toml'}`.\n\n"
            "Each `sub-<participant>/ses-<session>/beh/` folder holds the music events and the continuous "
            "music features of that session on the participant's physiological recorder clock "
            "(`_events.tsv`, `_stim.tsv.gz`), and the physiological recordings given as BIDS physio files. "
            "`derivatives/stimkit/` holds the rest of each session (beat grid, report, provenance, the "
            "physiology analysis tables) and the group results with the study report.\n\n"
            "## Cautions\n\n"
            "stimkit is a research tool, not a medical device. Its statistics show association, not "
            "cause, and are exploratory. People in these studies may be patients: the study protocol, "
            "the ethics approval and the clinical staff decide what is safe. Defer to local rules and "
            "licensed practice.\n")


def write_dataset_files(outs, study, *, derivative_extra: dict | None = None) -> list[Path]:
    """Stage the dataset-level files (root description, README, participants, derivatives
    description) into ``outs`` (an OutputSet at the study's output folder)."""
    from ..export.bids import dataset_description

    written = []
    extra = {"License": study.license} if study.license else None
    written.append(outs.write_json("dataset_description.json", dataset_description(
        name=study.name, authors=study.authors or None, extra=extra)))
    written.append(outs.write_text("README.md", readme_text(study)))
    table = participants_table(study)
    written.append(outs.write_tsv("participants.tsv", table))
    written.append(outs.write_json("participants.json", participants_sidecar(table)))
    desc = dataset_description(name=f"{study.name}: stimkit derivatives", authors=study.authors or None,
                               dataset_type="derivative", extra=derivative_extra)
    written.append(outs.write_json((DERIVATIVES / "dataset_description.json").as_posix(), desc))
    return written
