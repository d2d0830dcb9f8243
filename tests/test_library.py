"""Load classes of the part library: every entry reads, study keys override, errors name keys."""

from __future__ import annotations

import numpy as np
import pytest

from tolerance.models.loads import load_library, read_load
from tolerance.study import Reader, StudyError, _Context


def _read(table: dict):
    ctx = _Context("lib.toml")
    reader = Reader(table, "load", ctx)
    spec = read_load(reader)
    return spec, ctx


@pytest.mark.parametrize("name", sorted(load_library()))
def test_every_library_load_reads_and_evaluates(name):
    extra = {"series_resistance": "100 ohm", "count": 3} if load_library()[name]["kind"] == \
        "led" else {}
    spec, ctx = _read({"part": name, **extra})
    assert spec.kind == load_library()[name]["kind"]
    samples = {p.name: np.full(4, p.nominal) for p in ctx.parameters.values()}
    state = spec.at(samples, np.full(4, 298.15), np.full(4, 24.0))
    i, di = state.current(np.array([0.5, 2.0, 8.0, 12.0]))
    assert np.all(np.isfinite(i)) and np.all(di > 0)


def test_study_keys_override_the_library_entry():
    spec, ctx = _read({"part": "relay_coil_12v", "must_operate_voltage": "8.5 V"})
    assert ctx.parameters["load.must_operate_voltage"].nominal == 8.5
    # the library's 10 % resistance tolerance is kept
    assert ctx.parameters["load.resistance"].high == pytest.approx(396.0)


def test_unknown_part_and_contradicting_kind():
    with pytest.raises(StudyError, match=r"load\.part: 'relay_coil_21v'.*did you mean "
                                         r"'relay_coil_12v'"):
        _read({"part": "relay_coil_21v"})
    with pytest.raises(StudyError, match=r"load\.kind: 'lamp' contradicts"):
        _read({"part": "relay_coil_12v", "kind": "lamp"})


def test_unknown_key_next_to_a_part_is_reported():
    from tolerance.study import build_study

    with pytest.raises(StudyError, match=r"load\.inductanse: unknown key"):
        import tomllib

        from tolerance.api import demo_text

        text = demo_text().replace('kind = "resistor"\nresistance = {nominal = "68 ohm", '
                                   'tolerance = "5%"}\ntempco = "100 ppm/K"',
                                   'part = "relay_coil_12v"\ninductanse = "1 H"')
        build_study(tomllib.loads(text), "demo.toml", text)
