"""Realistic evaluation of the score-to-recording alignment (run by hand, never in CI).

    python bench/bench_align.py --quick          # a few minutes: one short case per condition
    python bench/bench_align.py                  # the whole evaluation (well under an hour, 2 cores)
    python bench/bench_align.py --synth fluidr3  # the held-out sampled instruments (see below)
    python bench/bench_align.py --speed          # the speed part only

1. **Accuracy per condition.** Real scores from the music21 corpus used in place
   (``bench/align_material.py``), each condition that real concert material brings: piano in a
   dry room, piano in a hall (RT60 2.2-2.5 s) with an audience (coughs, chairs, mains hum,
   applause), string quartets (bowed attacks of 100-300 ms), voice and piano / choir, winds,
   organ, repeats taken and skipped, tempo 0.4x and 2.5x the marks, no metronome mark played at
   half or double the assumed q = 100, a transposing part, parts out of step. Performances have
   expressive timing (drift, rubato, agogic accents, long final ritardandi, melody lead, chord
   spread). Every note is scored against the renderer's exact ground truth by printed bar, pass
   and offset (:mod:`stimkit.render.evaluate`, figures by ``mir_eval.alignment``), with the
   confidence calibration of the goals. A right piece refused is counted and then scored from
   the forced alignment; each condition also checks that a wrong piece (the score of the next
   case, the recording of this one) is still refused.
2. **The peer** (``--peer``, on by default in the full run): the Sync Toolbox tutorial pipeline
   (``bench/peer_sync.py``) on the same renders, its accuracy, time and peak memory beside ours.
3. **Speed** (``--speed``, also in the full run): a 30-minute rendering aligned in a fresh
   subprocess (time, DTW time, peak RSS; goal <= 20 s, <= 1 GB) and our multiscale DTW beside
   librosa's full DTW at 10 Hz on 5 minutes.

Synthesizers (``--synth``): ``ours`` (the project's renderer, development), ``timgm6mb``
(fluidsynth + TimGM6mb, development), ``fluidr3`` (fluidsynth + FluidR3_GM: **held out** --
measure on it, never tune on it). Cases marked ``held_out`` in ``align_material.py`` (other
pieces and seeds) are held out too and are printed in their own table (``--held-out``).

Per-note results go to ``bench/out/<synth>[-quick]/notes.tsv.gz`` (gitignored): one row per note
with the case, printed bar, pass, offset, truth, estimate, error and confidence; ``pieces.tsv``
and ``conditions.tsv`` hold the per-piece and per-condition figures.
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


def _fmt(v, spec):
    return "n/a" if v is None or (isinstance(v, float) and not np.isfinite(v)) else format(v, spec)


COLUMNS = ("condition", "pieces", "notes", "med ms", "worst piece med", "<=100 %", "<=300 %", ">2 s",
           "conf>=.9 ok %", ">300ms low-conf %", "rho", "refused", "wrong ok", "ours s")


def _row(label, g, runs, wrong):
    from stimkit.render.evaluate import summarize

    d = summarize(g)
    per = summarize(g, by="piece")
    return {"condition": label, "pieces": g["piece"].nunique(), "notes": d["n"],
            "med ms": 1000 * d["median_s"], "worst piece med": 1000 * float(per["median_s"].max()),
            "<=100 %": 100 * d["within_100"], "<=300 %": 100 * d["within_300"], ">2 s": d["over_2s"],
            "conf>=.9 ok %": 100 * d["sure_within_100"], "n_sure": d["n_sure"],
            ">300ms low-conf %": 100 * d["off_flagged"], "n_off": d["n_off"], "rho": d["spearman"],
            "refused": sum(r.refused for r in runs), "wrong ok": wrong,
            "ours s": sum(r.align_s for r in runs), "missing": d["missing"]}


def print_table(rows, title):
    fm = {"med ms": ".1f", "worst piece med": ".1f", "<=100 %": ".1f", "<=300 %": ".2f", "conf>=.9 ok %": ".1f",
          ">300ms low-conf %": ".1f", "rho": "+.2f", "ours s": ".1f"}
    print(f"\n{title}")
    widths = [max(len(c), 7) for c in COLUMNS]
    print("  ".join(c.rjust(w) if k else c.ljust(22) for k, (c, w) in enumerate(zip(COLUMNS, widths))))
    for r in rows:
        cells = []
        for k, (c, w) in enumerate(zip(COLUMNS, widths)):
            v = r.get(c)
            txt = _fmt(v, fm[c]) if c in fm else str(v)
            cells.append(txt.ljust(22) if k == 0 else txt.rjust(w))
        print("  ".join(cells))
    peer = [r for r in rows if "peer med ms" in r]
    if peer:
        print("  peer (Sync Toolbox tutorial pipeline) on the same renders:")
        for r in peer:
            print(f"    {r['condition']:22s} median {_fmt(r['peer med ms'], '.1f')} ms  <=100 ms "
                  f"{_fmt(r['peer <=100 %'], '.1f')} %  <=300 ms {_fmt(r['peer <=300 %'], '.2f')} %  "
                  f">2 s {r['peer >2 s']}  time {_fmt(r['peer s'], '.1f')} s (ours {_fmt(r['ours s'], '.1f')} s)")


def evaluate(case_list, *, synth, out_dir: Path, peer: bool, work: Path, log=print):
    """Render, align and score every case; returns the per-condition rows."""
    import contextlib
    import io

    from stimkit.render.cases import prepare_case, run_case, wrong_piece_refused
    from stimkit.render.evaluate import summarize

    render = None
    if synth != "ours":
        import sampled

        if not sampled.available(synth):
            raise SystemExit(f"fluidsynth or the {synth} soundfont is missing: "
                             "apt-get install fluidsynth fluid-soundfont-gm timgm6mb-soundfont")
        render = sampled.renderer(synth)
    peer_mod = None
    if peer:
        import peer_sync

        peer_mod = peer_sync if peer_sync.available() else None
        if peer_mod is None:
            log("peer: synctoolbox is not installed (see bench/peer_sync.py); skipped")
    runs, scored, peer_scored = [], [], []
    for case in case_list:
        t0 = time.perf_counter()
        try:
            run = prepare_case(case, work, render=render)
        except Exception as exc:   # a case that cannot be prepared is reported, never hidden
            log(f"  {case.condition:22s} {case.piece:20s} NOT RENDERED: {type(exc).__name__}: {exc}")
            continue
        t1 = time.perf_counter()
        try:
            run_case(run)
        except Exception as exc:
            log(f"  {case.condition:22s} {case.piece:20s} ALIGNMENT FAILED: {type(exc).__name__}: {exc}")
            continue
        s = run.scored.assign(condition=case.condition, piece=case.piece, seed=case.seed,
                              held_out=case.held_out, synth=synth)
        d = summarize(s)
        runs.append(run)
        scored.append(s)
        msg = (f"  {case.condition:22s} {case.piece:20s} {len(s):5d} notes  median {1000 * d['median_s']:7.1f} ms  "
               f"<=100 {100 * d['within_100']:5.1f} %  >2 s {d['over_2s']:4d}  render {t1 - t0:5.1f} s  "
               f"align {run.align_s:5.1f} s{'  REFUSED' if run.refused else ''}")
        if peer_mod is not None:
            from stimkit.render.evaluate import score_notes
            from stimkit.score.parse import load_score

            tp = time.perf_counter()
            with contextlib.redirect_stdout(io.StringIO()):
                pres = peer_mod.align(load_score(run.aligned_path), run.wav)
            ps = score_notes(run.truth, pres).assign(condition=case.condition, piece=case.piece,
                                                     peer_s=time.perf_counter() - tp)
            peer_scored.append(ps)
            pd_ = summarize(ps)
            msg += f"  | peer median {1000 * pd_['median_s']:7.1f} ms"
        log(msg)
    if not scored:
        return []
    allnotes = pd.concat(scored, ignore_index=True)
    out_dir.mkdir(parents=True, exist_ok=True)
    allnotes.to_csv(out_dir / "notes.tsv.gz", sep="\t", index=False, float_format="%.6f")
    summarize(allnotes, by=["condition", "piece"]).to_csv(out_dir / "pieces.tsv", sep="\t", index=False,
                                                          float_format="%.6f")
    # wrong piece: the score of the next case in the same condition with this recording
    rows = []
    for cond in dict.fromkeys(r.case.condition for r in runs):
        rs = [r for r in runs if r.case.condition == cond]
        wrong = "n/a"
        if len(rs) > 1 or len(runs) > 1:
            other = rs[1] if len(rs) > 1 else next(r for r in runs if r.case.source != rs[0].case.source)
            ok = wrong_piece_refused(other.aligned_path, rs[0].wav)
            wrong = "refused" if ok else "ACCEPTED"
        g = allnotes[allnotes["condition"] == cond]
        row = _row(cond, g, rs, wrong)
        if peer_scored:
            pg = pd.concat([p for p in peer_scored if p["condition"].iloc[0] == cond], ignore_index=True)
            pdd = summarize(pg)
            row.update({"peer med ms": 1000 * pdd["median_s"], "peer <=100 %": 100 * pdd["within_100"],
                        "peer <=300 %": 100 * pdd["within_300"], "peer >2 s": pdd["over_2s"],
                        "peer s": float(pg.groupby("piece")["peer_s"].first().sum())})
        rows.append(row)
    rows.append(_row("all (pooled)", allnotes, runs, "-"))
    if peer_scored:
        pg = pd.concat(peer_scored, ignore_index=True)
        pdd = summarize(pg)
        rows[-1].update({"peer med ms": 1000 * pdd["median_s"], "peer <=100 %": 100 * pdd["within_100"],
                         "peer <=300 %": 100 * pdd["within_300"], "peer >2 s": pdd["over_2s"],
                         "peer s": float(pg.groupby(["condition", "piece"])["peer_s"].first().sum())})
        pg.to_csv(out_dir / "peer_notes.tsv.gz", sep="\t", index=False, float_format="%.6f")
    pd.DataFrame(rows).to_csv(out_dir / "conditions.tsv", sep="\t", index=False, float_format="%.4f")
    return rows


def peak_memory(case, *, work: Path):
    """Peak RSS (MB) and wall time of ours and of the peer on one rendering, each in a fresh process."""
    from stimkit.render.cases import prepare_case

    run = prepare_case(case, work)
    code = r"""
import contextlib, io, resource, sys, time
sys.path.insert(0, {root!r}); sys.path.insert(0, {bench!r})
from stimkit.score.parse import load_score
score = load_score({score!r})
{imp}
t = time.perf_counter()
with contextlib.redirect_stdout(io.StringIO()):
    {call}
print(time.perf_counter() - t, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)
"""
    out = {}
    for label, imp, call in (
            ("ours", "from stimkit.align.run import align_score", "align_score(score, {wav!r}, force=True)"),
            ("peer", "import peer_sync", "peer_sync.align(score, {wav!r})")):
        src = code.format(root=str(ROOT), bench=str(ROOT / "bench"), score=str(run.aligned_path), imp=imp,
                          call=call.format(wav=str(run.wav)))
        subprocess.run([sys.executable, "-c", src], check=True, capture_output=True, text=True)  # warm caches
        res = subprocess.run([sys.executable, "-c", src], check=True, capture_output=True, text=True)
        t, mb = map(float, res.stdout.split()[-2:])
        out[label] = (t, mb)
    return out


def main(argv=None):
    import argparse

    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--quick", action="store_true", help="one short case per condition (a few minutes)")
    ap.add_argument("--synth", default="ours", choices=["ours", "timgm6mb", "fluidr3"])
    ap.add_argument("--peer", action=argparse.BooleanOptionalAction, default=None,
                    help="run the Sync Toolbox peer too (default: on in the full run, off with --quick)")
    ap.add_argument("--speed", action="store_true", help="only the speed part")
    ap.add_argument("--no-speed", action="store_true", help="skip the speed part of the full run")
    ap.add_argument("--held-out", action="store_true", help="also the held-out cases")
    ap.add_argument("--only", default="", help="comma-separated conditions")
    ap.add_argument("--out", default=str(ROOT / "bench" / "out"))
    a = ap.parse_args(argv)
    sys.path.insert(0, str(ROOT / "bench"))
    import align_material

    if a.speed:
        scores = [_load(p) for p in PIECES if not isinstance(p, Path) or p.exists()]
        with tempfile.TemporaryDirectory() as d:
            bench_vs_librosa(Path(d), scores)
            bench_long(Path(d), scores)
        return
    only = [c.strip() for c in a.only.split(",") if c.strip()] or None
    peer = (not a.quick) if a.peer is None else a.peer
    tag = a.synth + ("-quick" if a.quick else "")
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as d:
        dev = align_material.cases(quick=a.quick, held_out=False, only=only)
        print(f"alignment evaluation: {len(dev)} development cases, synth {a.synth}"
              f"{' (HELD OUT: do not tune on it)' if a.synth == 'fluidr3' else ''}")
        rows = evaluate(dev, synth=a.synth, out_dir=Path(a.out) / tag, peer=peer, work=Path(d) / "dev")
        print_table(rows, f"development material, synth {a.synth}")
        if a.held_out:
            ho = align_material.cases(held_out=True, only=only)
            rows_h = evaluate(ho, synth=a.synth, out_dir=Path(a.out) / (tag + "-heldout"), peer=peer,
                              work=Path(d) / "ho")
            print_table(rows_h, "HELD-OUT material (measure only, never tune on it)")
        if peer and not a.quick:
            mem = peak_memory(align_material.cases(quick=True, only=["strings"])[0], work=Path(d) / "mem")
            (to, mo), (tp, mp) = mem["ours"], mem["peer"]
            print(f"\none strings case, fresh processes: ours {to:.1f} s / {mo:.0f} MB peak RSS; "
                  f"peer {tp:.1f} s / {mp:.0f} MB; peer/ours time {tp / to:.1f}x, memory {mp / mo:.1f}x")
    print(f"\ngoals: piano median <= 10 ms per piece and >= 99 % within 100 ms; ensembles median <= 13 ms "
          f"and >= 95 %; everything >= 99.5 % within 300 ms, no note > 2 s, no right piece refused, a "
          f"wrong piece refused; confidence >= 0.9 -> >= 95 % within 100 ms; > 300 ms off -> >= 90 % "
          f"confidence < 0.5")
    print(f"per-note results: {Path(a.out) / tag}/notes.tsv.gz   ({time.perf_counter() - t0:.0f} s)")
    if not a.quick and not a.no_speed and only is None:
        scores = [_load(p) for p in PIECES if not isinstance(p, Path) or p.exists()]
        with tempfile.TemporaryDirectory() as d:
            bench_vs_librosa(Path(d), scores)
            bench_long(Path(d), scores)


if __name__ == "__main__":
    main()
