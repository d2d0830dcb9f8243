"""Shared fixtures: the exact linear test stage and a study-file writer."""

from __future__ import annotations

import sys
import textwrap
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
import linear_stage  # noqa: E402,F401  (registers the linear_test stage)


@pytest.fixture
def write_study(tmp_path):
    """Write a study file from (dedented) text and return its path."""

    def write(text: str, name: str = "study.toml") -> Path:
        path = tmp_path / name
        path.write_text(textwrap.dedent(text), encoding="utf-8")
        return path

    return write
