"""The report's colours stay apart for readers with common colour-vision deficiencies.

Reference library: colorspacious (PyPI) -- CVD simulation with the matrices of Machado, Oliveira
& Fernandes (2009) and distances in CAM02-UCS (Luo, Cui & Li 2006). Contrast ratio per WCAG 2.1
(relative luminance with the sRGB transfer function). The bound of 19.5 is the frozen palette's
stated property (module notes of stimkit.report.palette), not a standard.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from colorspacious import cspace_convert, deltaE

from stimkit.report.palette import BLOCK, FAMILY_COLOURS, FAMILY_OF, GLYPH, INK, colour_of


def _rgb(h):
    return np.array([int(h[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0


def _relative_luminance(rgb):  # WCAG 2.1 definition
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    return float(lin @ [0.2126, 0.7152, 0.0722])


@pytest.mark.parametrize("cvd", [None, "protanomaly", "deuteranomaly", "tritanomaly"])
def test_family_colours_apart_under_each_vision(cvd):
    cols = [_rgb(c) for c in FAMILY_COLOURS.values()] + [_rgb(INK), _rgb(BLOCK)]
    if cvd:
        cols = [np.clip(cspace_convert(c, {"name": "sRGB1+CVD", "cvd_type": cvd, "severity": 100}, "sRGB1"), 0, 1)
                for c in cols]
    n_fam = len(FAMILY_COLOURS)
    pairs = [(i, j) for i, j in itertools.combinations(range(len(cols)), 2) if i < n_fam]
    dmin = min(float(deltaE(cols[i], cols[j], input_space="sRGB1")) for i, j in pairs)
    assert dmin >= 19.5, (cvd, dmin)


def test_contrast_against_the_page():
    for name, c in FAMILY_COLOURS.items():
        ratio = 1.05 / (_relative_luminance(_rgb(c)) + 0.05)
        assert ratio >= 3.0, name                       # WCAG 2.1 SC 1.4.11 non-text contrast


def test_every_kind_has_a_family_and_a_glyph():
    from stimkit.levels import TRIAL_TYPES

    for kind in list(TRIAL_TYPES) + ["repeat"]:
        if kind == "piece":
            continue
        assert kind in FAMILY_OF and kind in GLYPH, kind
        assert colour_of(kind).startswith("#")
    within = {}
    for k, fam in FAMILY_OF.items():
        within.setdefault(fam, []).append(GLYPH[k])
    for fam, glyphs in within.items():                  # kinds of one family differ by shape
        assert len(set(glyphs)) == len(glyphs), fam
