"""The wheel installs the physics as tolerance.models with its data, never as a top-level
``models``, and carries the built-in demo study."""

from __future__ import annotations

import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def wheel(tmp_path_factory):
    out = tmp_path_factory.mktemp("wheel")
    proc = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q",
         "-w", str(out), str(ROOT)], capture_output=True, text=True, timeout=600)
    if proc.returncode != 0:
        pytest.fail(f"building the wheel failed:\n{proc.stderr[-2000:]}")
    (path,) = out.glob("tolerance-*.whl")
    return zipfile.ZipFile(path)


def test_wheel_maps_models_into_the_package(wheel):
    names = wheel.namelist()
    assert not any(n.startswith("models/") for n in names)
    assert "tolerance/models/__init__.py" in names
    assert "tolerance/models/stages/__init__.py" in names
    parts = [n for n in names if n.startswith("tolerance/models/parts/") and n.endswith(".toml")]
    assert len(parts) >= 5
    assert "tolerance/demo/demo.toml" in names


def test_wheel_declares_console_script(wheel):
    entry = next(n for n in wheel.namelist() if n.endswith("entry_points.txt"))
    text = wheel.read(entry).decode()
    assert "tolerance = tolerance.cli:main" in text


def test_every_source_module_is_in_the_wheel(wheel):
    names = set(wheel.namelist())
    for py in (ROOT / "tolerance").glob("*.py"):
        assert f"tolerance/{py.name}" in names
    for py in (ROOT / "models").rglob("*.py"):
        rel = py.relative_to(ROOT / "models").as_posix()
        assert f"tolerance/models/{rel}" in names
