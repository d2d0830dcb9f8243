"""Charge storage of a bipolar transistor, vectorized over samples.

The static Gummel-Poon currents of :mod:`tolerance.models.transistor` say how much current a
transistor carries at given junction voltages; this module says how much charge it stores there,
so that the transient solver (:mod:`tolerance.models.transient`) obtains delay, storage and fall
times from the model itself. Two kinds of charge are stored at each junction:

- diffusion (minority-carrier) charge of the forward and reverse transport currents, with the
  forward and reverse transit times (charge-control view of Beaufoy & Sparkes [2]_);
- depletion-layer charge of the base-emitter and base-collector junctions, from their zero-bias
  capacitances, built-in voltages and grading coefficients.

Nomenclature (paper symbol | name in this module | meaning):

============  ================================  ============================================
tau_F         forward_transit_time              forward transit time [s]
tau_R         reverse_transit_time              reverse transit time [s]
C_je0         be_zero_bias_capacitance          B-E depletion capacitance at zero bias [F]
phi_E         be_built_in_voltage               B-E built-in (diffusion) voltage [V]
m_E           be_grading_coefficient            B-E grading coefficient [1]
C_jc0         bc_zero_bias_capacitance          B-C depletion capacitance at zero bias [F]
phi_C         bc_built_in_voltage               B-C built-in voltage [V]
m_C           bc_grading_coefficient            B-C grading coefficient [1]
F_C           forward_bias_fraction             start of the linear continuation, F_C phi [1]
V_(BR)CEO     collector_emitter_breakdown       breakdown of the open-base C-E path [V]
============  ================================  ============================================

Notes
-----
Diffusion charges (Gummel & Poon [1]_, charge-control form)::

    Q_F = tau_F I_F / q_b,        Q_R = tau_R I_R,

with I_F = I_S (exp(V_BE / n_F V_T) - 1), I_R = I_S (exp(V_BC / n_R V_T) - 1) and the base-charge
normalisation q_b of the static model (Early effect and high injection), evaluated here by the
same equations (the static module exposes only the terminal currents). Q_F is assigned to the
base-emitter junction, Q_R to the base-collector junction.

Depletion charge of a junction with zero-bias capacitance C_0, built-in voltage phi, grading m
(the abrupt / graded junction law, e.g. Sze, Physics of Semiconductor Devices)::

    Q_j(V) = C_0 phi / (1 - m) (1 - (1 - V / phi)^(1 - m))             for V <= F_C phi
    C_j(V) = C_0 (1 - F_C)^(-1 - m) (1 - F_C (1 + m) + m V / phi)       for V >  F_C phi

The second line is the usual linearisation of the capacitance above a fraction F_C (0.5) of the
built-in voltage; its charge is the integral of C_j, so Q_j and C_j = dQ_j/dV are continuous at
F_C phi (C1) and finite at any forward bias.

Storage time (Moll [3]_; Beaufoy & Sparkes [2]_; e.g. Jaeger & Blalock, Microelectronic Circuit
Design): a transistor held in saturation by a base current I_B1 and turned off by I_B2 (< 0 for
reverse drive) stays saturated for ::

    t_s = tau_s ln[(I_B1 - I_B2) / (I_C,sat / beta_F - I_B2)],
    tau_s = alpha_F (tau_F + alpha_R tau_R) / (1 - alpha_F alpha_R),

which :func:`charge_parameters_from_datasheet` inverts for tau_R. The transition frequency gives
tau_F: ``1 / (2 pi f_T) = tau_F + (C_je + C_jc) n_F V_T / I_C`` (the depletion share of the
charging time at the test current; hybrid-pi model of any electronics textbook, e.g. Sedra &
Smith), so tau_F is the remainder after the depletion share.

References
----------
.. [1] H. K. Gummel and H. C. Poon, "An integral charge control model of bipolar transistors,"
   Bell Syst. Tech. J., vol. 49, no. 5, pp. 827-852, 1970.
.. [2] R. Beaufoy and J. J. Sparkes, "The junction transistor as a charge-controlled device,"
   ATE Journal, vol. 13, pp. 310-327, 1957.
.. [3] J. L. Moll, "Large-signal transient response of junction transistors," Proc. IRE,
   vol. 42, no. 12, pp. 1773-1784, 1954.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace

import numpy as np

from tolerance.models.transistor import (ScaledTransistor, Transport, junction_currents,
                                         thermal_voltage)

__all__ = [
    "CHARGE_CLASS_DEFAULTS",
    "ChargeParameters",
    "StoredCharges",
    "charge_parameters_from_datasheet",
    "depletion_charge",
    "storage_time_constant",
    "storage_time",
    "stored_charges",
]


@dataclass(frozen=True)
class ChargeParameters:
    """Charge-storage parameters of one transistor (floats or arrays over samples).

    The defaults describe a general-purpose small-signal NPN (typical class values, from
    memory: f_T about 300 MHz, storage time about 200 ns at I_C = 150 mA, I_B1 = -I_B2 = 15 mA,
    C_ob about 4 pF at 10 V). Zero capacitances or transit times remove the term.

    Parameters
    ----------
    forward_transit_time, reverse_transit_time : float or ndarray
        tau_F and tau_R [s].
    be_zero_bias_capacitance, bc_zero_bias_capacitance : float or ndarray
        Zero-bias depletion capacitances of the two junctions [F].
    be_built_in_voltage, bc_built_in_voltage : float or ndarray
        Built-in voltages [V].
    be_grading_coefficient, bc_grading_coefficient : float or ndarray
        Grading coefficients [1] (1/2 abrupt, 1/3 linearly graded).
    forward_bias_fraction : float
        F_C: the depletion capacitance is continued linearly above F_C times the built-in
        voltage [1].
    collector_emitter_breakdown : float or ndarray
        V_(BR)CEO [V], where the transient model's avalanche current source reaches the test
        current of the rating; ``inf`` removes the avalanche term.
    """

    forward_transit_time: float | np.ndarray = 0.4e-9
    reverse_transit_time: float | np.ndarray = 80e-9
    be_zero_bias_capacitance: float | np.ndarray = 20e-12
    be_built_in_voltage: float | np.ndarray = 0.75
    be_grading_coefficient: float | np.ndarray = 0.33
    bc_zero_bias_capacitance: float | np.ndarray = 8e-12
    bc_built_in_voltage: float | np.ndarray = 0.75
    bc_grading_coefficient: float | np.ndarray = 0.33
    forward_bias_fraction: float = 0.5
    collector_emitter_breakdown: float | np.ndarray = 40.0

    def __post_init__(self):
        if not 0.0 < self.forward_bias_fraction < 1.0:
            raise ValueError("forward_bias_fraction must lie in (0, 1), got "
                             f"{self.forward_bias_fraction!r}")
        for name in ("forward_transit_time", "reverse_transit_time", "be_zero_bias_capacitance",
                     "bc_zero_bias_capacitance"):
            if np.any(np.asarray(getattr(self, name)) < 0):
                raise ValueError(f"{name} must not be negative")
        for name in ("be_grading_coefficient", "bc_grading_coefficient"):
            m = np.asarray(getattr(self, name))
            if np.any((m <= 0) | (m >= 1)):
                raise ValueError(f"{name} must lie in (0, 1)")

    def replace(self, **changes) -> "ChargeParameters":
        """A copy with some fields changed."""
        return replace(self, **changes)

    def subset(self, idx) -> "ChargeParameters":
        """The same parameters for the samples ``idx`` (arrays indexed, scalars kept)."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, np.ndarray) and v.ndim > 0 and v.size > 1:
                v = v[idx]
            out[f.name] = v
        return ChargeParameters(**out)

    def broadcast(self, n: int) -> "ChargeParameters":
        """Every array field as a length-``n`` array (scalars kept as they are)."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, np.ndarray) and v.ndim > 0:
                v = np.broadcast_to(v, (n,)).copy()
            out[f.name] = v
        return ChargeParameters(**out)


#: Charge parameters of the part library's device classes (typical class values, from memory).
CHARGE_CLASS_DEFAULTS: dict[str, ChargeParameters] = {
    "small_signal_npn": ChargeParameters(),
    "small_signal_pnp": ChargeParameters(forward_transit_time=0.6e-9,
                                         reverse_transit_time=100e-9,
                                         be_zero_bias_capacitance=25e-12,
                                         bc_zero_bias_capacitance=10e-12),
    "medium_power_npn": ChargeParameters(forward_transit_time=1.5e-9,
                                         reverse_transit_time=300e-9,
                                         be_zero_bias_capacitance=150e-12,
                                         bc_zero_bias_capacitance=40e-12,
                                         collector_emitter_breakdown=60.0),
    "power_npn": ChargeParameters(forward_transit_time=50e-9,
                                  reverse_transit_time=2e-6,
                                  be_zero_bias_capacitance=1.5e-9,
                                  bc_zero_bias_capacitance=300e-12,
                                  collector_emitter_breakdown=60.0),
    "monolithic_darlington": ChargeParameters(forward_transit_time=20e-9,
                                              reverse_transit_time=2e-6,
                                              be_zero_bias_capacitance=500e-12,
                                              bc_zero_bias_capacitance=200e-12,
                                              collector_emitter_breakdown=100.0),
}


@dataclass(frozen=True)
class StoredCharges:
    """Charges stored at the two junctions [C] and their derivatives [F].

    ``base_emitter`` holds Q_F plus the B-E depletion charge, ``base_collector`` Q_R plus the
    B-C depletion charge, both counted positive on the base side (actual sign: negative for a
    conducting PNP). Q_F depends on both junction voltages through q_b.
    """

    base_emitter: np.ndarray
    base_collector: np.ndarray
    dbe_dvbe: np.ndarray
    dbe_dvbc: np.ndarray
    dbc_dvbc: np.ndarray


def _is_zero(v) -> bool:
    """True for a scalar zero (a structural zero: the term is off), False for per-sample arrays."""
    if isinstance(v, np.ndarray):
        return v.ndim == 0 and float(v) == 0.0
    return float(v) == 0.0


def depletion_charge(v, zero_bias_capacitance, built_in_voltage, grading, fraction=0.5):
    """Depletion charge of a junction and its capacitance.

    Parameters
    ----------
    v : ndarray
        Junction voltage, forward bias positive [V].
    zero_bias_capacitance : float or ndarray
        C_0 [F].
    built_in_voltage : float or ndarray
        phi [V].
    grading : float or ndarray
        Grading coefficient m, 0 < m < 1 [1].
    fraction : float
        F_C, start of the linear continuation of the capacitance [1].

    Returns
    -------
    (ndarray, ndarray)
        Charge Q_j [C] (zero at zero bias) and capacitance dQ_j/dV [F].

    Notes
    -----
    The junction law and its continuation of the module Notes; C1 at V = F_C phi.
    """
    v = np.asarray(v, dtype=float)
    c0, phi, m = zero_bias_capacitance, built_in_voltage, grading
    vlim = fraction * phi
    below = np.minimum(v, vlim)
    base = 1.0 - below / phi  # >= 1 - F_C > 0
    pw = base ** (-m)
    q_low = c0 * phi / (1.0 - m) * (1.0 - base * pw)
    c_low = c0 * pw
    above = np.maximum(v - vlim, 0.0)
    f1 = (1.0 - fraction) ** (-1.0 - m)
    # C(V) = C_0 f1 (1 - F_C (1 + m) + m V / phi); its integral from F_C phi to V
    c_high = c0 * f1 * (1.0 - fraction * (1.0 + m) + m * (vlim + above) / phi)
    c_at = c0 * (1.0 - fraction) ** (-m)  # capacitance at F_C phi (both laws agree)
    q_extra = 0.5 * (c_at + c_high) * above  # trapezoid is exact for a linear C(V)
    q = q_low + q_extra
    c = np.where(v > vlim, c_high, c_low)
    return q, c


def stored_charges(p: ScaledTransistor, c: ChargeParameters, v_be, v_bc,
                   transport: Transport | None = None) -> StoredCharges:
    """Junction charges of a transistor and their derivatives.

    Parameters
    ----------
    p : ScaledTransistor
        Static parameters at the sample temperatures (I_S, emission, Early, knee terms).
    c : ChargeParameters
        Charge parameters (scalars or arrays matching the samples).
    v_be, v_bc : ndarray
        Intrinsic junction voltages in the actual sign (negative for a conducting PNP) [V].
    transport : Transport, optional
        The transport terms of :func:`~tolerance.models.transistor.junction_currents` at the
        same voltages (``JunctionCurrents.transport``), which the switching circuit has at
        hand; without them they are evaluated here.

    Returns
    -------
    StoredCharges
        Charges [C] and their partial derivatives [F]; all in the actual sign.

    Notes
    -----
    Equations of the module Notes. For a PNP the NPN charges are evaluated at the mirrored
    voltages and mirrored back; their derivatives are unchanged by the double sign flip.
    """
    pol = p.polarity
    vbe = v_be if pol == 1 else -np.asarray(v_be)
    vbc = v_bc if pol == 1 else -np.asarray(v_bc)
    tf, tr = c.forward_transit_time, c.reverse_transit_time
    zero = np.zeros_like(np.asarray(vbe, dtype=float))
    qbe = zero
    dbe_be = zero
    dbe_bc = zero
    qbc = zero
    dbc_bc = zero
    if transport is None and not (_is_zero(tf) and _is_zero(tr)):
        # the static model's I_F, I_R and q_b (Gummel & Poon, same continuations)
        transport = junction_currents(p, v_be, v_bc).transport
    t = transport
    if not _is_zero(tf):
        if t.base_charge is None:
            qf = tf * t.forward
            dbe_be = tf * t.dforward
        else:
            inv_qb = 1.0 / t.base_charge
            qf = tf * t.forward * inv_qb
            dbe_be = (tf * t.dforward * inv_qb if t.dbase_charge_dvbe is None else
                      tf * (t.dforward - t.forward * inv_qb * t.dbase_charge_dvbe) * inv_qb)
            if t.dbase_charge_dvbc is not None:
                dbe_bc = -qf * inv_qb * t.dbase_charge_dvbc
        qbe = qbe + qf
    if not _is_zero(tr):
        qbc = qbc + tr * t.reverse
        dbc_bc = dbc_bc + tr * t.dreverse
    if not _is_zero(c.be_zero_bias_capacitance):
        qj, cj = depletion_charge(vbe, c.be_zero_bias_capacitance, c.be_built_in_voltage,
                                  c.be_grading_coefficient, c.forward_bias_fraction)
        qbe = qbe + qj
        dbe_be = dbe_be + cj
    if not _is_zero(c.bc_zero_bias_capacitance):
        qj, cj = depletion_charge(vbc, c.bc_zero_bias_capacitance, c.bc_built_in_voltage,
                                  c.bc_grading_coefficient, c.forward_bias_fraction)
        qbc = qbc + qj
        dbc_bc = dbc_bc + cj
    # every term started from ``zero``, the shape of the voltages, so none needs broadcasting
    if pol == -1:
        qbe, qbc = -qbe, -qbc
    return StoredCharges(qbe, qbc, dbe_be, dbe_bc, dbc_bc)


def storage_time_constant(forward_beta, reverse_beta, forward_transit_time,
                          reverse_transit_time):
    """Storage time constant tau_s of the charge-control model [s].

    ``tau_s = alpha_F (tau_F + alpha_R tau_R) / (1 - alpha_F alpha_R)`` with
    ``alpha = beta / (1 + beta)`` (Moll 1954; Beaufoy & Sparkes 1957; e.g. Jaeger & Blalock).
    """
    af = forward_beta / (1.0 + forward_beta)
    ar = reverse_beta / (1.0 + reverse_beta)
    return af * (forward_transit_time + ar * reverse_transit_time) / (1.0 - af * ar)


def storage_time(forward_beta, reverse_beta, forward_transit_time, reverse_transit_time,
                 collector_current, base_current_on, base_current_off):
    """Charge-control storage time [s].

    Parameters
    ----------
    forward_beta, reverse_beta : float or ndarray
        beta_F, beta_R [1].
    forward_transit_time, reverse_transit_time : float or ndarray
        tau_F, tau_R [s].
    collector_current : float or ndarray
        I_C,sat, the collector current the load allows in saturation [A].
    base_current_on : float or ndarray
        I_B1 [A].
    base_current_off : float or ndarray
        I_B2, negative for reverse drive [A].

    Returns
    -------
    ndarray
        ``t_s = tau_s ln[(I_B1 - I_B2) / (I_C,sat / beta_F - I_B2)]`` [s] (module Notes);
        zero when I_B1 does not saturate the transistor.
    """
    tau = storage_time_constant(forward_beta, reverse_beta, forward_transit_time,
                                reverse_transit_time)
    ratio = (base_current_on - base_current_off) / (collector_current / forward_beta
                                                    - base_current_off)
    return tau * np.log(np.maximum(ratio, 1.0))


def charge_parameters_from_datasheet(
    *,
    transition_frequency: float | None = None,
    transition_current: float | None = None,
    transition_vce: float = 10.0,
    storage_time: float | None = None,
    storage_ic: float | None = None,
    storage_ib_on: float | None = None,
    storage_ib_off: float | None = None,
    output_capacitance: float | None = None,
    output_capacitance_vcb: float = 10.0,
    forward_beta: float = 100.0,
    reverse_beta: float = 4.0,
    forward_emission: float = 1.0,
    be_on_voltage: float = 0.7,
    breakdown_vceo: float | None = None,
    temperature: float = 298.15,
    defaults: ChargeParameters | None = None,
) -> ChargeParameters:
    """Charge parameters from datasheet figures; class defaults for what is not given.

    Parameters
    ----------
    transition_frequency : float, optional
        f_T [Hz], stated at ``transition_current`` [A] and ``transition_vce`` [V].
    storage_time : float, optional
        t_s [s] at ``storage_ic`` [A] with base currents ``storage_ib_on`` (I_B1) and
        ``storage_ib_off`` (I_B2, negative for reverse drive; datasheets usually state
        I_B1 = -I_B2) [A].
    output_capacitance : float, optional
        C_ob [F], the collector-base capacitance at ``output_capacitance_vcb`` [V] reverse bias.
    forward_beta, reverse_beta : float
        Gains used by the storage-time relation (the datasheet's typical h_FE and the class
        reverse gain) [1].
    forward_emission : float
        n_F, for the depletion share of the f_T relation [1].
    be_on_voltage : float
        V_BE at the f_T test point, for the B-E depletion capacitance there [V].
    breakdown_vceo : float, optional
        V_(BR)CEO [V].
    temperature : float
        Temperature of the figures [K].
    defaults : ChargeParameters, optional
        Values for what the datasheet does not give (default: :class:`ChargeParameters`,
        typical class values, from memory).

    Returns
    -------
    ChargeParameters

    Raises
    ------
    ValueError
        If the figures are inconsistent: f_T too high for the depletion capacitances at its
        test current, or a storage time too short for the forward transit time.

    Notes
    -----
    In the order used (each step uses the previous ones):

    1. C_ob: ``C_jc0 = C_ob (1 + V_CB / phi_C)^m_C`` (junction law of the module Notes).
    2. f_T: ``tau_F = 1/(2 pi f_T) - (C_je(V_BE) + C_jc(V_BE - V_CE)) n_F V_T / I_C``.
    3. t_s: ``tau_s = t_s / ln[(I_B1 - I_B2) / (I_C / beta_F - I_B2)]`` and then
       ``tau_R = (tau_s (1 - alpha_F alpha_R) / alpha_F - tau_F) / alpha_R``
       (the charge-control storage-time formula, Moll 1954; Beaufoy & Sparkes 1957).
    """
    d = defaults if defaults is not None else ChargeParameters()
    changes: dict[str, float] = {}
    if output_capacitance is not None:
        m, phi = float(d.bc_grading_coefficient), float(d.bc_built_in_voltage)
        changes["bc_zero_bias_capacitance"] = output_capacitance * (
            1.0 + output_capacitance_vcb / phi) ** m
    if breakdown_vceo is not None:
        changes["collector_emitter_breakdown"] = float(breakdown_vceo)
    d = d.replace(**changes)
    tau_f = float(d.forward_transit_time)
    if transition_frequency is not None:
        if transition_current is None or transition_current <= 0:
            raise ValueError("transition_current must be given (> 0) with transition_frequency")
        vt = float(thermal_voltage(temperature))
        _, c_be = depletion_charge(be_on_voltage, d.be_zero_bias_capacitance,
                                   d.be_built_in_voltage, d.be_grading_coefficient,
                                   d.forward_bias_fraction)
        _, c_bc = depletion_charge(be_on_voltage - transition_vce, d.bc_zero_bias_capacitance,
                                   d.bc_built_in_voltage, d.bc_grading_coefficient,
                                   d.forward_bias_fraction)
        total = 1.0 / (2.0 * math.pi * transition_frequency)
        share = float(c_be + c_bc) * forward_emission * vt / transition_current
        tau_f = total - share
        if tau_f <= 0.0:
            raise ValueError(
                f"transition_frequency: 1/(2 pi f_T) = {total:.3g} s is not above the depletion "
                f"share {share:.3g} s at {transition_current:g} A; check f_T, its current and "
                "the capacitances")
        d = d.replace(forward_transit_time=tau_f)
    if storage_time is not None:
        if None in (storage_ic, storage_ib_on, storage_ib_off):
            raise ValueError("storage_time needs storage_ic, storage_ib_on and storage_ib_off")
        ratio = (storage_ib_on - storage_ib_off) / (storage_ic / forward_beta - storage_ib_off)
        if not ratio > 1.0:
            raise ValueError("storage_ib_on does not saturate the transistor at storage_ic "
                             "with the given forward_beta; no storage time follows")
        tau_s = storage_time / math.log(ratio)
        af = forward_beta / (1.0 + forward_beta)
        ar = reverse_beta / (1.0 + reverse_beta)
        tau_r = (tau_s * (1.0 - af * ar) / af - tau_f) / ar
        if tau_r <= 0.0:
            raise ValueError(f"storage_time {storage_time:.3g} s is too short for the forward "
                             f"transit time {tau_f:.3g} s at these currents")
        d = d.replace(reverse_transit_time=tau_r)
    return d
