"""Benchmark: `stimkit annotate` on a long session, whole process, against reading the recording
once, measured in the same run; checks the limits the README states for long sessions.

Run by hand: ``.venv/bin/python bench/bench_session.py [--hours 2] [--rest-s 600] [--keep DIR]``.

1. Builds a session from the bundled demo (``example_audio/demo-session.flac``, the project's own
   rendering): a sync burst at 1 s, a baseline of room tone, then blocks of the demo's programme
   (spoken introduction, the two example pieces, applause) each followed by ``--rest-s`` of room
   tone, until ``--hours``; a closing sync burst 5 s before the end. The file is a 44.1 kHz
   stereo FLAC (the demo upsampled by 2, both channels alike), written block by block. The
   session file lists every piece played as its own ``[[piece]]`` (no start times: they are
   found), with the recorder times of the two bursts on a clock 7.25 s ahead and 40 ppm fast.
2. Runs, each in its own process (started by ``posix_spawn``) whose peak RSS and CPU time come
   from ``os.wait4``:
   - ``stimkit annotate SESSION -o DIR`` (the whole process: imports, JIT, the outputs written);
   - the floor: decoding the recording once in 10 s blocks with soundfile (what any tool that
     reads the file must do);
   - ``stimkit features`` alone on the same file (the audio stage of the chain), for scale.
3. Prints wall and CPU times, peak memories and the ratios; checks every piece was found within
   0.5 s of where it was placed (the task's accuracy bound for piece starts), and that the
   annotate run stays within :data:`LIMIT_PEAK_MB` and :data:`LIMIT_CPU_S_PER_HOUR` (the figures
   the README states). Exits 1 when a check fails.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "example_audio"
SR = 44100
#: Part of the demo recording used as one programme block (recording seconds): from just before
#: the spoken introduction (3.0 s) to just after the second piece (ends 250.7 s); the demo's own
#: sync bursts (1.0 s and 255.2 s) are left out.
BLOCK = (2.5, 252.0)
CLOCK_OFFSET_S, CLOCK_PPM = 7.25, 40.0

#: Limits stated in the README for long sessions (44.1 kHz stereo recording): peak memory of the
#: whole annotate process, and CPU seconds per hour of recording (CPU, not wall: the machines this
#: runs on are shared; the wall time on a quiet 2-core machine is printed beside it).
LIMIT_PEAK_MB = 1500.0
LIMIT_CPU_S_PER_HOUR = 240.0

CHILD_FLOOR = r"""
import sys, soundfile as sf
n = 0
for b in sf.blocks(sys.argv[1], blocksize=441000, dtype="float32"):
    n += b.shape[0]
print(n)
"""


def build(folder: Path, *, hours: float, rest_s: float) -> tuple[Path, list[tuple[str, float]]]:
    """Write the recording, the session file and return (session path, [(piece, true start s)])."""
    from scipy.signal import resample_poly

    from stimkit.render.sounds import room_tone, sync_click

    truth = json.loads((DEMO / "demo-truth.json").read_text())
    demo, sr0 = sf.read(DEMO / "demo-session.flac", dtype="float32")
    block = demo[int(BLOCK[0] * sr0):int(BLOCK[1] * sr0)]
    block = resample_poly(block, SR // sr0, 1).astype(np.float32)
    total = int(hours * 3600 * SR)
    burst = sync_click(SR, kind="burst", freq_hz=1000.0, dur_s=0.05, level_db=-6.0)
    marks = [1.0, hours * 3600 - 5.0]
    starts = [(p["piece"], p["start_recording_s"] - BLOCK[0]) for p in truth["pieces"]]
    rec = folder / "long-session.flac"
    placed: list[tuple[str, float]] = []
    pieces_toml = []
    with sf.SoundFile(rec, "w", samplerate=SR, channels=2, subtype="PCM_16") as fh:
        pos = 0
        seed = 0

        def rest(seconds):
            nonlocal pos, seed
            left = min(int(seconds * SR), total - pos)
            while left > 0:
                n = min(left, 60 * SR)
                x = room_tone(SR, n / SR, level_db=-55.0, seed=seed)[:n]
                seed += 1
                for m in marks:  # a sync burst falling in this stretch
                    k = int(round(m * SR)) - pos
                    if 0 <= k < x.size:
                        x[k:k + burst.size] += burst[:x.size - k]
                fh.write(np.column_stack([x, x]))
                pos += x.size
                left -= x.size

        rest(300.0)                                   # baseline
        k = 0
        while pos + block.size + int(10 * SR) < total:
            k += 1
            t0 = pos / SR
            fh.write(np.column_stack([block, block]))
            pos += block.size
            for name, s in starts:
                placed.append((f"{name}-{k}", t0 + s))
                pieces_toml.append(f'[[piece]]\nscore = "{ROOT / "example_scores" / (name + ".musicxml")}"\n'
                                   f'name = "{name}-{k}"\n')
            rest(rest_s)
        rest(total)                                   # to the end, with the closing burst
    recorder = [CLOCK_OFFSET_S + (1 + CLOCK_PPM * 1e-6) * m for m in marks]
    session = folder / "long-session.toml"
    session.write_text(
        f'recording = "{rec.name}"\noutput = "out"\nfeature_rate_hz = 10\n'
        f'[bids]\nsubject = "bench"\nsession = "1"\ntask = "listening"\nrun = 1\n'
        f'[sync]\nfrequency_hz = 1000\nduration_s = 0.05\n'
        f'recorder_times_s = [{recorder[0]:.4f}, {recorder[1]:.4f}]\n\n' + "\n".join(pieces_toml),
        encoding="utf-8")
    return session, placed


def measure(cmd: list[str]) -> dict:
    """Run ``cmd``; wall seconds, CPU seconds and peak RSS (MB) of that process alone.

    Started with ``posix_spawn`` (no fork of this process: with a fork, the child's peak RSS
    would count this process's pages until the exec, and ``ru_maxrss`` keeps that peak)."""
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        t0 = time.perf_counter()
        pid = os.posix_spawn(cmd[0], cmd, dict(os.environ),
                             file_actions=[(os.POSIX_SPAWN_DUP2, out.fileno(), 1),
                                           (os.POSIX_SPAWN_DUP2, err.fileno(), 2)])
        _, status, ru = os.wait4(pid, 0)
        wall = time.perf_counter() - t0
        out.seek(0)
        err.seek(0)
        return {"seconds": wall, "cpu_s": ru.ru_utime + ru.ru_stime, "peak_rss_mb": ru.ru_maxrss / 1024.0,
                "code": os.waitstatus_to_exitcode(status), "stdout": out.read().decode(errors="replace"),
                "stderr": err.read().decode(errors="replace")}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--hours", type=float, default=2.0)
    ap.add_argument("--rest-s", type=float, default=600.0, help="room tone after each programme block")
    ap.add_argument("--keep", type=Path, help="build (or reuse) the session in this folder")
    args = ap.parse_args()
    folder = args.keep or Path(tempfile.mkdtemp(prefix="stimkit-bench-session-"))
    folder.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    session, placed = build(folder, hours=args.hours, rest_s=args.rest_s)
    rec = folder / "long-session.flac"
    info = sf.info(str(rec))
    print(f"session: {info.duration / 3600:.2f} h, {info.samplerate} Hz, {info.channels} channels, "
          f"{rec.stat().st_size / 1e6:.0f} MB FLAC, {len(placed)} pieces (built in {time.perf_counter() - t0:.0f} s)")

    py = sys.executable
    ann = measure([py, "-m", "stimkit.cli", "annotate", str(session), "-o", str(folder / "out")])
    if ann["code"] != 0:
        print(ann["stderr"])
        return 1
    floor = measure([py, "-c", CHILD_FLOOR, str(rec)])
    feat = measure([py, "-m", "stimkit.cli", "features", str(rec), "-o", str(folder / "feat"), "--rate", "10"])

    hours = info.duration / 3600
    rows = [("annotate (whole chain)", ann), ("features only", feat), ("floor: decode once", floor)]
    print(f"{'':26s} {'wall s':>8s} {'CPU s':>8s} {'peak MB':>8s} {'wall / floor':>13s}")
    for name, r in rows:
        print(f"{name:26s} {r['seconds']:8.1f} {r['cpu_s']:8.1f} {r['peak_rss_mb']:8.0f} "
              f"{r['seconds'] / floor['seconds']:13.1f}")
    per_hour = ann["cpu_s"] / hours
    print(f"annotate: {ann['seconds'] / hours:.0f} wall s and {per_hour:.0f} CPU s per hour of recording; "
          f"limits (README): {LIMIT_CPU_S_PER_HOUR:.0f} CPU s per hour, {LIMIT_PEAK_MB:.0f} MB")

    import pandas as pd

    events = next((folder / "out").rglob("*_events.tsv"))
    ev = pd.read_csv(events, sep="\t", na_values=["n/a"], keep_default_na=False)
    got = ev[ev.trial_type == "piece"].set_index("piece")["recording"]
    errs = [abs(float(got.get(name, np.nan)) - t) for name, t in placed]
    found = int(np.sum(np.isfinite(errs)))
    worst = float(np.nanmax(errs)) if found else float("nan")
    print(f"pieces found: {found} of {len(placed)}; largest start error {worst * 1000:.0f} ms")

    ok = True
    if found < len(placed) or not worst <= 0.5:
        print("FAIL: a piece was not found within 0.5 s of where it was placed")
        ok = False
    if ann["peak_rss_mb"] > LIMIT_PEAK_MB:
        print(f"FAIL: peak memory {ann['peak_rss_mb']:.0f} MB > {LIMIT_PEAK_MB:.0f} MB")
        ok = False
    if per_hour > LIMIT_CPU_S_PER_HOUR:
        print(f"FAIL: {per_hour:.0f} CPU s per hour > {LIMIT_CPU_S_PER_HOUR:.0f} s")
        ok = False
    print("within the stated limits" if ok else "outside the stated limits")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
