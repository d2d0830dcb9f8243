"""Batched damped Newton solver and the stacked small linear solve."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize, special

from tolerance.models.newton import newton_solve, solve_stacked
from tolerance.models.transistor import critical_voltage, limit_junction_step


@pytest.mark.parametrize("n", [1, 2, 3, 4, 6])
def test_solve_stacked_matches_numpy(n):
    # reference: numpy.linalg.solve (LAPACK gesv); well-conditioned random systems, so the
    # solutions agree to rounding (1e-10 relative covers condition numbers up to ~1e5)
    rng = np.random.default_rng(n)
    a = rng.normal(size=(500, n, n)) + 3 * np.eye(n) * rng.choice([-1, 1], size=(500, 1, 1))
    b = rng.normal(size=(500, n))
    assert_allclose(solve_stacked(a, b), np.linalg.solve(a, b[..., None])[..., 0],
                    rtol=1e-10, atol=1e-12)


def test_solve_stacked_pivots():
    # a zero leading pivot needs a row exchange (Gaussian elimination with partial pivoting)
    a = np.array([[[0.0, 1.0, 2.0], [1.0, 0.0, 3.0], [4.0, -3.0, 8.0]],
                  [[0.0, 2.0, 0.0], [3.0, 0.0, 0.0], [0.0, 0.0, 5.0]]])
    b = np.array([[1.0, 2.0, 3.0], [2.0, 3.0, 5.0]])
    assert_allclose(solve_stacked(a, b), np.linalg.solve(a, b[..., None])[..., 0], rtol=1e-13)
    a2 = np.array([[[0.0, 1.0], [2.0, 0.0]]])
    assert_allclose(solve_stacked(a2, np.array([[3.0, 4.0]])), [[2.0, 3.0]], rtol=1e-15)


def test_singular_sample_gives_nonfinite_not_an_exception():
    a = np.array([[[1.0, 2.0], [2.0, 4.0]], [[1.0, 0.0], [0.0, 1.0]]])
    x = solve_stacked(a, np.array([[1.0, 1.0], [1.0, 2.0]]))
    assert not np.all(np.isfinite(x[0]))
    assert_allclose(x[1], [1.0, 2.0])
    a3 = np.zeros((2, 3, 3))
    a3[1] = np.eye(3)
    x3 = solve_stacked(a3, np.ones((2, 3)))
    assert not np.all(np.isfinite(x3[0])) and np.allclose(x3[1], 1.0)


class DiodeResistor:
    """Diode in series with a resistor across a source: unknown the diode voltage v.

    F(v) = (V - v)/R - I_S (exp(v / nV_T) - 1) [A].
    """

    def __init__(self, v_source, r, i_s, nvt):
        self.v_source, self.r, self.i_s, self.nvt = v_source, r, i_s, nvt

    def subset(self, idx):
        return DiodeResistor(self.v_source[idx], self.r[idx], self.i_s[idx], self.nvt[idx])

    def residual(self, x):
        v = x[:, 0]
        e = np.exp(np.minimum(v / self.nvt, 700.0))
        f = (self.v_source - v) / self.r - self.i_s * (e - 1)
        j = -1 / self.r - self.i_s * e / self.nvt
        return f[:, None], j[:, None, None], np.abs(self.v_source / self.r)

    def limit(self, x_new, x_old):
        vcrit = critical_voltage(self.i_s, self.nvt)
        return limit_junction_step(x_new[:, 0], x_old[:, 0], self.nvt, vcrit)[:, None]


def _diode_batch(n, seed=11):
    rng = np.random.default_rng(seed)
    return DiodeResistor(rng.uniform(0.5, 50, n), 10 ** rng.uniform(0, 5, n),
                         10 ** rng.uniform(-16, -9, n), rng.uniform(0.025, 0.06, n))


def test_diode_resistor_against_lambert_w():
    # closed form of a diode with series resistor (from memory; Lambert W in scipy.special):
    # I = (nV_T/R) W[(I_S R / nV_T) exp((V + I_S R)/nV_T)] - I_S
    sys_ = _diode_batch(2000)
    res = newton_solve(sys_, np.zeros((2000, 1)))
    assert res.converged.all()
    v_t, r, i_s = sys_.nvt, sys_.r, sys_.i_s
    arg_log = np.log(i_s * r / v_t) + (sys_.v_source + i_s * r) / v_t
    # W of a huge argument through its logarithm: w + ln w = ln(argument), solved by brentq
    w = np.empty_like(arg_log)
    small = arg_log < 600
    w[small] = special.lambertw(np.exp(arg_log[small])).real
    w[~small] = [optimize.brentq(lambda w, a=a: w + np.log(w) - a, 1.0, a, xtol=1e-14,
                                 rtol=1e-15) for a in arg_log[~small]]
    current = v_t / r * w - i_s
    v_expected = sys_.v_source - current * r
    assert_allclose(res.x[:, 0], v_expected, rtol=1e-9, atol=1e-9)


def test_matches_per_sample_scipy_root():
    # reference: scipy.optimize.root (hybr, xtol 1e-13) per sample
    sys_ = _diode_batch(300, seed=5)
    res = newton_solve(sys_, np.zeros((300, 1)))
    for k in range(300):
        one = sys_.subset(np.array([k]))
        # the residual times R (a voltage) keeps hybr's tests well scaled; it starts from the
        # diode voltage that would carry the whole short-circuit current (hybr gives up
        # without warning when its first step overflows the exponential)
        fun = lambda v: one.residual(np.array([[v[0]]]))[0][0] * one.r  # noqa: E731
        v0 = one.nvt * np.log1p(one.v_source / (one.r * one.i_s))
        ref = optimize.root(fun, v0, method="hybr", options={"xtol": 1e-13})
        assert abs(fun(ref.x)[0]) < 1e-9  # hybr may report "no progress" at the rounding floor
        assert res.x[k, 0] == pytest.approx(ref.x[0], rel=1e-9, abs=1e-10)


class NoRoot:
    """x^2 + c = 0: real roots only for c <= 0."""

    def __init__(self, c):
        self.c = c

    def subset(self, idx):
        return NoRoot(self.c[idx])

    def residual(self, x):
        return (x[:, 0] ** 2 + self.c)[:, None], (2 * x[:, 0])[:, None, None], np.ones_like(self.c)

    def limit(self, x_new, x_old):
        return x_new


def test_non_convergence_is_flagged_not_dropped():
    c = np.array([-4.0, 1.0, -9.0, 2.0, -1.0])
    res = newton_solve(NoRoot(c), np.full((5, 1), 1.3), max_iterations=80)
    assert res.x.shape == (5, 1)
    assert_allclose(res.converged, [True, False, True, False, True])
    assert_allclose(res.x[res.converged, 0], [2.0, 3.0, 1.0], rtol=1e-12)
    assert np.all(np.isnan(res.x[~res.converged]))


def test_iteration_cap_and_counts():
    sys_ = _diode_batch(50)
    res = newton_solve(sys_, np.zeros((50, 1)), max_iterations=2)
    assert not res.converged.any() and np.all(np.isnan(res.x))
    full = newton_solve(sys_, np.zeros((50, 1)))
    assert full.converged.all() and full.iterations.max() <= 60
    assert full.iterations.min() >= 2


def test_singular_jacobian_sample_fails_alone():
    # x = 0 start on x^2 - 4 = 0 has a zero Jacobian: that sample fails, the others converge
    c = np.array([-4.0, -4.0, -4.0])
    res = newton_solve(NoRoot(c), np.array([[0.0], [1.0], [3.0]]))
    assert_allclose(res.converged, [False, True, True])
    assert np.isnan(res.x[0, 0])


def test_compaction_gives_the_same_answer_as_one_sample_at_a_time():
    # the active-set compaction must not mix samples up (exact: same iterations per sample)
    sys_ = _diode_batch(400, seed=2)
    batch = newton_solve(sys_, np.zeros((400, 1)))
    for k in (0, 57, 199, 399):
        alone = newton_solve(sys_.subset(np.array([k])), np.zeros((1, 1)))
        assert alone.x[0, 0] == batch.x[k, 0]
        assert alone.iterations[0] == batch.iterations[k]


def test_damping_caps_the_step():
    class Linear:
        def subset(self, idx):
            return self

        def residual(self, x):
            return (x - 100.0), np.ones((x.shape[0], 1, 1)), np.ones(x.shape[0])

        def limit(self, x_new, x_old):
            return x_new

    res = newton_solve(Linear(), np.zeros((1, 1)), max_step=5.0, max_iterations=30)
    # 100 V at most 5 V per step: 20 damped steps, then the exact one to confirm
    assert res.converged[0] and res.iterations[0] == 21
    assert res.x[0, 0] == pytest.approx(100.0)
