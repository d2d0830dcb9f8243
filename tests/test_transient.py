"""Tests of the batched transient integrator (tolerance.models.transient) and of the charge
storage model (tolerance.models.charges)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate as sp_integrate

from tolerance.models import charges, transient
from tolerance.models.transistor import TransistorParameters, junction_currents

ROOM = 298.15


class RCBatch:
    """S independent RC low-pass sections driven by a ramp from 0 to ``v`` over ``edge``.

    Unknown: the capacitor voltage. Observed "current": the capacitor voltage itself (any
    observable works for events); power: the resistor's i^2 R; voltage: the capacitor voltage.
    """

    n_unknowns = 1

    def __init__(self, r, c, v, edge, poison=None):
        self.r, self.c, self.v, self.edge = r, c, v, edge
        self.poison = np.zeros(r.shape, dtype=bool) if poison is None else poison

    def drive(self, t):
        with np.errstate(divide="ignore", invalid="ignore"):
            ramp = np.where(self.edge > 0, np.clip(t / self.edge, 0.0, 1.0), 1.0)
        return self.v * ramp

    def evaluate(self, t, x):
        f = (x[:, 0] - self.drive(t)) / self.r
        f = np.where(self.poison, np.nan, f)
        s = x.shape[0]
        return (f[:, None], (1.0 / self.r)[:, None, None], (self.c * x[:, 0])[:, None],
                np.broadcast_to(self.c, (s,))[:, None, None].copy(), np.zeros((s, 0)))

    def observe(self, t, x, aux):
        i = (self.drive(t) - x[:, 0]) / self.r
        return transient.Observation(x[:, 0].copy(), (i * i * self.r)[:, None], x[:, 0].copy())

    def settled(self, x):
        return np.abs(x[:, 0] - self.v) <= 1e-6 * self.v

    def limit(self, x_new, x_old):
        return x_new

    def subset(self, idx):
        return RCBatch(self.r[idx], self.c[idx], self.v[idx], self.edge[idx], self.poison[idx])


def run_rc(tau, edge, rtol=1e-4, t_end=None, poison=None, record=()):
    s = tau.size
    r = np.full(s, 1e3)
    c = tau / r
    v = np.full(s, 5.0)
    system = RCBatch(r, c, v, edge, poison)
    t_end = 30 * tau + edge if t_end is None else t_end
    res = transient.integrate(
        system, np.zeros((s, 1)), t_end, absolute_tolerance=1e-6, relative_tolerance=rtol,
        charge_tolerance=(1e-6 * c)[:, None],
        breakpoints=np.where(edge > 0, edge, np.inf)[:, None],
        event_levels=np.stack([0.1 * v, 0.9 * v], axis=1), event_directions=np.array([1, 1]),
        initial_step=np.where(edge > 0, edge / 20, tau / 1e3), record=record)
    return res, system


def rc_ramp_response(t, tau, edge, v):
    """Capacitor voltage of an RC driven by a ramp to v over ``edge`` (closed form, the
    convolution of the ramp with the exponential impulse response; any circuits textbook)."""
    t = np.asarray(t, dtype=float)
    k = v / edge
    during = k * (t - tau * (1.0 - np.exp(-t / tau)))
    end = k * (edge - tau * (1.0 - np.exp(-edge / tau)))
    after = v - (v - end) * np.exp(-(t - edge) / tau)
    return np.where(t <= edge, during, after)


def test_step_response_events_and_energy_per_sample_scale():
    tau = np.geomspace(1e-9, 1e-3, 7)
    res, _ = run_rc(tau, np.zeros(7))
    assert np.all(res.ok)
    # first-order step response x = V (1 - exp(-t/tau)): 10 % at tau ln(10/9), 90 % at
    # tau ln 10 (closed form, any circuits textbook); 0.5 %: the global error of BDF2 at a
    # local tolerance of 1e-4 (some ten local errors accumulated) over the slope at 90 %
    assert_allclose(res.event_times[:, 0], tau * math.log(10 / 9), rtol=5e-3)
    assert_allclose(res.event_times[:, 1], tau * math.log(10), rtol=5e-3)
    # energy in the resistor during a step charge of C to V: C V^2 / 2 times
    # (1 - exp(-2T/tau)) (closed form, any circuits textbook); 0.5 % for the quadrature
    t_end = res.end_time
    expected = 0.5 * (tau / 1e3) * 25.0 * (1 - np.exp(-2 * t_end / tau))
    assert_allclose(res.integrals[:, 0], expected, rtol=5e-3)
    # each sample has its own step: the count of steps does not depend on the time scale
    # (common practice, no source: an adaptive integrator scales with the dynamics)
    assert res.steps.max() - res.steps.min() <= 0.2 * res.steps.mean()
    # the settled samples left early, before 30 time constants
    assert np.all(res.status == transient.SETTLED)
    assert np.all(res.end_time < 30 * tau)


def test_ramp_breakpoint_is_stepped_on_and_matches_closed_form():
    tau = np.array([1e-8, 1e-7, 1e-6])
    edge = np.array([5e-8, 2e-8, 3e-6])
    res, _ = run_rc(tau, edge, record=(0, 1, 2))
    for i in range(3):
        w = res.waveforms[i]
        # a step lands exactly on the end of the ramp
        assert np.min(np.abs(w["t"] - edge[i])) <= 1e-12 * edge[i]
        # ramp response of the RC section (closed form above); 0.2 % of the step for the
        # local error tolerance 1e-4 accumulated over the run
        assert_allclose(w["x"][:, 0], rc_ramp_response(w["t"], tau[i], edge[i], 5.0),
                        atol=1e-2)


def test_halving_tolerance_changes_events_little():
    tau = np.geomspace(1e-8, 1e-5, 5)
    edge = 0.5 * tau
    a, _ = run_rc(tau, edge, rtol=1e-3)
    b, _ = run_rc(tau, edge, rtol=5e-4)
    # common practice, no source: a converged adaptive solution moves by less than its
    # tolerance-scaled error when the tolerance halves
    assert_allclose(a.event_times, b.event_times, rtol=5e-3)


def test_failed_sample_is_flagged_not_dropped():
    tau = np.array([1e-6, 1e-6, 1e-6])
    poison = np.array([False, True, False])
    res, _ = run_rc(tau, np.zeros(3), poison=poison)
    assert res.status[1] == transient.FAILED_NEWTON
    assert not res.ok[1]
    assert np.all(res.ok[[0, 2]])
    assert_allclose(res.event_times[0], res.event_times[2])
    assert res.event_times.shape == (3, 2)


def test_step_budget_exhaustion_is_flagged():
    tau = np.array([1e-6, 1e-6])
    s = 2
    system = RCBatch(np.full(s, 1e3), tau / 1e3, np.full(s, 5.0), np.zeros(s))
    res = transient.integrate(system, np.zeros((s, 1)), 30 * tau, absolute_tolerance=1e-6,
                              relative_tolerance=1e-4, initial_step=1e-9, max_steps=5)
    assert np.all(res.status == transient.FAILED_STEPS)


def test_solve_small_matches_numpy():
    rng = np.random.default_rng(3)
    a = rng.normal(size=(50, 3, 3))
    b = rng.normal(size=(50, 3))
    # reference library: numpy.linalg.solve
    assert_allclose(transient._solve(a, b), np.linalg.solve(a, b[..., None])[..., 0],
                    rtol=1e-9, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# charges
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("grading", [0.33, 0.5])
def test_depletion_charge_is_c1_and_integrates_its_capacitance(grading):
    c0, phi, fc = 10e-12, 0.75, 0.5
    v = np.linspace(-20.0, 1.5, 2001)
    q, c = charges.depletion_charge(v, c0, phi, grading, fc)
    # Q(0) = 0 and C(0) = C_0 (definition of the junction law)
    q0, cz = charges.depletion_charge(np.array([0.0]), c0, phi, grading, fc)
    assert abs(q0[0]) < 1e-24
    assert_allclose(cz, c0)
    # C = dQ/dV: central differences (common practice, no source), 1e-6 relative for the
    # O(h^2) truncation of the difference quotient
    h = 1e-6
    qp, _ = charges.depletion_charge(v + h, c0, phi, grading, fc)
    qm, _ = charges.depletion_charge(v - h, c0, phi, grading, fc)
    assert_allclose((qp - qm) / (2 * h), c, rtol=1e-5)
    # continuity of Q and C at F_C phi (the linearisation's construction)
    eps = 1e-9
    ql, cl = charges.depletion_charge(np.array([fc * phi - eps]), c0, phi, grading, fc)
    qr, cr = charges.depletion_charge(np.array([fc * phi + eps]), c0, phi, grading, fc)
    assert_allclose(qr, ql, rtol=1e-7)
    assert_allclose(cr, cl, rtol=1e-6)
    # reverse-bias charge equals the integral of C_0 (1 - V/phi)^-m from 0 (reference
    # library: scipy.integrate.quad)
    ref, _ = sp_integrate.quad(lambda u: c0 * (1 - u / phi) ** (-grading), 0.0, -5.0)
    qv, _ = charges.depletion_charge(np.array([-5.0]), c0, phi, grading, fc)
    assert_allclose(qv, ref, rtol=1e-10)


@pytest.mark.parametrize("polarity", [1, -1])
def test_stored_charge_derivatives(polarity):
    p = TransistorParameters(polarity=polarity, saturation_current=2e-14, forward_beta=150,
                             reverse_beta=3, early_voltage=80, reverse_early_voltage=20,
                             knee_current=0.2, reverse_knee_current=0.05)
    sc = p.at_temperature(np.full(5, 320.0))
    cp = charges.ChargeParameters()
    vbe = polarity * np.array([0.3, 0.6, 0.7, 0.75, -1.0])
    vbc = polarity * np.array([-5.0, -0.5, 0.55, 0.65, -3.0])
    st = charges.stored_charges(sc, cp, vbe, vbc)
    h = 1e-7
    up = charges.stored_charges(sc, cp, vbe + h, vbc)
    dn = charges.stored_charges(sc, cp, vbe - h, vbc)
    # analytic derivatives against central differences (common practice, no source);
    # atol covers the round-off of the differences of charges near 1e-9 C
    assert_allclose(st.dbe_dvbe, (up.base_emitter - dn.base_emitter) / (2 * h), rtol=1e-5,
                    atol=1e-15)
    up = charges.stored_charges(sc, cp, vbe, vbc + h)
    dn = charges.stored_charges(sc, cp, vbe, vbc - h)
    assert_allclose(st.dbe_dvbc, (up.base_emitter - dn.base_emitter) / (2 * h), rtol=1e-5,
                    atol=1e-15)
    assert_allclose(st.dbc_dvbc, (up.base_collector - dn.base_collector) / (2 * h),
                    rtol=1e-5, atol=1e-15)


def test_pnp_charges_mirror_npn():
    kw = dict(saturation_current=1e-14, forward_beta=100, early_voltage=50, knee_current=0.1)
    n = TransistorParameters(**kw).at_temperature(np.full(3, ROOM))
    p = TransistorParameters(polarity=-1, **kw).at_temperature(np.full(3, ROOM))
    cp = charges.ChargeParameters()
    vbe, vbc = np.array([0.5, 0.7, 0.72]), np.array([-4.0, 0.3, 0.6])
    a = charges.stored_charges(n, cp, vbe, vbc)
    b = charges.stored_charges(p, cp, -vbe, -vbc)
    # mirror symmetry of the NPN and PNP equations (Gummel & Poon 1970)
    assert_allclose(b.base_emitter, -a.base_emitter)
    assert_allclose(b.base_collector, -a.base_collector)
    assert_allclose(b.dbe_dvbe, a.dbe_dvbe)


def test_forward_charge_is_transit_time_times_collector_current():
    p = TransistorParameters(saturation_current=1e-14, forward_beta=100, early_voltage=60,
                             knee_current=0.05)
    sc = p.at_temperature(np.full(4, ROOM))
    cp = charges.ChargeParameters(be_zero_bias_capacitance=0.0, bc_zero_bias_capacitance=0.0)
    vbe = np.array([0.55, 0.65, 0.75, 0.85])
    vbc = np.full(4, -5.0)
    st = charges.stored_charges(sc, cp, vbe, vbc)
    jc = junction_currents(sc, vbe, vbc)
    # Gummel & Poon 1970: Q_F = tau_F I_CC / q_b, and in forward activity with the base-
    # collector junction reverse biased the transport current I_CC/q_b is the collector
    # current up to I_S-sized terms
    assert_allclose(st.base_emitter, cp.forward_transit_time * jc.collector, rtol=1e-8)
    # Q_R = tau_R I_R, which is -tau_R I_S when the junction is reverse biased
    assert_allclose(st.base_collector, -cp.reverse_transit_time * sc.saturation_current,
                    rtol=1e-6)


def test_storage_time_formula_values():
    # Jaeger & Blalock, Microelectronic Circuit Design: tau_s = alpha_F (tau_F + alpha_R
    # tau_R) / (1 - alpha_F alpha_R); with beta_F = 100, beta_R = 1, tau_F = 1 ns,
    # tau_R = 100 ns: alpha_F = 100/101, alpha_R = 1/2 and tau_s = 100 ns exactly (algebra of
    # the formula: 100/101 * 51 / (1 - 50/101))
    assert_allclose(charges.storage_time_constant(100.0, 1.0, 1e-9, 100e-9), 100e-9,
                    rtol=1e-12)
    # t_s = tau_s ln[(I_B1 - I_B2) / (I_C/beta_F - I_B2)]: ln(2 mA / 1 mA) for I_B1 = -I_B2
    # = 1 mA and I_C / beta_F = 0 ... here I_C = 0 gives ln 2 (the same source)
    assert_allclose(charges.storage_time(100.0, 1.0, 1e-9, 100e-9, 0.0, 1e-3, -1e-3),
                    100e-9 * math.log(2.0), rtol=1e-12)


def test_charge_parameters_from_datasheet_round_trip():
    beta_f, beta_r = 200.0, 4.0
    cp = charges.charge_parameters_from_datasheet(
        transition_frequency=300e6, transition_current=10e-3, transition_vce=10.0,
        storage_time=200e-9, storage_ic=150e-3, storage_ib_on=15e-3, storage_ib_off=-15e-3,
        output_capacitance=4e-12, output_capacitance_vcb=10.0, forward_beta=beta_f,
        reverse_beta=beta_r, breakdown_vceo=45.0)
    # the stated C_ob is the model's B-C depletion capacitance at V_CB = 10 V
    _, c_ob = charges.depletion_charge(np.array([-10.0]), cp.bc_zero_bias_capacitance,
                                       cp.bc_built_in_voltage, cp.bc_grading_coefficient)
    assert_allclose(c_ob, 4e-12, rtol=1e-12)
    # the stated f_T follows back from tau_F plus the depletion share (the relation of the
    # module Notes, hybrid-pi model; e.g. Sedra & Smith)
    vt = 1.380649e-23 / 1.602176634e-19 * ROOM
    _, cje = charges.depletion_charge(np.array([0.7]), cp.be_zero_bias_capacitance,
                                      cp.be_built_in_voltage, cp.be_grading_coefficient)
    _, cjc = charges.depletion_charge(np.array([0.7 - 10.0]), cp.bc_zero_bias_capacitance,
                                      cp.bc_built_in_voltage, cp.bc_grading_coefficient)
    total = cp.forward_transit_time + (cje + cjc) * vt / 10e-3
    assert_allclose(1.0 / (2 * math.pi * total), 300e6, rtol=1e-12)
    # the stated storage time follows back from the charge-control formula (Moll 1954;
    # Beaufoy & Sparkes 1957), written out here independently of the module
    af, ar = beta_f / (1 + beta_f), beta_r / (1 + beta_r)
    tau_s = af * (cp.forward_transit_time + ar * cp.reverse_transit_time) / (1 - af * ar)
    t_s = tau_s * math.log((15e-3 + 15e-3) / (150e-3 / beta_f + 15e-3))
    assert_allclose(t_s, 200e-9, rtol=1e-12)
    assert cp.collector_emitter_breakdown == 45.0


def test_charge_parameters_defaults_and_errors():
    d = charges.charge_parameters_from_datasheet()
    assert d == charges.ChargeParameters()
    with pytest.raises(ValueError, match="transition_frequency"):
        charges.charge_parameters_from_datasheet(transition_frequency=50e9,
                                                 transition_current=1e-3)
    with pytest.raises(ValueError, match="too short"):
        charges.charge_parameters_from_datasheet(storage_time=1e-12, storage_ic=0.1,
                                                 storage_ib_on=0.01, storage_ib_off=-0.01)
    with pytest.raises(ValueError, match="does not saturate"):
        charges.charge_parameters_from_datasheet(storage_time=1e-7, storage_ic=10.0,
                                                 storage_ib_on=0.01, storage_ib_off=0.0)
    with pytest.raises(ValueError):
        charges.ChargeParameters(forward_bias_fraction=1.0)
    with pytest.raises(ValueError):
        charges.ChargeParameters(be_grading_coefficient=1.2)
    with pytest.raises(ValueError):
        charges.ChargeParameters(reverse_transit_time=-1.0)
    for name, cp in charges.CHARGE_CLASS_DEFAULTS.items():
        assert cp.forward_transit_time > 0, name


def test_charge_parameters_subset_and_broadcast():
    cp = charges.ChargeParameters(forward_transit_time=np.array([1e-9, 2e-9, 3e-9]))
    sub = cp.subset(np.array([2, 0]))
    assert_allclose(sub.forward_transit_time, [3e-9, 1e-9])
    assert sub.reverse_transit_time == cp.reverse_transit_time
    wide = charges.ChargeParameters(forward_transit_time=np.array([1e-9])).broadcast(4)
    assert wide.forward_transit_time.shape == (4,)
