"""Benchmark: ``stimkit plan`` on the largest corpus score against music21's bare parse.

Both sides parse the same file from its path with music21's pickle cache off
(``forceSource=True`` for the bare parse; ``load_score`` never uses the cache). Runs alternate
(bare, plan, bare, plan, ...) so both see the same machine load; each side reports the best of
``REPEATS`` runs, as wall time and as CPU time of the process (CPU time is the fairer figure on
a shared machine). Prints both, the ratios (goal <= 1.3x) and the peak memory of the process.
Run by hand: ``python bench/bench_plan.py``.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

REPEATS = 5
WORK = "beethoven/opus18no1/movement1.mxl"


def timed(fn):
    w0, c0 = time.perf_counter(), time.process_time()
    fn()
    return time.perf_counter() - w0, time.process_time() - c0


def main() -> int:
    from music21 import converter, corpus

    from stimkit.score.plan import make_plan

    path = Path(str(corpus.getWork(WORK)))
    # warm imports on both sides (music21 modules, pandas) before timing
    converter.parse(str(path), forceSource=True)
    with tempfile.TemporaryDirectory() as d:
        make_plan([path], out_dir=Path(d) / "warm")
        bare, plan = [], []
        for k in range(REPEATS):
            bare.append(timed(lambda: converter.parse(str(path), forceSource=True)))
            plan.append(timed(lambda: make_plan([path], out_dir=Path(d) / f"o{k}")))
    bw, bc = min(b[0] for b in bare), min(b[1] for b in bare)
    pw, pc = min(p[0] for p in plan), min(p[1] for p in plan)
    try:
        import resource

        peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    except Exception:  # pragma: no cover
        peak_mb = float("nan")
    sys.stdout.write(f"file: {WORK}\n")
    sys.stdout.write(f"music21 bare parse (forceSource=True): wall {bw:.3f} s, cpu {bc:.3f} s\n")
    sys.stdout.write(f"stimkit plan (parse, boundaries, tempo map, writes): wall {pw:.3f} s, cpu {pc:.3f} s\n")
    sys.stdout.write(f"ratio plan / bare parse: cpu {pc / bc:.2f}x, wall {pw / bw:.2f}x (goal <= 1.3x)\n")
    sys.stdout.write(f"peak memory of the process: {peak_mb:.0f} MB\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
