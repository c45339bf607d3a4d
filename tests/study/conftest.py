"""Fixtures of the study tests (the tiny study is built by :mod:`studyfix`)."""

import pytest
from studyfix import write_tiny_study


@pytest.fixture(scope="session")
def tiny_study(tmp_path_factory):
    return write_tiny_study(tmp_path_factory.mktemp("tiny-study"))
