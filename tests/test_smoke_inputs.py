"""Inputs a researcher gives that the other tests do not cover: anchors on beats a bar does not
have, bar-only anchors on a pickup bar, a recording too short for its first piece.

The scores are music21 corpus files used in place (``music21.corpus.getWork``); the facts about
them (meter, pickup beat) come from music21's own analysis of the same file. Recordings are tiny
WAV files written here.
"""

from pathlib import Path

import music21
import numpy as np
import pytest
import soundfile as sf

from stimkit.align.run import parse_anchor
from stimkit.cli import main
from stimkit.errors import InputError
from stimkit.score.parse import load_score

CHORALE = music21.corpus.getWork("bach/bwv66.6")


@pytest.fixture(scope="module")
def chorale():
    return load_score(CHORALE)


@pytest.fixture(scope="module")
def chorale_m21():
    return music21.corpus.parse(CHORALE)


def test_anchor_beat_outside_the_bar_is_refused(chorale, chorale_m21):
    # music21's own analysis: bar 1 of this chorale is in 4/4, so it has beats 1 to below 5
    ts = chorale_m21.recurse().getElementsByClass("TimeSignature").first()
    assert ts.ratioString == "4/4"
    assert parse_anchor("1.4.5=2.3", chorale)[:2] == (1, 4.5)   # inside the bar: accepted
    for text in ("1.9=3", "1.5=2", "1.0=0.5"):
        with pytest.raises(InputError, match="give a beat inside the bar"):
            parse_anchor(text, chorale)


def test_anchor_without_beat_is_the_first_beat_of_a_pickup_bar(chorale, chorale_m21):
    # music21's own analysis: the chorale opens with a one-quarter pickup, printed as bar 0, whose
    # only note falls on beat 4 of the 4/4 bar
    first_bar = chorale_m21.parts[0].getElementsByClass("Measure").first()
    assert first_bar.number == 0
    pickup_beat = float(first_bar.notes.first().beat)
    assert parse_anchor("0=0.02", chorale)[1] == pickup_beat
    with pytest.raises(InputError, match="has beats"):
        parse_anchor("0.1=0.02", chorale)   # beat 1 lies before the pickup


def test_anchor_beat_error_through_the_cli_is_one_line(tmp_path, capsys):
    wav = tmp_path / "a.wav"
    sf.write(wav, np.zeros(22050, dtype=np.float32), 22050)
    code = main(["align", str(CHORALE), str(wav), "--anchor", "1.9=3", "-o", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip()
    assert code == 2                                     # DESIGN.md: exit 2 for bad input
    assert "\n" not in err and "internal error" not in err and "bwv66.6" in err
    assert not (tmp_path / "out").exists()               # a refused run writes nothing


def test_first_piece_longer_than_the_recording(tmp_path, capsys):
    # a 1 s recording cannot hold a chorale lasting about half a minute at its notated tempo:
    # the message names the recording and does not speak of a previous piece (there is none)
    wav = tmp_path / "tiny take.wav"
    rng = np.random.default_rng(0)
    sf.write(wav, 0.1 * rng.standard_normal(22050).astype(np.float32), 22050)
    out = tmp_path / "out"
    code = main(["annotate", "--score", str(CHORALE), "--audio", str(wav), "-o", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == 1                                     # DESIGN.md: exit 1 when the work fails
    assert "\n" not in err and "tiny take.wav" in err and "previous piece" not in err
    assert not out.exists() or not any(out.iterdir())   # a failed run leaves no file


def test_performance_that_starts_at_the_first_sample(tmp_path):
    # A recording cut right at the first note (no silence before it): the first positions must
    # not be swallowed by the score template's silent lead-in (before the fix the opening bar
    # came out 0.5-1.2 s late). Ground truth: the renderer's own note times. Tolerance 0.1 s,
    # well above the 9 ms median error measured on the bundled demo (docs/session-and-outputs.md)
    from stimkit.align.run import align_files
    from stimkit.render import render_score

    path = music21.corpus.getWork("mozart/k545/movement1_exposition.mxl")
    y, perf = render_score(load_score(path), seed=3, start_s=0.0)
    wav = tmp_path / "from-the-first-note.wav"
    sf.write(wav, y, 22050)
    res = align_files(path, wav)
    truth = perf.positions().set_index("score_qn")["onset_s"]
    got = res.notes.set_index("score_qn")["recording"]
    first_bar = truth.index[truth.index < 4.0]            # the opening 4/4 bar
    err = (got.loc[first_bar] - truth.loc[first_bar]).abs()
    assert float(truth.iloc[0]) < 0.01                    # the music starts at the first sample
    assert float(err.max()) < 0.1


def test_midi_score_of_a_performance_that_starts_at_the_first_sample(tmp_path, chorale, chorale_m21):
    # The same with a MIDI score (music21's own MIDI export of the chorale) and a rendering of
    # the MusicXML: MIDI has no pickup bar, so the check is on score_qn (same notes, same order).
    # A first attempt that dropped the lead-in instead placed the first chord 0.49 s late here.
    from stimkit.align.run import align_files
    from stimkit.render import render_score

    midi = tmp_path / "chorale.mid"
    chorale_m21.write("midi", fp=str(midi))
    y, perf = render_score(chorale, seed=1, start_s=0.0)
    wav = tmp_path / "chorale.wav"
    sf.write(wav, y, 22050)
    res = align_files(midi, wav)
    truth = perf.positions().set_index("score_qn")["onset_s"]
    got = res.notes.set_index("score_qn")["recording"]
    opening = truth.index[truth.index < 5.0]             # the pickup and the first full bar
    err = (got.loc[opening] - truth.loc[opening]).abs()
    assert float(err.max()) < 0.1                        # tolerance as in the test above


def test_same_piece_played_twice_is_found_twice(tmp_path, chorale):
    # A programme that plays one piece twice (a common repeated-stimulus design): the first
    # search must not take the second performance, which left no room for the repeat ("cannot
    # fit ... after the previous piece"). Ground truth: the renderer's note times.
    from stimkit.render import render_score
    from stimkit.timeline.segment import find_pieces

    sr = 22050
    first, p1 = render_score(chorale, seed=1, start_s=2.0)
    second, p2 = render_score(chorale, seed=2, start_s=0.0)
    gap = np.zeros(5 * sr, dtype=np.float32)
    y = np.concatenate([first, gap, second]).astype(np.float32)
    wav = tmp_path / "twice.wav"
    sf.write(wav, y, sr)
    offset = (len(first) + len(gap)) / sr
    spans = find_pieces([chorale, chorale], ["first", "again"], wav, duration_s=len(y) / sr)
    # the matcher is good to about half a second (stimkit.timeline.segment docstring)
    assert abs(spans[0].start_s - float(p1.notes["onset_s"].min())) < 0.5
    assert abs(spans[1].start_s - (offset + float(p2.notes["onset_s"].min()))) < 0.5


def test_score_without_notes_is_refused_for_align_too(tmp_path):
    # a score of rests only (written with music21): one line naming the file, for every verb
    s = music21.stream.Score()
    part = music21.stream.Part()
    bar = music21.stream.Measure(number=1)
    bar.append(music21.note.Rest(quarterLength=4))
    part.append(bar)
    s.append(part)
    path = tmp_path / "rests only.musicxml"
    s.write("musicxml", fp=str(path))
    with pytest.raises(InputError, match="nothing to plan or align") as info:
        load_score(path)
    assert "rests only.musicxml" in str(info.value) and "\n" not in str(info.value)


# --- hostile files and a careless output folder (the brief: bad input is one line naming the
# --- file, exit 2, nothing written; inputs are never overwritten) ---------------------------

def _tiny_wav(path, seconds=1.0):
    sf.write(path, 0.1 * np.random.default_rng(0).standard_normal(int(22050 * seconds)).astype(np.float32), 22050)
    return path


def test_output_folder_holding_an_input_under_an_output_name_is_refused(tmp_path, capsys):
    # the recorder's log was saved in the output folder under the events file's BIDS name: the
    # run must refuse before any work, and the log must keep its bytes
    _tiny_wav(tmp_path / "take.wav")
    beh = tmp_path / "out" / "sub-01" / "ses-1" / "beh"
    beh.mkdir(parents=True)
    log = beh / "sub-01_ses-1_task-music_run-1_events.tsv"
    log.write_text("onset\n1.0\n", "utf-8")
    sess = tmp_path / "s.toml"
    sess.write_text(f'recording = "take.wav"\noutput = "out"\n[bids]\nsubject = "01"\nsession = "1"\n'
                    f'task = "music"\nrun = 1\n[sync]\nfrequency_hz = 1000\nduration_s = 0.05\n'
                    f'recorder_file = "{log.relative_to(tmp_path)}"\n[[piece]]\nscore = "{CHORALE}"\n')
    assert main(["annotate", str(sess)]) == 2
    err = capsys.readouterr().err.strip()
    assert "would overwrite" in err and "\n" not in err
    assert log.read_text("utf-8") == "onset\n1.0\n"
    assert sorted(p.name for p in beh.iterdir()) == [log.name]


@pytest.mark.parametrize("argv", [["features"], ["features", "x.wav", "--rate", "fast"], ["nosuchverb"],
                                  ["annotate", "--bogus"]])
def test_usage_errors_are_one_line(argv, capsys):
    assert main(argv) == 2                                # DESIGN.md: exit 2 for bad usage
    err = capsys.readouterr().err.strip()
    assert err.startswith("stimkit: usage error:") and "\n" not in err and "--help" in err


def test_garbage_mp3_is_one_line_about_the_file_and_leaves_no_folder(tmp_path, capfd):
    bad = tmp_path / "concert.mp3"
    bad.write_bytes(bytes(np.random.default_rng(1).integers(0, 256, 20000, dtype=np.uint8)))
    out = tmp_path / "out"
    assert main(["annotate", "--score", str(CHORALE), "--audio", str(bad), "-o", str(out)]) == 2
    err = capfd.readouterr().err.strip()                 # fd level: a C decoder's notes too
    assert "concert.mp3" in err and "\n" not in err and "Note:" not in err
    assert not out.exists()                              # inputs are checked before the folder
    assert main(["features", str(bad), "-o", str(out)]) == 2
    assert not out.exists()


def test_sync_file_of_random_bytes_is_refused_before_the_work(tmp_path, capsys):
    _tiny_wav(tmp_path / "take.wav")
    (tmp_path / "sync.tsv").write_bytes(bytes(np.random.default_rng(2).integers(0, 256, 3000, dtype=np.uint8)))
    sess = tmp_path / "s.toml"
    sess.write_text(f'recording = "take.wav"\noutput = "out"\n[sync]\nfrequency_hz = 1000\n'
                    f'duration_s = 0.05\nrecorder_file = "sync.tsv"\n[[piece]]\nscore = "{CHORALE}"\n')
    assert main(["annotate", str(sess)]) == 2
    err = capsys.readouterr().err.strip()
    assert "sync.tsv" in err and "UTF-8" in err and "\n" not in err
    assert not (tmp_path / "out").exists()


def test_features_checks_the_output_folder_before_the_work(tmp_path, capsys):
    wav = _tiny_wav(tmp_path / "a.wav")
    (tmp_path / "taken").write_text("a file, not a folder")
    assert main(["features", str(wav), "-o", str(tmp_path / "taken" / "out")]) == 2
    err = capsys.readouterr().err.strip()
    assert "not a folder" in err and "\n" not in err


def test_absurd_offset_in_a_session_file_names_its_line(tmp_path, capsys):
    _tiny_wav(tmp_path / "take.wav")
    sess = tmp_path / "s.toml"
    sess.write_text(f'recording = "take.wav"\n[sync]\noffset_s = 1e300\n[[piece]]\nscore = "{CHORALE}"\n')
    assert main(["annotate", str(sess)]) == 2
    assert "line 3:" in capsys.readouterr().err


def test_absurd_physiology_offsets_are_refused_in_one_line(tmp_path, capsys):
    # the clock limit (stimkit.timeline.clock.MAX_OFFSET_S) holds for a physiological file's
    # stated shift too: 1e300 s was accepted and came back as a 300-digit coverage complaint
    _tiny_wav(tmp_path / "take.wav")
    (tmp_path / "beats.tsv").write_text("time\trr\n1.0\t800\n", "utf-8")
    sess = tmp_path / "s.toml"
    sess.write_text(f'recording = "take.wav"\n[[piece]]\nscore = "{CHORALE}"\n[[physio]]\n'
                    f'file = "beats.tsv"\noffset_s = 1e300\n')
    assert main(["annotate", str(sess)]) == 2
    err = capsys.readouterr().err
    assert "line 6:" in err and "offset_s" in err and len(err) < 400
    assert main(["relate", str(tmp_path / "e_events.tsv"), str(tmp_path / "beats.tsv"),
                 "--offset-s", "1e300", "-o", str(tmp_path / "rel")]) == 2
    err = capsys.readouterr().err.strip()
    assert "--offset-s" in err and "\n" not in err and not (tmp_path / "rel").exists()


@pytest.mark.parametrize("case", ["long name", "folder in the way"])
def test_outputs_that_cannot_be_written_are_refused_before_the_work(tmp_path, capsys, monkeypatch, case):
    # a recording name that makes "<name>_events.tsv" longer than the 255 bytes a name may have
    # (POSIX NAME_MAX on common file systems), or a folder named like an output: both were found
    # only when writing, after the whole analysis
    import stimkit.timeline.run as chain

    def no_work(*a, **k):
        raise AssertionError("the analysis ran")

    monkeypatch.setattr(chain, "analyse_recording", no_work)
    name = ("y" * 245 if case == "long name" else "take") + ".wav"
    _tiny_wav(tmp_path / name)
    out = tmp_path / "out"
    if case == "folder in the way":
        (out / "take_beats.json").mkdir(parents=True)
    code = main(["annotate", "--score", str(CHORALE), "--audio", str(tmp_path / name), "-o", str(out)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "\n" not in err                 # DESIGN.md: exit 2, one line
    assert ("too long" in err) if case == "long name" else ("take_beats.json: a folder is in the way" in err)
    assert not out.exists() or [p.name for p in out.iterdir()] == ["take_beats.json"]


def test_features_refuses_an_output_linked_to_its_recording_before_the_work(tmp_path, capsys, monkeypatch):
    # inputs are never overwritten; the refusal came after the whole feature computation
    import stimkit.audio.pipeline as pipeline

    def no_work(*a, **k):
        raise AssertionError("the features were computed")

    monkeypatch.setattr(pipeline, "compute_features", no_work)
    wav = _tiny_wav(tmp_path / "take.wav")
    out = tmp_path / "out"
    out.mkdir()
    (out / "take_stim.tsv.gz").symlink_to(wav)
    assert main(["features", str(wav), "-o", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert "take_stim.tsv.gz" in err and "recording" in err and "\n" not in err
    assert wav.read_bytes()[:4] == b"RIFF" and sorted(p.name for p in out.iterdir()) == ["take_stim.tsv.gz"]


def test_score_far_longer_than_the_recording_is_refused_before_the_fit(tmp_path, capsys, monkeypatch):
    # one note of 90,000 quarter notes (under the 100,000 limit of stimkit.score.limits): against a
    # 1 s recording the fit built its templates for 54,000 s (1.9 GB, 90 s) before calling it another
    # piece; the structure fit tries 0.33-3 times the notated tempo (stimkit.align.structure)
    import sys as _sys

    import stimkit.align.run as align_run

    _sys.path.insert(0, str(Path(__file__).parent / "score"))
    from xmlfix import attributes, measure, score, write

    def no_fit(*a, **k):
        raise AssertionError("the structure fit ran")

    monkeypatch.setattr(align_run, "fit_structure", no_fit)
    body = attributes(beats=4, beat_type=4, fifths=0) + \
        "<note><pitch><step>C</step><octave>4</octave></pitch><duration>360000</duration></note>"
    p = write(tmp_path, "long note.musicxml", score([("P", [measure(1, body)])]))
    wav = _tiny_wav(tmp_path / "take.wav")
    out = tmp_path / "out"
    assert main(["align", str(p), str(wav), "-o", str(out)]) == 1   # DESIGN.md: exit 1, work refused
    err = capsys.readouterr().err.strip()
    assert "take.wav" in err and "less than a tenth" in err and "\n" not in err
    assert not out.exists()
