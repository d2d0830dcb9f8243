"""Thermal models: junction temperature, heatsink chain, derating, electro-thermal fixed point."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize

from tolerance.models import thermal

C0 = 273.15


def test_junction_temperature_natural_convection():
    # JEDEC JESD51-1/-2: T_j = T_a + theta_JA * P; 0.3 W in a 200 K/W package at 25 degC
    # (the TO-92 class figure of REFERENCES, from memory) gives 85 degC
    assert_allclose(thermal.junction_temperature(0.3, C0 + 25, 200.0), C0 + 85.0)


def test_heatsink_chain():
    # JESD51 series chain theta_JA = theta_JC + theta_CS + theta_SA; a constructed example:
    # 15 W through 1.5 + 0.5 + 3 K/W from 40 degC ambient gives 115 degC
    theta = thermal.heatsink_resistance(1.5, 0.5, 3.0)
    assert_allclose(theta, 5.0)
    assert_allclose(thermal.junction_temperature(15.0, C0 + 40, theta), C0 + 115.0)


def test_heatsink_parallels_the_package_path():
    # JESD51 steady network: theta_JC, then theta_CS + theta_SA in parallel with the
    # package's own theta_CA = theta_JA - theta_JC. Constructed: theta_JC 2, theta_JA 62,
    # sink 0.5 + 9.5 = 10 against 60 gives 2 + 600 / 70 = 10.571 K/W (hand calculation)
    assert_allclose(thermal.heatsink_resistance(2.0, 0.5, 9.5, 62.0), 2.0 + 600.0 / 70.0)
    sinks = np.array([0.1, 1.0, 6.0, 100.0, 1e4])
    theta = thermal.heatsink_resistance(2.0, 0.5, sinks, 62.0)
    # common practice, no source: any sink cools the part, the better sink the more; a sink
    # poorer than free air leaves it a little below its free-air figure (the series chain
    # put it at 102.5 K/W on a 100 K/W sink), and an ideal one (theta_SA = 0) leaves theta_JC
    # plus theta_CS in parallel with the package's own path
    assert np.all(theta < 62.0) and np.all(np.diff(theta) > 0)
    assert theta[-1] == pytest.approx(62.0, rel=0.01)
    assert_allclose(thermal.heatsink_resistance(2.0, 0.5, 0.0, 62.0), 2.0 + 0.5 * 60 / 60.5)


def test_derating_curve_break_points():
    # MIL-PRF-39017 / IEC 60115-1 practice: full power to the rated ambient (70 degC),
    # linear to zero at the maximum element temperature (155 degC here)
    ta = C0 + np.array([25.0, 70.0, 112.5, 155.0, 170.0])
    p = thermal.derated_power(0.25, ta, C0 + 70, C0 + 155)
    assert_allclose(p, [0.25, 0.25, 0.125, 0.0, 0.0], atol=1e-15)


def test_fixed_point_matches_scipy_root_per_sample():
    rng = np.random.default_rng(4)
    n = 300
    ta = C0 + rng.uniform(-40, 85, n)
    theta = rng.uniform(50, 250, n)
    p0 = rng.uniform(0.05, 0.4, n)
    k = rng.uniform(0.0, 0.012, n)

    def power_at(t, idx):
        # dissipation rising with temperature (gain and leakage grow when hot)
        return {"q": p0[idx] * np.exp(k[idx] * (t["q"] - (C0 + 25)))}

    res = thermal.electrothermal(power_at, ta, {"q": theta}, settle=1e-6, max_iterations=400)
    for i in range(n):
        f = lambda t: t - ta[i] - theta[i] * p0[i] * np.exp(k[i] * (t - (C0 + 25)))  # noqa: E731
        if res.settled[i]:
            # scipy.optimize.brentq as the per-sample reference for the stable fixed point
            ref = optimize.brentq(f, ta[i], res.temperatures["q"][i] + 1.0, xtol=1e-10)
            assert res.temperatures["q"][i] == pytest.approx(ref, abs=1e-4)
        else:
            # no fixed point: t - ta - theta P(t) stays positive... never zero below 1000 K
            grid = np.linspace(ta[i], ta[i] + 1000, 20001)
            assert np.all(f(grid) < 0)
    assert res.settled.mean() > 0.8


@pytest.mark.parametrize("slope, most", [(-0.98, 4), (-0.7, 4), (0.9, 16), (0.97, 16)])
def test_steep_loops_settle_in_a_few_iterations(slope, most):
    # a linear power law P = P0 + k (T - T1) through the fixed point T1 = T_a + theta P0 with
    # loop slope theta k = slope: the plain iteration T <- T_a + theta P(T) contracts by
    # |slope| per step (80 to 230 steps from the ambient to 0.05 K at 0.97 or -0.98; common
    # practice, no source), the secant step solves a linear loop exactly from its third
    # iterate; where it extrapolates (slope > 0) it moves at most 5 K beyond the plain step,
    # so the up to 62 K still to go after the first step take up to a dozen more
    ta = np.full(3, C0 + 25.0)
    theta = np.array([50.0, 80.0, 120.0])
    p0 = np.array([0.5, 0.8, 0.3])
    k = slope / theta
    t1 = ta + theta * p0
    res = thermal.electrothermal(lambda t, i: {"q": p0[i] + k[i] * (t["q"] - t1[i])}, ta,
                                 {"q": theta})
    assert res.settled.all()
    assert res.iterations.max() <= most
    assert_allclose(res.temperatures["q"], t1, atol=1e-6)


def test_secant_keeps_the_stable_fixed_point_of_a_loop_with_two():
    # P0 exp(k (T - T_a)): two fixed points once theta P0 k e < 1, the lower one stable
    # (0 < F' < 1) and the upper one unstable (F' > 1); the loop must settle on the lower one
    # (scipy.optimize.brentq below the tangency point T_a + 1/k as the reference)
    ta = np.full(4, C0 + 25.0)
    theta = np.full(4, 100.0)
    p0 = np.array([0.2, 0.3, 0.33, 0.36])
    k = np.full(4, 0.01)
    res = thermal.electrothermal(lambda t, i: {"q": p0[i] * np.exp(k[i] * (t["q"] - ta[i]))},
                                 ta, {"q": theta}, settle=1e-6, max_iterations=400)
    assert res.settled.all()
    for i in range(4):
        f = lambda t: t - ta[i] - theta[i] * p0[i] * np.exp(k[i] * (t - ta[i]))  # noqa: E731
        lower = optimize.brentq(f, ta[i], ta[i] + 1.0 / k[i], xtol=1e-10)
        assert res.temperatures["q"][i] == pytest.approx(lower, abs=1e-4)


def test_runaway_is_flagged_and_a_stable_case_settles():
    ta = np.full(2, C0 + 25.0)
    theta = np.array([100.0, 100.0])
    p0 = np.array([0.2, 0.2])
    # loop gain theta * dP/dT: 100 * 0.2 * 0.01 = 0.2 (stable) and 100 * 0.2 * 0.1 = 2 (no
    # fixed point for an exponential power law once theta P0 k e > 1; common practice)
    k = np.array([0.01, 0.1])
    res = thermal.electrothermal(lambda t, i: {"q": p0[i] * np.exp(k[i] * (t["q"] - ta[i]))}, ta,
                                 {"q": theta}, limit={"q": np.full(2, C0 + 150)})
    assert res.settled.tolist() == [True, False]
    assert np.isnan(res.temperatures["q"][1])


def test_shared_junction_sums_the_powers():
    ta = np.full(3, C0 + 25.0)
    res = thermal.electrothermal(lambda t, i: {"a": np.full(i.size, 0.1),
                                               "b": np.full(i.size, 0.3)}, ta,
                                 {"a": np.full(3, 50.0), "b": np.full(3, 50.0)},
                                 shared={"a": "b"})
    # one die: both dissipations through one theta_JA (JESD51 relation on the sum)
    assert_allclose(res.temperatures["a"], C0 + 25 + 50 * 0.4)
    assert_allclose(res.temperatures["b"], C0 + 25 + 50 * 0.4)


def test_a_trial_temperature_that_does_not_solve_is_backed_off_not_called_a_runaway():
    # P = P0 - k (T - T_a) with theta k = 1 (F' = -1): the fixed point is half the first plain
    # step above the ambient (T_a + 20 K, exact); the circuit "does not solve" above
    # T_a + 30 K, where that first step lands; a sample that never solves is not converged
    ta = np.full(3, C0 + 60.0)
    theta = np.full(3, 100.0)
    p0 = np.array([0.4, 0.4, 0.4])
    k = 1.0 / theta

    def power_at(t, i):
        p = p0[i] - k[i] * (t["q"] - ta[i])
        out = np.where(t["q"] > ta[i] + 30.0, np.nan, p)
        return {"q": np.where(i == 2, np.nan, out)}

    res = thermal.electrothermal(power_at, ta, {"q": theta}, limit={"q": np.full(3, C0 + 150)})
    assert res.settled.tolist() == [True, True, False]
    assert res.failed.tolist() == [False, False, True]
    assert_allclose(res.temperatures["q"][:2], ta[:2] + 20.0, atol=0.05)
    assert np.isnan(res.temperatures["q"][2])


def test_a_first_step_past_the_cap_comes_back_to_a_stable_point():
    # F' = -3 (dissipation falling steeply past V_s / 2R): the first plain step lands 150 K
    # above a 110 degC ambient, beyond T_j max + 100 K, and was flagged at once; the fixed
    # point is T_a + 150 / 4 = T_a + 37.5 K (exact), below T_j max
    ta = np.full(1, C0 + 110.0)
    theta = np.full(1, 300.0)
    p0, k = 0.5, 3.0 / 300.0
    res = thermal.electrothermal(lambda t, i: {"q": p0 - k * (t["q"] - ta[i])}, ta,
                                 {"q": theta}, limit={"q": np.full(1, C0 + 150)})
    assert res.settled.all()
    assert_allclose(res.temperatures["q"], ta + 37.5, atol=0.05)
    # a true runaway still heating at the cap is flagged there
    res = thermal.electrothermal(lambda t, i: {"q": np.full(i.size, 1.0)}, ta, {"q": theta},
                                 limit={"q": np.full(1, C0 + 150)})
    assert not res.settled.any() and res.iterations[0] < 10


def test_a_runaway_whose_circuit_stops_solving_above_its_limit_is_still_a_runaway():
    # exponential dissipation: still heating when solved at 436 K and 480 K, above the 423 K
    # limit, then the circuit does not solve above 480 K; it was given up as not converged,
    # which took it out of the runaway count (common practice, no source: a junction seen
    # heating above T_j max has run away whatever its circuit does further up)
    def power_at(t, i):
        return {"q": np.where(t["q"] > 480.0, np.nan, np.exp((t["q"] - 300.0) / 30.0))}

    res = thermal.electrothermal(power_at, np.array([300.0]), {"q": np.array([50.0])},
                                 limit={"q": np.array([423.0])})
    assert not res.settled[0] and not res.failed[0]
    # a constant dissipation given as a scalar broadcasts over the samples
    res = thermal.electrothermal(lambda t, i: {"a": 0.5}, np.array([300.0, 310.0]),
                                 {"a": np.array([10.0, 10.0])})
    assert_allclose(res.temperatures["a"], [305.0, 315.0])


def _foster_peak_by_integration(network, p_on, p_off, period, duty, periods):
    """Peak junction rise of a Foster network driven from cold by a square wave, integrated
    with scipy's solve_ivp phase by phase (each stage C dT/dt = P - T / R, C = tau / R)."""
    from scipy.integrate import solve_ivp

    r = np.array([s[0] for s in network])
    c = np.array([s[1] for s in network]) / r
    t = np.zeros(len(network))
    peak = 0.0
    for _ in range(periods):
        for p, span in ((p_on, duty * period), (p_off, (1.0 - duty) * period)):
            sol = solve_ivp(lambda _, y, p=p: (p - y / r) / c, (0.0, span), t, method="LSODA",
                            rtol=1e-11, atol=1e-12)
            t = sol.y[:, -1]
            peak = max(peak, float(t.sum()))
    return peak


@pytest.mark.parametrize("period, duty", [(2.0, 0.3), (20.0, 0.25), (0.5, 0.7)])
def test_periodic_peak_of_a_foster_network_matches_a_direct_integration(period, duty):
    # the closed form sum R_i [P_off + (P_on - P_off)(1 - e^(-t_on/tau_i)) / (1 - e^(-T/tau_i))]
    # (superposition of first-order RC step responses, a geometric series over the periods;
    # textbook RC circuit) against scipy.integrate.solve_ivp of the same network from cold,
    # run for 20 of its longest time constants (e^-20 of the start left)
    network = ((4.0, 0.2), (30.0, 3.0))
    periods = int(np.ceil(20 * 3.0 / period)) + 1
    got = thermal.periodic_peak_rise(1.5, 0.1, network, 1.0 / period, duty)
    want = _foster_peak_by_integration(network, 1.5, 0.1, period, duty, periods)
    assert got == pytest.approx(want, rel=1e-6)


def test_peak_weight_tends_to_the_duty_and_to_one():
    network = thermal.foster_network(62.5, 1.9, 0.05, 120.0)
    assert network == ((1.9, 0.05), (60.6, 120.0))
    # common practice, no source: a period far below every time constant gives the period's
    # average (weight = duty, to first order D (1 + (1 - D) T / 2 tau): 2e-6 relative here
    # on the die stage), an on-time far beyond them the on-state's own rise (weight 1)
    assert thermal.peak_weight(network, 1e5, 0.3) == pytest.approx(0.3, rel=1e-5)
    assert thermal.peak_weight(network, 1e-5, 0.3) == pytest.approx(1.0, rel=1e-6)
    assert thermal.peak_weight(network, None, 1.0) == 1.0
    # without theta_jc the die stage takes half of theta (thermal.DIE_SHARE_WITHOUT_JC)
    assert thermal.foster_network(200.0, None, 0.3, 30.0) == ((100.0, 0.3), (100.0, 30.0))
    # an off-state that dissipates more than the on-state peaks at the end of the off-time
    # (the same closed form with the phases swapped; textbook RC circuit)
    up = thermal.periodic_peak_rise(0.1, 1.5, network, 1e-3, 0.3)
    assert up == pytest.approx(thermal.periodic_peak_rise(1.5, 0.1, network, 1e-3, 0.7))


def test_a_device_that_runs_away_leaves_the_others_their_own_temperatures():
    # two dice on their own thermal paths: "out" runs away (exponential dissipation with loop
    # gain above 1/e: no fixed point, common practice), "drv" dissipates a little more the
    # hotter "out" is. The whole unit read NaN; the driver's own loop has a fixed point with
    # "out" held at its limit: T = T_a + theta (0.1 + 1e-4 (T_out - T_a)) (exact, linear)
    ta = np.full(1, C0 + 25.0)
    limit = {"out": np.full(1, C0 + 150.0), "drv": np.full(1, C0 + 150.0)}

    def power_at(t, i):
        return {"out": 0.2 * np.exp(0.1 * (t["out"] - ta[i])),
                "drv": 0.1 + 1e-4 * (t["out"] - ta[i])}

    res = thermal.electrothermal(power_at, ta, {"out": np.full(1, 100.0),
                                                "drv": np.full(1, 200.0)}, limit=limit)
    assert not res.settled[0] and not res.failed[0]
    assert np.isnan(res.temperatures["out"][0])
    assert res.runaway["out"][0] and not res.runaway["drv"][0]
    want = ta[0] + 200.0 * (0.1 + 1e-4 * 125.0)
    assert res.temperatures["drv"][0] == pytest.approx(want, abs=0.05)
    # one die shared by two devices runs away whole
    res = thermal.electrothermal(power_at, ta, {"out": np.full(1, 100.0),
                                                "drv": np.full(1, 100.0)},
                                 shared={"drv": "out"}, limit=limit)
    assert np.isnan(res.temperatures["drv"][0]) and np.isnan(res.temperatures["out"][0])


def _library_thermal_figures():
    """(package, theta_ja, theta_jc) of every transistor class and die of the part library."""
    from tolerance.models.parts import library

    out = []
    for entry in library().values():
        figures = [entry.figures] if entry.kind != "darlington" else list(entry.dies.values())
        for f in figures:
            f = f if isinstance(f, dict) else f.figures
            out.append((entry.package, f["theta_ja"], f["theta_jc"]))
    return out


def test_without_theta_jc_the_peak_is_never_below_the_two_stage_network():
    # one stage with the package's long constant gave a lower peak than the part's own two
    # stages (TO-92, 83 of 200 K/W, 0.3 s / 30 s, at a 10 s period and duty 0.5: 0.541
    # against 0.732, hand calculation with the closed form below). Each stage's share of the
    # peak, (1 - e^(-t_on/tau)) / (1 - e^(-T/tau)), falls with tau (the chord slope of the
    # concave a^D; textbook RC circuit), so the weight grows with the die stage's share:
    # half of theta (small packages' theta_JC is 30 to 50 % of theta_JA, from memory) is
    # never below a library class's own split
    def one(tau, period, duty):
        return np.expm1(-duty * period / tau) / np.expm1(-period / tau)

    to92 = thermal.PACKAGE_TIME_CONSTANTS["TO-92"]
    assert one(30.0, 10.0, 0.5) == pytest.approx(0.5416, abs=1e-4)
    split = (83.0 * one(0.3, 10.0, 0.5) + 117.0 * one(30.0, 10.0, 0.5)) / 200.0
    assert split == pytest.approx(0.7318, abs=1e-4)
    fallback = thermal.foster_network(200.0, None, *to92)
    assert fallback == ((100.0, 0.3), (100.0, 30.0))
    assert thermal.peak_weight(fallback, 0.1, 0.5) == pytest.approx(
        0.5 * one(0.3, 10.0, 0.5) + 0.5 * one(30.0, 10.0, 0.5), rel=1e-12)
    figures = _library_thermal_figures()
    assert len(figures) >= 5
    for package, theta_ja, theta_jc in figures:
        constants = thermal.PACKAGE_TIME_CONSTANTS[package]
        own = thermal.foster_network(theta_ja, theta_jc, *constants)
        without = thermal.foster_network(theta_ja, None, *constants)
        for period in (0.01, 0.1, 1.0, 10.0, 100.0, 1000.0):
            for duty in (0.05, 0.25, 0.5, 0.75, 0.95):
                for d in (duty, 1.0 - duty):  # both peaks: end of the on- and of the off-time
                    assert (thermal.peak_weight(without, 1.0 / period, d)
                            >= thermal.peak_weight(own, 1.0 / period, d) - 1e-15)
    # a part of unknown package takes each stage's shortest constant of the table (the
    # higher peak, as above)
    assert thermal.UNKNOWN_PACKAGE_TIME_CONSTANTS == (0.05, 30.0)


def test_a_resistors_single_pole_weights():
    # one Foster stage (R, tau): the peak's weight (1 - e^(-t_on/tau)) / (1 - e^(-T/tau))
    # (textbook RC circuit, as thermal.peak_weight); a static drive that is on gives the
    # on-state's dissipation, a period far below tau the average (first order
    # D (1 + (1 - D) T / 2 tau), common practice, no source), one far above the on-state's
    assert thermal.single_pole_weights(1.0, None, 1.0) == (1.0, 0.0)
    w_on, w_off = thermal.single_pole_weights(1.0, 2e3, 0.1)
    assert w_on == pytest.approx(0.1 * (1 + 0.9 * 5e-4 / 2), rel=1e-7)
    assert w_off == pytest.approx(0.9 * (1 + 0.1 * 5e-4 / 2), rel=1e-7)
    w_on, w_off = thermal.single_pole_weights(1.0, 0.01, 0.25)
    assert w_on == pytest.approx(-np.expm1(-25.0) / -np.expm1(-100.0), rel=1e-15)
    assert w_on == pytest.approx(1.0, abs=1e-10)
    # the peak dissipation of a resistor on 25 s of every 100 s is its on-state's
    assert thermal.peak_power(0.16, 0.0, (w_on, w_off)) == pytest.approx(0.16, rel=1e-10)


def test_a_scan_finds_a_stable_point_below_the_cap_that_the_first_step_jumps():
    # residual r(x) = T_a + theta P - T = c (x - 80) (x - 200), x = T - T_a [K], c = 3/160:
    # r(0) = 300 K, so the first plain step lands at x = 300, beyond the cap (T_j max + 100 K
    # = x 225), where r = 68 K > 0: a unit still heating at its cap, called a runaway though
    # a stable crossing (r' = c (2 x - 280) < 0) lies at x = 80 (exact, hand calculation)
    ta = np.full(2, C0 + 25.0)
    theta = np.full(2, 100.0)
    c = 3.0 / 160.0

    def power_at(t, i):
        x = t["q"] - ta[i]
        rise = c * (x - 80.0) * (x - 200.0) + x
        # sample 1: the same curve lifted by 200 K, with no crossing below the cap
        return {"q": (rise + np.where(i == 1, 200.0, 0.0)) / theta[i]}

    res = thermal.electrothermal(power_at, ta, {"q": theta}, limit={"q": np.full(2, C0 + 150)})
    assert res.settled.tolist() == [True, False]
    assert res.temperatures["q"][0] == pytest.approx(C0 + 25.0 + 80.0, abs=0.05)
    assert np.isnan(res.temperatures["q"][1]) and res.runaway["q"][1]


def test_a_loop_cut_off_before_it_settles_reads_nan():
    # one device, 1 W at any temperature, 50 K/W from 300 K: the first step goes from 300 K
    # to 350 K, far more than the 0.05 K that settles a loop, so after one iteration it has
    # not settled and reads NaN, a runaway (thermal.FixedPointResult); a mutation round kept
    # the last iterate unseen. With room to settle: T_a + theta P = 350 K (by hand)
    def power(temps, idx):
        return {"Q1": np.ones(idx.size)}

    cut = thermal.electrothermal(power, np.array([300.0]), {"Q1": np.array([50.0])},
                                 max_iterations=1)
    assert not cut.settled[0] and not cut.failed[0]
    assert cut.runaway["Q1"][0] and np.isnan(cut.temperatures["Q1"][0])
    ok = thermal.electrothermal(power, np.array([300.0]), {"Q1": np.array([50.0])})
    assert ok.settled[0] and abs(ok.temperatures["Q1"][0] - 350.0) < 0.05
