"""Documented rules of sampling, distributions, runner, value choice, drive and what-if."""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special
from scipy import stats as sps

from tolerance import distributions as dist
from tolerance import runner, sampling
from tolerance.api import demo_text, load_study, make_spec
from tolerance.choose import default_tradeoff, frontier, pick_best, robust_margin
from tolerance.protocol import Criterion, MetricInfo, Parameter
from tolerance.runner import Override
from tolerance.study import StudyError
from tolerance.whatif import parse_pins, pin_notes

LINEAR = """
stage = "linear_test"
title = "linear"
[run]
samples = 200
seed = 3
sampler = "random"
[inputs]
x1 = {{min = "-1 V", max = "3 V"}}
x2 = {{nominal = "1 V", tolerance = "30%", distribution = "{x2}"}}
"""


def correlated(coefficient: float) -> str:
    return (f'[[correlation]]\nparameters = ["x1", "x2"]\n'
            f"coefficient = {coefficient}\n")


# --- sampling: pins and their partners -------------------------------------------------------

def test_a_partner_pushed_to_a_negative_mean_score_counts_its_units_below_minus_three():
    # one pin at the low end of a uniform (score -3), a partner correlated at 0.9 and a
    # third parameter correlated with neither. Conditional normal (Anderson, theorem 2.5.1,
    # from memory), hand calculation: mean 0.9 * (-3) = -2.7, variance 1 - 0.81 = 0.19
    params = [Parameter(n, "ohm", dist.Uniform(1.0, 2.0)) for n in ("RB", "RPD", "load")]
    c = np.array([[1.0, 0.0, 0.9], [0.0, 1.0, 0.0], [0.9, 0.0, 1.0]])
    t = sampling.pin_tension(params, c, {"RB": 1.0})
    assert set(t["partners"]) == {"load"}
    load = t["partners"]["load"]
    # hand calculation: mean -2.7, sd sqrt(0.19)
    assert_allclose(load["mean"], -2.7, rtol=1e-12)
    assert_allclose(load["sd"], np.sqrt(0.19), rtol=1e-12)
    # share of N(-2.7, 0.19) beyond a score of 3 in size, both tails (scipy.stats.norm as
    # reference): about 0.246, nearly all of it below -3
    ref = sps.norm(-2.7, np.sqrt(0.19))
    assert_allclose(load["beyond"], ref.cdf(-3.0) + ref.sf(3.0), rtol=1e-9)
    assert load["beyond"] > 0.2


def test_a_partner_far_below_minus_three_lies_almost_wholly_beyond_its_tolerance():
    # the pins of tests/test_engine.py's pin-tension case swapped, RB at -3 and RPD at +3:
    # hand calculation (S_PP^-1 = [[1, -0.9], [-0.9, 1]] / 0.19, gain = [0.27, -0.11] /
    # 0.19): the load's mean score is -3 (0.27 + 0.11) / 0.19 = -6.0
    params = [Parameter(n, "ohm", dist.Uniform(1.0, 2.0)) for n in ("RB", "RPD", "load")]
    c = np.array([[1.0, 0.9, 0.9], [0.9, 1.0, 0.7], [0.9, 0.7, 1.0]])
    load = sampling.pin_tension(params, c, {"RB": 1.0, "RPD": 2.0})["partners"]["load"]
    assert_allclose(load["mean"], -6.0, rtol=1e-12)
    # scipy.special.ndtr as reference: Phi((m - 3) / sd) + Phi((-3 - m) / sd)
    m, sd = load["mean"], load["sd"]
    assert_allclose(load["beyond"], special.ndtr((m - 3) / sd) + special.ndtr((-3 - m) / sd),
                    rtol=1e-12)
    # hand calculation: sd = sqrt(0.126), 3 / sd = 8.4 standard deviations inside -3
    assert load["beyond"] > 0.999


# --- distributions ---------------------------------------------------------------------------

def test_the_nominal_of_an_even_count_of_equally_likely_values_is_the_lower_middle():
    kelvin = [t + 273.15 for t in (-25.0, 0.0, 25.0, 55.0)]
    d = dist.Discrete(tuple(kelvin), (1.0, 1.0, 1.0, 1.0))
    # definition in the docstring of Discrete.nominal: of equally likely values the middle
    # one in size, the lower middle of an even count: 0 degC
    assert d.nominal == pytest.approx(273.15, abs=1e-9)
    # the same set listed out of order keeps that nominal (docstring: not the first listed)
    shuffled = dist.Discrete(tuple(kelvin[k] for k in (3, 1, 0, 2)), (1.0, 1.0, 1.0, 1.0))
    assert shuffled.nominal == pytest.approx(273.15, abs=1e-9)


def test_a_screened_lognormal_draws_the_populations_units_inside_the_screen():
    # a 40 .. 250 gain class (typical 100) screened to 50 .. 250
    d = dist.ScreenedLogNormal(40.0, 250.0, 100.0, 50.0, 250.0)
    pop = dist.LogNormal(40.0, 250.0, 100.0)
    a, b = float(pop.cdf(np.array(50.0))), float(pop.cdf(np.array(250.0)))
    # definition in the docstring of ScreenedLogNormal: the passed units in their
    # proportions, so its quantile u is the population's at a + (b - a) u, with a and b the
    # population's CDF at the screen limits (about 53.9 at u = 0.01)
    u = np.array([0.01, 0.25, 0.5, 0.9])
    assert_allclose(d.ppf(u), pop.ppf(a + (b - a) * u), rtol=1e-12)
    assert 53.0 < float(d.ppf(np.array(0.01))) < 55.0
    # common practice, no source: a continuous spread puts no unit exactly on a limit; none
    # of many draws sits on the lower screen limit, and all lie inside the screen
    draws = d.ppf(np.random.default_rng(4).random(20_000))
    assert np.count_nonzero(draws == 50.0) == 0
    assert draws.min() > 50.0 and draws.max() <= 250.0


# --- runner ----------------------------------------------------------------------------------

def test_a_run_with_fewer_chunks_removes_the_chunks_of_the_earlier_plan(write_study, tmp_path):
    study = load_study(write_study(LINEAR.format(x2="normal")))
    folder = tmp_path / "samples.parquet"
    runner.execute(make_spec(study, samples=30), 10, folder=folder)
    assert len(runner.chunk_files(folder)) == 3
    # the same folder again with a plan of two chunks
    runner.execute(make_spec(study, samples=20), 10, folder=folder)
    # definition in the docstring of runner.execute: the folder holds the run's samples, so
    # a chunk left from the earlier plan is no part of it
    assert len(runner.chunk_files(folder)) == 2
    samples = runner.read_samples(folder)
    assert len(samples) == 20
    assert np.array_equal(samples["sample"].to_numpy(), np.arange(20))


def test_a_scale_override_leaves_the_correlated_partner_untouched(write_study):
    study = load_study(write_study(LINEAR.format(x2="normal") + correlated(0.9)))
    base = runner.chunk_columns(make_spec(study, samples=500), 0, 500)
    scaled = runner.chunk_columns(
        make_spec(study, samples=500, overrides={"x2": Override("scale", 1.0)}), 0, 500)
    # definition in the docstring of runner.Override: a scaled part keeps its relative
    # deviation and the candidates share their random numbers; only a pin conditions its
    # partners (chunk_columns), so the partner's column is the run's own, bit for bit
    assert np.array_equal(scaled["x1"], base["x1"])
    # scaling by one is the identity on the scaled parameter too
    assert np.array_equal(scaled["x2"], base["x2"])


def test_a_missing_single_sample_between_chunks_is_reported(write_study, tmp_path):
    study = load_study(write_study(LINEAR.format(x2="normal")))
    spec = make_spec(study, samples=20)
    folder = tmp_path / "samples.parquet"
    folder.mkdir()
    runner.run_chunk_to_file(spec, 0, 0, 10, str(folder))
    runner.run_chunk_to_file(spec, 1, 11, 20, str(folder))
    # definition in the docstring of runner.summary_mismatch: samples no chunk holds are
    # named; chunks 0..10 and 11..20 (stop exclusive) leave sample 10 out
    assert runner.summary_mismatch(folder, {"samples": 20}) == (
        "no chunk holds samples 10 to 10 (a file removed?)")
    # hand calculation: adjoining chunks 0..10 and 10..20 hold every sample
    runner.run_chunk_to_file(spec, 1, 10, 20, str(folder))
    assert runner.summary_mismatch(folder, {"samples": 20}) is None


# --- value choice ----------------------------------------------------------------------------

def test_the_room_to_a_maximum_is_read_at_the_99_9_percent_point():
    study = SimpleNamespace(criteria=[Criterion("hot", "stress", maximum=10.0)])
    summary = {"metrics": {"stress": {"std": 1.0, "p99": 8.0, "p999": 9.0, "p001": 2.0}}}
    # definition in the docstring of choose.robust_margin, hand calculation:
    # (max - p999) / std = (10 - 9) / 1 = 1.0
    assert robust_margin(study, summary) == pytest.approx(1.0)


def test_the_room_to_a_minimum_is_read_at_the_0_1_percent_point():
    study = SimpleNamespace(criteria=[Criterion("sat", "margin", minimum=1.5)])
    summary = {"metrics": {"margin": {"std": 0.5, "p01": 2.5, "p001": 2.0, "p999": 4.0}}}
    # definition in the docstring of choose.robust_margin, hand calculation:
    # (p001 - min) / std = (2.0 - 1.5) / 0.5 = 1.0
    assert robust_margin(study, summary) == pytest.approx(1.0)


def test_a_tie_between_candidates_goes_to_the_value_nearest_nominal_in_ratio():
    study = SimpleNamespace(criteria=[], parameter=lambda name: SimpleNamespace(nominal=1000.0))

    def cand(value):
        return {"values": {"RB": value}, "yield": 1.0, "ci_low": 0.99,
                "robust_margin": math.nan}

    # definition in the docstring of choose.pick_best (the value nearest the nominal), hand
    # calculation of the distance |ln(v / nominal)|: |ln 1.1| = 0.095 < |ln 0.82| = 0.198
    assert pick_best(study, [cand(820.0), cand(1100.0)], ["RB"]) == 1
    assert pick_best(study, [cand(1100.0), cand(820.0)], ["RB"]) == 0


def test_candidates_with_identical_tradeoff_figures_both_stay_on_the_frontier():
    pts = [{"a": 2.0, "b": 4.0}, {"a": 2.0, "b": 4.0}, {"a": 1.0, "b": 3.0}]
    # definition in the docstring of choose.frontier (non-dominated points): a point equal to
    # another on both figures is not beaten by it; the third is beaten on both
    assert frontier(pts, "a", "b", 1, 1) == [0, 1]
    assert frontier(pts[:2], "a", "b", -1, -1) == [0, 1]


def test_a_tie_in_the_default_tradeoff_keeps_the_criteria_order():
    criteria = [Criterion("sat", "margin", minimum=1.2), Criterion("hot", "stress", maximum=1.0),
                Criterion("amps", "peak", maximum=1.0)]
    study = SimpleNamespace(criteria=criteria, stage=SimpleNamespace(
        metrics={m: MetricInfo("1", m) for m in ("margin", "stress", "peak")}))

    def summary(end):
        return {"criteria": {c.name: {"rate": 0.0} for c in criteria},
                "metrics": {"margin": {"p001": 2.0}, "stress": {"p999": end},
                            "peak": {"p999": end}}}

    # no failures and the same span of the robust end relative to the same limit: a tie,
    # which goes to the earlier metric (definition in the docstring of
    # choose.default_tradeoff: "ties keep the criteria's order")
    assert default_tradeoff(study, [summary(0.2), summary(0.5)]) == ("margin", "stress")


# --- drive -----------------------------------------------------------------------------------

def test_a_logic_low_range_reaching_into_the_logic_high_range_is_refused(write_study):
    text = demo_text().replace('high = {min = "2.9 V", max = "3.3 V"}',
                               'high = {min = "2.0 V", max = "5 V"}').replace(
        'low = {min = "0 V", max = "0.4 V"}', 'low = {min = "0 V", max = "2.5 V"}')
    # definition in the docstring of models.drive.read_drive: a low level that is not below
    # the high level is refused; the low range's top (2.5 V) lies above the high range's
    # bottom (2 V)
    with pytest.raises(StudyError, match=r"drive\.low: the logic-low range \(up to 2\.5 V\) "
                                         r"must lie below the logic-high range \(from 2 V\)"):
        load_study(write_study(text))


def test_a_drive_edge_over_five_percent_of_the_pwm_period_is_refused(write_study):
    def with_edge(edge):
        return demo_text().replace(
            'source_resistance = {min = "20 ohm", max = "60 ohm"}',
            'source_resistance = {min = "20 ohm", max = "60 ohm"}\nfrequency = "100 kHz"\n'
            f'edge_time = "{edge}"')

    # the rule in models.drive.read_drive ("the drive edges take more than 5 % of the PWM
    # period"), hand calculation: 1 us of a 10 us period is 10 %
    with pytest.raises(StudyError, match=r"drive\.edge_time: the drive edges take more than "
                                         r"5 % of the PWM period"):
        load_study(write_study(with_edge("1 us")))
    # hand calculation: 0.2 us of a 10 us period is 2 %, within the rule
    study = load_study(write_study(with_edge("0.2 us"), "fast.toml"))
    assert study.stage.drive.edge_time == pytest.approx(0.2e-6)


# --- what-if ---------------------------------------------------------------------------------

def test_pins_within_a_deviation_of_the_independent_distance_get_no_note(write_study):
    study = load_study(write_study(LINEAR.format(x2="truncnormal") + correlated(0.3)))
    pins = parse_pins(study, ["x1=max", "x2=min"])  # normal scores +3 and -3
    s = np.array([[1.0, 0.3], [0.3, 1.0]])
    t = np.array([3.0, -3.0])
    # Mahalanobis distance sqrt(t' S^-1 t) (numpy.linalg as reference): about 5.07, above
    # the 3 sqrt(2) = 4.24 of two independent pins at their ends, within one deviation of it
    distance = float(np.sqrt(t @ np.linalg.solve(s, t)))
    assert 3 * math.sqrt(2) < distance < 3 * math.sqrt(2) + 1.0
    tension = sampling.pin_tension(study.parameters, study.correlation_matrix(),
                                   {n: o.value for n, o in pins.items()})
    assert_allclose(tension["distance"], distance, rtol=1e-9)
    # definition in the docstring of whatif.pin_notes: a note above 3 sqrt(k) by more than
    # one standard deviation
    assert pin_notes(study, pins) == []


def test_pins_far_beyond_the_independent_distance_get_a_note(write_study):
    study = load_study(write_study(LINEAR.format(x2="truncnormal") + correlated(0.9)))
    pins = parse_pins(study, ["x1=max", "x2=min"])
    # Mahalanobis distance, hand calculation: sqrt(18 (1 + 0.9) / 0.19) = sqrt(180) = 13.4,
    # beyond 3 sqrt(2) + 1 = 5.24 (definition in the docstring of whatif.pin_notes)
    (note,) = pin_notes(study, pins)
    assert "13.4 standard deviations from the centre jointly" in note


def test_only_a_pass_exits_zero():
    # README, exit status: 0 every limit met, 1 a limit failed or not enough samples to tell
    # (a mutation round: an undecided run exiting 0 passed every test)
    from tolerance.limits import FAIL, PASS, UNDECIDED, exit_status

    assert exit_status(PASS) == 0
    assert exit_status(FAIL) == 1
    assert exit_status(UNDECIDED) == 1


def test_a_candidate_whose_low_end_drops_below_a_gain_of_one_is_refused():
    # the demo's Q1.hfe is 40 .. 100 .. 250 and must stay above 1: a candidate of 2.2 scales
    # it to 0.88 .. 5.5 (hand calculation), whose low end no study file takes; 2.7 gives
    # 1.08 .. 6.75 and is accepted (a mutation round dropped the low end's check unseen)
    from tolerance.api import UsageError
    from tolerance.choose import parse_vary

    demo = load_study(None)
    with pytest.raises(UsageError, match="at an end of its spread"):
        parse_vary(demo, "Q1.hfe=E12:2.2..2.2")
    name, values = parse_vary(demo, "Q1.hfe=E12:2.7..2.7")
    assert name == "Q1.hfe" and list(values) == [2.7]


def test_the_default_tradeoff_weighs_spans_relative_to_their_limits():
    # no failures: the robust ends (p001, each metric has a minimum) span 100 over a limit of
    # 1000 (0.1) and 0.001 over a limit of 0.001 (1.0), so amps moves most relative to its
    # limit (hand calculation; the rule of choose.default_tradeoff's docstring). A mutation
    # round took the limit of the other side unseen: the tie test has maximum-only criteria
    criteria = [Criterion("sat", "margin", minimum=1.2), Criterion("gain", "hfe", minimum=1000.0),
                Criterion("lit", "amps", minimum=0.001)]
    study = SimpleNamespace(criteria=criteria, stage=SimpleNamespace(
        metrics={m: MetricInfo("1", m) for m in ("margin", "hfe", "amps")}))

    def summary(hfe, amps):
        return {"criteria": {c.name: {"rate": 0.0} for c in criteria},
                "metrics": {"margin": {"p001": 2.0}, "hfe": {"p001": hfe},
                            "amps": {"p001": amps}}}

    assert default_tradeoff(study, [summary(1100.0, 0.002), summary(1200.0, 0.003)]) == \
        ("margin", "amps")


def test_a_partner_pushed_beyond_three_by_two_pins_gets_a_note():
    # pins a and b at their low tolerance ends (scores -3 and -3, independent of each other);
    # c correlated 0.7 with each: conditional mean 0.7 (-3) + 0.7 (-3) = -4.2, sd
    # sqrt(1 - 2 x 0.49) = 0.14 (the conditional normal, by hand). A mutation round dropped
    # the abs() of the partner test, and only a partner pushed up was noted
    params = [Parameter(n, "ohm", dist.Normal(100.0, 1.0)) for n in ("a", "b", "c")]
    matrix = np.array([[1.0, 0.0, 0.7], [0.0, 1.0, 0.7], [0.7, 0.7, 1.0]])
    by = {p.name: p for p in params}
    study = SimpleNamespace(parameters=params, correlations=[object()],
                            correlation_matrix=lambda: matrix, parameter=by.__getitem__)
    low = pin_notes(study, {"a": Override("pin", 97.0), "b": Override("pin", 97.0)})
    high = pin_notes(study, {"a": Override("pin", 103.0), "b": Override("pin", 103.0)})
    assert len(low) == 1 and "partner c" in low[0] and "-4.2" in low[0]
    assert len(high) == 1 and "+4.2" in high[0]
