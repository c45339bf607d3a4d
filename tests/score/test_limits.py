"""Small hostile files must not take the machine; absurd tempi and tempo conflicts are said plainly.

The hostile files are generated here and are small (a few kilobytes on disk). What they attack:
zip members that expand far beyond their size or lie about it (the "zip bomb" family, OWASP
file-upload guidance), element floods, an absurd ``<duration>`` (MusicXML 4.0), a Standard MIDI
File whose one note lasts 2**28 ticks (SMF 1.0: variable-length delta times of up to 4 bytes), a
bar number beyond any score. Limits are the project's (``stimkit.score.limits``); the CLI contract
is DESIGN.md's: bad input -> exit 2 with one line naming the file, nothing written.
"""

from __future__ import annotations

import struct
import sys
import zipfile
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from xmlfix import attributes, bars_of, direction, measure, metronome, note, score, write  # noqa: E402

from stimkit.cli import main  # noqa: E402
from stimkit.errors import InputError  # noqa: E402
from stimkit.score import limits  # noqa: E402
from stimkit.score.parse import load_score  # noqa: E402

A44 = attributes(beats=4, beat_type=4, fifths=0)


def refused_by_cli(path, tmp_path, capsys, words):
    out = tmp_path / "out"
    rc = main(["plan", str(path), "-o", str(out)])
    err = capsys.readouterr().err.strip()
    assert rc == 2                                        # DESIGN.md: exit 2 for bad input
    assert len(err.splitlines()) == 1 and path.name in err
    assert "internal error" not in err and words in err
    assert not out.exists() or not any(out.iterdir())     # nothing written


def _container(zf, member="score.musicxml"):
    zf.writestr("META-INF/container.xml", '<container><rootfiles><rootfile full-path="'
                + member + '"/></rootfiles></container>')


def test_mxl_expanding_to_an_element_flood_stops_at_the_tag_limit(tmp_path, capsys, monkeypatch):
    calls = []
    real = limits.read_bounded

    def spy(fh, **kw):
        data = real(fh, **kw)
        calls.append(len(data))
        return data

    p = tmp_path / "flood.mxl"
    with zipfile.ZipFile(p, "w", zipfile.ZIP_DEFLATED) as zf:
        _container(zf)
        with zf.open("score.musicxml", "w") as fh:       # 24 MB of '<a/>' (~25 KB compressed)
            fh.write(b"<score-partwise>")
            for _ in range(24):
                fh.write(b"<a/>" * 250_000)
            fh.write(b"</score-partwise>")
    assert p.stat().st_size < 200_000
    with pytest.raises(InputError, match="more than 5,000,000 XML tags") as info:
        load_score(p)
    assert "flood.mxl" in str(info.value)
    refused_by_cli(p, tmp_path, capsys, "XML tags")


def test_mxl_member_lying_about_its_size(tmp_path):
    # the central directory says 1000 bytes; the member really expands to 8 MB: the stream read
    # must not trust the declared size (zipfile's own check fails at once on the first chunk)
    p = tmp_path / "liar.mxl"
    with zipfile.ZipFile(p, "w", zipfile.ZIP_DEFLATED) as zf:
        _container(zf)
        zf.writestr("score.musicxml", b"<score-partwise>" + b"<a/>" * 2_000_000 + b"</score-partwise>")
    data = bytearray(p.read_bytes())
    for sig, off in ((b"PK\x01\x02", 24), (b"PK\x03\x04", 22)):   # uncompressed-size fields
        i = data.find(sig)
        i = data.find(sig, i + 4)                                  # the second member
        struct.pack_into("<I", data, i + off, 1000)
    p.write_bytes(bytes(data))
    with pytest.raises(InputError, match="not a readable compressed MusicXML"):
        load_score(p)


def test_too_many_notes_refused_before_music21(tmp_path, monkeypatch):
    monkeypatch.setattr(limits, "MAX_NOTES", 10)          # the check, not the size, is tested
    p = write(tmp_path, "many.musicxml", score([("P", bars_of(4, first_attrs=A44))]))
    with pytest.raises(InputError, match="16 notes, more than the 10"):
        load_score(p)


def test_one_note_of_a_million_quarter_notes(tmp_path, capsys):
    body = A44 + "<note><pitch><step>C</step><octave>4</octave></pitch><duration>4000000</duration></note>"
    p = write(tmp_path, "long note.musicxml", score([("P", [measure(1, body)])]))
    assert p.stat().st_size < 1000
    with pytest.raises(InputError, match="longer than any performance"):
        load_score(p)
    refused_by_cli(p, tmp_path, capsys, "longer than any performance")


def _midi(ticks: int) -> bytes:
    def vlq(n):
        out = [n & 0x7F]
        n >>= 7
        while n:
            out.append((n & 0x7F) | 0x80)
            n >>= 7
        return bytes(reversed(out))

    trk = b"\x00\x90\x3c\x40" + vlq(ticks) + b"\x80\x3c\x00" + b"\x00\xff\x2f\x00"
    return b"MThd" + struct.pack(">IHHH", 6, 0, 1, 480) + b"MTrk" + struct.pack(">I", len(trk)) + trk


def test_tiny_midi_with_one_note_of_two_to_the_28_ticks(tmp_path, capsys):
    p = tmp_path / "hang.mid"
    p.write_bytes(_midi(2 ** 28))
    assert p.stat().st_size < 44
    with pytest.raises(InputError, match="longer than any performance"):
        load_score(p)                                     # refused before music21 makes bars
    refused_by_cli(p, tmp_path, capsys, "longer than any performance")
    ok = tmp_path / "ok.mid"
    ok.write_bytes(_midi(480 * 4))                        # the same note, one whole note long
    assert load_score(ok).notes["duration_qn"].tolist() == [4.0]


def test_huge_bar_number(tmp_path, capsys):
    ms = [measure(1, A44 + note() * 4), '<measure number="99999999999999999999999">' + note() * 4 + "</measure>"]
    p = write(tmp_path, "numbers.musicxml", score([("P", ms)]))
    refused_by_cli(p, tmp_path, capsys, "renumber the bars")


def test_absurd_tempo_is_ignored_with_a_stated_rule(tmp_path):
    ms = bars_of(4, first_attrs=A44 + metronome("quarter", 60),
                 extra={3: direction("<metronome><beat-unit>quarter</beat-unit><per-minute>1000000000"
                                     "</per-minute></metronome>")})
    m = load_score(write(tmp_path, "fast.musicxml", score([("P", ms)])))
    # 16 quarters at 60: the absurd mark at bar 3 is ignored, so 16 s (hand computed)
    assert m.nominal_duration_s == pytest.approx(16.0)
    w = [x for x in m.warnings if "bar 3" in x and "outside" in x]
    assert len(w) == 1 and "10-1000 quarter notes per minute" in w[0] and "ignored" in w[0]


def test_printed_mark_and_playback_tempo_disagree(tmp_path):
    # "q = 60" printed where the file plays 72 (<sound tempo="72"/> in the same direction)
    mark = direction("<metronome><beat-unit>quarter</beat-unit><per-minute>60</per-minute></metronome>",
                     sound='<sound tempo="72"/>')
    m = load_score(write(tmp_path, "conflict.musicxml", score([("P", bars_of(2, first_attrs=A44 + mark))])))
    assert m.nominal_duration_s == pytest.approx(8.0)     # 8 quarters at the printed 60
    w = [x for x in m.warnings if x.startswith("bar 1:")]
    assert len(w) == 1
    assert "quarter = 60 printed" in w[0] and "quarter = 72 played by the file" in w[0]
    assert "quarter = 60 is used" in w[0] and "performers read" in w[0]


def test_unreadable_bar_is_named_in_plain_words(tmp_path, capsys):
    # a pitch step outside A-G (MusicXML 4.0 <step>): music21 cannot import it; the one-line error
    # names the bar and the part instead of the library's exception text
    bad = "<note><pitch><step>Q</step><octave>4</octave></pitch><duration>16</duration></note>"
    p = write(tmp_path, "bad step.musicxml", score([("Violin II", [measure(1, A44 + note() * 4),
                                                                    measure(2, bad)])]))
    with pytest.raises(InputError, match="could not be read at bar 2 of Violin II"):
        load_score(p)
    refused_by_cli(p, tmp_path, capsys, "at bar 2 of Violin II")


def test_flood_of_empty_bars_refused_before_music21(tmp_path):
    # 300,000 empty <measure/> elements: 8 MB of XML, 1.4 MB zipped, but music21 would hold
    # about 2.2 GB for them (7.5 KB per bar, stimkit.score.limits)
    p = tmp_path / "empty bars.mxl"
    bars = "".join(f'<measure number="{i}"/>' for i in range(2, 300_002))
    text = score([("P", [measure(1, A44 + note() * 4) + bars])])
    with zipfile.ZipFile(p, "w", zipfile.ZIP_DEFLATED) as zf:
        _container(zf)
        zf.writestr("score.musicxml", text)
    with pytest.raises(InputError, match=r"would need about 2,\d{3} MB to read .*300,001 bars"):
        load_score(p)


def test_time_signature_of_a_million_beats(tmp_path, capsys):
    # a few hundred bytes: music21's meter set-up grows faster than the square of the beats
    # (measured: 300/4 took 8.5 s, 1000/4 73 s, 1000000/4 never finished), so the meter is refused
    # before music21 sees it (stimkit.score.limits.MAX_BEATS_PER_BAR)
    ms = [measure(1, attributes(beats=1_000_000, beat_type=4, fifths=0) + note())]
    p = write(tmp_path, "huge meter.musicxml", score([("P", ms)]))
    assert p.stat().st_size < 1000
    refused_by_cli(p, tmp_path, capsys, "1000000/4 at bar 1 has more than 128 beats")
    ms = [measure(1, attributes(beats="64+64+1", beat_type=4, fifths=0) + note())]   # composite: summed
    with pytest.raises(InputError, match="more than 128 beats"):
        load_score(write(tmp_path, "composite.musicxml", score([("P", ms)])))
    ok = [measure(1, attributes(beats=12, beat_type=8, fifths=0) + note(quarters=6.0))]
    assert load_score(write(tmp_path, "ok.musicxml", score([("P", ok)]))).notes.shape[0] == 1


def test_midi_time_signature_of_255_beats(tmp_path, capsys):
    # SMF 1.0 time-signature meta event FF 58 04 nn dd cc bb: nn = 255 beats of 2**dd
    trk = b"\x00\xff\x58\x04" + bytes([255, 2, 24, 8]) + b"\x00\x90\x3c\x40\x8f\x00\x80\x3c\x00\x00\xff\x2f\x00"
    p = tmp_path / "meter.mid"
    p.write_bytes(b"MThd" + struct.pack(">IHHH", 6, 0, 1, 480) + b"MTrk" + struct.pack(">I", len(trk)) + trk)
    refused_by_cli(p, tmp_path, capsys, "255/4 has more than 128 beats")
