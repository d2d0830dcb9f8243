"""Static Gummel-Poon transistor model: derivatives, limits, temperature laws."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize

from tolerance.models.datasheet import saturation_at
from tolerance.models.transistor import (
    BOLTZMANN,
    ELEMENTARY_CHARGE,
    REFERENCE_TEMPERATURE,
    TransistorParameters,
    critical_voltage,
    junction_currents,
    limit_junction_step,
    terminal_offsets,
    thermal_voltage,
)

FULL = dict(
    saturation_current=2e-14, forward_beta=150.0, reverse_beta=3.0, forward_emission=1.02,
    reverse_emission=1.05, early_voltage=80.0, reverse_early_voltage=15.0, knee_current=0.05,
    reverse_knee_current=0.01, be_leakage_current=5e-12, be_leakage_emission=1.8,
    bc_leakage_current=2e-12, bc_leakage_emission=2.0, base_resistance=20.0,
    collector_resistance=1.5, emitter_resistance=0.3, beta_exponent=1.5, cbo_leakage=5e-8,
)


def _close(analytic, fd, scale, rtol=1e-6):
    """|analytic - fd| within rtol of fd plus the rounding floor of a central difference of a
    quantity of magnitude ``scale`` with step 1e-6 (2e-16 * scale / 1e-6, times a margin)."""
    err = np.abs(analytic - fd)
    bound = rtol * np.abs(fd) + 1e-8 * np.abs(scale) + 1e-18
    assert np.all(err <= bound), float(np.max(err / bound))


def _random_points(rng, n):
    vbe = rng.uniform(-2.0, 0.85, n)
    vbc = rng.uniform(-30.0, 0.75, n)
    t = rng.uniform(220.0, 420.0, n)
    return vbe, vbc, t


@pytest.mark.parametrize("polarity", [1, -1])
def test_derivatives_match_finite_differences(polarity):
    # reference: central finite differences (numerical analysis, common practice, no source);
    # step 1e-6 V gives truncation error ~1e-12 relative against rounding ~1e-10, so 1e-6
    # relative (plus a tiny absolute floor for currents that nearly vanish) is generous
    rng = np.random.default_rng(7)
    vbe, vbc, t = _random_points(rng, 4000)
    p = TransistorParameters(polarity=polarity, **FULL).at_temperature(t)
    vbe, vbc = polarity * vbe, polarity * vbc
    c = junction_currents(p, vbe, vbc)
    h = 1e-6
    for name, dvbe, dvbc in (("be", h, 0.0), ("bc", 0.0, h)):
        up = junction_currents(p, vbe + dvbe, vbc + dvbc)
        dn = junction_currents(p, vbe - dvbe, vbc - dvbc)
        fd_c = (up.collector - dn.collector) / (2 * h)
        fd_b = (up.base - dn.base) / (2 * h)
        an_c = getattr(c, f"dcollector_dv{name}")
        an_b = getattr(c, f"dbase_dv{name}")
        _close(an_c, fd_c, np.abs(c.collector) + np.abs(c.base))
        _close(an_b, fd_b, np.abs(c.collector) + np.abs(c.base))
        o = terminal_offsets(p, vbe, vbc, c)
        ou = terminal_offsets(p, vbe + dvbe, vbc + dvbc, up)
        od = terminal_offsets(p, vbe - dvbe, vbc - dvbc, dn)
        _close(getattr(o, f"dbase_dv{name}"), (ou.base - od.base) / (2 * h), np.abs(o.base))
        _close(getattr(o, f"dcollector_dv{name}"), (ou.collector - od.collector) / (2 * h),
               np.abs(o.collector))


def test_derivatives_in_the_continued_regions():
    # the linear continuations (exp above 80, q1 denominator below 0.1) keep the analytic
    # derivatives exact (central differences, common practice, no source)
    p = TransistorParameters(**dict(FULL, early_voltage=1.0, reverse_early_voltage=np.inf))
    s = p.at_temperature(np.full(2, 300.0))
    vbe = np.array([3.0, 0.5])
    vbc = np.array([-0.2, 0.95])  # exp continuation; q1 continuation (1 - V_BC/V_A = 0.05)
    c = junction_currents(s, vbe, vbc)
    assert np.all(np.isfinite(c.collector)) and np.all(np.isfinite(c.dcollector_dvbe))
    h = 1e-6
    for dvbe, dvbc, attr in ((h, 0.0, "dcollector_dvbe"), (0.0, h, "dcollector_dvbc")):
        up = junction_currents(s, vbe + dvbe, vbc + dvbc)
        dn = junction_currents(s, vbe - dvbe, vbc - dvbc)
        _close(getattr(c, attr), (up.collector - dn.collector) / (2 * h), c.collector, 1e-5)


def test_a_nan_sample_leaves_the_others_of_its_batch_alone():
    # vectorized evaluation is per sample (common practice, no source): a sample in a
    # continued region (exp above 80, q1 denominator below 0.1) gets the same currents
    # whether or not another sample of the batch is NaN (a batch-wide max or min test would
    # let the NaN switch the continuation off for everyone)
    p = TransistorParameters(**dict(FULL, early_voltage=1.0, reverse_early_voltage=np.inf))
    vbe = np.array([3.0, 0.5, np.nan])
    vbc = np.array([-0.2, 0.95, np.nan])
    with np.errstate(invalid="ignore"):
        mixed = junction_currents(p.at_temperature(np.full(3, 300.0)), vbe, vbc)
    alone = junction_currents(p.at_temperature(np.full(2, 300.0)), vbe[:2], vbc[:2])
    for name in ("collector", "base", "dcollector_dvbe", "dcollector_dvbc", "dbase_dvbe",
                 "dbase_dvbc"):
        assert np.array_equal(getattr(mixed, name)[:2], getattr(alone, name)), name


def test_ebers_moll_transport_limit():
    # Ebers & Moll (1954), transport form: I_C = I_S (e^(V_BE/V_T) - e^(V_BC/V_T))
    # - (I_S/beta_R)(e^(V_BC/V_T) - 1), I_B = (I_S/beta_F)(e^(V_BE/V_T) - 1)
    # + (I_S/beta_R)(e^(V_BC/V_T) - 1); exact identity, so only rounding tolerance
    rng = np.random.default_rng(3)
    vbe = rng.uniform(-1, 0.8, 500)
    vbc = rng.uniform(-10, 0.7, 500)
    p = TransistorParameters(saturation_current=1e-14, forward_beta=120, reverse_beta=2)
    s = p.at_temperature(np.full(500, REFERENCE_TEMPERATURE))
    c = junction_currents(s, vbe, vbc)
    vt = BOLTZMANN * REFERENCE_TEMPERATURE / ELEMENTARY_CHARGE
    ef, er = np.expm1(vbe / vt), np.expm1(vbc / vt)
    assert_allclose(c.collector, 1e-14 * (ef - er) - 1e-14 / 2 * er, rtol=1e-12, atol=1e-26)
    assert_allclose(c.base, 1e-14 / 120 * ef + 1e-14 / 2 * er, rtol=1e-12, atol=1e-26)


def test_base_charge_of_gummel_poon():
    # Gummel & Poon (1970): I_C = (I_F - I_R)/q_b, q_b = q1/2 (1 + sqrt(1 + 4 q2)),
    # q1 = 1/(1 - V_BC/V_A - V_BE/V_B), q2 = I_F/I_KF + I_R/I_KR; recomputed here directly
    p = TransistorParameters(saturation_current=1e-14, forward_beta=1e30, reverse_beta=1e30,
                             early_voltage=60, reverse_early_voltage=8, knee_current=0.02,
                             reverse_knee_current=0.004)
    vbe = np.linspace(0.3, 0.95, 50)
    vbc = np.linspace(-20, 0.6, 50)
    c = junction_currents(p.at_temperature(np.full(50, REFERENCE_TEMPERATURE)), vbe, vbc)
    vt = thermal_voltage(REFERENCE_TEMPERATURE)
    i_f, i_r = 1e-14 * np.expm1(vbe / vt), 1e-14 * np.expm1(vbc / vt)
    q1 = 1 / (1 - vbc / 60 - vbe / 8)
    q2 = i_f / 0.02 + i_r / 0.004
    qb = q1 / 2 * (1 + np.sqrt(1 + 4 * q2))
    assert_allclose(c.collector, (i_f - i_r) / qb, rtol=1e-12)


def test_pnp_mirrors_npn():
    # a PNP is the NPN with every voltage and current reversed (definition of polarity)
    rng = np.random.default_rng(5)
    vbe, vbc, t = _random_points(rng, 300)
    npn = junction_currents(TransistorParameters(polarity=1, **FULL).at_temperature(t), vbe, vbc)
    pnp = junction_currents(TransistorParameters(polarity=-1, **FULL).at_temperature(t),
                            -vbe, -vbc)
    assert_allclose(pnp.collector, -npn.collector, rtol=1e-14)
    assert_allclose(pnp.base, -npn.base, rtol=1e-14)
    assert_allclose(pnp.dcollector_dvbe, npn.dcollector_dvbe, rtol=1e-14)
    assert_allclose(pnp.dbase_dvbc, npn.dbase_dvbc, rtol=1e-14)


def test_saturation_current_follows_band_gap_law():
    # I_S(T) = I_S (T/T0)^3 exp[(E_g/k)(1/T0 - 1/T)], E_g = 1.11 eV (project reference list)
    t = np.array([233.15, 298.15, 358.15, 398.15])
    s = TransistorParameters(saturation_current=1e-14).at_temperature(t)
    expected = 1e-14 * (t / 298.15) ** 3 * np.exp(
        1.11 * ELEMENTARY_CHARGE / BOLTZMANN * (1 / 298.15 - 1 / t))
    assert_allclose(s.saturation_current, expected, rtol=1e-13)
    # common practice, no source: I_S roughly doubles per 5 K near room temperature
    ratio = TransistorParameters().at_temperature(303.15).saturation_current / \
        TransistorParameters().at_temperature(298.15).saturation_current
    assert 1.7 < ratio < 2.3


def test_gains_and_recombination_currents_scale_with_temperature_together():
    # the charge-control model's temperature law (from memory): the ideal gains grow as
    # (T/T0)^X_TB, and each recombination current's saturation current as
    # I_SE (T/T0)^-X_TB (I_S(T)/I_S(T0))^(1/n_E), so that at low currents, where the base
    # current is that recombination, the gain too rises with temperature (a mutation test
    # found the sign of X_TB there unchecked)
    t = np.array([233.15, 298.15, 398.15])
    p = TransistorParameters(saturation_current=1e-14, forward_beta=150, reverse_beta=4,
                             be_leakage_current=5e-13, be_leakage_emission=1.8,
                             bc_leakage_current=2e-13, bc_leakage_emission=2.0,
                             beta_exponent=1.6)
    s = p.at_temperature(t)
    ratio = t / 298.15
    is_ratio = s.saturation_current / 1e-14
    assert_allclose(1.0 / s.inv_forward_beta, 150 * ratio ** 1.6, rtol=1e-13)
    assert_allclose(1.0 / s.inv_reverse_beta, 4 * ratio ** 1.6, rtol=1e-13)
    assert_allclose(s.be_leakage_current, 5e-13 * ratio ** -1.6 * is_ratio ** (1 / 1.8),
                    rtol=1e-13)
    assert_allclose(s.bc_leakage_current, 2e-13 * ratio ** -1.6 * is_ratio ** (1 / 2.0),
                    rtol=1e-13)


def _vbe_at_current(params, current, temperature):
    s = params.at_temperature(np.array([temperature]))
    return optimize.brentq(
        lambda v: junction_currents(s, np.array([v]), np.array([v - 5.0])).collector[0] - current,
        0.2, 1.0, xtol=1e-15, rtol=1e-15)


def test_vbe_falls_about_two_millivolts_per_kelvin():
    # Sedra & Smith: V_BE falls "about 2 mV per degree" at constant current; the band-gap law
    # gives dV_BE/dT = (V_BE - E_g - 3 V_T)/T (from memory, derivative of the I_S law), which the
    # model must reproduce to the finite-difference accuracy (1e-3 relative over +-1 K)
    p = TransistorParameters(saturation_current=1e-14, forward_beta=200)
    v0 = _vbe_at_current(p, 1e-3, 298.15)
    slope = (_vbe_at_current(p, 1e-3, 299.15) - _vbe_at_current(p, 1e-3, 297.15)) / 2.0
    assert -2.4e-3 < slope < -1.6e-3  # "about 2 mV per degree"
    vt = thermal_voltage(298.15)
    assert slope == pytest.approx((v0 - 1.11 - 3 * vt) / 298.15, rel=1e-3)


@pytest.mark.parametrize("polarity", [1, -1])
def test_carried_junctions_keep_their_transport_current(polarity):
    p = TransistorParameters(**{**FULL, "polarity": polarity})
    t_from = np.array([233.15, 298.15, 358.15, 398.15])
    t_to = np.array([263.15, 330.15, 340.15, 418.15])
    v_be = polarity * np.array([0.62, 0.71, 0.55, 0.48])
    v_bc = polarity * np.array([0.52, -4.0, 0.0, 0.45])  # saturated, reverse, zero, saturated
    c_be, c_bc = p.carry_junctions(v_be, v_bc, t_from, t_to)
    old, new = p.at_temperature(t_from), p.at_temperature(t_to)

    def transport(s, v, inv_nvt):
        return s.saturation_current * np.exp(polarity * v * inv_nvt)

    # the I_S law of at_temperature (band gap, project reference list): a forward-biased
    # junction carried to the new temperature passes the same ideal transport current
    assert_allclose(transport(new, c_be, new.inv_forward_nvt),
                    transport(old, v_be, old.inv_forward_nvt), rtol=1e-12)
    fwd = np.array([True, False, False, True])
    assert_allclose(transport(new, c_bc, new.inv_reverse_nvt)[fwd],
                    transport(old, v_bc, old.inv_reverse_nvt)[fwd], rtol=1e-12)
    # a junction at or below ten emission thermal voltages is left where the circuit put it
    assert np.array_equal(c_bc[~fwd], v_bc[~fwd])
    # Sedra & Smith: about -2 mV per degree at constant current, here over 32 K at 0.71 V
    assert -2.4e-3 < (c_be[1] - v_be[1]) / (32.0 * polarity) < -1.6e-3
    # no change without a temperature change
    same = p.carry_junctions(v_be, v_bc, t_from, t_from)
    assert_allclose(same[0], v_be, rtol=1e-14)


def test_gain_follows_its_temperature_exponent():
    # beta(T) = beta (T/T0)^X_TB: ideal forward-active I_C/I_B scales exactly so (definition of
    # the exponent in the model; I_C/I_B = beta_F when Early, knee and leakage are off)
    p = TransistorParameters(forward_beta=100, beta_exponent=1.5)
    t = np.array([233.15, 298.15, 398.15])
    s = p.at_temperature(t)
    c = junction_currents(s, np.full(3, 0.6), np.full(3, -5.0))
    beta_t = 100 * (t / 298.15) ** 1.5
    br_t = 1.0 * (t / 298.15) ** 1.5
    # exact ratio with the reverse saturation terms (I_R = -I_S) of Ebers & Moll
    i_f = s.saturation_current * np.expm1(0.6 / thermal_voltage(t))
    i_r = -s.saturation_current
    assert_allclose(c.collector / c.base, (i_f - i_r - i_r / br_t) / (i_f / beta_t + i_r / br_t),
                    rtol=1e-12)
    assert_allclose(c.collector / c.base, beta_t, rtol=1e-4)  # the reverse terms are tiny


def test_cbo_leakage_doubles_every_ten_kelvin_and_vanishes_at_zero_bias():
    # common practice (project reference list): I_CBO doubles every 10 K
    p = TransistorParameters(saturation_current=1e-30, cbo_leakage=1e-8, leakage_doubling=10.0)
    t = np.array([298.15, 308.15, 358.15])
    c = junction_currents(p.at_temperature(t), np.zeros(3), np.full(3, -20.0))
    assert_allclose(c.collector, 1e-8 * np.array([1, 2, 64]), rtol=1e-9)
    assert_allclose(c.base, -c.collector, rtol=1e-12)
    # zero bias: no current at all (definition of a generation current)
    z = junction_currents(p.at_temperature(t), np.zeros(3), np.zeros(3))
    assert np.all(z.collector == 0) and np.all(z.base == 0)


def test_cbo_leakage_levels_off_under_forward_bias():
    # Sah, Noyce & Shockley (Proc. IRE 45, 1957): the depletion-region generation current
    # exists under reverse bias; under forward bias the region recombines instead (the
    # non-ideal I_SC term), so the leakage term must not carry I_CBO through a saturated
    # junction; the model keeps 2 % of it there (module Notes). Leakage alone (I_S
    # negligible), 25 degC.
    p = TransistorParameters(saturation_current=1e-30, cbo_leakage=1e-3)
    vt = thermal_voltage(REFERENCE_TEMPERATURE)
    v_cb = np.array([-0.6, -0.3, -0.01, -0.001, -1e-4, 0.0, vt, 0.2, 5.0])
    s = p.at_temperature(np.full(v_cb.size, REFERENCE_TEMPERATURE))
    c = junction_currents(s, np.zeros(v_cb.size), -v_cb)
    a = v_cb / vt
    expected = 1e-3 * np.where(a >= 0, np.tanh(a / 2), 0.02 * np.expm1(np.minimum(a, 0) / 0.04))
    # (atol: the 1e-30 A diode terms reach 1e-20 A at 0.6 V)
    assert_allclose(c.collector, expected, rtol=1e-12, atol=1e-18)
    # beyond 10 mV of forward bias 2 % of I_CBO (it was the full -I_CBO before)
    assert_allclose(c.collector[v_cb <= -0.01], -2e-5, rtol=1e-4)
    # monotonic (no negative differential conductance) and passive at every bias
    fine = np.linspace(-0.05, 0.05, 20001)
    sf = p.at_temperature(np.full(fine.size, REFERENCE_TEMPERATURE))
    cf = junction_currents(sf, np.zeros(fine.size), -fine)
    assert np.all(np.diff(cf.collector) >= 0) and np.all(cf.dcollector_dvbc <= 0)
    assert np.all(cf.collector * fine >= 0)
    # continuous in value and slope at zero bias (central differences, common practice,
    # no source): the slope on either side is I_CBO / (2 V_T)
    h = 1e-8
    for v in (-1e-6, 1e-6):
        s3 = p.at_temperature(np.full(3, REFERENCE_TEMPERATURE))
        c3 = junction_currents(s3, np.zeros(3), -np.array([v - h, v, v + h]))
        fd = (c3.collector[2] - c3.collector[0]) / (2 * h)
        assert_allclose(-c3.dcollector_dvbc[1], fd, rtol=1e-5)
        assert_allclose(fd, 1e-3 / (2 * vt), rtol=2e-3)


def test_early_effect_raises_collector_current_with_vce():
    # Gummel & Poon q1 with only V_A: I_C = I_S e^(V_BE/V_T)(1 - V_BC/V_A) in forward active
    # (reverse terms e^(V_BC/V_T) are below 1e-80 at V_BC = -5 V), so I_C(V_CE) is linear in V_CE
    p = TransistorParameters(saturation_current=1e-14, early_voltage=50.0)
    vce = np.array([1.0, 5.0, 10.0, 20.0])
    s = p.at_temperature(np.full(4, REFERENCE_TEMPERATURE))
    c = junction_currents(s, np.full(4, 0.65), 0.65 - vce)
    ic0 = 1e-14 * np.expm1(0.65 / thermal_voltage(REFERENCE_TEMPERATURE))
    assert_allclose(c.collector, ic0 * (1 + (vce - 0.65) / 50.0), rtol=1e-6)


def test_vce_sat_matches_ebers_moll_closed_form():
    # Neamen, Semiconductor Physics and Devices (Ebers-Moll model):
    # V_CE(sat) = V_T ln[(I_C (1 - alpha_R) + I_B) alpha_F / ((alpha_F I_B - (1 - alpha_F) I_C)
    # alpha_R)], i.e. V_T ln[(1/alpha_R + f/beta_R) / (1 - f/beta_F)] with f = I_C/I_B.
    # The closed form drops the "-1" of the diode terms (relative effect ~ I_S/I_B < 1e-9).
    bf, br = 150.0, 4.0
    p = TransistorParameters(saturation_current=1e-14, forward_beta=bf, reverse_beta=br)
    ic = np.array([1e-3, 1e-2, 1e-1, 1e-1, 1e-2])
    ib = ic / np.array([10.0, 20.0, 50.0, 100.0, 140.0])
    vce, _ = saturation_at(p, ic, ib)
    af, ar = bf / (1 + bf), br / (1 + br)
    vt = thermal_voltage(REFERENCE_TEMPERATURE)
    neamen = vt * np.log((ic * (1 - ar) + ib) * af / ((af * ib - (1 - af) * ic) * ar))
    assert_allclose(vce, neamen, rtol=1e-6)
    f = ic / ib
    assert_allclose(neamen, vt * np.log((1 / ar + f / br) / (1 - f / bf)), rtol=1e-12)


def test_junction_limiting():
    # classical logarithmic limiting (from memory): a large forward step ends at
    # v_old + nV_T ln(1 + dv/nV_T); small and downward steps are untouched
    nvt = np.full(4, 0.02585)
    vcrit = critical_voltage(1e-14, nvt)
    old = np.array([0.6, 0.6, 0.7, -1.0])
    new = np.array([5.0, 0.61, 0.2, 3.0])
    lim = limit_junction_step(new, old, nvt, vcrit)
    assert lim[0] == pytest.approx(0.6 + 0.02585 * np.log(1 + 4.4 / 0.02585), rel=1e-12)
    assert lim[1] == 0.61 and lim[2] == 0.2
    assert lim[3] == pytest.approx(0.02585 * np.log(3.0 / 0.02585), rel=1e-12)
    assert np.all(lim < 0.9)  # exp(lim / nV_T) stays far from overflow
    assert 0.6 < vcrit[0] < 0.8  # about 0.7 V for I_S = 1e-14 A (from memory)


def test_bad_polarity_rejected():
    with pytest.raises(ValueError):
        TransistorParameters(polarity=0)
