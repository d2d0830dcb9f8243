"""Tests of the load models (tolerance.models.loads)."""

from __future__ import annotations

import math
import pickle
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import optimize

from tolerance.distributions import Fixed
from tolerance.models import loads
from tolerance.study import Reader, StudyError, _Context
from tolerance.units import format_quantity

ROOM = 298.15  # 25 degC [K]


def make(data: dict):
    """Read a [load] table; returns (spec, context, reader)."""
    ctx = _Context("study.toml")
    reader = Reader(data, "load", ctx)
    return loads.read_load(reader), ctx, reader


def nominal_samples(ctx, n):
    return {name: np.full(n, p.nominal) for name, p in ctx.parameters.items()}


def random_samples(ctx, n, rng):
    return {name: p.distribution.ppf(rng.uniform(size=n)) for name, p in ctx.parameters.items()}


def state_of(data, temperature=ROOM, supply=12.0, n=1):
    spec, ctx, _ = make(data)
    return spec.at(nominal_samples(ctx, n), np.full(n, temperature), np.full(n, supply))


COIL = {"kind": "coil", "resistance": "100 ohm", "inductance": "200 mH",
        "must_operate_voltage": "9 V"}
LAMP = {"kind": "lamp", "rated_voltage": "24 V", "rated_power": "5 W"}
LED = {"kind": "led", "count": 3, "forward_voltage": "2.1 V", "test_current": "20 mA",
       "series_resistance": "330R"}
RESISTOR = {"kind": "resistor", "resistance": "47 ohm", "tempco": "200 ppm/K",
            "power_rating": "2 W"}


# --------------------------------------------------------------------------------------------
# Coil
# --------------------------------------------------------------------------------------------


def test_copper_coefficient_iec60028():
    state = state_of(COIL, temperature=273.15 + 70.0)
    # IEC 60028: copper coefficient 0.00393 /K at 20 degC, so R(70 C) / R(20 C) = 1 + 0.00393 * 50
    assert_allclose(state.resistance / state.resistance_20, 1 + 0.00393 * 50, rtol=1e-14)
    state20 = state_of(COIL, temperature=293.15)
    # IEC 60028: the coefficient is referred to 20 degC, where R = R_20 (rounding only)
    assert_allclose(state20.resistance, 100.0, rtol=1e-14)


def test_coil_temperature_rise_adds_to_ambient():
    state = state_of({**COIL, "coil_temperature_rise": "30 K"}, temperature=273.15 + 40.0)
    assert_allclose(state.coil_temperature, 273.15 + 70.0, rtol=1e-14)
    # IEC 60028 coefficient applied at the hot winding's temperature (40 C ambient + 30 K)
    # for the pull-in: V_op(T) = V_op20 R(T) / R20 (common practice)
    assert_allclose(state.hot_resistance, 100.0 * (1 + 0.00393 * 50), rtol=1e-14)
    assert_allclose(state.operate_voltage, 9.0 * (1 + 0.00393 * 50), rtol=1e-14)
    # the stage switches on the cold winding, at the ambient: its current law, L/R and the
    # clamp's decay take R(40 C), up to 11 % more current than the hot winding's (an audit
    # found 16 of 20,000 valve units that passed saturation hot and failed it cold)
    assert_allclose(state.resistance, 100.0 * (1 + 0.00393 * 20), rtol=1e-14)
    assert_allclose(state.current(np.array([10.0]))[0], 10.0 / state.resistance, rtol=1e-14)
    assert_allclose(state.time_constant, 0.2 / state.resistance, rtol=1e-14)


def _pwm_coil_by_integration(r, ind, v_on, v_clamp, frequency, duty, periods=60):
    """The winding's current over a PWM drive, integrated period after period from zero with
    scipy.integrate.solve_ivp (L di/dt = v_on - R i on, -(V_c + R i) off until it stops):
    the last period's lowest, highest and on-time mean current."""
    from scipy.integrate import solve_ivp

    t_on, t_off = duty / frequency, (1 - duty) / frequency
    i = 0.0
    for _ in range(periods):
        # the second state integrates the current: its mean over the on-time
        on = solve_ivp(lambda t, y: [(v_on - r * y[0]) / ind, y[0]], (0, t_on), [i, 0.0],
                       rtol=1e-11, atol=1e-14)
        low, high, mean = i, on.y[0, -1], on.y[1, -1] / t_on

        def stopped(t, y):
            return y[0]

        stopped.terminal = True
        off = solve_ivp(lambda t, y: [-(v_clamp + r * y[0]) / ind], (0, t_off), [high],
                        rtol=1e-11, atol=1e-14, events=stopped)
        i = 0.0 if off.status == 1 else max(off.y[0, -1], 0.0)
    return low, high, mean


@pytest.mark.parametrize("frequency, duty, clamp", [
    ("200 Hz", 0.8, "diode"),   # the current never stops (L/R of 1.7 ms, 1 ms off)
    ("20 Hz", 0.5, "diode"),    # it stops in every off-time
    ("1 kHz", 0.3, "zener"),    # a fast-release clamp empties it within the off-time
    ("1 kHz", 0.9, "zener"),    # ... but not within a tenth of the period
])
def test_a_pwm_coils_periodic_steady_state_matches_integration(frequency, duty, clamp):
    from tolerance.units import parse_quantity

    data = dict(COIL, clamp=clamp)
    if clamp == "zener":
        data["clamp_voltage"] = "20 V"
    spec, ctx, _ = make(data)
    state = spec.at(nominal_samples(ctx, 1), np.array([333.15]), np.array([12.0]))
    f = parse_quantity(frequency, "Hz")
    v_on = np.array([11.8])
    low, high, mean = state.pwm_currents(v_on, f, duty)
    # reference: scipy.integrate.solve_ivp of the first-order circuit, 60 periods from rest
    ref = _pwm_coil_by_integration(float(state.hot_resistance[0]), 0.2, 11.8,
                                   float(state.clamp_voltage[0]), f, duty)
    assert_allclose([low[0], high[0], mean[0]], ref, rtol=1e-6, atol=1e-9)
    # pull-in is set by ampere-turns: V_op,20 / R_20 whatever the winding's temperature
    assert_allclose(state.operate_current, 9.0 / 100.0, rtol=1e-14)


def test_a_pwm_coils_current_tends_to_the_static_and_to_the_average_one():
    # first-order circuit (any circuits textbook): an on-time long against L/R reaches the
    # static current; a period short against it ripples about the mean of the coil's
    # voltage, D v_on - (1 - D) V_c, over R; without a clamp (the switch's breakdown far
    # above the supply) the current stops at once at every turn-off
    spec, ctx, _ = make(COIL)
    state = spec.at(nominal_samples(ctx, 1), np.array([293.15]), np.array([12.0]))
    r, vc = 100.0, float(state.clamp_voltage[0])
    low, high, mean = state.pwm_currents(np.array([11.8]), 0.1, 0.5)
    assert_allclose([low[0], high[0], mean[0]], [0.0, 0.118, 0.118 * (1 - 2e-3 / 5)],
                    rtol=1e-9)
    low, high, mean = state.pwm_currents(np.array([11.8]), 1e8, 0.6)
    average = (0.6 * 11.8 - 0.4 * vc) / r
    # a ripple of (v_on - R I) t_on / L, 2e-6 of the current at 100 MHz
    assert_allclose([low[0], high[0], mean[0]], [average] * 3, rtol=5e-6)
    low, high, mean = state.pwm_currents(np.array([11.8]), 200.0, 0.8, np.array([np.inf]))
    a = np.exp(-4e-3 / 2e-3)
    assert_allclose([low[0], high[0]], [0.0, 0.118 * (1 - a)], rtol=1e-12)
    assert np.isfinite(mean).all()


def test_hot_coil_operate_voltage_scaling():
    spec, ctx, _ = make(COIL)
    state = spec.at(nominal_samples(ctx, 2), np.array([293.15, 343.15]), np.array([12.0, 12.0]))
    # pull-in is set by ampere-turns (common practice): V_op(T) = V_op20 R(T) / R20
    assert_allclose(state.operate_voltage, 9.0 * state.resistance / 100.0, rtol=1e-14)
    assert_allclose(state.operate_voltage[1], 9.0 * (1 + 0.00393 * 50), rtol=1e-14)
    v_on = np.array([10.0, 10.0])
    i_on = state.current(v_on)[0]
    m = state.metrics(v_on, i_on)
    # definition of the metric: operate_margin = coil voltage / V_op(T); same current law I = V/R
    assert_allclose(m["operate_margin"], 10.0 / state.operate_voltage, rtol=1e-14)
    assert_allclose(m["coil_current"], 10.0 / state.resistance, rtol=1e-14)
    assert_allclose(m["coil_voltage"], v_on)
    (criterion,) = spec.criteria
    assert (criterion.name, criterion.metric, criterion.minimum, criterion.source) == (
        "coil_operates", "operate_margin", 1.0, "stage")
    # 10 V pulls in the 20 C coil (9 V) but not the 70 C coil (10.77 V): common practice, the
    # hot coil is the worst case for pull-in
    assert criterion.passes(m["operate_margin"]).tolist() == [True, False]
    assert set(spec.metrics) == {"coil_voltage", "coil_current", "operate_margin"}


def test_coil_clamp_energy_and_time_constant():
    diode = state_of(COIL, temperature=293.15)
    zener = state_of({**COIL, "clamp": "zener", "clamp_voltage": "24 V"}, temperature=293.15)
    bare = state_of({**COIL, "clamp": "none"}, temperature=293.15)
    # diode clamp: coil reverse voltage is the diode's forward drop (default 0.8 V; common practice)
    assert_allclose(diode.clamp_voltage, 0.8)
    # zener in series with a diode across the coil: V_z + V_f (common practice, no source)
    assert_allclose(zener.clamp_voltage, 24.8)
    assert_allclose(zener.turn_off_peak_voltage(12.0), 36.8)
    assert np.isinf(bare.clamp_voltage).all() and bare.clamp == "none"
    # magnetic energy of an inductor 0.5 L I^2 (any circuits textbook): 0.5 * 0.2 * 0.12^2
    assert_allclose(diode.stored_energy(0.12), 0.5 * 0.2 * 0.12**2, rtol=1e-14)
    # L/R time constant of a series RL circuit (any circuits textbook)
    assert_allclose(diode.time_constant, 0.2 / 100.0, rtol=1e-14)


def test_coil_decay_time_against_an_integration_of_the_winding():
    # scipy.integrate.solve_ivp of L di/dt = -(R i + V_c) as the reference: the current falls
    # to a tenth far sooner against a zener's 24.8 V than against a diode's 0.8 V
    from scipy.integrate import solve_ivp

    for clamp, extra in (("diode", {}), ("zener", {"clamp_voltage": "24 V"})):
        state = state_of({**COIL, "clamp": clamp, **extra}, temperature=293.15)
        r, ind, vc = float(state.resistance[0]), 0.2, float(state.clamp_voltage[0])
        i0 = 0.12

        def reached(t, i):
            return i[0] - 0.1 * i0
        reached.terminal = True
        sol = solve_ivp(lambda t, i: [-(r * i[0] + vc) / ind], (0.0, 1.0), [i0],
                        events=reached, rtol=1e-10, atol=1e-14)
        assert_allclose(state.decay_time(i0, 0.1), sol.t_events[0][0], rtol=1e-7)
    diode = state_of(COIL, temperature=293.15)
    zener = state_of({**COIL, "clamp": "zener", "clamp_voltage": "24 V"}, temperature=293.15)
    assert zener.decay_time(0.12, 0.1)[0] < 0.25 * diode.decay_time(0.12, 0.1)[0]
    # without a clamp the switch's breakdown sets the reverse voltage
    bare = state_of({**COIL, "clamp": "none"}, temperature=293.15)
    assert_allclose(bare.decay_time(0.12, 0.1, reverse_voltage=45.0 - 12.0),
                    0.002 * math.log((0.12 + 0.33) / (0.012 + 0.33)), rtol=1e-12)


# --------------------------------------------------------------------------------------------
# Lamp
# --------------------------------------------------------------------------------------------


def test_lamp_rated_point_and_exponent():
    state = state_of(LAMP)
    i, di = state.current(24.0)
    # definition of the rating: I_r = P_r / V_r (rounding only)
    assert_allclose(i, 5.0 / 24.0, rtol=1e-14)
    # lamp rerating relations (REFERENCES.md, "Loads and materials"): I ~ V^0.55 near the
    # operating point; 1e-6 is far wider than the rounding of the exact power law there
    assert_allclose(di * 24.0 / i, 0.55, atol=1e-6)
    lo, hi = state.current(24.0 * (1 - 1e-5))[0], state.current(24.0 * (1 + 1e-5))[0]
    # the same slope by central differences of ln I over ln V (truncation error ~1e-10)
    assert_allclose(math.log(hi[0] / lo[0]) / math.log((1 + 1e-5) / (1 - 1e-5)), 0.55,
                    atol=1e-6)


def test_lamp_power_law():
    state = state_of({**LAMP, "exponent": 0.6})
    v = np.array([12.0, 20.0, 28.0])
    i = state.current(v[:, None])[0][:, 0]
    p = state.metrics(v, i)["lamp_power"]
    # rerating relations (REFERENCES.md): power ~ V^(1 + exponent), 1.55 to 1.6
    assert_allclose(p / 5.0, (v / 24.0) ** 1.6, rtol=1e-12)


def test_lamp_cold_resistance_and_inrush():
    state = state_of(LAMP)
    hot = 24.0**2 / 5.0
    v = np.array([1e-6, 1e-3, 0.01])
    i = state.current(v[:, None])[0][:, 0]
    # cold filament: I = V / R_cold with R_cold = R_hot / 12 (default ratio; references give a
    # tenth to a fifteenth of hot); exact below half the crossover voltage
    assert_allclose(i, v * 12.0 / hot, rtol=1e-12)
    m = state.metrics(np.array([23.8]), state.current(23.8)[0])
    # inrush demand = supply / R_cold; at the rated voltage 12 x the running current, inside the
    # "10 to 15 times" of the lamp references
    assert_allclose(m["inrush_current"], 12.0 * 12.0 / hot, rtol=1e-14)
    assert 10 <= state.inrush_demand(24.0)[0] / (5.0 / 24.0) <= 15
    cold = state_of(LAMP, temperature=273.15 - 40.0)
    # tungsten about 0.0045 /K (from memory): a -40 C filament has 1 - 0.0045 * 65 of R_cold
    assert_allclose(cold.cold_resistance, hot / 12 * (1 - 0.0045 * 65), rtol=1e-14)
    # the hot point is unaffected by the ambient (the exact power law holds there)
    assert_allclose(cold.current(24.0)[0], 5.0 / 24.0, rtol=1e-14)


# --------------------------------------------------------------------------------------------
# LED string
# --------------------------------------------------------------------------------------------


def _led_reference(v, count, vf25, i_test, n, tempco, r, temperature):
    """Per-sample reference: brentq on v = m n V_T ln(1 + i/I_s) + i R (Shockley equation)."""
    vt = 1.380649e-23 * temperature / 1.602176634e-19
    vf = vf25 + tempco * (temperature - ROOM)
    i_s = i_test / (math.exp(vf / (n * vt)) - 1.0)
    a = count * n * vt

    def f(i):
        return a * math.log1p(i / i_s) + i * r - v

    i = optimize.brentq(f, 0.0, v / r, xtol=1e-30, rtol=4 * np.finfo(float).eps, maxiter=500)
    return i + loads.LED_SHUNT_CONDUCTANCE * v


def test_wright_omega_against_scipy():
    from scipy import special

    y = np.concatenate([np.linspace(-700.0, -1.0, 20001), np.linspace(-3.0, 3.0, 20001),
                        np.linspace(-2.001, -1.999, 101), np.linspace(0.999, 1.001, 101),
                        np.linspace(1.0, 1e4, 20001), np.geomspace(1.0, 1e15, 2001)])
    w = loads.wright_omega(y)
    # reference library: scipy.special.wrightomega, the same function; the region borders of
    # the starting values (-2 and 1) are covered densely
    assert_allclose(w, special.wrightomega(y), rtol=1e-14, atol=0)
    # the defining equation w + ln w = y (Corless et al. 1996), checked where it is well
    # conditioned
    mid = np.abs(y) < 1e6
    assert_allclose(w[mid] + np.log(w[mid]), y[mid], rtol=1e-13, atol=1e-13)
    # below the range of exp() the function is exp(y), i.e. zero in floating point
    assert np.all(loads.wright_omega(np.array([-800.0, -1e4])) == 0.0)


def test_led_string_against_brentq():
    data = {**LED, "forward_voltage": {"nominal": "2.1 V", "tolerance": "8%"},
            "series_resistance": {"nominal": "330R", "tolerance": "5%", "distribution": "uniform"},
            "ideality": 1.8, "forward_voltage_tempco": "-2.5 mV/K"}
    spec, ctx, _ = make(data)
    rng = np.random.default_rng(20240601)
    n = 50
    samples = random_samples(ctx, n, rng)
    temperature = rng.uniform(233.15, 358.15, n)
    supply = rng.uniform(9.0, 30.0, n)
    state = spec.at(samples, temperature, supply)
    v = rng.uniform(6.5, supply)
    i = state.current(v)[0]
    ref = np.array([
        _led_reference(v[k], 3, samples["load.forward_voltage"][k], 0.02, 1.8, -2.5e-3,
                       samples["load.series_resistance"][k], temperature[k])
        for k in range(n)
    ])
    # scipy.optimize.brentq to machine precision; 1e-9 leaves room for the Wright omega
    # evaluation and the conditioning of the exponential
    assert_allclose(i, ref, rtol=1e-9)


def test_led_fit_through_datasheet_point():
    spec, ctx, _ = make(LED)
    temps = np.array([ROOM, ROOM + 50.0])
    state = spec.at(nominal_samples(ctx, 2), temps, np.full(2, 12.0))
    # by construction of the fit: at m V_F(T) + I_F R the string carries I_F, with
    # V_F(T) = 2.1 V - 2 mV/K (T - 25 C) (default tempco, from memory)
    v = 3 * (2.1 - 2e-3 * (temps - ROOM)) + 0.02 * 330.0
    i, di = state.current(v)
    assert_allclose(i, 0.02 + loads.LED_SHUNT_CONDUCTANCE * v, rtol=1e-12)
    # Shockley equation (e.g. Neamen): dV/dI = m n V_T / (I + I_s) + R; ideality default 2.0
    vt = 1.380649e-23 * temps / 1.602176634e-19
    dv_di = 3 * 2.0 * vt / (0.02 + state.saturation_current) + 330.0
    assert_allclose(1.0 / (di - loads.LED_SHUNT_CONDUCTANCE), dv_di, rtol=1e-10)
    m = state.metrics(v, i)
    assert_allclose(m["led_current"], 0.02, rtol=1e-12)
    # Kirchhoff's voltage law: string voltage = load voltage - I R
    assert_allclose(m["led_voltage"], 3 * (2.1 - 2e-3 * (temps - ROOM)), rtol=1e-12)


def test_led_reverse_voltage_gives_no_current():
    state = state_of(LED)
    i, di = state.current(np.array([-1e6, -100.0, -1.0]))
    # reverse-biased diodes pass only -I_s (Shockley equation); the 1 pA/V shunt dominates
    assert np.all(np.abs(i) < 1e-5) and np.all(di > 0)


# --------------------------------------------------------------------------------------------
# Resistor
# --------------------------------------------------------------------------------------------


def test_resistor_tempco():
    spec, ctx, _ = make(RESISTOR)
    state = spec.at(nominal_samples(ctx, 3), np.array([ROOM, ROOM + 100.0, ROOM - 65.0]),
                    np.full(3, 24.0))
    # linear temperature coefficient referred to 25 C (IEC 60115-1 definition of TCR)
    assert_allclose(state.resistance, 47.0 * (1 + 200e-6 * np.array([0.0, 100.0, -65.0])),
                    rtol=1e-14)
    i, di = state.current(np.full(3, 24.0))
    # Ohm's law
    assert_allclose(i, 24.0 / state.resistance, rtol=1e-14)
    assert_allclose(di, 1.0 / state.resistance, rtol=1e-14)
    # the rating is a criterion on the load's own dissipation (it was read and used by nothing)
    assert state.power_rating == 2.0 and set(spec.metrics) == {"load_power"}
    (rating,) = spec.criteria
    assert (rating.name, rating.metric, rating.maximum, rating.source) == (
        "load_rating", "load_power", 2.0, "rating")
    # demand at the switch voltage: Ohm's law across supply - vce
    assert_allclose(state.demand(24.0, 0.2), 23.8 / state.resistance, rtol=1e-14)
    # Joule's law: P = v i
    v_on = np.full(3, 23.8)
    assert_allclose(state.metrics(v_on, i)["load_power"], 23.8 * i, rtol=1e-14)


def test_resistor_tempco_outside_its_range_is_nan():
    spec, ctx, _ = make({**RESISTOR, "tempco": "10000 ppm/K"})
    state = spec.at(nominal_samples(ctx, 1), np.array([50.0]), np.array([12.0]))
    # 1 + 0.01 /K * (50 K - 298.15 K) < 0: no physical resistance; NaN so the stage flags the sample
    assert np.isnan(state.resistance).all()


# --------------------------------------------------------------------------------------------
# Every kind: smooth, increasing, finite; derivative matches finite differences
# --------------------------------------------------------------------------------------------


def _check_law(state, vmax, noise=0.0):
    """Monotone, finite, derivative = central differences, over a dense sweep of v.

    ``noise`` is the absolute rounding of i where the law subtracts nearly equal terms (the
    LED string's -I_s near v = 0) [A].
    """
    v = np.concatenate([np.linspace(-3 * vmax, 3 * vmax, 4001), np.geomspace(1e-9, vmax, 400),
                        -np.geomspace(1e-9, vmax, 400), [0.0, 1e6, -1e6]])
    v = np.sort(v)[:, None]
    i, di = state.current(v)
    assert np.all(np.isfinite(i)) and np.all(np.isfinite(di))
    # strictly increasing (the interface): positive slope and non-decreasing samples
    assert np.all(di > 0)
    assert np.all(np.diff(i, axis=0) >= 0)
    # derivative check by central differences (common practice, no source): a step of 1e-6 of
    # |v| keeps truncation (~h^2, or ~h where a stencil straddles a joint of the C1 lamp blend)
    # and rounding (~eps |i| / h) below 2e-5 of the slope; the absolute term covers ``noise``
    h = 1e-6 * np.maximum(np.abs(v), 1e-12)
    fd = (state.current(v + h)[0] - state.current(v - h)[0]) / (2 * h)
    # the exponent y of the LED law is about ln(I_s R / a), up to ~60 in size, and its rounding
    # (~60 eps relative) passes into i: hence 64 eps
    rounding = 64 * np.finfo(float).eps * noise / h
    assert np.all(np.abs(fd - di) <= 2e-5 * np.abs(di) + rounding + 1e-14)


def _check_joint(state, v_joint):
    """C1 at a joint of a piecewise law: value and slope agree either side."""
    eps = 1e-9 * max(abs(v_joint), 1e-12)
    (i_lo, i_hi), (d_lo, d_hi) = (np.stack(x)[:, 0] for x in zip(
        state.current(v_joint - eps), state.current(v_joint + eps)))
    # continuity to the size of the step times the slope (common practice, no source)
    assert abs(i_hi - i_lo) <= 3 * eps * max(d_lo, d_hi)
    assert_allclose(d_hi, d_lo, rtol=1e-6)


@settings(max_examples=40, deadline=None)
@given(vr=st.floats(1.0, 240.0), pr=st.floats(0.05, 100.0), ratio=st.floats(5.0, 20.0),
       p=st.floats(0.2, 0.9), t=st.floats(218.15, 423.15))
def test_lamp_law_smooth_and_increasing(vr, pr, ratio, p, t):
    state = state_of({"kind": "lamp", "rated_voltage": vr, "rated_power": pr, "cold_ratio": ratio,
                      "exponent": p}, temperature=t, supply=vr)
    _check_law(state, vr)
    vx = float(state.crossover_voltage[0])
    for joint in (vx / 2, 2 * vx, -vx / 2, -2 * vx, 0.0):
        _check_joint(state, joint)
    # exponent at the rated point (rerating relations); exact power law above 2 V_x
    i, di = state.current(vr)
    assert_allclose(di * vr / i, p, atol=1e-6)


@settings(max_examples=40, deadline=None)
@given(count=st.integers(1, 20), vf=st.floats(1.2, 3.6), itest=st.floats(1e-3, 0.35),
       n=st.floats(1.0, 6.0), r=st.floats(1.0, 1e4), t=st.floats(218.15, 423.15),
       tc=st.floats(-4e-3, -1e-3))
def test_led_law_smooth_and_increasing(count, vf, itest, n, r, t, tc):
    state = state_of({"kind": "led", "count": count, "forward_voltage": vf, "test_current": itest,
                      "ideality": n, "series_resistance": r, "forward_voltage_tempco": tc},
                     temperature=t)
    _check_law(state, 1.5 * count * vf + itest * r, noise=float(state.saturation_current[0]))


@settings(max_examples=20, deadline=None)
@given(r=st.floats(0.1, 1e5), t=st.floats(218.15, 423.15), rise=st.floats(0.0, 80.0))
def test_linear_laws_smooth_and_increasing(r, t, rise):
    _check_law(state_of({"kind": "resistor", "resistance": r, "tempco": "3900 ppm/K"},
                        temperature=t), 50.0)
    _check_law(state_of({**COIL, "resistance": r, "coil_temperature_rise": rise},
                        temperature=t), 50.0)


# --------------------------------------------------------------------------------------------
# Interface: parameters, pickling, subsets, demand
# --------------------------------------------------------------------------------------------


def test_parameters_registered():
    spec, ctx, _ = make({**LAMP, "rated_power": {"nominal": "5 W", "tolerance": "10%"},
                         "cold_ratio": {"min": 10, "max": 15}})
    assert spec.parameters == ("load.rated_voltage", "load.rated_power", "load.cold_ratio")
    assert set(ctx.parameters) == set(spec.parameters)
    ratio = ctx.parameters["load.cold_ratio"]
    assert (ratio.low, ratio.high) == (10, 15)
    _, ctx2, _ = make(LAMP)
    assert ctx2.parameters["load.cold_ratio"].distribution == Fixed(12.0)
    spec3, _, _ = make({**COIL, "clamp": "zener", "clamp_voltage": "33 V"})
    assert "load.clamp_voltage" in spec3.parameters
    spec4, _, _ = make(LED)
    assert spec4.parameters == ("load.forward_voltage", "load.series_resistance")


@pytest.mark.parametrize("data", [RESISTOR, LAMP, COIL, LED], ids=lambda d: d["kind"])
def test_pickle_take_and_demand(data):
    spec, ctx, _ = make(data)
    rng = np.random.default_rng(7)
    samples = random_samples(ctx, 6, rng)
    temperature = rng.uniform(233.15, 358.15, 6)
    supply = rng.uniform(10.0, 14.0, 6)
    again = pickle.loads(pickle.dumps(spec))
    assert again.kind == spec.kind and again.parameters == spec.parameters
    assert again.metrics == spec.metrics and again.criteria == spec.criteria
    full = spec.at(samples, temperature, supply)
    v = supply - 0.3
    i = full.current(v)[0]
    assert_allclose(again.at(samples, temperature, supply).current(v)[0], i, rtol=0)
    assert_allclose(full.demand(supply, 0.3), i, rtol=0)
    index = np.array([4, 1])
    part = full.take(index)
    assert_allclose(part.current(v[index])[0], i[index], rtol=0)
    m_full = full.metrics(v, i)
    m_part = part.metrics(v[index], i[index])
    assert set(m_full) == set(spec.metrics)
    for name in m_full:
        assert_allclose(m_part[name], m_full[name][index], rtol=0)


def test_unused_keys_are_left_for_the_engine():
    # a resistor does not read coil keys: the engine then reports them as unknown
    _, _, reader = make({**RESISTOR, "inductance": "1 mH"})
    assert "inductance" not in reader._used
    _, _, reader = make({**COIL, "clamp": "none", "clamp_forward_voltage": "0.7 V"})
    assert "clamp_forward_voltage" not in reader._used


def test_voltage_tempco_forms():
    for raw in ("-2 mV/K", "-2 mV/degC", -0.002, "-0.002 V/K"):
        spec, _, _ = make({**LED, "forward_voltage_tempco": raw})
        assert spec.forward_voltage_tempco == pytest.approx(-2e-3, rel=1e-12)


# --------------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("data, key, words", [
    ({**LAMP, "cold_ratio": 0.5}, "load.cold_ratio", "at least 5"),
    ({**LAMP, "cold_ratio": 30}, "load.cold_ratio", "at most 20"),
    ({**LAMP, "exponent": 1.2}, "load.exponent", "at most"),
    ({**LED, "count": 0}, "load.count", "at least 1"),
    ({**LED, "count": 2.5}, "load.count", "whole number"),
    ({**COIL, "clamp": "diod"}, "load.clamp", "did you mean 'diode'"),
    ({**COIL, "clamp": "zener"}, "load.clamp_voltage", "missing"),
    ({**LAMP, "kind": "lamps"}, "load.kind", "did you mean 'lamp'"),
    ({"resistance": "1k"}, "load.kind", "missing"),
    ({**RESISTOR, "resistance": "-4k7"}, "load.resistance", "negative"),
    ({**RESISTOR, "resistance": "0R"}, "load.resistance", "positive"),
    ({**RESISTOR, "tempco": "5 %/K"}, "load.tempco", "at most"),
    ({**LED, "forward_voltage_tempco": "-2 mV"}, "load.forward_voltage_tempco", "per kelvin"),
    ({**LED, "forward_voltage_tempco": "-2 mA/K"}, "load.forward_voltage_tempco", "per kelvin"),
    ({**LED, "forward_voltage_tempco": "-50 mV/K"}, "load.forward_voltage_tempco", "outside"),
    ({**LED, "ideality": 0.5}, "load.ideality", "at least 1"),
    ({k: v for k, v in LED.items() if k != "test_current"}, "load.test_current", "missing"),
    ({k: v for k, v in COIL.items() if k != "inductance"}, "load.inductance", "missing"),
    ({**COIL, "coil_temperature_rise": "-5 K"}, "load.coil_temperature_rise", "at least 0"),
    ({**LAMP, "thermal_time_constant": "0 ms"}, "load.thermal_time_constant", "positive"),
])
def test_bad_input_names_the_key(data, key, words):
    with pytest.raises(StudyError) as info:
        make(data)
    assert info.value.key == key
    assert words in str(info.value)
    assert str(info.value).startswith("study.toml: ")


def test_led_fit_impossible_is_nan():
    state = state_of({**LED, "forward_voltage": "0.5 V", "forward_voltage_tempco": "-10 mV/K"},
                     temperature=ROOM + 60.0)
    # V_F(T) = 0.5 V - 10 mV/K * 60 K < 0: no diode passes through the point; NaN so the stage
    # flags the sample (project rule: a failed sample is flagged, never passed)
    i, di = state.current(np.array([5.0]))
    assert np.isnan(i).all() and np.isnan(di).all()


@pytest.mark.parametrize("data", [COIL, RESISTOR, LED, LAMP], ids=["coil", "resistor", "led",
                                                                  "lamp"])
def test_voltage_guess_inverts_the_current_law(data):
    """The solvers' starting points: the load voltage that carries a given current."""
    state = state_of(data, n=5)
    v = np.array([0.5, 3.0, 6.5, 9.0, 24.0])
    i = state.current(v)[0]
    guess = state.voltage_guess(i)
    if data is LAMP:
        # exact on the two straight pieces of ln R over ln V; the blend near the crossover
        # (a quadratic join, see LampState) moves the inverse by a few percent there
        assert_allclose(guess[-1], v[-1], rtol=1e-12)
        assert np.all(np.abs(guess / v - 1) < 0.1)
    elif data is LED:
        # the string law inverted in closed form; the 1e-12 S shunt (neglected) only matters
        # far below the knee, where the current is below a picoampere
        on = i > 1e-9
        assert_allclose(guess[on], v[on], rtol=1e-9)
    else:
        # Ohm's law, exact (rounding only)
        assert_allclose(guess, v, rtol=1e-13)


def test_an_led_string_above_the_supply_is_noted_before_the_run(tmp_path):
    # a review's string of three 15 V LEDs on a 12 V +- 15 % supply passed `check` without a
    # word and failed every unit. At a tenth of the test current the diode law takes
    # n V_T ln 10 (Shockley; V_T = 25.693 mV at 25 degC) off each LED's forward voltage. The
    # shipped shelf study (five LEDs at about 3 V on 24 V) gets no such note; fifteen do
    from tolerance.api import load_study

    root = Path(__file__).resolve().parent.parent / "studies"
    text = (root / "shelf_led_sziklai.toml").read_text(encoding="utf-8")
    assert not any("LED string needs" in n for n in load_study(root / "shelf_led_sziklai.toml")
                   .notes())
    dark = tmp_path / "dark.toml"
    dark.write_text(text.replace('count = 5', 'count = 15'), encoding="utf-8")
    (note,) = [n for n in load_study(dark).notes() if "LED string needs" in n]
    study = load_study(dark)
    vf = next(p.nominal for p in study.parameters if p.name == "load.forward_voltage")
    supply = next(p for p in study.parameters if p.name == "supply.voltage")
    lit = 15 * (vf - study.stage.load.ideality * 0.025693 * math.log(10.0))
    assert lit > supply.high
    assert f"needs about {format_quantity(lit, 'V')}" in note
    assert "every unit fails led_current" in note
