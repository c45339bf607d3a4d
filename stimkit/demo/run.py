"""The demo: the main job on the bundled session, checked against the renderer's ground truth.

:func:`run_demo` runs ``annotate`` on ``example_audio/demo-session.toml`` (a rendered session of
the two example scores with speech, applause and two sync marks, see
:mod:`stimkit.demo.scenario`) and returns summary lines: where the outputs are, the pieces found,
the boundaries placed, the median confidence, the clock drift, and how far all of it is from
the ground truth written when the session was rendered (:func:`compare_to_truth`).

Conventions
-----------
Errors are on the recorder clock (``onset``), in seconds: estimated minus true. A boundary's
true time is the renderer's ``score_qn -> recording`` map at the boundary, mapped through the
true clock.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["run_demo", "demo_session_path", "compare_to_truth"]

ROOT = Path(__file__).resolve().parents[2]
DEMO_DIR = ROOT / "example_audio"


def demo_session_path() -> Path:
    """``example_audio/demo-session.toml`` of the source tree; :class:`InputError` if absent."""
    p = DEMO_DIR / "demo-session.toml"
    if not p.is_file():
        raise InputError("the bundled demo session is not here (example_audio/ ships with the "
                         "source tree); run the demo from a clone of the repository", path=p)
    return p


def compare_to_truth(result, *, truth_path: Path | None = None) -> dict:
    """Errors of an annotate result against the demo's ground truth (see module notes).

    Returns a dict with ``piece_start_errors_s`` (piece -> error), ``boundary_abs_errors_s``
    (array over all aligned boundaries, in row order), ``boundary_median_abs_error_s``,
    ``drift_error_ppm`` and ``offset_error_s``.
    """
    truth_path = truth_path or DEMO_DIR / "demo-truth.json"
    truth = json.loads(Path(truth_path).read_text(encoding="utf-8"))
    clk = truth["clock"]
    ev = result.events
    starts = {}
    errs = []
    for p in truth["pieces"]:
        rows = ev[(ev["trial_type"] == "piece") & (ev["piece"] == p["piece"])]
        if len(rows):
            starts[p["piece"]] = float(rows["onset"].iloc[0]) - float(p["start_onset_s"])
        tm = p["timemap"]
        b = ev[(ev["piece"] == p["piece"]) & (ev["source"] == "alignment") & (ev["trial_type"] != "piece")]
        q = b["score_qn"].to_numpy(dtype=np.float64)
        true_rec = np.interp(q, tm["score_qn"], tm["recording"])
        true_on = clk["offset_s"] + clk["slope"] * true_rec
        errs.append(np.abs(b["onset"].to_numpy(dtype=np.float64) - true_on))
    e = np.concatenate(errs) if errs else np.zeros(0)
    return {
        "piece_start_errors_s": starts,
        "boundary_abs_errors_s": e,
        "boundary_median_abs_error_s": float(np.median(e)) if e.size else float("nan"),
        "boundaries_within_50ms": float(np.mean(e <= 0.05)) if e.size else float("nan"),
        "drift_error_ppm": float(result.clock.drift_ppm - clk["drift_ppm"]),
        "offset_error_s": float(result.clock.offset_s - clk["offset_s"]),
    }


def run_demo(*, out_dir, progress=None) -> list[str]:
    """Annotate the bundled session into ``out_dir``; return summary lines for people."""
    from ..session import annotate_session, load_session, summary_lines

    session = load_session(demo_session_path(), out_dir=out_dir)
    result = annotate_session(session, progress=progress, command=["stimkit", "demo", "-o", str(out_dir)])
    lines = summary_lines(result)
    cmp = compare_to_truth(result)
    starts = ", ".join(f"{k} {v * 1000:+.0f} ms" for k, v in cmp["piece_start_errors_s"].items())
    lines.append("against the renderer's ground truth (recorder clock):")
    lines.append(f"  piece starts: {starts}")
    lines.append(f"  boundaries: median error {cmp['boundary_median_abs_error_s'] * 1000:.0f} ms, "
                 f"{cmp['boundaries_within_50ms'] * 100:.0f} % within 50 ms")
    lines.append(f"  clock: drift {cmp['drift_error_ppm']:+.2f} ppm, offset {cmp['offset_error_s'] * 1000:+.2f} ms "
                 f"from the values used to render")
    if result.physio:
        from .participant import planted_lines

        for r in result.physio:
            lines.extend(planted_lines(r))
    report = next((p for p in result.written if str(p).endswith("report.html")),
                  Path(result.out_dir) / "report.html")
    lines.append(f"open {report} to see it at a glance")
    return lines
