"""Core contracts: TimeMap and the atomic, deterministic writers."""

import gzip

import numpy as np
import pandas as pd
import pytest

from stimkit.errors import InputError, StimkitError
from stimkit.export.tables import OutputSet, format_tsv, gzip_bytes
from stimkit.timemap import TimeMap


def test_timemap_roundtrip_and_extrapolation():
    tm = TimeMap([0, 4, 8], [0, 2, 6], src="score_qn", dst="nominal")
    q = np.array([-4, 0, 2, 4, 6, 8, 12])
    t = tm(q)
    # hand computed: slope 0.5 on [0, 4], slope 1 on [4, 8], end slopes continued outside
    np.testing.assert_allclose(t, [-2, 0, 1, 2, 4, 6, 10])
    np.testing.assert_allclose(tm.inverse()(t), q)
    assert tm(2.0) == pytest.approx(1.0)


def test_timemap_rejects_non_monotone():
    with pytest.raises(StimkitError):
        TimeMap([0, 1, 1], [0, 1, 2])


def test_timemap_compose():
    a = TimeMap([0, 4], [0, 2], src="score_qn", dst="recording")
    b = TimeMap.linear(offset=10.0, slope=1.0001, src="recording", dst="onset", span=100)
    c = a.then(b)
    assert c.src == "score_qn" and c.dst == "onset"
    assert c(4.0) == pytest.approx(10.0 + 2 * 1.0001)  # hand computed: b(a(4)) = 10 + 1.0001 * 2


def test_tsv_format_na_and_floats():
    df = pd.DataFrame({"onset": [0.5, np.nan], "label": ["a\tb", None], "n": [1, 2]})
    text = format_tsv(df, float_format="%.3f")
    assert text == "onset\tlabel\tn\n0.500\ta b\t1\nn/a\tn/a\t2\n"


def test_gzip_is_deterministic(monkeypatch):
    z = gzip_bytes(b"abc")
    assert gzip.decompress(z) == b"abc"
    # RFC 1952 member header: ID1 ID2 = 1f 8b, CM = 8 (deflate), FLG, MTIME (4 bytes LE), XFL, OS.
    # Equal bytes on every run need MTIME = 0 and no FNAME flag (bit 3): no clock, no file name.
    assert z[:3] == b"\x1f\x8b\x08"
    assert z[3] & 0x08 == 0                          # RFC 1952: FNAME not set
    assert int.from_bytes(z[4:8], "little") == 0     # RFC 1952: MTIME 0 = no time stamp
    # and with the clock moved on by a day (gzip stamps time.time() unless told otherwise) the
    # same data gives the same bytes
    import time

    now = time.time()
    monkeypatch.setattr(time, "time", lambda: now + 86400.0)
    assert gzip_bytes(b"abc") == z


def test_outputset_commits_all_or_nothing(tmp_path):
    with pytest.raises(RuntimeError):
        with OutputSet(tmp_path) as outs:
            outs.write_text("a.txt", "x")
            raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []
    with OutputSet(tmp_path) as outs:
        outs.write_text("a.txt", "x")
    assert [p.name for p in tmp_path.iterdir()] == ["a.txt"]


def test_error_message_is_one_line(tmp_path):
    err = InputError("bad\nthing   here", path=tmp_path / "f.xml")
    assert "\n" not in str(err) and str(err).endswith("bad thing here")
    assert err.exit_code == 2


def test_beat_grid_pickup_has_no_downbeat():
    from pathlib import Path

    from stimkit.score.model import ScoreModel

    # a 4/4 piece with a one-beat pickup (beat 4) then one full bar
    measures = pd.DataFrame({
        "measure": [0, 1], "pass": [1, 1], "score_qn": [0.0, 1.0], "duration_qn": [1.0, 4.0],
        "numerator": [4, 4], "denominator": [4, 4], "beat_qn": [1.0, 1.0], "first_beat": [4.0, 1.0],
    })
    model = ScoreModel(name="t", path=Path("t.xml"), notes=pd.DataFrame(), measures=measures,
                       boundaries=pd.DataFrame(), tempo_map=TimeMap([0, 5], [0, 2.5]))
    grid = model.beat_grid()
    assert grid["beat"].tolist() == [4.0, 1.0, 2.0, 3.0, 4.0]
    assert grid["is_downbeat"].tolist() == [False, True, False, False, False]
    assert model.qn_at(1, 3.0) == 3.0 and model.locate(0.5)["beat"].iloc[0] == 4.5


def test_output_folder_that_refuses_files_is_bad_input():
    # /proc/self/fdinfo exists and passes os.access for root, but no file can be created in it
    from stimkit.export.tables import check_output_dir

    with pytest.raises(InputError) as err:
        check_output_dir("/proc/self/fdinfo")
    assert "not writable" in str(err.value) and "\n" not in str(err.value)
