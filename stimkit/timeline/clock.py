"""Clock sync: find sync marks in a recording and fit the recording -> recorder clock map.

What it computes
----------------
1. :func:`detect_sync_marks` scans a recording (streamed in blocks, so a concert-length file is
   never held in memory) for short tone bursts or clicks at a stated frequency and returns the
   ``recording`` time of each mark's start.
2. :func:`fit_clock` pairs those times with the times the physiological recorder logged for the
   same marks and fits ``onset = offset_s + slope * recording`` by least squares; drift in ppm is
   ``(slope - 1) * 1e6``. :func:`offset_clock` is the plain-offset case, :func:`identity_clock`
   the no-sync case (``onset`` = ``recording``).
3. :func:`read_recorder_times` reads the recorder's times from one column of a CSV/TSV file.

Conventions
-----------
- ``recording``: seconds from the first sample of the recording file; ``onset``: seconds on the
  recorder's clock (DESIGN.md).
- A mark's time is the start of the burst, taken as the lag where a burst of the stated length
  lines up with the quadrature matched filter (peak of the correlation magnitude), refined below
  one sample by parabolic interpolation of the peak.
- Residuals are ``recorder - fitted`` in seconds.

Method
------
Quadrature matched filter: the recording is correlated with a complex tone of the stated
frequency, Hann-windowed over the stated duration; the magnitude, divided by the energy of the
signal under the window (normalised cross-correlation), is near 1 where a burst at that frequency
stands alone and small for broadband or differently pitched sound (Turin 1960). Sub-sample peak
position by fitting a parabola through the three samples around the maximum (Smith & Serra 1987).
The clock model is the two-point / least-squares line of common practice (REFERENCES.md, clock
sync).

References
----------
.. [1] G. L. Turin, "An introduction to matched filters", IRE Trans. Information Theory 6(3),
   311-329, 1960.
.. [2] J. O. Smith and X. Serra, "PARSHL: an analysis/synthesis program for non-harmonic sounds
   based on a sinusoidal representation", Proc. ICMC 1987 (quadratic peak interpolation).
"""

from __future__ import annotations

import csv
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.signal
import soundfile as sf

from ..errors import InputError, WorkFailed
from ..timemap import TimeMap

__all__ = [
    "SyncMark",
    "ClockFit",
    "detect_sync_marks",
    "fit_clock",
    "offset_clock",
    "identity_clock",
    "read_recorder_times",
    "burst_template",
]

#: Largest residual (s) of the clock fit before a warning (common practice: 2 ms).
RESIDUAL_WARN_S = 0.002


@dataclass(frozen=True)
class SyncMark:
    """One detected mark: ``recording_s`` (start of the burst), ``score`` (0..1 normalised
    correlation at the peak) and ``level_db`` (RMS under the burst, dB re full scale)."""

    recording_s: float
    score: float
    level_db: float


@dataclass
class ClockFit:
    """The recording -> onset map and how well the sync points agree with it."""

    offset_s: float
    slope: float
    method: str  # "marks", "offset" or "none"
    recording_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    recorder_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    residuals_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    warnings: list[str] = field(default_factory=list)

    @property
    def drift_ppm(self) -> float:
        return (self.slope - 1.0) * 1e6

    @property
    def max_residual_s(self) -> float:
        return float(np.max(np.abs(self.residuals_s))) if self.residuals_s.size else 0.0

    def timemap(self, *, span_s: float = 1.0) -> TimeMap:
        """``recording -> onset`` as a :class:`~stimkit.timemap.TimeMap`."""
        return TimeMap.linear(offset=self.offset_s, slope=self.slope, src="recording", dst="onset",
                              span=max(float(span_s), 1.0))

    def __call__(self, recording_s):
        r = np.asarray(recording_s, dtype=np.float64)
        out = self.offset_s + self.slope * r
        return out if out.ndim else float(out)

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "offset_s": self.offset_s,
            "slope": round(self.slope, 12),
            "drift_ppm": round(self.drift_ppm, 4),
            "points": [
                {"recording_s": float(a), "recorder_s": float(p), "residual_s": float(r)}
                for a, p, r in zip(self.recording_s, self.recorder_s, self.residuals_s)
            ],
            "max_residual_s": self.max_residual_s,
            "warnings": list(self.warnings),
        }


def burst_template(*, frequency_hz: float, duration_s: float, sr: int) -> np.ndarray:
    """Complex analysis tone: Hann-windowed ``exp(2j pi f t)`` of ``duration_s``, unit energy."""
    n = max(int(round(duration_s * sr)), 4)
    t = np.arange(n) / sr
    win = scipy.signal.windows.hann(n, sym=False) if n > 8 else np.ones(n)
    tmpl = win * np.exp(2j * np.pi * frequency_hz * t)
    return tmpl / np.sqrt(np.sum(np.abs(tmpl) ** 2))


def _blocks(path: Path, *, block_frames: int, overlap_frames: int):
    """Yield ``(first_sample, mono_block)``; consecutive blocks overlap by ``overlap_frames``."""
    with sf.SoundFile(str(path)) as fh:
        start = 0
        hop = block_frames - overlap_frames
        while True:
            fh.seek(start)
            data = fh.read(block_frames, dtype="float64", always_2d=True)
            if data.shape[0] == 0:
                break
            yield start, data.mean(axis=1)
            if data.shape[0] < block_frames:
                break
            start += hop


def _parabolic(y0: float, y1: float, y2: float) -> float:
    """Offset in (-0.5, 0.5) of the vertex of the parabola through three equally spaced points."""
    den = y0 - 2.0 * y1 + y2
    if den >= 0:  # not a maximum: keep the sample
        return 0.0
    return float(np.clip(0.5 * (y0 - y2) / den, -0.5, 0.5))


def detect_sync_marks(
    path: str | Path,
    *,
    frequency_hz: float,
    duration_s: float,
    min_score: float = 0.5,
    min_level_db: float = -60.0,
    min_gap_s: float = 1.0,
    block_s: float = 30.0,
    start_s: float = 0.0,
    end_s: float | None = None,
    progress=None,
) -> list[SyncMark]:
    """Sync marks (tone bursts / clicks at ``frequency_hz``) in a recording, in time order.

    Parameters
    ----------
    path : path to the recording (any format soundfile reads); channels are averaged.
    frequency_hz : centre frequency of the burst.
    duration_s : stated length of the burst; the mark time is its start.
    min_score : smallest normalised correlation (0..1) that counts as a mark.
    min_level_db : smallest RMS under the burst (dB re full scale) that counts as a mark.
    min_gap_s : marks closer than this are one mark (the stronger wins).
    block_s : length of the streamed blocks.
    start_s, end_s : search only this part of the recording.
    progress : optional callback ``(task, fraction)``.

    Returns
    -------
    list of :class:`SyncMark`, sorted by ``recording_s``.
    """
    path = Path(path)
    info = sf.info(str(path))
    sr = int(info.samplerate)
    if not 0 < frequency_hz < sr / 2:
        raise InputError(f"sync mark frequency {frequency_hz} Hz is not below half the sample rate "
                         f"({sr / 2:g} Hz); state the burst's real frequency", path=path)
    tmpl = burst_template(frequency_hz=frequency_hz, duration_s=duration_s, sr=sr)
    n = tmpl.size
    kernel = np.conj(tmpl[::-1])
    block_frames = max(int(block_s * sr), 8 * n)
    overlap = n + 2
    first = int(max(start_s, 0.0) * sr)
    last = info.frames if end_s is None else min(info.frames, int(end_s * sr) + n)
    total = max(last - first, 1)
    cand_t: list[float] = []
    cand_s: list[float] = []
    cand_c: list[float] = []
    cand_l: list[float] = []
    for b0, x in _blocks(path, block_frames=block_frames, overlap_frames=overlap):
        if b0 + x.size <= first:
            continue
        if b0 >= last:
            break
        if x.size < n + 2:
            break
        # corr[k] = sum_j x[k + j] * conj(tmpl[j]) for k = 0 .. len(x) - n
        corr = np.abs(scipy.signal.fftconvolve(x, kernel, mode="valid"))
        c = np.concatenate([[0.0], np.cumsum(x * x)])
        energy = c[n:] - c[:-n]
        norm = np.sqrt(np.maximum(energy, 1e-20))
        # Cauchy-Schwarz bounds corr by norm; a real tone reaches half of it on the analytic
        # template (the negative-frequency half is not matched), hence the factor sqrt(2)
        score = np.minimum(np.sqrt(2.0) * corr / norm, 1.0)
        level_db = 10 * np.log10(np.maximum(energy / n, 1e-20))
        # only positions owned by this block (the overlap belongs to the next one)
        own_end = corr.size if b0 + x.size >= info.frames else x.size - overlap
        ok = (score >= min_score) & (level_db >= min_level_db)
        ok[own_end:] = False
        idx = np.flatnonzero(ok)
        if idx.size:
            peaks, _ = scipy.signal.find_peaks(np.where(ok, corr, 0.0))
            for k in peaks:
                k = int(k)
                if k <= 0 or k >= corr.size - 1:
                    continue
                frac = _parabolic(corr[k - 1], corr[k], corr[k + 1])
                t = (b0 + k + frac) / sr
                if t < start_s or (end_s is not None and t > end_s):
                    continue
                cand_t.append(t)
                cand_c.append(float(corr[k]))  # clusters keep the largest correlation
                cand_s.append(float(score[k]))
                cand_l.append(float(level_db[k]))
        if progress is not None:
            progress("sync marks", min(1.0, (b0 + x.size - first) / total))
    return _merge_close(cand_t, cand_c, cand_s, cand_l, min_gap_s=min_gap_s)


def _merge_close(ts, strengths, scores, levels, *, min_gap_s: float) -> list[SyncMark]:
    """Keep the strongest candidate in every cluster of candidates closer than ``min_gap_s``."""
    if not ts:
        return []
    order = np.argsort(ts, kind="stable")
    t = np.asarray(ts)[order]
    s = np.asarray(strengths)[order]
    sc = np.asarray(scores)[order]
    lv = np.asarray(levels)[order]
    out: list[SyncMark] = []
    i = 0
    while i < t.size:
        j = i
        while j + 1 < t.size and t[j + 1] - t[j] < min_gap_s:
            j += 1
        k = i + int(np.argmax(s[i:j + 1]))
        out.append(SyncMark(recording_s=float(t[k]), score=float(sc[k]), level_db=float(lv[k])))
        i = j + 1
    return out


def fit_clock(recording_s, recorder_s, *, residual_warn_s: float = RESIDUAL_WARN_S) -> ClockFit:
    """Least-squares line ``recorder = offset_s + slope * recording`` through paired sync times.

    One pair gives a plain offset (slope 1); two or more give offset and drift. A warning is
    added for every residual larger than ``residual_warn_s`` (common practice: 2 ms).
    """
    a = np.asarray(recording_s, dtype=np.float64).ravel()
    p = np.asarray(recorder_s, dtype=np.float64).ravel()
    if a.size != p.size or a.size == 0:
        raise InputError(f"clock fit needs pairs: {a.size} recording times, {p.size} recorder times")
    if a.size == 1:
        fit = ClockFit(offset_s=float(p[0] - a[0]), slope=1.0, method="marks",
                       recording_s=a, recorder_s=p, residuals_s=np.zeros(1))
        return fit
    if np.any(np.diff(a) <= 0) or np.any(np.diff(p) <= 0):
        raise InputError("sync times must increase on both clocks (are the recorder times in the "
                         "same order as the marks?)")
    # centred design for numerical conditioning over long recordings
    a0 = float(a.mean())
    A = np.column_stack([np.ones_like(a), a - a0])
    coef, *_ = np.linalg.lstsq(A, p, rcond=None)
    slope = float(coef[1])
    offset = float(coef[0] - slope * a0)
    resid = p - (offset + slope * a)
    warnings = []
    for ai, ri in zip(a, resid):
        if abs(ri) > residual_warn_s:
            warnings.append(f"sync point at recording {ai:.3f} s is {ri * 1000:+.1f} ms off the clock "
                            f"fit (more than {residual_warn_s * 1000:g} ms): check the pairing")
    if not slope > 0:
        raise WorkFailed("clock fit gives a non-increasing map; check the recorder sync times")
    return ClockFit(offset_s=offset, slope=slope, method="marks", recording_s=a, recorder_s=p,
                    residuals_s=resid, warnings=warnings)


def offset_clock(offset_s: float) -> ClockFit:
    """``onset = recording + offset_s`` (a stated plain offset, no drift)."""
    return ClockFit(offset_s=float(offset_s), slope=1.0, method="offset")


def identity_clock() -> ClockFit:
    """No sync: ``onset`` equals ``recording``."""
    return ClockFit(offset_s=0.0, slope=1.0, method="none")


def read_recorder_times(path: str | Path, *, column: str) -> np.ndarray:
    """Times (s) from column ``column`` of a CSV (``,``) or TSV (tab) file with a header line.

    Blank cells and ``n/a`` are skipped. Raises :class:`InputError` naming the file when the
    column is missing or a cell is not a number.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"cannot read recorder sync file ({exc.strerror}); check the path",
                         path=path) from None
    delim = "\t" if path.suffix.lower() in (".tsv", ".tab", ".txt") else ","
    rows = list(csv.reader(text.splitlines(), delimiter=delim))
    rows = [r for r in rows if r and not (len(r) == 1 and not r[0].strip())]
    if not rows:
        raise InputError("recorder sync file is empty; it needs a header line and one row per mark",
                         path=path)
    header = [h.strip() for h in rows[0]]
    if column not in header:
        raise InputError(f"no column '{column}' in the recorder sync file (columns: "
                         f"{', '.join(header)}); set recorder_column to one of them", path=path)
    j = header.index(column)
    out = []
    for lineno, r in enumerate(rows[1:], start=2):
        cell = r[j].strip() if j < len(r) else ""
        if cell == "" or cell.lower() == "n/a":
            continue
        try:
            out.append(float(cell))
        except ValueError:
            raise InputError(f"line {lineno}: '{cell}' in column '{column}' is not a number of "
                             f"seconds", path=path) from None
    if not out:
        raise InputError(f"column '{column}' holds no times", path=path)
    return np.asarray(out, dtype=np.float64)
