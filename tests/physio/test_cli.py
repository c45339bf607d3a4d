"""The relate verb and the [[physio]] session tables: outputs, determinism, bad input.

Bad-input rules are the project's (one line naming the file, exit 2, nothing written); the
simulated series are AR(1) with planted steps as in test_relate.py.
"""

import contextlib
import io
import json

import numpy as np
import pandas as pd
import pytest

from stimkit.cli import main
from stimkit.session import SessionFileError, parse_session_text

from physio_sim import ar1_beats, events_for


@pytest.fixture(scope="module")
def handoff(tmp_path_factory):
    root = tmp_path_factory.mktemp("handoff")
    steps = np.array([60.0, 120.0, 190.0, 250.0, 320.0])
    rng = np.random.default_rng(9)
    t, rr = ar1_beats(520, 0.5, 25.0, rng, level=lambda now: 800 + 40 * (np.searchsorted(steps, now) % 2))
    changes = [(s + 1.0, "short_term_lufs,centroid_hz") for s in steps] + [(100.0, "tempo_bpm"), (200.0, "tempo_bpm"),
                                                                          (300.0, "tempo_bpm")]
    ev = events_for([(20.0, 380.0)], steps, family="section", changes=changes)
    ev.to_csv(root / "sub-01_task-x_events.tsv", sep="\t", index=False, na_rep="n/a")
    pd.DataFrame({"time": t, "rr": rr}).to_csv(root / "sub-07_beats.tsv", sep="\t", index=False)
    return root


def run(args, cwd):
    mp = pytest.MonkeyPatch()
    out, err = io.StringIO(), io.StringIO()
    try:
        mp.chdir(cwd)
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            code = main(args)
    finally:
        mp.undo()
    return code, out.getvalue(), err.getvalue()


FAST = ["--surrogates", "39", "--pseudo-boundaries", "199", "--window-beats", "20"]


def test_relate_writes_described_tables_and_is_byte_identical(handoff, tmp_path):
    outs = []
    for name in ("a", "b"):
        code, said, err = run(["relate", str(handoff), str(handoff / "sub-07_beats.tsv"), "-o", name] + FAST,
                              tmp_path)
        assert code == 0, err
        outs.append(tmp_path / name)
    a, b = outs
    names = sorted(p.name for p in a.iterdir())
    for table in ("boundary_tests", "boundary_summary", "changepoints_physio", "changepoints_music",
                  "coincidence_curve", "coincidence_summary", "physio_values"):
        assert f"{table}.tsv" in names and f"{table}.json" in names
        side = json.loads((a / f"{table}.json").read_text())
        cols = (a / f"{table}.tsv").read_text().splitlines()[0].split("\t")
        assert list(side["Columns"]) == cols
        assert all(side["Columns"][c]["Description"] for c in cols)  # every column described
        assert side["Inputs"] and side["Seeds"] and side["Parameters"]["n_surrogates"] == 39
    for n in names:  # same inputs, same seed -> same bytes (figures included)
        if n == "relate.json":  # holds the command line, which names the output folder
            ja, jb = (json.loads((d / n).read_text()) for d in (a, b))
            assert ja.pop("Command") != jb.pop("Command") and ja == jb
            continue
        assert (a / n).read_bytes() == (b / n).read_bytes(), n
    text = "".join((a / n).read_text(errors="ignore") for n in names if not n.endswith(".png"))
    assert str(tmp_path) not in text and str(handoff) not in text  # no absolute paths
    bt = pd.read_csv(a / "boundary_tests.tsv", sep="\t", na_values=["n/a"], keep_default_na=False, dtype={"participant": str})
    assert set(bt["participant"].astype(str)) == {"07"}
    assert "participant 07" in said and "not a clinical tool" in said


@pytest.mark.parametrize("problem, words", [
    ("late", "covers"),
    ("decreasing", "not strictly increasing"),
    ("units", "Units 'bpm'"),
    ("sidecar", "SamplingFrequency"),
    ("few", "too few"),
])
def test_bad_physio_input_exits_2_and_writes_nothing(handoff, tmp_path, problem, words):
    f = tmp_path / "p_beats.tsv"
    if problem == "late":
        t = 500.0 + np.cumsum(np.full(300, 0.8))
        pd.DataFrame({"time": t, "rr": 800.0}).to_csv(f, sep="\t", index=False)
    elif problem == "decreasing":
        f.write_text("time\trr\n30\t800\n30.8\t800\n30.7\t800\n31.5\t800\n")
    elif problem == "few":
        f.write_text("time\trr\n30\t800\n30.8\t800\n")
    else:
        f = tmp_path / "sub-02_physio.tsv.gz"
        col = np.zeros((400000, 1))
        col[np.arange(1000, 399000, 800), 0] = 800
        import gzip

        f.write_bytes(gzip.compress("\n".join(f"{v:g}" for v in col[:, 0]).encode()))
        side = {"SamplingFrequency": 1000, "StartTime": 0, "Columns": ["rr"], "rr": {"Units": "bpm"}}
        if problem == "sidecar":
            side = {"StartTime": 0, "Columns": ["rr"], "rr": {"Units": "ms"}}
        (tmp_path / "sub-02_physio.json").write_text(json.dumps(side))
    code, _, err = run(["relate", str(handoff), str(f), "-o", "out"] + FAST, tmp_path)
    assert code == 2
    line = err.strip()
    assert "\n" not in line and words in line
    assert f.name in line or (problem in ("sidecar", "units") and "sub-02_physio.json" in line)  # the file to fix
    assert not (tmp_path / "out").exists()


def test_session_physio_tables_are_validated(tmp_path):
    (tmp_path / "rec.wav").write_bytes(b"")
    (tmp_path / "a.musicxml").write_text("<x/>")
    (tmp_path / "p1.tsv").write_text("time\trr\n")
    base = 'recording = "rec.wav"\n[[piece]]\nscore = "a.musicxml"\n'
    ok = parse_session_text(base + '[[physio]]\nfile = "p1.tsv"\nparticipant = "01"\n[relate]\nsurrogates = 200\n',
                            base_dir=tmp_path)
    assert ok.physio[0].file == tmp_path / "p1.tsv" and ok.physio[0].kind == "rr"
    assert ok.relate == {"surrogates": 200}
    with pytest.raises(SessionFileError) as e:
        parse_session_text(base + '[[physio]]\nfile = "missing.tsv"\nkind = "bpm"\ncolour = 1\n'
                           '[relate]\nsurrogates = 3\n', base_dir=tmp_path)
    msg = str(e.value)
    assert "line 5" in msg and "missing.tsv" in msg        # file not found, with its line
    assert "line 6" in msg and "kind must be one of" in msg
    assert "line 7" in msg and "unknown key 'colour'" in msg
    assert "line 9" in msg and "surrogates must be" in msg


@pytest.mark.parametrize("option", [["--correction", "bonferroni"], ["--penalty", "-3"], ["--jobs", "0"],
                                    ["--share-null", "random"]])
def test_bad_options_exit_2(handoff, tmp_path, option):
    code, _, err = run(["relate", str(handoff), str(handoff / "sub-07_beats.tsv"), "-o", "out"] + option, tmp_path)
    assert code == 2 and option[0] in err and not (tmp_path / "out").exists()


def test_relate_never_writes_over_its_physiological_file(handoff, tmp_path):
    # the project's rule (inputs are never overwritten): a beat table saved in the output folder
    # under an output's name was replaced by the physio_values table, exit 0
    out = tmp_path / "rel"
    out.mkdir()
    mine = out / "physio_values.tsv"
    mine.write_bytes((handoff / "sub-07_beats.tsv").read_bytes())
    before = mine.read_bytes()
    code, _, err = run(["relate", str(handoff), str(mine), "-o", str(out)] + FAST, tmp_path)
    assert code == 2 and "physio_values.tsv" in err and "overwritten" in err and err.count("\n") == 1
    assert mine.read_bytes() == before and sorted(p.name for p in out.iterdir()) == ["physio_values.tsv"]
    # a link under an output's name to the file elsewhere: refused when the outputs are written
    link_dir = tmp_path / "rel2"
    link_dir.mkdir()
    (link_dir / "boundary_tests.tsv").symlink_to(handoff / "sub-07_beats.tsv")
    code, _, err = run(["relate", str(handoff), str(handoff / "sub-07_beats.tsv"), "-o", str(link_dir)] + FAST,
                       tmp_path)
    assert code == 2 and "links to the input" in err
    assert (handoff / "sub-07_beats.tsv").read_bytes().startswith(b"time\trr")
    assert sorted(p.name for p in link_dir.iterdir()) == ["boundary_tests.tsv"]
