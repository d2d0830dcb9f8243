"""Every study in studies/ and the built-in demo validate and run end to end."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from tolerance.api import load_study, run
from tolerance.protocol import stage_names

ROOT = Path(__file__).resolve().parent.parent
STUDIES = sorted((ROOT / "studies").glob("*.toml"))


@pytest.mark.parametrize("path", STUDIES, ids=[p.stem for p in STUDIES])
def test_study_runs(path):
    study = load_study(path)
    # every study says what it represents in its opening comment
    assert path.read_text(encoding="utf-8").startswith("#")
    res = run(study, samples=400)
    s = res.summary
    assert s["samples"] == 400
    assert s["not_converged"] <= 4  # at most 1 %: the solvers are robust on real studies
    for c in s["criteria"].values():
        assert c["metric"] in s["metrics"]
    assert "saturation" in s["criteria"]


def test_demo_runs():
    res = run(load_study(), samples=400)
    assert res.summary["verdict"] == "pass"


def test_every_stage_has_a_study():
    stages = {load_study(p).stage_name for p in STUDIES}
    assert set(stage_names()) - {"linear_test"} <= stages  # linear_test: the tests own stage


def test_readme_names_every_metric():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    table = set(re.findall(r"^\| `([a-z0-9_<>R]+)` \|", readme, flags=re.M))
    for path in STUDIES:
        for metric in load_study(path).stage.metrics:
            generic = re.sub(r"_(RB|RPD|RBE1|RBE2)$", "_<R>", metric)
            assert generic in table, f"README metrics table lacks {metric} ({path.name})"


def test_readme_python_examples_run_as_written(monkeypatch):
    # common practice, no source: documentation examples are executed, so a renamed study or
    # a changed API breaks the test rather than the reader's first try (the example once named
    # a study that did not exist)
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"^```python\n(.*?)^```", readme, flags=re.M | re.S)
    assert blocks
    monkeypatch.chdir(ROOT)
    for i, code in enumerate(blocks):
        names: dict = {}
        exec(compile(code, f"README.md, Python example {i + 1}", "exec"), names)  # noqa: S102
        if "result" in names:
            result = names["result"]
            assert len(result.samples) == result.summary["samples"]
            assert set(result.criteria.index) == set(result.summary["criteria"])
