"""The feature pipeline end to end: streaming reader, block independence, outputs, bad input."""

import gzip
import json

import numpy as np
import pandas as pd
import pytest
import soundfile as sf

from stimkit.audio import read
from stimkit.audio.pipeline import COLUMNS, compute_features, features_from_array
from stimkit.cli import main

from audio_signals import cadence, drum_pattern

SR = 22050


@pytest.fixture(scope="module")
def music():
    """18 s stereo: a drum pattern, then a cadence, then 2 s of silence."""
    y = np.concatenate([drum_pattern(120, seconds=8.0), cadence(7, "major", repeats=2),
                        np.zeros(2 * SR)])
    return np.stack([y, 0.8 * y], axis=1)


@pytest.fixture(scope="module")
def flac(tmp_path_factory, music):
    p = tmp_path_factory.mktemp("rec") / "take.flac"
    sf.write(p, music, SR, subtype="PCM_24")
    return p


def test_results_do_not_depend_on_block_length(music):
    a = features_from_array(music, SR, rate_hz=10.0, block_s=0.37).frame
    b = features_from_array(music, SR, rate_hz=10.0, block_s=7.0).frame
    num = [c for c in COLUMNS if c != "key"]
    np.testing.assert_allclose(a[num].to_numpy(float), b[num].to_numpy(float), rtol=1e-4, atol=1e-6)
    assert (a["key"].fillna("") == b["key"].fillna("")).all()


def test_file_and_array_paths_agree(flac):
    data, sr = sf.read(flac)
    a = compute_features(flac, rate_hz=2.0).frame
    b = features_from_array(data, sr, rate_hz=2.0).frame
    num = [c for c in COLUMNS if c != "key"]
    np.testing.assert_allclose(a[num].to_numpy(float), b[num].to_numpy(float), rtol=1e-4, atol=1e-6)


def test_frame_times_are_window_centres(flac):
    res = compute_features(flac, rate_hz=4.0)
    t = res.frame.index.values
    assert res.frame.index.name == "recording"
    np.testing.assert_allclose(t, (np.arange(len(t)) + 0.5) / 4.0)  # frame k covers [k/4, (k+1)/4)
    assert len(t) == int(18.0 * 4)
    assert list(res.frame.columns) == COLUMNS
    assert set(res.units) >= set(COLUMNS) and set(res.descriptions) >= set(COLUMNS)


def test_time_range_keeps_recording_time(flac):
    res = compute_features(flac, rate_hz=1.0, start_s=4.0, end_s=12.0)
    np.testing.assert_allclose(res.frame.index.values, 4.5 + np.arange(8))
    assert res.start_time_s == pytest.approx(4.5)


def test_cli_writes_bids_continuous_file_and_table(flac, tmp_path):
    out = tmp_path / "o"
    assert main(["features", str(flac), "-o", str(out), "--rate", "5"]) == 0
    table = pd.read_csv(out / "take.features.tsv", sep="\t", na_values="n/a")
    assert list(table.columns) == ["recording"] + COLUMNS
    side = json.loads((out / "take_stim.json").read_text())
    # BIDS 1.11 continuous recordings: SamplingFrequency, StartTime, Columns are required
    assert side["SamplingFrequency"] == 5.0 and side["StartTime"] == pytest.approx(0.1)
    numeric = [c for c in COLUMNS if c != "key"]  # the key name is text: headed table only
    assert side["Columns"] == numeric and list(side["ColumnsLeftOut"]) == ["key"]
    assert all("Description" in side[c] for c in numeric)
    # BIDS: Units where a column has a unit, and no "Units": "n/a" placeholder (a 0/1 flag)
    assert all(side[c].get("Units", "s") not in ("n/a", "") for c in numeric)
    assert sum("Units" in side[c] for c in numeric) >= len(numeric) - 1
    with gzip.open(out / "take_stim.tsv.gz", "rt") as fh:
        rows = fh.read().splitlines()
    assert len(rows) == len(table) and len(rows[0].split("\t")) == len(numeric)  # no header
    float(rows[0].split("\t")[0])
    s = side["Summary"]
    for k in ("integrated_lufs", "lra_lu", "max_momentary_lufs", "max_short_term_lufs",
              "sample_peak_dbfs", "true_peak_dbtp", "duration_s", "sample_rate_hz", "channels"):
        assert k in s
    assert s["channels"] == 2 and s["sample_rate_hz"] == SR  # as written by soundfile above
    # the 2 s of digital silence at the end is a silent segment
    assert s["silence_segments"] and s["silence_segments"][-1][1] == pytest.approx(18.0, abs=0.05)


def test_outputs_are_byte_identical_across_runs(flac, tmp_path):
    for d in ("a", "b"):
        assert main(["features", str(flac), "-o", str(tmp_path / d)]) == 0
    for name in ("take.features.tsv", "take_stim.tsv.gz", "take_stim.json"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


@pytest.mark.parametrize("fmt,subtype,ext", [("WAV", "PCM_16", "wav"), ("OGG", "VORBIS", "ogg"),
                                             ("AIFF", "PCM_24", "aiff")])
def test_formats(tmp_path, music, fmt, subtype, ext):
    p = tmp_path / f"x.{ext}"
    sf.write(p, music[: 6 * SR], SR, format=fmt, subtype=subtype)
    res = compute_features(p, rate_hz=1.0)
    assert len(res.frame) == 6 and res.summary["channels"] == 2


# ---- streaming reader ---------------------------------------------------------------------

def test_iter_blocks_overlap_mono_and_resampling(flac, music):
    blocks = list(read.iter_blocks(flac, block_s=1.0, overlap_s=0.25, mono=True))
    ovl = round(0.25 * SR)  # overlap in whole samples
    assert blocks[0][0] == 0.0 and blocks[1][0] == pytest.approx((SR - ovl) / SR)
    assert blocks[1][1].shape == (SR + ovl,)
    np.testing.assert_allclose(blocks[1][1][:ovl], blocks[0][1][-ovl:])
    np.testing.assert_allclose(blocks[0][1], music[:SR].mean(axis=1), atol=1e-6)  # 24-bit file
    rs = list(read.iter_blocks(flac, block_s=2.0, target_sr=8000, start_s=3.0, end_s=9.0))
    assert rs[0][0] == pytest.approx(3.0)
    assert sum(b.shape[0] for _, b in rs) == pytest.approx(6 * 8000, abs=2)


def test_audio_info_names_the_file(tmp_path):
    p = tmp_path / "nope.wav"
    with pytest.raises(read.InputError, match="nope.wav"):
        read.audio_info(p)


# ---- bad and unusual input through the CLI ------------------------------------------------

def _run(tmp_path, path, *args):
    tmp_path.mkdir(parents=True, exist_ok=True)
    out = tmp_path / "out"
    code = main(["features", str(path), "-o", str(out), *args])
    written = sorted(p.name for p in out.iterdir()) if out.exists() else []
    return code, written


@pytest.mark.parametrize("case", ["not_audio", "truncated_flac", "empty", "single_sample",
                                  "missing", "rate_too_high", "rate_zero"])
def test_bad_input_exit_2_and_nothing_written(tmp_path, flac, case, capsys):
    p = tmp_path / "in.wav"
    args = []
    if case == "not_audio":
        p.write_text("this is a text file, not audio\n")
    elif case == "truncated_flac":
        p = tmp_path / "in.flac"
        data = flac.read_bytes()
        p.write_bytes(data[: len(data) // 3])  # FLAC frames cut mid-stream: decoder loses sync
    elif case == "empty":
        sf.write(p, np.zeros((0, 2)), SR)
    elif case == "single_sample":
        sf.write(p, np.zeros((1, 2)), SR)
    elif case == "missing":
        p = tmp_path / "missing.wav"
    else:
        sf.write(p, np.zeros((SR, 1)), SR)
        args = ["--rate", "101" if case == "rate_too_high" else "0"]
    code, written = _run(tmp_path, p, *args)
    assert code == 2 and written == []
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("stimkit: error:")


def test_truncated_wav_is_read_to_its_last_frame(tmp_path, music):
    # stated behaviour: libsndfile reads a WAV whose data chunk was cut up to its last full frame
    full = tmp_path / "full.wav"
    sf.write(full, music, SR, subtype="PCM_16")
    data = full.read_bytes()
    p = tmp_path / "cut.wav"
    p.write_bytes(data[: 44 + 4 * SR * 5])  # header + 5 s of 16-bit stereo
    code, written = _run(tmp_path, p)
    assert code == 0 and "cut.features.tsv" in written
    side = json.loads((tmp_path / "out" / "cut_stim.json").read_text())
    assert side["Summary"]["duration_s"] == pytest.approx(5.0, abs=0.01)


def test_all_zeros_nan_inf_and_clipping(tmp_path):
    rng = np.random.default_rng(0)
    # all zeros: works; integrated loudness and LRA undefined (n/a / null), levels at the floor
    z = tmp_path / "zeros.wav"
    sf.write(z, np.zeros((3 * SR, 2)), SR)
    assert _run(tmp_path / "z", z)[0] == 0
    r = compute_features(z)
    # BS.1770-4: every block is below the -70 LUFS absolute gate, so no integrated value; levels
    # sit at the documented floor for digital silence (pipeline docstring: "-120")
    from stimkit.audio.pipeline import LEVEL_FLOOR_DB

    assert LEVEL_FLOOR_DB < -70.0                    # the floor is below the absolute gate
    assert np.isnan(r.summary["integrated_lufs"]) and (r.frame["momentary_lufs"] == LEVEL_FLOOR_DB).all()
    assert r.frame["silent"].eq(1).all()
    # NaN / Inf samples: replaced by 0 and counted
    x = (0.1 * rng.standard_normal((3 * SR, 2))).astype(np.float32)
    x[100:200, 0] = np.nan
    x[300, 1] = np.inf
    p = tmp_path / "nan.wav"
    sf.write(p, x, SR, subtype="FLOAT")
    assert _run(tmp_path / "n", p)[0] == 0
    r = compute_features(p)
    assert r.summary["nonfinite_samples"] == 100 + 1  # the NaN run and the Inf put in above
    assert np.isfinite(r.frame.drop(columns=["key", "tempo_bpm"]).to_numpy(float)).all()
    # clipped audio: works; samples at full scale are counted
    c = tmp_path / "clip.wav"
    sf.write(c, np.clip(3 * rng.standard_normal((3 * SR, 2)), -1, 1), SR, subtype="PCM_16")
    assert _run(tmp_path / "c", c)[0] == 0
    r = compute_features(c)
    assert r.summary["clipped_samples"] > 0
    assert r.summary["sample_peak_dbfs"] == pytest.approx(0.0, abs=0.01)


@pytest.mark.parametrize("sr,channels", [(8000, 1), (192000, 2), (48000, 8)])
def test_unusual_rates_and_channel_counts(tmp_path, sr, channels):
    rng = np.random.default_rng(1)
    t = np.arange(4 * sr) / sr
    x = 0.1 * np.sin(2 * np.pi * 440 * t)[:, None] + 0.01 * rng.standard_normal((t.size, channels))
    p = tmp_path / f"r{sr}c{channels}.wav"
    sf.write(p, x, sr, subtype="PCM_24")
    code, written = _run(tmp_path, p)
    assert code == 0 and len(written) == 3
    r = compute_features(p, rate_hz=2.0)
    assert len(r.frame) == 8 and r.summary["channels"] == channels
    # 440 Hz dominates: chroma of A is the largest (A4 = 440 Hz, ISO 16)
    assert r.frame.iloc[3][[c for c in COLUMNS if c.startswith("chroma_")]].idxmax() == "chroma_A"
    if channels == 8:
        # WAVE 7.1 order L R C LFE + four surround/back (WAVEFORMATEXTENSIBLE channel mask order,
        # fact of the trade); BS.1770-4 weights: 1.0 for L, R, C, 1.41 for surround, LFE excluded
        assert r.summary["channel_weights"] == [1.0, 1.0, 1.0, 0.0, 1.41, 1.41, 1.41, 1.41]


@pytest.mark.parametrize("rate", [0.5, 3.0, 100.0])
def test_any_rate_up_to_100_hz(music, rate):
    # frame k covers [k/rate, (k+1)/rate): floor(duration * rate) rows, centres at (k + 0.5)/rate
    fr = features_from_array(music[: 6 * SR], SR, rate_hz=rate).frame
    assert len(fr) == int(6 * rate)
    np.testing.assert_allclose(fr.index.values, (np.arange(len(fr)) + 0.5) / rate)
    assert np.isfinite(fr.drop(columns=["key", "tempo_bpm"]).to_numpy(float)).all()
