"""Benchmark: `stimkit features` (streaming) against the naive whole-file approach, same run.

Run by hand: ``.venv/bin/python bench/bench_features.py [--minutes 30] [--flat 10 60] [--keep DIR]``.

1. Generates a synthetic 44.1 kHz stereo FLAC (drum patterns at changing tempi, chord
   progressions, slow dynamics, a few pauses), written block by block.
2. Runs, each in its own subprocess (so each side's peak RSS is its own, read with
   ``resource.getrusage(RUSAGE_SELF)`` at the end of the child):
   - stimkit: ``stimkit.cli.main(["features", FILE, "-o", DIR])`` (all features, files written);
   - naive: ``librosa.load(sr=22050)`` (whole file, resampled), ``librosa.stft``,
     ``onset_strength`` + frame-wise ``tempo``, ``chroma_stft``, ``spectral_centroid``, and
     pyloudnorm's integrated loudness on the whole file read with ``soundfile.read``.
3. Alternates the two sides ``--repeat`` times (the machine's load changes) and prints the median
   wall and CPU times, their ratios and both peak memories; then stimkit alone on a short and a
   long file to show that its memory does not grow with length.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

SR = 44100

CHILD = r"""
import json, resource, sys, time
t0 = time.perf_counter()
kind, path, out = sys.argv[1], sys.argv[2], sys.argv[3]
if kind == "stimkit":
    from stimkit.cli import main
    code = main(["features", path, "-o", out])
    assert code == 0, code
else:
    import numpy as np, librosa, pyloudnorm, soundfile as sf
    y, sr = librosa.load(path, sr=22050, mono=True)
    S = np.abs(librosa.stft(y))
    onset = librosa.onset.onset_strength(y=y, sr=sr)
    tempo = librosa.feature.tempo(onset_envelope=onset, sr=sr, aggregate=None)
    chroma = librosa.feature.chroma_stft(y=y, sr=sr)
    centroid = librosa.feature.spectral_centroid(S=S, sr=sr)
    data, rate = sf.read(path)
    lufs = pyloudnorm.Meter(rate, filter_class="DeMan").integrated_loudness(data)
elapsed = time.perf_counter() - t0
ru = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps({"seconds": elapsed, "cpu_s": ru.ru_utime + ru.ru_stime,
                  "peak_rss_mb": ru.ru_maxrss / 1024.0}))
"""


def _block(k: int, block_s: float, rng: np.random.Generator) -> np.ndarray:
    """One block of synthetic music, deterministic in (k, seed)."""
    n = int(block_s * SR)
    t0 = k * block_s
    t = t0 + np.arange(n) / SR
    section = int(t0 // 40)
    bpm = 70 + (section * 37) % 110
    beat = 60.0 / bpm
    y = np.zeros(n)
    # drums
    nk = int(0.15 * SR)
    tt = np.arange(nk) / SR
    kick = np.sin(2 * np.pi * np.cumsum(60 + 80 * np.exp(-tt * 30)) / SR) * np.exp(-tt * 20)
    snare = rng.standard_normal(nk) * np.exp(-tt * 35) * 0.4
    first = int(np.ceil(t0 / beat))
    for b in range(first, int((t0 + block_s) / beat) + 1):
        i = int(round((b * beat - t0) * SR))
        if 0 <= i < n:
            src = kick if b % 2 == 0 else snare
            m = min(nk, n - i)
            y[i:i + m] += src[:m]
    # chords: one per two beats, pitch classes from a rotating progression
    prog = [[0, 4, 7], [5, 9, 12], [7, 11, 14], [9, 12, 16]]
    idx = np.floor(t / (2 * beat)).astype(int) % 4
    for voice in range(3):
        pcs = np.array([p[voice] for p in prog])[idx] + (section % 12)
        f = 220.0 * 2 ** (pcs / 12.0)
        phase = 2 * np.pi * np.cumsum(f) / SR + voice
        y += 0.08 * (np.sin(phase) + 0.5 * np.sin(2 * phase) + 0.25 * np.sin(3 * phase))
    dyn = 0.3 + 0.7 * np.sin(2 * np.pi * t / 97.0) ** 2
    y *= dyn
    y[(t % 300) > 296] = 0.0  # a 4 s pause every 5 minutes
    left = 0.45 * y
    right = 0.45 * np.roll(y, 17) * 0.9
    return np.stack([left, right], axis=1)


def make_recording(path: Path, minutes: float, *, block_s: float = 10.0) -> Path:
    if path.exists():
        return path
    rng = np.random.default_rng(7)
    tmp = path.with_suffix(".part.flac")
    with sf.SoundFile(tmp, "w", samplerate=SR, channels=2, format="FLAC", subtype="PCM_16") as fh:
        for k in range(int(np.ceil(minutes * 60 / block_s))):
            fh.write(np.clip(_block(k, block_s, rng), -1, 1))
    tmp.rename(path)
    return path


def run(kind: str, path: Path, out: Path) -> dict:
    proc = subprocess.run([sys.executable, "-c", CHILD, kind, str(path), str(out)],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"{kind} failed:\n{proc.stderr[-2000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=30.0)
    ap.add_argument("--flat", type=float, nargs=2, default=(10.0, 60.0), metavar=("SHORT", "LONG"))
    ap.add_argument("--repeat", type=int, default=3, help="alternating runs of each side")
    ap.add_argument("--keep", type=Path, default=None, help="folder for the generated files (kept)")
    args = ap.parse_args()
    work = args.keep or Path(tempfile.mkdtemp(prefix="stimkit-bench-"))
    work.mkdir(parents=True, exist_ok=True)

    t = time.perf_counter()
    main_file = make_recording(work / f"bench_{args.minutes:g}min.flac", args.minutes)
    print(f"generated {main_file.name} ({main_file.stat().st_size / 1e6:.0f} MB) in {time.perf_counter() - t:.0f} s")
    run("stimkit", main_file, work / "warm")  # compile-once numba caches, file in page cache
    # alternate the two sides so that a change in machine load hits both; report the medians
    ours_runs, naive_runs = [], []
    for _ in range(args.repeat):
        ours_runs.append(run("stimkit", main_file, work / "out"))
        naive_runs.append(run("naive", main_file, work / "out-naive"))
    med = lambda runs, k: float(np.median([r[k] for r in runs]))
    ours = {k: med(ours_runs, k) for k in ours_runs[0]}
    naive = {k: med(naive_runs, k) for k in naive_runs[0]}
    print(f"{args.minutes:g} min, 44.1 kHz stereo FLAC (median of {args.repeat} alternating runs)")
    for label, r in (("stimkit features (streaming, all features)", ours),
                     ("naive (whole file, librosa + pyloudnorm)  ", naive)):
        print(f"  {label}: wall {r['seconds']:6.1f} s  cpu {r['cpu_s']:6.1f} s  peak RSS {r['peak_rss_mb']:6.0f} MB")
    print(f"  speed ratio naive / stimkit: wall {naive['seconds'] / ours['seconds']:.2f}x, "
          f"cpu {naive['cpu_s'] / ours['cpu_s']:.2f}x;  memory ratio {naive['peak_rss_mb'] / ours['peak_rss_mb']:.2f}x")
    print("  per-run wall s (stimkit / naive): " + ", ".join(
        f"{a['seconds']:.1f}/{b['seconds']:.1f}" for a, b in zip(ours_runs, naive_runs)))

    short, long_ = args.flat
    res = {}
    for m in (short, long_):
        f = make_recording(work / f"bench_{m:g}min.flac", m)
        res[m] = run("stimkit", f, work / f"out-{m:g}")
        print(f"  stimkit on {m:g} min: wall {res[m]['seconds']:6.1f} s  cpu {res[m]['cpu_s']:6.1f} s  "
              f"peak RSS {res[m]['peak_rss_mb']:6.0f} MB")
    print(f"  peak RSS {long_:g} min / {short:g} min: {res[long_]['peak_rss_mb'] / res[short]['peak_rss_mb']:.2f}")
    if args.keep is None:
        for p in sorted(work.rglob("*"), reverse=True):
            p.unlink() if p.is_file() else p.rmdir()
        work.rmdir()


if __name__ == "__main__":
    main()
