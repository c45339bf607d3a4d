"""Job keys: shared performances found by content, keys that follow content not paths or mtimes,
seeds that do not depend on who else is in the study.

SHA-256 test vector: FIPS 180-2 appendix B.1 ("abc").
"""

import os
import shutil

import pytest

from stimkit.study.plan import HashCache, plan_study, session_seed
from stimkit.study.studyfile import load_study


def _study(folder, *, participants=("01", "02"), second_id="same"):
    folder.mkdir(parents=True, exist_ok=True)
    for n in ("r.flac", "copy-of-r.flac", "s.musicxml"):
        if not (folder / n).exists():
            (folder / n).write_bytes(b"same bytes")
    text = ('[[performance]]\nid = "a"\nrecording = "r.flac"\n[[performance.piece]]\nscore = "s.musicxml"\n'
            f'[[performance]]\nid = "{second_id}"\nrecording = "copy-of-r.flac"\n'
            '[[performance.piece]]\nscore = "s.musicxml"\n')
    for p in participants:
        text += f'[[participant]]\nid = "{p}"\n'
    for i, p in enumerate(participants):
        perf = "a" if i % 2 == 0 else second_id
        text += f'[[session]]\nparticipant = "{p}"\nsession = "1"\nperformance = "{perf}"\n[session.sync]\noffset_s = {i}\n'
    (folder / "study.toml").write_text(text)
    return load_study(folder / "study.toml")


def test_hash_cache_matches_the_fips_vector_and_rehashes_on_change(tmp_path):
    f = tmp_path / "abc.txt"
    f.write_bytes(b"abc")
    h = HashCache()
    # FIPS 180-2, B.1: SHA-256("abc")
    assert h(f) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    f.write_bytes(b"abd")
    os.utime(f, ns=(1, 1))
    assert h(f) != "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_same_recording_under_two_names_is_one_performance(tmp_path):
    plan = plan_study(_study(tmp_path))
    assert len(plan.performances) == 1
    (job,) = plan.performances.values()
    assert job.ids == ["a", "same"]
    assert len({j.performance_key for j in plan.sessions}) == 1
    assert len({j.key for j in plan.sessions}) == 2          # the clocks differ


def test_keys_follow_content_not_paths(tmp_path):
    k1 = [j.key for j in plan_study(_study(tmp_path / "one")).sessions]
    shutil.copytree(tmp_path / "one", tmp_path / "moved")
    k2 = [j.key for j in plan_study(load_study(tmp_path / "moved" / "study.toml")).sessions]
    assert k1 == k2
    (tmp_path / "moved" / "s.musicxml").write_bytes(b"another score")
    k3 = [j.key for j in plan_study(load_study(tmp_path / "moved" / "study.toml")).sessions]
    assert k3[0] != k1[0] and k3[1] != k1[1]


def test_seeds_do_not_depend_on_the_other_participants(tmp_path):
    small = plan_study(_study(tmp_path / "small", participants=("01", "02")))
    large = plan_study(_study(tmp_path / "large", participants=("00", "01", "02", "03")))
    seeds_small = {j.base: j.seed for j in small.sessions}
    seeds_large = {j.base: j.seed for j in large.sessions}
    for base, seed in seeds_small.items():
        assert seeds_large[base] == seed
    assert len(set(seeds_large.values())) == 4
    assert session_seed(1, "x") != session_seed(2, "x")


@pytest.mark.parametrize("study_seed", [0, 7])
def test_seed_is_a_63_bit_integer(study_seed):
    s = session_seed(study_seed, "sub-01_ses-1_task-music")
    assert 0 <= s < 2 ** 63
