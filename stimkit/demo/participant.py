"""The demo's invented participant "A": a simulated beat-interval series with planted responses.

What it builds
--------------
A plain beat table (``beat_time`` in s on the recorder clock, ``rr`` in ms, the interval
stamped at the beat that closes it) covering the whole demo session, written to
``example_audio/demo-participant-A_beats.tsv``. The series is 820 ms plus AR(1) noise
(phi = 0.5, marginal SD 25 ms; a common first model of beat-to-beat fluctuations), with six
planted responses, each a lasting step of the level: 60 ms shorter intervals (2.4 noise SDs,
the heart speeds up) 0.5-1 s after three loudness changes, and 80 ms longer intervals (3.2 SDs,
it slows down again) at three section boundaries:

=========  ======================================================  =========================
recorder   planted at                                              found by
=========  ======================================================  =========================
28.0 s     0.5 s after the loudness rise of the opening crescendo  B (loudness changes)
70.63 s    section B of "lanterns-over-the-weir" (m. 9)            A (section), B
89.8 s     1 s after the ff of m. 16 of "lanterns-over-the-weir"   B (loudness changes)
141.14 s   section D of "lanterns-over-the-weir" (m. 42)           A (section), B
168.0 s    1 s after the closing pp of "lanterns-over-the-weir"    B (loudness changes)
214.28 s   section B of "kites-at-dusk" (m. 17)                    A (section), B
=========  ======================================================  =========================

Nothing is planted at the other section boundaries (the repeat of section A at 43.57 s in the
first piece, section C at 240.69 s in the second; section C of the first piece follows a general
pause, gets an alignment confidence below 0.5 and is left out of analysis A by rule), nor at any
change of key clarity, brightness or onset rate that does not fall near a planted step: there
the series is noise only, and the report shows their differences inside the grey chance band and
their coincidence curves inside the null band. A section step at a moment where the loudness
also changes (m. 9) counts for both analyses. Boundary times are
the renderer's ground truth (``demo-truth-boundaries.tsv``); the loudness changes are those the
feature stage finds in the rendering. Every seed is fixed: running ``python -m
stimkit.demo.participant`` writes the same file again.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

__all__ = ["PLANTED", "simulate_participant", "write_participant", "PARTICIPANT_FILE", "planted_lines",
           "loudness_feature"]

ROOT = Path(__file__).resolve().parents[2]
PARTICIPANT_FILE = ROOT / "example_audio" / "demo-participant-A_beats.tsv"
SEED = 20261202
BASE_MS = 820.0
STEP_MS = 80.0          # planted at section boundaries
LOUD_STEP_MS = 60.0     # planted after loudness changes
PHI = 0.5
SD_MS = 25.0
START_S, END_S = 8.0, 262.0
#: (recorder time s, what it is) of the planted level steps, in time order.
PLANTED = (
    (28.0, "loudness", "0.5 s after the loudness rise of the opening crescendo"),
    (70.63, "section", "section B, lanterns-over-the-weir m. 9"),
    (89.8, "loudness", "1 s after the ff, lanterns-over-the-weir m. 16"),
    (141.14, "section", "section D, lanterns-over-the-weir m. 42"),
    (168.0, "loudness", "1 s after the closing pp, lanterns-over-the-weir"),
    (214.28, "section", "section B, kites-at-dusk m. 17"),
)


def simulate_participant(*, seed: int = SEED) -> pd.DataFrame:
    """The beat table (see module notes): columns ``beat_time`` (s), ``rr`` (ms)."""
    rng = np.random.default_rng(seed)
    steps = np.array([t for t, _, _ in PLANTED])
    sizes = np.array([STEP_MS if what == "section" else LOUD_STEP_MS for _, what, _ in PLANTED])
    signs = -np.cumprod(-np.ones(steps.size))  # down, up, down, ... so the level stays bounded
    times, rr = [], []
    now, noise = START_S, rng.normal(0.0, SD_MS)
    sd_innov = SD_MS * np.sqrt(1.0 - PHI ** 2)
    while now < END_S:
        k = int(np.searchsorted(steps, now, "right"))
        level = BASE_MS - float(np.sum(signs[:k] * sizes[:k]))
        noise = PHI * noise + rng.normal(0.0, sd_innov)
        x = level + noise
        now += x / 1000.0
        times.append(now)
        rr.append(x)
    return pd.DataFrame({"beat_time": np.round(times, 4), "rr": np.round(rr, 1)})


def loudness_feature(names) -> str | None:
    """The loudness feature among ``names`` (the roles of :mod:`stimkit.stats.roles`, so a renamed
    feature column is still found)."""
    from ..stats.roles import ROLE_CANDIDATES

    return next((c for c in ROLE_CANDIDATES["change:loudness"] if c in set(names)), None)


def planted_lines(result) -> list[str]:
    """Lines comparing what was planted with what a relate result found (for ``stimkit demo``)."""
    bt = result.tables.get("boundary_tests")
    cs = result.tables.get("coincidence_summary")
    lines = [f"participant {result.participant} (invented; responses planted, see stimkit/demo/participant.py):"]
    if bt is not None and len(bt):
        sec = bt[(bt["trial_type"] == "section") & (bt["N"] == bt["N"].min()) & (bt["status"] == "ok")]
        planted = [t for t, what, _ in PLANTED if what == "section"]
        for r in sec.itertuples(index=False):
            is_planted = any(abs(r.onset - t) < 0.5 for t in planted)
            verdict = "found" if r.significant is True else "not significant"
            lines.append(f"  section boundary at {r.onset:.2f} s ({'planted' if is_planted else 'nothing planted'}): "
                         f"after - before {r.delta:+.0f} ms, calibrated p {r.p_cal:.3f}, {verdict}")
    if cs is not None and len(cs):
        main = cs[(cs["reference"] == "physio") & (cs["null_method"] == "iaaft")]
        loud = loudness_feature(main["feature_set"])
        others = [f for f in ("key_clarity", "key_strength", "onset_rate_hz") if f in set(main["feature_set"])]
        for name in [loud] + others[:1]:
            row = main[main["feature_set"] == name]
            if len(row):
                x = row.iloc[0]
                what = "planted after loudness changes" if name == loud else "nothing planted"
                lines.append(f"  change points vs {name} ({what}): p_global {x.p_global:.3f}, "
                             f"{'found' if x.significant is True else 'inside the null band'}")
    return lines


def write_participant(path: Path = PARTICIPANT_FILE) -> Path:
    """Write the beat table (tab-separated, with header)."""
    df = simulate_participant()
    lines = ["beat_time\trr"] + [f"{t:.4f}\t{x:.1f}" for t, x in zip(df["beat_time"], df["rr"])]
    Path(path).write_text("\n".join(lines) + "\n", encoding="utf-8")
    return Path(path)


if __name__ == "__main__":  # pragma: no cover
    print(write_participant())
