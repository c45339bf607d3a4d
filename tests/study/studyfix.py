"""A tiny study for the runner tests: one rendered performance with two sync bursts, two
participants with their own recorder clocks (one session each).

The recording is made here with the project's renderer (``stimkit.render``) from the shorter
example score; each participant's recorder file holds the burst times on that participant's clock
(onset = offset + (1 + ppm 1e-6) recording), at the 0.1 ms resolution of a trigger channel.
"""

from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parents[2]
SCORE = ROOT / "example_scores" / "kites-at-dusk.musicxml"
SR = 22050
CLOCKS = {"a1": (5.5, 30.0), "b2": (61.25, -12.0)}


def write_tiny_study(folder: Path, *, clocks=CLOCKS, extra_sessions: str = "") -> Path:
    """Render the tiny study's recording (once per folder) and write ``study.toml``."""
    from stimkit.render import render_score, sync_click
    from stimkit.score.parse import load_score

    folder.mkdir(parents=True, exist_ok=True)
    rec = folder / "performance.flac"
    if not rec.exists():
        y, perf = render_score(load_score(SCORE), seed=11, sr=SR, start_s=3.0)
        end = y.size / SR + 1.5
        out = np.zeros(int((end + 1.0) * SR), dtype=np.float64)
        out[: y.size] += y
        click = sync_click(SR, kind="burst", freq_hz=1000.0, dur_s=0.05, level_db=-6.0)
        marks = [1.0, end]
        for t in marks:
            k = int(round(t * SR))
            out[k:k + click.size] += click
        out *= 0.95 / max(1.0, float(np.max(np.abs(out))))
        sf.write(rec, out.astype(np.float32), SR, subtype="PCM_16")
        (folder / "marks.txt").write_text(" ".join(f"{k / SR:.9f}" for k in
                                                   (int(round(t * SR)) for t in marks)))
    marks = [float(v) for v in (folder / "marks.txt").read_text().split()]
    sessions = []
    for pid, (off, ppm) in clocks.items():
        sync = folder / f"sync-{pid}.tsv"
        if not sync.exists():  # kept as it is when the folder already has one
            sync.write_text("onset\n" + "".join(f"{round(off + (1 + ppm * 1e-6) * t, 4):.4f}\n" for t in marks))
        sessions.append(f'[[session]]\nparticipant = "{pid}"\nsession = "1"\nperformance = "kites"\n'
                        f'[session.sync]\nfrequency_hz = 1000\nduration_s = 0.05\nrecorder_file = "sync-{pid}.tsv"\n')
    people = "".join(f'[[participant]]\nid = "{pid}"\nage = {40 + i}\n' for i, pid in enumerate(clocks))
    text = ('name = "tiny study"\nauthors = ["stimkit tests"]\ntask = "listening"\nseed = 7\n'
            '[[performance]]\nid = "kites"\nrecording = "performance.flac"\n'
            f'[[performance.piece]]\nscore = "{SCORE.name}"\n'
            + people + "".join(sessions) + extra_sessions)
    if not (folder / SCORE.name).exists():
        (folder / SCORE.name).write_bytes(SCORE.read_bytes())
    (folder / "study.toml").write_text(text)
    return folder / "study.toml"
