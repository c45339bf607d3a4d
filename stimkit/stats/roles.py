"""Which feature column plays which role (loudness, tempo, tonality, onset rate).

The feature frame's column names belong to the audio pipeline; the report and the summaries
only need "the loudness column", "the tempo column" and so on. Each role lists candidate
column names in order of preference; :func:`pick_column` returns the first one present, so a
renamed or missing feature makes a lane or a summary number disappear instead of failing.
"""

from __future__ import annotations

import pandas as pd

__all__ = ["ROLE_CANDIDATES", "pick_column", "change_columns"]

#: Role -> candidate columns, preferred first.
ROLE_CANDIDATES: dict[str, tuple[str, ...]] = {
    "loudness": ("short_term_lufs", "loudness_short_term_lufs", "momentary_lufs",
                 "loudness_momentary_lufs", "loudness_lufs", "rms_dbfs"),
    "loudness_short_term": ("short_term_lufs", "loudness_short_term_lufs"),
    "tempo": ("tempo_bpm", "local_tempo_bpm"),
    # Tonality: key strength first (drawn as key ambiguity, 1 - key strength), then the rate of
    # harmonic change, then sensory roughness (see stimkit.report.figure for the reasoning).
    "tonality": ("key_strength", "harmonic_change", "roughness"),
    "onset_rate": ("onset_rate_hz", "onset_density_hz"),
    # one column per aspect for change detection, so that no family (e.g. twelve chroma
    # columns, three loudness columns) outweighs the others in the novelty distance
    "change:loudness": ("short_term_lufs", "loudness_short_term_lufs", "momentary_lufs",
                        "loudness_momentary_lufs", "rms_dbfs"),
    "change:tempo": ("tempo_bpm",),
    "change:onsets": ("onset_rate_hz", "onset_density_hz"),
    "change:brightness": ("centroid_hz",),
    "change:noisiness": ("flatness",),
    "change:key_strength": ("key_strength",),
    "change:harmony": ("harmonic_change",),
    "change:roughness": ("roughness",),
}


def change_columns(frame: pd.DataFrame) -> list[str]:
    """One column per aspect (the ``change:*`` roles) present in ``frame``, in role order."""
    out = []
    for role in ROLE_CANDIDATES:
        if role.startswith("change:"):
            c = pick_column(frame, role)
            if c is not None and c not in out:
                out.append(c)
    return out


def pick_column(frame: pd.DataFrame, role: str, *, override: str | None = None) -> str | None:
    """The column of ``frame`` for ``role`` (``override`` first when given), or ``None``."""
    if override is not None:
        return override if override in frame.columns else None
    for c in ROLE_CANDIDATES.get(role, ()):
        if c in frame.columns:
            return c
    return None
