"""The dynamics -> MIDI velocity table follows its stated rule, not any program's defaults.

Rule (``stimkit.score.markings``): the ten notated levels pppp..ffff are equal steps in dB over the
whole 40 dB of the project's velocity -> level law (velocity 1..127, linear in dB), the law the
score template uses (``stimkit/align/template.py``: amplitude = 10 ** ((v - 127) / 126 * 40 / 20)).
Equal dB steps are equal loudness ratios under Stevens' power law (loudness doubles per ~10 dB;
Stevens 1957, Psychological Review 64:153-181).
"""

from __future__ import annotations

import numpy as np
import pytest

from stimkit.score.markings import ACCENT_VELOCITY, DYNAMIC_LEVELS, LEVEL_STEP_DB, VELOCITY


def level_db(v):
    # the template's law, restated: 40 dB from velocity 1 to 127, linear in dB
    return 40.0 * (np.asarray(v, dtype=float) - 127.0) / 126.0


def test_ends_of_the_range():
    assert VELOCITY[DYNAMIC_LEVELS["pppp"]] == 1 and VELOCITY[DYNAMIC_LEVELS["ffff"]] == 127


def test_equal_steps_in_db():
    db = level_db([VELOCITY[k] for k in range(1, 11)])
    steps = np.diff(db)
    # nine equal steps of 40/9 dB; rounding to whole velocities moves a level by <= 0.16 dB
    assert steps == pytest.approx(np.full(9, 40.0 / 9), abs=0.33)
    assert LEVEL_STEP_DB == pytest.approx(40.0 / 9)
    # Stevens: loudness ratio 2 ** (step / 10) per step, the same for every neighbouring pair
    ratios = 2.0 ** (steps / 10.0)
    assert ratios.max() / ratios.min() < 1.05


def test_accents_are_one_and_one_and_a_half_steps():
    assert level_db(127 + ACCENT_VELOCITY[1]) - level_db(127) == pytest.approx(LEVEL_STEP_DB)
    assert level_db(127 + ACCENT_VELOCITY[2]) - level_db(127) == pytest.approx(1.5 * LEVEL_STEP_DB)
