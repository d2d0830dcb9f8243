"""Tests of tolerance.worstcase: EVA, RSS, bounded optimisation and tolerance budgets."""

from __future__ import annotations

import itertools
import math
import threading

import numpy as np
import pytest

from tolerance.worstcase import (
    Bound,
    _evaluate,
    _Lockstep,
    _optimize,
    _SearchGroup,
    _start_searches,
    combine_tolerances,
    extreme_value,
    optimize_extreme,
    root_sum_square,
    worst_case_table,
)

A0 = 1.5
COEFS = {"r1": 2.0, "r2": -3.0, "r3": 0.5, "r4": -0.25}
# Centred nominals so that the linear band and the vertex extremes coincide.
LINEAR_BOUNDS = [
    Bound("r1", 1.0, 0.9, 1.1),
    Bound("r2", 2.0, 1.5, 2.5),
    Bound("r3", -1.0, -3.0, 1.0),
    Bound("r4", 10.0, 9.0, 11.0),
]


def linear_model(samples):
    y = A0 + sum(c * samples[k] for k, c in COEFS.items())
    return {"y": y, "neg": -y}


def _analytic_linear(bounds):
    nominal = A0 + sum(COEFS[b.name] * b.nominal for b in bounds)
    hi = A0 + sum(max(COEFS[b.name] * b.low, COEFS[b.name] * b.high) for b in bounds)
    lo = A0 + sum(min(COEFS[b.name] * b.low, COEFS[b.name] * b.high) for b in bounds)
    half = [0.5 * (b.high - b.low) for b in bounds]
    rss = np.sqrt(sum((COEFS[b.name] * h) ** 2 for b, h in zip(bounds, half)))
    lin = sum(abs(COEFS[b.name]) * h for b, h in zip(bounds, half))
    return nominal, lo, hi, rss, lin


def test_bound_validation_and_properties():
    b = Bound("r", 1.0, 0.5, 2.0)
    assert b.half_range == 0.75 and not b.fixed
    assert Bound("t", 3.0, 3.0, 3.0).fixed
    with pytest.raises(ValueError):
        Bound("bad", 3.0, 3.5, 4.0)
    with pytest.raises(ValueError):
        Bound("bad", float("nan"), 0.0, 1.0)


def test_linear_model_eva_linear_band_and_rss_are_exact():
    nominal, lo, hi, rss, lin = _analytic_linear(LINEAR_BOUNDS)
    eva = extreme_value(linear_model, LINEAR_BOUNDS)
    band = root_sum_square(linear_model, LINEAR_BOUNDS)
    # exact derivation: for y = a0 + sum a_i x_i the extremes sit at the vertex choosing
    # high for a_i > 0 and low for a_i < 0
    assert eva["y"]["max"] == pytest.approx(hi, abs=1e-12)
    assert eva["y"]["min"] == pytest.approx(lo, abs=1e-12)
    assert eva["y"]["nominal"] == pytest.approx(nominal, abs=1e-12)
    assert eva["y"]["method"] == "full factorial"
    assert eva["y"]["evaluations"] == 2**4 + 1
    # exact derivation: linear model, centred nominals: nominal +- sum |a_i| h_i = EVA extremes
    assert band["y"]["linear_high"] == pytest.approx(hi, abs=1e-9)
    assert band["y"]["linear_low"] == pytest.approx(lo, abs=1e-9)
    # exact derivation: RSS = sqrt(sum (a_i h_i)^2) = sqrt(0.04 + 2.25 + 1 + 0.0625)
    assert rss == pytest.approx(np.sqrt(0.04 + 2.25 + 1.0 + 0.0625), abs=1e-12)
    assert band["y"]["rss_high"] - nominal == pytest.approx(rss, abs=1e-9)
    assert nominal - band["y"]["rss_low"] == pytest.approx(rss, abs=1e-9)
    assert lin == pytest.approx(hi - nominal, abs=1e-12)
    for name, coef in COEFS.items():
        # exact derivation: central differences are exact on a linear function (up to
        # rounding, ~1e-12 relative at step 1e-3 of the half-range)
        assert band["y"]["sensitivities"][name] == pytest.approx(coef, abs=1e-8)
    assert band["y"]["evaluations"] == 2 * 4 + 1


def test_linear_band_with_off_centre_nominal():
    bounds = [Bound("r1", 1.05, 0.9, 1.1), Bound("r2", 1.5, 1.5, 2.5)]
    model = lambda s: {"y": 2.0 * s["r1"] - 3.0 * s["r2"]}  # noqa: E731
    band = root_sum_square(model, bounds)["y"]
    y0 = 2.0 * 1.05 - 3.0 * 1.5
    # exact derivation: each parameter moves from its nominal to the end that lowers or
    # raises y: up by 2 * 0.05 (r1 to 1.1; r2 has no room below 1.5), down by 2 * 0.15 +
    # 3 * 1.0 (r1 to 0.9, r2 to 2.5); the extreme-value corners say the same. Half the range
    # on both sides gave y0 +- 1.7, a band reaching 1.6 above the largest value y takes.
    eva = extreme_value(model, bounds)["y"]
    assert band["linear_high"] == pytest.approx(y0 + 0.1, abs=1e-9)
    assert band["linear_low"] == pytest.approx(y0 - 3.3, abs=1e-9)
    assert [band["linear_low"], band["linear_high"]] == pytest.approx([eva["min"], eva["max"]],
                                                                      abs=1e-9)
    assert band["rss_high"] == pytest.approx(y0 + 0.1, abs=1e-9)
    assert band["rss_low"] == pytest.approx(y0 - np.hypot(0.3, 3.0), abs=1e-9)


def test_full_factorial_finds_exact_corners_d3():
    bounds = [Bound("a", 1.0, 0.5, 2.0), Bound("b", 1.0, 0.8, 1.2), Bound("c", 0.0, -1.0, 1.0)]

    def model(s):
        return {"g": s["a"] * s["b"] + s["c"] ** 3 * s["a"]}

    res = extreme_value(model, bounds)["g"]
    # exact derivation: brute force over the 8 corners with itertools as the reference
    corners = list(itertools.product(*[(b.low, b.high) for b in bounds]))
    values = [a * b + c**3 * a for a, b, c in corners]
    assert res["max"] == pytest.approx(max(values), abs=1e-12)
    assert res["min"] == pytest.approx(min(values), abs=1e-12)
    best = corners[int(np.argmax(values))]
    worst = corners[int(np.argmin(values))]
    assert tuple(res["argmax"][k] for k in "abc") == best
    assert tuple(res["argmin"][k] for k in "abc") == worst
    assert res["evaluations"] == 9


def test_non_monotonic_extreme_missed_by_corners_found_by_optimizer():
    bounds = [Bound("x", 0.8, 0.0, 1.0)]
    model = lambda s: {"y": -((s["x"] - 0.3) ** 2)}  # noqa: E731
    eva = extreme_value(model, bounds)["y"]
    # exact derivation: corners give -(0.3)^2 = -0.09 and -(0.7)^2 = -0.49; the true maximum
    # 0 at x = 0.3 is interior
    assert eva["max"] == pytest.approx(-0.09, abs=1e-12)
    res = optimize_extreme(model, bounds, "y", "max", starts=4, seed=1)
    # exact derivation: maximum of -(x - 0.3)^2 is 0 at x = 0.3
    assert res["value"] == pytest.approx(0.0, abs=1e-8)
    assert res["at"]["x"] == pytest.approx(0.3, abs=1e-4)
    assert res["value"] > eva["max"]
    assert res["starts"] == 4
    assert res["evaluations"] > eva["evaluations"]


def test_two_parameter_interior_maximum_and_fixed_parameter():
    seen = []

    def model(s):
        seen.append(np.asarray(s["k"]).copy())
        y = s["k"] * np.sin(np.pi * s["x"]) * np.sin(np.pi * s["z"] / 2.0)
        return {"y": y}

    bounds = [Bound("x", 0.1, 0.0, 1.0), Bound("z", 1.9, 0.0, 2.0), Bound("k", 2.0, 2.0, 2.0)]
    eva = extreme_value(model, bounds)["y"]
    # exact derivation: every corner has sin(0) or sin(pi) = 0 in a factor, so y = 0
    assert eva["max"] == pytest.approx(0.0, abs=1e-12)
    res = optimize_extreme(model, bounds, "y", "max", starts=6, seed=3)
    # exact derivation: maximum 2 * 1 * 1 = 2 at x = 0.5, z = 1
    assert res["value"] == pytest.approx(2.0, abs=1e-8)
    assert res["at"]["x"] == pytest.approx(0.5, abs=1e-4)
    assert res["at"]["z"] == pytest.approx(1.0, abs=1e-4)
    assert res["at"]["k"] == 2.0
    root_sum_square(model, bounds)
    # The RSS batch perturbs even fixed parameters to report their sensitivity, so only
    # EVA/optimizer batches (all but the last) must keep k exactly at nominal.
    assert all(np.all(batch == 2.0) for batch in seen[:-1])


def test_fixed_parameters_stay_at_nominal_in_eva_and_contribute_nothing_to_rss():
    seen = []

    def model(s):
        seen.append(s["fixed"].copy())
        return {"y": 3.0 * s["a"] + 100.0 * s["fixed"]}

    bounds = [Bound("a", 1.0, 0.0, 2.0), Bound("fixed", 0.7, 0.7, 0.7)]
    eva = extreme_value(model, bounds)["y"]
    assert np.all(seen[0] == 0.7)
    assert eva["evaluations"] == 3  # nominal + 2 vertices of the single varying parameter
    assert eva["argmax"] == {"a": 2.0, "fixed": 0.7}
    band = root_sum_square(model, bounds)["y"]
    # exact derivation: only a varies, h = 1, dy/da = 3, so both bands are nominal +- 3
    assert band["rss_high"] - band["nominal"] == pytest.approx(3.0, abs=1e-9)
    assert band["linear_low"] == pytest.approx(band["nominal"] - 3.0, abs=1e-9)
    # exact derivation: dy/dfixed = 100 (step relative to |nominal|)
    assert band["sensitivities"]["fixed"] == pytest.approx(100.0, abs=1e-6)


def test_sensitivity_directed_path_is_exact_on_linear_model():
    d = 14
    rng = np.random.default_rng(0)
    coefs = rng.normal(size=d)
    coefs[3] = 0.0  # a parameter without influence
    bounds = [Bound(f"p{i}", 0.0, -1.0 - i * 0.1, 1.0 + i * 0.05) for i in range(d)]

    def model(s):
        y = sum(c * s[f"p{i}"] for i, c in enumerate(coefs))
        return {"y": y, "w": -2.0 * y}

    res = extreme_value(model, bounds, max_factorial=12)
    hi = sum(max(c * b.low, c * b.high) for c, b in zip(coefs, bounds))
    lo = sum(min(c * b.low, c * b.high) for c, b in zip(coefs, bounds))
    assert res["y"]["method"] == "sensitivity-directed"
    # exact derivation: linear model, extremes at the sign-selected vertices
    assert res["y"]["max"] == pytest.approx(hi, abs=1e-10)
    assert res["y"]["min"] == pytest.approx(lo, abs=1e-10)
    # exact derivation: w = -2 y, so max w = -2 min y
    assert res["w"]["max"] == pytest.approx(-2.0 * lo, abs=1e-10)
    # 2d + 1 finite-difference points, then nominal plus 2 vertices shared by both metrics,
    # then one round of single flips from each of the two (none improves a linear model)
    assert res["y"]["evaluations"] == 2 * d + 1 + 3 + 2 * d
    # Fixing four parameters leaves d = 10 <= 12 varying: back to the full factorial.
    fewer = bounds[:10] + [Bound(b.name, 0.0, 0.0, 0.0) for b in bounds[10:]]
    full = extreme_value(model, fewer, max_factorial=12)
    assert full["y"]["method"] == "full factorial"


def test_single_flips_find_a_corner_whose_signs_differ_from_nominals():
    # y = x1 - 2 x1 x2 + 0.1 x2 on [-1, 1]^2: at nominal (0, 0) both sensitivities are
    # positive, so the directed vertex (1, 1) gives -0.9; worked by hand over the four
    # corners, (1, 1) -0.9, (1, -1) 2.9, (-1, 1) 1.1, (-1, -1) -3.1, the maximum is 2.9 at
    # (1, -1), one flip away, and the minimum -3.1 at (-1, -1). An audit found the engine-bay
    # pair's hottest corner 1.9 K above the directed one in the same way.
    bounds = [Bound("x1", 0.0, -1.0, 1.0), Bound("x2", 0.0, -1.0, 1.0)]

    def model(s):
        return {"y": s["x1"] - 2.0 * s["x1"] * s["x2"] + 0.1 * s["x2"]}

    res = extreme_value(model, bounds, max_factorial=1)
    assert res["y"]["method"] == "sensitivity-directed"
    assert res["y"]["max"] == pytest.approx(2.9, abs=1e-12)
    assert res["y"]["argmax"] == {"x1": 1.0, "x2": -1.0}
    assert res["y"]["min"] == pytest.approx(-3.1, abs=1e-12)
    without = extreme_value(model, bounds, max_factorial=1, max_rounds=0)
    assert without["y"]["max"] == pytest.approx(-0.9, abs=1e-12)


def test_nan_vertices_are_dropped_and_counted():
    def model(s):
        y = s["a"] + s["b"]
        return {"y": np.where((s["a"] == 1.0) & (s["b"] == 1.0), np.nan, y)}

    bounds = [Bound("a", 0.5, 0.0, 1.0), Bound("b", 0.5, 0.0, 1.0)]
    res = extreme_value(model, bounds)["y"]
    assert res["dropped"] == 1
    # exact derivation: remaining corners give 0, 1, 1
    assert res["max"] == 1.0 and res["min"] == 0.0


def test_optimizer_survives_nan_region():
    def model(s):
        return {"y": np.where(s["x"] > 0.9, np.nan, s["x"] * (1.0 - s["z"]))}

    bounds = [Bound("x", 0.5, 0.0, 1.0), Bound("z", 0.5, 0.0, 1.0)]
    res = optimize_extreme(model, bounds, "y", "max", starts=5, seed=2)
    assert np.isfinite(res["value"])
    assert res["at"]["x"] <= 0.9
    # exact derivation: feasible values are x (1 - z) <= 0.9 for x <= 0.9; nominal gives 0.25
    assert 0.25 <= res["value"] <= 0.9


def test_a_metric_infinite_everywhere_has_infinite_corners_and_no_band_without_a_warning():
    # a stress beyond its rating's temperature range is infinite at every point: inf - inf in
    # the central differences printed a RuntimeWarning on the worst-case command's terminal
    # (the test run turns warnings into errors, so this test fails on it)
    def model(s):
        return {"y": s["a"] + s["b"], "stress": np.full(np.shape(s["a"]), np.inf)}

    bounds = [Bound("a", 0.5, 0.0, 1.0), Bound("b", 0.5, 0.0, 1.0)]
    table = worst_case_table(model, bounds, ["y", "stress"], seed=1, optimize_metrics=["y"])
    # exact: y = a + b over the unit square
    assert table["y"]["eva_max"] == pytest.approx(2.0) and table["y"]["eva_min"] == 0.0
    # the corners' value is infinite (a stress past its rating fails any limit), not dropped
    # as unsolved; the sensitivities behind the RSS band do not exist
    assert np.isnan(table["stress"]["rss_high"]) and table["stress"]["eva_max"] == np.inf
    assert table["stress"]["eva_dropped"] == 0


def test_dropped_counts_unsolved_corners_not_undefined_figures():
    # a figure the stage does not define (NaN at a solved point) is no unsolved corner;
    # a point the model did not solve is (common practice, no source)
    from tolerance.worstcase import SOLVED, extreme_value

    def model(s):
        a = s["a"]
        return {"y": a + s["b"], "undefined": np.full(a.shape, np.nan), SOLVED: a < 0.9}

    bounds = [Bound("a", 0.5, 0.0, 1.0), Bound("b", 0.5, 0.0, 1.0)]
    eva = extreme_value(model, bounds)
    assert set(eva) == {"y", "undefined"}
    # the corners with a = 1 (two of four) are unsolved, for every metric
    assert eva["y"]["dropped"] == 2 and eva["undefined"]["dropped"] == 2
    assert eva["y"]["max"] == pytest.approx(1.0)  # a = 0, b = 1; the unsolved a = 1 is out
    solved = extreme_value(lambda s: {**model(s), SOLVED: np.ones(s["a"].shape, bool)},
                           bounds)
    assert solved["undefined"]["dropped"] == 0 and np.isnan(solved["undefined"]["max"])


def test_worst_case_table_combines_methods():
    mc = {"y": {"min": -1.0, "max": 2.0, "p001": -0.9, "p999": 1.9}}
    table = worst_case_table(linear_model, LINEAR_BOUNDS, ["y"], mc_extremes=mc, seed=5)
    row = table["y"]
    nominal, lo, hi, rss, _ = _analytic_linear(LINEAR_BOUNDS)
    # exact derivation: linear model, see _analytic_linear
    assert row["eva_max"] == pytest.approx(hi, abs=1e-12)
    assert row["rss_low"] == pytest.approx(nominal - rss, abs=1e-9)
    # exact derivation: on a linear model the bounded optimum is the EVA vertex
    assert row["opt_max"] == pytest.approx(hi, abs=1e-9)
    assert row["opt_min"] == pytest.approx(lo, abs=1e-9)
    assert row["opt_argmin"] == row["eva_argmin"]
    assert row["mc_p999"] == 1.9 and row["mc_min"] == -1.0
    assert table["evaluations"] > (2**4 + 1) + (2 * 4 + 1)
    again = worst_case_table(linear_model, LINEAR_BOUNDS, ["y"], mc_extremes=mc, seed=5)
    assert again == table


def test_a_sense_left_out_changes_no_other_search():
    # worst_case_table's promise: a search's seed depends on its metric's place and its
    # sense only, so searching a metric on one side gives that side exactly as searching
    # both (a non-linear model whose maximum lies inside the box, where the starts matter)
    bounds = [Bound("x", 1.0, 0.0, 2.0), Bound("z", 0.5, 0.0, 1.0)]

    def model(samples):
        x, z = samples["x"], samples["z"]
        return {"y": np.sin(3 * x) * np.cos(2 * z) + 0.1 * x}

    both = worst_case_table(model, bounds, ["y"], seed=4, starts=3, maxiter=40)["y"]
    one = worst_case_table(model, bounds, ["y"], seed=4, starts=3, maxiter=40,
                           optimize_senses={"y": ("max",)})["y"]
    assert one["opt_max"] == both["opt_max"] and one["opt_argmax"] == both["opt_argmax"]
    assert one["opt_min"] is None and both["opt_min"] is not None
    assert 0.0 < both["opt_argmax"]["x"] < 2.0  # inside the box


def test_worst_case_table_takes_a_metric_no_sample_produced():
    # found by fuzzing the command line: with 2 Monte Carlo samples the unclamped valve's
    # transition fraction was NaN in both, so the summary's extremes are None; the table
    # shows them as NaN instead of raising (common practice, no source)
    mc = {"y": {"min": None, "max": None, "p001": None, "p999": None}}
    row = worst_case_table(linear_model, LINEAR_BOUNDS, ["y"], mc_extremes=mc, seed=5)["y"]
    assert all(math.isnan(row["mc_" + k]) for k in ("min", "max", "p001", "p999"))
    assert math.isfinite(row["eva_max"])


def test_combine_tolerances_arithmetic():
    # exact derivation: 1 % + 0.5 % + 0.2 % = 1.7 %
    assert combine_tolerances(0.01, 0.005, 0.002) == pytest.approx(0.017, abs=1e-15)
    # exact derivation: sqrt(1e-4 + 2.5e-5 + 4e-6) = sqrt(1.29e-4)
    assert combine_tolerances(0.01, 0.005, 0.002, method="rss") == pytest.approx(
        np.sqrt(1.29e-4), abs=1e-15
    )
    # exact derivation: signs of drifts do not reduce a worst-case budget
    assert combine_tolerances(0.01, -0.005, method="linear") == pytest.approx(0.015, abs=1e-15)
    # exact derivation: 3-4-5 triangle
    assert combine_tolerances(0.03, 0.04, method="rss") == pytest.approx(0.05, abs=1e-15)
    with pytest.raises(ValueError):
        combine_tolerances(0.01, method="sum")


# Non-monotonic metrics of four varying parameters and a fixed one, elementwise over samples
# (every sample's value is independent of the batch it is in), so the searches differ in
# length and some extremes lie inside the box.
WAVY_BOUNDS = [
    Bound("a", 0.4, 0.0, 1.0),
    Bound("b", 0.0, -1.0, 1.0),
    Bound("c", 1.0, 0.5, 2.0),
    Bound("g", 3.0, 3.0, 3.0),
    Bound("e", 0.2, -1.0, 1.0),
]
WAVY_METRICS = ["ripple", "bowl", "ratio"]


def wavy_model(s):
    a, b, c, g, e = s["a"], s["b"], s["c"], s["g"], s["e"]
    return {
        "ripple": np.sin(g * a) * np.cos(2.0 * b) + (c - 1.2) ** 2 - 0.3 * e,
        "bowl": (a - 0.3) ** 2 + np.exp(b * c) - (e - 0.1) ** 2,
        "ratio": a * b / (1.0 + c**2) + e**3 - 0.5 * e,
    }


class CountingModel:
    """Wraps a model; counts its calls and the largest batch it was given."""

    def __init__(self, model, fail_on=None):
        self.model = model
        self.fail_on = fail_on
        self.calls = 0
        self.largest = 0

    def __call__(self, samples):
        self.calls += 1
        if self.calls == self.fail_on:
            raise ModelFailure(f"model failed on call {self.calls}")
        self.largest = max(self.largest, len(next(iter(samples.values()))))
        return self.model(samples)


class ModelFailure(RuntimeError):
    pass


def _groups(seed, starts, metrics=WAVY_METRICS):
    """The search groups worst_case_table builds: same child seeds and vertex starts."""
    eva = extreme_value(wavy_model, WAVY_BOUNDS, metrics)
    children = np.random.SeedSequence(seed).spawn(2 * len(metrics))
    return [
        _SearchGroup(
            m, sense, starts, np.random.default_rng(children[2 * k + j]), eva[m]["arg" + sense]
        )
        for k, m in enumerate(metrics)
        for j, sense in enumerate(("min", "max"))
    ]


def _sequential(model, group, maxiter):
    """Every start of one group run alone, one after the other, without threads; one
    running best over all starts (first strictly better value kept)."""
    searches = _start_searches(WAVY_BOUNDS, group)
    best = {"f": np.inf, "y": float("nan"), "x": np.array([b.nominal for b in WAVY_BOUNDS])}
    calls = []
    for search in searches:
        before = model.calls
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            search.run(lambda xs: _evaluate(model, WAVY_BOUNDS, xs, [group.metric])[0][
                group.metric], maxiter)
        calls.append(model.calls - before)
        if search.best_f < best["f"]:
            best.update(f=search.best_f, y=search.best_y, x=search.best_x)
    at = {b.name: float(v) for b, v in zip(WAVY_BOUNDS, best["x"])}
    evaluations = sum(s.evaluations for s in searches)
    return {"value": best["y"], "at": at, "evaluations": evaluations, "calls": calls}


def test_lockstep_table_equals_searches_run_one_after_the_other():
    seed, starts, maxiter = 11, 4, 40
    model = CountingModel(wavy_model)
    table = worst_case_table(model, WAVY_BOUNDS, WAVY_METRICS, seed=seed, starts=starts,
                             maxiter=maxiter)
    d = 4  # varying parameters
    # common practice, no source: the lockstep batches really mixed several searches' blocks
    assert model.largest > d + 1
    eva_rss = (2**d + 1) + (2 * len(WAVY_BOUNDS) + 1)
    total = eva_rss
    # two sets of groups: drawing the random starts consumes a group's generator
    for group, fresh in zip(_groups(seed, starts), _groups(seed, starts)):
        alone = _sequential(CountingModel(wavy_model), group, maxiter)
        single = _optimize(wavy_model, WAVY_BOUNDS, fresh.metric, fresh.sense, starts,
                           fresh.rng, maxiter, fresh.vertex)
        row = table[group.metric]
        # common practice, no source: each search's points depend only on its own values and
        # the model is evaluated per sample, so lockstep and sequential runs agree exactly
        assert row["opt_" + group.sense] == alone["value"] == single["value"]
        assert row["opt_arg" + group.sense] == alone["at"] == single["at"]
        # common practice, no source: per-start sample counts do not depend on batching
        assert single["evaluations"] == alone["evaluations"]
        assert single["starts"] == len(alone["calls"]) == starts
        total += alone["evaluations"]
    # common practice, no source: the reported total is the sequential total
    assert table["evaluations"] == total


def test_lockstep_needs_the_calls_of_the_longest_start_not_their_sum():
    seed, starts, maxiter = 11, 3, 40
    model = CountingModel(wavy_model)
    worst_case_table(model, WAVY_BOUNDS, WAVY_METRICS, seed=seed, starts=starts,
                     maxiter=maxiter)
    per_start = []
    for group in _groups(seed, starts):
        per_start.extend(_sequential(CountingModel(wavy_model), group, maxiter)["calls"])
    assert len(per_start) == len(WAVY_METRICS) * 2 * starts
    # common practice, no source: one EVA batch, one RSS batch, then one model call per
    # lockstep round, and every live start submits once per round, so the rounds are the
    # objective calls of the longest start
    assert model.calls == 2 + max(per_start)
    # common practice, no source: far below the sequential count, 2 + the sum over starts
    assert 3 * model.calls < 2 + sum(per_start)
    single = CountingModel(wavy_model)
    group = _groups(seed, starts)[0]
    _optimize(single, WAVY_BOUNDS, group.metric, group.sense, starts, group.rng, maxiter,
              group.vertex)
    # common practice, no source: one group alone also needs the calls of its longest start
    assert single.calls == max(per_start[:starts])


def _run_in_thread(fn):
    """Run fn in a helper thread with a deadline, so a hang fails the test instead."""
    outcome = {}

    def body():
        try:
            outcome["value"] = fn()
        except BaseException as exc:  # noqa: BLE001 - inspected by the test
            outcome["error"] = exc

    helper = threading.Thread(target=body, daemon=True)
    helper.start()
    helper.join(timeout=60.0)
    return helper, outcome


def test_model_error_during_lockstep_search_reaches_the_caller_and_stops_all_threads():
    before = threading.active_count()
    # calls 1 and 2 are the EVA and RSS batches; call 4 is the searches' second round
    model = CountingModel(wavy_model, fail_on=4)
    helper, outcome = _run_in_thread(
        lambda: worst_case_table(model, WAVY_BOUNDS, WAVY_METRICS, seed=3, starts=3)
    )
    # common practice, no source: the run ended (no search left waiting forever)
    assert not helper.is_alive()
    # common practice, no source: the model's own exception reaches the caller
    assert isinstance(outcome.get("error"), ModelFailure)
    assert "call 4" in str(outcome["error"])
    # common practice, no source: every search thread was unwound and joined
    assert threading.active_count() == before


class _EndlessSearch:
    """Asks for the same point forever; only an abandoned run can stop it."""

    metric = "ripple"

    def run(self, evaluate, maxiter):
        while True:
            evaluate(np.array([[b.nominal for b in WAVY_BOUNDS]]))


class _FailingSearch:
    metric = "bowl"

    def run(self, evaluate, maxiter):
        evaluate(np.array([[b.nominal for b in WAVY_BOUNDS]]))
        raise ArithmeticError("search failed after one round")


def test_exception_in_a_search_thread_reaches_the_caller_and_unwinds_the_others():
    before = threading.active_count()
    model = CountingModel(wavy_model)
    searches = [_EndlessSearch(), _FailingSearch(), _EndlessSearch()]
    helper, outcome = _run_in_thread(lambda: _Lockstep(model, WAVY_BOUNDS, searches).run(10))
    # common practice, no source: the endless searches were unwound, the run ended
    assert not helper.is_alive()
    # common practice, no source: the search thread's exception is re-raised in the caller
    assert isinstance(outcome.get("error"), ArithmeticError)
    # common practice, no source: a failing search is live until it has failed, so the
    # coordinator sees the error before it can start a second round
    assert model.calls == 1
    # common practice, no source: no search thread is left running
    assert threading.active_count() == before


# --- discrete sets --------------------------------------------------------------------------


def test_a_discrete_set_validates_its_members():
    b = Bound("d", 0.65, 0.65, 2.0, (0.65, 2.0))
    assert b.discrete and b.values == (0.65, 2.0)
    assert not Bound("d", 2.0, 2.0, 2.0, (2.0,)).discrete  # one member: fixed
    for values in [(2.0, 0.65), (0.65, 1.0), (0.7, 2.0), (0.65, 0.65, 2.0), ()]:
        with pytest.raises(ValueError, match="discrete set"):
            Bound("d", 0.65, 0.65, 2.0, values)
    with pytest.raises(ValueError, match="nominal among"):
        Bound("d", 1.0, 0.65, 2.0, (0.65, 2.0))


def _bump(samples):
    # exact derivation: between the members 0 and 3 the bump -(d - 1.5)^2 peaks at 0 with
    # d = 1.5, which no unit takes; at the members it is -2.25, and x adds 0 .. 1
    d, x = samples["d"], samples["x"]
    return {"y": -((d - 1.5) ** 2) + x, "z": d + x}


def test_the_optimizer_searches_a_discrete_parameter_at_its_members_only():
    bounds = [Bound("d", 0.0, 0.0, 3.0, (0.0, 3.0)), Bound("x", 0.5, 0.0, 1.0)]
    res = optimize_extreme(_bump, bounds, "y", "max", starts=3, seed=2)
    # exact derivation (see _bump): the largest y a unit can have is -2.25 + 1 at either
    # member; the continuous range would give 1 at d = 1.5
    assert res["value"] == pytest.approx(-1.25, abs=1e-9)
    assert res["at"]["d"] in (0.0, 3.0) and res["at"]["x"] == pytest.approx(1.0)
    # one search group's starts at each member
    assert res["starts"] == 2 * 3
    plain = optimize_extreme(_bump, [Bound("d", 0.0, 0.0, 3.0), bounds[1]], "y", "max",
                             starts=3, seed=2)
    assert plain["value"] == pytest.approx(1.0, abs=1e-6)


def test_the_bands_of_a_discrete_parameter_take_its_changes_to_the_set_ends():
    bounds = [Bound("d", 0.0, 0.0, 3.0, (0.0, 3.0)), Bound("x", 0.5, 0.0, 1.0)]
    rss = root_sum_square(_bump, bounds, ["y", "z"])
    # exact derivation: y changes by 0 towards d = 0 (the nominal) and by 0 towards d = 3
    # (-2.25 both), so d adds nothing; x moves y = -1.75 by -0.5 / +0.5
    assert rss["y"]["linear_low"] == pytest.approx(-2.25, abs=1e-9)
    assert rss["y"]["linear_high"] == pytest.approx(-1.25, abs=1e-9)
    # z = d + x: the set's high end adds 3, its low end (the nominal) nothing
    assert rss["z"]["linear_high"] == pytest.approx(0.5 + 3.0 + 0.5, abs=1e-9)
    assert rss["z"]["rss_high"] == pytest.approx(0.5 + math.hypot(3.0, 0.5), abs=1e-9)
    assert rss["z"]["linear_low"] == pytest.approx(0.0, abs=1e-9)
    assert rss["z"]["sensitivities"]["d"] == pytest.approx(1.0)  # the secant
    eva = extreme_value(_bump, bounds, ["y"])["y"]
    assert eva["max"] == pytest.approx(-1.25) and eva["argmax"]["d"] in (0.0, 3.0)


def test_many_discrete_combinations_fall_back_to_each_sets_ends_and_nominal():
    from tolerance.worstcase import MAX_DISCRETE_COMBINATIONS, discrete_combinations

    five = tuple(float(v) for v in range(5))
    bounds = [Bound(f"d{k}", 2.0, 0.0, 4.0, five) for k in range(3)]
    combos, complete = discrete_combinations(bounds)
    assert 5**3 > MAX_DISCRETE_COMBINATIONS and not complete
    assert len(combos) == 27 and set(itertools.chain(*combos)) == {0.0, 2.0, 4.0}
    combos, complete = discrete_combinations(bounds[:2])
    assert complete and len(combos) == 25
