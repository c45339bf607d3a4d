"""Audio-side alignment features: CQT chroma and decaying chroma-onset features, block-wise.

:func:`audio_features` streams a recording (mono mix, resampled to 22 050 Hz), computes a
constant-Q transform (librosa) block by block with overlapping margins, and returns

- ``chroma``: energy of each pitch class (CQT bins C2..B7 folded to 12), log-compressed and
  L2-normalised per frame, with a 13th component for silence (:func:`finish_chroma`);
- ``onset``: decaying locally adaptive normalised chroma-onset features (DLNCO, Ewert, Müller &
  Grosche 2009): per pitch the half-wave rectified increase of log energy, folded to 12 pitch
  classes, divided by the local maximum of the frame norms (window ``norm_window_s``) and
  followed by a decaying tail of ``decay_frames`` frames (square-root shape);
- ``energy``: frame energy (mean CQT power, linear), used for silence checks.

Conventions
-----------
- ``recording`` time: frame ``k`` is centred at ``start_s + k * hop / sr`` seconds from the first
  sample of the file (librosa ``center=True`` framing; block margins are whole hops, so blocks
  join without a seam).
- Tuning: the CQT bins follow the recording's own tuning (:func:`estimate_tuning`, librosa's
  spectral-peak estimate on the first two minutes), as in librosa's ``chroma_cqt``.
- The hop is 448 samples at 22 050 Hz (49.2 Hz frame rate): a multiple of 64, the condition under
  which the multirate CQT stays fast (REFERENCES.md, *measured*).
- The post-processing (:func:`finish_chroma`, :func:`dlnco`) is shared with the score side
  (:mod:`stimkit.align.template`) so both sides go through the same compression.

References
----------
.. [1] S. Ewert, M. Müller, P. Grosche. "High resolution audio synchronization using chroma
   onset features", ICASSP 2009.
.. [2] M. Müller. *Fundamentals of Music Processing*, Springer 2015, ch. 3.1 (chroma, log
   compression).
.. [3] C. Schörkhuber, A. Klapuri. "Constant-Q transform toolbox for music processing",
   SMC 2010 (librosa's CQT).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = [
    "SR",
    "HOP",
    "RATE_HZ",
    "AlignFeatures",
    "audio_features",
    "estimate_tuning",
    "cqt_pitch_energy",
    "finish_chroma",
    "fold_octaves",
    "dlnco",
]

SR = 22050
HOP = 448
RATE_HZ = SR / HOP
#: MIDI pitch of the lowest CQT bin (C2) and the number of bins (six octaves, to B7)
FMIN_MIDI = 36
N_BINS = 72
_MARGIN_HOPS = 128          # 2.6 s of context each side of a block (longest CQT filter ~0.3 s)
CHROMA_GAMMA = 1.0
ONSET_GAMMA = 1000.0
TUNING_WINDOW_S = 120.0     # seconds at the start used to estimate the tuning
SILENCE_DB = -65.0          # frames this far below the loudest are silence (15 dB ramp above)


@dataclass
class AlignFeatures:
    """Frame-wise alignment features of one sequence (score or recording)."""

    chroma: np.ndarray          # (n, 13) unit vectors: 12 pitch classes + silence
    onset: np.ndarray           # (n, 12) DLNCO
    rate_hz: float
    start_s: float = 0.0        # time of frame 0 (recording: seconds in the file; score: nominal)
    energy: np.ndarray | None = None
    meta: dict = field(default_factory=dict)

    @property
    def n_frames(self) -> int:
        return int(self.chroma.shape[0])

    def times(self) -> np.ndarray:
        return self.start_s + np.arange(self.n_frames) / self.rate_hz


def cqt_pitch_energy(y, *, sr: int = SR, hop: int = HOP, tuning: float = 0.0) -> np.ndarray:
    """CQT power ``(frames, N_BINS)`` of ``y``, frames centred at ``k * hop``; bins shifted by
    ``tuning`` (fraction of a semitone, as in librosa)."""
    import librosa

    C = librosa.cqt(y, sr=sr, hop_length=hop, fmin=librosa.midi_to_hz(FMIN_MIDI), n_bins=N_BINS,
                    bins_per_octave=12, tuning=tuning, pad_mode="constant")
    return (np.abs(C) ** 2).T.astype(np.float32)   # float32: 3 h of frames stay ~150 MB


def _blockwise_energy(blocks, *, block_frames: int, sr: int, hop: int, progress=None, total_frames=None,
                      tuning: float = 0.0):
    """Stream blocks of samples, return CQT power of every frame of the whole signal."""
    margin = _MARGIN_HOPS * hop
    need = block_frames * hop
    buf = np.zeros(margin, dtype=np.float32)    # virtual zero padding before the start
    out = []
    done = 0

    def emit(chunk, n_frames):
        P = cqt_pitch_energy(chunk, sr=sr, hop=hop, tuning=tuning)
        out.append(P[_MARGIN_HOPS:_MARGIN_HOPS + n_frames])

    n_samples = 0
    for b in blocks:
        n_samples += len(b)
        buf = np.concatenate([buf, b])
        while len(buf) >= margin + need + margin:
            emit(buf[: margin + need + margin], block_frames)
            buf = buf[need:]
            done += block_frames
            if progress is not None and total_frames:
                progress("audio features", min(done / total_frames, 1.0))
    n_total = n_samples // hop + 1 if n_samples else 0
    rest = n_total - done
    while rest > 0:
        k = min(rest, block_frames)
        chunk = buf[: margin + k * hop + margin]
        if len(chunk) < margin + k * hop + margin:
            chunk = np.concatenate([chunk, np.zeros(margin + k * hop + margin - len(chunk), np.float32)])
        emit(chunk, k)
        buf = buf[k * hop:]
        rest -= k
    if progress is not None:
        progress("audio features", 1.0)
    return (np.concatenate(out, axis=0) if out else np.zeros((0, N_BINS))), n_samples


def fold_octaves(pitch_energy, *, fmin_midi: int = FMIN_MIDI) -> np.ndarray:
    """Sum a ``(frames, bins)`` semitone array into 12 pitch classes (column 0 = C)."""
    P = np.asarray(pitch_energy)
    out = np.zeros((P.shape[0], 12))
    for b in range(P.shape[1]):
        out[:, (fmin_midi + b) % 12] += P[:, b]       # accumulates in float64
    return out


def finish_chroma(chroma_energy, *, floor_db: float = SILENCE_DB) -> np.ndarray:
    """Log-compressed unit chroma plus a 13th "silence" component, ``(frames, 13)``.

    Compression ``log(1 + gamma * x / max(x))`` (Müller 2015, ch. 3.1), relative to the largest
    frame so that the level of the recording does not matter. The 13th component is 0 for frames
    louder than ``floor_db + 15`` dB (re the loudest frame), 1 below ``floor_db`` and linear in
    between; the 12 chroma components are scaled by one minus it and the vector is renormalised.
    So silence matches silence (cost 0) and nothing else (cost 1), while noise such as applause
    or speech, being loud, keeps a near-flat chroma and does not pass for silence.
    """
    E = np.asarray(chroma_energy, dtype=np.float64)
    if E.size == 0:
        return np.zeros((0, 13))
    tot = E.sum(axis=1)
    peak = float(tot.max()) if tot.size else 0.0
    out = np.zeros((E.shape[0], 13))
    if peak <= 0:
        out[:, 12] = 1.0
        return out
    X = np.log1p(CHROMA_GAMMA * E / E.max())
    nrm = np.linalg.norm(X, axis=1, keepdims=True)
    X = np.where(nrm > 1e-12, X / np.maximum(nrm, 1e-12), 0.0)
    level = 10 * np.log10(np.maximum(tot, 1e-300) / peak)
    sil = np.clip((floor_db + 15.0 - level) / 15.0, 0.0, 1.0)
    sil = np.where(nrm[:, 0] > 1e-12, sil, 1.0)
    out[:, :12] = X * (1.0 - sil)[:, None]
    out[:, 12] = sil
    return out / np.linalg.norm(out, axis=1, keepdims=True)


def dlnco(onset_chroma, *, rate_hz: float, norm_window_s: float = 2.0, decay_frames: int = 10) -> np.ndarray:
    """Decaying locally adaptive normalised chroma-onset features (Ewert, Müller & Grosche 2009).

    ``onset_chroma`` is a ``(frames, 12)`` array of non-negative onset strengths. Each frame is
    divided by the largest frame norm within ``norm_window_s`` (centred), then every value is
    followed by a tail ``sqrt((decay_frames - k) / decay_frames)``, ``k = 0..decay_frames-1``
    (maximum over overlapping tails).
    """
    from scipy.ndimage import maximum_filter1d

    X = np.asarray(onset_chroma, dtype=np.float64)
    if X.shape[0] == 0:
        return X.copy()
    nrm = np.linalg.norm(X, axis=1)
    size = max(int(round(norm_window_s * rate_hz)) | 1, 1)
    local = maximum_filter1d(nrm, size, mode="nearest")
    peak = float(nrm.max())
    X = X / np.maximum(local, 1e-3 * peak + 1e-12)[:, None]
    out = X.copy()
    for k in range(1, decay_frames):
        w = np.sqrt((decay_frames - k) / decay_frames)
        out[k:] = np.maximum(out[k:], w * X[:-k])
    return out


def onset_from_pitch_energy(P, *, rate_hz: float = RATE_HZ, chunk_frames: int = 20000) -> np.ndarray:
    """Chroma-onset strengths from CQT power: rectified increase of log energy, folded to 12.

    Log compression ``log(1 + 1000 * P / max(P))`` per pitch, computed in chunks of
    ``chunk_frames`` so that temporaries stay small for long recordings.
    """
    P = np.asarray(P)
    n = P.shape[0]
    out = np.zeros((n, 12))
    if n == 0:
        return out
    scale = ONSET_GAMMA / max(float(P.max()), 1e-30)
    prev = None
    for a in range(0, n, chunk_frames):
        L = np.log1p(scale * P[a:a + chunk_frames].astype(np.float64))
        D = np.zeros_like(L)
        D[1:] = np.maximum(L[1:] - L[:-1], 0.0)
        if prev is not None:
            D[0] = np.maximum(L[0] - prev, 0.0)
        prev = L[-1]
        out[a:a + chunk_frames] = fold_octaves(D)
    return out


def estimate_tuning(path, *, start_s: float = 0.0, end_s: float | None = None,
                    window_s: float = TUNING_WINDOW_S) -> float:
    """Deviation of the recording's tuning from A = 440 Hz equal temperament, in semitones
    (-0.5 .. 0.5), from its first ``window_s`` seconds (``librosa.estimate_tuning``, spectral
    peaks by parabolic interpolation)."""
    import librosa

    from ..audio.read import iter_blocks

    stop = start_s + window_s if end_s is None else min(end_s, start_s + window_s)
    parts = [x for _, x in iter_blocks(path, block_s=30.0, mono=True, start_s=start_s, end_s=stop,
                                       target_sr=SR, dtype="float32")]
    y = np.concatenate(parts) if parts else np.zeros(0, np.float32)
    if y.size < SR // 4 or not np.any(np.abs(y) > 1e-6):
        return 0.0
    import warnings

    with warnings.catch_warnings():  # no pitched content: librosa warns and returns 0
        warnings.simplefilter("ignore", UserWarning)
        t = float(librosa.estimate_tuning(y=y, sr=SR, bins_per_octave=12))
    return t if np.isfinite(t) else 0.0


def audio_features(
    path,
    *,
    span_s: tuple[float, float] | None = None,
    block_s: float = 300.0,
    tuning: float | None = None,
    progress=None,
) -> AlignFeatures:
    """Alignment features of a recording (see module docstring).

    Parameters
    ----------
    path : path-like
        The recording (validated and streamed by :mod:`stimkit.audio.read`).
    span_s : (start, end) or None
        Only this part of the file, in ``recording`` seconds; frame times stay seconds from the
        first sample of the file.
    tuning : float or None
        Tuning offset in semitones applied to the CQT bins; ``None`` estimates it
        (:func:`estimate_tuning`), so a performance at A = 430 or 446 Hz keeps clean chroma.
    block_s : float
        Seconds of audio per CQT block (memory stays bounded by the block, not the file;
        librosa rebuilds its filter bank per call, so blocks should not be short).
    """
    from ..audio.read import audio_info, iter_blocks

    info = audio_info(path)          # validates: exists, decodable, non-empty
    path = info.path
    dur = info.duration_s
    start, end = 0.0, dur
    if span_s is not None:
        start, end = max(0.0, float(span_s[0])), min(dur, float(span_s[1]))
        if not end > start:
            raise InputError(f"span {span_s[0]:.3f}-{span_s[1]:.3f} s is empty or outside the "
                             f"recording ({dur:.3f} s)", path=path)
    # start on a whole hop so frames stay on the file's grid
    start = np.floor(start * SR / HOP) * HOP / SR
    block_frames = max(int(block_s * RATE_HZ), 16)
    total_frames = int((end - start) * RATE_HZ) + 1
    peak = [0.0]

    def blocks():
        for _, x in iter_blocks(path, block_s=min(block_s, 30.0), mono=True, start_s=start, end_s=end,
                                target_sr=SR, dtype="float32"):
            if x.size:
                peak[0] = max(peak[0], float(np.max(np.abs(x))))
            yield x

    if tuning is None:
        tuning = estimate_tuning(path, start_s=start, end_s=end)
    P, n_samples = _blockwise_energy(blocks(), block_frames=block_frames, sr=SR, hop=HOP,
                                     progress=progress, total_frames=total_frames, tuning=tuning)
    energy = P.mean(axis=1, dtype=np.float64) if P.size else np.zeros(0)
    chroma = finish_chroma(fold_octaves(P))
    onset = dlnco(onset_from_pitch_energy(P), rate_hz=RATE_HZ)
    return AlignFeatures(chroma=chroma, onset=onset, rate_hz=RATE_HZ, start_s=float(start),
                         energy=energy,
                         meta={"duration_s": float(dur), "samples_read": int(n_samples),
                               "peak": peak[0], "end_s": float(end), "tuning_semitones": float(tuning),
                               "sample_rate_hz": int(info.sample_rate_hz), "channels": int(info.channels)})
