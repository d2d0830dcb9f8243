"""Engine tests on the exact linear test stage: study reading, sampling, runner, summary."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats as sps
from scipy.stats import qmc

from tolerance import distributions as dist
from tolerance import sampling
from tolerance.api import load_study, run
from tolerance.study import StudyError

LINEAR = """
stage = "linear_test"
title = "linear"
[run]
samples = 5000
seed = 11
sampler = "{sampler}"
[inputs]
x1 = {{min = "-1 V", max = "3 V"}}
x2 = {{nominal = "1 V", tolerance = "30%", distribution = "normal"}}
"""


@pytest.fixture
def linear(write_study):
    def make(sampler="lhs", extra=""):
        return load_study(write_study(LINEAR.format(sampler=sampler) + extra))

    return make


# --- distributions ---------------------------------------------------------------------------

def test_uniform_moments():
    d = dist.Uniform(2.0, 6.0)
    u = np.random.default_rng(1).random(400_000)
    x = d.ppf(u)
    # exact moments of U(a, b): mean (a+b)/2, variance (b-a)^2/12 (any statistics text)
    assert_allclose(x.mean(), 4.0, atol=0.01)
    assert_allclose(x.var(), 16 / 12, rtol=0.01)


def test_normal_tolerance_at_three_sigma():
    d = dist.Normal(100.0, 5.0 / 3.0, 3.0)
    assert (d.low, d.high) == (95.0, 105.0)
    # scipy.stats.norm as reference for the inverse CDF
    u = np.array([0.001, 0.1, 0.5, 0.9, 0.999])
    assert_allclose(d.ppf(u), sps.norm(100.0, 5.0 / 3.0).ppf(u), rtol=1e-12)


def test_truncated_normal_stays_inside():
    d = dist.TruncatedNormal(10.0, 1.0, 8.0, 11.0)
    x = d.ppf(np.random.default_rng(2).random(100_000))
    assert x.min() >= 8.0 and x.max() <= 11.0
    # scipy.stats.truncnorm as reference for the mean
    assert_allclose(x.mean(), sps.truncnorm(-2, 1, loc=10, scale=1).mean(), atol=0.01)


def test_lognormal_between_min_and_max():
    d = dist.LogNormal(100.0, 400.0)
    assert_allclose(d.nominal, 200.0)
    # min and max sit at -/+3 sigma of ln(h_FE): 0.135 % below min (scipy.stats.norm.cdf(-3))
    x = d.ppf(np.random.default_rng(3).random(2_000_000))
    assert_allclose(np.mean(x < 100.0), sps.norm.cdf(-3), rtol=0.08)
    assert_allclose(np.median(x), 200.0, rtol=0.005)


@pytest.mark.parametrize("lo, typ, hi", [(100.0, 200.0, 300.0), (40.0, 80.0, 200.0),
                                          (100.0, 150.0, 400.0)])
def test_lognormal_with_typical_puts_each_limit_at_three_sigma(lo, typ, hi):
    # a datasheet's min/typ/max of h_FE: one spread for both sides (the wider) put 4 % of a
    # 100/200/300 class above its maximum (up to 539) and 1.2 % of a 40/80/200 class below
    # its minimum; each side has its own spread now (two-piece lognormal), so both limits
    # sit at 3 sigma: scipy.stats.norm.cdf(-3) of the units beyond each, half below typ
    d = dist.LogNormal(lo, hi, typical=typ)
    assert_allclose(d.nominal, typ)
    x = d.ppf(np.random.default_rng(5).random(2_000_000))
    assert_allclose([np.mean(x < lo), np.mean(x > hi)], sps.norm.cdf(-3), rtol=0.08)
    assert_allclose(np.mean(x < typ), 0.5, atol=2e-3)
    assert_allclose(d.cdf(np.array([lo, typ, hi])), [sps.norm.cdf(-3), 0.5, sps.norm.cdf(3)],
                    rtol=1e-12)
    assert_allclose(d.cdf(d.ppf(np.array([0.01, 0.3, 0.9]))), [0.01, 0.3, 0.9], rtol=1e-12)


def test_normal_range_with_typical_keeps_its_limits():
    # {min = -20 degC, max = 55 degC, typ = 20 degC, distribution = "normal"} was one normal
    # with the wider side's spread, listed (and taken by the worst case) as -20 .. 60 degC
    from tolerance.study import load_study

    text = LINEAR_TYP.replace("X1", '{min = "-2 V", max = "5.5 V", typ = "2 V", '
                                    'distribution = "normal"}')
    p = load_study("typ.toml", text=text).parameter("x1")
    assert (p.low, p.nominal, p.high) == (-2.0, 2.0, 5.5)
    x = p.distribution.ppf(np.random.default_rng(6).random(1_000_000))
    # scipy.stats.norm.cdf(-3) beyond each limit, half below the typical value
    assert_allclose([np.mean(x < -2.0), np.mean(x > 5.5)], sps.norm.cdf(-3), rtol=0.1)
    assert_allclose(np.mean(x < 2.0), 0.5, atol=2e-3)


def test_truncated_range_with_typical_cuts_both_sides_at_three_sigma():
    # {min = 40, typ = 100, max = 250, distribution = "truncnormal"}: one spread for both
    # sides (the wider) cut the lower side at 1.2 sigma: 43.6 % of the units below typ,
    # 4.9 % below 50. Each side its own spread, then the cut: half below typ and below 50
    # the two-piece normal's Phi((50 - 100) / 20) less the cut's Phi(-3), over 1 - 2 Phi(-3)
    # (scipy.stats.norm.cdf)
    from tolerance.study import load_study

    text = LINEAR_TYP.replace("X1", '{min = "40 V", max = "250 V", typ = "100 V", '
                                    'distribution = "truncnormal"}')
    p = load_study("typ.toml", text=text).parameter("x1")
    assert (p.low, p.nominal, p.high) == (40.0, 100.0, 250.0)
    x = p.distribution.ppf(np.random.default_rng(7).random(1_000_000))
    assert x.min() >= 40.0 and x.max() <= 250.0
    cut = sps.norm.cdf(-3)
    assert_allclose(np.mean(x < 100.0), 0.5, atol=2e-3)
    assert_allclose(np.mean(x < 50.0), (sps.norm.cdf(-2.5) - cut) / (1 - 2 * cut), rtol=0.03)
    d = p.distribution
    assert_allclose(d.cdf(np.array([40.0, 100.0, 250.0])), [0.0, 0.5, 1.0], atol=1e-12)
    assert_allclose(d.cdf(d.ppf(np.array([0.01, 0.3, 0.9]))), [0.01, 0.3, 0.9], rtol=1e-12)
    # a centred typical value keeps the plain truncated normal
    text = LINEAR_TYP.replace("X1", '{min = "40 V", max = "160 V", typ = "100 V", '
                                    'distribution = "truncnormal"}')
    assert isinstance(load_study("c.toml", text=text).parameter("x1").distribution,
                      dist.TruncatedNormal)


LINEAR_TYP = """
stage = "linear_test"
[inputs]
x1 = X1
x2 = "1 V"
"""


def test_discrete_weights():
    d = dist.Discrete((1.0, 2.0, 3.0), (1.0, 2.0, 1.0))
    x = d.ppf(np.random.default_rng(4).random(200_000))
    assert_allclose([np.mean(x == v) for v in (1, 2, 3)], [0.25, 0.5, 0.25], atol=0.005)


def test_discrete_weights_whose_sum_overflows_keep_their_ratios():
    # weights of 1e308 each summed to inf: every share read 0 and every unit was drawn at
    # the last member (definition of the weights: only their ratios matter)
    d = dist.Discrete((12.0, 13.0, 14.0), (1e308, 1e308, 5e307))
    assert_allclose(d.shares, [0.4, 0.4, 0.2], rtol=1e-12)
    x = d.ppf(np.random.default_rng(4).random(100_000))
    assert_allclose([np.mean(x == v) for v in (12, 13, 14)], [0.4, 0.4, 0.2], atol=0.006)
    assert_allclose(d.cdf(13.0), 0.8, rtol=1e-12)


@pytest.mark.parametrize("values, weights", [((253.15, 328.15), (1.0, 1.0)),
                                             ((253.15, 298.15, 328.15), (1.0, 2.0, 1.0)),
                                             ((1.0, 2.0, 5.0, 7.0), (1.0, 1.0, 2.0, 4.0))])
def test_discrete_ppf_is_the_smallest_member_whose_cdf_reaches_u(values, weights):
    # reference library: scipy.stats.rv_discrete.ppf, the generalized inverse
    # inf{x: F(x) >= u}, and numpy.quantile(method="inverted_cdf"); the weights give step
    # edges that are exact in binary, so both sides compare the same u. The median of
    # -20 and 55 degC at equal weights is -20 degC (it was 55).
    d = dist.Discrete(values, weights)
    p = np.asarray(weights) / np.sum(weights)
    ref = sps.rv_discrete(values=(np.arange(len(values)), p))
    edges = np.cumsum(p)
    between = np.random.default_rng(2).random(2000)
    for u in (edges[:-1], between, np.array([1e-12, 1 - 1e-12])):
        expected = np.asarray(values)[ref.ppf(u).astype(int)]
        assert np.array_equal(d.ppf(u), expected)
    if len(values) == 2:
        assert d.ppf(np.array([0.5]))[0] == 253.15
    # numpy's inverted-CDF quantile of a sample holding the members in their proportions
    sample = np.repeat(values, np.asarray(weights, dtype=int) * 4)
    for u in edges[:-1]:
        assert d.ppf(np.array([u]))[0] == np.quantile(sample, u, method="inverted_cdf")


@pytest.mark.parametrize("sampler", ["random", "lhs", "sobol"])
def test_discrete_draws_change_only_on_an_exact_step_edge(sampler):
    # the former inverse, searchsorted(side="right"), differs from the generalized one only
    # where u equals a step edge: over the shipped studies (which hold no discrete set, so
    # their draws are unchanged) and a temperature profile of -20/25/55 degC at weights
    # 1:2:1 correlated with a gain, the draws of every sampler agree sample for sample
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    paths = sorted((root / "studies").glob("*.toml")) + [root / "tolerance" / "demo" /
                                                          "demo.toml"]
    sets = [p.distribution for path in paths for p in load_study(path).parameters
            if p.distribution.kind == "discrete"]
    assert sets == []
    d = dist.Discrete((253.15, 298.15, 328.15), (1.0, 2.0, 1.0))
    c = np.array([[1.0, 0.8], [0.8, 1.0]])
    u = sampling.apply_copula(sampling.uniforms(sampler, 11, 20_000, 0, 20_000, 2), c)
    edges = np.cumsum(d.weights) / np.sum(d.weights)
    old = np.asarray(d.values)[np.minimum(np.searchsorted(edges, u[:, 0], side="right"), 2)]
    on_edge = np.isin(u[:, 0], edges)
    assert np.array_equal(d.ppf(u[:, 0])[~on_edge], old[~on_edge])
    assert not on_edge.any()


def test_a_pin_at_the_end_of_the_spread_takes_the_end_score():
    # a typical value at a limit leaves that side without spread: half the units sit at the
    # limit (F = 0.5 there), and its pin read as a score of 0 and moved no partner; the
    # pin at a limit is the limit's score, as at a uniform's or cut normal's end
    # (tolerance.sampling.PIN_SCORE; common practice, no source)
    at_min = dist.SplitNormal(0.0, 0.0, 0.4 / 3)
    assert sampling.pin_score(at_min, 0.0) == -3.0
    assert_allclose(sampling.pin_score(at_min, 0.2), sps.norm.ppf(sps.norm.cdf(1.5)))
    assert sampling.pin_score(dist.LogNormal(40.0, 250.0, 40.0), 40.0) == -3.0
    assert sampling.pin_score(dist.LogNormal(40.0, 250.0, 250.0), 250.0) == 3.0
    assert sampling.pin_score(dist.Uniform(0.0, 1.0), 1.0) == 3.0
    assert sampling.pin_score(dist.Normal(1.0, 0.1), 1.0) == 0.0
    # a cut one-sided spread: the limit is the end of a half-normal, its CDF 0 there
    cut = dist.TruncatedSplitNormal(0.0, 0.0, 0.4 / 3, 0.0, 0.4)
    assert sampling.pin_score(cut, 0.0) == -3.0
    assert np.mean(cut.ppf(np.random.default_rng(1).random(10_000)) == 0.0) == 0.0


def test_pin_tension_of_pins_against_their_correlation():
    # Gaussian copula of three scores, r(RB, RPD) = 0.9, r(RB, load) = 0.9,
    # r(RPD, load) = 0.7; pins RB = +3, RPD = -3. Conditional normal (Anderson, theorem
    # 2.5.1, from memory): the load's mean S_RP S_PP^-1 t and variance
    # 1 - S_RP S_PP^-1 S_PR; the Mahalanobis distance sqrt(t' S_PP^-1 t), worked by hand:
    # S_PP^-1 = [[1, -0.9], [-0.9, 1]] / 0.19, t' S_PP^-1 t = (9 + 9 + 16.2) / 0.19 = 180,
    # gain = [0.27, -0.11] / 0.19, mean = 3 (0.27 + 0.11) / 0.19 = 6.0
    from tolerance.protocol import Parameter

    params = [Parameter(n, "ohm", dist.Uniform(1.0, 2.0)) for n in ("RB", "RPD", "load")]
    c = np.array([[1.0, 0.9, 0.9], [0.9, 1.0, 0.7], [0.9, 0.7, 1.0]])
    t = sampling.pin_tension(params, c, {"RB": 2.0, "RPD": 1.0})
    assert_allclose(t["distance"], np.sqrt(180.0), rtol=1e-12)
    assert_allclose(t["independent"], 3 * np.sqrt(2), rtol=1e-12)
    load = t["partners"]["load"]
    assert_allclose(load["mean"], 6.0, rtol=1e-12)
    var = 1 - (0.9 * 0.27 - 0.7 * 0.11) / 0.19
    assert_allclose(load["sd"], np.sqrt(var), rtol=1e-12)
    # share beyond a score of 3 of N(6, var): scipy.stats.norm
    assert_allclose(load["beyond"], sps.norm(6.0, np.sqrt(var)).sf(3.0)
                    + sps.norm(6.0, np.sqrt(var)).cdf(-3.0), rtol=1e-12)
    # pins that agree with the correlation lie near the box: (3, 3) gives 18 * 0.1 / 0.19
    agree = sampling.pin_tension(params, c, {"RB": 2.0, "RPD": 2.0})
    assert_allclose(agree["distance"], np.sqrt(1.8 / 0.19), rtol=1e-12)
    # a discrete pin counts with its stratum's mean score, (phi(a) - phi(b)) / (F(b) - F(a))
    # (scipy.stats.truncnorm's mean)
    params[0] = Parameter("RB", "ohm", dist.Discrete((1.0, 2.0, 3.0), (1.0, 1.0, 1.0)))
    one = sampling.pin_tension(params, c, {"RB": 3.0})
    assert_allclose(one["pins"]["RB"], sps.truncnorm(sps.norm.ppf(2 / 3), np.inf).mean(),
                    rtol=1e-9)


# --- sampling --------------------------------------------------------------------------------

@pytest.mark.parametrize("sampler", ["random", "lhs", "sobol"])
def test_uniforms_do_not_depend_on_chunking(sampler):
    total, dim = 10_000, 4
    whole = sampling.uniforms(sampler, 7, total, 0, total, dim)
    cuts = [0, 1, 999, 4096, 4097, 8191, 10_000]
    pieces = np.vstack([sampling.uniforms(sampler, 7, total, a, b, dim)
                        for a, b in zip(cuts[:-1], cuts[1:])])
    assert np.array_equal(whole, pieces)
    assert whole.min() > 0 and whole.max() < 1


def test_lhs_block_is_stratified():
    total = 4096
    u = sampling.uniforms("lhs", 3, total, 0, total, 3)
    # a Latin hypercube puts exactly one point in each of n equal strata per dimension
    # (McKay, Beckman & Conover, Technometrics 21 (1979) 239-245)
    for j in range(3):
        assert np.array_equal(np.sort(np.floor(u[:, j] * total)), np.arange(total))


@pytest.mark.parametrize("seed, block, size, dim", [(0, 0, 4096, 5), (3, 7, 1000, 1),
                                                    (12345, 2, 17, 9), (1, 0, 1, 3)])
def test_latin_hypercube_draws_what_scipy_draws(seed, block, size, dim):
    # reference library: scipy.stats.qmc.LatinHypercube on the block's generator
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))
    expected = qmc.LatinHypercube(d=dim, rng=rng).random(size)
    assert np.array_equal(sampling.latin_hypercube(seed, block, size, dim), expected)


@pytest.mark.parametrize("total", [4096, 10_000])
def test_a_correlated_latin_hypercube_keeps_every_columns_strata(total):
    # the copula mixed the strata of every correlated column but the group's first (below);
    # each column of a block now takes the stratified values in the copula's rank order
    # (tolerance.sampling.restratify): one point per stratum in every column of every block
    # (McKay, Beckman & Conover 1979), the ranks, and so the Spearman correlation, exactly
    # the Gaussian copula's (Nelsen, theorem 2.4.3, from memory), and the normal-score
    # correlation within sampling error of the stated 0.6
    c = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.6], [0.0, 0.6, 1.0]])
    u = sampling.uniforms("lhs", 3, total, 0, total, 3, c)
    mixed = sampling.apply_copula(sampling.uniforms("lhs", 3, total, 0, total, 3), c)
    for b0 in range(0, total, sampling.BLOCK):
        size = min(sampling.BLOCK, total - b0)
        block, ref = u[b0:b0 + size], mixed[b0:b0 + size]
        for j in range(3):
            assert np.array_equal(np.sort(np.floor(block[:, j] * size)), np.arange(size))
            assert np.array_equal(np.argsort(block[:, j]), np.argsort(ref[:, j]))
    z = sps.norm.ppf(u)
    # standard error of a correlation near 0.6 at n = 4,096: (1 - r^2) / sqrt(n) = 0.01
    assert abs(np.corrcoef(z[:, 1], z[:, 2])[0, 1] - 0.6) < 0.04
    # the chunks of a run draw the same rows
    cuts = sorted({0, 1, 2000, min(4097, total), total})
    pieces = np.vstack([sampling.uniforms("lhs", 3, total, a, b, 3, c)
                        for a, b in zip(cuts[:-1], cuts[1:])])
    assert np.array_equal(pieces, u)
    # random and Sobol designs are the copula's columns as they were
    for sampler in ("random", "sobol"):
        assert np.array_equal(sampling.uniforms(sampler, 3, 512, 0, 512, 3, c),
                              sampling.apply_copula(sampling.uniforms(sampler, 3, 512, 0,
                                                                      512, 3), c))


def test_copula_keeps_the_strata_of_the_first_correlated_column_only():
    # the Cholesky factor is lower triangular, so the first correlated column's normal
    # scores pass unchanged (z' = z L^T, L[0] = e_0) and its Latin hypercube strata stay
    # (McKay, Beckman & Conover 1979); the later columns mix and lose them, which is why a
    # Latin hypercube run restratifies them (above)
    total = 4096
    u = sampling.uniforms("lhs", 3, total, 0, total, 3)
    c = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.6], [0.0, 0.6, 1.0]])
    v = sampling.apply_copula(u, c)
    filled = [np.unique(np.floor(v[:, j] * total)).size for j in range(3)]
    assert filled[0] == total and filled[1] == total
    assert filled[2] < 0.7 * total  # about 1 - 1/e of the strata, as random draws fill


def test_seeds_differ():
    a = sampling.uniforms("random", 1, 100, 0, 100, 2)
    b = sampling.uniforms("random", 2, 100, 0, 100, 2)
    assert not np.allclose(a, b)


def test_copula_imposes_correlation_and_keeps_marginals():
    u = sampling.uniforms("random", 5, 200_000, 0, 200_000, 2)
    c = np.array([[1.0, 0.8], [0.8, 1.0]])
    v = sampling.apply_copula(u, c)
    z = sps.norm.ppf(v)
    # the normal scores carry the requested correlation (definition of the Gaussian copula)
    assert_allclose(np.corrcoef(z.T)[0, 1], 0.8, atol=0.005)
    # marginals stay uniform: Kolmogorov-Smirnov against U(0,1) (scipy.stats.kstest)
    assert sps.kstest(v[:, 1], "uniform").pvalue > 0.01


# --- runner and summary -----------------------------------------------------------------------

def test_summary_counts_are_exact(linear):
    study = linear("random")
    res = run(study)
    df = res.samples
    # y = x1 + 2 x2 exactly, evaluated per sample
    assert_allclose(df["y"], df["x1"] + 2 * df["x2"], rtol=0, atol=0)
    failures = int(np.sum(df["y"] < 0))
    c = res.summary["criteria"]["y_positive"]
    assert c["failures"] == failures and c["evaluated"] == 5000
    # scipy.stats.binomtest exact interval as reference
    ci = sps.binomtest(failures, 5000).proportion_ci(method="exact")
    assert_allclose([c["ci_low"], c["ci_high"]], [ci.low, ci.high], rtol=1e-9)
    assert res.summary["yield"]["passes"] == 5000 - failures
    assert res.summary["verdict"] == ("fail" if failures else "pass")


def test_not_converged_is_counted_never_passed(linear):
    study = linear("random", '[solver]\ndiverge_above = "2.5 V"\n')
    res = run(study)
    df = res.samples
    bad = df["x1"] > 2.5
    assert res.summary["not_converged"] == int(bad.sum()) > 0
    assert not df.loc[bad, "pass"].any()
    assert df.loc[bad, "y"].isna().all()
    assert res.summary["yield"]["passes"] == int((~bad & (df["y"] >= 0)).sum())
    assert res.summary["verdict"] == "fail"


def test_a_criterion_no_sample_reached_is_undecided_not_passed(linear):
    # no sample converged: nothing is known of the failure rate, so the interval is the
    # whole of [0, 1] and the criterion cannot pass (Clopper-Pearson with n = 0; common
    # practice, no source)
    res = run(linear("random", '[solver]\ndiverge_above = "-2 V"\n'), samples=50)
    c = res.summary["criteria"]["y_positive"]
    assert res.summary["not_converged"] == 50 and c["evaluated"] == 0
    assert (c["ci_low"], c["ci_high"], c["zero_failure_upper"]) == (0.0, 1.0, 1.0)
    assert c["verdict"] == "undecided" and res.summary["verdict"] == "fail"
    assert c["rate"] is None  # NaN in the summary is written as null


@pytest.mark.parametrize("sampler", ["random", "lhs", "sobol"])
def test_same_seed_same_summary_whatever_jobs_and_chunks(linear, tmp_path, sampler):
    from tolerance.summary import comparable

    study = linear(sampler)
    a = run(study, jobs=1, chunk_size=5000, out=tmp_path / "a").summary
    b = run(study, jobs=2, chunk_size=777, out=tmp_path / "b").summary
    c = run(study, jobs=1, chunk_size=4096).summary
    assert comparable(a) == comparable(b) == comparable(c)
    on_disk = json.loads((tmp_path / "b" / "summary.json").read_text())
    assert comparable(on_disk) == json.loads(json.dumps(comparable(b)))


def test_after_samples_is_called_once_between_the_samples_and_the_summary(linear, tmp_path):
    from tolerance.api import SAMPLES_DIR, SUMMARY_FILE

    study = linear("random")
    seen = []
    out = tmp_path / "r"
    # common practice, no source: the hook sees every chunk written and no summary yet
    res = run(study, out=out, chunk_size=2000, after_samples=lambda: seen.append(
        (len(list((out / SAMPLES_DIR).glob("*.parquet"))), (out / SUMMARY_FILE).exists())))
    assert seen == [(3, False)] and (out / SUMMARY_FILE).exists()
    in_memory = []
    run(study, after_samples=lambda: in_memory.append(True))
    assert in_memory == [True] and res.summary["samples"] == 5000


def test_a_worker_writing_chunks_imports_no_more_than_it_needs(tmp_path):
    import pickle
    from pathlib import Path

    from fresh_process import run_fresh
    from tolerance.api import make_spec

    root = Path(__file__).resolve().parent.parent
    spec = make_spec(load_study(root / "studies" / "beacon_lamp_darlington.toml"), 300)
    (tmp_path / "spec.pkl").write_bytes(pickle.dumps(spec))
    code = ("import pickle; from pathlib import Path; from tolerance import runner; "
            "spec = pickle.loads(Path(sys.argv[1]).read_bytes()); "
            "runner.run_chunk_to_file(spec, 0, 0, 300, sys.argv[2])")
    proc = run_fresh(code, tmp_path / "spec.pkl", tmp_path,
                     modules=("pandas", "scipy.stats", "scipy.optimize"))
    assert proc.returncode == 0, proc.stderr
    # common practice, no source: these packages cost a worker process most of its start
    # (about 0.3, 0.5 and 0.2 s here) and evaluating a chunk needs none of them
    assert proc.stdout.split() == []
    assert (tmp_path / "part-000000.parquet").is_file()


@pytest.mark.parametrize("open_files", [128, 1])
def test_chunk_columns_read_what_the_run_keeps(linear, tmp_path, monkeypatch, open_files):
    import pyarrow.parquet as pq

    from tolerance import runner
    from tolerance.api import SAMPLES_DIR

    res = run(linear("random"), chunk_size=777, out=tmp_path / "r")
    folder = tmp_path / "r" / SAMPLES_DIR
    files = runner.chunk_files(folder)
    assert len(files) > 1
    # files kept open between reads (a short run), or each opened for each read
    monkeypatch.setattr(runner, "OPEN_FILES", open_files)
    read = runner.ChunkColumns(folder)
    frame = pq.read_table(folder).to_pandas()  # reference: pyarrow's own dataset reader
    # common practice, no source: every column, in sample order and with its type, equals
    # the whole table read at once, also on the second reading (cached footers), and after
    # the kept files were closed
    for rounds in range(3):
        if rounds == 2:
            read.close()
        for name in frame.columns:
            got = read(name)
            assert got.dtype == frame[name].to_numpy().dtype, name
            assert np.array_equal(got, frame[name].to_numpy(), equal_nan=got.dtype.kind == "f")
    assert sum(f is not None for f in read._open) == (len(files) if open_files >= len(files)
                                                       else 0)
    with read:
        assert np.array_equal(read("sample"), np.arange(res.summary["samples"]))
    assert all(f is None for f in read._open)


def test_overrides_pin_and_scale(linear):
    from tolerance.runner import Override

    study = linear("lhs")
    base = run(study).samples
    pinned = run(study, overrides={"x1": Override("pin", 0.5)}).samples
    assert np.all(pinned["x1"] == 0.5)
    # common random numbers: the other parameter keeps its values exactly
    assert np.array_equal(pinned["x2"], base["x2"])
    scaled = run(study, overrides={"x2": Override("scale", 2.0)}).samples
    assert np.array_equal(scaled["x2"], 2.0 * base["x2"])


def test_allowed_failure_rate_gives_three_verdicts(write_study):
    from tolerance.limits import verdict

    # exact interval of 3 failures in 1000: (0.00062, 0.00874) (scipy.stats.binomtest)
    assert verdict(3, 0.00062, 0.00874, 0.0) == "fail"
    assert verdict(3, 0.00062, 0.00874, 0.01) == "pass"
    assert verdict(3, 0.00062, 0.00874, 0.005) == "undecided"
    assert verdict(0, 0.0, 0.003, 0.0) == "pass"


def test_study_limits_replace_stage_default(linear):
    study = linear("random", '[limits]\ny = {min = "0.5 V"}\nz = {max = 2}\n')
    names = {c.name: c for c in study.criteria}
    assert names["y_positive"].minimum == 0.5
    assert names["z"].maximum == 2.0
    assert len(study.criteria) == 2


def test_a_one_sided_study_limit_keeps_the_other_side_of_the_default(linear, write_study):
    # common practice, no source: a maximum on the saturation metric removed the default's
    # minimum, so a unit that never saturated passed ("always present" in the README)
    study = linear("random", '[limits]\ny = {max = "9 V"}\n')
    (c,) = [c for c in study.criteria if c.metric == "y"]
    assert (c.name, c.minimum, c.maximum, c.source) == ("y_positive", 0.0, 9.0, "stage")
    # on a real stage: the demo with a weak drive (RB 47k) never saturates; with only a
    # maximum on drive_margin in its [limits] every unit must still fail saturation
    from tolerance.api import demo_text

    text = demo_text().replace('drive_margin = {min = 1.2, description = "fully on with 20 % '
                               'overdrive"}', "drive_margin = {max = 50}")
    text = text.replace('value = "150R"', 'value = "47k"', 1)
    demo = load_study(write_study(text, "weak.toml"))
    s = run(demo, samples=200).summary["criteria"]["saturation"]
    assert s["limit"] == {"min": 1.0, "max": 50.0} and s["failures"] == 200

    with pytest.raises(StudyError, match="limits.y.max.*window is empty"):
        linear("random", '[limits]\ny = {max = "-1 V"}\n')


def test_correlation_between_parameters(linear):
    study = linear("random", '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 0.9\n')
    df = run(study, samples=20_000).samples
    # rank correlation of a Gaussian copula: rho_s = (6/pi) asin(r/2) (Kruskal 1958)
    assert_allclose(sps.spearmanr(df["x1"], df["x2"]).statistic,
                    6 / np.pi * np.arcsin(0.45), atol=0.01)


def test_a_pair_correlated_twice_or_a_parameter_listed_twice_is_refused(linear):
    # the second of two entries on one pair silently won (0.8, then -0.5: measured -0.50),
    # and ["x1", "x1"] was accepted and did nothing
    twice = ('[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 0.8\n'
             '[[correlation]]\nparameters = ["x2", "x1"]\ncoefficient = -0.5\n')
    with pytest.raises(StudyError, match=r"correlation\[1\]\.parameters: 'x2' and 'x1' are "
                                         r"already correlated in correlation\[0\]"):
        linear("random", twice)
    with pytest.raises(StudyError, match=r"correlation\[0\]\.parameters: 'x1' is listed twice"):
        linear("random", '[[correlation]]\nparameters = ["x1", "x1"]\ncoefficient = 0.5\n')


def test_a_correlation_matrix_without_positive_spread_names_its_entry(write_study):
    # "the coefficients together do not form a valid correlation matrix" named neither the
    # entry nor the bound (a README walk): a group of k at r needs r > -1 / (k - 1), the
    # smallest eigenvalue of the equicorrelation matrix being 1 + (k - 1) r (any linear
    # algebra text); 0.9, 0.9 and -0.5 on three pairs contradict each other together
    text = ('stage = "single"\n[supply]\nvoltage = "12 V"\n[drive]\nhigh = "3.3 V"\n'
            '[parts.RB]\nvalue = "150R"\ntolerance = "5%"\n[parts.RPD]\nvalue = "1k0"\n'
            'tolerance = "5%"\n[parts.Q1]\ndevice = "medium_power_npn"\n[load]\n'
            'kind = "resistor"\nresistance = {nominal = "68 ohm", tolerance = "5%"}\n')
    group = ('[[correlation]]\nparameters = ["RB", "RPD", "load.resistance"]\n'
             'coefficient = -0.6\n')
    with pytest.raises(StudyError, match=r"correlation\[0\]\.coefficient: -0\.6 is too "
                                         r"negative for a group of 3.*only above -0\.5"):
        load_study(write_study(text + group))
    pairs = ('[[correlation]]\nparameters = ["RB", "RPD"]\ncoefficient = 0.9\n'
             '[[correlation]]\nparameters = ["RB", "load.resistance"]\ncoefficient = 0.9\n'
             '[[correlation]]\nparameters = ["RPD", "load.resistance"]\ncoefficient = -0.5\n')
    with pytest.raises(StudyError, match=r"correlation: the 3 entries together .*contradict"):
        load_study(write_study(text + pairs))


def test_engine_errors_name_key(linear):
    with pytest.raises(StudyError, match=r"run\.sampler.*did you mean 'sobol'"):
        linear("sobel")
    with pytest.raises(StudyError, match=r"limits\.w: is not a metric"):
        linear("lhs", "[limits]\nw = {min = 1}\n")
    with pytest.raises(StudyError, match=r"correlation\[0\]\.coefficient"):
        linear("lhs", '[[correlation]]\nparameters = ["x1", "x2"]\ncoefficient = 1.5\n')
    text = LINEAR.format(sampler="lhs").replace("[inputs]", "[inputs]\nx3 = 1")
    from tolerance.study import load_study as load_text

    with pytest.raises(StudyError, match=r"inputs\.x3: unknown key"):
        load_text("s.toml", text=text)


def test_a_normal_spread_that_reaches_zero_is_refused_for_a_positive_quantity():
    # a 50 % tolerance at 1 sigma sampled 2 % negative resistors, solved as converged with
    # negative dissipations that passed their ratings; 6 sigma is about 1e-9 of the units
    # (scipy.stats.norm.cdf(-6) = 9.9e-10)
    from tolerance.api import demo_text
    from tolerance.study import load_study as load_text

    base = demo_text()
    assert 'tolerance = "5%"' in base
    for tol, sigmas, refused in (("50%", 1, True), ("60%", 3, True), ("45%", 3, False),
                                 ("50%", 3, True)):
        text = base.replace('tolerance = "5%"', f'tolerance = "{tol}"\nsigmas = {sigmas}', 1)
        if refused:
            with pytest.raises(StudyError, match="parts.RB.tolerance: this normal spread "
                                                 "reaches zero within 6 sigma"):
                load_text("wide.toml", text=text)
        else:
            p = load_text("wide.toml", text=text).parameter("RB")
            assert p.distribution.ppf(np.array([1e-9]))[0] > 0


@pytest.mark.parametrize("x1, key, told", [
    ('{min = "-1 V", max = "3 V", sigmas = 6}', "inputs.x1.sigmas", "no meaning for a uniform"),
    ('{min = "-1 V", max = "3 V", typ = "1 V", nominal = "0 V"}', "inputs.x1.nominal",
     "typ or nominal, not both"),
    ('{nominal = "1 V", tolerance = "10%", distribution = "fixed"}', "inputs.x1.distribution",
     "takes no tolerance"),
    ('{nominal = "1 V", tolerance = "10%", distribution = "uniform", sigmas = 2}',
     "inputs.x1.sigmas", "no meaning for a uniform"),
])
def test_keys_a_distribution_would_ignore_are_refused(write_study, x1, key, told):
    # common practice, no source: each was accepted and silently ignored (the tolerance
    # dropped, typ overridden by nominal, sigmas without effect)
    text = LINEAR.format(sampler="random").replace('x1 = {min = "-1 V", max = "3 V"}',
                                                   f"x1 = {x1}")
    with pytest.raises(StudyError, match=re.escape(key) + ".*" + told):
        load_study(write_study(text))


@pytest.mark.parametrize("spec, key", [
    ('{nominal = "0 degC", tolerance = "10%"}', "ambient.temperature.tolerance"),
    ('{nominal = "0 degC", tolerance = 0.1}', "ambient.temperature.tolerance"),
    ('{min = "-20 degC", max = "55 degC", drift = "2%"}', "ambient.temperature.drift"),
])
def test_a_share_of_an_absolute_temperature_is_refused(spec, key):
    # 10 % of 0 degC was taken of 273.15 K: +-27.3 K; a drift widened it the same way
    from tolerance.api import demo_text
    from tolerance.study import load_study as load_text

    text = demo_text().replace('temperature = {min = "-20 degC", max = "55 degC"}',
                               f"temperature = {spec}")
    with pytest.raises(StudyError, match=re.escape(key)):
        load_text("t.toml", text=text)
    ok = demo_text().replace('temperature = {min = "-20 degC", max = "55 degC"}',
                             'temperature = {nominal = "0 degC", tolerance = "5 K"}')
    p = load_text("t.toml", text=ok).parameter("ambient.temperature")
    assert (p.low, p.high) == pytest.approx((268.15, 278.15))


def test_a_limit_on_a_switching_metric_says_how_to_compute_it():
    # a turn_off_delay limit on a static stage was refused as "not a metric of this stage"
    from tolerance.api import demo_text
    from tolerance.study import load_study as load_text

    text = demo_text().replace("[limits]\n", '[limits]\nturn_off_delay = {max = "1 us"}\n', 1)
    with pytest.raises(StudyError, match=r"limits\.turn_off_delay: is computed only with "
                                         r"\[switching\] enabled = true"):
        load_text("t.toml", text=text)
    on = load_text("t.toml", text=text + "\n[switching]\nenabled = true\n")
    assert any(c.metric == "turn_off_delay" and c.maximum == 1e-6 for c in on.criteria)


def test_the_api_refuses_what_the_command_line_refuses(linear, tmp_path):
    # common practice, no source: the API caps a run at 1e9 samples as the study file and
    # the command line do (1e10 grew to 8.6 GB before it was stopped), and takes whole
    # numbers only (2.7 samples were cut to 2)
    from tolerance.api import UsageError

    study = linear()
    for kwargs, text in [({"samples": 10**10}, "from 1 to 1,000,000,000"),
                         ({"samples": 2.7}, "whole number"), ({"samples": "abc"}, "whole"),
                         ({"seed": 1.5}, "seed must be a whole number")]:
        with pytest.raises(UsageError, match=text):
            run(study, **kwargs)
    res = run(study, samples=50, out=tmp_path / "r")
    # a missing column is named, not blamed on the files (it read as a damaged chunk)
    with pytest.raises(KeyError, match="no column 'nope'"):
        res.column("nope")
    assert np.array_equal(res.column("y"), res.samples["y"].to_numpy())
    with pytest.raises(KeyError, match="no column 'nope'"):
        res.column("nope")
    assert res.metrics["mean"].dtype == float and res.metrics["unit"].dtype == object
    from tolerance.api import UsageError as Refused

    for kwargs, text in [({"jobs": 1.5}, "jobs must be a whole number"),
                         ({"overrides": {"x1": 1.0}}, "Override"),
                         ({"resume": True}, "give out= as well")]:
        with pytest.raises(Refused, match=text):
            run(study, samples=10, **kwargs)
    with pytest.raises(ValueError, match="measure must be"):
        res.plot.tornado("y", measure="sobol")
    import tolerance

    assert tolerance.load_study().title == load_study(None).title


def test_a_cut_normal_with_typ_at_a_limit_is_the_half_normal_from_typ():
    # {min = 0 V, typ = 0 V, max = 0.4 V, distribution = "truncnormal"} (a logic low level):
    # the half-normal from typ with sigma 0.4 / 3, cut at 3 sigma; and its mirror image with
    # typ at max, untested until a mutation round dropped the guard of a side without spread
    # (every sample NaN). scipy.stats.truncnorm as reference
    u = np.linspace(0.01, 0.99, 9)
    low = dist.TruncatedSplitNormal(0.0, 0.0, 0.4 / 3, 0.0, 0.4)
    ref = sps.truncnorm(0.0, 3.0, loc=0.0, scale=0.4 / 3)
    assert_allclose(low.ppf(u), ref.ppf(u), rtol=1e-9)
    high = dist.TruncatedSplitNormal(5.0, 0.4 / 3, 0.0, 4.6, 5.0)
    ref = sps.truncnorm(-3.0, 0.0, loc=5.0, scale=0.4 / 3)
    assert_allclose(high.ppf(u), ref.ppf(u), rtol=1e-9)
    x = np.array([4.7, 4.8, 4.9])
    assert_allclose(high.cdf(x), ref.cdf(x), rtol=1e-9)


def test_normal_ppf_at_the_ends_of_the_unit_interval_is_finite():
    # scrambled Sobol points are multiples of 2^-30, so u = 0 comes up once in 2^30 points of
    # every dimension: the ends are clipped to 1e-12 (scipy.special.ndtri(1e-12) = -7.03 as
    # reference), never an infinite value (a mutation round dropped the clip unseen)
    from scipy import special

    x = dist.Normal(10.0, 2.0).ppf(np.array([0.0, 1.0]))
    assert np.all(np.isfinite(x))
    assert_allclose(x, 10.0 + 2.0 * special.ndtri([1e-12, 1.0 - 1e-12]), rtol=1e-12)
