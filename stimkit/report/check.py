"""Checking an alignment by ear: the places to listen to, and the recording with clicks.

What it computes
----------------
- :func:`check_places` -- one row per place a reader should listen to: each region where the
  alignment is unsure (overlapping regions joined; with the bars it covers and why) and each
  repeat the performers skipped or took, in time order;
- :func:`click_track` -- the recording (mono) with short clicks mixed in at the placed bars
  (a soft low click on every downbeat) and boundaries (a louder, higher, longer click), the way
  an alignment is verified by ear: where a click does not fall on the music, the placement is
  wrong there. Written as 16-bit FLAC, streaming (memory does not grow with the recording).

Conventions
-----------
- :func:`check_places` works on one clock (the caller's: the report uses the recorder clock);
  the click track is on the recording's own time axis, since it *is* the recording.
- Clicks: a sine burst with an exponential decay, onset at the placed time (no pre-ringing).
  Bars 1000 Hz, 15 ms, peak -18 dBFS; boundaries 2500 Hz, 40 ms, peak -9 dBFS; the recording is
  mixed at -6 dB so the clicks stay audible over loud passages, and the sum is limited to
  +-1.0. The track is resampled to at most 22.05 kHz (enough for both clicks and for following
  the music; libsoxr through :func:`stimkit.audio.read.iter_blocks`).
- Deterministic: FLAC from the same samples with the same library gives the same bytes.
"""

from __future__ import annotations

import io
import re

import numpy as np
import pandas as pd

from ..export.tables import is_missing

__all__ = ["check_places", "click_track", "CLICK_SETTINGS", "MAX_CHECK_RATE_HZ"]

#: Highest sample rate of the check-by-ear file.
MAX_CHECK_RATE_HZ = 22050
#: The two clicks and the mix (see the module notes).
CLICK_SETTINGS = {
    "bar": {"frequency_hz": 1000.0, "length_s": 0.015, "peak": 10 ** (-18 / 20), "decay_s": 0.004},
    "boundary": {"frequency_hz": 2500.0, "length_s": 0.040, "peak": 10 ** (-9 / 20), "decay_s": 0.010},
    "music_gain": 10 ** (-6 / 20),
}


def _bars_in(beats: pd.DataFrame | None, piece, a: float, b: float, time_column: str) -> str:
    """Printed bars sounding in [a, b]: ``"12-15"``, ``"12"`` or ``""``."""
    if beats is None or not len(beats) or time_column not in beats.columns or "measure" not in beats.columns:
        return ""
    bt = beats
    if piece is not None and "piece" in bt.columns:
        bt = bt[bt["piece"].astype(str) == str(piece)]
    t = pd.to_numeric(bt[time_column], errors="coerce").to_numpy(np.float64)
    if not t.size:
        return ""
    order = np.argsort(t, kind="mergesort")
    t, meas = t[order], bt["measure"].to_numpy()[order]
    i0 = max(int(np.searchsorted(t, a, side="right")) - 1, 0)
    i1 = max(int(np.searchsorted(t, b, side="right")) - 1, 0)
    if not (t[0] <= b and a <= t[-1] + 10.0):
        return ""
    m0, m1 = meas[i0], meas[i1]
    if is_missing(m0) or is_missing(m1):
        return ""
    m0, m1 = int(float(m0)), int(float(m1))
    return f"{m0}" if m0 == m1 else f"{m0}\u2013{m1}"


_OTHER_CLOCK = re.compile(r"\s*\([^)]*(?:score_qn|\d\s*s\b|\d-\d)[^)]*\)")


def _plain_reason(text: str) -> str:
    """A region's reason without parenthesised times on other clocks (recording seconds,
    score positions): the page keeps one clock."""
    return " ".join(_OTHER_CLOCK.sub("", str(text)).split())


def _merged(regions) -> list[dict]:
    """Overlapping regions joined into one, their distinct reasons kept in order."""
    out: list[dict] = []
    for r in sorted(regions, key=lambda d: (d["start"], d["end"])):
        why = _plain_reason(r.get("reason") or "") or "low alignment confidence"
        if out and r["start"] <= out[-1]["end"]:
            out[-1]["end"] = max(out[-1]["end"], r["end"])
            if why not in out[-1]["reasons"]:
                out[-1]["reasons"].append(why)
        else:
            out.append({"start": r["start"], "end": r["end"], "reasons": [why]})
    return [{"start": o["start"], "end": o["end"], "reason": "; ".join(o["reasons"])} for o in out]


def check_places(*, regions, repeats, pieces: pd.DataFrame | None, beats: pd.DataFrame | None,
                 time_column: str = "onset") -> pd.DataFrame:
    """Where to listen, in time order: ``start``, ``end`` (s, on the caller's clock), ``piece``,
    ``bars``, ``what`` (why to listen there).

    ``regions``: dicts with ``start``, ``end`` and ``reason`` (see
    :func:`stimkit.report.figure.regions_of`); ``repeats``: dicts with ``start``, ``end``,
    ``taken``, ``label`` (see :func:`stimkit.report.figure.repeats_of`).
    """
    rows = []

    def piece_at(t, near_s: float = 5.0):
        """The piece sounding at ``t``, else the nearest one within ``near_s`` (a lead-in or
        a held end just outside its span), else None."""
        if pieces is None or not len(pieces):
            return None
        best, dist = None, near_s
        for _, p in pieces.iterrows():
            a, b = float(p["start"]), float(p["end"])
            d = 0.0 if a <= t <= b else min(abs(t - a), abs(t - b))
            if d <= dist:
                best, dist = p["piece"], d
        return best

    for r in _merged(regions):
        p = piece_at(0.5 * (r["start"] + r["end"]))
        why = r["reason"]
        rows.append({"start": r["start"], "end": r["end"], "piece": p,
                     "bars": _bars_in(beats, p, r["start"], r["end"], time_column),
                     "what": f"placement unsure: {why}"})
    for r in repeats:
        p = r.get("piece")
        p = None if is_missing(p) else p
        lab = str(r.get("label") or "")
        if r["taken"]:
            what = f"repeat taken ({lab.split(':', 1)[-1].strip() or 'repeat'}): check the second pass starts here"
        else:
            what = f"repeat skipped ({lab.split(':', 1)[-1].strip() or 'repeat'}): check nothing was played twice"
        bars = "" if is_missing(r.get("measure")) else str(int(float(r["measure"])))
        rows.append({"start": r["start"], "end": r["end"], "piece": p, "bars": bars, "what": what})
    df = pd.DataFrame(rows, columns=["start", "end", "piece", "bars", "what"])
    return df.sort_values(["start", "end"], kind="mergesort").reset_index(drop=True)


def _click(kind: str, sr: int) -> np.ndarray:
    st = CLICK_SETTINGS[kind]
    n = max(int(round(st["length_s"] * sr)), 2)
    t = np.arange(n) / sr
    return (st["peak"] * np.sin(2 * np.pi * st["frequency_hz"] * t) * np.exp(-t / st["decay_s"])).astype(np.float32)


def click_track(recording, *, bars_s, boundaries_s, out=None, block_s: float = 30.0) -> bytes | None:
    """The recording with clicks at ``bars_s`` and ``boundaries_s`` (recording seconds), as FLAC.

    Parameters
    ----------
    recording : path-like
        The session recording.
    bars_s, boundaries_s : array-like
        Times of the downbeats and of the boundaries, recording seconds (NaN ignored).
    out : path-like or binary file, optional
        Where to write the FLAC; when None the bytes are returned.
    block_s : float
        Seconds per streamed block.

    Returns
    -------
    bytes or None
        The FLAC bytes when ``out`` is None.
    """
    import soundfile as sf

    from ..audio.read import audio_info, iter_blocks

    info = audio_info(recording)
    sr = int(min(info.sample_rate_hz, MAX_CHECK_RATE_HZ))
    clicks = {k: _click(k, sr) for k in ("bar", "boundary")}
    starts = {}
    for k, ts in (("bar", bars_s), ("boundary", boundaries_s)):
        ts = np.asarray(ts, dtype=np.float64).ravel()
        ts = ts[np.isfinite(ts) & (ts >= 0)]
        starts[k] = np.unique(np.round(ts * sr).astype(np.int64))
    target = out if out is not None else io.BytesIO()
    gain = CLICK_SETTINGS["music_gain"]
    with sf.SoundFile(target, mode="w", samplerate=sr, channels=1, format="FLAC", subtype="PCM_16") as fh:
        pos = 0
        for _, x in iter_blocks(recording, block_s=block_s, mono=True, dtype="float32",
                                target_sr=None if sr == info.sample_rate_hz else sr):
            y = x.astype(np.float32) * gain
            n = y.size
            for k, c in clicks.items():
                s = starts[k]
                lo = int(np.searchsorted(s, pos - c.size, side="right"))
                hi = int(np.searchsorted(s, pos + n, side="left"))
                for s0 in s[lo:hi]:
                    a, b = max(s0, pos), min(s0 + c.size, pos + n)
                    if b > a:
                        y[a - pos:b - pos] += c[a - s0:b - s0]
            np.clip(y, -1.0, 1.0, out=y)
            fh.write(y)
            pos += n
    if out is None:
        return target.getvalue()
    return None
