"""Benchmark of the score-to-recording alignment (run by hand: ``python bench/bench_align.py``).

1. A 30-minute rendering (several music21 corpus pieces and the project's example scores, played
   one after another, each later round transposed so that no stretch repeats) is aligned with
   :func:`stimkit.align.run.align_score` in a fresh subprocess: whole-run time, DTW time and the
   subprocess's peak RSS.
2. On a 5-minute stretch of the same kind, the same features are aligned (a) by our multiscale
   DTW and (b) by librosa's full DTW at 10 Hz (``librosa.sequence.dtw``, full cost and step
   matrices -- the naive approach); time, peak memory and note-onset accuracy of both in the same run.

Targets (task): DTW <= 5 s and whole align <= 20 s with peak RSS <= 1 GB for 30 minutes.
"""

from __future__ import annotations

import pickle
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import soundfile as sf

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

SR = 22050
PIECES = [
    ROOT / "example_scores" / "lanterns-over-the-weir.musicxml",
    "beach/prayer_of_a_tired_child.musicxml",
    ROOT / "example_scores" / "kites-at-dusk.musicxml",
    "schumann_clara/polonaise_op1n4.mxl",
    "joplin/maple_leaf_rag.mxl",
    "mozart/k545/movement1_exposition.mxl",
]


def _load(src):
    from stimkit.score.parse import load_score

    if isinstance(src, Path):
        return load_score(src)
    import music21

    return load_score(music21.corpus.getWork(src))


def concatenate(scores, *, target_s: float, gap_qn: float = 4.0):
    """One ScoreModel made of ``scores`` played in turn (rounds transposed) up to ``target_s``."""
    from stimkit.score.model import ScoreModel
    from stimkit.timemap import TimeMap

    notes, meas, kx, ky = [], [], [0.0], [0.0]
    qn0, t0, bar0, rnd = 0.0, 0.0, 0, 0
    shifts = [0, 3, -4, 5, -2]
    while t0 < target_s:
        for s in scores:
            if t0 >= target_s:
                break
            n = s.notes.copy()
            n["score_qn"] += qn0
            n["pitch"] = np.clip(n["pitch"] + shifts[rnd % len(shifts)], 21, 108)
            n["measure"] += bar0
            m = s.measures.copy()
            m["score_qn"] += qn0
            m["measure"] += bar0
            notes.append(n)
            meas.append(m)
            tm = s.tempo_map
            xs = np.union1d(tm.x[(tm.x >= 0) & (tm.x <= s.total_qn)], [0.0, s.total_qn])
            kx.extend((qn0 + xs[1:]).tolist())
            ky.extend((t0 + np.asarray(tm(xs[1:])) - float(tm(0.0))).tolist())
            dur_qn = s.total_qn
            spq = float(tm.slope(s.total_qn - 1e-6))
            qn0 += dur_qn + gap_qn
            t0 = ky[-1] + gap_qn * spq
            kx.append(qn0)
            ky.append(t0)
            bar0 = int(m["measure"].max()) + 10
        rnd += 1
    notes = pd.concat(notes, ignore_index=True)
    meas = pd.concat(meas, ignore_index=True)
    # the gaps are bars of rest
    return ScoreModel(name="bench30", path=Path("bench30"), notes=notes, measures=meas,
                      boundaries=pd.DataFrame(), tempo_map=TimeMap(np.array(kx), np.array(ky)))


def render(score, path, *, seed):
    from stimkit.render.performance import perform
    from stimkit.render.synth import synthesize

    perf = perform(score, seed=seed, start_s=3.0)
    y = synthesize(perf.notes, sr=SR, timbre="piano", seed=seed)
    sf.write(str(path), y, SR)
    return perf, len(y) / SR


_CHILD = r"""
import pickle, resource, sys, time
sys.path.insert(0, {root!r})
from stimkit.align.run import align_score
import stimkit.align.dtw as D
score = pickle.load(open({score!r}, "rb"))
orig = D.multiscale_dtw
spent = []
def timed(*a, **k):
    t = time.perf_counter(); r = orig(*a, **k); spent.append(time.perf_counter() - t); return r
import stimkit.align.run as R
R.multiscale_dtw = timed
t = time.perf_counter()
res = align_score(score, {wav!r})
total = time.perf_counter() - t
res.notes.to_pickle({out!r})
print(total, spent[0], resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
"""


def _median_error(perf, timemap_fn):
    ref = perf.notes["onset_s"].to_numpy()
    est = timemap_fn(perf.notes["score_qn"].to_numpy())
    e = np.abs(est - ref)
    return 1000 * np.median(e), 1000 * np.mean(e), 100 * np.mean(e <= 0.1)


def bench_long(tmp: Path, scores):
    score = concatenate(scores, target_s=1800.0)
    perf, dur = render(score, tmp / "long.wav", seed=5)
    with open(tmp / "score.pkl", "wb") as fh:
        pickle.dump(score, fh)
    code = _CHILD.format(root=str(ROOT), score=str(tmp / "score.pkl"), wav=str(tmp / "long.wav"),
                         out=str(tmp / "notes.pkl"))
    # first run compiles the numba kernels (cached on disk); the second is the measurement
    subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True)
    total, dtw_s, rss_mb = map(float, out.stdout.split())
    notes = pd.read_pickle(tmp / "notes.pkl")
    fn = lambda q: np.interp(q, notes["score_qn"], notes["recording"])  # noqa: E731
    med, mean, w100 = _median_error(perf, fn)
    print(f"30-minute rendering ({dur / 60:.1f} min of audio, {len(perf.notes)} notes)")
    print(f"  align_score total {total:6.2f} s   DTW {dtw_s:5.2f} s   peak RSS {rss_mb:7.1f} MB   "
          f"median error {med:5.1f} ms  mean {mean:6.1f} ms  within 100 ms {w100:5.1f} %")
    print(f"  targets: DTW <= 5 s, total <= 20 s, RSS <= 1024 MB -> "
          f"{'ok' if dtw_s <= 5 and total <= 20 and rss_mb <= 1024 else 'MISSED'}")


def bench_vs_librosa(tmp: Path, scores):
    import tracemalloc

    import librosa

    from stimkit.align.chroma import audio_features
    from stimkit.align.dtw import _unit, downsample, multiscale_dtw
    from stimkit.align.template import score_features
    from stimkit.align.warp import path_to_timemap

    score = concatenate(scores, target_s=265.0)
    perf, dur = render(score, tmp / "five.wav", seed=6)
    S = score_features(score)
    A = audio_features(tmp / "five.wav")
    rate = A.rate_hz

    def ours():
        res = multiscale_dtw(S.chroma, A.chroma, onset_s=S.onset, onset_r=A.onset, onset_weight=1.0)
        # numba's allocations are invisible to tracemalloc: add the largest step array (1 B/cell)
        # and the two rows of accumulated cost it holds
        extra = max(lv["band_cells"] for lv in res["levels"]) + 16 * max(lv["cols"] for lv in res["levels"])
        return res["path"], rate, extra

    def naive():
        f = 5  # 49.2 Hz / 5 = 9.8 Hz
        cs, cr = _unit(downsample(S.chroma, f)), _unit(downsample(A.chroma, f))
        C = 1.0 - cs @ cr.T
        _, wp = librosa.sequence.dtw(C=C, subseq=True)
        return wp[::-1] * f + (f - 1) / 2.0, rate, 0  # coarse frame centres on the fine grid

    ours()  # warm-up (numba)
    print(f"5-minute rendering ({dur:.0f} s of audio): same features, same run")
    got = []
    for label, fn in (("multiscale DTW (ours, 49 Hz)", ours), ("librosa full DTW at 9.8 Hz", naive)):
        tracemalloc.start()
        t = time.perf_counter()
        path, r, extra = fn()
        el = time.perf_counter() - t
        peak = (tracemalloc.get_traced_memory()[1] + extra) / 2**20
        tracemalloc.stop()
        tm = path_to_timemap(np.asarray(path), rate_hz=r, rec_start_s=A.start_s, tempo_map=score.tempo_map,
                             score_start_s=S.start_s)
        med, mean, w100 = _median_error(perf, tm)
        print(f"  {label:30s} {el:7.3f} s  peak {peak:8.1f} MB  median {med:6.1f} ms  mean {mean:6.1f} ms  "
              f"within 100 ms {w100:5.1f} %")
        got.append((el, peak, med))
    (t1, m1, e1), (t0, m0, e0) = got
    print(f"  ratio librosa / ours: time {t0 / t1:.1f}x, memory {m0 / m1:.0f}x, median error {e0 / e1:.1f}x; "
          f"librosa at 30 min would need ~{(18000 ** 2) * 20 / 2**30:.0f} GB (20 B/cell, REFERENCES.md)")


def main():
    scores = [_load(p) for p in PIECES if not isinstance(p, Path) or p.exists()]
    with tempfile.TemporaryDirectory() as d:
        bench_vs_librosa(Path(d), scores)
        bench_long(Path(d), scores)


if __name__ == "__main__":
    main()
