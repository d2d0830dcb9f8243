"""Static Gummel-Poon model of a bipolar transistor, vectorized over samples.

The model gives the terminal currents of the intrinsic transistor (collector and base, emitter
by Kirchhoff) as functions of the two intrinsic junction voltages, together with their analytic
partial derivatives, for NPN and PNP devices, at a per-sample temperature. Series base,
collector and emitter resistances are carried in the parameters; :func:`terminal_offsets` maps
the intrinsic junction voltages to the external terminal voltages through them, so that a stage
can use the junction voltages themselves as the unknowns of its Newton solve.

Nomenclature (paper symbol | name in this module | meaning):

============  ===============================  ===============================================
I_S           saturation_current               transport saturation current [A]
beta_F        forward_beta                     ideal maximum forward current gain [1]
beta_R        reverse_beta                     ideal maximum reverse current gain [1]
n_F, n_R      forward_emission, ...            emission coefficients of the transport terms
V_A, V_B      early_voltage, reverse_...       forward and reverse Early voltages [V]
I_KF, I_KR    knee_current, reverse_knee_...   high-injection knee currents [A]
C_2 I_S       be_leakage_current               non-ideal (recombination) B-E current [A]
n_EL          be_leakage_emission              its emission coefficient [1]
C_4 I_S       bc_leakage_current               non-ideal B-C current [A]
n_CL          bc_leakage_emission              its emission coefficient [1]
r_B, r_C, r_E base_resistance, ...             series resistances [ohm]
E_g           energy_gap                       band gap for the I_S temperature law [eV]
X_TI          saturation_current_exponent      temperature exponent of I_S [1]
X_TB          beta_exponent                    temperature exponent of the gains [1]
I_CBO         cbo_leakage                      collector-base generation leakage at 25 C [A]
============  ===============================  ===============================================

Notes
-----
Transport current and base charge, Gummel & Poon [1]_::

    I_F  = I_S (exp(V_BE / (n_F V_T)) - 1),   I_R = I_S (exp(V_BC / (n_R V_T)) - 1)
    q_1  = 1 / (1 - V_BC / V_A - V_BE / V_B)                      (Early effect)
    q_2  = I_F / I_KF + I_R / I_KR                                 (high injection)
    q_b  = q_1 / 2 * (1 + sqrt(1 + 4 q_2))                         (eq. of [1] for q_b)
    I_CT = (I_F - I_R) / q_b
    I_BE = I_F / beta_F + I_SE (exp(V_BE / (n_EL V_T)) - 1)
    I_BC = I_R / beta_R + I_SC (exp(V_BC / (n_CL V_T)) - 1)
    I_C  = I_CT - I_BC + I_gen,        I_B = I_BE + I_BC - I_gen

The non-ideal base currents I_SE, I_SC give the gain roll-off at low current. The extra
collector-base generation current represents the leakage that the ideal diode terms understate.
Under reverse bias (V_CB >= 0) it is ``I_gen = I_CBO(T) tanh(V_CB / (2 V_T))``, the
Shockley-Read-Hall factor ``(1 - exp(-V_CB/V_T)) / (1 + exp(-V_CB/V_T))``: it saturates at
I_CBO within a few V_T and vanishes at zero bias. A generation current has no source under
forward bias (the recombination there is the non-ideal I_SC term), so for V_CB < 0 it is
``I_gen = r I_CBO (exp(V_CB / (2 r V_T)) - 1)`` with a remainder r = 0.02: a few millivolts
into forward bias it levels off at -0.02 I_CBO, continuous with its slope at zero bias,
monotonic and passive (I_gen V_CB >= 0). It cannot fall all the way to zero: a leakage that
rose and then fell again would be a negative differential conductance, which folds the DC
solution of a stage (the per-sample reference's source stepping stopped at such a fold).
Without the limit a saturated transistor's collector-base junction carried the full -I_CBO,
which at the hot corner (leakage in milliamperes) raised a Darlington's on-voltage with
temperature instead of lowering it. I_CBO doubles every ``leakage_doubling`` kelvin (common
practice, see the project's reference list).

Temperature (T in kelvin, T_0 = 298.15 K, V_T = k T / q)::

    I_S(T)    = I_S (T/T_0)^X_TI exp[(q E_g / k)(1/T_0 - 1/T)]      (band-gap law)
    beta(T)   = beta (T/T_0)^X_TB
    I_SE(T)   = I_SE (T/T_0)^(-X_TB) (I_S(T)/I_S)^(1/n_EL)           (consistent with beta)
    I_CBO(T)  = I_CBO 2^((T - T_0) / leakage_doubling)

The scaling of the non-ideal currents keeps the low-current gain consistent with the ideal
gain's temperature law; it is the usual companion of the band-gap law (from memory).

To keep every Newton iterate finite the exponentials are continued linearly above an argument
of 80, and q_1 is continued linearly when its denominator falls below 0.1 (far outside any
physical operating point); both continuations are C1, so the analytic derivatives stay exact.

References
----------
.. [1] H. K. Gummel and H. C. Poon, "An integral charge control model of bipolar transistors,"
   Bell Syst. Tech. J., vol. 49, no. 5, pp. 827-852, 1970.
.. [2] J. J. Ebers and J. L. Moll, "Large-signal behavior of junction transistors," Proc. IRE,
   vol. 42, no. 12, pp. 1761-1772, 1954.
"""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np

__all__ = [
    "BOLTZMANN",
    "ELEMENTARY_CHARGE",
    "REFERENCE_TEMPERATURE",
    "JunctionCurrents",
    "ScaledTransistor",
    "TerminalOffsets",
    "TransistorParameters",
    "Transport",
    "critical_voltage",
    "junction_currents",
    "limit_junction_step",
    "terminal_offsets",
    "thermal_voltage",
]

#: Boltzmann constant [J/K] (exact, SI 2019)
BOLTZMANN = 1.380649e-23
#: elementary charge [C] (exact, SI 2019)
ELEMENTARY_CHARGE = 1.602176634e-19
#: temperature at which the model parameters are stated [K] (25 degC)
REFERENCE_TEMPERATURE = 298.15

_EXP_MAX = 80.0  # argument above which exp() is continued linearly
_Q1_DENOMINATOR_MIN = 0.1  # q_1 denominator below which q_1 is continued linearly
_FORWARD_LEAKAGE_REMAINDER = 0.02  # I_CBO fraction left at forward bias (module Notes)
#: a junction biased above this many emission thermal voltages counts as forward-biased in
#: :meth:`TransistorParameters.carry_junctions` (e^10 I_S: where its own law sets its voltage;
#: common practice, no source)
CARRY_FORWARD = 10.0


def thermal_voltage(temperature):
    """Thermal voltage kT/q [V] at ``temperature`` [K]."""
    return BOLTZMANN / ELEMENTARY_CHARGE * np.asarray(temperature, dtype=float)


def _exp_lin(arg):
    """exp(arg) and its derivative, continued linearly above ``_EXP_MAX`` (C1).

    The test is element-wise (``np.any``, not ``np.max``, which a NaN of another sample would
    turn false): a sample's value never depends on the others of its batch."""
    big = arg > _EXP_MAX
    if big.any() if isinstance(big, np.ndarray) else big:
        e = np.exp(np.minimum(arg, _EXP_MAX))
        value = np.where(big, e * (1.0 + (arg - _EXP_MAX)), e)
        return value, e
    e = np.exp(arg)
    return e, e


@dataclass(frozen=True)
class TransistorParameters:
    """Static Gummel-Poon parameters of one transistor (floats or arrays over samples).

    Every field may be a float (same for all samples) or a 1-D array with one value per sample.
    Infinite Early voltages or knee currents switch the corresponding effect off; zero
    leakage currents or resistances remove the term.

    Parameters
    ----------
    polarity : int
        +1 for NPN, -1 for PNP.
    saturation_current : float or ndarray
        Transport saturation current I_S at 25 degC [A].
    forward_beta, reverse_beta : float or ndarray
        Ideal maximum forward and reverse current gains at 25 degC [1].
    forward_emission, reverse_emission : float or ndarray
        Emission coefficients of the transport currents [1].
    early_voltage, reverse_early_voltage : float or ndarray
        Forward (V_A) and reverse (V_B) Early voltages [V].
    knee_current, reverse_knee_current : float or ndarray
        Forward and reverse high-injection knee currents [A].
    be_leakage_current, be_leakage_emission : float or ndarray
        Non-ideal base-emitter current at 25 degC [A] and its emission coefficient [1].
    bc_leakage_current, bc_leakage_emission : float or ndarray
        Non-ideal base-collector current at 25 degC [A] and its emission coefficient [1].
    base_resistance, collector_resistance, emitter_resistance : float or ndarray
        Series resistances [ohm].
    energy_gap : float
        Band gap of the saturation-current temperature law [eV].
    saturation_current_exponent : float
        Temperature exponent X_TI of the saturation current [1].
    beta_exponent : float
        Temperature exponent X_TB of the current gains [1].
    cbo_leakage : float or ndarray
        Collector-base generation leakage I_CBO at 25 degC under reverse bias [A].
    leakage_doubling : float
        Temperature rise that doubles I_CBO [K].
    """

    polarity: int = 1
    saturation_current: float | np.ndarray = 1e-14
    forward_beta: float | np.ndarray = 100.0
    reverse_beta: float | np.ndarray = 1.0
    forward_emission: float | np.ndarray = 1.0
    reverse_emission: float | np.ndarray = 1.0
    early_voltage: float | np.ndarray = np.inf
    reverse_early_voltage: float | np.ndarray = np.inf
    knee_current: float | np.ndarray = np.inf
    reverse_knee_current: float | np.ndarray = np.inf
    be_leakage_current: float | np.ndarray = 0.0
    be_leakage_emission: float | np.ndarray = 1.5
    bc_leakage_current: float | np.ndarray = 0.0
    bc_leakage_emission: float | np.ndarray = 2.0
    base_resistance: float | np.ndarray = 0.0
    collector_resistance: float | np.ndarray = 0.0
    emitter_resistance: float | np.ndarray = 0.0
    energy_gap: float | np.ndarray = 1.11
    saturation_current_exponent: float | np.ndarray = 3.0
    beta_exponent: float | np.ndarray = 0.0
    cbo_leakage: float | np.ndarray = 0.0
    leakage_doubling: float | np.ndarray = 10.0

    def __post_init__(self):
        if self.polarity not in (1, -1):
            raise ValueError(f"polarity must be +1 (NPN) or -1 (PNP), got {self.polarity!r}")

    def replace(self, **changes) -> "TransistorParameters":
        """A copy with some fields changed."""
        return replace(self, **changes)

    def saturation_current_factor(self, temperature):
        """I_S(T) / I_S(T_0) [1] by the band-gap law (T/T_0)^XTI exp[(q E_g / k)(1/T_0 - 1/T)]."""
        t = np.asarray(temperature, dtype=float)
        return (t / REFERENCE_TEMPERATURE) ** self.saturation_current_exponent * np.exp(
            self.energy_gap * ELEMENTARY_CHARGE / BOLTZMANN
            * (1.0 / REFERENCE_TEMPERATURE - 1.0 / t)
        )

    def carry_junctions(self, v_be, v_bc, t_from, t_to):
        """Junction voltages at ``t_to`` [K] with the transport currents the voltages
        ``v_be``, ``v_bc`` [V] (actual sign) carry at ``t_from``: a Newton start for a
        solve at a new temperature from a solution at the old one.

        A forward-biased junction (more than :data:`CARRY_FORWARD` emission thermal
        voltages) keeps I_S(T) exp(v / (N V_T(T))), so v_to = N V_T(t_to) (v_from /
        (N V_T(t_from)) + ln(I_S(t_from) / I_S(t_to))), about -2 mV/K at 0.65 V (the
        textbook V_BE drift, e.g. Sedra & Smith, Microelectronic Circuits); the voltage of
        any other junction is set by the circuit, not by its own law, and is kept.
        """
        pol = self.polarity
        ln_ratio = np.log(self.saturation_current_factor(t_from)
                          / self.saturation_current_factor(t_to))
        scale = np.asarray(t_to, dtype=float) / np.asarray(t_from, dtype=float)
        out = []
        for v, emission in ((v_be, self.forward_emission), (v_bc, self.reverse_emission)):
            u = pol * np.asarray(v, dtype=float)
            nvt_from = emission * thermal_voltage(t_from)
            carried = (u / nvt_from + ln_ratio) * nvt_from * scale
            out.append(pol * np.where(u > CARRY_FORWARD * nvt_from, carried, u))
        return out[0], out[1]

    def at_temperature(self, temperature) -> "ScaledTransistor":
        """Parameters scaled to ``temperature`` [K] (see the module Notes for the laws)."""
        t = np.asarray(temperature, dtype=float)
        vt = thermal_voltage(t)
        ratio = t / REFERENCE_TEMPERATURE
        is_factor = self.saturation_current_factor(t)
        beta_factor = ratio ** self.beta_exponent
        with np.errstate(divide="ignore"):
            inv = lambda v: 1.0 / np.asarray(v, dtype=float)  # noqa: E731 - inf -> 0
            scaled = ScaledTransistor(
                polarity=self.polarity,
                saturation_current=self.saturation_current * is_factor,
                inv_forward_beta=1.0 / (self.forward_beta * beta_factor),
                inv_reverse_beta=1.0 / (self.reverse_beta * beta_factor),
                inv_forward_nvt=1.0 / (self.forward_emission * vt),
                inv_reverse_nvt=1.0 / (self.reverse_emission * vt),
                inv_early=inv(self.early_voltage),
                inv_reverse_early=inv(self.reverse_early_voltage),
                inv_knee=inv(self.knee_current),
                inv_reverse_knee=inv(self.reverse_knee_current),
                be_leakage_current=self.be_leakage_current / beta_factor
                * is_factor ** (1.0 / np.asarray(self.be_leakage_emission, dtype=float)),
                inv_be_leakage_nvt=1.0 / (self.be_leakage_emission * vt),
                bc_leakage_current=self.bc_leakage_current / beta_factor
                * is_factor ** (1.0 / np.asarray(self.bc_leakage_emission, dtype=float)),
                inv_bc_leakage_nvt=1.0 / (self.bc_leakage_emission * vt),
                cbo_leakage=self.cbo_leakage
                * 2.0 ** ((t - REFERENCE_TEMPERATURE) / self.leakage_doubling),
                inv_two_vt=0.5 / vt,
                base_resistance=self.base_resistance,
                collector_resistance=self.collector_resistance,
                emitter_resistance=self.emitter_resistance,
                thermal_voltage=vt,
                forward_emission=self.forward_emission,
            )
        return scaled


@dataclass(frozen=True)
class ScaledTransistor:
    """Gummel-Poon parameters at the sample temperatures, in the form the equations use.

    Built by :meth:`TransistorParameters.at_temperature`; reciprocals are stored so that the
    hot path multiplies instead of dividing. ``subset(idx)`` selects samples.
    """

    polarity: int
    saturation_current: np.ndarray
    inv_forward_beta: np.ndarray
    inv_reverse_beta: np.ndarray
    inv_forward_nvt: np.ndarray
    inv_reverse_nvt: np.ndarray
    inv_early: np.ndarray
    inv_reverse_early: np.ndarray
    inv_knee: np.ndarray
    inv_reverse_knee: np.ndarray
    be_leakage_current: np.ndarray
    inv_be_leakage_nvt: np.ndarray
    bc_leakage_current: np.ndarray
    inv_bc_leakage_nvt: np.ndarray
    cbo_leakage: np.ndarray
    inv_two_vt: np.ndarray
    base_resistance: np.ndarray
    collector_resistance: np.ndarray
    emitter_resistance: np.ndarray
    thermal_voltage: np.ndarray
    forward_emission: np.ndarray

    def subset(self, idx) -> "ScaledTransistor":
        """The same parameters for the samples ``idx`` (arrays indexed, scalars kept)."""
        out = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, np.ndarray) and v.ndim > 0 and v.size > 1:
                v = v[idx]
            out[f.name] = v
        return ScaledTransistor(**out)

    def critical_voltage(self):
        """Critical base-emitter voltage of the junction-limiting rule [V] (intrinsic NPN sense)."""
        nvt = 1.0 / self.inv_forward_nvt
        return critical_voltage(self.saturation_current, nvt)


@dataclass(frozen=True)
class Transport:
    """The transport terms behind :class:`JunctionCurrents`, in the NPN sense (mirrored
    voltages for a PNP), for the charge model to reuse: I_F, I_R [A] and their derivatives
    dI_F/dV_BE, dI_R/dV_BC [S], the base charge q_b [1] and its derivatives [1/V]. ``None``
    is a structural value: q_b = 1 or a zero derivative."""

    forward: np.ndarray
    dforward: np.ndarray
    reverse: np.ndarray
    dreverse: np.ndarray
    base_charge: np.ndarray | None
    dbase_charge_dvbe: np.ndarray | None
    dbase_charge_dvbc: np.ndarray | None


@dataclass(frozen=True)
class JunctionCurrents:
    """Currents into the collector and base terminals of the intrinsic transistor [A] and
    their partial derivatives with respect to the intrinsic junction voltages [S]; the
    transport terms they came from ride along (:class:`Transport`)."""

    collector: np.ndarray
    base: np.ndarray
    dcollector_dvbe: np.ndarray
    dcollector_dvbc: np.ndarray
    dbase_dvbe: np.ndarray
    dbase_dvbc: np.ndarray
    transport: Transport | None = None

    @property
    def emitter_out(self):
        """Current out of the emitter terminal [A] (= collector + base)."""
        return self.collector + self.base


def _is_zero(v) -> bool:
    """True for a scalar zero (a structural zero: the term is off), False for per-sample arrays."""
    if isinstance(v, np.ndarray):
        return v.ndim == 0 and float(v) == 0.0
    return float(v) == 0.0


def _add(a, b):
    """a + b where None stands for a structural zero."""
    if a is None:
        return b
    if b is None:
        return a
    return a + b


def junction_currents(p: ScaledTransistor, v_be, v_bc) -> JunctionCurrents:
    """Terminal currents of the intrinsic transistor and their derivatives.

    Parameters
    ----------
    p : ScaledTransistor
        Parameters at the sample temperatures (:meth:`TransistorParameters.at_temperature`).
    v_be, v_bc : ndarray
        Intrinsic base-emitter and base-collector voltages, base minus emitter and base minus
        collector, in the actual sign (negative for a conducting PNP) [V].

    Returns
    -------
    JunctionCurrents
        Currents into the collector and base [A] (negative for a conducting PNP) and
        d(current)/d(voltage) [S].

    Notes
    -----
    Equations of the module Notes (Gummel & Poon [1]_ of the module). For a PNP the NPN
    equations are evaluated at the mirrored voltages and the currents mirrored back; the
    derivatives are unchanged by the double sign flip.
    """
    pol = p.polarity
    if pol == 1:
        vbe = v_be
        vbc = v_bc
    else:
        vbe = -v_be
        vbc = -v_bc
    i_s = p.saturation_current
    ef, def_ = _exp_lin(vbe * p.inv_forward_nvt)
    er, der = _exp_lin(vbc * p.inv_reverse_nvt)
    i_f = i_s * (ef - 1.0)
    i_r = i_s * (er - 1.0)
    gf = i_s * def_ * p.inv_forward_nvt  # dI_F/dV_BE
    gr = i_s * der * p.inv_reverse_nvt  # dI_R/dV_BC

    # base charge q_b (Gummel & Poon); terms whose parameters are off are skipped (None is a
    # structural zero), which keeps the common cases (no reverse Early voltage, no reverse
    # knee) cheap
    has_va, has_vb = not _is_zero(p.inv_early), not _is_zero(p.inv_reverse_early)
    has_kf, has_kr = not _is_zero(p.inv_knee), not _is_zero(p.inv_reverse_knee)
    qb = dqb_be = dqb_bc = None
    if has_va or has_vb:
        den = 1.0
        if has_va:
            den = den - vbc * p.inv_early
        if has_vb:
            den = den - vbe * p.inv_reverse_early
        if np.any(den < _Q1_DENOMINATOR_MIN):  # element-wise: NaN-proof, see _exp_lin
            dmin = _Q1_DENOMINATOR_MIN
            small = den < dmin
            q1 = np.where(small, (2.0 * dmin - den) / dmin**2, 1.0 / np.where(small, 1.0, den))
            slope = np.where(small, 1.0 / dmin**2, q1 * q1)  # -dq1/dden
        else:
            q1 = 1.0 / den
            slope = q1 * q1
        qb = q1
        dqb_bc = slope * p.inv_early if has_va else None
        dqb_be = slope * p.inv_reverse_early if has_vb else None
    if has_kf or has_kr:
        q2 = i_f * p.inv_knee if has_kf else 0.0
        if has_kr:
            q2 = q2 + i_r * p.inv_reverse_knee
        s = np.sqrt(1.0 + 4.0 * q2)
        half = 0.5 + 0.5 * s
        w = 1.0 / s if qb is None else qb / s  # q1 d(half)/dq2
        kb_e = w * (gf * p.inv_knee) if has_kf else None
        kb_c = w * (gr * p.inv_reverse_knee) if has_kr else None
        if qb is None:
            qb, dqb_be, dqb_bc = half, kb_e, kb_c
        else:
            dqb_be = _add(None if dqb_be is None else dqb_be * half, kb_e)
            dqb_bc = _add(None if dqb_bc is None else dqb_bc * half, kb_c)
            qb = qb * half

    if qb is None:
        ict = i_f - i_r
        dict_be = gf
        dict_bc = -gr
    else:
        inv_qb = 1.0 / qb
        ict = (i_f - i_r) * inv_qb
        dict_be = gf * inv_qb if dqb_be is None else (gf - ict * dqb_be) * inv_qb
        dict_bc = -gr * inv_qb if dqb_bc is None else (-gr - ict * dqb_bc) * inv_qb

    ibe = i_f * p.inv_forward_beta
    dibe = gf * p.inv_forward_beta
    if not _is_zero(p.be_leakage_current):
        el, del_ = _exp_lin(vbe * p.inv_be_leakage_nvt)
        ibe = ibe + p.be_leakage_current * (el - 1.0)
        dibe = dibe + p.be_leakage_current * del_ * p.inv_be_leakage_nvt
    ibc = i_r * p.inv_reverse_beta
    dibc = gr * p.inv_reverse_beta
    if not _is_zero(p.bc_leakage_current):
        el, del_ = _exp_lin(vbc * p.inv_bc_leakage_nvt)
        ibc = ibc + p.bc_leakage_current * (el - 1.0)
        dibc = dibc + p.bc_leakage_current * del_ * p.inv_bc_leakage_nvt

    ic = ict - ibc
    ib = ibe + ibc
    dic_be = dict_be
    dic_bc = dict_bc - dibc
    dib_be = dibe
    dib_bc = dibc
    if not _is_zero(p.cbo_leakage):
        # generation current from collector to base, a = V_CB / V_T = -V_BC / V_T:
        # I_CBO tanh(a/2) under reverse bias, I_CBO r (exp(a / 2r) - 1) under forward bias
        # (r = _FORWARD_LEAKAGE_REMAINDER); both from one exponential of z <= 0
        a = vbc * (-2.0 * p.inv_two_vt)
        rev = a >= 0.0
        e = np.exp(np.where(rev, -a, a * (0.5 / _FORWARD_LEAKAGE_REMAINDER)))
        t = (1.0 - e) / (1.0 + e)  # tanh(a/2) where rev
        gen = p.cbo_leakage * np.where(rev, t, _FORWARD_LEAKAGE_REMAINDER * (e - 1.0))
        dgen_bc = (p.cbo_leakage * p.inv_two_vt) * np.where(rev, t * t - 1.0, -e)
        ic = ic + gen
        ib = ib - gen
        dic_bc = dic_bc + dgen_bc
        dib_bc = dib_bc - dgen_bc
    if pol == -1:
        ic = -ic
        ib = -ib
    return JunctionCurrents(ic, ib, dic_be, dic_bc, dib_be, dib_bc,
                            Transport(i_f, gf, i_r, gr, qb, dqb_be, dqb_bc))


@dataclass(frozen=True)
class TerminalOffsets:
    """External base and collector voltages relative to the external emitter [V], with their
    derivatives with respect to the intrinsic junction voltages [1]."""

    base: np.ndarray
    collector: np.ndarray
    dbase_dvbe: np.ndarray
    dbase_dvbc: np.ndarray
    dcollector_dvbe: np.ndarray
    dcollector_dvbc: np.ndarray


def terminal_offsets(p: ScaledTransistor, v_be, v_bc, c: JunctionCurrents) -> TerminalOffsets:
    """Terminal voltages relative to the external emitter through the series resistances.

    Parameters
    ----------
    p : ScaledTransistor
        Parameters (the series resistances are used).
    v_be, v_bc : ndarray
        Intrinsic junction voltages [V].
    c : JunctionCurrents
        The currents at these voltages (:func:`junction_currents`).

    Returns
    -------
    TerminalOffsets
        ``V_B - V_E = v_be + I_B r_B + (I_B + I_C) r_E`` and
        ``V_C - V_E = v_be - v_bc + I_C r_C + (I_B + I_C) r_E`` [V] and their derivatives.

    Notes
    -----
    Kirchhoff's voltage law around the series resistances; the currents are those into the
    collector and base terminals, so the emitter carries their sum outwards.
    """
    rb, rc, re = p.base_resistance, p.collector_resistance, p.emitter_resistance
    vb = v_be
    vc = v_be - v_bc
    one = np.ones_like(np.asarray(v_be, dtype=float))
    dvb_be, dvb_bc = one, 0.0 * one
    dvc_be, dvc_bc = one, -one
    if not _is_zero(rb):
        vb = vb + c.base * rb
        dvb_be = dvb_be + c.dbase_dvbe * rb
        dvb_bc = dvb_bc + c.dbase_dvbc * rb
    if not _is_zero(rc):
        vc = vc + c.collector * rc
        dvc_be = dvc_be + c.dcollector_dvbe * rc
        dvc_bc = dvc_bc + c.dcollector_dvbc * rc
    if not _is_zero(re):
        ie = c.collector + c.base
        die_be = c.dcollector_dvbe + c.dbase_dvbe
        die_bc = c.dcollector_dvbc + c.dbase_dvbc
        vb = vb + ie * re
        vc = vc + ie * re
        dvb_be = dvb_be + die_be * re
        dvb_bc = dvb_bc + die_bc * re
        dvc_be = dvc_be + die_be * re
        dvc_bc = dvc_bc + die_bc * re
    return TerminalOffsets(vb, vc, dvb_be, dvb_bc, dvc_be, dvc_bc)


def critical_voltage(saturation_current, emission_vt):
    """Critical voltage of an exponential junction [V].

    Above ``V_crit = n V_T ln(n V_T / (sqrt(2) I_S))`` the diode current's curvature makes a
    plain Newton step overshoot; :func:`limit_junction_step` limits steps that end above it.
    The 1 A / 1 V scaling of the argument is the usual choice (from memory).
    """
    return emission_vt * np.log(emission_vt / (np.sqrt(2.0) * saturation_current))


def limit_junction_step(v_new, v_old, emission_vt, v_crit):
    """Limit a Newton update of a forward-biased exponential junction.

    Parameters
    ----------
    v_new : ndarray
        Proposed junction voltage (forward bias positive) [V].
    v_old : ndarray
        Junction voltage of the previous iterate [V].
    emission_vt : ndarray
        Emission coefficient times thermal voltage [V].
    v_crit : ndarray
        Critical voltage (:func:`critical_voltage`) [V].

    Returns
    -------
    ndarray
        The limited junction voltage [V].

    Notes
    -----
    A step that ends above ``v_crit`` and is larger than two ``n V_T`` is replaced by the step
    that changes the junction *current* of the linearised diode by the same amount the full step
    proposed: ``v_old + n V_T ln(1 + (v_new - v_old) / (n V_T))`` when the old point is
    forward-biased, or ``n V_T ln(v_new / n V_T)`` when it was not (the classical logarithmic
    limiting of circuit simulation, from memory). Steps downwards and small steps pass unchanged,
    so the limit never moves a converged iterate.
    """
    v_new = np.asarray(v_new, dtype=float)
    v_old = np.asarray(v_old, dtype=float)
    step = v_new - v_old
    need = (v_new > v_crit) & (step > 2.0 * emission_vt)
    if not (need.any() if isinstance(need, np.ndarray) else need):
        return v_new
    with np.errstate(divide="ignore", invalid="ignore"):
        arg = 1.0 + step / emission_vt
        from_forward = v_old + emission_vt * np.log(arg)
        from_reverse = emission_vt * np.log(np.maximum(v_new / emission_vt, 1.0))
    limited = np.where(v_old > 0.0, from_forward, from_reverse)
    return np.where(need, limited, v_new)
