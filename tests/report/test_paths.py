"""Paths in provenance.json are relative to the session file's folder: no machine folder names,
the same bytes wherever the same project lies. Hashes and sizes are kept (FIPS 180-4 SHA-256)."""

from __future__ import annotations

import hashlib

from stimkit.export.provenance import build_provenance, portable_command, portable_path


def test_portable_path(tmp_path):
    base = tmp_path / "study" / "sessions"
    base.mkdir(parents=True)
    assert portable_path(base / "rec.flac", base) == "rec.flac"
    assert portable_path(tmp_path / "study" / "scores" / "a.xml", base) == "../scores/a.xml"
    assert portable_path(base, base) == "."


def test_provenance_inputs_relative_with_hash_and_size(tmp_path):
    for root in ("one", "two"):          # the same project in two places on the machine
        base = tmp_path / root / "proj"
        (base / "scores").mkdir(parents=True)
        (base / "scores" / "a.xml").write_text("<score-partwise/>")
        (base / "rec.flac").write_bytes(b"abc")
    recs = []
    for root in ("one", "two"):
        base = tmp_path / root / "proj"
        cmd = portable_command(["stimkit", "annotate", "--score", str(base / "scores" / "a.xml"),
                                "--audio", str(base / "rec.flac"), "-o", str(base / "out")],
                               base_dir=base, out_dir=base / "out")
        recs.append(build_provenance(command=cmd, inputs={"audio": base / "rec.flac",
                                                          "score:a": base / "scores" / "a.xml"},
                                     settings={}, warnings=[], base_dir=base))
    assert recs[0] == recs[1]
    r = recs[0]
    assert r["command"] == ["stimkit", "annotate", "--score", "scores/a.xml", "--audio", "rec.flac", "-o", "."]
    assert r["inputs"]["audio"] == {"path": "rec.flac", "bytes": 3,
                                    # FIPS 180-4 / NIST CSRC example "abc"
                                    "sha256": "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"}
    assert r["inputs"]["score:a"]["sha256"] == hashlib.sha256(b"<score-partwise/>").hexdigest()
    assert str(tmp_path) not in repr(r)
