"""The shared vocabulary of the event table: column order and ``trial_type`` levels.

Every producer of events (score markings, silence detection, feature change points, sync marks)
uses these names, and the BIDS sidecar writer documents them from here, so the two cannot drift.
Column order follows BIDS (``onset``, ``duration`` first); see DESIGN.md.
"""

from __future__ import annotations

__all__ = ["EVENT_COLUMNS", "TRIAL_TYPES", "COLUMN_INFO", "HED_TAGS"]

EVENT_COLUMNS = [
    "onset", "duration", "trial_type", "piece", "label", "dynamic_level", "measure", "pass", "beat",
    "score_qn", "nominal", "recording", "confidence", "source", "part",
]

#: ``trial_type`` level -> one-line description (the events sidecar's ``Levels``).
TRIAL_TYPES: dict[str, str] = {
    "piece": "A whole piece: onset at its first sounding note, duration to the end of its last note.",
    "dynamic": "A notated dynamic level (pppp..ffff); its number on a 1-10 scale is in the dynamic_level column.",
    "hairpin": "A crescendo or diminuendo wedge; duration spans the wedge.",
    "accent": "A sudden accent marking (sf, sfz, fp, fz, rfz, ...).",
    "tempo": "A tempo mark: metronome mark or tempo word, with its nominal BPM.",
    "tempo_change": "A gradual or relative tempo change (rit., rall., accel., a tempo, Tempo I, piu/meno mosso).",
    "fermata": "A fermata on a note or rest; duration is the held time.",
    "key": "A key signature (and mode when known) taking effect.",
    "meter": "A time signature taking effect.",
    "section": "A section boundary: rehearsal mark, double bar, final bar, repeat start or end.",
    "pause": "A general pause: all parts silent for at least a bar, or a silence under a fermata.",
    "repeat": ("A repeat of the score (repeat sign, first and second endings, D.C., D.S.) as performed: "
               "label 'taken' with the duration of the repeated pass, or 'skipped' (duration 0, at "
               "the place it was left out); decided from the recording unless the session sets it."),
    "silence": "A stretch of the recording below the silence threshold for the minimum length.",
    "feature_change": "A change point found in the continuous audio features.",
    "sync": "A sync mark (click or tone burst) detected in the recording.",
}

#: Column -> (LongName, Description, Units or None) for the events sidecar.
COLUMN_INFO: dict[str, tuple[str, str, str | None]] = {
    "onset": ("Event onset", "Time of the event on the physiological recorder's clock "
              "(equals recording time when no sync was given).", "s"),
    "duration": ("Event duration", "Length of the event; 0 for point events.", "s"),
    "trial_type": ("Event kind", "What kind of boundary or event this row is.", None),
    "piece": ("Piece", "Name of the piece the event belongs to (n/a for session-level events).", None),
    "label": ("Label", "What the marking says or what changes, as a short text; where rows of one "
              "kind at the same moment are merged, their labels are joined with ' + ', each "
              "followed by its part in brackets when the parts differ.", None),
    "dynamic_level": ("Dynamic level", "The notated dynamic as a number on an ordinal scale of this "
                      "tool: pppp = 1, ppp = 2, pp = 3, p = 4, mp = 5, mf = 6, f = 7, ff = 8, "
                      "fff = 9, ffff = 10; for an accent (sf, sfz, fp, ...) the level it asks for "
                      "at its note. It ranks the marks and is not a measured loudness. n/a for "
                      "other rows, and where parts at the same moment are marked at different "
                      "levels (the label then lists each).", None),
    "measure": ("Measure", "Bar number as printed in the score (a pickup may be 0).", None),
    "pass": ("Pass", "Which playing of the bar this is: 1 the first time, 2 on its first repeat, "
             "and so on; n/a for session-level rows.", None),
    "beat": ("Beat", "Beat within the bar, counted from 1 in the bar's beat unit; n/a for a "
             "marking at the end of a bar (a double or final bar line, a repeat end), whose "
             "time is the end of the bar.", None),
    "score_qn": ("Score position", "Quarter notes from the start of the piece as performed "
                 "(repeats expanded).", "quarter notes"),
    "nominal": ("Nominal time", "Seconds from the start of the piece at the notated tempo.", "s"),
    "recording": ("Recording time", "Seconds from the first sample of the recording file.", "s"),
    "confidence": ("Alignment confidence", "The probability, from 0 to 1, that the event is placed "
                   "within 100 ms of where it sounded, from a model of the alignment around it fitted "
                   "on rendered performances; under 0.5 the place is worth checking by ear. n/a where "
                   "no alignment is involved.", None),
    "source": ("Source", "Where the time comes from: alignment (score markings placed by the "
               "alignment), audio (silences and feature changes) or sync (sync marks).", None),
    "part": ("Part", "Score part(s) carrying the marking, or 'all'.", None),
}

#: ``trial_type`` -> HED tag string for stimulus rows (HED standard schema 8.x tags).
HED_TAGS: dict[str, str] = {
    "piece": "Sensory-event, Experimental-stimulus, Auditory-presentation, Musical-sound",
    "dynamic": "Sensory-event, Auditory-presentation, Musical-sound",
    "hairpin": "Sensory-event, Auditory-presentation, Musical-sound",
    "accent": "Sensory-event, Auditory-presentation, Musical-sound",
    "tempo": "Sensory-event, Auditory-presentation, Musical-sound",
    "tempo_change": "Sensory-event, Auditory-presentation, Musical-sound",
    "fermata": "Sensory-event, Auditory-presentation, Musical-sound",
    "key": "Sensory-event, Auditory-presentation, Musical-sound",
    "meter": "Sensory-event, Auditory-presentation, Musical-sound",
    "section": "Sensory-event, Auditory-presentation, Musical-sound",
    "pause": "Sensory-event, Auditory-presentation",
    "repeat": "Sensory-event, Auditory-presentation, Musical-sound",
    "silence": "Sensory-event, Auditory-presentation",
    "feature_change": "Sensory-event, Auditory-presentation",
    "sync": "Experiment-structure",
}
