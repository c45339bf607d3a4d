"""Per-frame features of a recording at a fixed rate, computed in one streaming pass.

Public functions
----------------
- :func:`compute_features` -- a recording file -> :class:`FeatureResult` (production path).
- :func:`features_from_array` -- the same computation on an in-memory array (tests, other
  modules); both feed blocks through the same analyser, and results do not depend on the block
  length.
- :func:`write_features` -- ``<name>.features.tsv`` (with header) and the BIDS continuous file
  ``<name>_stim.tsv.gz`` + ``<name>_stim.json`` in one atomic :class:`OutputSet`.
- :func:`summary_table` -- a rich table of the whole-file values.

Conventions
-----------
- Frame ``k`` covers ``[k/rate, (k+1)/rate)`` from the start of the analysed range; its time (index
  ``recording``: seconds from the file's first sample) is the **centre** ``start_s + (k + 0.5)/rate``.
  There are ``floor(duration * rate)`` frames; a trailing part shorter than one frame period is
  analysed (it counts for the whole-file values) but gets no row.
- Loudness (BS.1770 channel weights, native sample rate): momentary / short-term loudness of the
  0.4 s / 3 s window centred on the frame centre (clipped at the file edges). ``rms_dbfs``: mean
  power of the mono mix over the frame interval. Levels of digital silence read ``-120``.
- Everything else uses the mono mix (mean of all channels) resampled to 22.05 kHz (libsoxr HQ),
  STFT 2048 / hop 512 (43 frames/s, frame centres as ``librosa.stft(center=True)``). Per-STFT-frame
  values are **averaged over the frame interval**; when the interval holds no STFT frame (rates
  above ~43 Hz) the value is linearly interpolated at the frame centre. Onset rate, tempo and key
  are windowed around the frame centre (windows stated in the column descriptions). With rates
  above 4 Hz, tempo is evaluated at 4 Hz and each frame takes the nearest value.
- Frames whose centre lies in a silent segment get n/a (NaN; ``None`` for the key name) for the
  tempo, key and tonal columns (:data:`UNDEFINED_IN_SILENCE`): nothing is measured there.
- Memory is bounded by the block length (10 s, two blocks decoded ahead in a reader thread) plus
  a few floats per STFT frame and per 5 ms. The loudness path runs in a second thread.

References
----------
See :mod:`stimkit.audio.loudness`, :mod:`stimkit.audio.rhythm`, :mod:`stimkit.audio.spectral`,
:mod:`stimkit.audio.tonal`, :mod:`stimkit.audio.silence`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import pandas as pd

from ..errors import InputError
from . import rhythm, silence, spectral, tonal
from .loudness import GRID_STEP_S, EnergyGrid, LoudnessMeter, window_mean
from .read import (MIN_SAMPLE_RATE_HZ, MAX_SAMPLE_RATE_HZ, StreamResampler, _clean, as_block,
                   audio_info, iter_blocks)

__all__ = ["FeatureResult", "compute_features", "features_from_array", "write_features",
           "summary_table", "COLUMNS", "UNITS", "DESCRIPTIONS", "UNDEFINED_IN_SILENCE", "MAX_RATE_HZ",
           "BLOCK_S"]

MAX_RATE_HZ = 100.0
BLOCK_S = 10.0
LEVEL_FLOOR_DB = -120.0
TEMPO_EVAL_MAX_HZ = 4.0

CHROMA_COLUMNS = [f"chroma_{tonal.column_safe(p)}" for p in tonal.PITCH_CLASSES]
#: Columns set to n/a (NaN, or None for text) in frames inside a silent segment: no tempo, key or
#: tonal value is measured where nothing sounds.
UNDEFINED_IN_SILENCE = (["tempo_bpm", "tempo_confidence", "pulse_clarity"] + CHROMA_COLUMNS
                        + ["key", "key_strength", "harmonic_change", "roughness"])
COLUMNS = (["momentary_lufs", "short_term_lufs", "rms_dbfs", "onset_strength", "onset_rate_hz",
            "tempo_bpm", "tempo_confidence", "pulse_clarity", "centroid_hz", "bandwidth_hz",
            "rolloff_hz", "flatness", "flux"] + CHROMA_COLUMNS
           + ["key", "key_strength", "harmonic_change", "roughness", "silent"])

UNITS = {
    "momentary_lufs": "LUFS", "short_term_lufs": "LUFS", "rms_dbfs": "dBFS", "onset_strength": "dB",
    "onset_rate_hz": "Hz", "tempo_bpm": "BPM", "tempo_confidence": "ratio", "pulse_clarity": "ratio",
    "centroid_hz": "Hz", "bandwidth_hz": "Hz", "rolloff_hz": "Hz", "flatness": "ratio",
    "flux": "arbitrary", **{c: "ratio" for c in CHROMA_COLUMNS}, "key": "n/a",
    "key_strength": "ratio", "harmonic_change": "arbitrary", "roughness": "arbitrary", "silent": "n/a",
}

_SILENT_NA = " It is n/a in silent frames."

DESCRIPTIONS = {
    "momentary_lufs": "Momentary loudness in LUFS (ITU-R BS.1770-4, EBU Tech 3341): the K-weighted level of the 0.4 s window centred on the frame; -120 for digital silence.",
    "short_term_lufs": "Short-term loudness in LUFS (EBU Tech 3341): the K-weighted level of the 3 s window centred on the frame, clipped at the file edges; -120 for digital silence.",
    "rms_dbfs": "RMS level of the mono mix over the frame interval in dBFS: 10 log10 of the mean square, so that a full-scale sine reads -3.01 dBFS and a full-scale square wave 0 dBFS.",
    "onset_strength": "Onset strength in dB, mean over the frame interval: a SuperFlux-style spectral flux (Böck & Widmer 2013), the mean over 24-per-octave log-frequency bands of the positive dB rise of the next three STFT frames above the band's maximum over its neighbours and over the previous five frames.",
    "onset_rate_hz": "Onset rate in onsets per second: the onsets found by adaptive-threshold peak picking of the onset strength (Bello et al. 2005) in a 3 s window centred on the frame.",
    "tempo_bpm": "Local tempo in beats per minute, from the autocorrelation of the onset strength in an 8.9 s Hann window centred on the frame (40-240 BPM), the metrical level chosen with a log-normal prior around 120 BPM (Ellis 2007); n/a where the window holds no periodicity." + _SILENT_NA,
    "tempo_confidence": "Tempo confidence as a ratio from 0 to 1: the normalised autocorrelation of the onset strength at the chosen beat period." + _SILENT_NA,
    "pulse_clarity": "Pulse clarity as a ratio from 0 to 1: the maximum of the normalised autocorrelation of the onset strength over the beat range (40-240 BPM) in the tempo window, one of the pulse-clarity descriptors of Lartillot, Eerola, Toiviainen & Fornari (2008)." + _SILENT_NA,
    "centroid_hz": "Spectral centroid of the 22.05 kHz mono mix in Hz, mean over the frame interval.",
    "bandwidth_hz": "Spectral bandwidth in Hz, the magnitude-weighted standard deviation of frequency around the centroid, mean over the frame interval.",
    "rolloff_hz": "Spectral roll-off in Hz, the frequency below which 85 % of the spectral magnitude lies, mean over the frame interval.",
    "flatness": "Spectral flatness as a ratio from 0 to 1, the geometric over the arithmetic mean of the power spectrum, mean over the frame interval.",
    "flux": "Positive spectral flux in linear magnitude per frequency bin (a full-scale sine has magnitude 1 at its bin): the mean positive magnitude increase per bin from the previous STFT frame, mean over the frame interval.",
    **{c: f"Chroma energy of pitch class {p} as a ratio from 0 to 1 (STFT chroma, A440, each STFT frame scaled to a maximum of 1), mean over the frame interval." + _SILENT_NA
       for c, p in zip(CHROMA_COLUMNS, tonal.PITCH_CLASSES)},
    "key": "Local key, the best of the 24 Krumhansl-Kessler key profiles (Krumhansl 1990) by Pearson correlation with the chroma summed over a 10 s window centred on the frame." + _SILENT_NA,
    "key_strength": "Key strength, the Pearson correlation (from -1 to 1, given as a ratio) of the chroma summed over the 10 s key window with the best of the 24 Krumhansl-Kessler key profiles, the key strength of the Krumhansl-Schmuckler key-finding algorithm (Krumhansl 1990; Temperley 1999)." + _SILENT_NA,
    "harmonic_change": "Harmonic change in tonal-centroid units (Harte, Sandler & Gasser 2006): the distance between the smoothed 6-dimensional tonal centroids of neighbouring STFT frames, mean over the frame interval." + _SILENT_NA,
    "roughness": "Sensory roughness (Plomp & Levelt 1965; Vassilakis 2001), estimated with Sethares' (1993) parameterisation of the Plomp-Levelt curve summed over pairs of the 20 strongest spectral peaks below 5 kHz, in arbitrary units that grow with level squared (not in asper), mean over the frame interval." + _SILENT_NA,
    "silent": "Silence flag: 1 if the frame centre lies in a silent segment (the K-weighted 50 ms level below -50 LUFS for at least 1 s), else 0.",
}


@dataclass
class FeatureResult:
    """Per-frame features of one recording and its whole-file values."""

    frame: pd.DataFrame
    units: dict
    descriptions: dict
    summary: dict
    rate_hz: float
    path: Path | None
    name: str
    start_time_s: float = 0.0
    settings: dict = field(default_factory=dict)


def _check_rate(rate_hz) -> float:
    try:
        r = float(rate_hz)
    except (TypeError, ValueError):
        raise InputError(f"--rate must be a number of frames per second, got {rate_hz!r}") from None
    if not (math.isfinite(r) and 0 < r <= MAX_RATE_HZ):
        raise InputError(f"--rate must be above 0 and at most {MAX_RATE_HZ:g} Hz, got {rate_hz}")
    return r


class _Analyser:
    """One streaming pass: native-rate loudness and RMS, 22.05 kHz STFT features."""

    def __init__(self, *, sample_rate_hz: int, channels: int):
        self.fs, self.channels = int(sample_rate_hz), int(channels)
        self.loud = LoudnessMeter(sample_rate_hz=self.fs, channels=self.channels)
        self.rms = EnergyGrid(sample_rate_hz=self.fs)
        self.res = StreamResampler(in_rate_hz=self.fs, out_rate_hz=spectral.ANALYSIS_SR, channels=1)
        self.stft = spectral.StftStream()
        self.freqs = spectral.frequencies()
        self.onset = rhythm.OnsetStrengthStream(sr=spectral.ANALYSIS_SR, n_fft=spectral.N_FFT)
        self.chroma = tonal.ChromaStream(sr=spectral.ANALYSIS_SR, n_fft=spectral.N_FFT)
        from concurrent.futures import ThreadPoolExecutor

        self._pool = ThreadPoolExecutor(max_workers=1)
        self._prev_mag = None
        self._env, self._desc, self._chroma, self._rough = [], [], [], []

    def _spectra(self, power: np.ndarray) -> None:
        if power.shape[0] == 0:
            return
        self._env.append(self.onset.push(power))
        d, self._prev_mag = spectral.spectral_descriptors(power, prev_mag=self._prev_mag, freqs=self.freqs)
        self._desc.append(d.astype(np.float32))
        self._chroma.append(self.chroma.push(power))
        self._rough.append(tonal.roughness(power, freqs=self.freqs).astype(np.float32))

    def push(self, block: np.ndarray) -> None:
        x = as_block(block)
        # the native-rate loudness path runs in a worker thread while this one does the spectra
        fut = self._pool.submit(self.loud.push, x)
        try:
            mono = _mono_mix(x)
            self.rms.push(mono * mono)
            self._spectra(self.stft.push(self.res.push(mono)))
        finally:
            fut.result()

    def finish(self):
        self._pool.shutdown(wait=True)
        self._spectra(self.stft.push(self.res.push(np.zeros(0), last=True)))
        self._spectra(self.stft.finish())
        self._env.append(self.onset.finish())

        def cat(xs, shape):
            out = np.concatenate(xs, axis=0) if xs else np.zeros(shape, np.float32)
            xs.clear()  # keep one copy only
            return out

        return (cat(self._env, (0,)), cat(self._desc, (0, 5)), cat(self._chroma, (0, 12)),
                cat(self._rough, (0,)))


def _mono_mix(x: np.ndarray) -> np.ndarray:
    """Mean of the channels of ``x`` (n, channels), summed column by column in ``x``'s own
    precision (the same values as a matrix-vector product with weights 1/channels, without its
    slow path for two columns), as float64."""
    if x.shape[1] == 1:
        return x[:, 0].astype(np.float64)
    acc = x[:, 0] + x[:, 1]
    for c in range(2, x.shape[1]):
        acc += x[:, c]
    if x.shape[1] == 2:
        acc *= x.dtype.type(0.5)
        return acc.astype(np.float64)
    return (acc / x.dtype.type(x.shape[1])).astype(np.float64)


def _prefetch(iterable, depth: int = 2):
    """Iterate ``iterable`` in a background thread, at most ``depth`` items ahead (decoding
    overlaps analysis; memory stays bounded). Errors in the producer are re-raised here."""
    import queue
    import threading

    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    end = object()

    def produce():
        try:
            for item in iterable:
                while not stop.is_set():
                    try:
                        q.put(item, timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            q.put(end)
        except BaseException as exc:  # handed to the consumer
            q.put(exc)

    th = threading.Thread(target=produce, daemon=True)
    th.start()
    try:
        while True:
            item = q.get()
            if item is end:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        th.join(timeout=5)


def _aggregate(values: np.ndarray, *, times_s: np.ndarray, rate_hz: float, n_frames: int) -> np.ndarray:
    """Mean of ``values`` (rows at ``times_s``) per frame interval; interpolate empty intervals."""
    v = np.asarray(values)
    if v.ndim == 1:
        v = v[:, None]
    out = np.full((n_frames, v.shape[1]), np.nan)
    if v.shape[0] == 0:
        return out
    k = np.floor(times_s * rate_hz + 1e-9).astype(np.int64)
    ok = (k >= 0) & (k < n_frames)
    cnt = np.bincount(k[ok], minlength=n_frames)[:n_frames].astype(np.float64)
    centres = (np.arange(n_frames) + 0.5) / rate_hz
    for j in range(v.shape[1]):
        s = np.bincount(k[ok], weights=v[ok, j].astype(np.float64), minlength=n_frames)[:n_frames]
        col = np.where(cnt > 0, s / np.where(cnt > 0, cnt, 1.0), np.nan)
        empty = cnt == 0
        if empty.any():
            col[empty] = np.interp(centres[empty], times_s, v[:, j])
        out[:, j] = col
    return out


def _level_db(power: np.ndarray, offset: float = 0.0) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        db = offset + 10.0 * np.log10(power)
    return np.maximum(np.where(np.isnan(db), LEVEL_FLOOR_DB, db), LEVEL_FLOOR_DB)


def _run(blocks, **kw) -> tuple:
    """The analysis with BLAS kept to one thread: its matrices are small, and idle BLAS threads
    spinning beside the reader and loudness threads cost more than they give."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with librosa's dependencies
        return _analyse(blocks, **kw)
    with threadpool_limits(limits=1, user_api="blas"):
        return _analyse(blocks, **kw)


def _analyse(blocks: Iterable[np.ndarray], *, sample_rate_hz: int, channels: int, n_samples: int,
             rate_hz: float, progress: Callable | None, counts: dict, start_s: float) -> tuple:
    an = _Analyser(sample_rate_hz=sample_rate_hz, channels=channels)
    done = 0
    for block in blocks:
        an.push(block)
        done += block.shape[0]
        if progress is not None:
            progress("features", min(1.0, done / max(n_samples, 1)) * 0.9)
    env, desc, chroma, rough = an.finish()
    fs = sample_rate_hz
    duration = an.loud.grid.n / fs
    n_frames = int(math.floor(duration * rate_hz + 1e-9))
    centres = (np.arange(n_frames) + 0.5) / rate_hz
    fr = spectral.ANALYSIS_SR / spectral.HOP
    t_stft = np.arange(desc.shape[0]) / fr

    cols: dict[str, np.ndarray] = {}
    loud = an.loud
    cols["momentary_lufs"] = np.maximum(np.nan_to_num(loud.momentary(centres), nan=LEVEL_FLOOR_DB,
                                                      neginf=LEVEL_FLOOR_DB), LEVEL_FLOOR_DB)
    cols["short_term_lufs"] = np.maximum(np.nan_to_num(loud.short_term(centres), nan=LEVEL_FLOOR_DB,
                                                       neginf=LEVEL_FLOOR_DB), LEVEL_FLOOR_DB)
    rs, rc = an.rms.finish()
    # the frame interval, at least one 5 ms grid step
    rms_pow = window_mean(rs, rc, centres_s=centres, window_s=max(1.0 / rate_hz, GRID_STEP_S))
    # the window edges are on the 5 ms grid; 10 log10 of the mean square (full-scale sine = -3.01)
    cols["rms_dbfs"] = _level_db(rms_pow)
    t_env = (np.arange(env.shape[0]) + rhythm.SHIFT_FRAMES) / fr
    cols["onset_strength"] = _aggregate(env, times_s=t_env, rate_hz=rate_hz, n_frames=n_frames)[:, 0]
    onsets = rhythm.detect_onsets(env, frame_rate_hz=fr)
    cols["onset_rate_hz"] = rhythm.onset_rate(onsets, centres_s=centres, duration_s=duration)
    if progress is not None:
        progress("features", 0.93)
    m = max(1, int(math.ceil(rate_hz / TEMPO_EVAL_MAX_HZ - 1e-9)))
    tp = rhythm.local_tempo(env, frame_rate_hz=fr, centres_s=centres[::m])
    near = np.clip(np.round(np.arange(n_frames) / m).astype(np.int64), 0, max(tp.shape[0] - 1, 0))
    tp = tp[near] if tp.shape[0] else np.full((n_frames, 3), np.nan)
    cols["tempo_bpm"], cols["tempo_confidence"], cols["pulse_clarity"] = tp[:, 0], tp[:, 1], tp[:, 2]
    agg = _aggregate(desc, times_s=t_stft, rate_hz=rate_hz, n_frames=n_frames)
    for j, name in enumerate(["centroid_hz", "bandwidth_hz", "rolloff_hz", "flatness", "flux"]):
        cols[name] = agg[:, j]
    cagg = _aggregate(chroma, times_s=t_stft, rate_hz=rate_hz, n_frames=n_frames)
    for j, name in enumerate(CHROMA_COLUMNS):
        cols[name] = cagg[:, j]
    kidx, kstrength = tonal.local_key(chroma, frame_rate_hz=fr, centres_s=centres)
    cols["key"] = np.array([tonal.KEY_NAMES[i] if i >= 0 else None for i in kidx], dtype=object)
    cols["key_strength"] = kstrength
    if progress is not None:
        progress("features", 0.96)
    cols["harmonic_change"] = _aggregate(tonal.harmonic_change(chroma), times_s=t_stft,
                                         rate_hz=rate_hz, n_frames=n_frames)[:, 0]
    cols["roughness"] = _aggregate(rough, times_s=t_stft, rate_hz=rate_hz, n_frames=n_frames)[:, 0]
    # silence from the K-weighted level over 50 ms windows on the 5 ms grid
    level = loud.grid_level(window_s=silence.SILENCE_WINDOW_S)
    segs = silence.silence_segments(level, step_s=0.005, window_s=silence.SILENCE_WINDOW_S,
                                    duration_s=duration)
    cols["silent"] = silence.silence_mask(segs, centres)
    quiet = cols["silent"] == 1
    if quiet.any():
        for c in UNDEFINED_IN_SILENCE:
            col = np.array(cols[c], dtype=object if c == "key" else np.float64)
            col[quiet] = None if c == "key" else np.nan
            cols[c] = col

    frame = pd.DataFrame({c: cols[c] for c in COLUMNS},
                         index=pd.Index(start_s + centres, name="recording"))
    s = loud.summary()
    summary = {
        **s,
        "duration_s": duration,
        "sample_rate_hz": int(fs),
        "channels": int(channels),
        "channel_weights": [float(w) for w in loud.weights],
        "samples": int(an.loud.grid.n),
        "nonfinite_samples": int(counts.get("nonfinite", 0)),
        "clipped_samples": int(an.loud.clipped_samples),
        "onsets": int(onsets.size),
        "silence_threshold_lufs": silence.SILENCE_THRESHOLD_DB,
        "silence_min_length_s": silence.SILENCE_MIN_LENGTH_S,
        "silence_segments": [[start_s + a, start_s + b] for a, b in segs],
    }
    if progress is not None:
        progress("features", 1.0)
    return frame, summary


def _result(frame, summary, *, rate_hz, path, name, start_s) -> FeatureResult:
    settings = {"analysis_sample_rate_hz": spectral.ANALYSIS_SR, "n_fft": spectral.N_FFT,
                "hop": spectral.HOP, "tempo_window_s": rhythm.TEMPO_WINDOW_S,
                "key_window_s": tonal.KEY_WINDOW_S, "onset_rate_window_s": rhythm.ONSET_RATE_WINDOW_S,
                "mono_mix": "mean of all channels"}
    return FeatureResult(frame=frame, units=dict(UNITS), descriptions=dict(DESCRIPTIONS),
                         summary=summary, rate_hz=rate_hz, path=path, name=name,
                         start_time_s=start_s + 0.5 / rate_hz, settings=settings)


def compute_features(path, *, rate_hz: float = 1.0, progress: Callable | None = None,
                     start_s: float = 0.0, end_s: float | None = None,
                     block_s: float = BLOCK_S) -> FeatureResult:
    """Per-frame features of a recording file, streaming (memory does not grow with length).

    Parameters
    ----------
    path : str or Path
        WAV, FLAC, OGG/Vorbis, AIFF -- any channel count, 8 kHz .. 768 kHz.
    rate_hz : float
        Frames per second, above 0 and at most 100.
    progress : callable, optional
        Called as ``progress("features", fraction)``.
    start_s, end_s : float
        Analyse only this range of the recording (``recording`` time); frame times stay in
        seconds from the file's first sample.

    Raises
    ------
    InputError
        Not a readable recording, empty, or shorter than one frame period.
    """
    rate = _check_rate(rate_hz)
    info = audio_info(path)
    if start_s < 0 or (end_s is not None and end_s <= start_s):
        raise InputError(f"bad time range {start_s}..{end_s} s", path=info.path)
    stop = info.duration_s if end_s is None else min(end_s, info.duration_s)
    if (stop - start_s) * rate < 1.0 - 1e-9:
        raise InputError(f"recording range is {max(stop - start_s, 0):.6g} s long, shorter than one "
                         f"frame ({1 / rate:g} s at {rate:g} Hz); use a longer file or a higher --rate",
                         path=info.path)
    counts: dict = {}
    n_samples = int(round((stop - start_s) * info.sample_rate_hz))
    blocks = _prefetch(b for _, b in iter_blocks(info.path, block_s=block_s, start_s=start_s,
                                                 end_s=end_s, counts=counts, dtype="float32"))
    frame, summary = _run(blocks, sample_rate_hz=info.sample_rate_hz, channels=info.channels,
                          n_samples=n_samples, rate_hz=rate, progress=progress, counts=counts,
                          start_s=start_s)
    summary["format"] = f"{info.format}/{info.subtype}"
    return _result(frame, summary, rate_hz=rate, path=info.path, name=info.path.stem, start_s=start_s)


def features_from_array(y, sr: int, *, rate_hz: float = 1.0, block_s: float = BLOCK_S,
                        name: str = "array") -> FeatureResult:
    """:func:`compute_features` for samples in memory: ``y`` shape ``(n,)`` or ``(n, channels)``.

    The array is cut into ``block_s`` blocks and goes through the same streaming analyser; NaN/Inf
    samples are replaced by 0 (counted in ``summary["nonfinite_samples"]``).
    """
    rate = _check_rate(rate_hz)
    x = np.asarray(y, dtype=np.float64)
    if x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[0] == 0 or x.shape[1] == 0:
        raise InputError(f"samples must be a non-empty (n,) or (n, channels) array, got shape {np.shape(y)}")
    if not (MIN_SAMPLE_RATE_HZ <= int(sr) <= MAX_SAMPLE_RATE_HZ):
        raise InputError(f"sample rate {sr} Hz is outside {MIN_SAMPLE_RATE_HZ}..{MAX_SAMPLE_RATE_HZ} Hz")
    if x.shape[0] / sr * rate < 1.0 - 1e-9:
        raise InputError(f"signal is {x.shape[0] / sr:.6g} s long, shorter than one frame at {rate:g} Hz")
    counts: dict = {}
    x = _clean(x, counts)  # NaN/Inf -> 0, as iter_blocks does for files
    step = max(1, int(round(block_s * sr)))
    blocks = (x[i:i + step] for i in range(0, x.shape[0], step))
    frame, summary = _run(blocks, sample_rate_hz=int(sr), channels=x.shape[1], n_samples=x.shape[0],
                          rate_hz=rate, progress=None, counts=counts, start_s=0.0)
    return _result(frame, summary, rate_hz=rate, path=None, name=name, start_s=0.0)


def write_features(result: FeatureResult, *, out_dir) -> list[Path]:
    """Write ``<name>.features.tsv``, ``<name>_stim.tsv.gz`` and ``<name>_stim.json`` atomically."""
    from ..export.bids import write_stim
    from ..export.tables import OutputSet, check_output_dir

    out = check_output_dir(out_dir)
    table = result.frame.reset_index()
    fmts = {"recording": "%.6f"}
    extra = {
        "Description": "Per-frame music features of a recording (stimkit); each row's time is the "
                       "centre of its frame; rows at StartTime + k / SamplingFrequency seconds from "
                       "the recording's first sample.",
        "TimeKind": "recording",
        "FrameTime": "window centre",
        "Source": str(result.path) if result.path is not None else result.name,
        "Summary": result.summary,
        "Settings": result.settings,
    }
    with OutputSet(out) as outs:
        outs.write_tsv(f"{result.name}.features.tsv", table, float_format="%.6g", column_formats=fmts)
        write_stim(outs, result.name, result.frame, sampling_hz=result.rate_hz,
                   start_time_s=result.start_time_s, units=result.units,
                   descriptions=result.descriptions, extra=extra)
    return list(outs.committed)


def summary_table(result: FeatureResult):
    """A rich Table of the whole-file values."""
    from rich.table import Table

    s = result.summary

    def f(v, unit, fmt="{:.1f}"):
        if v is None or (isinstance(v, float) and not math.isfinite(v)):
            return "n/a"
        return f"{fmt.format(v)} {unit}".strip()

    t = Table(title=f"{result.name}: whole-file values", show_header=True)
    t.add_column("measure")
    t.add_column("value", justify="right")
    rows = [
        ("integrated loudness", f(s.get("integrated_lufs"), "LUFS")),
        ("loudness range", f(s.get("lra_lu"), "LU")),
        ("max momentary", f(s.get("max_momentary_lufs"), "LUFS")),
        ("max short-term", f(s.get("max_short_term_lufs"), "LUFS")),
        ("sample peak", f(s.get("sample_peak_dbfs"), "dBFS", "{:.2f}")),
        ("true peak", f(s.get("true_peak_dbtp"), "dBTP", "{:.2f}")),
        ("duration", f(s.get("duration_s"), "s", "{:.3f}")),
        ("sample rate", f(s.get("sample_rate_hz"), "Hz", "{:d}")),
        ("channels", str(s.get("channels"))),
        ("frames", f"{len(result.frame)} at {result.rate_hz:g} Hz"),
        ("silent segments", str(len(s.get("silence_segments", [])))),
    ]
    if s.get("nonfinite_samples"):
        rows.append(("NaN/Inf samples set to 0", str(s["nonfinite_samples"])))
    if s.get("clipped_samples"):
        rows.append(("samples at full scale", str(s["clipped_samples"])))
    for k, v in rows:
        t.add_row(k, v)
    return t
