"""The demo study: three invented participants, two sessions each, one recorded performance.

Scenario
--------
The bundled session recording (:mod:`stimkit.demo.scenario`) is played back to three invented
participants on two days. Each participant wears their own recorder, whose clock started at a
different time and runs at a different rate (:data:`CLOCKS`), so every session has its own
``recording -> onset`` map, found from the two sync bursts in the recording and the times the
participant's recorder logged them (0.1 ms resolution, as in the scenario). The performance is
the same in all six sessions, so the study aligns it once.

Each session also gets a simulated beat-interval series of that participant on their own recorder
clock (:func:`simulate_beats`), written as BIDS physio: after each rehearsal mark inside the pieces
(:data:`PLANTED_RECORDING_S`) the beat interval of p01 rises by 60 ms for 15 s (the heart slows),
that of p02 falls by as much, and p03 does not respond (:data:`RESPONSES`). Nothing is planted
anywhere else; the marks coincide with some key and tempo changes, so those families carry the
responses too.

:func:`write_demo_study` writes ``study.toml`` and its inputs into a folder (the recording and
scores are copied, so the folder stands alone); ``stimkit study --demo -o DIR`` writes it to
``DIR/sourcedata/demo-study/`` (the BIDS place for source data) and runs it into ``DIR``. Everything is deterministic.
"""

from __future__ import annotations

import json
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
#: Planted response of each participant after the planted boundaries: the sign of the change of the
#: beat interval (p02 mirrors p01, so a group mean over participants hides two clear responders).
RESPONSES = {"p01": +1, "p02": -1, "p03": 0}
RECORDER_RESOLUTION_S = 1e-4


def _recorder_times(offset_s: float, drift_ppm: float) -> list[float]:
    truth = json.loads(TRUTH.read_text(encoding="utf-8"))
    out = []
    for m in truth["sync_marks"]:
        t = offset_s + (1.0 + drift_ppm * 1e-6) * float(m["recording_s"])
        out.append(round(round(t / RECORDER_RESOLUTION_S) * RECORDER_RESOLUTION_S, 4))
    return out


#: Where responses are planted (recording seconds, the renderer's ground truth): the rehearsal
#: marks inside the pieces (A again at the repeat, B, C, D of the first piece; B, C of the second).
PLANTED_RECORDING_S = (36.327, 63.386, 107.569, 134.059, 207.025, 233.454)
BASE_MS, RESPONSE_MS, RESPONSE_S, PHI, SD_MS = 820.0, 60.0, 15.0, 0.5, 25.0
PHYSIO_RATE_HZ = 500.0


def simulate_beats(participant: str, session: str, *, seed: int = 20261203, clock=None, sign=None):
    """Beat times (s, on the participant's recorder clock) and intervals (ms) of one session.

    The interval is ``BASE_MS`` plus AR(1) noise (phi ``PHI``, marginal SD ``SD_MS``; a common first
    model of beat-to-beat fluctuation) plus a response of ``RESPONSE_MS`` for ``RESPONSE_S``
    seconds after each planted time, times the participant's sign in :data:`RESPONSES` (+1: the
    heart slows, -1: it speeds up, 0: no response). ``clock`` (offset_s, drift_ppm) and ``sign``
    replace :data:`CLOCKS` and :data:`RESPONSES` for participants of other studies (the bench's).
    """
    import numpy as np

    rng = np.random.default_rng([seed, int("".join(c for c in participant if c.isdigit()) or 0), int(session)])
    sign = RESPONSES[participant] if sign is None else sign
    off, ppm = CLOCKS[(participant, session)] if clock is None else clock
    steps = np.asarray(PLANTED_RECORDING_S)
    sd_innov = SD_MS * np.sqrt(1.0 - PHI ** 2)
    rec, rr = [], []
    now, noise = 0.5, rng.normal(0.0, SD_MS)
    end = json.loads(TRUTH.read_text(encoding="utf-8"))["sync_marks"][-1]["recording_s"] + 0.5
    while now < end:
        responding = bool(np.any((now >= steps) & (now < steps + RESPONSE_S)))
        noise = PHI * noise + rng.normal(0.0, sd_innov)
        x = BASE_MS + (sign * RESPONSE_MS if responding else 0.0) + noise
        now += x / 1000.0
        rec.append(now)
        rr.append(x)
    t = off + (1.0 + ppm * 1e-6) * np.asarray(rec)
    return t, np.asarray(rr)


def _physio_files(folder: Path) -> dict:
    """Simulated BIDS physio per session (``value_at_beat``: the interval at each beat's sample)."""
    import numpy as np

    from ..export.tables import OutputSet, gzip_bytes

    out = {}
    with OutputSet(folder) as outs:
        for p in PARTICIPANTS:
            for ses in SESSIONS:
                t, rr = simulate_beats(p["id"], ses)
                start = float(np.floor(t[0]) - 1.0)
                k = np.round((t - start) * PHYSIO_RATE_HZ).astype(np.int64)
                col = np.zeros(int(k[-1]) + int(PHYSIO_RATE_HZ), dtype=np.float64)
                col[k] = np.round(rr, 1)
                body = "\n".join("0" if v == 0 else f"{v:.1f}" for v in col) + "\n"
                name = f"physio/sub-{p['id']}_ses-{ses}_recording-heart_physio"
                outs.write_bytes(f"{name}.tsv.gz", gzip_bytes(body.encode("ascii")))
                outs.write_text(f"{name}.json", json.dumps({
                    "SamplingFrequency": PHYSIO_RATE_HZ, "StartTime": start, "Columns": ["rr"],
                    "rr": {"Description": "Beat-to-beat (RR) interval, written at the sample of the beat that "
                                          "closes it; 0 between beats (simulated, invented participant)",
                           "Units": "ms"}}, indent=2) + "\n")
                out[(p["id"], ses)] = [{"file": f"{name}.tsv.gz", "kind": "rr", "label": "heart"}]
    return out


def write_demo_study(folder) -> Path:
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
                     for p in PARTICIPANTS)
    rows = []
    sync_files: dict[str, str] = {}
    for p in PARTICIPANTS:
        for ses in SESSIONS:
            off, ppm = CLOCKS[(p["id"], ses)]
            sync_file = f"sync/sub-{p['id']}_ses-{ses}_recorder-sync.tsv"
            sync_files[sync_file] = "mark\tonset\n" + "".join(
                f"{i + 1}\t{t:.4f}\n" for i, t in enumerate(_recorder_times(off, ppm)))
            block = (f'[[session]]\nparticipant = "{p["id"]}"\nsession = "{ses}"\nperformance = "evening"\n'
                     f"[session.sync]                # recorder clock: offset {off:g} s, drift {ppm:+g} ppm\n"
                     f'frequency_hz = 1000\nduration_s = 0.05\nrecorder_file = "{sync_file}"\n')
            for f in physio.get((p["id"], ses), []):
                block += f'[[session.physio]]\nfile = "{f["file"]}"\nkind = "{f["kind"]}"\nlabel = "{f["label"]}"\n'
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
