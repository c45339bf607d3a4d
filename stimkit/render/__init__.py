"""The project's own renderer: expressive performances of a score with exact ground truth.

Modules
-------
- :mod:`~stimkit.render.performance` -- :func:`perform`: expressive timing (tempo drift, phrase
  ritardandi, fermata holds, jitter, chord spread) and the exact ``recording`` time of every note.
- :mod:`~stimkit.render.synth` -- :func:`synthesize`: note list -> mono signal, ``"piano"`` or
  ``"organ"`` timbre.
- :mod:`~stimkit.render.room` -- :func:`add_room`: reverberation and noise, dry path at delay 0.
- :mod:`~stimkit.render.sounds` -- sync clicks, babble, applause and room tone for the demo.

:func:`render_score` does the first three in one call. Ground truth is
``Performance.notes.onset_s``: the time (``recording`` seconds) at which each note's sound starts in
the returned signal, to within half a sample.
"""

from __future__ import annotations

import numpy as np

from .performance import Performance, perform
from .room import add_room
from .sounds import applause, babble, room_tone, sync_click
from .synth import TIMBRES, synthesize

__all__ = [
    "render_score", "perform", "Performance", "synthesize", "TIMBRES", "add_room",
    "sync_click", "babble", "applause", "room_tone",
]


def render_score(score, *, seed: int, sr: int = 22050, timbre: str = "piano", room: bool = True,
                 start_s: float = 0.0, rt60_s: float = 0.8, wet: float = 0.25, noise_db: float = -60.0,
                 perform_options: dict | None = None) -> tuple[np.ndarray, Performance]:
    """Perform, synthesize and (optionally) place in a room one score.

    Parameters
    ----------
    score : stimkit.score.model.ScoreModel
        The score to play.
    seed : int
        Seeds the timing (``seed``), the synthesis (``seed + 1``) and the room (``seed + 2``).
    sr : int
        Sampling rate, Hz.
    timbre : str
        One of :data:`stimkit.render.synth.TIMBRES`.
    room : bool
        Add reverberation and noise with :func:`stimkit.render.room.add_room`.
    start_s : float
        Silence before the first beat, seconds.
    rt60_s, wet, noise_db : float
        Room options (see :func:`stimkit.render.room.add_room`).
    perform_options : dict, optional
        Further keyword options of :func:`stimkit.render.performance.perform` (``drift``,
        ``phrase_rit``, ``fermata_factor``, ``jitter_s``, ``chord_spread_s``).

    Returns
    -------
    y : numpy.ndarray
        float32 mono signal of ``round(perf.duration_s * sr)`` samples.
    perf : Performance
        Timing and ground truth. Here ``notes.onset_s`` is snapped to the sample grid
        (``k / sr``, ``k`` the note's first sample in ``y``), so it is exact; ``perf.settings``
        also records ``sr``, ``timbre`` and the room options.

    Examples
    --------
    >>> from stimkit.score.parse import load_score          # doctest: +SKIP
    >>> y, perf = render_score(load_score("song.musicxml"), seed=1, timbre="organ")  # doctest: +SKIP
    >>> perf.positions()[["score_qn", "onset_s"]].head()     # doctest: +SKIP
    """
    perf = perform(score, seed=seed, start_s=start_s, **(perform_options or {}))
    perf.notes["onset_s"] = np.rint(perf.notes["onset_s"].to_numpy() * sr) / sr
    on = perf.notes["onset_s"].to_numpy()
    perf.notes["offset_s"] = np.maximum(perf.notes["offset_s"].to_numpy(), on + 1.0 / sr)
    y = synthesize(perf.notes, sr=sr, timbre=timbre, seed=seed + 1, duration_s=perf.duration_s)
    if room:
        y = add_room(y, sr, rt60_s=rt60_s, wet=wet, noise_db=noise_db, seed=seed + 2)
    perf.settings.update({"sr": int(sr), "timbre": timbre, "room": bool(room)})
    if room:
        perf.settings.update({"rt60_s": float(rt60_s), "wet": float(wet), "noise_db": float(noise_db)})
    return y, perf
