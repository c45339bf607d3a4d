"""The report at concert length: a synthetic 2-hour session of 12 pieces.

Prints the time and CPU to build the report's parts (overview PNG + SVG, one SVG panel per
piece, the places to check), the page size, and the label count of the piece panels against the
number of boundaries (every boundary must be labelled). Invented data; no audio is read (the
click track streams the recording and is measured by its size per minute in the docs).
Run by hand: ``.venv/bin/python bench/bench_report.py``.
"""

from __future__ import annotations

import time

import numpy as np
import pandas as pd

from stimkit.report.build import build_report
from stimkit.report.html import report_html
from stimkit.timeline.clock import identity_clock


def session(hours: float = 2.0, pieces: int = 12, rate_hz: float = 10.0, seed: int = 7):
    rng = np.random.default_rng(seed)
    total = hours * 3600.0
    t = (np.arange(int(total * rate_hz)) + 0.5) / rate_hz
    features = pd.DataFrame({"short_term_lufs": -30 + 8 * np.sin(t / 40) + rng.normal(0, 1, t.size),
                             "aligned_tempo_bpm": 90 + 20 * np.sin(t / 300),
                             "key_clarity": 0.5 + 0.3 * np.cos(t / 25),
                             "onset_rate_hz": 3 + np.sin(t / 17)}, index=pd.Index(t, name="onset"))
    edges = np.linspace(60.0, total - 60.0, pieces + 1)
    rows, beats, regions = [], [], []
    kinds = ["dynamic", "hairpin", "accent", "tempo", "tempo_change", "key", "meter", "section", "fermata"]
    for k in range(pieces):
        a, b = edges[k] + 30.0, edges[k + 1] - 30.0
        name = f"piece-{k + 1:02d}"
        rows.append({"onset": a, "duration": b - a, "trial_type": "piece", "piece": name, "label": name})
        n = int((b - a) / 2.2)                                    # ~250 boundaries per piece
        for i, tt in enumerate(np.sort(rng.uniform(a, b, n))):
            rows.append({"onset": tt, "duration": 0.0, "trial_type": kinds[i % len(kinds)], "piece": name,
                         "label": ["p", "crescendo", "sfz", "Allegro (q = 120)", "rit.", "D major", "3/4",
                                   "rehearsal mark C", "fermata"][i % len(kinds)],
                         "measure": 1 + int((tt - a) / 2.0), "beat": 1.0, "confidence": rng.uniform(0.3, 1.0),
                         "source": "alignment"})
        bt = np.arange(a, b, 0.5)
        beats.append(pd.DataFrame({"onset": bt, "recording": bt, "piece": name, "beat": np.arange(bt.size) % 4 + 1,
                                   "measure": np.arange(bt.size) // 4 + 1, "pass": 1}))
        regions += [(a + 100.0, a + 108.0, "poor match"), (a + 300.0, a + 302.0, "low local confidence")]
    ev = pd.DataFrame(rows)
    ev["recording"] = ev["onset"]
    pieces_df = ev[ev.trial_type == "piece"].rename(columns={"onset": "start"})
    pieces_df = pd.DataFrame({"piece": pieces_df["piece"], "start": pieces_df["start"],
                              "end": pieces_df["start"] + pieces_df["duration"]}).reset_index(drop=True)
    return features, ev, pd.concat(beats, ignore_index=True), pieces_df, regions


def main():
    features, ev, beats, pieces, regions = session()
    n_b = int((ev.trial_type != "piece").sum())
    w0, c0 = time.perf_counter(), time.process_time()
    parts = build_report(title="bench", clock=identity_clock(), events=ev, beats=beats, features=features,
                         units={"short_term_lufs": "LUFS", "aligned_tempo_bpm": "BPM"}, pieces=pieces,
                         regions_recording=regions, columns={"tempo": "aligned_tempo_bpm"})
    w1, c1 = time.perf_counter(), time.process_time()
    page = report_html(title="bench", figure_png=parts.png, summary={}, pieces=pieces, events=ev, stats={},
                       warnings=[], sync=None, overview_svg=parts.overview_svg, piece_panels=parts.piece_panels,
                       check=parts.check, check_audio="check-by-ear.flac", clock_label=parts.clock_label)
    labels = sum(p["svg"].count("<title>") for p in parts.piece_panels)
    print(f"2-hour session, {len(pieces)} pieces, {n_b} boundaries, {features.shape[0]} feature rows")
    print(f"build_report: {w1 - w0:.1f} s wall, {c1 - c0:.1f} s CPU")
    print(f"report.png {len(parts.png) / 1e6:.2f} MB; report.html {len(page.encode()) / 1e6:.1f} MB "
          f"(overview SVG {len(parts.overview_svg) / 1e6:.2f} MB)")
    print(f"boundaries with a label and a hover text in the piece panels: {labels} of {n_b}")
    print(f"places to check by ear: {len(parts.check)}")


if __name__ == "__main__":
    main()
