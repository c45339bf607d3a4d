"""The bundled demo session: a rendered recording with exact ground truth on the recorder clock.

What it builds
--------------
One mono recording of a short listening session, made only with the project's renderer
(:mod:`stimkit.render`) from the example scores:

====================  =========================================================
recording time        what sounds
====================  =========================================================
``SYNC_FIRST_S``      opening sync mark (tone burst)
``SPEECH``            a spoken-like introduction (synthetic babble)
piece 1               the first example score, performed expressively in a room
after piece 1         applause-like noise
piece 2               the second example score
after piece 2         a short pause, then the closing sync mark
====================  =========================================================

under a constant room tone. Beside it, the *recorder side*: the times the physiological recorder
logged for the two sync marks, on a clock that started ``CLOCK_OFFSET_S`` before the recording
and runs ``CLOCK_DRIFT_PPM`` fast (``onset = offset + (1 + ppm * 1e-6) * recording``), written
at the 0.1 ms resolution of a 10 kHz trigger channel.

:func:`render_scenario` returns the signal and the ground truth; :func:`write_scenario` writes
``demo-session.flac``, ``demo-session.toml``, ``demo-recorder-sync.tsv`` and the truth files
(``demo-truth.json``, ``demo-truth-boundaries.tsv``, ``demo-truth-notes.tsv``). Run it once with
``python -m stimkit.demo.scenario`` and commit the files: every seed is fixed, so rendering again
gives the same samples.

Conventions
-----------
``recording`` seconds from the first sample of ``demo-session.flac``; ``onset`` seconds on the
recorder clock. A boundary's true time is the performance's smooth ``score_qn -> recording``
map at the boundary's position (the renderer's ground truth, before per-note jitter); a piece
starts at its first sounding note and ends at the release of its last note.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["Scenario", "render_scenario", "write_scenario", "SCORES", "SR", "CLOCK_OFFSET_S",
           "CLOCK_DRIFT_PPM", "SYNC_FREQ_HZ", "SYNC_DUR_S"]

ROOT = Path(__file__).resolve().parents[2]
#: The example scores played, in order (relative to the repository root).
SCORES = ("example_scores/lanterns-over-the-weir.musicxml", "example_scores/kites-at-dusk.musicxml")
SR = 22050
SEED = 20261201
CLOCK_OFFSET_S = 7.25
CLOCK_DRIFT_PPM = 40.0
SYNC_FREQ_HZ = 1000.0
SYNC_DUR_S = 0.05
SYNC_FIRST_S = 1.0
SPEECH = (3.0, 11.0)
GAP_S = 1.5           # pause between speech / applause and the next piece
APPLAUSE_S = 6.0
CLOSING_PAUSE_S = 3.0
TAIL_S = 1.5
RECORDER_RESOLUTION_S = 1e-4


@dataclass
class Scenario:
    """The rendered session: samples, and the truth on both clocks."""

    y: np.ndarray
    sr: int
    sync_recording_s: list[float]
    pieces: list[dict]
    boundaries: pd.DataFrame
    notes: pd.DataFrame
    layout: list[dict] = field(default_factory=list)

    def onset(self, recording_s):
        return CLOCK_OFFSET_S + (1.0 + CLOCK_DRIFT_PPM * 1e-6) * np.asarray(recording_s, dtype=np.float64)


def _add(y: np.ndarray, x: np.ndarray, at: int) -> None:
    e = min(at + x.size, y.size)
    y[at:e] += x[: e - at]


def render_scenario(score_paths=None, *, sr: int = SR, seed: int = SEED) -> Scenario:
    """Render the session (see module notes); deterministic for fixed ``seed``."""
    from ..render import applause, babble, render_score, room_tone, sync_click
    from ..score.parse import load_score

    paths = [Path(p) if Path(p).is_absolute() else ROOT / p for p in (score_paths or SCORES)]
    scores = [load_score(p) for p in paths]
    parts = []          # (start_sample, samples)
    layout = []
    t = SYNC_FIRST_S
    click = sync_click(sr, kind="burst", freq_hz=SYNC_FREQ_HZ, dur_s=SYNC_DUR_S, level_db=-6.0)
    k_sync1 = int(round(t * sr))
    parts.append((k_sync1, click))
    layout.append({"what": "sync mark", "start_s": k_sync1 / sr, "end_s": k_sync1 / sr + SYNC_DUR_S})
    sp = babble(sr, SPEECH[1] - SPEECH[0], seed=seed + 10)
    k = int(round(SPEECH[0] * sr))
    parts.append((k, sp))
    layout.append({"what": "speech", "start_s": SPEECH[0], "end_s": SPEECH[1]})
    t = SPEECH[1] + GAP_S
    pieces, bounds, notes = [], [], []
    for i, (path, sc) in enumerate(zip(paths, scores)):
        y, perf = render_score(sc, seed=seed + 100 * (i + 1), sr=sr, timbre="piano", room=True)
        k0 = int(round(t * sr))
        t0 = k0 / sr
        parts.append((k0, y))
        n = perf.notes
        first = float(n["onset_s"].min()) + t0
        last = float(n["offset_s"].max()) + t0
        name = path.name.split(".")[0]
        tm = perf.timemap
        pieces.append({"piece": name, "score": str(path.relative_to(ROOT)) if path.is_relative_to(ROOT) else str(path),
                       "render_start_recording_s": t0, "start_recording_s": first, "end_recording_s": last,
                       "seed": seed + 100 * (i + 1), "performance": perf.settings,
                       # the smooth score_qn -> recording map of the performance, shifted into the session
                       "timemap": {"score_qn": tm.x.tolist(), "recording": (tm.y + t0).tolist()}})
        layout.append({"what": f"piece {name}", "start_s": first, "end_s": last})
        b = sc.boundaries[sc.boundaries["trial_type"] != "piece"].copy()
        if len(b):
            b.insert(0, "piece", name)
            b["recording"] = np.atleast_1d(perf.timemap(b["score_qn"].to_numpy(dtype=np.float64))) + t0
            bounds.append(b)
        nn = n[["score_qn", "pitch", "velocity", "measure", "beat", "onset_s", "offset_s"]].copy()
        nn.insert(0, "piece", name)
        nn["recording"] = nn.pop("onset_s") + t0
        nn["recording_end"] = nn.pop("offset_s") + t0
        notes.append(nn)
        t = t0 + perf.duration_s
        if i + 1 < len(paths):
            ap = applause(sr, APPLAUSE_S, seed=seed + 20 + i)
            parts.append((int(round(t * sr)), ap))
            layout.append({"what": "applause", "start_s": t, "end_s": t + APPLAUSE_S})
            t += APPLAUSE_S + GAP_S
    t += CLOSING_PAUSE_S
    k_sync2 = int(round(t * sr))
    parts.append((k_sync2, click))
    layout.append({"what": "sync mark", "start_s": k_sync2 / sr, "end_s": k_sync2 / sr + SYNC_DUR_S})
    total = k_sync2 + click.size + int(TAIL_S * sr)
    out = room_tone(sr, total / sr, level_db=-55.0, seed=seed + 1).astype(np.float64)
    for k, x in parts:
        _add(out, np.asarray(x, dtype=np.float64), k)
    peak = float(np.max(np.abs(out)))
    if peak > 0.98:  # keep clear of clipping; scaling does not move any time
        out *= 0.98 / peak
    return Scenario(y=out.astype(np.float32), sr=sr, sync_recording_s=[k_sync1 / sr, k_sync2 / sr],
                    pieces=pieces, boundaries=pd.concat(bounds, ignore_index=True) if bounds else pd.DataFrame(),
                    notes=pd.concat(notes, ignore_index=True), layout=layout)


SESSION_TOML = """\
# The bundled demo session (see docs/session-and-outputs.md). Paths are relative to this file.
recording = "demo-session.flac"
output = "../demo-output"
feature_rate_hz = 10

[bids]
subject = "demo"
session = "1"
task = "listening"
run = 1

# two {dur_ms:g} ms tone bursts at {freq:g} Hz, logged by the recorder's trigger channel
[sync]
frequency_hz = {freq:g}
duration_s = {dur:g}
recorder_file = "demo-recorder-sync.tsv"
recorder_column = "onset"

# no start times given: the pieces are found in the recording
{pieces}"""


def write_scenario(out_dir=None, *, score_paths=None) -> list[Path]:
    """Render and write the demo files into ``out_dir`` (default ``example_audio/``)."""
    import soundfile as sf

    from ..export.tables import OutputSet, to_json_text

    out = Path(out_dir) if out_dir is not None else ROOT / "example_audio"
    out.mkdir(parents=True, exist_ok=True)
    sc = render_scenario(score_paths)
    slope = 1.0 + CLOCK_DRIFT_PPM * 1e-6
    rec_sync = np.round(sc.onset(sc.sync_recording_s) / RECORDER_RESOLUTION_S) * RECORDER_RESOLUTION_S
    sync_tsv = "mark\tonset\n" + "".join(f"{i + 1}\t{t:.4f}\n" for i, t in enumerate(rec_sync))
    pieces_toml = "".join(
        f'[[piece]]\nscore = "../{p["score"]}"\nname = "{p["piece"]}"\n\n' for p in sc.pieces)
    b = sc.boundaries.copy()
    b["onset"] = sc.onset(b["recording"])
    notes = sc.notes.copy()
    notes["onset"] = sc.onset(notes["recording"])
    truth = {
        "description": "Ground truth of the demo session, from the renderer (stimkit.demo.scenario).",
        "sample_rate_hz": sc.sr,
        "clock": {"offset_s": CLOCK_OFFSET_S, "drift_ppm": CLOCK_DRIFT_PPM, "slope": slope,
                  "formula": "onset = offset_s + slope * recording",
                  "recorder_resolution_s": RECORDER_RESOLUTION_S},
        "sync_marks": [{"recording_s": r, "onset_s": float(sc.onset(r)), "recorder_logged_s": float(p),
                        "frequency_hz": SYNC_FREQ_HZ, "duration_s": SYNC_DUR_S}
                       for r, p in zip(sc.sync_recording_s, rec_sync)],
        "pieces": [{**{k: v for k, v in p.items() if k not in ("performance", "timemap")},
                    "start_onset_s": float(sc.onset(p["start_recording_s"])),
                    "end_onset_s": float(sc.onset(p["end_recording_s"])),
                    "performance": p["performance"], "timemap": p["timemap"]} for p in sc.pieces],
        "layout": sc.layout,
    }
    from ..export.tables import format_tsv

    buf = __import__("io").BytesIO()
    sf.write(buf, sc.y, sc.sr, format="FLAC", subtype="PCM_16")
    with OutputSet(out) as outs:
        outs.write_bytes("demo-session.flac", buf.getvalue())
        outs.write_text("demo-recorder-sync.tsv", sync_tsv)
        outs.write_text("demo-session.toml", SESSION_TOML.format(
            freq=SYNC_FREQ_HZ, dur=SYNC_DUR_S, dur_ms=SYNC_DUR_S * 1000, pieces=pieces_toml))
        outs.write_text("demo-truth.json", to_json_text(truth, decimals=9))
        outs.write_text("demo-truth-boundaries.tsv", format_tsv(b, float_format="%.6f"))
        outs.write_text("demo-truth-notes.tsv", format_tsv(notes, float_format="%.6f"))
    return list(outs.committed)


if __name__ == "__main__":  # pragma: no cover
    for p in write_scenario():
        print(p)
