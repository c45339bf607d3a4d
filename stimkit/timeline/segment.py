"""Pieces inside a long recording: where each listed piece starts and ends.

What it computes
----------------
:func:`find_pieces` takes the scores in the order they were played and returns, for each, the
span of the recording it occupies (``recording`` seconds, start and end) and the matching cost.
Pieces are searched one after another, each after the end of the previous one; a rough start
given by the user narrows the search to a window around it. Silence, speech and applause
between pieces are skipped because the score is matched as a *subsequence* of the recording:
the path may start and end anywhere (subsequence DTW, Müller 2015, ch. 7.2).

The matching itself is the alignment stage's :func:`stimkit.align.locate.locate_piece` (its
recording features computed once for all pieces) when it is installed; otherwise a small
built-in matcher is used (:func:`locate_by_chroma`: chroma of
the score at its nominal tempo against chroma of the recording, cosine cost, librosa's
subsequence DTW). Both answer to about a frame (0.25 s).

Conventions
-----------
``recording`` seconds from the first sample of the recording; a span is ``(start_s, end_s)``
with ``start_s`` at the first note and ``end_s`` at the end of the last note.

References
----------
.. [1] M. Müller, *Fundamentals of Music Processing*, Springer 2015, ch. 3 (chroma) and 7.2
   (subsequence DTW).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import soundfile as sf

from ..errors import WorkFailed

__all__ = ["PieceSpan", "find_pieces", "locate_by_chroma", "MAX_COST", "MAX_RATIO"]

#: Mean path cost (cosine distance, 0..1) above which a piece counts as not found (measured on a
#: rendered session: the pieces played matched at 0.17-0.21, pieces not played at 0.47-0.50).
MAX_COST = 0.35


@dataclass(frozen=True)
class PieceSpan:
    """Where one piece sounds in the recording."""

    piece: str
    start_s: float
    end_s: float
    cost: float
    method: str


def _audio_chroma(path, *, hop_s: float, start_s: float, end_s: float | None, block_s: float = 60.0):
    """Chroma frames (12, n) of a recording part, streamed in blocks; frame k centred at
    ``start_s + (k + 0.5) * hop_s``."""
    import librosa

    info = sf.info(str(path))
    sr = int(info.samplerate)
    hop = int(round(hop_s * sr))
    n_fft = 4096 if sr > 16000 else 2048
    fb = librosa.filters.chroma(sr=sr, n_fft=n_fft)
    win = np.hanning(n_fft)
    first = int(start_s * sr)
    last = info.frames if end_s is None else min(info.frames, int(end_s * sr))
    frames = []
    with sf.SoundFile(str(path)) as fh:
        pos = first
        while pos < last:
            n = min(int(block_s * sr) // hop * hop, last - pos)
            fh.seek(pos)
            x = fh.read(n, dtype="float32", always_2d=True).mean(axis=1)
            if x.size < hop:
                break
            for k in range(x.size // hop):
                seg = x[k * hop:(k + 1) * hop]
                # one windowed FFT per hop, centred in the hop
                c = seg.size // 2
                lo = max(0, c - n_fft // 2)
                buf = np.zeros(n_fft, dtype=np.float32)
                part = seg[lo:lo + n_fft]
                buf[: part.size] = part
                spec = np.abs(np.fft.rfft(buf * win)) ** 2
                frames.append(fb @ spec)
            pos += x.size // hop * hop
    if not frames:
        return np.zeros((12, 0)), sr
    C = np.array(frames).T
    energy = C.sum(axis=0)
    C = C / np.maximum(np.linalg.norm(C, axis=0), 1e-12)
    C[:, energy < 1e-8 * max(float(energy.max()), 1e-30)] = 1.0 / np.sqrt(12.0)
    return C, sr


def _score_chroma(score, *, hop_s: float):
    """Chroma frames (12, n) of the score at its nominal tempo (velocity-weighted pitch classes)."""
    n = score.notes
    on = np.atleast_1d(score.tempo_map(n["score_qn"].to_numpy(dtype=np.float64)))
    off = np.atleast_1d(score.tempo_map((n["score_qn"] + n["duration_qn"]).to_numpy(dtype=np.float64)))
    t0 = float(on.min())
    on, off = on - t0, off - t0
    m = int(np.ceil(off.max() / hop_s)) + 1
    C = np.zeros((12, m))
    vel = n["velocity"].to_numpy(dtype=np.float64) if "velocity" in n.columns else np.full(len(n), 80.0)
    for p, a, b, v in zip(n["pitch"].to_numpy(dtype=np.int64), on, off, vel):
        i0, i1 = int(a / hop_s), max(int(b / hop_s), int(a / hop_s) + 1)
        decay = np.exp(-np.arange(i1 - i0) * hop_s / 1.5)  # piano-like decay of a held note
        C[p % 12, i0:i1] += v * decay
    C = C / np.maximum(np.linalg.norm(C, axis=0), 1e-12)
    C[:, C.sum(axis=0) == 0] = 1.0 / np.sqrt(12.0)
    return C, float(off.max())


def locate_by_chroma(score, audio_path, *, search_span_s=(0.0, None), hop_s: float = 0.25,
                     audio_chroma: np.ndarray | None = None):
    """``(start_s, end_s, cost)`` of the best match of ``score`` inside the search span.

    ``audio_chroma`` may hold the chroma of the whole recording at ``hop_s`` (frame k covering
    ``[k * hop_s, (k + 1) * hop_s)``), computed once for several pieces.
    """
    import librosa

    lo, hi = search_span_s
    if audio_chroma is None:
        A, _ = _audio_chroma(audio_path, hop_s=hop_s, start_s=float(lo), end_s=hi)
    else:
        k0 = int(round(float(lo) / hop_s))
        k1 = audio_chroma.shape[1] if hi is None else int(float(hi) / hop_s)
        A = audio_chroma[:, k0:k1]
        lo = k0 * hop_s
    S, dur = _score_chroma(score, hop_s=hop_s)
    if A.shape[1] < max(4, S.shape[1] // 2 + 1):
        return float(lo), float(lo), 1.0
    n_real = A.shape[1]
    if A.shape[1] <= S.shape[1]:  # librosa's subsequence DTW wants the query shorter: pad flat frames
        A = np.hstack([A, np.full((12, S.shape[1] - A.shape[1] + 1), 1.0 / np.sqrt(12.0))])
    cost = 1.0 - S.T @ A
    # steps (1,1), (1,2), (2,1): the local tempo stays within half to double the notated one,
    # so a piece cannot collapse onto a moment of the recording
    steps = np.array([[1, 1], [1, 2], [2, 1]])
    D, wp = librosa.sequence.dtw(C=cost, subseq=True, backtrack=True, step_sizes_sigma=steps,
                                 weights_add=np.zeros(3), weights_mul=np.ones(3))
    if not np.isfinite(D[-1]).any():
        return float(lo), float(lo), 1.0
    wp = wp[::-1]
    j0, j1 = int(wp[0, 1]), min(int(wp[-1, 1]), n_real - 1)
    path_cost = float(np.mean(cost[wp[:, 0], wp[:, 1]]))
    start = float(lo) + j0 * hop_s
    end = float(lo) + (j1 + 1) * hop_s
    return start, end, path_cost


#: Largest Raffel-Ellis cost ratio of the alignment stage's matcher that counts as found
#: (measured on the bundled session: the pieces played 0.29-0.33, a piece searched where it was
#: not played 0.66-0.72; the matcher's own notes give about 0.7 or more for a different piece).
MAX_RATIO = 0.5


def _locator():
    try:
        from ..align.chroma import audio_features
        from ..align.locate import locate_piece  # the alignment stage's matcher
    except ImportError:
        return None
    return locate_piece, audio_features


def find_pieces(scores, names, audio_path, *, rough_starts=None, duration_s: float,
                max_cost: float = MAX_COST, progress=None) -> list[PieceSpan]:
    """The span of every piece, in the order given.

    Parameters
    ----------
    scores : list of ScoreModel, in the order they were played.
    names : list of str, one per score.
    audio_path : the recording.
    rough_starts : list of float or None per piece (recording seconds), optional.
    duration_s : length of the recording.
    max_cost : largest accepted matching cost (built-in matcher only).

    Raises
    ------
    WorkFailed
        When a piece cannot be found after the previous one.
    """
    rough_starts = rough_starts or [None] * len(scores)
    locate = _locator()
    # built-in matcher: the recording's chroma once for all pieces (coarser for long recordings,
    # to keep the subsequence-DTW matrix small)
    hop_s = 0.25 if duration_s <= 1800 else 0.5
    chroma = None if locate is not None else _audio_chroma(audio_path, hop_s=hop_s, start_s=0.0, end_s=None)[0]
    feats = None
    if locate is not None:
        locate, audio_features = locate
        feats = audio_features(audio_path, progress=progress)  # once for all pieces
    spans: list[PieceSpan] = []
    floor = 0.0
    for k, (score, name, rough) in enumerate(zip(scores, names, rough_starts)):
        nominal = float(score.nominal_duration_s)
        if rough is not None:
            lo = max(floor, float(rough) - 30.0)
            hi = min(duration_s, float(rough) + 1.6 * nominal + 30.0)
        else:
            lo, hi = floor, duration_s
        if hi - lo < 0.3 * nominal:
            raise WorkFailed(f"piece '{name}' cannot fit in the recording after the previous piece "
                             f"(only {max(hi - lo, 0):.0f} s left, the score lasts about {nominal:.0f} s "
                             f"at its notated tempo); check the order of the pieces and the recording")
        method = "align.locate"
        start = end = cost = None
        if locate is not None:
            try:
                start, end, cost = locate(score, audio_path, search_span_s=(lo, hi), features=feats)
            except WorkFailed as exc:
                raise WorkFailed(f"piece '{name}' was not found in the recording ({exc})") from None
            if cost > MAX_RATIO:
                raise WorkFailed(f"piece '{name}' was not found in the recording between {lo:.0f} s "
                                 f"and {hi:.0f} s (best match cost ratio {cost:.2f} > {MAX_RATIO:.2f}); "
                                 f"check the score, the order of the pieces, or give start_s")
        else:
            method = "chroma subsequence DTW"
            start, end, cost = locate_by_chroma(score, audio_path, search_span_s=(lo, hi), hop_s=hop_s,
                                                audio_chroma=chroma)
            if cost > max_cost:
                raise WorkFailed(f"piece '{name}' was not found in the recording between {lo:.0f} s "
                                 f"and {hi:.0f} s (best match cost {cost:.2f} > {max_cost:.2f}); check "
                                 f"the score, the order of the pieces, or give start_s")
        spans.append(PieceSpan(piece=name, start_s=float(start), end_s=float(end), cost=float(cost),
                               method=method))
        floor = float(end)
        if progress is not None:
            progress("finding pieces", (k + 1) / len(scores))
    return spans
