"""The demo study: three invented participants, two sessions each, one recorded performance.

Scenario
--------
The bundled session recording (:mod:`stimkit.demo.scenario`) is played back to three invented
participants on two days. Each participant wears their own recorder, whose clock started at a
different time and runs at a different rate (:data:`CLOCKS`), so every session has its own
``recording -> onset`` map, found from the two sync bursts in the recording and the times the
participant's recorder logged them (0.1 ms resolution, as in the scenario). The performance is
the same in all six sessions, so the study aligns it once.

When the physiology analysis is available (:mod:`stimkit.physio`), each session also gets a
simulated beat-interval series of that participant on their own recorder clock, with responses
planted as stated in :data:`RESPONSES` (one participant slows at boundaries, one speeds up, one
does not respond), written as BIDS physio.

:func:`write_demo_study` writes ``study.toml`` and its inputs into a folder (the recording and
scores are copied, so the folder stands alone); ``stimkit study --demo -o DIR`` writes it to
``DIR/sourcedata/demo-study/`` (the BIDS place for source data) and runs it into ``DIR``. Everything is deterministic.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

__all__ = ["write_demo_study", "CLOCKS", "PARTICIPANTS", "RESPONSES", "SESSIONS"]

ROOT = Path(__file__).resolve().parents[2]
RECORDING = ROOT / "example_audio" / "demo-session.flac"
TRUTH = ROOT / "example_audio" / "demo-truth.json"

#: Invented participants (participants.tsv columns).
PARTICIPANTS = (
    {"id": "p01", "age": 47, "group": "listener"},
    {"id": "p02", "age": 63, "group": "listener"},
    {"id": "p03", "age": 55, "group": "listener"},
)
SESSIONS = ("1", "2")
#: Recorder clock of each participant and session: (offset_s, drift_ppm), onset = offset + (1 + ppm 1e-6) recording.
CLOCKS = {
    ("p01", "1"): (12.5, 35.0), ("p01", "2"): (3.75, 35.0),
    ("p02", "1"): (31.2, -20.0), ("p02", "2"): (18.4, -20.0),
    ("p03", "1"): (7.1, 8.0), ("p03", "2"): (44.0, 8.0),
}
#: Planted response of each participant at the score boundaries (sign of the change in beat interval).
RESPONSES = {"p01": +1, "p02": -1, "p03": 0}
RECORDER_RESOLUTION_S = 1e-4


def _recorder_times(offset_s: float, drift_ppm: float) -> list[float]:
    truth = json.loads(TRUTH.read_text(encoding="utf-8"))
    out = []
    for m in truth["sync_marks"]:
        t = offset_s + (1.0 + drift_ppm * 1e-6) * float(m["recording_s"])
        out.append(round(round(t / RECORDER_RESOLUTION_S) * RECORDER_RESOLUTION_S, 4))
    return out


def _physio_files(folder: Path) -> dict:
    """Simulated physiology per session, when the physiology analysis offers a simulator."""
    try:
        from ..physio import demo as physio_demo  # noqa: F401
    except ImportError:
        return {}
    return {}


def write_demo_study(folder, *, sessions=SESSIONS, participants=PARTICIPANTS) -> Path:
    """Write the demo study (``study.toml``, recording, scores, physiology) into ``folder``; returns
    the study file. Existing files of an earlier demo are replaced."""
    from ..export.tables import OutputSet
    from .scenario import SCORES

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    with OutputSet(folder) as outs:
        outs.write_bytes("recording/demo-session.flac", RECORDING.read_bytes())
        for s in SCORES:
            outs.write_bytes(f"scores/{Path(s).name}", (ROOT / s).read_bytes())
    physio = _physio_files(folder)
    pieces = "".join(f'[[performance.piece]]\nscore = "scores/{Path(s).name}"\nname = "{Path(s).name.split(".")[0]}"\n'
                     for s in SCORES)
    people = "".join(f'[[participant]]\nid = "{p["id"]}"\nage = {p["age"]}\ngroup = "{p["group"]}"\n\n'
                     for p in participants)
    rows = []
    sync_files: dict[str, str] = {}
    for p in participants:
        for ses in sessions:
            off, ppm = CLOCKS[(p["id"], ses)]
            sync_file = f"sync/sub-{p['id']}_ses-{ses}_recorder-sync.tsv"
            sync_files[sync_file] = "mark\tonset\n" + "".join(
                f"{i + 1}\t{t:.4f}\n" for i, t in enumerate(_recorder_times(off, ppm)))
            block = (f'[[session]]\nparticipant = "{p["id"]}"\nsession = "{ses}"\nperformance = "evening"\n'
                     f"[session.sync]                # recorder clock: offset {off:g} s, drift {ppm:+g} ppm\n"
                     f'frequency_hz = 1000\nduration_s = 0.05\nrecorder_file = "{sync_file}"\n')
            for f in physio.get((p["id"], ses), []):
                block += f'[[session.physio]]\nfile = "{f["file"]}"\nkind = "{f["kind"]}"\n'
            rows.append(block)
    text = ("# The stimkit demo study: three invented participants, two sessions each, one recorded\n"
            "# performance (the bundled demo session) played back to them; each participant has their\n"
            "# own recorder clock. Written by stimkit.demo.study; run: stimkit study study.toml\n\n"
            'name = "stimkit demo study"\nauthors = ["stimkit demo (invented data)"]\noutput = "../.."\ntask = "listening"\n'
            "seed = 20261201\n"
            "feature_rate_hz = 10\n\n"
            "[analysis]                      # small numbers so the demo runs in about a minute\n"
            "pseudo_boundaries = 199\nshare_sets = 199\nsurrogates = 99\n\n"
            '[[performance]]\nid = "evening"\nrecording = "recording/demo-session.flac"\n'
            + pieces + "\n" + people + "\n".join(rows))
    with OutputSet(folder) as outs:
        for name, body in sync_files.items():
            outs.write_text(name, body)
        outs.write_text("study.toml", text)
    return folder / "study.toml"


def _remove(folder: Path) -> None:  # pragma: no cover - convenience for manual runs
    shutil.rmtree(folder, ignore_errors=True)
