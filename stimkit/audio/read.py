"""Streaming reader for recordings: validate once, then read in bounded blocks.

Public functions
----------------
- :func:`audio_info` -- validate a file (exists, decodable by libsndfile through ``soundfile``,
  at least one frame, a usable sample rate) and return an :class:`AudioInfo`.
- :func:`iter_blocks` -- yield ``(start_s, samples)`` blocks of a file, optionally mixed to mono,
  resampled, limited to a time range and overlapped; memory does not grow with file length.
- :class:`StreamResampler` -- a stateful resampler (``soxr`` stream) whose output does not depend
  on how the input is cut into blocks.

Conventions
-----------
- Time is ``recording`` time: seconds from the first sample of the file. ``start_s`` of a block is
  the time of its first sample (at the output sample rate when resampling).
- Samples are float (``float64`` unless asked), full scale = 1.0, shape ``(n, channels)`` or
  ``(n,)`` for ``mono=True``. The mono mix is the plain mean of all channels.
- Non-finite samples (NaN, +/-Inf, possible in float WAV/AIFF files) are replaced by 0.0 before
  anything else sees them; pass ``counts={}`` to learn how many were replaced
  (``counts["nonfinite"]``).
- Formats: whatever the installed libsndfile decodes (WAV/WAVEX/RF64, FLAC, OGG/Vorbis, AIFF, ...).
  A file whose data ends early is read up to its last decodable frame when libsndfile can tell
  (truncated WAV); a decoding failure in the middle of the file raises :class:`InputError`.
- Sample rates from 8 kHz to 768 kHz are accepted (the K-weighting filter of BS.1770 needs a
  Nyquist frequency well above its 1.68 kHz shelf).

References
----------
libsndfile (E. de Castro Lopo) through the ``soundfile`` package; resampling with libsoxr
(``soxr`` package, "HQ" quality).
"""

from __future__ import annotations

import contextlib
import os
import sys
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import numpy as np
import soundfile as sf

from ..errors import InputError

__all__ = ["AudioInfo", "audio_info", "iter_blocks", "StreamResampler", "as_block",
           "MIN_SAMPLE_RATE_HZ", "MAX_SAMPLE_RATE_HZ"]

MIN_SAMPLE_RATE_HZ = 8000
MAX_SAMPLE_RATE_HZ = 768000


@dataclass(frozen=True)
class AudioInfo:
    """What a recording is: path, sample rate, channel count, length."""

    path: Path
    sample_rate_hz: int
    channels: int
    frames: int
    format: str
    subtype: str

    @property
    def duration_s(self) -> float:
        return self.frames / self.sample_rate_hz


@contextlib.contextmanager
def quiet_decoder():
    """Silence what a C decoder prints on the process's stderr (libsndfile's MPEG decoder writes
    "Note: Illegal Audio-MPEG-Header ..." there) while a file is opened: the error that follows
    names the file in one line instead. Only the main thread redirects (other threads may be
    printing); elsewhere this does nothing."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    try:
        sys.stderr.flush()
        saved = os.dup(2)
    except (OSError, ValueError, AttributeError):
        yield
        return
    try:
        with open(os.devnull, "wb") as null:
            os.dup2(null.fileno(), 2)
        yield
    finally:
        os.dup2(saved, 2)
        os.close(saved)


def audio_info(path) -> AudioInfo:
    """Validate ``path`` as a readable recording and describe it.

    Raises
    ------
    InputError
        The file is missing, not audio libsndfile can decode, empty (zero frames), or has a
        sample rate outside 8 kHz .. 768 kHz. The message names the file.
    """
    p = Path(path)
    if not p.exists():
        raise InputError("recording not found; check the path", path=p)
    if p.is_dir():
        raise InputError("is a folder, not a recording; give an audio file", path=p)
    try:
        with quiet_decoder():
            inf = sf.info(str(p))
    except Exception as exc:  # soundfile raises LibsndfileError/RuntimeError/TypeError
        detail = " ".join(str(exc).split()).rsplit(":", 1)[-1].strip(" .")
        if "does not exist" in detail and p.is_file():  # libsndfile's words for undecodable data
            detail = "its content is not audio libsndfile can decode: damaged, or not the format its name says"
        raise InputError(f"not a readable recording ({detail or 'unknown format'}); give a WAV, FLAC, "
                         "OGG/Vorbis or AIFF file", path=p) from None
    if inf.frames <= 0:
        raise InputError("recording holds no samples (zero length); give a non-empty file", path=p)
    if inf.channels <= 0:
        raise InputError("recording has no channels", path=p)
    if not (MIN_SAMPLE_RATE_HZ <= inf.samplerate <= MAX_SAMPLE_RATE_HZ):
        raise InputError(f"sample rate {inf.samplerate} Hz is outside {MIN_SAMPLE_RATE_HZ}.."
                         f"{MAX_SAMPLE_RATE_HZ} Hz; resample the file first", path=p)
    return AudioInfo(path=p, sample_rate_hz=int(inf.samplerate), channels=int(inf.channels),
                     frames=int(inf.frames), format=str(inf.format), subtype=str(inf.subtype))


class StreamResampler:
    """Resample a stream block by block (libsoxr); output does not depend on the block cuts.

    Output sample ``j`` lies at time ``j / out_rate_hz`` (soxr removes its filter delay).
    """

    def __init__(self, *, in_rate_hz: int, out_rate_hz: int, channels: int = 1,
                 dtype: str = "float64", quality: str = "HQ"):
        self.in_rate_hz = int(in_rate_hz)
        self.out_rate_hz = int(out_rate_hz)
        self._passthrough = self.in_rate_hz == self.out_rate_hz
        self._dtype = np.dtype(dtype)
        if not self._passthrough:
            import soxr

            self._rs = soxr.ResampleStream(self.in_rate_hz, self.out_rate_hz, channels,
                                           dtype=self._dtype.name, quality=quality)

    def push(self, x: np.ndarray, *, last: bool = False) -> np.ndarray:
        x = np.ascontiguousarray(x, dtype=self._dtype)
        if self._passthrough:
            return x
        return self._rs.resample_chunk(x, last=last)


def as_block(block) -> np.ndarray:
    """``block`` as a float array of shape ``(n, channels)``: float32/float64 are kept, anything
    else is cast to float64; a 1-D block is one channel."""
    x = np.asarray(block)
    if x.dtype not in (np.float32, np.float64):
        x = x.astype(np.float64)
    if x.ndim == 1:
        x = x[:, None]
    return x


def _clean(block: np.ndarray, counts: dict | None) -> np.ndarray:
    bad = ~np.isfinite(block)
    if bad.any():
        block = np.where(bad, 0.0, block).astype(block.dtype, copy=False)
        if counts is not None:
            counts["nonfinite"] = counts.get("nonfinite", 0) + int(bad.sum())
    return block


def _native_blocks(info: AudioInfo, *, block_frames: int, start_frame: int, stop_frame: int,
                   dtype: str, counts: dict | None) -> Iterator[tuple[int, np.ndarray]]:
    """Yield ``(first_frame, samples (n, channels))`` at the native rate, cleaned."""
    try:
        with quiet_decoder():
            fh = sf.SoundFile(str(info.path))
    except Exception as exc:
        raise InputError(f"cannot open recording ({' '.join(str(exc).split())})", path=info.path) from None
    with fh:
        pos = start_frame
        try:
            if start_frame:
                fh.seek(start_frame)
            while pos < stop_frame:
                n = min(block_frames, stop_frame - pos)
                data = fh.read(n, dtype=dtype, always_2d=True)
                if data.shape[0] == 0:
                    break  # data ended early (libsndfile stops at the last decodable frame)
                yield pos, _clean(data, counts)
                pos += data.shape[0]
                if data.shape[0] < n:
                    break
        except InputError:
            raise
        except (RuntimeError, sf.LibsndfileError, ValueError) as exc:
            raise InputError(f"decoding failed near {pos / info.sample_rate_hz:.3f} s "
                             f"({' '.join(str(exc).split())}); the file is damaged or truncated",
                             path=info.path) from None


def iter_blocks(path, *, block_s: float, overlap_s: float = 0.0, mono: bool = False,
                start_s: float = 0.0, end_s: float | None = None, target_sr: int | None = None,
                dtype: str = "float64", counts: dict | None = None
                ) -> Iterator[tuple[float, np.ndarray]]:
    """Yield ``(start_s, samples)`` blocks of a recording, streaming.

    Parameters
    ----------
    path : str or Path
        The recording (validated with :func:`audio_info`).
    block_s : float
        New samples per block, in seconds (at the output rate). The last block may be shorter.
    overlap_s : float
        Each block after the first starts with the last ``overlap_s`` seconds of the previous
        block, so consecutive blocks overlap by that much; ``start_s`` is the time of the
        block's first sample including the overlap.
    mono : bool
        Mix to mono (mean of all channels); blocks are then 1-D.
    start_s, end_s : float
        Time range to read (recording time; ``end_s=None`` reads to the end).
    target_sr : int, optional
        Resample (libsoxr HQ, carrying state across blocks) to this rate.
    dtype : {"float64", "float32"}
    counts : dict, optional
        Receives ``"nonfinite"``: the number of NaN/Inf samples replaced by 0.

    Yields
    ------
    start_s : float
        Recording time of the block's first sample.
    samples : ndarray, shape (n, channels) or (n,)
    """
    info = audio_info(path)
    if not (block_s > 0) or not np.isfinite(block_s):
        raise InputError(f"block length must be positive, got {block_s} s")
    if overlap_s < 0 or overlap_s >= 1e6:
        raise InputError(f"overlap must be >= 0 s, got {overlap_s} s")
    sr_in = info.sample_rate_hz
    start_frame = max(0, int(round(start_s * sr_in)))
    stop_frame = info.frames if end_s is None else min(info.frames, int(round(end_s * sr_in)))
    if stop_frame <= start_frame:
        raise InputError(f"empty time range {start_s}..{end_s} s (file is {info.duration_s:.3f} s long)",
                         path=info.path)
    sr_out = sr_in if target_sr is None else int(target_sr)
    chans_out = 1 if mono else info.channels
    resampler = StreamResampler(in_rate_hz=sr_in, out_rate_hz=sr_out, channels=chans_out, dtype=dtype)
    hop_out = max(1, int(round(block_s * sr_out)))
    ovl_out = int(round(overlap_s * sr_out))
    read_frames = max(1, int(round(block_s * sr_in)))
    t0 = start_frame / sr_in
    pending: list[np.ndarray] = []
    n_pending = 0
    emitted = 0  # output samples already emitted as "new"
    tail = None  # overlap carried into the next block

    def _emit(new: np.ndarray):
        nonlocal emitted, tail
        if tail is not None and tail.shape[0]:
            block = np.concatenate([tail, new], axis=0)
            first = emitted - tail.shape[0]
        else:
            block, first = new, emitted
        emitted += new.shape[0]
        tail = block[-ovl_out:] if ovl_out else None
        return t0 + first / sr_out, block

    blocks = _native_blocks(info, block_frames=read_frames, start_frame=start_frame,
                            stop_frame=stop_frame, dtype=dtype, counts=counts)
    done = False
    while not done:
        try:
            _, data = next(blocks)
            last = False
        except StopIteration:
            data = np.zeros((0, info.channels), dtype=dtype)
            last = done = True
        if mono:
            data = data.mean(axis=1) if data.shape[1] > 1 else data[:, 0]
        out = resampler.push(data, last=last)
        if out.shape[0]:
            pending.append(out)
            n_pending += out.shape[0]
        while n_pending >= hop_out or (done and n_pending > 0):
            buf = np.concatenate(pending, axis=0) if len(pending) > 1 else pending[0]
            take = min(hop_out, buf.shape[0])
            yield _emit(buf[:take])
            rest = buf[take:]
            pending = [rest] if rest.shape[0] else []
            n_pending = rest.shape[0]
