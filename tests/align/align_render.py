"""Shared helpers for the alignment tests: render a score with the project's renderer."""

from __future__ import annotations

import numpy as np
import soundfile as sf

SR = 22050


def render(score, path, *, seed: int, timbre: str = "piano", start_s: float = 3.0, tail_s: float = 2.0,
           room: bool = False, **perform_kw):
    """Perform ``score`` with seeded expressive timing, synthesize it and write a WAV.

    Returns ``(performance, signal)``; the signal is what was written (mono, ``SR``).
    """
    from stimkit.render.performance import perform
    from stimkit.render.synth import synthesize

    perf = perform(score, seed=seed, start_s=start_s, **perform_kw)
    y = synthesize(perf.notes, sr=SR, timbre=timbre, seed=seed)
    y = np.concatenate([y, np.zeros(int(SR * tail_s), np.float32)])
    if room:
        from stimkit.render.room import add_room

        y = add_room(y, SR, rt60_s=0.9, wet=0.25, noise_db=-55.0, seed=seed)
    sf.write(str(path), y, SR)
    return perf, y
