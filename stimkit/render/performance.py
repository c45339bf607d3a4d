"""Expressive performance timing of a score, with the exact ground-truth time of every note.

:func:`perform` turns a :class:`~stimkit.score.model.ScoreModel` into a *performance*: the time in
the rendered recording at which every note starts and stops, plus the smooth score -> recording
map it was built from.

Conventions
-----------
- Input positions are ``score_qn`` (quarter notes as performed); output times are ``recording``
  seconds, i.e. seconds from the first sample of the signal that :func:`stimkit.render.synth.synthesize`
  will produce from these notes. ``onset_s`` is the exact time the note's sound starts in that
  signal (the synthesizer places it on the nearest sample, error <= half a sample); the room
  (:mod:`stimkit.render.room`) keeps the dry path at delay 0, so it does not shift it either.
- Tempo is expressed as a multiplier of the *nominal* tempo from ``score.tempo_map`` (which already
  holds the notated tempo marks, changes and fermata holds). A multiplier > 1 plays faster.

Model
-----
The local duration of a quarter note is the nominal one divided by three factors:

1. **Drift** -- a smooth random tempo multiplier ``1 + drift * n(q)``, ``n`` low-pass filtered
   Gaussian noise (Gaussian kernel of :data:`DRIFT_SIGMA_QN` quarter notes) scaled to
   ``max |n| = 1``, so the drift stays within ``[1 - drift, 1 + drift]`` of the nominal tempo.
2. **Phrase-final ritardando** -- over the last :data:`RIT_SPAN_QN` quarter notes before each
   phrase end the tempo falls linearly (in tempo) to ``1 - phrase_rit`` and returns at the next
   phrase. Section boundaries (``trial_type`` ``section``/``pause``), the end of the last note and
   the end of the piece take the full ``phrase_rit``; inner phrase ends (rests of at least one
   beat in all parts, every 8 bars) take :data:`INNER_RIT` of it.
   This follows the shape of final ritards described by Friberg & Sundberg (1999) and
   phrase-arch timing (Todd 1992), in a simplified linear form.
3. **Fermata** -- the span of a fermata (``trial_type == "fermata"``: from its ``score_qn`` to
   its ``end_qn`` when the table has that column, else to the next note onset) is lengthened by
   ``fermata_factor`` on top of the hold the nominal tempo map already contains
   (:func:`stimkit.score.parse.load_score` holds a fermata twice its written length, so the
   default 1.3 performs it at 2.6 times).

Performers who ignore the marks (all off by default, so a seed renders as before):

4. **Global tempo** -- ``tempo_factor`` multiplies the whole tempo (0.4 plays at 40 % of the
   notated tempo, or of the assumed q = 100 when the score has none).
5. **Rubato** -- within each phrase (between phrase ends) the tempo follows an arch,
   ``1 + r (sin(pi w) - 2/pi)`` for ``w`` from 0 to 1 across the phrase (faster in the middle,
   slower at both ends, mean 1), with ``r`` drawn per phrase from ``rubato * U(0.5, 1.5)``: the
   phrase-arch shape of Todd (1992).
6. **Agogic accents** -- before a random :data:`AGOGIC_SHARE` of the downbeats the performer
   lingers: ``agogic_s * U(0.5, 1)`` seconds are added over the last :data:`AGOGIC_QN` quarter
   note before the bar line (Sloboda 1983 measured such lengthening at metrically strong places).
7. **Long ritardandi** -- ``final_rit_qn`` sets the length of the ritardando before a section end
   and the end of the piece (default :data:`RIT_SPAN_QN`); several bars make a long one.

The integral of the resulting seconds-per-quarter-note gives the smooth map
:attr:`Performance.timemap` (``score_qn -> recording``), strictly increasing by construction.
Each note then gets Gaussian onset jitter (``jitter_s`` standard deviation, truncated at 2.5 sd)
and, in a chord, the highest note leads and the others follow by up to ``chord_spread_s``
(melody lead, Palmer 1996). With ``melody_lead_s`` the melody leads by about that much more
(``U(0.8, 1.2)`` times it, per note): in a score with several parts the part with the highest mean
pitch sounds ``lead / 2`` early and the others ``lead / 2`` late; in a one-part score the
highest note of each chord does. Palmer (1996) measured melody leads of 20-50 ms in pianists.
The total per-note deviation is limited to 40 % of the gap to the
neighbouring onset positions, so successive score positions stay in order. Everything is drawn
from ``numpy.random.default_rng(seed)``: the same seed gives the same performance.

References
----------
.. [1] A. Friberg and J. Sundberg, "Does music performance allude to locomotion? A model of final
   ritardandi derived from measurements of stopping runners", JASA 105(3), 1999.
.. [2] N. P. McA. Todd, "The dynamics of dynamics: a model of musical expression", JASA 91(6), 1992.
.. [3] C. Palmer, "On the assignment of structure in music performance", Music Perception 14(1),
   1996 (melody lead in chords).
.. [4] J. A. Sloboda, "The communication of musical metre in piano performance", Quarterly
   Journal of Experimental Psychology 35A, 1983 (lengthening at strong metrical positions).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.ndimage import gaussian_filter1d

from ..errors import InputError
from ..score.model import ScoreModel
from ..timemap import TimeMap

__all__ = ["Performance", "perform", "PERFORMANCE_NOTE_COLUMNS", "DRIFT_SIGMA_QN", "RIT_SPAN_QN",
           "PHRASE_BARS", "INNER_RIT", "AGOGIC_SHARE", "AGOGIC_QN"]

PERFORMANCE_NOTE_COLUMNS = [
    "score_qn", "duration_qn", "pitch", "velocity", "part", "measure", "pass", "beat",
    "onset_s", "offset_s",
]
#: Standard deviation (quarter notes) of the Gaussian kernel that smooths the drift noise.
DRIFT_SIGMA_QN = 6.0
#: Length (quarter notes) of the ritardando before a phrase end.
RIT_SPAN_QN = 3.0
#: Bars per phrase when the score gives no other phrase end.
PHRASE_BARS = 8
#: Share of ``phrase_rit`` used at inner phrase ends (every 8 bars, rests).
INNER_RIT = 0.5
#: Grid step (quarter notes) on which the tempo factors are evaluated.
GRID_QN = 0.125
#: Silence (seconds) kept after the last note's release in :attr:`Performance.duration_s`.
TAIL_S = 1.5
_MIN_NOTE_S = 0.03
#: Share of downbeats (after the first bar) that get an agogic lengthening.
AGOGIC_SHARE = 0.2
#: Span (quarter notes) before the bar line over which an agogic lengthening is spread.
AGOGIC_QN = 0.25


@dataclass
class Performance:
    """One expressive performance of a score.

    Attributes
    ----------
    notes : pandas.DataFrame
        One row per note, sorted by ``onset_s`` then ``pitch``: ``score_qn, duration_qn, pitch,
        velocity, part, measure, pass, beat, onset_s, offset_s``. ``onset_s`` / ``offset_s`` are
        ``recording`` seconds (ground truth, including ``start_s``, jitter and chord spread).
    timemap : stimkit.timemap.TimeMap
        The smooth expressive map ``score_qn -> recording`` (no per-note jitter).
    beats : pandas.DataFrame
        ``score_qn, measure, pass, beat, recording`` for every beat of ``score.beat_grid()``.
    duration_s : float
        Length of the signal to render: last release plus :data:`TAIL_S`.
    settings : dict
        Every option used, with the seed, for provenance.
    """

    notes: pd.DataFrame
    timemap: TimeMap
    beats: pd.DataFrame
    duration_s: float
    settings: dict = field(default_factory=dict)

    def positions(self) -> pd.DataFrame:
        """Ground truth per distinct note-onset position (the rows an alignment reports).

        Returns
        -------
        pandas.DataFrame
            Sorted by ``score_qn``: ``score_qn, measure, pass, beat, n_notes``, ``onset_s`` (first
            note of the position to sound), ``onset_mean_s`` (mean over its notes) and ``smooth_s``
            (``timemap(score_qn)``, the tempo curve without jitter and chord spread).
        """
        g = self.notes.groupby("score_qn", sort=True)
        out = g.agg(measure=("measure", "first"), pass_=("pass", "first"), beat=("beat", "first"),
                    n_notes=("pitch", "size"), onset_s=("onset_s", "min"),
                    onset_mean_s=("onset_s", "mean")).reset_index().rename(columns={"pass_": "pass"})
        out["smooth_s"] = self.timemap(out["score_qn"].to_numpy(dtype=np.float64))
        return out


def _phrase_ends(score: ScoreModel, total_qn: float) -> tuple[np.ndarray, np.ndarray]:
    """Score positions where a phrase ends (sorted, unique, > 0) and the depth of their ritardando:
    1 at section boundaries, general pauses and the end; :data:`INNER_RIT` at inner phrase ends."""
    ends = {}

    def add(q, depth):
        q = round(float(q), 9)
        if 0 < q <= total_qn + 1e-9:
            ends[q] = max(depth, ends.get(q, 0.0))

    add(total_qn, 1.0)
    b = score.boundaries
    if b is not None and len(b):
        for q in b.loc[b["trial_type"].isin(["section", "pause"]), "score_qn"]:
            add(q, 1.0)
    m = score.measures
    for q in m["score_qn"].to_numpy(dtype=np.float64)[PHRASE_BARS::PHRASE_BARS]:
        add(q, INNER_RIT)
    # rests of at least one beat in all parts: a gap between the sounding end so far and the next onset
    n = score.notes
    if len(n):
        q = n["score_qn"].to_numpy(dtype=np.float64)
        e = q + n["duration_qn"].to_numpy(dtype=np.float64)
        order = np.argsort(q, kind="stable")
        q, e = q[order], np.maximum.accumulate(e[order])
        nxt = np.r_[q[1:], np.inf]
        beat_qn = float(np.median(m["beat_qn"])) if len(m) else 1.0
        for x in e[(nxt - e >= beat_qn - 1e-9) & np.isfinite(nxt)]:
            add(x, INNER_RIT)
        add(e[-1], 1.0)   # the end of the last sounding note
    pos = np.array(sorted(ends), dtype=np.float64)
    return pos, np.array([ends[k] for k in sorted(ends)], dtype=np.float64)


def _fermata_spans(score: ScoreModel, onsets: np.ndarray, total_qn: float) -> list[tuple[float, float]]:
    """``(start, end)`` in score_qn of each fermata: to its ``end_qn`` when the boundaries table
    gives one, else to the next distinct note onset."""
    b = score.boundaries
    if b is None or not len(b):
        return []
    rows = b[b["trial_type"] == "fermata"]
    ends = rows["end_qn"].to_numpy(dtype=np.float64) if "end_qn" in rows else np.full(len(rows), np.nan)
    spans = {}
    for q0, q_end in zip(rows["score_qn"].to_numpy(dtype=np.float64), ends):
        if np.isfinite(q_end) and q_end > q0:
            q1 = float(q_end)
        else:
            later = onsets[onsets > q0 + 1e-9]
            q1 = float(later[0]) if later.size else total_qn
        if q1 > q0:
            spans[float(q0)] = max(q1, spans.get(float(q0), q1))
    return sorted(spans.items())


def _validate(score: ScoreModel, drift, phrase_rit, fermata_factor, jitter_s, chord_spread_s, start_s,
              tempo_factor=1.0, rubato=0.0, agogic_s=0.0, final_rit_qn=RIT_SPAN_QN, melody_lead_s=0.0):
    where = getattr(score, "path", None)
    if not 0.05 <= tempo_factor <= 20.0:
        raise InputError(f"tempo_factor must be in [0.05, 20], got {tempo_factor}", path=where)
    if not 0.0 <= rubato < 0.6:
        raise InputError(f"rubato must be in [0, 0.6), got {rubato}", path=where)
    if not (agogic_s >= 0.0 and melody_lead_s >= 0.0 and final_rit_qn > 0.0):
        raise InputError("agogic_s and melody_lead_s must be >= 0 and final_rit_qn > 0", path=where)
    if not 0.0 <= drift < 1.0:
        raise InputError(f"drift must be in [0, 1), got {drift}", path=where)
    if not 0.0 <= phrase_rit < 1.0:
        raise InputError(f"phrase_rit must be in [0, 1), got {phrase_rit}", path=where)
    if not fermata_factor >= 1.0:
        raise InputError(f"fermata_factor must be >= 1, got {fermata_factor}", path=where)
    if not (jitter_s >= 0.0 and chord_spread_s >= 0.0 and start_s >= 0.0):
        raise InputError("jitter_s, chord_spread_s and start_s must be >= 0", path=where)
    if score.measures is None or not len(score.measures):
        raise InputError("the score has no bars; nothing to perform", path=where)


def perform(
    score: ScoreModel,
    *,
    seed: int,
    drift: float = 0.25,
    phrase_rit: float = 0.35,
    fermata_factor: float = 1.3,
    jitter_s: float = 0.008,
    chord_spread_s: float = 0.015,
    start_s: float = 0.0,
    tempo_factor: float = 1.0,
    rubato: float = 0.0,
    agogic_s: float = 0.0,
    final_rit_qn: float = RIT_SPAN_QN,
    melody_lead_s: float = 0.0,
) -> Performance:
    """Expressive timing of ``score`` with the exact performed time of every note.

    Parameters
    ----------
    score : ScoreModel
        The parsed score; ``score.tempo_map`` gives the nominal tempo.
    seed : int
        Seed of ``numpy.random.default_rng``; the same seed gives the same performance.
    drift : float
        Bound of the smooth random tempo drift, as a fraction of the nominal tempo (0.25 = ±25 %).
    phrase_rit : float
        Tempo loss at a section end or the end of the piece (0.35: played at 65 % of the tempo
        at the end); inner phrase ends lose ``INNER_RIT * phrase_rit``.
    fermata_factor : float
        Extra lengthening of a fermata span on top of the nominal hold; 1 keeps the nominal hold.
    jitter_s : float
        Standard deviation of the per-note Gaussian onset jitter, seconds.
    chord_spread_s : float
        Largest delay of a chord note after the chord's highest note, seconds.
    start_s : float
        Recording time of ``score_qn = 0`` (silence before the music), seconds.
    tempo_factor : float
        Global tempo multiplier (0.5 = half the notated tempo).
    rubato : float
        Depth of the phrase-arch tempo curve (0 = none; 0.15 = about ±10 %).
    agogic_s : float
        Largest agogic lengthening before a downbeat, seconds (0 = none).
    final_rit_qn : float
        Length of the ritardando before section ends and the end, quarter notes.
    melody_lead_s : float
        Melody lead, seconds (0 = only ``chord_spread_s``).

    Returns
    -------
    Performance

    Raises
    ------
    stimkit.errors.InputError
        An option out of range, or a score without bars.

    Examples
    --------
    >>> perf = perform(score, seed=3, drift=0.1)                  # doctest: +SKIP
    >>> perf.notes[["score_qn", "pitch", "onset_s"]].head()       # doctest: +SKIP
    >>> perf.timemap(8.0)   # recording second of score_qn 8      # doctest: +SKIP
    """
    _validate(score, drift, phrase_rit, fermata_factor, jitter_s, chord_spread_s, start_s,
              tempo_factor, rubato, agogic_s, final_rit_qn, melody_lead_s)
    rng = np.random.default_rng(seed)
    rng_x = np.random.default_rng([int(seed) & 0xFFFFFFFF, 7])   # the options 4-7 (old draws unchanged)
    total_qn = score.total_qn
    notes = score.notes.sort_values(["score_qn", "pitch"], kind="stable").reset_index(drop=True)
    q_on = notes["score_qn"].to_numpy(dtype=np.float64)
    q_off = q_on + notes["duration_qn"].to_numpy(dtype=np.float64)
    onset_pos = np.unique(q_on)

    ends, depths = _phrase_ends(score, total_qn)
    spans = _fermata_spans(score, onset_pos, total_qn)

    # knots: a regular grid plus every place where a factor or the nominal slope changes
    tm = score.tempo_map
    bar_qn = score.measures["score_qn"].to_numpy(dtype=np.float64)
    span = np.where(depths >= 1.0, final_rit_qn, RIT_SPAN_QN)
    extra = [q_on, q_off, bar_qn, ends, np.maximum(ends - span, 0.0), tm.x]
    if agogic_s > 0:
        extra.append(np.maximum(bar_qn - AGOGIC_QN, 0.0))
    extra += [np.array(s) for s in spans]
    hi = max(total_qn, float(q_off.max()) if q_off.size else 0.0)
    knots = np.concatenate([np.arange(0.0, hi, GRID_QN), [hi], *extra])
    knots = np.unique(np.round(knots, 9))
    knots = knots[(knots >= 0.0) & (knots <= hi)]
    mid = 0.5 * (knots[1:] + knots[:-1])
    dq = np.diff(knots)

    # 1. smooth drift, sampled once per quarter note, bounded to ±drift
    n_qn = int(np.ceil(hi)) + 1
    noise = gaussian_filter1d(rng.standard_normal(n_qn), DRIFT_SIGMA_QN, mode="reflect")
    noise = noise - noise.mean()
    peak = np.max(np.abs(noise))
    noise = noise / peak if peak > 0 else noise
    tempo = 1.0 + drift * np.interp(mid, np.arange(n_qn, dtype=np.float64), noise)

    # 2. phrase-final ritardando: linear fall of tempo to (1 - phrase_rit) at each end
    rit = np.ones_like(mid)
    for e, depth, sp in zip(ends, depths, span):
        w = (mid - (e - sp)) / sp
        inside = (w > 0) & (mid < e)
        rit[inside] = np.minimum(rit[inside], 1.0 - depth * phrase_rit * w[inside])

    # 3. fermata holds
    hold = np.ones_like(mid)
    for a, b in spans:
        hold[(mid > a) & (mid < b)] = fermata_factor

    # 5. rubato: a phrase arch between consecutive phrase ends
    arch = np.ones_like(mid)
    if rubato > 0:
        edges = np.r_[0.0, ends]
        for a, b in zip(edges[:-1], edges[1:]):
            r = rubato * rng_x.uniform(0.5, 1.5)
            inside = (mid >= a) & (mid < b)
            w = (mid[inside] - a) / max(b - a, 1e-9)
            arch[inside] = 1.0 + r * (np.sin(np.pi * w) - 2.0 / np.pi)

    nominal_spq = np.diff(tm(knots)) / dq
    spq = nominal_spq / (tempo * rit * arch * tempo_factor) * hold
    # 6. agogic accents: extra seconds spread over the last AGOGIC_QN before chosen downbeats
    if agogic_s > 0 and bar_qn.size > 1:
        chosen = bar_qn[1:][rng_x.random(bar_qn.size - 1) < AGOGIC_SHARE]
        for q_db in chosen:
            inside = (mid > q_db - AGOGIC_QN) & (mid < q_db)
            if inside.any():
                spq[inside] += agogic_s * rng_x.uniform(0.5, 1.0) / AGOGIC_QN
    t = start_s + np.concatenate([[0.0], np.cumsum(spq * dq)])
    timemap = TimeMap(knots, t, src="score_qn", dst="recording",
                      meta={"drift": drift, "seed": seed})

    # per-note deviations: jitter + chord spread, limited by the gap to neighbouring positions
    jit = np.clip(rng.standard_normal(q_on.size), -2.5, 2.5) * jitter_s
    spread = rng.uniform(0.0, chord_spread_s, q_on.size)
    pos_idx = np.searchsorted(onset_pos, q_on)
    # the highest note of each position leads (rows are sorted by score_qn, then pitch)
    top = np.r_[pos_idx[1:] != pos_idx[:-1], True] if q_on.size else np.zeros(0, dtype=bool)
    dev = jit + np.where(top, 0.0, spread)
    if melody_lead_s > 0 and q_on.size:
        lead = melody_lead_s * rng_x.uniform(0.8, 1.2, q_on.size)
        parts = notes["part"].astype(str).to_numpy()
        if np.unique(parts).size > 1:
            means = notes.groupby(notes["part"].astype(str))["pitch"].mean()
            melody = parts == str(means.idxmax())
        else:
            melody = top
        dev = dev + np.where(melody, -0.5, 0.5) * lead
    pos_t = np.atleast_1d(timemap(onset_pos))
    gap_prev = np.diff(np.r_[0.0, pos_t])
    gap_next = np.r_[np.diff(pos_t), np.inf]
    dev = np.clip(dev, -0.4 * gap_prev[pos_idx], 0.4 * gap_next[pos_idx])
    onset_s = np.maximum(np.atleast_1d(timemap(q_on)) + dev, 0.0)
    offset_s = np.maximum(np.atleast_1d(timemap(q_off)) + 0.5 * jit, onset_s + _MIN_NOTE_S)

    out = notes.copy()
    out["onset_s"] = onset_s
    out["offset_s"] = offset_s
    for c in PERFORMANCE_NOTE_COLUMNS:
        if c not in out.columns:
            out[c] = np.nan
    out = out[PERFORMANCE_NOTE_COLUMNS + [c for c in out.columns if c not in PERFORMANCE_NOTE_COLUMNS]]
    out = out.sort_values(["onset_s", "pitch"], kind="stable").reset_index(drop=True)

    grid = score.beat_grid()
    beats = grid[["score_qn", "measure", "pass", "beat"]].copy()
    beats["recording"] = timemap(beats["score_qn"].to_numpy(dtype=np.float64))

    last = max(float(t[-1]), float(offset_s.max()) if offset_s.size else 0.0)
    settings = {
        "seed": int(seed), "drift": float(drift), "phrase_rit": float(phrase_rit),
        "fermata_factor": float(fermata_factor), "jitter_s": float(jitter_s),
        "chord_spread_s": float(chord_spread_s), "start_s": float(start_s),
        "drift_sigma_qn": DRIFT_SIGMA_QN, "rit_span_qn": RIT_SPAN_QN, "phrase_bars": PHRASE_BARS,
        "phrase_ends_qn": [round(float(e), 6) for e in ends],
        "phrase_rit_depths": [float(d) for d in depths], "inner_rit": INNER_RIT,
        "fermata_spans_qn": [[round(a, 6), round(b, 6)] for a, b in spans],
        "tempo_factor": float(tempo_factor), "rubato": float(rubato), "agogic_s": float(agogic_s),
        "final_rit_qn": float(final_rit_qn), "melody_lead_s": float(melody_lead_s),
    }
    return Performance(notes=out, timemap=timemap, beats=beats, duration_s=last + TAIL_S,
                       settings=settings)
