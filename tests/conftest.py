"""Shared fixtures: the exact linear test stage and a study-file writer; the datasheet-fit
cache of the test session lives in a temporary folder (shared with the command-line runs the
tests start), never in the user's cache."""

from __future__ import annotations

import atexit
import os
import shutil
import sys
import tempfile
import textwrap
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
import linear_stage  # noqa: E402,F401  (registers the linear_test stage)

if "TOLERANCE_CACHE_DIR" not in os.environ:
    _FITS = tempfile.mkdtemp(prefix="tolerance-test-fits-")
    os.environ["TOLERANCE_CACHE_DIR"] = _FITS
    atexit.register(shutil.rmtree, _FITS, True)


@pytest.fixture
def write_study(tmp_path):
    """Write a study file from (dedented) text and return its path."""

    def write(text: str, name: str = "study.toml") -> Path:
        path = tmp_path / name
        path.write_text(textwrap.dedent(text), encoding="utf-8")
        return path

    return write
