"""Benchmark: a study of >= 12 sessions, serial vs local processes vs a Dask LocalCluster.

The demo study scaled up: ``--participants`` (default 6) invented participants x 2 sessions, every
session hearing its own performance (the bundled recording at a slightly different gain per
performance, so each is a distinct recording that must be analysed: no sharing), each participant
on their own recorder clock with a simulated beat-interval series analysed as in the demo
(``stimkit.demo.study.simulate_beats``: slower, faster or no response after the rehearsal marks). The same study runs three times into fresh folders:

1. serial: every job in this process (``workers = 1``), the naive approach;
2. local processes: ``ProcessPoolExecutor`` with ``--workers`` (default 2) processes;
3. a ``dask.distributed.LocalCluster`` with ``--workers`` worker processes, one thread each.

It prints wall time and the CPU time of the jobs (measured inside the workers), the speed-up of 2
and 3 over 1 (goal >= 1.8x on 2 cores) beside the ideal one from the jobs' CPU (serial CPU over the
busiest worker's), the load average around each run, the peak resident memory of each worker
process (``resource.getrusage`` inside the worker after each job) and checks that the three
output folders are byte-identical.

Run: ``.venv/bin/python bench/bench_study.py [--participants 6] [--workers 2]``. The machine
should be quiet: speed-ups on a shared machine are not meaningful (repeat the run).
"""

from __future__ import annotations

import argparse
import concurrent.futures as cf
import io
import logging
import os
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _measured(fn, *args):
    """Run a job and add the worker's pid, the job's CPU and wall time and the worker's peak
    resident memory (MB) to its result."""
    c0, t0 = time.process_time(), time.perf_counter()
    out = fn(*args)
    out["_cpu"] = time.process_time() - c0
    out["_wall"] = time.perf_counter() - t0
    out["_pid"] = os.getpid()
    out["_peak_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return out


class Measuring(cf.Executor):
    """Wraps an executor so every job reports where it ran and the worker's peak memory."""

    def __init__(self, inner):
        self.inner = inner
        self.reports: list[dict] = []

    def submit(self, fn, /, *args, **kwargs):
        f = self.inner.submit(_measured, fn, *args)
        f.add_done_callback(lambda fut: self.reports.append(fut.result()) if not fut.exception() else None)
        return f


def build(folder: Path, participants: int) -> Path:
    """Write the scaled demo study (see module notes) into ``folder``; returns the study file."""
    import soundfile as sf

    from stimkit.demo import study as demo

    folder.mkdir(parents=True, exist_ok=True)
    y, sr = sf.read(demo.RECORDING, dtype="float32")
    scores = []
    from stimkit.demo.scenario import SCORES

    for s in SCORES:
        (folder / Path(s).name).write_bytes((ROOT / s).read_bytes())
        scores.append(Path(s).name)
    perf, people, sessions = [], [], []
    rng = np.random.default_rng(5)
    k = 0
    for i in range(participants):
        pid = f"b{i + 1:02d}"
        people.append(f'[[participant]]\nid = "{pid}"\nage = {30 + 3 * i}\n')
        for ses in ("1", "2"):
            k += 1
            gain = 0.96 ** k
            name = f"performance-{k:02d}.flac"
            buf = io.BytesIO()
            sf.write(buf, y * gain, sr, format="FLAC", subtype="PCM_16")
            (folder / name).write_bytes(buf.getvalue())
            perf.append(f'[[performance]]\nid = "perf{k:02d}"\nrecording = "{name}"\n'
                        + "".join(f'[[performance.piece]]\nscore = "{s}"\n' for s in scores))
            off, ppm = float(rng.uniform(0, 60)), float(rng.uniform(-50, 50))
            times = ", ".join(f"{t:.4f}" for t in demo._recorder_times(off, ppm))
            t, rr = demo.simulate_beats(pid, ses, clock=(off, ppm), sign=(1, -1, 0)[i % 3])
            beats = f"beats-{pid}-{ses}.tsv"
            (folder / beats).write_text("beat_time\trr\n" + "".join(f"{a:.4f}\t{b:.1f}\n" for a, b in zip(t, rr)))
            sessions.append(f'[[session]]\nparticipant = "{pid}"\nsession = "{ses}"\nperformance = "perf{k:02d}"\n'
                            f"[session.sync]\nfrequency_hz = 1000\nduration_s = 0.05\nrecorder_times_s = [{times}]\n"
                            f'[[session.physio]]\nfile = "{beats}"\nkind = "rr"\nlabel = "heart"\n')
    text = ('name = "bench study"\ntask = "listening"\nseed = 3\n'
            "[analysis]\npseudo_boundaries = 199\nshare_sets = 199\nsurrogates = 99\n"
            + "".join(perf) + "".join(people) + "".join(sessions))
    (folder / "study.toml").write_text(text)
    return folder / "study.toml"


def _tree(root: Path) -> dict:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*"))
            if p.is_file() and ".stimkit-study" not in p.parts}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--participants", type=int, default=6, help="participants (2 sessions each; default 6 -> 12)")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args()

    from distributed import LocalCluster

    from stimkit.study import load_study, run_study
    from stimkit.study.runner import SerialExecutor

    tmp = Path(tempfile.mkdtemp(prefix="bench-study-"))
    study = build(tmp / "inputs", args.participants)
    n = len(load_study(study).sessions)
    print(f"study: {n} sessions, {n} distinct performances ({tmp})")
    results = {}

    def run(label, make_executor):
        out = tmp / label
        load0 = os.getloadavg()[0]
        with make_executor() as ex:
            m = Measuring(ex)
            t0 = time.perf_counter()
            r = run_study(load_study(study, out_dir=out), executor=m)
            wall = time.perf_counter() - t0
        assert not r.failed, [(o.name, o.reason) for o in r.failed]
        peaks, busy = {}, {}
        for rep in m.reports:
            peaks[rep["_pid"]] = max(peaks.get(rep["_pid"], 0.0), rep["_peak_mb"])
            busy[rep["_pid"]] = busy.get(rep["_pid"], 0.0) + rep["_cpu"]
        cpu = sum(busy.values())
        results[label] = (wall, cpu, peaks, out, max(busy.values()))
        print(f"{label:>16}: {wall:7.1f} s wall, {cpu:7.1f} s CPU in jobs ({len(busy)} worker(s): "
              + ", ".join(f"{v:.0f}" for v in sorted(busy.values())) + " s), "
              f"{len(r.computed)} sessions; peak RSS per worker: "
              + ", ".join(f"{v:.0f} MB" for v in sorted(peaks.values()))
              + f"; load average {load0:.1f} -> {os.getloadavg()[0]:.1f}")

    class _Serial:
        def __enter__(self):
            return SerialExecutor()

        def __exit__(self, *exc):
            return False

    class _Pool:
        def __enter__(self):
            import multiprocessing

            self.ex = cf.ProcessPoolExecutor(max_workers=args.workers, mp_context=multiprocessing.get_context("spawn"))
            return self.ex

        def __exit__(self, *exc):
            self.ex.shutdown(wait=True)
            return False

    class _Dask:
        def __enter__(self):
            from distributed import Client

            self.cluster = LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                        dashboard_address=None, silence_logs=logging.ERROR)
            self.client = Client(self.cluster)
            return self.client.get_executor(pure=False)

        def __exit__(self, *exc):
            self.client.close()
            self.cluster.close()
            return False

    run("serial", _Serial)
    run("local processes", _Pool)
    run("LocalCluster", _Dask)
    base = results["serial"][0]
    for label in ("local processes", "LocalCluster"):
        wall, cpu, _, _, busiest = results[label]
        print(f"speed-up {label} over serial: {base / wall:.2f}x wall (goal >= 1.8x on {args.workers} cores); "
              f"job CPU {results['serial'][1]:.0f} s serial vs {cpu:.0f} s, busiest worker {busiest:.0f} s "
              f"(ideal speed-up on free cores {results['serial'][1] / busiest:.2f}x)")
    print("on a machine shared with other work, wall-clock ratios measure the contention as much as the "
          "runner: quote them with the load averages above, and repeat on a quiet machine")
    trees = {k: _tree(v[3]) for k, v in results.items()}
    same = all(trees[k] == trees["serial"] for k in trees)
    print(f"outputs byte-identical across the three runs: {same}")
    if not args.keep:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
