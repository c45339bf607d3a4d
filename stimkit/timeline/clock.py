"""Clock sync: find sync marks in a recording and fit the recording -> recorder clock map.

What it computes
----------------
1. :func:`detect_sync_marks` scans a recording (streamed in blocks, so a concert-length file is
   never held in memory) for tone bursts or clicks at a stated frequency and returns the
   ``recording`` time of each mark's start.
2. :func:`pair_marks` picks, among the detected marks, the one that goes with each time the
   physiological recorder logged, by their spacing (extra detections are ignored).
3. :func:`fit_clock` fits ``onset = offset_s + slope * recording`` through the pairs by least
   squares; drift in ppm is ``(slope - 1) * 1e6``, residuals over 2 ms are warned about.
   :func:`offset_clock` is the plain-offset case, :func:`identity_clock` the no-sync case
   (``onset`` = ``recording``).
4. :func:`read_recorder_times` reads the recorder's times from one column of a CSV/TSV file.

Conventions
-----------
- ``recording``: seconds from the first sample of the recording file; ``onset``: seconds on the
  recorder's clock (DESIGN.md).
- A mark's time is where its envelope at the stated frequency first reaches half of its peak
  (the 50 % point, as for a trigger edge); for a burst that starts abruptly this is its first
  sample. It is found below one sample by linear interpolation.
- Residuals are ``recorder - fitted`` in seconds.

Method
------
Bursts are detected by a quadrature matched filter: the recording is correlated with a complex
tone of the stated frequency and duration; the magnitude, divided by the energy of the signal
under the template (normalised cross-correlation), is near 1 where a burst at that frequency
stands alone and small for broadband or differently pitched sound (Turin 1960). Clicks, too
short for that, are detected as a jump of the demodulated envelope over its mean of the
preceding 200 ms (an energy-onset detector at the stated frequency). Timing by complex
demodulation at the stated frequency (the signal times ``exp(-2j pi f t)``, smoothed by a short
symmetric low-pass, is the burst's envelope; Oppenheim & Schafer 2010, ch. 12 on the analytic
signal): a zero-phase smoother keeps the half-height crossing of a step at the step.
The clock model is the two-point / least-squares line of common practice (REFERENCES.md, clock
sync).

References
----------
.. [1] G. L. Turin, "An introduction to matched filters", IRE Trans. Information Theory 6(3),
   311-329, 1960.
.. [2] A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal Processing*, 3rd ed., Pearson
   2010 (complex demodulation, zero-phase filtering).
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
    "half_rise_onset",
    "pair_marks",
    "check_clock",
    "MAX_OFFSET_S",
    "MAX_DRIFT_PPM",
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
            "formula": "onset = offset_s + (1 + drift_ppm * 1e-6) * recording",
            "offset_s": self.offset_s,
            "drift_ppm": round(self.drift_ppm, 4),
            "points": [
                {"recording_s": float(a), "recorder_s": float(p), "residual_s": float(r)}
                for a, p, r in zip(self.recording_s, self.recorder_s, self.residuals_s)
            ],
            "max_residual_s": self.max_residual_s,
            "warnings": list(self.warnings),
        }


def burst_template(*, frequency_hz: float, duration_s: float, sr: int) -> np.ndarray:
    """Complex analysis tone ``exp(2j pi f t)`` of ``duration_s`` (rectangular), unit energy."""
    n = max(int(round(duration_s * sr)), 4)
    t = np.arange(n) / sr
    tmpl = np.exp(2j * np.pi * frequency_hz * t)
    return tmpl / np.sqrt(n)


def _blocks(path: Path, *, first: int, last: int, sr: int, block_frames: int, overlap_frames: int):
    """Yield ``(first_sample, mono_block)`` over samples ``[first, last)`` streamed by
    :func:`stimkit.audio.read.iter_blocks`; consecutive blocks overlap by ``overlap_frames`` so a
    mark cut by a block edge is whole in the next block."""
    from ..audio.read import iter_blocks

    for t0, x in iter_blocks(path, block_s=(block_frames - overlap_frames) / sr,
                             overlap_s=overlap_frames / sr, mono=True, start_s=first / sr,
                             end_s=last / sr):
        yield int(round(t0 * sr)), np.asarray(x, dtype=np.float64)


def half_rise_onset(x: np.ndarray, k: int, *, sr: int, frequency_hz: float, duration_s: float) -> float:
    """Fractional sample (in ``x``) where the burst near sample ``k`` first reaches half its peak
    envelope.

    The envelope is the magnitude of the signal demodulated at ``frequency_hz`` and smoothed by
    a symmetric (zero-phase) Hann kernel, so a step in amplitude crosses its half height exactly
    at the step; the crossing is interpolated linearly between samples.
    """
    smooth_s = min(max(0.002, 2.0 / frequency_hz), duration_s / 2)
    L = max(int(round(smooth_s * sr)) | 1, 3)  # odd length: centred kernel
    n = max(int(round(duration_s * sr)), 4)
    lo = max(k - n // 2 - 2 * L, 0)
    hi = min(k + n + 2 * L, x.size)
    idx = np.arange(lo, hi)
    z = x[lo:hi] * np.exp(-2j * np.pi * frequency_hz * idx / sr)
    h = scipy.signal.windows.hann(L + 2)[1:-1]
    env = np.abs(np.convolve(z, h / h.sum(), mode="same"))
    a = max(k - lo - n // 2, 0)
    b = min(k - lo + n, env.size)
    if b <= a:
        return float(k)
    p = a + int(np.argmax(env[a:b]))
    half = 0.5 * env[p]
    i = p
    while i > 0 and env[i - 1] >= half:
        i -= 1
    if i == 0:
        return float(lo)
    # env[i - 1] < half <= env[i]; a sampled step whose first sample is m crosses half height at
    # m - 0.5, hence the half-sample shift that makes the answer the burst's first sample
    frac = (half - env[i - 1]) / max(env[i] - env[i - 1], 1e-20)
    return float(lo + i - 1 + frac + 0.5)


def detect_sync_marks(
    path: str | Path,
    *,
    frequency_hz: float,
    duration_s: float,
    kind: str | None = None,
    min_score: float = 0.7,
    min_jump_db: float = 20.0,
    min_level_db: float = -60.0,
    min_gap_s: float = 1.0,
    block_s: float = 30.0,
    start_s: float = 0.0,
    end_s: float | None = None,
    progress=None,
) -> list[SyncMark]:
    """Sync marks (tone bursts / clicks at ``frequency_hz``) in a recording, in time order.

    Detection of a ``"burst"`` (a steady tone, default when ``duration_s >= 10 ms``): quadrature
    matched filter over ``duration_s``, normalised correlation at least ``min_score``. Detection
    of a ``"click"`` (a short decaying tone, default below 10 ms): the envelope at
    ``frequency_hz`` jumps by at least ``min_jump_db`` over its mean of the preceding 200 ms.
    Both need a level of at least ``min_level_db``; one mark per ``min_gap_s``. Timing: the
    half-rise point of the demodulated envelope (:func:`half_rise_onset`), which for a burst
    that starts abruptly is its first sample.

    Parameters
    ----------
    path : path to the recording (any format soundfile reads); channels are averaged.
    frequency_hz : centre frequency of the burst or click.
    duration_s : stated length of the burst.
    kind : ``"burst"`` or ``"click"`` (default from ``duration_s``, see above).
    min_score : smallest normalised correlation (0..1) that counts as a burst.
    min_jump_db : smallest rise of the envelope over its recent mean that counts as a click.
    min_level_db : smallest RMS under the burst (dB re full scale) that counts as a mark.
    min_gap_s : marks closer than this are one mark (the stronger wins).
    block_s : length of the streamed blocks.
    start_s, end_s : search only this part of the recording (recording seconds).
    progress : optional callback ``(task, fraction)``.

    Returns
    -------
    list of :class:`SyncMark`, sorted by ``recording_s``.
    """
    path = Path(path)
    try:
        info = sf.info(str(path))
    except RuntimeError as exc:
        raise InputError(f"cannot read the recording ({exc}); give a WAV/FLAC/OGG/AIFF file",
                         path=path) from None
    sr = int(info.samplerate)
    if not 0 < frequency_hz < sr / 2:
        raise InputError(f"sync mark frequency {frequency_hz} Hz is not below half the sample rate "
                         f"({sr / 2:g} Hz); state the burst's real frequency", path=path)
    kind = kind or ("burst" if duration_s >= 0.01 else "click")
    if kind not in ("burst", "click"):
        raise InputError(f"unknown sync mark kind '{kind}'; use 'burst' or 'click'")
    tmpl = burst_template(frequency_hz=frequency_hz, duration_s=duration_s, sr=sr)
    n = tmpl.size
    kernel = np.conj(tmpl[::-1])
    # envelope smoother and background window of the click detector
    L = max(int(round(max(0.001, 2.0 / frequency_hz) * sr)) | 1, 3)
    hann = scipy.signal.windows.hann(L + 2)[1:-1]
    hann /= hann.sum()
    bg_n, bg_gap = int(0.2 * sr), int(0.003 * sr) + L
    # consecutive blocks overlap by pre + post samples; a block owns the marks found between
    # its first pre and last post samples (the first and last block own their outer edges), so
    # every mark is seen once, with pre samples of context before it and post after it
    pre = bg_n + bg_gap + 2 * n
    post = 2 * n + int(0.02 * sr)
    overlap = pre + post
    block_frames = max(int(block_s * sr), 16 * n, 4 * overlap)
    first = int(max(start_s, 0.0) * sr)
    last = info.frames if end_s is None else min(info.frames, int(end_s * sr) + n)
    total = max(last - first, 1)
    cand: list[tuple[float, float, float, float]] = []  # time, correlation, score, level
    for b0, x in _blocks(path, first=first, last=last, sr=sr, block_frames=block_frames, overlap_frames=overlap):
        if x.size < n + 2:
            break
        if kind == "burst":
            # corr[k] = |sum_j x[k + j] * conj(tmpl[j])| for k = 0 .. len(x) - n
            corr = np.abs(scipy.signal.fftconvolve(x, kernel, mode="valid"))
            c = np.concatenate([[0.0], np.cumsum(x * x)])
            energy = c[n:] - c[:-n]
            # Cauchy-Schwarz bounds corr by sqrt(energy); a real tone reaches half of it on the
            # analytic template (its negative-frequency half is not matched), hence sqrt(2)
            score = np.minimum(np.sqrt(2.0) * corr / np.sqrt(np.maximum(energy, 1e-20)), 1.0)
            level_db = 10 * np.log10(np.maximum(energy / n, 1e-20))
            ok = (score >= min_score) & (level_db >= min_level_db)
        else:
            idx = np.arange(b0, b0 + x.size)
            env = np.abs(np.convolve(x * np.exp(-2j * np.pi * frequency_hz * idx / sr), hann, mode="same"))
            c = np.concatenate([[0.0], np.cumsum(env)])
            k = np.arange(env.size)
            a0, a1 = np.clip(k - bg_gap - bg_n, 0, None), np.clip(k - bg_gap, 0, None)
            bg = (c[a1] - c[a0]) / np.maximum(a1 - a0, 1)
            jump_db = 20 * np.log10(np.maximum(env, 1e-12) / np.maximum(bg, 1e-12))
            corr = env
            score = np.clip(1.0 - bg / np.maximum(env, 1e-12), 0.0, 1.0)
            level_db = 20 * np.log10(np.maximum(2.0 * env, 1e-12))  # peak level of the tone
            ok = (jump_db >= min_jump_db) & (level_db >= min_level_db) & (a1 - a0 >= int(0.02 * sr))
        own_end = ok.size if b0 + x.size >= last else x.size - post
        own_start = pre if b0 > first else 0
        ok[own_end:] = False
        ok[:own_start] = False
        if ok.any():
            peaks, _ = scipy.signal.find_peaks(np.where(ok, corr, 0.0), distance=max(n // 2, 1))
            for k in peaks:
                k = int(k)
                t = (b0 + half_rise_onset(x, k, sr=sr, frequency_hz=frequency_hz,
                                          duration_s=duration_s)) / sr
                if t < start_s or (end_s is not None and t > end_s):
                    continue
                cand.append((t, float(corr[k]), float(score[k]), float(level_db[k])))
        if progress is not None:
            progress("sync marks", min(1.0, (b0 + x.size - first) / total))
    return _merge_close(cand, min_gap_s=min_gap_s)


def _merge_close(cand, *, min_gap_s: float) -> list[SyncMark]:
    """Keep the strongest candidate of every cluster of candidates closer than ``min_gap_s``."""
    if not cand:
        return []
    cand = sorted(cand)
    out: list[SyncMark] = []
    i = 0
    while i < len(cand):
        j = i
        while j + 1 < len(cand) and cand[j + 1][0] - cand[j][0] < min_gap_s:
            j += 1
        best = max(cand[i:j + 1], key=lambda c: c[1])
        out.append(SyncMark(recording_s=best[0], score=best[2], level_db=best[3]))
        i = j + 1
    return out


def pair_marks(detected_s, recorder_s, *, max_drift_ppm: float = 300.0, tol_s: float = 0.02):
    """Pick, among detected marks, the one that goes with each recorder time.

    The recorder times fix the spacing of the marks; every detected mark is tried as the
    partner of every recorder time, the others are predicted from the spacing and matched to
    the nearest detected mark within ``tol_s + max_drift_ppm * 1e-6 * spacing``. The pairing
    matching the most recorder times (then the smallest total error) wins, so extra detections
    (claps that look like clicks, say) are ignored -- but only when the spacing decides: if two
    different pairings match as many recorder times (one recorder time and two detected marks,
    or equally spaced marks of which the recorder logged only some), the pairing is a guess and
    :class:`~stimkit.errors.WorkFailed` is raised, naming the candidates and how to decide.

    Returns
    -------
    (recording_s, missing) : array of matched recording times (NaN where none matched) and the
    indices of recorder times without a mark.
    """
    det = np.sort(np.asarray(detected_s, dtype=np.float64))
    rec = np.asarray(recorder_s, dtype=np.float64)
    if det.size == 0:
        return np.full(rec.size, np.nan), list(range(rec.size))
    found: dict[tuple, tuple[int, float, np.ndarray]] = {}  # pairing -> (matched, error, times)
    for i0 in range(rec.size):          # the recorder time taken as the anchor
        for d0 in det:                  # the detection taken as its partner
            pred = d0 + (rec - rec[i0])
            tol = tol_s + max_drift_ppm * 1e-6 * np.abs(rec - rec[i0])
            j = np.clip(np.searchsorted(det, pred), 1, max(det.size - 1, 1))
            cand = np.stack([det[j - 1], det[np.minimum(j, det.size - 1)]])
            k = np.argmin(np.abs(cand - pred), axis=0)
            near = cand[k, np.arange(rec.size)]
            err = np.abs(near - pred)
            ok = err <= tol
            vals = near[ok]
            if vals.size != np.unique(vals).size:  # one detection serves one recorder time
                continue
            key = tuple(float(v) if o else None for v, o in zip(near, ok))
            total = float(err[ok].sum())
            if key not in found or total < found[key][1]:
                found[key] = (int(ok.sum()), total, np.where(ok, near, np.nan))
    most = max(v[0] for v in found.values())
    best = sorted((v for v in found.values() if v[0] == most), key=lambda v: v[1])
    if most > 0 and len(best) > 1:
        raise WorkFailed(_ambiguous_message(rec, best))
    got = best[0][2]
    return got, [int(i) for i in np.flatnonzero(~np.isfinite(got))]


def _ambiguous_message(rec: np.ndarray, best: list) -> str:
    def options_at(k):
        return sorted({float(b[2][k]) for b in best if np.isfinite(b[2][k])})

    i = max(range(rec.size), key=lambda k: (len(options_at(k)), -k))
    options = options_at(i)
    shown = " s, ".join(f"{t:.3f}" for t in options[:4])
    more = f" and {len(options) - 4} more" if len(options) > 4 else ""
    return (f"the recorder's sync time {rec[i]:.3f} s could go with {len(options)} of the detected "
            f"marks (at {shown} s{more} recording time), so the clock would be a guess; give the "
            f"recorder times of every mark in the recording (recorder_times_s / recorder_file), or "
            f"limit the search to the logged marks with [sync] search_start_s / search_end_s, or "
            f"state the offset with offset_s")


#: Largest clock offset accepted (s): ``onset`` is seconds from the start of the physiological
#: recording (BIDS), so more than ~11.6 days means recorder times on another scale (Unix time,
#: milliseconds) or a typing error.
MAX_OFFSET_S = 1e6
#: Largest clock drift accepted (ppm): independent audio clocks differ by about 10-100 ppm
#: (REFERENCES.md, clock sync; common practice), so a fit beyond 1000 ppm (0.1 %) means marks
#: paired wrongly, recorder times in other units, or marks too close together to measure drift.
MAX_DRIFT_PPM = 1000.0


def check_clock(offset_s: float, slope: float = 1.0, *, where: str = "") -> None:
    """Refuse an absurd clock map (:class:`~stimkit.errors.InputError` for a stated offset,
    :class:`~stimkit.errors.WorkFailed` for a fit): see :data:`MAX_OFFSET_S`, :data:`MAX_DRIFT_PPM`."""
    lead = f"{where}: " if where else ""
    if not np.isfinite(offset_s) or abs(offset_s) > MAX_OFFSET_S:
        raise InputError(f"{lead}clock offset {offset_s:.6g} s is beyond +-{MAX_OFFSET_S:.0e} s; "
                         f"onset counts seconds from the start of the physiological recording, so "
                         f"give recorder times (or offset_s) in seconds from that start")
    drift = (slope - 1.0) * 1e6
    if not np.isfinite(drift) or abs(drift) > MAX_DRIFT_PPM:
        raise WorkFailed(f"{lead}the sync fit gives a clock drift of {drift:.6g} ppm, beyond "
                         f"+-{MAX_DRIFT_PPM:g} ppm (audio and recorder clocks differ by about "
                         f"10-100 ppm); check that the recorder times are seconds and pair with the "
                         f"marks, or use marks further apart")


def fit_clock(recording_s, recorder_s, *, residual_warn_s: float = RESIDUAL_WARN_S) -> ClockFit:
    """Least-squares line ``recorder = offset_s + slope * recording`` through paired sync times.

    One pair gives a plain offset (slope 1); two or more give offset and drift. A warning is
    added for every residual larger than ``residual_warn_s`` (common practice: 2 ms).
    """
    a = np.asarray(recording_s, dtype=np.float64).ravel()
    p = np.asarray(recorder_s, dtype=np.float64).ravel()
    if a.size != p.size or a.size == 0:
        raise InputError(f"clock fit needs pairs: {a.size} recording times, {p.size} recorder times")
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(p))):
        raise InputError("sync times must be finite numbers of seconds")
    if a.size == 1:
        check_clock(float(p[0] - a[0]))
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
    check_clock(offset, slope)
    return ClockFit(offset_s=offset, slope=slope, method="marks", recording_s=a, recorder_s=p,
                    residuals_s=resid, warnings=warnings)


def offset_clock(offset_s: float) -> ClockFit:
    """``onset = recording + offset_s`` (a stated plain offset, no drift); an absurd offset is
    refused (:func:`check_clock`)."""
    check_clock(float(offset_s))
    return ClockFit(offset_s=float(offset_s), slope=1.0, method="offset")


def identity_clock() -> ClockFit:
    """No sync: ``onset`` equals ``recording``."""
    return ClockFit(offset_s=0.0, slope=1.0, method="none")


#: Largest text file read as a recorder sync table (bytes): a log of sync marks is a few lines.
MAX_SYNC_FILE_BYTES = 50 * 1024 * 1024


def _read_text_file(path: Path, *, what: str) -> str:
    """Text of a small table file: UTF-8 (with or without BOM), or UTF-16 with its BOM (Excel's
    "Unicode text"); anything else -- another encoding, random bytes -- is refused in one line."""
    try:
        size = path.stat().st_size
        if size > MAX_SYNC_FILE_BYTES:
            raise InputError(f"{what} is {size / 1e6:.0f} MB; a table of sync times is a few lines "
                             f"(is this the right file?)", path=path)
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read {what} ({exc.strerror}); check the path", path=path) from None
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            return data.decode("utf-16")
        except UnicodeDecodeError:
            pass
    elif b"\x00" not in data:
        try:
            return data.decode("utf-8-sig")
        except UnicodeDecodeError:
            pass
    raise InputError(f"{what} is not UTF-8 text (another encoding, or not a text file); save it "
                     f"as UTF-8 CSV/TSV with a header line", path=path)


def read_recorder_times(path: str | Path, *, column: str) -> np.ndarray:
    """Times (s) from column ``column`` of a CSV (``,``) or TSV (tab) file with a header line.

    Blank cells and ``n/a`` are skipped. Raises :class:`InputError` naming the file (and the line)
    when the column is missing, a cell is not a number, or a time is beyond :data:`MAX_OFFSET_S`.
    """
    path = Path(path)
    text = _read_text_file(path, what="recorder sync file")
    delim = "\t" if path.suffix.lower() in (".tsv", ".tab", ".txt") else ","
    try:
        rows = list(csv.reader(text.splitlines(), delimiter=delim))
    except csv.Error as exc:
        raise InputError(f"recorder sync file is not a readable table ({exc}); save it as a "
                         f"CSV or TSV text file", path=path) from None
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
            v = float(cell)
            if not np.isfinite(v):
                raise ValueError(cell)
        except ValueError:
            raise InputError(f"line {lineno}: '{cell}' in column '{column}' is not a number of "
                             f"seconds", path=path) from None
        if abs(v) > MAX_OFFSET_S:
            shown = cell if len(cell) <= 24 else cell[:20] + "..."
            raise InputError(f"line {lineno}: {shown} in column '{column}' is beyond +-{MAX_OFFSET_S:.0e} s; "
                             f"give the recorder times in seconds from the start of the physiological "
                             f"recording (not Unix time or milliseconds)", path=path)
        out.append(v)
    if not out:
        raise InputError(f"column '{column}' holds no times", path=path)
    return np.asarray(out, dtype=np.float64)
