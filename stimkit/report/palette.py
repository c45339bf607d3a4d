"""The report's colours and glyphs: one colour per family of boundaries, one glyph per kind.

The rule
--------
Colour says the *family* of a boundary (what a reader groups by), the glyph says its *kind*:
few colours can stay apart for every reader, shapes and labels carry the rest.

The six family colours were chosen by a stated rule, not taken from any program: from the sRGB
grid with 16 levels per channel, keep the colours that (a) reach a contrast ratio of at least
3:1 against the white page (WCAG 2.1, success criterion 1.4.11, non-text contrast), (b) have a
CAM02-UCS lightness J' between 35 and 72 and chroma of at least 22 (no near-greys, no near-
blacks), then pick six that **maximise the smallest pairwise CAM02-UCS distance** (Luo, Cui &
Li 2006) over four kinds of vision -- normal, and protanopia, deuteranopia and tritanopia
simulated with the matrices of Machado, Oliveira & Fernandes (2009) at full severity -- also
counting the distance to the ink (#333333) and to the piece-block grey (#b8bdc2). The search
(greedy max-min, then coordinate ascent from 40 seeded starts) is :func:`derive_palette`; it
needs the ``colorspacious`` package (test extra) and is run by hand (about 20 s); its result
with the default arguments is frozen below, each colour then given to the family whose role
suits it (the warm rose marks "listen here"). The smallest distance among the six and the two
greys is 20.8 (normal vision), 21.0 (protanopia), 20.9 (deuteranopia) and 19.7
(tritanopia) CAM02-UCS units (colorspacious 1.1.2);
``tests/report/test_palette.py`` recomputes it per vision. A distance above about 15 is taken
here as "easily told apart at glyph size" (a rule of thumb, not a standard).

References
----------
Machado, G. M., Oliveira, M. M., & Fernandes, L. A. F. (2009). A physiologically-based model
for simulation of color vision deficiency. IEEE TVCG 15(6), 1291-1298.
Luo, M. R., Cui, G., & Li, C. (2006). Uniform colour spaces based on CIECAM02 colour
appearance model. Color Research & Application 31(4), 320-330.
W3C (2018). Web Content Accessibility Guidelines (WCAG) 2.1, 1.4.11 Non-text Contrast.
"""

from __future__ import annotations

__all__ = ["FAMILY_COLOURS", "FAMILY_OF", "FAMILY_NAMES", "GLYPH", "INK", "MUTED", "BLOCK",
           "CHECK", "family_of", "colour_of", "derive_palette"]

#: Text and axes.
INK = "#333333"
#: Secondary text, axes ticks.
MUTED = "#6b7075"
#: Piece blocks in the overview.
BLOCK = "#b8bdc2"

#: Family -> colour (see the module notes for the rule that chose them).
FAMILY_COLOURS = {
    "dynamics": "#0033ff",    # dynamic, hairpin, accent
    "tempo": "#3399ee",       # tempo, tempo_change, fermata, pause
    "form": "#665500",        # section, key, meter
    "audio": "#998822",       # silence, feature_change (found in the sound, not the score)
    "repeat": "#880077",      # repeats taken or skipped
    "check": "#bb5577",       # where to check by ear: low alignment confidence
}
#: The colour of "listen here".
CHECK = FAMILY_COLOURS["check"]

#: Family -> words for the legend.
FAMILY_NAMES = {
    "dynamics": "loudness markings", "tempo": "tempo and time", "form": "form, key, metre",
    "audio": "found in the sound", "repeat": "repeats", "check": "check by ear", "sync": "sync marks",
}

#: trial_type -> family.
FAMILY_OF = {
    "dynamic": "dynamics", "hairpin": "dynamics", "accent": "dynamics",
    "tempo": "tempo", "tempo_change": "tempo", "fermata": "tempo", "pause": "tempo",
    "section": "form", "key": "form", "meter": "form",
    "silence": "audio", "feature_change": "audio",
    "repeat": "repeat", "sync": "sync",
}

#: trial_type -> matplotlib marker (the SVG view uses the same drawing).
GLYPH = {
    "dynamic": "o", "hairpin": ">", "accent": "^",
    "tempo": "s", "tempo_change": "D", "fermata": "p", "pause": "h",
    "section": "|", "key": "*", "meter": "P",
    "silence": "_", "feature_change": "x",
    "repeat": "8", "sync": "+",
}


def family_of(kind) -> str:
    """The family of a ``trial_type`` (unknown kinds: ``"audio"``)."""
    return FAMILY_OF.get(str(kind), "audio")


def colour_of(kind) -> str:
    """The colour of a ``trial_type`` (sync marks are drawn in ink)."""
    fam = family_of(kind)
    return INK if fam == "sync" else FAMILY_COLOURS[fam]


def derive_palette(k: int = 6, *, seed: int = 20240601, restarts: int = 40):
    """Re-run the search of the module notes; returns ``(hex colours, smallest distance)``.

    Needs ``colorspacious`` (``pip install -e .[test]``). Run by hand; the result is frozen in
    :data:`FAMILY_COLOURS`.
    """
    import itertools

    import numpy as np
    from colorspacious import cspace_convert

    visions = [None, "protanomaly", "deuteranomaly", "tritanomaly"]

    def ucs(rgb, v):
        rgb = np.clip(rgb, 0, 1)
        if v is not None:
            rgb = np.clip(cspace_convert(rgb, {"name": "sRGB1+CVD", "cvd_type": v, "severity": 100},
                                         "sRGB1"), 0, 1)
        return cspace_convert(rgb, "sRGB1", "CAM02-UCS")

    levels = np.arange(16) / 15
    cand = np.array(list(itertools.product(levels, levels, levels)))
    lin = np.where(cand <= 0.04045, cand / 12.92, ((cand + 0.055) / 1.055) ** 2.4)
    lum = lin @ np.array([0.2126, 0.7152, 0.0722])            # WCAG relative luminance
    cand = cand[(1.05 / (lum + 0.05) >= 3.0) & (lum >= 0.04)]
    u0 = cspace_convert(cand, "sRGB1", "CAM02-UCS")
    cand = cand[(np.hypot(u0[:, 1], u0[:, 2]) >= 22) & (u0[:, 0] >= 35) & (u0[:, 0] <= 72)]
    fixed = np.array([[0.2, 0.2, 0.2], [0.72, 0.74, 0.76]])   # the ink and the piece-block grey
    U = [ucs(cand, v) for v in visions]
    F = [ucs(fixed, v) for v in visions]
    to_fixed = np.full(len(cand), np.inf)
    for u, f in zip(U, F):
        to_fixed = np.minimum(to_fixed, np.linalg.norm(u[:, None] - f[None], axis=2).min(axis=1))

    def score(ch):
        m = np.inf
        for u, f in zip(U, F):
            p = u[ch]
            d = np.linalg.norm(p[:, None] - p[None], axis=2)
            d[np.eye(len(ch), dtype=bool)] = np.inf
            m = min(m, d.min(), np.linalg.norm(p[:, None] - f[None], axis=2).min())
        return float(m)

    def refine(ch):  # coordinate ascent: swap one colour at a time for the best candidate
        ch, best, better = list(ch), score(ch), True
        while better:
            better = False
            for j in range(k):
                others = ch[:j] + ch[j + 1:]
                cm = np.minimum(to_fixed, to_fixed[others].min())   # the others' distance to ink/grey
                for u in U:
                    for o in others:
                        cm = np.minimum(cm, np.linalg.norm(u - u[o], axis=1))
                    po = u[others]
                    d = np.linalg.norm(po[:, None] - po[None], axis=2)
                    d[np.eye(len(others), dtype=bool)] = np.inf
                    cm = np.minimum(cm, d.min() if len(others) > 1 else np.inf)
                i = int(np.argmax(cm))
                if cm[i] > best + 1e-9:
                    ch[j], best, better = i, float(cm[i]), True
        return ch, best

    rng = np.random.default_rng(seed)
    best, cur = None, to_fixed.copy()
    for r in range(restarts):
        ch = [int(x) for x in rng.choice(len(cand), k, replace=False)] if r else []
        for _ in range(k - len(ch)):  # the first start: greedy max-min from ink and grey
            i = int(np.argmax(cur))
            ch.append(i)
            for u in U:
                cur = np.minimum(cur, np.linalg.norm(u - u[i], axis=1))
        res = refine(ch)
        if best is None or res[1] > best[1] + 1e-9:
            best = res
    hexes = ["#%02x%02x%02x" % tuple(int(round(x * 255)) for x in cand[i]) for i in best[0]]
    return hexes, best[1]
