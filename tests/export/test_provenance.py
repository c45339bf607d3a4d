"""Provenance: SHA-256 against hashlib's one-shot digest and a FIPS 180-4 test vector."""

from __future__ import annotations

import hashlib
import json

import pytest

from stimkit.errors import InputError
from stimkit.export.provenance import build_provenance, sha256_file, write_provenance
from stimkit.export.tables import OutputSet


def test_sha256_test_vector(tmp_path):
    p = tmp_path / "abc.txt"
    p.write_bytes(b"abc")
    # FIPS 180-4 / NIST CSRC example "abc"
    assert sha256_file(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_sha256_streaming_matches_one_shot(tmp_path):
    data = bytes(range(256)) * 12000  # ~3 MB: more than one 1 MiB block
    p = tmp_path / "big.bin"
    p.write_bytes(data)
    assert sha256_file(p) == hashlib.sha256(data).hexdigest()  # hashlib reference


def test_missing_input_is_input_error(tmp_path):
    with pytest.raises(InputError):
        sha256_file(tmp_path / "absent.wav")


def test_provenance_content_and_rerun(tmp_path):
    src = tmp_path / "score.musicxml"
    src.write_text("<score-partwise/>", "utf-8")
    kw = dict(command=["stimkit", "annotate", "s.toml"], inputs={"score": src, "audio": src},
              settings={"rate_hz": 10.0}, warnings=["one"])
    a = build_provenance(**kw, timings={"features": 1.234567})
    b = build_provenance(**kw, timings={"features": 9.87})
    assert a["inputs"]["score"]["sha256"] == hashlib.sha256(src.read_bytes()).hexdigest()
    assert a["inputs"]["score"]["bytes"] == src.stat().st_size
    assert list(a["inputs"]) == ["audio", "score"]
    assert a["software"]["libraries"]["numpy"]
    assert a["timings_s"] == {"features": 1.23}
    with OutputSet(tmp_path / "r1") as outs:
        write_provenance(outs, a)
    with OutputSet(tmp_path / "r2") as outs:
        write_provenance(outs, b)
    # timings differ between runs, yet the default file is byte-identical
    assert (tmp_path / "r1/provenance.json").read_bytes() == (tmp_path / "r2/provenance.json").read_bytes()
    with OutputSet(tmp_path / "r3") as outs:
        write_provenance(outs, a, with_timings=True)
    assert json.loads((tmp_path / "r3/provenance.json").read_text())["timings_s"] == {"features": 1.23}
