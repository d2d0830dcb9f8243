"""Load classes of the part library: every entry reads, study keys override, errors name keys."""

from __future__ import annotations

import math

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


def test_a_studys_own_gain_limits_drop_the_class_typical_value_outside_them():
    # a review gave hfe_min = 1000 and hfe_max = 5000 on a class of typical gain 60 and was
    # refused for "hfe_typ: 60 lies outside hfe_min..hfe_max", a figure it never gave; the
    # class's typ now goes (as it does for an hfe = {min, max} table) and the spread is the
    # lognormal of the given limits, median sqrt(300 x 600) = 424.3; a typ the study gives
    # itself outside its limits is still refused
    from tolerance.api import demo_text
    from tolerance.study import StudyError, load_study

    own = ('device = "medium_power_npn"\nhfe_min = 300\nhfe_max = 600\nhfe_high_min = 150\n'
           'hfe_low_min = 200\n')
    study = load_study("own.toml", text=demo_text().replace('device = "medium_power_npn"\n',
                                                            own))
    gain = study.parameter("Q1.hfe")
    assert (gain.low, gain.high) == (300.0, 600.0)
    assert gain.nominal == pytest.approx(math.sqrt(300 * 600), rel=1e-12)
    assert study.stage.transistors()["Q1"].device.datasheet.hfe_typ is None
    with pytest.raises(StudyError, match="hfe_typ"):
        load_study("typ.toml", text=demo_text().replace('device = "medium_power_npn"\n',
                                                        own + "hfe_typ = 100\n"))


def test_a_monolithic_pairs_gain_table_says_it_is_the_output_dies():
    # a review meant the pair's gain (1000 .. 5000) and was told to give hfe_min and hfe_max,
    # which led to a second refusal: on a monolithic pair [parts.Q2] hfe is its output die's
    from pathlib import Path

    from tolerance.study import StudyError, load_study

    root = Path(__file__).resolve().parent.parent / "studies"
    text = (root / "engine_bay_heater_darlington.toml").read_text(encoding="utf-8")
    text = text.replace("monolithic = true\n",
                        "monolithic = true\nhfe = {min = 1000, max = 5000}\n")
    with pytest.raises(StudyError, match=r"parts\.Q2\.hfe\.max: .* On a monolithic pair this "
                                         r"is the output die's gain; the pair's own minimum "
                                         r"gain is pair_hfe_min"):
        load_study("pair.toml", text=text)
