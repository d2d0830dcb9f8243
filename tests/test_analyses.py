"""Study-level analyses on the exact linear test stage: what-if, value choice, worst case,
sensitivity, target interval, run insights."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

from tolerance import stats
from tolerance.api import UsageError, load_study, run
from tolerance.runner import Override

ROOT = Path(__file__).resolve().parent.parent

LINEAR = """
stage = "linear_test"
title = "linear"
[run]
samples = 4000
seed = 5
sampler = "lhs"
[inputs]
x1 = {x1}
x2 = {{nominal = "1 V", tolerance = "30%", distribution = "normal"}}
"""
SPREAD = '{min = "-1 V", max = "3 V"}'
DISCRETE_AMBIENT = """
stage = "single"
[ambient]
temperature = {t}
[supply]
voltage = "12 V"
[drive]
high = "3.3 V"
[parts.RB]
value = "150R"
[parts.Q1]
device = "medium_power_npn"
[load]
kind = "resistor"
resistance = "68 ohm"
"""


@pytest.fixture
def study(write_study):
    return load_study(write_study(LINEAR.format(x1=SPREAD)))


def test_whatif_pin_equals_fixed_parameter(study, write_study):
    from tolerance.whatif import whatif

    result, base, pinned = whatif(study, ["x1=0.25 V"])
    fixed = run(load_study(write_study(LINEAR.format(x1='"0.25 V"'), "fixed.toml")))
    # common random numbers: pinning x1 gives exactly the samples of a study where x1 is fixed
    assert np.array_equal(pinned.samples["y"], fixed.samples["y"])
    assert np.array_equal(pinned.samples["x2"], base.samples["x2"])
    assert result["pins"] == {"x1": 0.25}
    assert result["yield"]["baseline"]["estimate"] == base.summary["yield"]["estimate"]


def test_whatif_pin_moves_a_correlated_partner_to_its_conditional_distribution(write_study):
    from scipy import special

    from tolerance.whatif import whatif

    corr = '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 0.8\n'
    study = load_study(write_study(LINEAR.format(x1=SPREAD) + corr))
    _, base, pinned = whatif(study, ["x1=p90"])
    # Gaussian copula: normal scores z1, z2 with correlation 0.8; given z1 = t the partner's
    # score is 0.8 t + (z2 - 0.8 z1), each sample keeping its own residual (conditional
    # normal, any multivariate text, from memory). x1 = U(-1, 3), x2 = N(1, 0.1).
    t = special.ndtri(0.9)
    z1 = special.ndtri((base.samples["x1"].to_numpy() + 1) / 4)
    z2 = (base.samples["x2"].to_numpy() - 1) / 0.1
    got = (pinned.samples["x2"].to_numpy() - 1) / 0.1
    assert_allclose(got, 0.8 * t + (z2 - 0.8 * z1), atol=1e-7)
    assert_allclose(got.mean(), 0.8 * t, atol=0.03)
    assert_allclose(got.std(), np.sqrt(1 - 0.8**2), rtol=0.05)
    # the pin itself takes its value; without a correlation the partner keeps every bit
    assert_allclose(pinned.samples["x1"], 2.6, rtol=1e-12)  # -1 + 0.9 * 4
    result, _, _ = whatif(study, ["x1=p90"])
    assert result["followers"] == ["x2"]
    plain = load_study(write_study(LINEAR.format(x1=SPREAD), "plain.toml"))
    _, b0, p0 = whatif(plain, ["x1=p90"])
    assert np.array_equal(p0.samples["x2"], b0.samples["x2"])


def test_a_pin_at_a_uniform_end_counts_as_a_three_sigma_score(write_study):
    from tolerance.whatif import whatif

    corr = '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = -0.5\n'
    study = load_study(write_study(LINEAR.format(x1=SPREAD) + corr))
    _, base, pinned = whatif(study, ["x1=max"])
    # the end of a uniform is an infinite normal score; the pin stands for a tolerance limit
    # (3 sigma, tolerance.sampling.PIN_SCORE): mean score -0.5 * 3 (common practice, no source)
    got = (pinned.samples["x2"].to_numpy() - 1) / 0.1
    assert_allclose(got.mean(), -1.5, atol=0.03)


@pytest.mark.parametrize("listed", ['"-1 V", "1 V", "3 V"', '"3 V", "-1 V", "1 V"'])
def test_a_pin_on_a_discrete_value_draws_its_partners_given_that_value(write_study, listed):
    # x1 takes -1, 1 or 3 V with equal weights, correlated at 0.8 with x2 = N(1, 0.1). The
    # copula maps the scores below Phi^-1(1/3) = -0.431 to -1 V and those above 0.431 to 3 V;
    # given x1 = 3 V the partner's score has mean 0.8 E[Z | Z > 0.431] = 0.8 * 1.091 = 0.873
    # (scipy.stats.truncnorm), as the baseline units with x1 = 3 V show. The stratum's edge
    # as the pin's score gave 2.4 at the top value and -0.35 at the bottom one.
    from scipy import stats as sps

    from tolerance.whatif import whatif

    corr = '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 0.8\n'
    # (values listed out of order drew by their listing, the pin by their size: the review
    # found the partner moved the other way)
    discrete = '{values = [' + listed + ']}'
    study = load_study(write_study(LINEAR.format(x1=discrete) + corr))
    edge = sps.norm.ppf(2 / 3)
    mean_top = sps.truncnorm(edge, np.inf).mean()
    for pin, expected in (("max", 0.8 * mean_top), ("min", -0.8 * mean_top)):
        _, base, pinned = whatif(study, [f"x1={pin}"])
        got = (pinned.samples["x2"].to_numpy() - 1) / 0.1
        assert_allclose(got.mean(), expected, atol=0.03)
        same = base.samples["x1"].to_numpy() == (3.0 if pin == "max" else -1.0)
        seen = (base.samples["x2"].to_numpy()[same] - 1) / 0.1
        assert_allclose(got.mean(), seen.mean(), atol=0.06)
        # the conditional spread: 1 - r^2 + r^2 Var(Z | stratum) (law of total variance)
        var = 1 - 0.64 + 0.64 * sps.truncnorm(edge, np.inf).var()
        assert_allclose(got.var(), var, rtol=0.08)
    # the middle value is the nominal of an equally weighted set, not the first listed
    assert study.parameter("x1").nominal == 1.0


def test_a_pin_at_a_typical_value_at_its_limit_moves_its_partner(write_study):
    # x1 = normal with typ at min: half the units sit at -1 V, where F = 0.5, so the pin
    # x1 = min read as a score of 0 and left the partner where it was. A pin at the end of
    # the spread now counts as the end's score, -3 (tolerance.sampling.PIN_SCORE): the
    # partner's mean score is 0.8 * -3 (conditional normal, any multivariate text, from
    # memory), its spread sqrt(1 - 0.8^2)
    from tolerance.whatif import whatif

    corr = '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 0.8\n'
    one_sided = '{min = "-1 V", typ = "-1 V", max = "3 V", distribution = "normal"}'
    study = load_study(write_study(LINEAR.format(x1=one_sided) + corr))
    _, base, pinned = whatif(study, ["x1=min"])
    assert np.mean(base.samples["x1"].to_numpy() == -1.0) == pytest.approx(0.5, abs=0.02)
    got = (pinned.samples["x2"].to_numpy() - 1) / 0.1
    assert_allclose(got.mean(), -2.4, atol=0.03)
    assert_allclose(got.std(), 0.6, rtol=0.05)
    # and check and run say what the distribution does there (Study.notes)
    (note,) = study.notes()
    assert note.startswith("inputs.x1: typ lies at min (-1 V)")
    assert "half the units sit exactly at -1 V" in note and '"truncnormal"' in note
    cut = one_sided.replace('"normal"', '"truncnormal"')
    assert load_study(write_study(LINEAR.format(x1=cut), "cut.toml")).notes() == []


def test_a_pin_of_a_discrete_set_takes_only_its_members(write_study):
    # a value between the members (or beyond them) is no unit of the study: its partners'
    # shift stepped with the stratum it fell in, 25.1 and 54 degC alike
    from tolerance.whatif import pin_value

    temps = '{values = ["-20 degC", "25 degC", "55 degC"], weights = [1, 2, 1]}'
    study = load_study(write_study(DISCRETE_AMBIENT.format(t=temps)))
    low, middle, high = study.parameter("ambient.temperature").distribution.values
    for spec in ("25.1 degC", "70 degC", "54 degC"):
        with pytest.raises(UsageError, match=r"takes only its members: -20 degC, 25 degC, "
                                             r"55 degC"):
            pin_value(study, "ambient.temperature", spec)
    assert pin_value(study, "ambient.temperature", "55 degC") == high
    assert pin_value(study, "ambient.temperature", "328.15 K") == high
    # percentiles and the ends are members: p50 of a 1:2:1 set is its middle member
    # (scipy.stats.rv_discrete.ppf), p25 the lowest (the step edge takes the member below)
    assert pin_value(study, "ambient.temperature", "p50") == middle
    assert pin_value(study, "ambient.temperature", "p25") == low
    assert pin_value(study, "ambient.temperature", "max") == high


def test_whatif_notes_pins_that_contradict_their_correlation(write_study):
    # x1 and x2 correlated at 0.9; pins at opposite ends, scores (+3, -3): the Mahalanobis
    # distance sqrt(t' S^-1 t) = sqrt(18 (1 + 0.9) / (1 - 0.81)) = sqrt(180) = 13.4 (worked
    # by hand), beyond the 4.2 of two independent pins at their ends; pins at the same
    # end lie sqrt(18 (1 - 0.9) / 0.19) = 3.1 from the centre and get no note
    from tolerance.whatif import whatif

    corr = '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 0.9\n'
    x2 = '{nominal = "1 V", tolerance = "30%", distribution = "truncnormal"}'
    text = LINEAR.format(x1=SPREAD).replace(
        'x2 = {nominal = "1 V", tolerance = "30%", distribution = "normal"}', f"x2 = {x2}")
    study = load_study(write_study(text + corr))
    result, _, pinned = whatif(study, ["x1=max", "x2=min"], samples=200)
    (note,) = result["pin_notes"]
    assert "13.4 standard deviations from the centre jointly" in note
    assert "rarer than any unit the study describes" in note
    assert pinned.summary["samples"] == 200  # noted, not refused
    agree, _, _ = whatif(study, ["x1=max", "x2=max"], samples=200)
    assert agree["pin_notes"] == []


def test_whatif_notes_a_pin_beyond_the_studys_limits(study):
    # a gain of 1,000 pinned on a 40 .. 250 part moved a review's yield from 2 % to 100 %
    # without a word (a review of 2026-12-04): a pin beyond the stated limits is no unit of
    # the study; the what-if runs and says so. x1 is uniform on -1 .. 3 V.
    from tolerance.whatif import whatif

    result, _, pinned = whatif(study, ["x1=5"], samples=50)
    (note,) = result["pin_notes"]
    assert "x1 is pinned at 5 V, outside the study's -1 V .. 3 V" in note
    assert pinned.summary["samples"] == 50
    for inside in ("x1=max", "x1=-1 V", "x1=p10"):
        assert whatif(study, [inside], samples=50)[0]["pin_notes"] == []
    # x2 is an uncut normal, 1 V +- 30 % at 3 sigma: its units do lie beyond 0.7 .. 1.3 V,
    # and a pin there says how many (a review's p0.1 gain pin read "no unit of the study
    # has that value", 5 of 3,000 units lying below it): 1.4 V is 4 sigma, 31.7 ppm above
    # (scipy.stats.norm.sf(4))
    (beyond,) = whatif(study, ["x2=1.4"], samples=50)[0]["pin_notes"]
    assert "beyond the study's stated limits 700 mV .. 1.3 V: its spread is not cut" in beyond
    from scipy.stats import norm

    assert f"{100 * norm.sf(4.0):.3g} % of its units lie above that value" in beyond
    assert "no unit" not in beyond


def test_whatif_pin_forms(study):
    from tolerance.whatif import pin_value

    assert pin_value(study, "x1", "min") == -1.0
    assert pin_value(study, "x1", "max") == 3.0
    assert pin_value(study, "x1", "nominal") == 1.0
    # percentile of U(-1, 3): -1 + 4 q (inverse CDF of the uniform)
    assert_allclose(pin_value(study, "x1", "p10"), -0.6)
    # normal with the 30 % tolerance at 3 sigma: p50 is the nominal
    assert_allclose(pin_value(study, "x2", "p50"), 1.0)
    with pytest.raises(UsageError, match="not a parameter"):
        pin_value(study, "x9", "min")
    with pytest.raises(UsageError, match="x1=3 ohm"):
        pin_value(study, "x1", "3 ohm")
    # a misspelt percentile was answered "is not a fraction"; p0 and p100 are the ends
    with pytest.raises(UsageError, match="a percentile is p and a number between 0 and 100"):
        pin_value(study, "x1", "pXY")
    with pytest.raises(UsageError, match="write min or max"):
        pin_value(study, "x1", "p0")
    assert_allclose(pin_value(study, "x1", "P10"), -0.6)
    assert pin_value(study, "x1", "MIN") == -1.0 and pin_value(study, "x1", "Max") == 3.0
    # a refused pin speaks in the study's units (a temperature in degC, not kelvin)
    with pytest.raises(UsageError, match="at most 226.85 degC, got 300 degC"):
        pin_value(load_study(None), "ambient.temperature", "300 degC")


def test_whatif_compares_the_yields_unit_by_unit(study):
    from scipy import stats as sps

    from tolerance.whatif import whatif

    # x2 pinned below its spread: y = x1 + 0.9 fails for x1 < -0.9, some 2.5 % of units
    result, base, pinned = whatif(study, ["x2=0.45 V"])
    a = base.samples["pass"].to_numpy(bool)
    b = pinned.samples["pass"].to_numpy(bool)
    change = result["yield_change"]
    assert change["only_first"] == int((a & ~b).sum())
    assert change["only_second"] == int((b & ~a).sum())
    assert change["difference"] == pytest.approx(b.mean() - a.mean(), abs=1e-12)
    # exact McNemar test: scipy.stats.binomtest on the discordant units at 1/2
    m = change["only_first"] + change["only_second"]
    assert m > 0
    assert change["p_value"] == pytest.approx(
        sps.binomtest(change["only_second"], m, 0.5).pvalue, rel=1e-12)
    assert change["ci_low"] <= change["difference"] <= change["ci_high"]


def test_a_parameter_typed_without_its_part_or_case_is_pointed_to():
    # common practice, no source: a name typed without its part ("hfe"), in another case
    # ("rb") or shared by two parts ("tempco") is answered with the parameters it can mean
    from tolerance.study import parameter_hint
    from tolerance.whatif import pin_value

    names = ["supply.voltage", "RB", "RB.tempco", "RPD", "RPD.tempco", "Q1.hfe"]
    assert parameter_hint("hfe", names) == "; did you mean 'Q1.hfe'?"
    assert parameter_hint("rb", names) == "; did you mean 'RB'?"
    assert parameter_hint("q1.hfe", names) == "; did you mean 'Q1.hfe'?"
    assert parameter_hint("tempco", names) == "; did you mean one of 'RB.tempco', 'RPD.tempco'?"
    assert parameter_hint("suply.voltage", names) == "; did you mean 'supply.voltage'?"
    assert parameter_hint("gain", names) == ""
    demo = load_study(None)
    with pytest.raises(UsageError, match=r"--pin hfe: .*did you mean 'Q1\.hfe'\?"):
        pin_value(demo, "hfe", "min")


def test_whatif_at_minimum_raises_failures(study):
    from tolerance.whatif import whatif

    result, _, _ = whatif(study, ["x1=min"])
    c = result["criteria"]["y_positive"]
    # y = x1 + 2 x2 < 0 needs x2 < 0.5 when x1 = -1: more failures than the baseline
    assert c["pinned"]["failures"] >= c["baseline"]["failures"]


def test_choose_scales_with_common_random_numbers(study):
    from tolerance.choose import choose

    result = choose(study, ["x2=E12:0.47..2.2"], tradeoff=("y", "z:higher"))
    values = [c["values"]["x2"] for c in result["candidates"]]
    # IEC 60063 E12 values between 0.47 and 2.2
    assert_allclose(values, [0.47, 0.56, 0.68, 0.82, 1.0, 1.2, 1.5, 1.8, 2.2])
    ylds = [c["yield"] for c in result["candidates"]]
    # a larger x2 moves y = x1 + 2 x2 up for every sample (same random numbers), so the yield
    # cannot fall along the sweep
    assert all(b >= a for a, b in zip(ylds, ylds[1:]))
    # best: the highest yield; among equal yields the most room to y >= 0 at its 0.1 %
    # point in deviations (larger x2 lifts y), within a tenth of a deviation the value
    # nearest the study's nominal (1.0)
    top = [c for c, y in zip(result["candidates"], ylds) if y == max(ylds)]
    most = max(c["robust_margin"] for c in top)
    near = [c["values"]["x2"] for c in top if c["robust_margin"] >= most - 0.1]
    assert result["best"]["values"]["x2"] == min(near, key=lambda v: abs(np.log(v)))
    assert result["best"]["values"]["x2"] == 2.2
    assert result["evaluations"] == 9 * 4000
    assert result["frontier"]
    assert result["tradeoff"]["z"] == {"statistic": "p001", "unit": "1", "better": "higher"}
    # each candidate against the best, unit by unit: a larger x2 passes every unit the
    # smaller one passes, so the smaller candidates only lose units (exact McNemar test)
    best = result["best"]
    for c, y in zip(result["candidates"], ylds):
        v = c["vs_best"]
        assert v["difference"] == pytest.approx(y - best["yield"], abs=1e-12)
        if c["values"]["x2"] < best["values"]["x2"]:
            assert v["only_second"] == 0 and v["only_first"] == round(-v["difference"] * 4000)
    assert best["vs_best"]["p_value"] == 1.0


def test_choose_trade_off_on_a_metric_without_a_limit_says_which_end_is_better(study):
    from tolerance.choose import check_request, choose

    # common practice, no source: z has no criterion, so neither end is known to be better
    # (a dissipation taken as larger-is-better made the coolest candidate dominated)
    with pytest.raises(UsageError, match="z: no criterion limits it.*z:lower or z:higher"):
        check_request(study, ["x2=E12:1..2"], ("y", "z"))
    with pytest.raises(UsageError, match="after the colon write lower or higher"):
        check_request(study, ["x2=E12:1..2"], ("y", "z:smaller"))
    with pytest.raises(UsageError, match="two different metrics"):
        check_request(study, ["x2=E12:1..2"], ("y", "y:lower"))
    low = choose(study, ["x2=E12:0.47..2.2"], samples=500, tradeoff=("y", "z:lower"))
    high = choose(study, ["x2=E12:0.47..2.2"], samples=500, tradeoff=("y", "z:higher"))
    assert low["tradeoff"]["z"]["statistic"] == "p999"
    assert high["tradeoff"]["z"]["statistic"] == "p001"
    # the frontier reads each metric's robust end in the direction given
    from tolerance.choose import frontier

    for result, sign in ((low, -1), (high, 1)):
        assert result["frontier"] == frontier(result["candidates"], "y", "z", 1, sign)
    assert [c["z"] for c in low["candidates"]] != [c["z"] for c in high["candidates"]]


def test_choose_rejects_bad_sweeps(study):
    from tolerance.choose import choose

    with pytest.raises(UsageError, match="E25"):
        choose(study, ["x2=E25:1..2"])
    with pytest.raises(UsageError, match="positive nominal|not a parameter"):
        choose(study, ["x9=E12:1..2"])


def test_frontier_non_dominated():
    from tolerance.choose import frontier

    pts = [{"a": 1, "b": 5}, {"a": 2, "b": 4}, {"a": 1.5, "b": 3}, {"a": 3, "b": 1}]
    # the third point is beaten on both by the second (larger is better on both)
    assert frontier(pts, "a", "b", 1, 1) == [0, 1, 3]


def test_frontier_leaves_out_candidates_without_a_value():
    # common practice, no source: a candidate whose trade-off figure has no finite value (the
    # summary writes None; every sample's stress infinite in a hot study) is on no frontier and
    # beats no other candidate; it raised a TypeError in the value-choice command
    from tolerance.choose import frontier

    pts = [{"a": None, "b": 9}, {"a": 1, "b": 5}, {"a": float("nan"), "b": 6},
           {"a": 2, "b": 4}, {"a": 1.5, "b": 3}]
    assert frontier(pts, "a", "b", 1, 1) == [1, 3]
    assert frontier([{"a": None, "b": None}], "a", "b", 1, -1) == []


def test_choose_refuses_a_temperature_and_names_the_twice_varied_part(study):
    from tolerance.choose import check_request

    # preferred numbers are ratios; the demo's ambient (degC, kept in K) gave 220 K and 470 K
    with pytest.raises(UsageError, match="ambient.temperature: a temperature has no preferred"):
        check_request(load_study(), ["ambient.temperature=E3:-60..300"])

    # a candidate must be a value the study file accepts: a tempco of 100 to 220 per kelvin
    # ran as if it were one (the study and --pin refuse it)
    with pytest.raises(UsageError, match=r"RB.tempco=E12:100..220: must be at most 5000 ppm/K"):
        check_request(load_study(), ["RB.tempco=E12:100..220"])

    with pytest.raises(UsageError, match="x2: the same part is varied twice"):
        check_request(study, ["x2=E12:0.47..2.2", "x2=E6:1..2.2"])
    with pytest.raises(UsageError, match="got 3"):
        check_request(study, ["x2=E12:1..2"] * 3)
    with pytest.raises(UsageError, match="--tradeoff w: not a metric.*metrics: y, z"):
        check_request(study, ["x2=E12:1..2"], ("y", "w"))
    # two sweeps multiply: 17 E24 values from 1 to 4.7 (IEC 60063) each, 289 whole runs
    with pytest.raises(UsageError, match="17 x 17 = 289 candidates"):
        check_request(study, ["x2=E24:1..4.7", "x1=E24:1..4.7"])


def test_default_tradeoff_weighs_the_first_check_against_what_the_choice_moves():
    # common practice, no source: a value choice is weighed against what it costs, so the
    # default pair is the first limited metric and the one failing most over the candidates,
    # else the one whose robust end moves most relative to its limit
    from types import SimpleNamespace

    from tolerance.choose import default_tradeoff
    from tolerance.protocol import Criterion, MetricInfo

    criteria = [Criterion("sat", "margin", minimum=1.2), Criterion("off", "fraction", maximum=0.01),
                Criterion("hot", "stress", maximum=1.0), Criterion("amps", "peak", maximum=2.0)]
    study = SimpleNamespace(criteria=criteria, stage=SimpleNamespace(
        metrics={m: MetricInfo("1", m) for m in ("margin", "fraction", "stress", "peak")}))

    def summary(rates, ends):
        return {"criteria": {k: {"rate": r} for k, r in rates.items()},
                "metrics": {m: {("p001" if m == "margin" else "p999"): v}
                            for m, v in ends.items()}}

    quiet = {"sat": 0.0, "off": 0.0, "hot": 0.0, "amps": 0.0}
    ends = [{"margin": 2.0, "fraction": 3.36e-5, "stress": 0.2, "peak": 1.0},
            {"margin": 1.5, "fraction": 3.37e-5, "stress": 0.5, "peak": 1.2}]
    # no failures: the stress moves 0.3 of its limit, the peak 0.1, the fraction 1e-5
    assert default_tradeoff(study, [summary(quiet, e) for e in ends]) == ("margin", "stress")
    # failures come first, whatever moves most
    failing = dict(quiet, amps=0.25)
    assert default_tradeoff(study, [summary(failing, ends[0]), summary(quiet, ends[1])]) == (
        "margin", "peak")
    # a figure no sample produced (None) and a rate of a run with nothing converged (NaN)
    blank = summary({**quiet, "hot": float("nan")}, {**ends[0], "stress": None})
    assert default_tradeoff(study, [blank, summary(quiet, ends[1])]) == ("margin", "peak")


def test_choose_on_the_beacon_weighs_drive_against_the_lamp_inrush():
    # the cold filament's inrush grows as the base resistor falls (a tungsten lamp's cold
    # resistance is about a tenth of its hot one, from memory), and with it what the driver
    # gives to the output's base; a larger resistor holds the inrush to less, and the
    # filament, heated by that current alone, warms more slowly while the output absorbs
    # the supply's voltage: the default trade-off is the drive margin against the inrush
    # energy, the criterion failing most often over RB = 100 to 220 ohm (pulse_energy, its
    # 2 J single-pulse rating), while the driver's 200 mA fails less and less often
    from tolerance.choose import choose

    study = load_study(ROOT / "studies" / "beacon_lamp_darlington.toml")
    result = choose(study, ["RB=E6:100..220"], samples=300)
    assert list(result["tradeoff"]) == ["drive_margin", "inrush_energy"]
    energy = [c["inrush_energy"] for c in result["candidates"]]
    assert all(b > a for a, b in zip(energy, energy[1:]))
    driver = [c["criteria"]["collector_current_driver"] for c in result["candidates"]]
    assert driver[0] > 0.5 and all(b < a for a, b in zip(driver, driver[1:]))
    pulse = [c["criteria"]["pulse_energy"] for c in result["candidates"]]
    assert all(b > a for a, b in zip(pulse, pulse[1:]))
    # every candidate fails a criterion: the report says the best is only the least bad
    from tolerance.report import choose_separation

    assert all(c["verdict"] == "fail" for c in result["candidates"])
    assert choose_separation(result).startswith("No candidate passes every criterion")
    # nothing limits the logic output's current, which a smaller base resistor raises (a
    # new user's walk: 34 mA from a 5 V pin went unremarked): the note gives the best
    # candidate's largest drive current; a study window on it silences the note
    [note] = result["notes"]
    assert note.startswith("No criterion limits drive_current: the best candidate draws up "
                           "to ")
    from tolerance.study import load_study as load_text

    text = (ROOT / "studies" / "beacon_lamp_darlington.toml").read_text(encoding="utf-8")
    limited = load_text("beacon.toml", text=text.replace(
        "[limits]\n", '[limits]\ndrive_current = {max = "25 mA"}\n', 1))
    assert any(c.metric == "drive_current" for c in limited.criteria)
    assert choose(limited, ["RB=E6:150..220"], samples=60)["notes"] == []


def test_worst_case_of_linear_stage_is_exact(study):
    from tolerance.analysis import study_worst_case

    result = study_worst_case(study, 2000, 1)
    y = result["metrics"]["y"]
    # y = x1 + 2 x2 with x1 in [-1, 3], x2 in [0.7, 1.3]: corners -1 + 1.4 and 3 + 2.6 (exact)
    assert_allclose([y["eva_min"], y["eva_max"]], [0.4, 5.6], rtol=1e-12)
    # RSS of half-ranges 2 and 2*0.3 = 0.6 around the nominal 3: sqrt(4 + 0.36)
    assert_allclose([y["rss_low"], y["rss_high"]], [3 - np.sqrt(4.36), 3 + np.sqrt(4.36)],
                    rtol=1e-6)
    assert y["mc_min"] >= y["eva_min"] - 0.8  # normal x2 may exceed its 3-sigma bound
    assert result["evaluations"] > 2000


def test_worst_case_counts_units_beyond_its_box_and_unsolved_corners(write_study):
    from tolerance.analysis import study_worst_case
    from tolerance.report import worst_case_within, worstcase_notes

    study = load_study(write_study(LINEAR.format(x1=SPREAD)))
    result = study_worst_case(study, 2000, 1)
    df = run(study, samples=2000, seed=1).samples
    # x2 is an uncut normal with its 30 % tolerance at 3 sigma: the units beyond it are
    # counted exactly (the same draws as the worst case's Monte Carlo run)
    assert result["monte_carlo_outside"] == int(((df["x2"] < 0.7) | (df["x2"] > 1.3)).sum())
    assert result["monte_carlo_outside"] > 0
    # y = x1 + 2 x2 is monotonic: its Monte Carlo extremes come from units with x2 beyond
    # its box, and the flags say so (they decide the reason the note gives)
    y = result["metrics"]["y"]
    inside = (df["x2"] >= 0.7) & (df["x2"] <= 1.3)
    assert y["mc_max_inside"] == bool(inside[df["y"].idxmax()])
    assert y["mc_min_inside"] == bool(inside[df["y"].idxmin()])
    if y["mc_max"] > y["eva_max"]:
        assert not y["mc_max_inside"]
    # every note the console and the report print is in the result (worstcase.json) too,
    # those read off the table included (a review found "notes": [] beside four in the report)
    assert result["report_notes"] == worstcase_notes(result)
    # x1 above 2.5 V does not solve: the corners at x1 = 3 have no value, so a limit the
    # solved corners meet is not shown to hold
    unsolved = load_study(write_study(LINEAR.format(x1=SPREAD)
                                      + '[solver]\ndiverge_above = "2.5 V"\n'))
    dropped = study_worst_case(unsolved, 500, 1)
    y = dropped["metrics"]["y"]
    assert y["eva_dropped"] == 2  # of the four corners of (x1, x2)
    # a note read off the table is in the result (worstcase.json) as the console prints it
    assert any("2 corners did not solve" in n for n in dropped["report_notes"])
    assert worst_case_within(dict(y, mc_min=None, mc_max=None),
                             [{"min": -10.0, "max": 10.0}]) == "unknown"
    assert "2 corners did not solve" in worstcase_notes({"metrics": {"y": y}})[0]


def test_sensitivity_of_linear_stage(study):
    from tolerance.analysis import study_sensitivity

    result = study_sensitivity(study, 4000, 2, 256, bootstrap=20)
    s1 = result["sobol"]["y"]
    # variance shares of y = x1 + 2 x2: Var(x1) = 16/12, Var(2 x2) = 4 (0.1)^2 (exact)
    v1, v2 = 16 / 12, 4 * 0.01
    assert_allclose(s1["x1"]["first"], v1 / (v1 + v2), atol=0.05)
    assert_allclose(s1["x2"]["first"], v2 / (v1 + v2), atol=0.05)
    assert result["sobol_evaluations"] == 256 * 4


def test_target_ci_stops_early_and_deterministically(study):
    a = run(study, samples=400_000, chunk_size=10_000, target_ci=0.002)
    b = run(study, samples=400_000, chunk_size=7_000, target_ci=0.002, jobs=2)
    from tolerance import stats
    assert a.summary["samples"] < 400_000
    assert a.summary["samples"] == b.summary["samples"]
    c = a.summary["criteria"]["y_positive"]
    assert float(stats.half_width(c["failures"], c["evaluated"])) < 0.002
    assert a.summary["criteria"] == b.summary["criteria"]
    t = a.summary["target_ci"]
    assert t["reached"] and t["widest"] < 0.002 and t["samples"] == a.summary["samples"]
    # the counts decided the stop, so the intervals reported are exact at 97.5 %
    # (tolerance.summary.STOPPED_RUN_CONFIDENCE; scipy.stats.binomtest as reference)
    assert a.summary["interval_level"] == t["interval_level"] == 0.975
    from scipy import stats as scipy_stats
    ref = scipy_stats.binomtest(c["failures"], c["evaluated"]).proportion_ci(0.975, "exact")
    assert (c["ci_low"], c["ci_high"]) == pytest.approx((ref.low, ref.high), rel=1e-9)
    from tolerance.report import target_sentence, verdict_basis, verdict_table
    assert "exact at 97.5 %" in target_sentence(t, str)
    # found by a review: the figures were at 97.5 % and labelled 95 %; the labels and the
    # summary's confidence now say the level computed
    assert a.summary["confidence"] == a.summary["yield"]["confidence"] == 0.975
    assert "97.5 % exact interval" in verdict_table(a.summary).header
    # a run stopped with no failure had none at every earlier check, so its zero-failure
    # bound keeps its one-sided 95 % (scipy.stats.beta.ppf(0.95, 1, n) as reference)
    zero = [k for k in a.summary["criteria"].values() if k["failures"] == 0]
    assert zero and all(k["zero_failure_upper"] == pytest.approx(
        scipy_stats.beta.ppf(0.95, 1, k["evaluated"]), rel=1e-9) for k in zero)
    basis = verdict_basis(a.summary)
    assert basis is None or "97.5 %" in basis or "at 95 % confidence (one-sided)" in basis
    n = a.summary["samples"]
    # the overall zero-failure bound: one-sided 95 % (its own level stated) where no unit
    # fails, none where some do (a review read it beside 15,252 failing units)
    assert a.summary["zero_failure_confidence"] == 0.95
    if a.summary["yield"]["passes"] == n:
        assert a.summary["zero_failure_upper"] == pytest.approx(1 - 0.05 ** (1 / n), rel=1e-9)
    else:
        assert a.summary["zero_failure_upper"] is None
    y = a.summary["yield"]
    ref = scipy_stats.binomtest(n - y["passes"], n).proportion_ci(0.975, "exact")
    assert (y["ci_low"], y["ci_high"]) == pytest.approx((1 - ref.high, 1 - ref.low), rel=1e-9)
    # the runner checks only while chunks remain: a run of one check's samples never checks
    from tolerance.api import interval_level
    assert interval_level(32_768, 0.002) == 0.95 and interval_level(32_769, 0.002) == 0.975
    assert interval_level(10**6, None) == 0.95
    # a run without the target, or an older file without the level, says nothing of it
    assert "exact at" not in target_sentence(dict(t, interval_level=0.95), str)
    assert "exact at" not in target_sentence({k: v for k, v in t.items()
                                              if k != "interval_level"}, str)
    # a run of one check's samples or fewer has its length fixed: 95 % as usual
    assert run(study, samples=20_000, target_ci=0.002).summary["interval_level"] == 0.95


def test_target_ci_not_reached_is_said(study):
    # a cap of 200 samples cannot give a 100 ppm interval: the run said nothing of it
    from tolerance import stats
    from tolerance.report import build_document

    res = run(study, samples=200, target_ci=1e-4)
    t = res.summary["target_ci"]
    assert not t["reached"] and t["samples"] == t["planned_samples"] == 200
    # common practice, no source: the status reports the stopping rule's own measure
    c = res.summary["criteria"][t["widest_criterion"]]
    assert t["widest"] == pytest.approx(float(stats.half_width(c["failures"], 200)), rel=1e-12)
    assert t["widest"] == max(float(stats.half_width(k["failures"], k["evaluated"]))
                              for k in res.summary["criteria"].values())
    text = " ".join(b.text or "" for b in build_document(res.summary, {}, []))
    assert "NOT reached within the 200 samples" in text


def test_run_summary_carries_insights(write_study):
    study = load_study(write_study(LINEAR.format(x1=SPREAD) + '[limits]\ny = {min = "1 V"}\n'))
    res = run(study)
    s = res.summary
    names = {p["name"] for p in s["parameters"]}
    assert names == {"x1", "x2"}
    rows = {(r["input"], r["metric"]): r for r in s["sensitivity"]}
    # x1 dominates y (variance share 0.97 from the exact shares above)
    assert abs(rows[("x1", "y")]["spearman"]) > abs(rows[("x2", "y")]["spearman"])
    drivers = s["failure_drivers"]["y_positive"]
    assert drivers["ranking"][0]["input"] == "x1"
    assert drivers["ranking"][0]["direction"] == "low"
    assert "y_positive" in s["capability"] and "y_positive" in s["tail"]
    # the model figures are held against the failures counted on the same samples
    c = s["criteria"]["y_positive"]
    assert c["evaluated"] == s["tail"]["y_positive"]["n"]
    assert s["tail"]["y_positive"]["count_check"] == stats.tail_check(
        s["tail"]["y_positive"], c["failures"], c["evaluated"])


def test_pin_override_reproduces_baseline_columns(study):
    base = run(study)
    same = run(study, overrides={"x2": Override("scale", 1.0)})
    # scaling by one is the identity: every metric identical (common random numbers)
    assert np.array_equal(base.samples["y"], same.samples["y"])


def test_notebook_api_mirrors_the_commands(write_study):
    from matplotlib.figure import Figure

    study = load_study(write_study(LINEAR.format(x1=SPREAD) + '[limits]\ny = {min = "1 V"}\n'))
    res = study.run(samples=2000)
    assert isinstance(res.plot.histogram("y"), Figure)
    assert isinstance(res.plot.tornado("y"), Figure)
    assert isinstance(res.plot.driver_scatter("y_positive"), Figure)
    with pytest.raises(KeyError, match="no metric"):
        res.plot.histogram("w")
    assert list(res.criteria.index) == ["y_positive"]
    assert "mean" in res.metrics.columns
    comparison, base, pinned = study.whatif("x1=min", samples=500)
    assert comparison["pins"] == {"x1": -1.0}
    assert "y" in study.worstcase(samples=500)["metrics"]
    assert study.choose("x2=E6:1..2.2", samples=300)["candidates"]


def test_end_of_life_drift_widens_the_worst_case_bounds(write_study):
    from tolerance.analysis import study_worst_case

    text = LINEAR.format(x1=SPREAD).replace('distribution = "normal"}',
                                            'distribution = "normal", drift = "10%"}')
    study = load_study(write_study(text))
    assert study.parameter("x2").drift == pytest.approx(0.1)
    y = study_worst_case(study, 500, 1)["metrics"]["y"]
    # ECSS-Q-HB-30-01A practice: initial tolerance and ageing add linearly at the extremes;
    # x2 in 1 -/+ (0.3 + 0.1), so y spans -1 + 2 * 0.6 .. 3 + 2 * 1.4 (exact for a linear model)
    assert_allclose([y["eva_min"], y["eva_max"]], [0.2, 5.8], rtol=1e-12)


@pytest.mark.parametrize("command", ["run", "whatif", "worstcase", "sensitivity", "choose"])
def test_every_command_passes_sampler_and_chunk_size_to_its_monte_carlo_run(
        command, write_study, tmp_path, monkeypatch, capsys):
    # common practice, no source: an option a command offers must act; worstcase and
    # sensitivity ran their Monte Carlo with the study's own sampler whatever --sampler said,
    # and whatif and choose ignored --chunk-size
    import tolerance.api
    from tolerance import choose as choose_module
    from tolerance import whatif as whatif_module
    from tolerance.cli import main

    seen = []
    real_run = tolerance.api.run

    def spy(*args, **kwargs):
        seen.append((kwargs.get("sampler"), kwargs.get("chunk_size")))
        return real_run(*args, **kwargs)

    for module in (tolerance.api, whatif_module, choose_module):
        monkeypatch.setattr(module, "run", spy)
    monkeypatch.setattr("tolerance.cli.run", spy)
    path = write_study(LINEAR.format(x1=SPREAD))
    extra = {"run": [], "whatif": ["--pin", "x1=max"], "worstcase": [],
             "sensitivity": ["--sobol-samples", "64"], "choose": ["--vary", "x2=E6:1..1.5"]}
    argv = [command, str(path), "--samples", "300", "--sampler", "random", "--chunk-size",
            "128", "--quiet", "--out", str(tmp_path / "o"), *extra[command]]
    assert main(argv) in (0, 1)
    assert seen and all(s == ("random", 128) for s in seen), seen
    if command in ("worstcase", "sensitivity", "choose", "whatif"):
        import json

        saved = json.loads((tmp_path / "o" / f"{command}.json").read_text())
        assert saved["sampler"] == "random"


def test_units_failing_without_a_finite_value_count_in_the_tail_and_are_named(write_study):
    # y = -inf where x1 < -0.5 V (uniform -1 .. 3 V: 12.5 % of units, all failing
    # y_positive): the capability indices and the tail fits left them out and reported the
    # finite units' figures, some 2,000 ppm where 12.5 % fail
    from tolerance.report import build_document, capability_note

    study = load_study(write_study(LINEAR.format(x1=SPREAD) + '[solver]\ninfinite_below = '
                                   '"-0.5 V"\n'))
    s = run(study).summary
    c = s["criteria"]["y_positive"]
    infinite = int(np.count_nonzero(run(study).samples["y"] == -np.inf))
    assert infinite == pytest.approx(0.125 * 4000, abs=60)
    tail = s["tail"]["y_positive"]
    assert tail["counted_directly"] == infinite
    assert tail["n"] == c["evaluated"] - infinite
    # law of total probability (from memory): the counted share plus the fit's weighted
    assert tail["normal_ppm"] >= 1e6 * infinite / c["evaluated"]
    assert tail["tail_ppm"] >= 1e6 * infinite / c["evaluated"]
    assert s["capability"]["y_positive"]["failing_not_finite"] == infinite
    note = capability_note(s["capability"])
    assert f"y_positive {infinite:,}" in note
    text = " ".join(b.text or "" for b in build_document(s, {}, []))
    assert "left out of the indices" in text
    assert capability_note({"a": {"failing_not_finite": 0}}) == ""


TWO_FAMILIES = """
    # a drive level from one of two logic families: a set of two values, not a range
    stage = "single"
    title = "two logic families"
    [run]
    samples = 300
    [supply]
    voltage = "12 V"
    [drive]
    high = {values = ["0.65 V", "2.0 V"]}
    [parts.RB]
    value = "1k"
    [parts.Q1]
    device = "medium_power_npn"
    hfe = {min = 40, typ = 100, max = 250, distribution = "truncnormal"}
    [load]
    kind = "resistor"
    resistance = "150 ohm"
    [limits]
    power_output = {max = "0.2 W"}
    tj_output = {max = "120 degC"}
    """


def test_worst_case_of_a_discrete_set_takes_only_its_members(write_study):
    from tolerance.analysis import bounds_for, model_for, study_worst_case
    from tolerance.report import worstcase_notes

    study = load_study(write_study(TWO_FAMILIES))
    drive = {b.name: b for b in bounds_for(study)}["drive.high"]
    assert drive.values == (0.65, 2.0)
    result = study_worst_case(study, 300, 1)
    power = result["metrics"]["power_output"]
    # brute force, common practice: the output's dissipation at each member over the gain's
    # range; a level between the two (1.5 V, the transistor half on) is no unit that exists
    gains = np.linspace(40.0, 250.0, 211)
    model = model_for(study)
    brute = max(float(np.nanmax(model({"drive.high": np.full(gains.size, level),
                                       "Q1.hfe": gains})["power_output"]))
                for level in (0.65, 2.0))
    # (a gain grid of steps of 1 lies within 1e-3 of the optimum; in between: 241 mW)
    assert power["opt_max"] == pytest.approx(brute, rel=1e-3)
    assert power["opt_argmax"]["drive.high"] in (0.65, 2.0)
    assert power["rss_high"] < 2 * brute  # the derivative at 0.65 V put it near 1 W
    # a rating the study's [limits] changed is searched like the study's own criteria, the
    # other ratings on their limited side
    assert result["optimized_senses"]["tj_output"] == ["min", "max"]
    assert result["optimized_senses"]["power_stress_output"] == ["max"]
    assert result["metrics"]["power_stress_output"]["opt_min"] is None
    # a metric whose values name a part has no worst case
    assert "hot_spot" not in result["metrics"] and "hot_spot_margin" in result["metrics"]
    [note] = result["notes"]
    assert "drive.high" in note and "every one of their 2 combinations" in note
    assert not any("independent" in n for n in worstcase_notes(result))


STARVED_HEATER = """
    stage = "single"
    [run]
    samples = 300
    seed = 5
    [ambient]
    temperature = {min = "0 degC", max = "40 degC"}
    [supply]
    voltage = {min = "11 V", max = "14 V"}
    [drive]
    high = "3.3 V"
    [parts.RB]
    value = "2k2"
    tolerance = "5%"
    [parts.RPD]
    value = "10k"
    tolerance = "5%"
    [parts.Q1]
    device = "medium_power_npn"
    [load]
    kind = "resistor"
    resistance = {nominal = "47 ohm", tolerance = "5%"}
    [thermal]
    tj_margin = "2 K"
    """


def test_worst_case_searches_a_ratings_limited_side(write_study):
    # found by a review: a base resistor far too large leaves the switch in its linear
    # region, where its dissipation peaks at a gain between the corners (maximum power
    # transfer: V_CE I_C with I_C = (V - V_CE) / R_L is largest at V_CE = V / 2, V^2 / 4R,
    # 1.097 W at 14 V and 44.65 ohm); the junction's rating was read "within" from the
    # corners (146 degC) and the units (142 degC) against 148 degC
    from tolerance.analysis import model_for, study_worst_case
    from tolerance.report import worst_case_within

    study = load_study(write_study(STARVED_HEATER))
    result = study_worst_case(study, 300, 1)
    tj = result["metrics"]["tj_output"]
    assert result["optimized_senses"]["tj_output"] == ["max"]
    at = tj["opt_argmax"]
    power = float(model_for(study)({k: np.array([v]) for k, v in at.items()})
                  ["power_output"][0])
    peak = at["supply.voltage"] ** 2 / (4 * at["load.resistance"])
    assert at["supply.voltage"] == 14.0 and at["load.resistance"] == pytest.approx(44.65)
    assert power == pytest.approx(peak, rel=3e-3)
    # T_j = T_a + theta_JA P at the hottest ambient (the class's theta_JA)
    theta = study.stage.transistors()["Q1"].device.datasheet.theta_ja
    assert at["ambient.temperature"] == pytest.approx(313.15)
    assert tj["opt_max"] == pytest.approx(313.15 + theta * power, abs=0.05)
    assert tj["opt_max"] > 148 + 273.15 > tj["eva_max"]  # the corners miss it
    # a 0/1 flag is not searched (no slope): its corners and units are its worst case
    assert "thermal_runaway" not in result["optimized_metrics"]
    assert result["metrics"]["thermal_runaway"]["opt_max"] is None
    limits = [c for c in result["criteria"] if c["metric"] == "tj_output"]
    assert worst_case_within(tj, limits) == "no"


def test_worst_case_says_when_it_searched_only_some_member_combinations():
    # three sets of five members: 125 combinations, beyond the 64 searched one by one
    from types import SimpleNamespace

    from tolerance.analysis import _worst_case_notes
    from tolerance.worstcase import Bound

    five = (0.0, 1.0, 2.0, 3.0, 4.0)
    bounds = [Bound(f"d{k}", 2.0, 0.0, 4.0, five) for k in range(3)]
    [note] = _worst_case_notes(SimpleNamespace(correlations=()), bounds)
    assert "at 27 of their 125 combinations" in note and "Monte Carlo" in note


def test_worst_case_says_it_takes_the_inputs_independent(write_study):
    from tolerance.analysis import study_worst_case
    from tolerance.report import worstcase_notes

    text = TWO_FAMILIES.replace('value = "1k"', 'value = "1k"\n    tolerance = "5%"').replace(
        'resistance = "150 ohm"', 'resistance = {nominal = "150 ohm", tolerance = "5%"}')
    text += '    [[correlation]]\n    parameters = ["RB", "load.resistance"]\n' \
            '    coefficient = 0.5\n'
    result = study_worst_case(load_study(write_study(text)), 100, 1)
    assert any("independent" in n and n.endswith(".") for n in worstcase_notes(result))
    # worstcase.json's report_notes hold them as the console prints them
    assert result["report_notes"] == worstcase_notes(result)


def test_equal_yields_go_to_the_candidate_with_the_most_room_to_its_limits():
    # common practice, no source: of two candidates that both pass every unit, the robust
    # choice is the one further from its limits at their 0.1 % / 99.9 % points, measured in
    # the metric's standard deviations (a junction's room to 150 degC is no share of 423 K)
    from types import SimpleNamespace

    from tolerance.choose import pick_best, robust_margin
    from tolerance.protocol import Criterion

    study = SimpleNamespace(criteria=[Criterion("sat", "drive_margin", minimum=1.5),
                                      Criterion("tj", "tj_output", maximum=423.15),
                                      Criterion("flag", "thermal_runaway", maximum=0.0)],
                            parameter=lambda name: SimpleNamespace(nominal=150.0))

    def summary(p001, tj999):
        return {"metrics": {"drive_margin": {"p001": p001, "std": 0.5},
                            "tj_output": {"p999": tj999, "std": 10.0},
                            "thermal_runaway": {"p999": 0.0, "std": 0.0}}}

    # drive margin 3 against 1.5 with a deviation of 0.5: 3 deviations; T_j 30 K below its
    # limit with a deviation of 10 K: 3 deviations as well
    assert robust_margin(study, summary(3.0, 393.15)) == pytest.approx(3.0)
    assert robust_margin(study, summary(1.75, 393.15)) == pytest.approx(0.5)
    assert math.isnan(robust_margin(SimpleNamespace(criteria=[]), summary(1.0, 1.0)))

    def cand(value, margin, yield_=1.0):
        return {"values": {"RB": value}, "yield": yield_, "ci_low": yield_ - 0.01,
                "robust_margin": margin}

    # equal yields: the most room wins over the nominal; room within a tenth of a
    # deviation is a tie, and the nominal decides; a higher yield beats any room
    assert pick_best(study, [cand(150.0, 1.0), cand(220.0, 3.0)], ["RB"]) == 1
    assert pick_best(study, [cand(220.0, 3.05), cand(150.0, 3.0)], ["RB"]) == 1
    assert pick_best(study, [cand(150.0, 9.0, 0.98), cand(220.0, 0.1)], ["RB"]) == 1
    assert pick_best(study, [cand(220.0, math.nan), cand(150.0, math.nan)], ["RB"]) == 1


# ---------------------------------------------------------------------------------------------
# the Python API's arguments (found by a helper using the API from the README alone)
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("override, match", [
    (Override("pin", -1.0), "must be positive"),
    (Override("pin", 0.0), "must be positive"),
    (Override("scale", 0.0), "a scale must be a positive factor"),
    (Override("bogus", 2.0), "kind must be 'pin' or 'scale'"),
    (Override("pin", "1k"), "the value must be a number"),
])
def test_run_refuses_overrides_the_study_file_would(override, match):
    # a resistor pinned at -1 ohm ran and passed every criterion through run(overrides=...),
    # which whatif and choose refuse
    demo = load_study(None)
    with pytest.raises(UsageError, match=match):
        run(demo, samples=20, overrides={"RB": override})


def test_analysis_arguments_are_whole_and_reproducible(tmp_path):
    import json

    from tolerance.analysis import study_sensitivity, study_worst_case
    from tolerance.api import demo_text
    demo = load_study(None)
    # a float seed ran the Monte Carlo and then failed in the optimizer's generator; None
    # gave other figures every call: the study's own is taken and recorded
    wc = demo.worstcase(samples=60.0, seed=3.0)
    assert wc["seed"] == 3 and type(wc["seed"]) is int and wc["monte_carlo_samples"] == 60
    a = study_sensitivity(demo, 60, None, 64, bootstrap=20)
    b = study_sensitivity(demo, 60, None, 64, bootstrap=20)
    assert a["seed"] == demo.settings.seed
    assert json.dumps(a["sobol"]) == json.dumps(b["sobol"])  # NaN for constant metrics
    # hot_spot names a part by a code: no ranks, no Sobol indices (a review found a mean,
    # Spearman rows and a "constant output" note for it), in the analysis and in a run
    assert "hot_spot" in demo.stage.metrics and demo.stage.metrics["hot_spot"].index
    assert "hot_spot" not in a["sobol"] and "drive_margin" in a["sobol"]
    assert {r["metric"] for r in a["rank"]} >= {"drive_margin"}
    assert not any(r["metric"] == "hot_spot" for r in a["rank"])
    assert not any("hot_spot" in n for n in a["notes"])
    ran = demo.run(samples=60, seed=3).summary
    assert ran["sensitivity"] and not any(r["metric"] == "hot_spot"
                                          for r in ran["sensitivity"])
    # the Sobol size is checked before the run (2^20 ran out of memory after it)
    for n in (0, -64, 100, 2**20):
        with pytest.raises(UsageError, match="power of two from 64 to 262,144"):
            demo.sensitivity(samples=20, sobol_samples=n)
    # a study file's path is taken where a study is
    study_file = tmp_path / "demo.toml"
    study_file.write_text(demo_text(), encoding="utf-8")
    assert study_worst_case(study_file, 40, 1)["seed"] == 1


def test_api_argument_types_are_usage_errors(tmp_path):
    demo = load_study(None)
    study_file = tmp_path / "demo.toml"
    from tolerance.api import demo_text
    study_file.write_text(demo_text(), encoding="utf-8")
    for bad in (42, b"x.toml"):
        with pytest.raises(UsageError, match="takes the path of a study file"):
            load_study(bad)
    with pytest.raises(UsageError, match="the path is empty"):
        load_study("")
    with pytest.raises(UsageError, match="target_ci must be a failure rate"):
        run(demo, samples=10, target_ci="a")
    with pytest.raises(UsageError, match="needs backend='dask'"):
        run(demo, samples=10, scheduler="tcp://127.0.0.1:9")
    with pytest.raises(UsageError, match="chunk size must be from 1 to 10,000,000"):
        run(demo, samples=10, chunk_size=10**8)
    # a path where a study is expected: loaded, the same figures as the study
    assert run(str(study_file), samples=30).summary["criteria"] == \
        run(load_study(study_file), samples=30).summary["criteria"]
    # choose takes a list as whatif does, and one sweep as text (its characters were counted)
    from tolerance.choose import choose
    assert demo.choose(["RB=E6:1k..2k"], samples=30.0)["samples"] == 30
    assert choose(demo, "RB=E6:1k..2k", samples=30)["vary"]["RB"] == [1000.0, 1500.0]


def test_result_plots_say_why_they_cannot_draw():
    demo = load_study(None)
    plain = run(demo, samples=100, insights=False)
    with pytest.raises(ValueError, match="no rank sensitivities"):
        plain.plot.tornado("drive_margin")
    with pytest.raises(ValueError, match="insights=False"):
        plain.plot.driver_scatter("saturation")
    full = run(demo, samples=100)
    with pytest.raises(ValueError, match="does not vary with any input"):
        full.plot.driver_scatter("thermal_runaway")
    with pytest.raises(KeyError, match="no input 'nope'"):
        full.plot.driver_scatter("saturation", "nope")


def test_the_analyses_runs_take_jobs_without_changing_a_figure():
    # README: --jobs sets the workers for the samples of worstcase and sensitivity too (they
    # ran on one whatever was asked); the results do not depend on it
    import json
    demo = load_study(None)
    one = demo.sensitivity(samples=300, seed=4, sobol_samples=64, jobs=1)
    two = demo.sensitivity(samples=300, seed=4, sobol_samples=64, jobs=2)
    assert json.dumps(one, sort_keys=True) == json.dumps(two, sort_keys=True)


def test_choose_reads_a_window_at_both_of_its_ends(write_study):
    # y = x1 + 2 x2 held inside 0 .. 7 V: a trade-off column read at the 0.1 % point alone
    # called the largest x2 best while its units ran over the top (a review's LED series
    # resistor of 100 ohm, 76 of 86 failures above 30 mA). The column is now the room left
    # inside the window at both robust ends: min(p001 - 0 V, 7 V - p999)
    from tolerance.choose import choose

    study = load_study(write_study(LINEAR.format(x1=SPREAD)
                                   + '[limits]\ny = {min = "0 V", max = "7 V"}\n'))
    result = choose(study, ["x2=E6:0.47..2.2"], samples=2000, tradeoff=("y", "z:higher"))
    assert result["tradeoff"]["y"] == {"statistic": "room in window", "unit": "V",
                                       "better": "higher", "window": [0.0, 7.0]}
    for c in result["candidates"]:
        s = run(study, samples=2000, overrides={"x2": Override("scale", c["values"]["x2"])}
                ).summary["metrics"]["y"]
        assert c["y"] == pytest.approx(min(s["p001"] - 0.0, 7.0 - s["p999"]), rel=1e-12)
    rooms = [c["y"] for c in result["candidates"]]
    # the room rises and then falls along the sweep (E6: 0.47, 0.68, 1, 1.5, 2.2): the
    # largest x2 is no longer the best of the column
    assert rooms.index(max(rooms)) not in (0, len(rooms) - 1)
    assert rooms[-1] < 0.0  # its 99.9 % point lies above 7 V
