"""The material of the realistic alignment evaluation: cases per condition.

Every score is a music21 corpus work used in place (``music21.corpus.getWork``), never copied.
Development material: the cases below with ``held_out=False`` rendered by the project's renderer
or by fluidsynth with the TimGM6mb soundfont. **Held out** (measure on it, never tune on it): the
cases with ``held_out=True`` (other pieces, other seeds) and every fluidsynth rendering with the
FluidR3_GM soundfont (``bench/sampled.py``).

``QUICK`` marks the cases of ``bench_align.py --quick`` (short excerpts, one or two per condition).
"""

from __future__ import annotations

from stimkit.render.cases import Case

EXPR = {"rubato": 0.15, "agogic_s": 0.08, "melody_lead_s": 0.03, "final_rit_qn": 8.0}
HALL = {"hall_rt60_s": 2.2, "hall_wet": 0.55, "audience": True, "applause": True}
WINDS4 = {"Soprano": "flute", "Alto": "clarinet", "Tenor": "horn", "Bass": "horn"}
WINDS_Q = {"*": "clarinet"}

# (case, quick)
_CASES: list[tuple[Case, bool]] = [
    # piano, dry room
    (Case("piano dry", "k545", "mozart/k545/movement1_exposition.mxl", 101, bars=24, perform=EXPR), True),
    (Case("piano dry", "h186", "cpebach/h186.mxl", 102, bars=20, perform=EXPR), False),
    (Case("piano dry", "polonaise1", "schumann_clara/polonaise_op1n1.mxl", 103, bars=24, perform=EXPR), False),
    (Case("piano dry", "maple-leaf", "joplin/maple_leaf_rag.mxl", 104, perform=EXPR), False),
    (Case("piano dry", "polonaise3", "schumann_clara/polonaise_op1n3.mxl", 901, bars=24, perform=EXPR,
          held_out=True), False),
    # piano in a hall with an audience
    (Case("piano hall+audience", "k545", "mozart/k545/movement1_exposition.mxl", 111, bars=24, perform=EXPR,
          **HALL), True),
    (Case("piano hall+audience", "polonaise2", "schumann_clara/polonaise_op1n2.mxl", 112, bars=24,
          perform=EXPR, **HALL, mains_hz=60.0), False),
    (Case("piano hall+audience", "h186", "cpebach/h186.mxl", 113, bars=28, perform=EXPR,
          **{**HALL, "hall_rt60_s": 2.5}), False),
    (Case("piano hall+audience", "polonaise4", "schumann_clara/polonaise_op1n4.mxl", 911, bars=24,
          perform=EXPR, **HALL, held_out=True), False),
    # string quartets (bowed: attacks 100-300 ms)
    (Case("strings", "k458-3", "mozart/k458/movement3.mxl", 121, bars=16, perform=EXPR), True),
    (Case("strings", "op74-2", "haydn/opus74no1/movement2.mxl", 122, bars=24, perform=EXPR), False),
    (Case("strings", "k80-2", "mozart/k80/movement2.mxl", 123, bars=20, perform=EXPR), False),
    (Case("strings", "op18-1-2", "beethoven/opus18no1/movement2.mxl", 124, perform=EXPR), False),
    (Case("strings", "op59-1-3", "beethoven/opus59no1/movement3.mxl", 921, bars=24, perform=EXPR,
          held_out=True), False),
    # voice (+ piano)
    (Case("voice+piano", "lindenbaum", "schubert/Lindenbaum.xml", 131, bars=24, perform=EXPR), True),
    (Case("voice+piano", "lascia", "handel/rinaldo/Lascia_chio_pianga.mxl", 132, bars=24, perform=EXPR), False),
    (Case("voice+piano", "bwv66.6-choir", "bach/bwv66.6", 133, perform=EXPR), False),
    (Case("voice+piano", "lindenbaum-hall", "schubert/Lindenbaum.xml", 134, perform=EXPR, **HALL), False),
    (Case("voice+piano", "bwv40.8-choir", "bach/bwv40.8", 931, perform=EXPR, held_out=True), False),
    # winds
    (Case("winds", "bwv10.7-winds", "bach/bwv10.7", 141, perform=EXPR, timbres=WINDS4), True),
    (Case("winds", "op1-1-3-winds", "haydn/opus1no1/movement3.mxl", 142, bars=20, perform=EXPR,
          timbres=WINDS_Q), False),
    (Case("winds", "k458-3-winds", "mozart/k458/movement3.mxl", 143, bars=20, first_bar=16, perform=EXPR,
          timbres={"1st Violin": "flute", "2nd Violin": "clarinet", "Viola": "clarinet", "Cello": "horn"}), False),
    (Case("winds", "bwv102.7-winds", "bach/bwv102.7", 941, perform=EXPR, timbres=WINDS4, held_out=True), False),
    # organ
    (Case("organ", "bwv66.6-organ", "bach/bwv66.6", 151, perform=EXPR, timbres={"*": "organ"}), True),
    (Case("organ", "prayer-organ", "beach/prayer_of_a_tired_child.musicxml", 152, perform=EXPR,
          timbres={"*": "organ"}, hall_rt60_s=2.5, hall_wet=0.6), False),
    (Case("organ", "bwv10.7-organ", "bach/bwv10.7", 153, perform=EXPR, timbres={"*": "organ"}), False),
    # repeats taken (plain repeats; voltas and D.C. need the loader's repeats option)
    (Case("repeats taken", "la-donna", "verdi/laDonnaEMobile.mxl", 161, perform=EXPR), True),
    (Case("repeats taken", "k155-2", "mozart/k155/movement2.mxl", 162, perform=EXPR), False),
    (Case("repeats taken", "op74-3", "haydn/opus74no1/movement3.mxl", 163, perform=EXPR), False),
    (Case("repeats taken", "polonaise4", "schumann_clara/polonaise_op1n4.mxl", 164, perform=EXPR), False),
    # repeats skipped
    (Case("repeats skipped", "la-donna", "verdi/laDonnaEMobile.mxl", 171, perform=EXPR, repeats="none"), True),
    (Case("repeats skipped", "k155-2", "mozart/k155/movement2.mxl", 172, perform=EXPR, repeats="none"), False),
    (Case("repeats skipped", "op18-1-3", "beethoven/opus18no1/movement3.mxl", 173, perform=EXPR,
          repeats="none"), False),
    (Case("repeats skipped", "op74-3", "haydn/opus74no1/movement3.mxl", 174, perform=EXPR, repeats="none"), False),
    (Case("repeats skipped", "polonaise4", "schumann_clara/polonaise_op1n4.mxl", 175, perform=EXPR,
          repeats="none"), False),
    (Case("repeats skipped", "k156-3", "mozart/k156/movement3.mxl", 971, perform=EXPR, repeats="none",
          held_out=True), False),
    # tempo far from the marks
    (Case("tempo 0.4x", "k545", "mozart/k545/movement1_exposition.mxl", 181, bars=8,
          perform={**EXPR, "tempo_factor": 0.4}), True),
    (Case("tempo 0.4x", "k458-3", "mozart/k458/movement3.mxl", 182, bars=8,
          perform={**EXPR, "tempo_factor": 0.4}), False),
    (Case("tempo 2.5x", "k545", "mozart/k545/movement1_exposition.mxl", 183, bars=40,
          perform={**EXPR, "tempo_factor": 2.5}), True),
    (Case("tempo 2.5x", "op74-2", "haydn/opus74no1/movement2.mxl", 184, bars=40,
          perform={**EXPR, "tempo_factor": 2.5}), False),
    # no metronome mark (q = 100 assumed), played at half or double that
    (Case("no mark 0.5x", "op74-2", "haydn/opus74no1/movement2.mxl", 191, bars=12,
          perform={**EXPR, "tempo_factor": 0.5}), True),
    (Case("no mark 0.5x", "k545-nomark", "mozart/k545/movement1_exposition.mxl", 192, bars=12,
          perform={**EXPR, "tempo_factor": 0.5}, variant="no_tempo"), False),
    (Case("no mark 2x", "lindenbaum", "schubert/Lindenbaum.xml", 193, bars=40,
          perform={**EXPR, "tempo_factor": 2.0}), True),
    (Case("no mark 2x", "k458-3", "mozart/k458/movement3.mxl", 194, bars=32,
          perform={**EXPR, "tempo_factor": 2.0}), False),
    # transposing parts (the aligner gets written pitch + <transpose>)
    (Case("transposing part", "bwv66.6-clarinet", "bach/bwv66.6", 201, perform=EXPR,
          timbres={"Soprano": "clarinet", "*": "organ"}, variant="clarinet_bb:0"), True),
    (Case("transposing part", "k458-3-clarinet", "mozart/k458/movement3.mxl", 202, bars=16, perform=EXPR,
          timbres={"1st Violin": "clarinet"}, variant="clarinet_bb:0"), False),
    (Case("transposing part", "op74-2-horn", "haydn/opus74no1/movement2.mxl", 203, bars=16, perform=EXPR,
          timbres={"Viola": "horn"}, variant="horn_f:2"), False),
    (Case("transposing part", "weber-concertino", "weber/concertino_clarinet.mxl", 204, bars=30,
          perform=EXPR, variant="concert"), False),
    # parts out of step (an under-full bar in one part, an over-full one in another)
    (Case("parts out of step", "bwv66.6", "bach/bwv66.6", 211, perform=EXPR, timbres={"*": "organ"},
          variant="out_of_step"), True),
    (Case("parts out of step", "k458-3", "mozart/k458/movement3.mxl", 212, bars=20, perform=EXPR,
          variant="out_of_step"), False),
    (Case("parts out of step", "lindenbaum", "schubert/Lindenbaum.xml", 213, bars=24, perform=EXPR,
          variant="out_of_step"), False),
    # a score file as optical music recognition leaves it (parts unnamed, no tempo marks, misread
    # pitches, accidentals, rests and ties, a missed key signature, a passage in a wrong clef)
    (Case("score from OMR", "k458-3-omr", "mozart/k458/movement3.mxl", 221, bars=16, perform=EXPR,
          variant="misread:1"), True),
    (Case("score from OMR", "k545-omr", "mozart/k545/movement1_exposition.mxl", 222, bars=16, perform=EXPR,
          variant="misread:2"), False),
    (Case("score from OMR", "lindenbaum-omr", "schubert/Lindenbaum.xml", 223, bars=20, perform=EXPR,
          variant="misread:3"), False),
    (Case("score from OMR", "bwv10.7-winds-omr", "bach/bwv10.7", 224, perform=EXPR, timbres=WINDS4,
          variant="misread:4"), False),
    (Case("score from OMR", "polonaise3-omr", "schumann_clara/polonaise_op1n3.mxl", 981, bars=20,
          perform=EXPR, variant="misread:5", held_out=True), False),
]

CONDITIONS = list(dict.fromkeys(c.condition for c, _ in _CASES))


def cases(*, quick: bool = False, held_out: bool | None = None, only=None) -> list[Case]:
    """The cases (``quick``: only those marked quick; ``held_out``: only (not) held out)."""
    out = []
    for c, q in _CASES:
        if quick and not q:
            continue
        if held_out is not None and c.held_out != held_out:
            continue
        if only and c.condition not in only:
            continue
        out.append(c)
    return out
