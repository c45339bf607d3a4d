"""Score-to-recording alignment: score templates, audio chroma, multiscale DTW, warping.

Modules
-------
- :mod:`stimkit.align.template` -- score-side chroma and chroma-onset templates from the notes,
  in nominal time.
- :mod:`stimkit.align.chroma` -- recording-side CQT chroma and DLNCO onset features, block-wise.
- :mod:`stimkit.align.dtw` -- banded, multiscale DTW with memory bounded by the band (numba).
- :mod:`stimkit.align.warp` -- path to TimeMap, tempo curve, confidence, flagged regions.
- :mod:`stimkit.align.run` -- the public entry points.
- :mod:`stimkit.align.locate` -- coarse position of a piece inside a long recording.

Public API
----------
``align_score(score, audio_path, *, anchors=(), force=False, span_s=None, progress=None) -> AlignResult``
``align_files(score_path, audio_path, *, anchors=(), force=False, expand_repeats=True, progress=None)``
``parse_anchor("12.3=45.6") -> (12, 3.0, 45.6)``; ``"12.3@2=45.6"`` -> ``(12, 3.0, 45.6, 2)``
``confidence_at(result, score_qn) -> ndarray`` (0..1)
``write_alignment(result, *, out_dir) -> list[Path]`` (``<recording stem>.alignment.tsv`` / ``.json``)
``summary_lines(result) -> list[str]``
``locate_piece(score, audio_path=None, *, search_span_s=None, features=None) -> (start_s, end_s, cost_ratio)``
"""

from .locate import locate_piece
from .run import AlignResult, align_files, align_score, confidence_at, parse_anchor, summary_lines, write_alignment

__all__ = [
    "AlignResult",
    "align_score",
    "align_files",
    "parse_anchor",
    "confidence_at",
    "write_alignment",
    "summary_lines",
    "locate_piece",
]
