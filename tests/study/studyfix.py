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
        physio = _write_beats(folder, pid, off, ppm, bids=(pid == "b2"))
        sessions.append(f'[[session]]\nparticipant = "{pid}"\nsession = "1"\nperformance = "kites"\n'
                        f'[session.sync]\nfrequency_hz = 1000\nduration_s = 0.05\nrecorder_file = "sync-{pid}.tsv"\n'
                        f'[[session.physio]]\nfile = "{physio}"\nkind = "rr"\nlabel = "heart"\n')
    people = "".join(f'[[participant]]\nid = "{pid}"\nage = {40 + i}\n' for i, pid in enumerate(clocks))
    text = ('name = "tiny study"\nauthors = ["stimkit tests"]\ntask = "listening"\nseed = 7\n'
            "[analysis]\npseudo_boundaries = 49\nshare_sets = 49\nsurrogates = 19\n"
            '[[performance]]\nid = "kites"\nrecording = "performance.flac"\n'
            f'[[performance.piece]]\nscore = "{SCORE.name}"\n'
            + people + "".join(sessions) + extra_sessions)
    if not (folder / SCORE.name).exists():
        (folder / SCORE.name).write_bytes(SCORE.read_bytes())
    (folder / "study.toml").write_text(text)
    return folder / "study.toml"


def _write_beats(folder: Path, pid: str, off: float, ppm: float, *, bids: bool) -> str:
    """A simulated beat-interval series (820 ms + AR(1) noise, phi 0.5, SD 25 ms) over the whole
    recording on the participant's clock: a plain beat table, or BIDS physio (value at beat)."""
    import gzip
    import json

    rng = np.random.default_rng(sum(map(ord, pid)))
    dur = sf.info(folder / "performance.flac").duration
    t, x, noise, now = [], [], 0.0, 0.3
    while now < dur - 0.3:
        noise = 0.5 * noise + rng.normal(0.0, 25.0 * np.sqrt(0.75))
        v = 820.0 + noise
        now += v / 1000.0
        t.append(off + (1 + ppm * 1e-6) * now)
        x.append(round(v, 1))
    if not bids:
        name = f"beats-{pid}.tsv"
        (folder / name).write_text("beat_time\trr\n" + "".join(f"{a:.4f}\t{b:.1f}\n" for a, b in zip(t, x)))
        return name
    fs, start = 500.0, float(np.floor(t[0]) - 1.0)
    k = np.round((np.asarray(t) - start) * fs).astype(int)
    col = np.zeros(k[-1] + 10)
    col[k] = x
    name = f"sub-{pid}_physio.tsv.gz"
    (folder / name).write_bytes(gzip.compress("".join("0\n" if v == 0 else f"{v:.1f}\n" for v in col).encode(), mtime=0))
    (folder / name.replace(".tsv.gz", ".json")).write_text(json.dumps(
        {"SamplingFrequency": fs, "StartTime": start, "Columns": ["rr"], "rr": {"Units": "ms"}}))
    return name
