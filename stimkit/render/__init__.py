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
                 start_s: float = 0.0) -> tuple[np.ndarray, Performance]:
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
        Add reverberation (RT60 0.8 s, wet 0.25) and -60 dBFS noise.
    start_s : float
        Silence before the first beat, seconds.

    Returns
    -------
    y : numpy.ndarray
        float32 mono signal of ``round(perf.duration_s * sr)`` samples.
    perf : Performance
        Timing and ground truth; ``perf.settings`` also records ``sr``, ``timbre`` and ``room``.
    """
    perf = perform(score, seed=seed, start_s=start_s)
    y = synthesize(perf.notes, sr=sr, timbre=timbre, seed=seed + 1, duration_s=perf.duration_s)
    if room:
        y = add_room(y, sr, seed=seed + 2)
    perf.settings.update({"sr": int(sr), "timbre": timbre, "room": bool(room)})
    return y, perf
