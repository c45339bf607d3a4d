"""Reading a physiological recording into a :class:`~stimkit.physio.series.BeatSeries`.

What it reads
-------------
- **BIDS physio** (``*_physio.tsv.gz`` + ``*_physio.json`` of the same stem; BIDS 1.11,
  "Physiological recordings"): the sidecar must give ``SamplingFrequency`` (Hz), ``StartTime``
  (s, may be negative) and ``Columns``; the TSV has no header. Sample k (0-based) lies at
  ``StartTime + k / SamplingFrequency``. A beat column is read in one of three ``mode``\\ s:
  ``value_at_beat`` (the interval written on the sample of its beat, 0 or ``n/a`` elsewhere),
  ``marker`` (a 0/1 trigger: beats at rising edges, interval = difference of beat times) or
  ``waveform`` (a raw ECG: R peaks by :func:`neurokit2.ecg_peaks`, then as ``marker``).
- **A plain beat table** (TSV/CSV with a header): a time column (``time``, ``onset`` or
  ``beat_time``; s) and a value column (``interval``, ``rr``, ``ari``, ``ibi`` or ``value``; ms),
  optionally ``valid``, ``artefact``, ``beat_type``. A headerless file of two numeric columns is
  read as (s, ms).
- **Fixed-rate signals** (``kind`` ``ecg``, ``eda``, ``rsp``) from either form: ECG to beat
  intervals as above; respiration to breath-to-breath intervals (inhalation onsets of
  :func:`neurokit2.rsp_process`); skin conductance to its tonic level
  (:func:`neurokit2.eda_phasic`) averaged to 4 Hz (a low-pass, the usual rate for EDA).

Conventions
-----------
The times of the file are taken as seconds on the recorder clock, with the zero of the events'
``onset`` (a BIDS physio file and an events file of one recording share that zero); a stated
``offset_s`` is added when the export started elsewhere. The resulting :attr:`BeatSeries.clock`
says which. Every problem is an :class:`~stimkit.errors.InputError` naming the file.

References
----------
BIDS Specification 1.11, Modality specific files: Physiological recordings.
Makowski, D. et al. (2021). NeuroKit2: A Python toolbox for neurophysiological signal
processing. Behavior Research Methods 53, 1689-1696.
Lipponen, J. A., & Tarvainen, M. P. (2019). A robust algorithm for heart rate variability time
series artefact correction using novel beat classification. J Med Eng Technol 43(3), 173-181.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from .series import BeatSeries

__all__ = ["read_physio", "read_bids_physio", "read_beat_table", "series_from_signal",
           "BEAT_COLUMNS", "TIME_COLUMNS", "VALUE_COLUMNS", "READ_KINDS"]

#: BIDS physio: beat columns tried in order when none is named.
BEAT_COLUMNS = ("ari", "rr", "ibi", "interval")
#: Plain beat table: time and value column names tried in order.
TIME_COLUMNS = ("time", "onset", "beat_time")
VALUE_COLUMNS = ("interval", "rr", "ari", "ibi", "value")
#: Signal columns tried in order for the fixed-rate kinds.
SIGNAL_COLUMNS = {"ecg": ("ecg", "cardiac"), "eda": ("eda", "gsr", "skin_conductance", "scr"),
                  "rsp": ("respiratory", "resp", "rsp", "respiration", "breathing")}
#: What ``kind`` may be asked for, and the kind of series it gives.
READ_KINDS = {"rr": "rr", "ari": "ari", "other": "other", "ecg": "rr", "eda": "eda", "rsp": "breath"}
#: Beat times quantised coarser than this are warned about (s).
MAX_BEAT_STEP_S = 0.004
#: Plausible median of an interval series in ms (outside: wrong units or wrong column).
PLAUSIBLE_INTERVAL_MS = (150.0, 20000.0)
EDA_RATE_HZ = 4.0
_BEAT_TYPES_OK = ("normal", "paced", "n", "p")


def _sidecar_path(path: Path) -> Path:
    name = path.name
    for suf in (".tsv.gz", ".tsv"):
        if name.endswith(suf):
            return path.with_name(name[: -len(suf)] + ".json")
    return path.with_suffix(".json")


def _interval_factor(unit, path, column) -> float:
    u = str(unit).strip().lower()
    if u in ("ms", "msec", "millisecond", "milliseconds"):
        return 1.0
    if u in ("s", "sec", "second", "seconds"):
        return 1000.0
    raise InputError(f"column '{column}' has Units '{unit}' in the sidecar; beat intervals must be "
                     f"in ms or s (convert heart rate in bpm to intervals first)", path=path)


def _check_intervals(x_ms: np.ndarray, path, column) -> None:
    v = x_ms[np.isfinite(x_ms) & (x_ms > 0)]
    if v.size == 0:
        raise InputError(f"column '{column}' holds no positive value", path=path)
    med = float(np.median(v))
    lo, hi = PLAUSIBLE_INTERVAL_MS
    if not lo <= med <= hi:
        raise InputError(f"column '{column}' does not look like intervals in ms (median {med:.4g} ms "
                         f"after unit conversion, expected {lo:g}-{hi:g}); check the column and its "
                         f"units", path=path)


def _check_times(t: np.ndarray, path, what="times") -> None:
    if t.size and not np.all(np.isfinite(t)):
        raise InputError(f"{what} contain missing or non-finite values", path=path)
    d = np.diff(t)
    if np.any(d <= 0):
        k = int(np.flatnonzero(d <= 0)[0])
        raise InputError(f"{what} are not strictly increasing (row {k + 2}: {t[k + 1]:.6f} s after "
                         f"{t[k]:.6f} s); sort the file and remove duplicate beats", path=path)


def _display(path: Path) -> str:
    return Path(path).name


# ---------------------------------------------------------------------------------------------
# fixed-rate signals
# ---------------------------------------------------------------------------------------------
def _beats_from_times(tb: np.ndarray, *, kind: str, path, column, clock, warnings, suspect=None):
    if tb.size < 3:
        raise InputError(f"only {tb.size} beat(s) found in column '{column}'; too few for inference",
                         path=path)
    x = 1000.0 * np.diff(tb)
    return BeatSeries(t=tb[1:], x=x, valid=np.ones(x.size, bool), kind=kind, unit="ms",
                      source=_display(path), column=column, clock=clock, warnings=tuple(warnings),
                      suspect=None if suspect is None else np.asarray(suspect[1:], bool))


def series_from_signal(signal: np.ndarray, *, rate_hz: float, start_s: float, kind: str,
                       path="signal", column="signal",
                       clock: str = "sample times on the recorder clock",
                       warnings=()) -> BeatSeries:
    """A fixed-rate signal (``ecg``, ``eda`` or ``rsp``) sampled at ``rate_hz`` from ``start_s``
    turned into a :class:`BeatSeries` through neurokit2 (see module notes)."""
    import neurokit2 as nk

    sig = np.asarray(signal, dtype=np.float64)
    warnings = list(warnings)
    if not np.all(np.isfinite(sig)):
        bad = ~np.isfinite(sig)
        if bad.mean() > 0.05:
            raise InputError(f"column '{column}' has {bad.mean():.0%} missing samples", path=path)
        idx = np.arange(sig.size)
        sig = np.interp(idx, idx[~bad], sig[~bad])
        warnings.append(f"{int(bad.sum())} missing sample(s) of '{column}' interpolated")
    fs = float(rate_hz)
    if kind == "ecg":
        clean = nk.ecg_clean(sig, sampling_rate=fs)
        _, info = nk.ecg_peaks(clean, sampling_rate=fs)
        peaks = np.asarray(info["ECG_R_Peaks"], dtype=np.int64)
        suspect = np.zeros(peaks.size, bool)
        if peaks.size >= 10:  # R4: Kubios beat classification (Lipponen & Tarvainen 2019)
            arts, _ = nk.signal_fixpeaks(peaks, sampling_rate=fs, iterative=True, method="Kubios")
            for key in ("ectopic", "missed", "extra", "longshort"):
                ix = np.asarray(arts.get(key, []), dtype=np.int64)
                ix = ix[(ix >= 0) & (ix < peaks.size)]
                suspect[ix] = True
        if 1.0 / fs > MAX_BEAT_STEP_S:
            warnings.append(f"ECG sampled at {fs:g} Hz: beat times are quantised to {1000 / fs:.1f} ms")
        return _beats_from_times(start_s + peaks / fs, kind="rr", path=path, column=column, clock=clock,
                                 warnings=warnings, suspect=suspect)
    if kind == "rsp":
        _, info = nk.rsp_process(sig, sampling_rate=fs)
        troughs = np.asarray(info["RSP_Troughs"], dtype=np.int64)
        troughs = troughs[troughs >= 0]
        return _beats_from_times(start_s + troughs / fs, kind="breath", path=path, column=column,
                                 clock=clock, warnings=warnings)
    if kind == "eda":
        tonic = np.asarray(nk.eda_phasic(sig, sampling_rate=fs)["EDA_Tonic"], dtype=np.float64)
        step = max(1, int(round(fs / EDA_RATE_HZ)))
        n = tonic.size // step
        if n < 8:
            raise InputError(f"skin conductance in '{column}' is too short ({tonic.size} samples)", path=path)
        x = tonic[: n * step].reshape(n, step).mean(axis=1)
        rate = fs / step
        t = start_s + (np.arange(n) * step + (step - 1) / 2.0) / fs
        return BeatSeries(t=t, x=x, valid=np.ones(n, bool), kind="eda", unit="uS", rate_hz=rate,
                          source=_display(path), column=column, clock=clock, warnings=tuple(warnings))
    raise InputError(f"unknown signal kind '{kind}' (ecg, eda, rsp)", path=path)


# ---------------------------------------------------------------------------------------------
# BIDS physio
# ---------------------------------------------------------------------------------------------
def read_bids_physio(path, *, kind: str = "rr", column: str | None = None,
                     mode: str | None = None) -> BeatSeries:
    """Read a BIDS ``*_physio.tsv.gz`` with its ``.json`` sidecar (see module notes).

    Parameters
    ----------
    path : path-like
        The ``.tsv.gz`` (or ``.tsv``) file; the sidecar has the same stem and ``.json``.
    kind : str
        ``rr``, ``ari``, ``other`` (a beat column), or ``ecg``, ``eda``, ``rsp`` (a signal).
    column : str, optional
        Column to read; default the first of :data:`BEAT_COLUMNS` (or the signal names) present.
    mode : str, optional
        ``value_at_beat`` (default for beat kinds), ``marker`` or ``waveform`` (default for
        ``ecg``).
    """
    path = Path(path)
    if kind not in READ_KINDS:
        raise InputError(f"unknown kind '{kind}' (one of {', '.join(READ_KINDS)})", path=path)
    side = _sidecar_path(path)
    if not path.is_file():
        raise InputError("physiological file not found; check the path", path=path)
    if not side.is_file():
        raise InputError(f"BIDS sidecar {side.name} not found beside the physio file (it must give "
                         f"SamplingFrequency, StartTime and Columns)", path=path)
    try:
        meta = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"cannot read the sidecar as JSON ({exc})", path=side) from None
    if not isinstance(meta, dict):
        raise InputError("the sidecar must be a JSON object", path=side)
    for key in ("SamplingFrequency", "StartTime", "Columns"):
        if key not in meta:
            raise InputError(f"sidecar lacks the required key '{key}' (BIDS physio needs "
                             f"SamplingFrequency, StartTime and Columns)", path=side)
    fs, start, cols = meta["SamplingFrequency"], meta["StartTime"], meta["Columns"]
    if isinstance(fs, bool) or not isinstance(fs, (int, float)) or not math.isfinite(fs) or fs <= 0:
        raise InputError("SamplingFrequency must be a positive number (Hz)", path=side)
    if isinstance(start, bool) or not isinstance(start, (int, float)) or not math.isfinite(start):
        raise InputError("StartTime must be a number of seconds", path=side)
    if not isinstance(cols, list) or not cols or not all(isinstance(c, str) for c in cols):
        raise InputError("Columns must be a list of column names", path=side)
    try:
        df = pd.read_csv(path, sep="\t", header=None, na_values=["n/a"], keep_default_na=False,
                         compression="infer", dtype=np.float64)
    except (OSError, ValueError, EOFError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read the physio table ({' '.join(str(exc).split())[:160]}); it must "
                         f"be headerless, tab-separated numbers", path=path) from None
    if df.shape[1] != len(cols):
        raise InputError(f"the table has {df.shape[1]} columns but the sidecar's Columns lists "
                         f"{len(cols)}", path=path)
    df.columns = cols
    fixed = kind in ("ecg", "eda", "rsp")
    if column is None:
        cands = SIGNAL_COLUMNS[kind] if fixed else BEAT_COLUMNS
        column = next((c for c in cands if c in cols), None)
        if column is None:
            raise InputError(f"no {'signal' if fixed else 'beat'} column found (looked for "
                             f"{', '.join(cands)}; Columns: {', '.join(cols)}); name one with the "
                             f"column option", path=path)
    elif column not in cols:
        raise InputError(f"column '{column}' is not in the sidecar's Columns ({', '.join(cols)})", path=path)
    mode = mode or ("waveform" if kind == "ecg" else "value_at_beat")
    warnings = []
    clock = (f"BIDS physio: sample k at StartTime {float(start):g} s + k / {float(fs):g} Hz, taken as "
             f"seconds on the recorder clock (same zero as the events' onset)")
    values = df[column].to_numpy(np.float64)
    k = np.arange(values.size, dtype=np.float64)
    t_all = float(start) + k / float(fs)
    if fixed or mode == "waveform":
        sk = "ecg" if (mode == "waveform" and not fixed) else kind
        return series_from_signal(values, rate_hz=float(fs), start_s=float(start), kind=sk, path=path,
                                  column=column, clock=clock, warnings=warnings)
    if 1.0 / float(fs) > MAX_BEAT_STEP_S:
        warnings.append(f"sampled at {float(fs):g} Hz: beat times are quantised to {1000 / float(fs):.1f} ms")
    if mode == "marker":
        on = np.nan_to_num(values, nan=0.0) > 0.5
        rise = np.flatnonzero(on & ~np.r_[False, on[:-1]])
        return _beats_from_times(t_all[rise], kind=READ_KINDS[kind], path=path, column=column,
                                 clock=clock, warnings=warnings)
    if mode != "value_at_beat":
        raise InputError(f"unknown mode '{mode}' (value_at_beat, marker, waveform)", path=path)
    units = meta.get(column, {}).get("Units") if isinstance(meta.get(column), dict) else None
    beat = np.isfinite(values) & (values != 0)
    x = values[beat]
    if units is None:
        factor = 1000.0 if x.size and np.median(x) < 10 else 1.0
        warnings.append(f"the sidecar gives no Units for '{column}'; taken as "
                        f"{'seconds' if factor > 1 else 'ms'} from the values")
    else:
        factor = _interval_factor(units, side, column)
    x = x * factor
    _check_intervals(x, path, column)
    t = t_all[beat]
    if t.size < 3:
        raise InputError(f"only {t.size} beat(s) in column '{column}'; too few for inference", path=path)
    return BeatSeries(t=t, x=x, valid=np.ones(x.size, bool), kind=READ_KINDS[kind], unit="ms",
                      source=_display(path), column=column, clock=clock, warnings=tuple(warnings))


# ---------------------------------------------------------------------------------------------
# plain tables
# ---------------------------------------------------------------------------------------------
def _read_table(path: Path) -> pd.DataFrame:
    sep = "," if path.suffix.lower() == ".csv" else "\t"
    try:
        df = pd.read_csv(path, sep=sep, na_values=["n/a", "NaN", "nan", ""], keep_default_na=False,
                         compression="infer")
    except (OSError, ValueError, EOFError, pd.errors.ParserError) as exc:
        raise InputError(f"cannot read the table ({' '.join(str(exc).split())[:160]})", path=path) from None
    # a headerless file of numbers: its "header" parses as numbers
    try:
        [float(c) for c in df.columns]
        headerless = True
    except ValueError:
        headerless = False
    if headerless:
        df = pd.read_csv(path, sep=sep, header=None, na_values=["n/a"], keep_default_na=False,
                         compression="infer")
        if df.shape[1] != 2:
            raise InputError(f"a headerless table must have two columns (time in s, interval in ms); "
                             f"this one has {df.shape[1]}", path=path)
        df.columns = ["time", "interval"]
    df.columns = [str(c).strip() for c in df.columns]
    return df


def _r0_flags(df: pd.DataFrame, path) -> np.ndarray:
    """Rule R0: False where the input marks the value invalid (``valid == 0``, ``artefact == 1``,
    ``beat_type`` not normal or paced)."""
    ok = np.ones(len(df), bool)
    lower = {c.lower(): c for c in df.columns}
    if "valid" in lower:
        v = pd.to_numeric(df[lower["valid"]], errors="coerce").to_numpy(np.float64)
        ok &= ~(v == 0)
    if "artefact" in lower or "artifact" in lower:
        c = lower.get("artefact", lower.get("artifact"))
        v = pd.to_numeric(df[c], errors="coerce").to_numpy(np.float64)
        ok &= ~(v == 1)
    if "beat_type" in lower:
        bt = df[lower["beat_type"]].map(lambda s: str(s).strip().lower())
        ok &= bt.isin(_BEAT_TYPES_OK).to_numpy()
    return ok


def read_beat_table(path, *, kind: str = "rr", column: str | None = None,
                    time_column: str | None = None) -> BeatSeries:
    """Read a plain beat table, or a fixed-rate signal table for ``kind`` ecg/eda/rsp (see
    module notes)."""
    path = Path(path)
    if kind not in READ_KINDS:
        raise InputError(f"unknown kind '{kind}' (one of {', '.join(READ_KINDS)})", path=path)
    if not path.is_file():
        raise InputError("physiological file not found; check the path", path=path)
    df = _read_table(path)
    lower = {c.lower(): c for c in df.columns}
    tc = time_column or next((lower[c] for c in TIME_COLUMNS if c in lower), None)
    if tc is None or tc not in df.columns:
        raise InputError(f"no time column (looked for {', '.join(TIME_COLUMNS)}; found "
                         f"{', '.join(df.columns)})", path=path)
    fixed = kind in ("ecg", "eda", "rsp")
    cands = SIGNAL_COLUMNS[kind] if fixed else VALUE_COLUMNS
    vc = column or next((lower[c] for c in cands if c in lower), None)
    if vc is None or vc not in df.columns:
        raise InputError(f"no value column (looked for {column or ', '.join(cands)}; found "
                         f"{', '.join(df.columns)})", path=path)
    t = pd.to_numeric(df[tc], errors="coerce").to_numpy(np.float64)
    x = pd.to_numeric(df[vc], errors="coerce").to_numpy(np.float64)
    _check_times(t, path, what=f"times in column '{tc}'")
    clock = (f"plain table: column '{tc}' taken as seconds on the recorder clock (same zero as the "
             f"events' onset)")
    if fixed:
        if t.size < 8:
            raise InputError(f"only {t.size} samples; too few for inference", path=path)
        dt = np.diff(t)
        step = float(np.median(dt))
        if np.max(np.abs(dt - step)) > 0.01 * step:
            raise InputError(f"a {kind} signal must be sampled at a fixed rate; the time steps vary "
                             f"by more than 1 %", path=path)
        return series_from_signal(x, rate_hz=round(1.0 / step, 6), start_s=float(t[0]), kind=kind, path=path,
                                  column=vc, clock=clock)
    warnings = []
    fin = np.isfinite(x)
    if fin.sum() < 3:
        raise InputError(f"only {int(fin.sum())} beat value(s) in column '{vc}'; too few for inference",
                         path=path)
    if np.median(x[fin]) < 10:
        x = x * 1000.0
        warnings.append(f"values of '{vc}' are below 10: taken as seconds and converted to ms")
    _check_intervals(x, path, vc)
    if kind == "rr" and t.size > 3:
        mis = np.abs(1000.0 * np.diff(t) - x[1:])
        med = float(np.nanmedian(mis))
        if med > 0.05 * float(np.nanmedian(x)):
            warnings.append(f"the intervals in '{vc}' differ from the beat-time differences by "
                            f"{med:.0f} ms (median): is the interval stamped at the beat that closes "
                            f"it?")
    valid = _r0_flags(df, path) & fin
    return BeatSeries(t=t, x=x, valid=valid, kind=READ_KINDS[kind], unit="ms", source=_display(path),
                      column=vc, clock=clock, warnings=tuple(warnings))


def read_physio(path, *, kind: str = "rr", column: str | None = None, mode: str | None = None,
                offset_s: float = 0.0) -> BeatSeries:
    """Read any supported physiological file: BIDS physio for ``*.tsv.gz`` files with a JSON
    sidecar of the same stem, a plain table otherwise; ``offset_s`` is added to every time."""
    path = Path(path)
    name = path.name.lower()
    if name.endswith(".tsv.gz") or (name.endswith(".tsv") and _sidecar_path(path).is_file()
                                    and "_physio" in name):
        s = read_bids_physio(path, kind=kind, column=column, mode=mode)
    else:
        if mode not in (None, "value_at_beat"):
            raise InputError(f"mode '{mode}' needs a BIDS physio file (*_physio.tsv.gz with its .json)",
                             path=path)
        s = read_beat_table(path, kind=kind, column=column)
    return s.shifted(offset_s) if offset_s else s
