"""Tests for tolerance.stats: binomial intervals, summaries, capability and tail estimates."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from scipy import stats

from tolerance.stats import (
    capability,
    clopper_pearson,
    half_width,
    percentile_summary,
    tail_check,
    tail_estimate,
    zero_failure_upper,
)

# ---------------------------------------------------------------------------------------------
# clopper_pearson / half_width / zero_failure_upper
# ---------------------------------------------------------------------------------------------

_KN = [(0, 1), (1, 1), (0, 10), (3, 10), (10, 10), (1, 29), (15, 148), (81, 263), (0, 20),
       (7, 1000), (0, 100000), (50, 100), (999, 1000), (12, 50000)]  # fmt: skip


@pytest.mark.parametrize(("k", "n"), _KN)
@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_clopper_pearson_matches_scipy(k, n, confidence):
    # scipy.stats.binomtest(...).proportion_ci(method="exact") as reference
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="exact")
    low, high = clopper_pearson(k, n, confidence)
    assert isinstance(low, float) and isinstance(high, float)
    # binomtest finds the bounds by root finding, accurate to about 1e-9 relative
    assert low == pytest.approx(ref.low, rel=1e-7, abs=1e-15)
    assert high == pytest.approx(ref.high, rel=1e-7, abs=1e-15)


@pytest.mark.parametrize(("k", "n"), [(kn[0], kn[1]) for kn in _KN if 0 < kn[0] < kn[1]])
def test_clopper_pearson_defining_equations(k, n):
    # Clopper & Pearson, Biometrika 26:404-413 (1934): P(X >= k | low) = P(X <= k | high) =
    # alpha/2; scipy.stats.binom as reference
    low, high = clopper_pearson(k, n, 0.95)
    assert stats.binom.sf(k - 1, n, low) == pytest.approx(0.025, rel=1e-9)
    assert stats.binom.cdf(k, n, high) == pytest.approx(0.025, rel=1e-9)


def test_clopper_pearson_vectorized_matches_scipy():
    # scipy.stats.binomtest(...).proportion_ci(method="exact") as reference
    k = np.array([k for k, _ in _KN])
    n = np.array([n for _, n in _KN])
    low, high = clopper_pearson(k, n)
    assert low.shape == high.shape == k.shape
    for i, (kk, nn) in enumerate(_KN):
        ref = stats.binomtest(kk, nn).proportion_ci(method="exact")
        assert low[i] == pytest.approx(ref.low, rel=1e-7, abs=1e-15)
        assert high[i] == pytest.approx(ref.high, rel=1e-7, abs=1e-15)


@pytest.mark.parametrize(
    ("k", "n", "low", "high"),
    [(81, 263, 0.2527, 0.3676), (15, 148, 0.0578, 0.1617), (0, 20, 0.0, 0.1684),
     (1, 29, 0.0009, 0.1776)],  # fmt: skip
)
def test_clopper_pearson_newcombe_table(k, n, low, high):
    # Newcombe 1998, Stat. Med. 17:857-872, Table I, exact method (figures from memory;
    # they agree with scipy.stats.binomtest to the 4 decimals quoted)
    got_low, got_high = clopper_pearson(k, n)
    assert got_low == pytest.approx(low, abs=5e-5)
    assert got_high == pytest.approx(high, abs=5e-5)


def test_clopper_pearson_ends_and_broadcast():
    # Clopper & Pearson 1934 construction: the bound at an observed extreme is the extreme
    low, high = clopper_pearson([0, 4], 4)
    assert low[0] == 0.0 and high[1] == 1.0
    assert 0.0 < low[1] < high[0] < 1.0
    # symmetry p <-> 1 - p of the beta quantiles (Clopper & Pearson 1934)
    lo3, hi3 = clopper_pearson(3, 17)
    lo14, hi14 = clopper_pearson(14, 17)
    assert lo3 == pytest.approx(1.0 - hi14, rel=1e-12)
    assert hi3 == pytest.approx(1.0 - lo14, rel=1e-12)


@pytest.mark.parametrize(
    ("k", "n", "confidence"),
    [(-1, 10, 0.95), (11, 10, 0.95), (1.5, 10, 0.95), (0, 0, 0.95), (1, 10, 1.0),
     (1, 10, 0.0), (np.nan, 10, 0.95)],  # fmt: skip
)
def test_clopper_pearson_rejects_bad_input(k, n, confidence):
    # common practice, no source: counts must be whole, 0 <= k <= n, n >= 1
    with pytest.raises(ValueError):
        clopper_pearson(k, n, confidence)


def test_half_width():
    # scipy.stats.binomtest(...).proportion_ci(method="exact") as reference
    ref = stats.binomtest(7, 1000).proportion_ci(method="exact")
    assert half_width(7, 1000) == pytest.approx((ref.high - ref.low) / 2, rel=1e-7)
    widths = half_width(np.array([0, 0, 0]), np.array([100, 1000, 10000]))
    assert widths.shape == (3,)
    # common practice, no source: the interval narrows as samples accumulate
    assert np.all(np.diff(widths) < 0)


def test_zero_failure_upper_matches_one_sided_beta_bound():
    # scipy.stats.beta.ppf as reference: one-sided Clopper-Pearson bound for k = 0
    n = np.array([1, 5, 30, 1000, 10**6])
    for conf in (0.9, 0.95, 0.99):
        np.testing.assert_allclose(zero_failure_upper(n, conf), stats.beta.ppf(conf, 1, n),
                                   rtol=1e-9)  # fmt: skip
    assert isinstance(zero_failure_upper(10), float)
    # scipy.stats.binomtest as reference: at the bound, P(0 failures) equals 1 - confidence
    p = zero_failure_upper(40, 0.95)
    assert stats.binom.pmf(0, 40, p) == pytest.approx(0.05, rel=1e-12)


@pytest.mark.parametrize("n", [100, 300, 1000, 3000, 100000])
def test_zero_failure_upper_rule_of_three(n):
    # Hanley & Lippman-Hand, JAMA 249(13):1743-1745 (1983): upper 95 % bound about 3/n
    assert zero_failure_upper(n, 0.95) == pytest.approx(3.0 / n, rel=0.02)


def test_zero_failure_upper_rejects_bad_n():
    # common practice, no source
    with pytest.raises(ValueError):
        zero_failure_upper(0)
    with pytest.raises(ValueError):
        zero_failure_upper(2.5)


def _stopped_runs(p, width, cap, runs, seed):
    """Failure counts and sample counts where `run --target-ci width` stops: the rule
    (tolerance.api._half_width_rule, one criterion, every unit converged) checked at every
    multiple of runner.CHECK_EVERY below the cap, binomial counts drawn check by check."""
    from tolerance.runner import CHECK_EVERY
    rng = np.random.default_rng(seed)
    k = np.zeros(runs, dtype=np.int64)
    stop = np.full(runs, cap, dtype=np.int64)
    active = np.ones(runs, dtype=bool)
    done = 0
    for n in range(CHECK_EVERY, cap, CHECK_EVERY):
        idx = np.flatnonzero(active)
        k[idx] += rng.binomial(n - done, p, size=idx.size)
        done = n
        counts, back = np.unique(k[idx], return_inverse=True)
        stops = (np.asarray(half_width(counts, np.full(counts.shape, n))) < width)[back]
        stop[idx[stops]] = n
        active[idx[stops]] = False
    idx = np.flatnonzero(active)
    k[idx] += rng.binomial(cap - done, p, size=idx.size)
    return k, stop


def test_a_stopped_run_s_intervals_keep_their_coverage():
    # Frey, The American Statistician 64 (2010) 242-249 (from memory): a stop on the
    # interval's own width lowers an exact interval's coverage; the worst case of the
    # project's simulation (tolerance.summary.STOPPED_RUN_CONFIDENCE): a rate of 10 ppm
    # against a 4.2 ppm target, some 70 checks, about 25 failures at the stop
    from tolerance.summary import CONFIDENCE, STOPPED_RUN_CONFIDENCE
    p, runs = 1e-5, 20_000
    k, n = _stopped_runs(p, 4.216e-6, 10**7, runs, seed=5)
    assert 40 < np.mean(n) / 32_768 < 100  # the regime of the worst case
    key, back = np.unique(np.stack([k, n], axis=1), axis=0, return_inverse=True)

    def misses(level):
        lo, hi = (np.asarray(x)[back.ravel()] for x in clopper_pearson(key[:, 0], key[:, 1],
                                                                          level))
        return np.mean(lo > p), np.mean(hi < p)
    # at 95 % the upper end falls below the true rate far more often than 2.5 %: the
    # adjustment is needed (binomial standard error of these shares about 0.0011)
    above, below = misses(CONFIDENCE)
    assert below > 0.035 and 1 - above - below < 0.95
    # at the stopped run's level the upper end misses at most 2.5 % (3 standard errors) and
    # the interval covers at least 95 %
    above, below = misses(STOPPED_RUN_CONFIDENCE)
    assert below < 0.025 + 0.0033 and 1 - above - below > 0.95


# ---------------------------------------------------------------------------------------------
# percentile_summary
# ---------------------------------------------------------------------------------------------


def test_percentile_summary_values():
    # numpy.percentile (linear interpolation) and numpy.std(ddof=1) as reference
    rng = np.random.default_rng(20240601)
    x = rng.normal(5.0, 2.0, 5001)
    x_nan = np.concatenate([x, [np.nan, np.nan]])
    out = percentile_summary(x_nan)
    assert set(out) == {"mean", "std", "min", "max", "p001", "p01", "p50", "p99", "p999"}
    assert all(type(v) is float for v in out.values())
    assert out["mean"] == pytest.approx(np.mean(x), rel=1e-12)
    assert out["std"] == pytest.approx(np.std(x, ddof=1), rel=1e-12)
    assert out["min"] == np.min(x) and out["max"] == np.max(x)
    for key, q in [("p001", 0.1), ("p01", 1), ("p50", 50), ("p99", 99), ("p999", 99.9)]:
        assert out[key] == pytest.approx(np.percentile(x, q), rel=1e-12)


def test_percentile_summary_ignores_infinities():
    # common practice, no source: an infinite value (outside the model's range) is left out of
    # the spread figures like a NaN
    out = percentile_summary([1.0, 2.0, 3.0, np.inf, -np.inf])
    assert out["min"] == 1.0 and out["max"] == 3.0 and out["mean"] == 2.0


def test_percentile_summary_small_example():
    # hand calculation, linear interpolation between order statistics (common practice)
    out = percentile_summary([1.0, 2.0, 3.0, 4.0, 5.0])
    assert out["mean"] == 3.0
    assert out["std"] == pytest.approx(math.sqrt(2.5), rel=1e-15)
    assert out["p50"] == 3.0
    assert out["p01"] == pytest.approx(1.04, rel=1e-12)
    assert out["p999"] == pytest.approx(4.996, rel=1e-12)


def test_percentile_summary_degenerate():
    # project brief: one sample has std 0; all-NaN and empty give NaN everywhere
    one = percentile_summary([7.5])
    assert one["std"] == 0.0 and one["mean"] == 7.5 and one["p999"] == 7.5
    for empty in ([np.nan, np.nan], []):
        out = percentile_summary(empty)
        assert len(out) == 9 and all(math.isnan(v) for v in out.values())


# ---------------------------------------------------------------------------------------------
# capability
# ---------------------------------------------------------------------------------------------


def _exact_sample(mean: float, std: float, n: int) -> np.ndarray:
    """A sample whose mean and ddof=1 standard deviation are exactly ``mean`` and ``std``."""
    z = np.linspace(-1.0, 1.0, n)
    z = (z - z.mean()) / z.std(ddof=1)
    return mean + std * z


def test_capability_on_constructed_data():
    # Montgomery, Introduction to Statistical Quality Control, definitions of Cp and Cpk
    # (from memory): Cp = (U - L)/(6 s), Cpk = min(U - mean, mean - L)/(3 s)
    x = _exact_sample(10.2, 0.5, 101)
    out = capability(x, lower=8.0, upper=12.0)
    assert out["n"] == 101 and isinstance(out["n"], int)
    assert out["cp"] == pytest.approx(4.0 / 3.0, rel=1e-12)
    assert out["cpk"] == pytest.approx(1.8 / 1.5, rel=1e-12)
    upper_only = capability(x, upper=12.0)
    assert math.isnan(upper_only["cp"])
    assert upper_only["cpk"] == pytest.approx(1.2, rel=1e-12)
    lower_only = capability(x, lower=8.0)
    assert lower_only["cpk"] == pytest.approx(2.2 / 1.5, rel=1e-12)


def test_capability_bissell_interval_formula():
    # Bissell 1990, Applied Statistics 39(3):331-340: Cpk +- z sqrt(1/(9n) + Cpk^2/(2(n-1)))
    x = _exact_sample(10.2, 0.5, 101)
    out = capability(x, lower=8.0, upper=12.0, confidence=0.95)
    cpk, n = 1.2, 101
    half = stats.norm.ppf(0.975) * math.sqrt(1 / (9 * n) + cpk**2 / (2 * (n - 1)))
    assert out["cpk_low"] == pytest.approx(cpk - half, rel=1e-12)
    assert out["cpk_high"] == pytest.approx(cpk + half, rel=1e-12)
    wider = capability(x, lower=8.0, upper=12.0, confidence=0.99)
    assert wider["cpk_low"] < out["cpk_low"] < out["cpk_high"] < wider["cpk_high"]


def test_capability_bissell_interval_coverage():
    # coverage check by simulation, common practice, no source; Bissell 1990 presents the
    # interval as a large-sample normal approximation, so 95 % nominal should hold to ~1 %
    rng = np.random.default_rng(7)
    reps, n, true_cpk = 4000, 200, 1.0
    samples = rng.normal(0.0, 1.0, size=(reps, n))
    covered = 0
    for row in samples:
        out = capability(row, lower=-3.0 * true_cpk, upper=5.0)
        covered += out["cpk_low"] <= true_cpk <= out["cpk_high"]
    # Clopper-Pearson 99.9 % interval of the observed coverage must contain 0.95 (+- 0.01)
    low, high = clopper_pearson(covered, reps, 0.999)
    assert low - 0.01 <= 0.95 <= high + 0.01


def test_capability_degenerate_and_errors():
    # common practice, no source
    assert math.isnan(capability([1.0], lower=0.0)["cpk"])
    flat = capability([2.0, 2.0, 2.0], lower=1.0, upper=3.0)
    assert flat["cp"] == math.inf and flat["cpk"] == math.inf and math.isnan(flat["cpk_low"])
    assert capability([2.0, 2.0], lower=3.0)["cpk"] == -math.inf
    nan_dropped = capability([1.0, 2.0, 3.0, np.nan], lower=0.0, upper=4.0)
    assert nan_dropped["n"] == 3 and nan_dropped["cp"] == pytest.approx(4.0 / 6.0)
    with pytest.raises(ValueError, match="at least one"):
        capability([1.0, 2.0])
    with pytest.raises(ValueError, match="must not be below"):
        capability([1.0, 2.0], lower=3.0, upper=1.0)
    # equal limits (a flag that must be 0): the window has no width, so Cp = 0 and Cpk is
    # minus the distance from the mean in units of 3 s; with no spread Cp is 0 / 0
    point = capability([0.0, 1.0, 2.0], lower=1.0, upper=1.0)
    assert point["cp"] == 0.0 and point["cpk"] == pytest.approx(0.0)
    assert capability([0.0, 0.0], lower=1.0, upper=1.0)["cpk"] == -math.inf
    assert math.isnan(capability([1.0, 1.0], lower=1.0, upper=1.0)["cp"])
    # every value exactly on its limit with no spread: 0 / 0, not 0 (which would read as
    # a process centred on its limit, half out); textbook Cpk definition, from memory
    assert math.isnan(capability([1.0, 1.0], lower=1.0, upper=1.0)["cpk"])
    assert math.isnan(capability([0.0, 0.0, 0.0], upper=0.0)["cpk"])


# ---------------------------------------------------------------------------------------------
# tail_estimate
# ---------------------------------------------------------------------------------------------


def test_tail_estimate_normal_fit():
    # scipy.stats.norm.sf as reference; sampling tolerance from the delta method (from memory):
    # sd(mean/s) ~ sqrt((1 + k^2/2)/n) = 0.017 for k = 3, n = 20000, so 3 sd moves k by 0.05,
    # i.e. a factor exp(0.05 * 3.3) ~ 1.18 on Phi(-3)
    rng = np.random.default_rng(12345)
    x = rng.normal(3.0, 1.0, 20000)
    out = tail_estimate(x)
    assert out["n"] == 20000
    assert out["normal_ppm"] == pytest.approx(1e6 * stats.norm.sf(3.0), rel=0.2)
    assert out["normal_ppm"] == pytest.approx(
        1e6 * stats.norm.sf(np.mean(x) / np.std(x, ddof=1)), rel=1e-12
    )
    assert out["normal_ppm"] < out["normal_ppm_upper"]
    assert "Extrapolation" in out["assumption"]
    # the tail fit on a normal tail reads it as exponential (a fitted shape below 0 taken as
    # 0): at 3 sigma above the true rate by a factor under 2 (common practice, no source;
    # the exponential's decay against the normal's, worked out in the next test)
    assert 1e6 * stats.norm.sf(3.0) < out["tail_ppm"] < 2e6 * stats.norm.sf(3.0)
    assert out["method"].startswith("generalized Pareto fit")


@pytest.mark.parametrize("k, most", [(4.0, 10.0), (5.0, 100.0)])
def test_tail_estimate_reads_a_light_tail_conservatively(k, most):
    # A normal's exceedances over its 5 % quantile fit generalized Pareto shapes near -0.15,
    # whose tail ends about 4.7 sigma from the mean: the fit put a 5-sigma margin at 4e-5 ppm
    # against the true 0.287 ppm (scipy.stats.norm.sf). With the shape taken as 0 the mean
    # exceedance of a standard normal over z = 1.645, phi(z) / 0.05 - z = 0.418 (from
    # memory), gives 0.05 exp(-(k - z) / 0.418): 179 ppm at 4 sigma (5.6x), 16 ppm at 5 sigma
    # (56x), never below the true rate.
    true = 1e6 * stats.norm.sf(k)
    for seed in range(5):
        out = tail_estimate(np.random.default_rng(seed).normal(k, 1.0, 20000))
        assert true < out["tail_ppm"] < most * true
        assert "shape taken as 0" in out["method"]


@pytest.mark.parametrize("shape, extrapolated", [(0.3, True), (1.5, False)])
def test_tail_estimate_does_not_extend_a_tail_without_finite_variance(shape, extrapolated):
    # a margin whose units below its 5 % quantile spread like a generalized Pareto of shape
    # 1.5 (scipy.stats.genpareto) has no finite variance, which a circuit's margin does not
    # have; a review's heater read 725 ppm from such a fit (shape 1.67) for a stress 115
    # standard deviations inside its limit. Above shape 0.5 nothing is extrapolated (the
    # moments' existence: Coles 2001, sec. 4.2); below it the fit stands
    rng = np.random.default_rng(5)
    bulk = 50.0 + rng.random(19000)
    tail = 50.0 - 0.01 * stats.genpareto.rvs(shape, size=1000, random_state=rng)
    out = tail_estimate(np.concatenate([bulk, tail]))
    if extrapolated:
        assert out["method"].startswith("generalized Pareto fit")
        assert math.isfinite(out["tail_ppm"])
    else:
        assert out["method"].startswith("not extrapolated")
        assert "above 0.5" in out["method"]
        assert math.isnan(out["tail_ppm"])
        assert math.isfinite(out["normal_ppm"])  # the normal figure, labelled a model, stays


def test_tail_estimate_fits_the_two_limits_of_a_window_apart():
    # A metric centred in a window of +-4 sigma fails on either side: 2 Phi(-4) = 63.3 ppm
    # (scipy.stats.norm.sf). The smaller of the two distances, fitted as one normal, gave
    # 0.04 ppm: its mean is 3.2 sigma and its spread 0.6 of the metric's.
    rng = np.random.default_rng(8)
    x = rng.normal(0.0, 1.0, 20000)
    s = np.std(x)
    out = tail_estimate([(x + 4.0) / s, (4.0 - x) / s])
    assert out["normal_ppm"] == pytest.approx(2e6 * stats.norm.sf(4.0), rel=0.2)
    assert out["normal_ppm"] > out["tail_ppm"] / 10
    # each side's bound at 97.5 % (Bonferroni): above the sum of the fits
    assert out["normal_ppm_upper"] > out["normal_ppm"]
    assert out["method"].startswith("lower limit: ") and "; upper limit: " in out["method"]
    one = tail_estimate(np.minimum(x + 4.0, 4.0 - x) / s)
    assert one["normal_ppm"] < 1.0  # the old reading, three orders of magnitude low


def test_tail_estimate_counts_units_without_a_finite_value():
    # 100 failing units with no finite value beside 900 modelled at 4 sigma: the rate is
    # (100 + 900 p) / 1000 by the law of total probability (from memory)
    rng = np.random.default_rng(4)
    x = rng.normal(4.0, 1.0, 900)
    fit = tail_estimate(x)
    out = tail_estimate(x, counted_failures=100, counted_passes=0)
    assert out["normal_ppm"] == pytest.approx((100e6 + 900 * fit["normal_ppm"]) / 1000,
                                              rel=1e-12)
    assert out["counted_directly"] == 100 and out["n"] == 900
    # the counted part's bound alone: Clopper-Pearson one-sided at 97.5 % (scipy.stats.beta)
    assert out["normal_ppm_upper"] > 1e6 * stats.beta.ppf(0.975, 101, 900)
    # units passing with no finite value dilute the model's part
    diluted = tail_estimate(x, counted_passes=100)
    assert diluted["normal_ppm"] == pytest.approx(0.9 * fit["normal_ppm"], rel=1e-12)
    # and only dilute: no counted part joins the bound (one passing unit added 184 ppm)
    assert diluted["normal_ppm_upper"] == pytest.approx(0.9 * fit["normal_ppm_upper"],
                                                        rel=1e-12)
    with pytest.raises(ValueError, match="must not be negative"):
        tail_estimate(x, counted_failures=-1)


def test_tail_check_flags_a_model_outside_the_counted_interval():
    # Clopper-Pearson: 0 of 20,000 gives 0 .. 184.4 ppm (two-sided 95 %, scipy.stats.binomtest)
    assert tail_check({"normal_ppm": 1504.5, "tail_ppm": 0.0}, 0, 20000).startswith(
        "normal_ppm above the counted 95 % interval 0 .. 184 ppm")
    assert tail_check({"normal_ppm": 12.0, "tail_ppm": 13.4}, 0, 20000).startswith(
        "agrees with the count")
    # 50 of 10,000 counted (3,711 .. 6,582 ppm): a tail fit of 100 ppm lies below it
    assert "tail_ppm below" in tail_check({"normal_ppm": 5000.0, "tail_ppm": 100.0}, 50,
                                          10000)
    assert "normal_ppm" not in tail_check({"normal_ppm": float("nan"), "tail_ppm": 1e6},
                                          10, 10).split("the counted")[0]
    assert tail_check({}, 0, 0) == "no samples counted"


def test_tail_estimate_normal_upper_bound_matches_tolerance_factor():
    # one-sided normal tolerance factor for n = 10, 99 % coverage, 95 % confidence is 3.981
    # (published one-sided tolerance factor tables, from memory; scipy.stats.nct as reference):
    # a sample whose mean/s equals that factor has an upper 95 % bound of 1 % failing
    n = 10
    factor = stats.nct.ppf(0.95, n - 1, stats.norm.ppf(0.99) * math.sqrt(n)) / math.sqrt(n)
    assert factor == pytest.approx(3.981, abs=5e-4)
    x = _exact_sample(factor, 1.0, n)
    out = tail_estimate(x, confidence=0.95)
    assert out["normal_ppm_upper"] == pytest.approx(1e4, rel=1e-6)
    assert out["normal_ppm"] == pytest.approx(1e6 * stats.norm.sf(factor), rel=1e-9)
    assert math.isnan(out["tail_ppm"])


def test_tail_estimate_normal_upper_bound_far_out_returns():
    # found by fuzzing: a 12-sample margin 180,000 standard deviations from its limit
    # (t = 6e5 on 11 degrees of freedom), where scipy.special.nctdtrinc, tried as a faster
    # inverse, never returned and the bracket search could not resolve the CDF (NaN). The
    # CDF at 40 sqrt(n) already exceeds the confidence, so the bound is below Phi(-40), 0 in
    # double precision (scipy.stats.norm.sf as reference), like the point estimate
    out = tail_estimate(_exact_sample(184647.9, 1.0, 12))
    assert out["normal_ppm"] == 0.0 and out["normal_ppm_upper"] == 0.0


@pytest.mark.parametrize("n,k", [(12, 20_000.0), (1000, 45.0), (20_000, 41.0),
                                 (400_000, 60.0), (400_000, 250.0)])
def test_normal_tail_bound_beyond_forty_sigma_is_zero_from_one_evaluation(monkeypatch, n, k):
    from scipy import special

    import tolerance.stats as ts

    calls = []
    plain = special.nctdtr
    monkeypatch.setattr(special, "nctdtr", lambda *a: calls.append(a) or plain(*a))
    got = ts._normal_upper_ppm(k, 1.0, n, 0.95)
    assert got == 0.0 and len(calls) == 1
    # the search gives the same where it resolves the root (scipy.stats.norm.sf as
    # reference: 0 beyond about 37.6 standard deviations)
    delta = ts._noncentrality_low(math.sqrt(n) * k, n - 1, 0.95)
    if math.isfinite(delta):
        assert delta > 40.0 * math.sqrt(n)
        assert 1e6 * stats.norm.sf(delta / math.sqrt(n)) == 0.0


def test_normal_tail_bound_starts_near_its_root_and_keeps_it(monkeypatch):
    from scipy import optimize, special

    import tolerance.stats as ts

    calls = []
    plain = special.nctdtr
    monkeypatch.setattr(special, "nctdtr", lambda *a: calls.append(a) or plain(*a))
    for n in (10, 30, 1000, 20_000, 400_000):
        for k in (-2.0, 0.5, 3.0, 6.0, 10.0):
            t = math.sqrt(n) * k
            calls.clear()
            got = ts._noncentrality_low(t, n - 1, 0.95)
            used = len(calls)

            # reference: scipy.stats.nct.cdf, Brent's method on the wide bracket the search
            # used before it started from the normal approximation
            ref_calls = []

            def excess(d):
                ref_calls.append(d)
                return float(stats.nct.cdf(t, n - 1, d)) - 0.95

            width = 5.0 + abs(t)
            while not excess(t - width) > 0 > excess(t + width):
                width *= 2.0
            ref = optimize.brentq(excess, t - width, t + width, xtol=1e-10, rtol=1e-12)
            assert got == pytest.approx(ref, rel=1e-11, abs=1e-9), (n, k)
            # common practice, no source: the near bracket saves CDF evaluations, most of them
            # on many degrees of freedom, where each costs most (counted, not timed)
            assert used < len(ref_calls), (n, k, used, len(ref_calls))
            if n >= 1000:
                assert used <= 10, (n, k, used)


def test_tail_estimate_normal_upper_bound_coverage():
    # coverage check by simulation, common practice, no source: the exact one-sided bound
    # should exceed the true failure probability in ~95 % of repeated experiments
    rng = np.random.default_rng(99)
    true_ppm = 1e6 * stats.norm.sf(2.5)
    reps = 400
    hits = sum(
        tail_estimate(rng.normal(2.5, 1.0, 30))["normal_ppm_upper"] >= true_ppm
        for _ in range(reps)
    )
    low, high = clopper_pearson(hits, reps, 0.999)
    assert low <= 0.95 <= high


@pytest.mark.parametrize("shape", [-0.6, -0.2, 0.0, 0.4, 1.0, 3.0])
@pytest.mark.parametrize("n", [60, 2000, 20000])
def test_gpd_fit_reaches_the_likelihood_maximum(shape, n):
    from tolerance.stats import gpd_fit

    rng = np.random.default_rng([n, round(10 * shape) + 10])
    x = stats.genpareto.rvs(shape, scale=2.0, size=n, random_state=rng)
    k, s = gpd_fit(x)

    def loglik(k_, s_):
        return float(np.sum(stats.genpareto.logpdf(x, k_, 0.0, s_)))

    # scipy.stats.genpareto.fit (location fixed at 0) as reference: its optimizer stops
    # near the same maximum, so the estimates agree to its tolerance and the one-dimensional
    # profile search is never worse in likelihood
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        k_ref, _, s_ref = stats.genpareto.fit(x, floc=0.0)
    assert k == pytest.approx(k_ref, abs=2e-3) and s == pytest.approx(s_ref, rel=2e-3)
    assert loglik(k, s) >= loglik(k_ref, s_ref) - 1e-9 * abs(loglik(k_ref, s_ref))
    # the likelihood equations hold at the estimate (Grimshaw 1993): both partial
    # derivatives, by central differences of scipy's log-density, vanish per sample
    h = 1e-6
    d_shape = (loglik(k + h, s) - loglik(k - h, s)) / (2 * h * n)
    d_scale = (loglik(k, s * (1 + h)) - loglik(k, s * (1 - h))) / (2 * h * n)
    assert abs(d_shape) < 1e-5 and abs(d_scale) < 1e-5


def test_gpd_fit_takes_exceedances_spread_over_hundreds_of_decades():
    from tolerance.stats import gpd_fit

    # common practice, no source: a smallest exceedance 1e-200 of the largest (its square
    # underflows) still gives a fit with a valid support and a finite likelihood
    rng = np.random.default_rng(4)
    x = np.concatenate([rng.exponential(1.0, 200), [1e-200, 1e-120]])
    k, s = gpd_fit(x)
    assert math.isfinite(k) and s > 0
    assert math.isfinite(float(np.sum(stats.genpareto.logpdf(x, k, 0.0, s))))


@pytest.mark.parametrize("seed", range(10))
def test_gpd_fit_on_a_bounded_tail_keeps_to_shapes_of_minus_one_and_above(seed):
    import warnings

    from tolerance.stats import gpd_fit

    # uniform exceedances are the GPD with shape -1 (from memory). Below -1 the likelihood
    # has no maximum (Smith, Biometrika 72, 1985); at -1 the best scale is the largest
    # exceedance (uniform on [0, max], log-likelihood -n log max). scipy.stats.genpareto.fit
    # as reference where its optimizer stays at -1 or above.
    x = np.random.default_rng(seed).uniform(0.0, 0.05, 250)
    k, s = gpd_fit(x)

    def loglik(k_, s_):
        return float(np.sum(stats.genpareto.logpdf(x, k_, 0.0, s_)))

    corner = -x.size * math.log(x.max())
    assert k >= -1.0 and s / -k >= x.max()
    assert loglik(k, s) >= corner - 1e-9 * abs(corner)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        k_ref, _, s_ref = stats.genpareto.fit(x, floc=0.0)
    if k_ref >= -1.0:
        assert loglik(k, s) >= loglik(k_ref, s_ref) - 1e-9 * abs(corner)
    else:
        # scipy's optimizer went below -1; on these samples no interior maximum beats the
        # corner, so the fit is the corner itself
        assert (k, s) == (-1.0, x.max())


def test_tail_estimate_gpd_on_exponential_tail():
    # exact answer: margin = 8 - E with E ~ Exp(1) fails with P(E > 8) = exp(-8) = 335.5 ppm;
    # the excess of an exponential over any threshold is exponential (GPD shape 0), so the
    # model is right and only sampling error remains. With ~1000 exceedances the shape
    # estimate has sd ~ 1/sqrt(1000) = 0.032 (Smith 1987 asymptotics, from memory);
    # extrapolating 5 scale units, 2 sd of shape changes the answer by about a factor 2,
    # hence the loose tolerance of a factor 2.5 either way.
    exact_ppm = 1e6 * math.exp(-8.0)
    rng = np.random.default_rng(2024)
    margin = 8.0 - rng.exponential(1.0, 20000)
    out = tail_estimate(margin)
    assert out["method"].startswith("generalized Pareto fit")
    assert exact_ppm / 2.5 < out["tail_ppm"] < exact_ppm * 2.5
    # a normal fit to this skewed margin misses by orders of magnitude (common practice)
    assert out["normal_ppm"] < exact_ppm / 1000


def test_tail_estimate_gpd_bounded_tail_gives_zero():
    # uniform margin on [1, 2]: the excess below a threshold is uniform, which is the GPD with
    # shape -1 (bounded; from memory), and 0 lies beyond its end point, so the estimate must be
    # (near) zero
    rng = np.random.default_rng(3)
    out = tail_estimate(rng.uniform(1.0, 2.0, 5000))
    assert out["tail_ppm"] < 1e-3


def test_tail_estimate_empirical_when_failures_common():
    # project brief: if 0 is above the 5 % quantile, report the observed fraction
    rng = np.random.default_rng(5)
    margin = rng.normal(0.5, 1.0, 4000)
    out = tail_estimate(margin)
    assert out["tail_ppm"] == pytest.approx(1e6 * np.mean(margin < 0), rel=1e-12)
    assert out["method"].startswith("empirical fraction")
    # a counted fraction is no extrapolation: the assumption names only the normal model
    # (a new user's walk found the Pareto text beside it)
    assert "Pareto" not in out["assumption"] and "normal distribution" in out["assumption"]
    fitted = tail_estimate(rng.normal(4.0, 1.0, 4000))
    assert "generalized Pareto" in fitted["assumption"]


def test_tail_estimate_degenerate_inputs():
    # project brief: zero spread and fewer than 50 samples are handled without a fit
    flat = tail_estimate(np.full(100, 2.0))
    assert flat["normal_ppm"] == 0.0 and flat["tail_ppm"] == 0.0
    assert "zero spread" in flat["method"]
    failing = tail_estimate(np.full(100, -1.0))
    assert failing["normal_ppm"] == 1e6 and failing["tail_ppm"] == 1e6
    rng = np.random.default_rng(11)
    few = tail_estimate(rng.normal(3.0, 1.0, 49))
    assert math.isnan(few["tail_ppm"]) and "at least 50" in few["method"]
    assert math.isfinite(few["normal_ppm"]) and few["n"] == 49
    empty = tail_estimate([np.nan, np.nan])
    assert empty["n"] == 0 and math.isnan(empty["normal_ppm"]) and math.isnan(empty["tail_ppm"])
    # one sample says nothing about the spread (it read "zero spread: every sample equals
    # the mean" and 0 ppm)
    single = tail_estimate([1.0])
    assert math.isnan(single["normal_ppm"]) and math.isnan(single["tail_ppm"])
    assert "one finite margin" in single["method"] and "zero spread" not in single["method"]
    with pytest.raises(ValueError):
        tail_estimate(rng.normal(size=100), confidence=1.5)


def test_tail_estimate_keys_and_types():
    # project brief: documented keys
    rng = np.random.default_rng(8)
    out = tail_estimate(rng.normal(4.0, 1.0, 500))
    assert {"normal_ppm", "tail_ppm", "method", "assumption", "n"} <= set(out)
    assert isinstance(out["method"], str) and isinstance(out["assumption"], str)
    assert out["assumption"].count(". ") == 0 and out["assumption"].endswith(".")
    assert isinstance(out["n"], int)


@pytest.mark.parametrize("magnitude", [1e-250, 1e-120, 1.0, 1e120, 1e250])
def test_mean_and_spread_of_metrics_whose_squares_leave_double_precision(magnitude):
    import statistics

    from tolerance.stats import capability, mean_std, percentile_summary

    rng = np.random.default_rng(11)
    x = magnitude * rng.normal(3.0, 1.0, 500)
    # Python's statistics module works in exact rational arithmetic, so no square overflows
    # or underflows: the reference for the mean and the sample standard deviation
    mean, std = mean_std(x)
    assert mean == pytest.approx(statistics.fmean(x), rel=1e-12)
    assert std == pytest.approx(statistics.stdev(x), rel=1e-12)
    if magnitude == 1.0:  # numpy's own figures, to the last bit, in the plain range
        assert (mean, std) == (float(np.mean(x)), float(np.std(x, ddof=1)))
    # the run summary and the capability take the same figures without a floating-point
    # warning (the test run turns warnings into errors)
    s = percentile_summary(x)
    assert s["std"] == std and s["mean"] == mean
    cap = capability(x, upper=6.0 * magnitude)
    assert cap["cpk"] == pytest.approx((6.0 * magnitude - mean) / (3.0 * std), rel=1e-12)
    with_nan = np.append(x, np.nan)
    assert mean_std(with_nan, ddof=0, nan=True)[1] == pytest.approx(statistics.pstdev(x),
                                                                     rel=1e-12)


def test_capability_of_a_spread_far_below_its_window():
    from tolerance.stats import capability

    # a metric of a few 1e-300 against a limit of 18 (a resistor typed as 1e-300 ohm): the
    # index is about 1e300, whose square is beyond double precision; Bissell's interval is
    # then cpk +- z cpk / sqrt(2 (n - 1)) (its 1 / (9 n) term vanishes beside it)
    rng = np.random.default_rng(2)
    x = 1e-300 * rng.uniform(1.0, 2.0, 40)
    cap = capability(x, upper=18.0)
    assert 1e299 < cap["cpk"] < math.inf
    z = float(stats.norm.ppf(0.975))
    assert cap["cpk_low"] == pytest.approx(cap["cpk"] * (1 - z / math.sqrt(78)), rel=1e-12)
    assert cap["cpk_high"] == pytest.approx(cap["cpk"] * (1 + z / math.sqrt(78)), rel=1e-12)


def test_tail_estimate_says_why_a_margin_without_finite_values_has_none():
    # every sample's stress infinite (a hot study): the method read "no samples", though
    # 50 samples were there and all failed
    from tolerance.stats import tail_estimate

    out = tail_estimate(np.full(50, -np.inf))
    assert out["n"] == 0 and math.isnan(out["tail_ppm"])
    assert out["method"].startswith("no finite margin among 50 samples")
    assert tail_estimate(np.array([]))["method"] == "no samples: nothing to estimate"


@pytest.mark.parametrize("x, n", [(0, 10), (3, 10), (10, 10), (7, 5000), (2500, 5000),
                                  (4990, 5000)])
def test_wilson_interval_matches_scipy(x, n):
    # scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson 1927, no continuity
    # correction), the one each run's yield takes in the paired interval
    from tolerance.stats import _wilson

    ref = stats.binomtest(x, n).proportion_ci(confidence_level=0.95, method="wilson")
    z = float(stats.norm.ppf(0.975))
    np.testing.assert_allclose(_wilson(x, n, z), (ref.low, ref.high), rtol=1e-12,
                               atol=1e-15)


def test_verdict_limits_are_inclusive_as_documented():
    # tolerance.limits: with an allowed rate r > 0 a criterion passes when the upper end of
    # its interval is at or below r, fails when the lower end is above r, else undecided
    # (common practice, no source); at r = 0 only a count of zero passes
    from tolerance.limits import FAIL, PASS, UNDECIDED, verdict

    assert verdict(3, 1e-4, 1e-3, 1e-3) == PASS
    assert verdict(3, 1e-4, 1.0001e-3, 1e-3) == UNDECIDED
    assert verdict(30, 1e-3, 2e-3, 1e-3) == UNDECIDED
    assert verdict(30, 1.0001e-3, 2e-3, 1e-3) == FAIL
    assert verdict(0, 0.0, 3e-4, 0.0) == PASS
    assert verdict(1, 1e-6, 3e-4, 0.0) == FAIL


def _paired_runs(n, both, only_first, only_second):
    """Pass columns of two runs over the same ``n`` units: ``both`` pass in both, then
    ``only_first`` in the first run only, then ``only_second`` in the second only."""
    first = np.zeros(n, bool)
    second = np.zeros(n, bool)
    first[:both] = second[:both] = True
    first[both:both + only_first] = True
    second[both + only_first:both + only_first + only_second] = True
    return first, second


def test_paired_difference_of_two_yields_on_the_same_units():
    from tolerance.stats import paired_difference

    # 5,000 units: 21 pass only in the first run, 7 only in the second. Exact McNemar test:
    # scipy.stats.binomtest(7, 28, 0.5)
    first, second = _paired_runs(5000, 1200, 21, 7)
    got = paired_difference(first, second)
    assert got["only_first"] == 21 and got["only_second"] == 7
    assert got["difference"] == pytest.approx(-14 / 5000)
    assert got["p_value"] == pytest.approx(stats.binomtest(7, 28, 0.5).pvalue, rel=1e-12)
    assert got["p_value"] < 0.05
    # the runs' own exact intervals overlap entirely; unit by unit they differ
    assert got["ci_low"] < got["difference"] < got["ci_high"] < 0
    same = paired_difference(first, first)
    assert same["difference"] == 0.0 and same["p_value"] == 1.0
    assert same["ci_low"] < 0.0 < same["ci_high"]
    with pytest.raises(ValueError, match="same units"):
        paired_difference(first, second[:10])


@pytest.mark.parametrize("n, probs", [
    (5000, (0.995, 0.005, 0.0, 0.0)),      # every discordant unit on one side
    (5000, (0.989, 0.01, 0.001, 0.0)),
    (3000, (0.55, 0.10, 0.05, 0.30)),
    (200, (0.9, 0.02, 0.03, 0.05)),
])
def test_paired_difference_interval_holds_its_level(n, probs):
    # coverage by simulation (numpy's multinomial draws of the four kinds of unit: both
    # pass, first only, second only, neither): a 95 % interval must hold the true change
    # in about 95 % of repetitions; an interval that took the discordant count as known
    # held 43 % in the first case. 800 repetitions: the coverage's standard error is 0.8 %
    from tolerance.stats import paired_difference

    rng = np.random.default_rng(7)
    truth = probs[2] - probs[1]
    hits, below, above, seen = 0, 0, 0, {}
    for counts in rng.multinomial(n, probs, size=800):
        key = tuple(int(c) for c in counts)
        if key not in seen:
            seen[key] = paired_difference(*_paired_runs(n, *key[:3]))
        got = seen[key]
        hits += got["ci_low"] <= truth <= got["ci_high"]
        below += truth < got["ci_low"]
        above += truth > got["ci_high"]
    assert 0.925 <= hits / 800 <= 0.985
    # and on each side about its 2.5 % (20 of 800; 10 to 24 seen): a sign slip in the
    # correlation term of one end widened that end only, which kept the two-sided
    # coverage within bounds (a mutation test)
    assert below >= 5 and above >= 5


def test_paired_sentence_says_when_the_interval_and_the_test_disagree():
    # a review's what-if: 2,000 units, 3 pass only in the baseline, 11 only pinned. The exact
    # McNemar test gives p = 0.057 (scipy.stats.binomtest(11, 14, 0.5)) while Newcombe's
    # interval of the change just excludes zero; the sentence said "no change shown" beside
    # it. Both methods are kept (the interval holds its level unconditionally, the test is
    # exact given the discordant units), and the sentence now calls such a case borderline
    from tolerance.report import paired_sentence
    from tolerance.stats import paired_difference

    got = paired_difference(*_paired_runs(2000, 1500, 3, 11))
    assert got["p_value"] == pytest.approx(stats.binomtest(11, 14, 0.5).pvalue, rel=1e-12)
    assert got["p_value"] > 0.05 and got["ci_low"] > 0.0
    text = paired_sentence(got, "the pin", "in the baseline", "pinned")
    assert "borderline at 5 % significance" in text
    assert "shows no change while the interval excludes zero" in text
    assert "no change shown" not in text
    # a change of yields is in percentage points, not a relative percent (a review)
    assert "changes the yield by 0.4 percentage points (95 % interval " in text
    assert re.search(r"interval [0-9.e-]+ points \.\. [0-9.e-]+ points\)", text)
    # where the two agree, the plain words stay
    clear = paired_difference(*_paired_runs(1200, 1100, 0, 0))
    assert "no change shown at 5 % significance" in paired_sentence(clear, "x", "a", "b")
    # 21 against 7 of 5,000 (the test above): both show the change
    change = paired_difference(*_paired_runs(5000, 1200, 21, 7))
    assert "a change at 5 % significance." in paired_sentence(change, "x", "a", "b")
