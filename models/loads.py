"""Loads a low-side switch drives: resistor, tungsten lamp, relay or valve coil, LED string.

A study's ``[load]`` table names the ``kind`` and that kind's values; :func:`read_load` reads
them through the study :class:`~tolerance.study.Reader` (registering the toleranced ones as
sampled parameters named ``load.<key>``) and returns a :class:`LoadSpec`. For a chunk of samples
:meth:`LoadSpec.at` gives a :class:`LoadState`, whose :meth:`LoadState.current` is the static
current-voltage law the stage's Newton solver uses, and whose :meth:`LoadState.metrics` turns
the solved on-state into the load's own metrics.

Sign convention: ``v`` is the voltage across the load, supply minus collector [V]; the current
``i`` flows from the supply through the load into the switch [A]. Every law is odd or at least
defined for all real ``v`` (the solver tries voltages below zero and above the supply), smooth
(continuous first derivative) and strictly increasing.

=================  ============================  ======================================
Symbol             Name in the code              Meaning
=================  ============================  ======================================
R, R_20            ``resistance``                resistance (coil: at 20 degC) [ohm]
alpha              ``tempco``                    temperature coefficient of R [1/K]
V_r, P_r, I_r      ``rated_voltage`` ...         lamp rating, I_r = P_r / V_r
p                  ``exponent``                  lamp law I ~ V^p (hot filament)
k_c                ``cold_ratio``                hot (rated) / cold filament resistance
V_op               ``must_operate_voltage``      coil pull-in voltage at 20 degC [V]
L                  ``inductance``                coil inductance [H]
m                  ``count``                     LEDs in series
V_F, I_F           ``forward_voltage``,          one LED's forward voltage at its test
                   ``test_current``              current, at 25 degC [V], [A]
n                  ``ideality``                  LED ideality factor
R_S                ``series_resistance``         the string's current-setting resistor [ohm]
=================  ============================  ======================================
"""

from __future__ import annotations

import abc
import copy
import difflib
import functools
import math
import tomllib
from importlib import resources

import numpy as np

from tolerance.models.thermal import RESISTOR_TIME_CONSTANT
from tolerance.protocol import Criterion, MetricInfo
from tolerance.study import Reader, StudyError
from tolerance.units import UnitError, format_quantity, parse_quantity

__all__ = [
    "COPPER_TEMPCO",
    "KINDS",
    "CoilLoad",
    "CoilState",
    "LampLoad",
    "LampState",
    "LedLoad",
    "LedState",
    "LoadSpec",
    "LoadState",
    "ResistorLoad",
    "ResistorState",
    "read_load",
    "wright_omega",
]

KINDS = ("resistor", "lamp", "coil", "led")

#: Temperature coefficient of annealed copper at 20 degC [1/K] (IEC 60028).
COPPER_TEMPCO = 0.00393
#: Reference temperature of the copper coefficient and of a coil's resistance, 20 degC [K].
COPPER_REFERENCE = 293.15
#: Reference temperature of resistor, lamp and LED data, 25 degC [K].
ROOM = 298.15
#: Temperature coefficient of tungsten near room temperature [1/K] (about 0.0045; from memory).
TUNGSTEN_TEMPCO = 4.5e-3
#: Boltzmann constant over elementary charge [V/K] (exact since the 2019 SI redefinition).
BOLTZMANN_OVER_CHARGE = 1.380649e-23 / 1.602176634e-19
#: Half-width of the cold/hot blend of the lamp law in ln(V): a factor of two either side.
LAMP_BLEND_HALF_WIDTH = math.log(2.0)
#: Conductance in parallel with an LED string [S]. It keeps the law strictly increasing in
#: floating point when the diodes are reverse biased (their current saturates at -I_s); at
#: 1 pA per volt it is far below any leakage the stage reports.
LED_SHUNT_CONDUCTANCE = 1e-12


def _arr(x) -> np.ndarray:
    return np.asarray(x, dtype=float)


def wright_omega(y) -> np.ndarray:
    """Wright omega function of real ``y``: the solution ``w > 0`` of ``w + ln w = y``.

    Parameters
    ----------
    y : array_like
        Real arguments.

    Returns
    -------
    ndarray
        omega(y) (``exp(y)`` where that underflows to zero).

    Notes
    -----
    Starting values by region (Lawrence, Corless & Jeffrey, "Algorithm 917: complex double-
    precision evaluation of the Wright omega function," ACM TOMS 38, 2012): ``exp(y)`` below
    -2, their series about y = 1 from -2 to 1, and the asymptotic series
    ``y - ln y + ln y / y + ln y (ln y - 2) / (2 y^2)`` above; then two steps of the fourth-
    order iteration of Fritsch, Shafer & Crowley (Comm. ACM 16, 1973) used there:
    ``r = y - w - ln w``, ``q = 2 (1 + w)(1 + w + 2 r / 3)``,
    ``w <- w (1 + r / (1 + w) (q - r) / (q - 2 r))``.
    Every operation is a plain numpy ufunc: about 15 ns per element against 69 ns for
    ``scipy.special.wrightomega`` on this project's machine (measured on 50,000 arguments);
    the two agree to 4e-15 relative for y > -700 (tested).
    """
    y = np.asarray(y, dtype=float)
    high = y >= 1.0
    low = y < -2.0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        ly = np.log(np.where(high, y, 1.0))
        d = y - 1.0
        w = np.where(high, y - ly + ly / y + ly * (ly - 2.0) / (2.0 * y * y),
                     np.where(low, np.exp(y),
                              1.0 + d * (0.5 + d * (1.0 / 16.0 + d * (-1.0 / 192.0 + d * (
                                  -1.0 / 3072.0 + d * (13.0 / 61440.0)))))))
        for _ in range(2):
            r = y - w - np.log(w)
            wp1 = 1.0 + w
            q = 2.0 * wp1 * (wp1 + (2.0 / 3.0) * r)
            w_next = w * (1.0 + r / wp1 * (q - r) / (q - 2.0 * r))
            # an underflowed start (w = 0) stays at exp(y)
            w = np.where(w > 0.0, w_next, w)
    return w


# ---------------------------------------------------------------------------------------------
# Load states: the laws for one chunk of samples
# ---------------------------------------------------------------------------------------------


class LoadState(abc.ABC):
    """A load evaluated for one chunk of samples (all per-sample figures are arrays).

    Subclasses implement :meth:`current` and :meth:`metrics`; every array attribute has one
    entry per sample, so :meth:`take` can select a subset for a solver's active set.
    """

    kind = "abstract"

    def __init__(self, supply_voltage: np.ndarray, temperature: np.ndarray):
        self.supply_voltage = supply_voltage
        self.temperature = temperature

    @abc.abstractmethod
    def current(self, v):
        """Load current and its derivative, ``(i [A], di_dv [S])``, at load voltage ``v`` [V].

        Vectorized over samples (``v`` broadcasts against the per-sample arrays), C1, strictly
        increasing and finite for every real ``v``.
        """

    def metrics(self, v_on, i_on) -> dict[str, np.ndarray]:
        """Load-specific metrics at the solved on-state (none for the base class)."""
        return {}

    def voltage_guess(self, current) -> np.ndarray:
        """Load voltage at which the load carries ``current`` [A] (a starting point for the
        solvers, exact or close) [V]."""
        i = _arr(current)
        g = self.current(np.zeros_like(i))[1]
        return i / g

    def demand(self, supply_voltage, vce) -> np.ndarray:
        """Current the load draws when the switch sits at ``vce`` [V] from ``supply_voltage`` [V].

        Returns
        -------
        ndarray
            ``current(supply_voltage - vce)`` [A].
        """
        return self.current(_arr(supply_voltage) - _arr(vce))[0]

    def take(self, index) -> "LoadState":
        """The same state restricted to the samples selected by ``index`` (mask or indices)."""
        out = copy.copy(self)
        n = np.shape(self.supply_voltage)
        for name, value in vars(self).items():
            if isinstance(value, np.ndarray) and value.ndim >= 1 and value.shape == n:
                setattr(out, name, value[index])
        return out


class ResistorState(LoadState):
    """Resistor at the sample's temperature: R(T) = R (1 + alpha (T - 298.15 K)).

    Attributes
    ----------
    resistance : ndarray
        Resistance at the sample's temperature [ohm]; NaN where the linear tempco law would
        give zero or less (a temperature far outside the law's range).
    power_rating : float or None
        Rated dissipation [W], for the thermal work.
    """

    kind = "resistor"

    def __init__(self, supply_voltage, temperature, resistance, power_rating):
        super().__init__(supply_voltage, temperature)
        self.resistance = resistance
        self.power_rating = power_rating

    def current(self, v):
        """Ohm's law, ``i = v / R(T)`` [A] and ``di/dv = 1 / R(T)`` [S]."""
        g = 1.0 / self.resistance
        v = _arr(v)
        return v * g, np.broadcast_to(g, np.broadcast(v, g).shape).copy()

    def voltage_guess(self, current):
        """``i R(T_a)`` [V] (exact)."""
        return _arr(current) * self.resistance

    def metrics(self, v_on, i_on):
        """``load_power`` [W]: ``v i`` in the on-state (with a PWM drive the stage's
        evaluation replaces it by the period's average, what the rating is about)."""
        return {"load_power": _arr(v_on) * _arr(i_on)}


class LampState(LoadState):
    """Tungsten filament lamp, steady-state (thermal equilibrium) current-voltage law.

    Attributes
    ----------
    rated_voltage, rated_power, rated_current : ndarray
        The rating [V], [W] and I_r = P_r / V_r [A].
    hot_resistance : ndarray
        Resistance at the rated point, V_r^2 / P_r [ohm].
    cold_resistance : ndarray
        Resistance of the unlit filament at the sample's temperature [ohm].
    crossover_voltage : ndarray
        Voltage where the hot law meets the cold resistance [V].
    exponent : float
        p of I ~ V^p.
    thermal_time_constant : float
        Time constant of the filament's heating [s], for the transient work.

    Notes
    -----
    Hot law (lamp rerating relations, common engineering knowledge; see REFERENCES.md
    "Loads and materials"): I = I_r (V / V_r)^p, i.e. R_hot(V) = R_r (V / V_r)^(1-p).
    Below a small voltage the filament stays at ambient temperature and its resistance is
    R_c = R_r / k_c (1 + alpha_W (T - 298.15 K)), with alpha_W about 0.0045 /K for tungsten
    (from memory). Resistance never falls below the cold value, so the law is
    R = max(R_c, R_hot(V)), which the two pieces reach at the crossover
    V_x = V_r (R_c / R_r)^(1 / (1 - p)).

    The blend: with u = ln(|V| / V_x) and h = ln 2,

        ln R = ln R_c + (1 - p) f(u),
        f(u) = 0 (u <= -h),  (u + h)^2 / (4 h) (|u| < h),  u (u >= h),

    a quadratic join of the two straight lines of ln R over ln V. f and f' are continuous, so
    the law is C1; d ln I / d ln V = 1 - (1 - p) f'(u) lies between p and 1, so it is strictly
    increasing. The hot law holds exactly above 2 V_x and the cold resistance exactly below
    V_x / 2; with k_c >= 5 the rated point lies well above 2 V_x. The law is odd in V.
    """

    kind = "lamp"

    def __init__(self, supply_voltage, temperature, rated_voltage, rated_power, cold_ratio,
                 exponent, thermal_time_constant, cold_tempco):
        super().__init__(supply_voltage, temperature)
        self.rated_voltage = rated_voltage
        self.rated_power = rated_power
        self.rated_current = rated_power / rated_voltage
        self.hot_resistance = rated_voltage**2 / rated_power
        self.cold_ratio = cold_ratio
        self.exponent = exponent
        self.thermal_time_constant = thermal_time_constant
        warm = 1.0 + cold_tempco * (temperature - ROOM)
        self.cold_resistance = np.where(warm > 0, self.hot_resistance / cold_ratio * warm, np.nan)
        # V_x = V_r (R_c / R_r)^(1/(1-p))
        self.crossover_voltage = rated_voltage * (self.cold_resistance / self.hot_resistance) ** (
            1.0 / (1.0 - exponent)
        )

    def current(self, v):
        """Filament current and derivative ``(i [A], di_dv [S])`` at lamp voltage ``v`` [V]."""
        v = _arr(v)
        a = np.abs(v)
        h = LAMP_BLEND_HALF_WIDTH
        vx = self.crossover_voltage
        # below V_x e^-h the clip keeps u <= ln(1/4) < -h (cold region) and avoids log(0)
        u = np.log(np.maximum(a, 0.25 * vx) / vx)
        f = np.where(u >= h, u, np.where(u <= -h, 0.0, (u + h) ** 2 / (4.0 * h)))
        fp = np.where(u >= h, 1.0, np.where(u <= -h, 0.0, (u + h) / (2.0 * h)))
        slope = 1.0 - self.exponent
        conductance = np.exp(-slope * f) / self.cold_resistance  # 1/R
        i = v * conductance
        di = conductance * (1.0 - slope * fp)
        return i, di

    def voltage_guess(self, current):
        """The cold resistance's voltage or the hot law's, whichever is larger [V] (exact away
        from the blend near the crossover)."""
        i = _arr(current)
        cold = i * self.cold_resistance
        hot = np.sign(i) * self.rated_voltage * (np.abs(i) / self.rated_current) ** (
            1.0 / self.exponent)
        return np.where(np.abs(hot) > np.abs(cold), hot, cold)

    def inrush_demand(self, supply_voltage) -> np.ndarray:
        """Current of the cold filament at switch-on, ``V_supply / R_cold`` [A]."""
        return _arr(supply_voltage) / self.cold_resistance

    def metrics(self, v_on, i_on):
        """``inrush_current`` [A] and ``lamp_power`` (hot, at the on-state) [W]."""
        return {
            "inrush_current": self.inrush_demand(self.supply_voltage),
            "lamp_power": _arr(v_on) * _arr(i_on),
        }


class CoilState(LoadState):
    """Relay or solenoid-valve coil: copper winding, inductance, turn-off clamp.

    Attributes
    ----------
    resistance_20 : ndarray
        Winding resistance at 20 degC [ohm].
    coil_temperature : ndarray
        Winding temperature after a long on-time, ambient plus the stated rise [K].
    resistance : ndarray
        Winding resistance at the ambient [ohm]: the cold winding a unit switches on, which
        carries the most current. The transistor's on-state, the drive it needs, its
        dissipation, the clamp's energy and the release time are judged on it.
    hot_resistance : ndarray
        Winding resistance at the coil temperature [ohm], for the pull-in check.
    inductance : ndarray
        [H].
    operate_voltage : ndarray
        Must-operate voltage of the hot coil [V] (a unit switched on again while its winding
        is still hot: the worst case for pull-in).
    clamp : str
        ``diode``, ``zener`` or ``none``.
    clamp_forward_voltage : float
        Forward voltage of the clamp diode [V] (NaN without a clamp).
    clamp_voltage : ndarray
        Reverse voltage across the coil while the clamp conducts at turn-off [V]: the diode's
        forward voltage, the zener voltage plus the series diode's, or infinity without a
        clamp (the switch's breakdown then sets it).
    time_constant : ndarray
        L / R of the cold coil [s].

    Notes
    -----
    R(T) = R_20 (1 + 0.00393 /K (T - 293.15 K)), the copper coefficient of IEC 60028 at
    20 degC. Each check takes the winding at its own worst temperature (common practice, no
    source): pull-in the hot one (the most resistance for the ampere-turns), everything the
    transistor and the clamp see the cold one (a 30 K rise takes 11 % off the current, and
    the stage switches the cold winding on). Pull-in is set by ampere-turns, i.e. by the coil current, so the voltage needed
    grows with the resistance: V_op(T) = V_op,20 R(T) / R_20 (common practice, relay data
    sheets state the must-operate voltage at 20 degC). The zener clamp is the usual
    fast-release arrangement of a zener in series with a diode across the coil (common
    practice, no source).
    """

    kind = "coil"

    def __init__(self, supply_voltage, temperature, resistance, inductance,
                 must_operate_voltage, temperature_rise, clamp, clamp_forward_voltage,
                 zener_voltage):
        super().__init__(supply_voltage, temperature)
        self.resistance_20 = resistance
        self.coil_temperature = temperature + temperature_rise

        def copper(t):  # IEC 60028
            factor = 1.0 + COPPER_TEMPCO * (t - COPPER_REFERENCE)
            return np.where(factor > 0, factor, np.nan)

        hot = copper(self.coil_temperature)
        self.resistance = resistance * copper(temperature)
        self.hot_resistance = resistance * hot
        self.inductance = inductance
        self.operate_voltage = must_operate_voltage * hot  # V_op(T) = V_op20 R(T)/R20
        self.operate_voltage_20 = must_operate_voltage
        self.clamp = clamp
        self.clamp_forward_voltage = clamp_forward_voltage
        if clamp == "diode":
            self.clamp_voltage = np.full(np.shape(self.resistance), clamp_forward_voltage)
        elif clamp == "zener":
            self.clamp_voltage = zener_voltage + clamp_forward_voltage
        else:
            self.clamp_voltage = np.full(np.shape(self.resistance), np.inf)
        self.time_constant = inductance / self.resistance

    def current(self, v):
        """Ohm's law of the cold winding, ``(v / R(T_a) [A], 1 / R(T_a) [S])``."""
        g = 1.0 / self.resistance
        v = _arr(v)
        return v * g, np.broadcast_to(g, np.broadcast(v, g).shape).copy()

    def voltage_guess(self, current):
        """``i R(T)`` [V] (exact)."""
        return _arr(current) * self.resistance

    def stored_energy(self, current) -> np.ndarray:
        """Magnetic energy ``0.5 L I^2`` [J] at coil current ``current`` [A]."""
        return 0.5 * self.inductance * _arr(current) ** 2

    def decay_time(self, current, fraction: float, reverse_voltage=None) -> np.ndarray:
        """Time for the winding's current to fall from ``current`` [A] to ``fraction`` of it
        once the switch is off, the coil held at the clamp's reverse voltage [s].

        ``L di/dt = -(R i + V_c)`` gives ``i(t) = (i_0 + V_c/R) exp(-t/tau) - V_c/R`` with
        ``tau = L/R`` (first-order circuit, any circuits textbook), so the time to
        ``f i_0`` is ``tau ln((i_0 + V_c/R) / (f i_0 + V_c/R))``. ``reverse_voltage``
        replaces the clamp's (the switch's breakdown less the supply without a clamp).
        """
        vc = self.clamp_voltage if reverse_voltage is None else _arr(reverse_voltage)
        i0 = np.abs(_arr(current))
        hold = vc / self.resistance
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.time_constant * np.log((i0 + hold) / (fraction * i0 + hold))

    @property
    def operate_current(self) -> np.ndarray:
        """Must-operate current, ``V_op(T) / R(T)`` of the hot winding = ``V_op,20 / R_20``
        [A]: pull-in is set by ampere-turns."""
        return self.operate_voltage / self.hot_resistance

    def pwm_currents(self, coil_voltage, frequency: float, duty: float,
                     reverse_voltage=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The hot winding's current in the periodic steady state of a PWM drive: its lowest
        value (where the switch turns on; zero where it dies out within the off-time), its
        highest (where the switch turns off) and its mean over the on-time [A].

        First-order circuit (any circuits textbook), tau = L / R of the hot winding: over the
        on-time ``t_on = D / f`` the current tends to ``I_on = coil_voltage / R`` from
        ``I_lo``, over the off-time ``t_off`` it decays through the clamp towards
        ``-H = -V_c / R`` and stops at zero. With ``a = exp(-t_on/tau)``,
        ``b = exp(-t_off/tau)``, a current that never stops has
        ``I_hi = (I_on (1 - a) - a H (1 - b)) / (1 - a b)`` and ``I_lo = (I_hi + H) b - H``;
        where that ``I_lo`` is not above zero the current stops in every off-time:
        ``I_lo = 0``, ``I_hi = I_on (1 - a)``. The on-time's mean is
        ``I_on - (I_on - I_lo) tau (1 - a) / t_on``. ``reverse_voltage`` replaces the
        clamp's as in :meth:`decay_time`. ``coil_voltage`` is the on-state's (the cold
        winding's current, so the switch's voltage is its largest: the safe side)."""
        r = self.hot_resistance
        tau = self.inductance / r
        i_on = _arr(coil_voltage) / r
        vc = self.clamp_voltage if reverse_voltage is None else _arr(reverse_voltage)
        hold = _arr(vc) / r
        t_on = duty / frequency
        t_off = (1.0 - duty) / frequency
        # 1 - a, 1 - b and 1 - a b by expm1: a period far below L/R keeps its digits
        rise, fall = -np.expm1(-t_on / tau), -np.expm1(-t_off / tau)
        whole = -np.expm1(-(t_on + t_off) / tau)
        b = 1.0 - fall
        with np.errstate(invalid="ignore", over="ignore"):
            # an infinite hold (the switch's breakdown far above the supply): the current
            # stops at once
            gone = np.where(np.isfinite(hold), (1.0 - rise) * hold * fall, np.inf)
            high = (i_on * rise - gone) / whole
            low = np.where(np.isfinite(hold), high * b - hold * fall, -np.inf)
        stops = ~(low > 0)
        low = np.where(stops, 0.0, low)
        high = np.where(stops, i_on * rise, high)
        mean = i_on - (i_on - low) * tau * rise / t_on
        return low, high, mean

    def turn_off_peak_voltage(self, supply_voltage) -> np.ndarray:
        """Switch voltage while the clamp conducts, ``V_supply + V_clamp`` [V] (inf: no clamp)."""
        return _arr(supply_voltage) + self.clamp_voltage

    def metrics(self, v_on, i_on):
        """``coil_voltage`` [V], ``coil_current`` [A] (the cold winding's), ``operate_margin``
        = V / V_op(T) [1] with V_op of the hot winding (the on-state voltage is the cold
        winding's, a few millivolts lower than the hot one's: the safe side)."""
        v_on = _arr(v_on)
        return {
            "coil_voltage": v_on,
            "coil_current": _arr(i_on),
            "operate_margin": v_on / self.operate_voltage,
        }


class LedState(LoadState):
    """A string of ``count`` LEDs in series with its current-setting resistor.

    Attributes
    ----------
    count : int
        LEDs in series, m.
    forward_voltage : ndarray
        One LED's forward voltage at the test current and the sample's temperature [V].
    saturation_current : ndarray
        I_s of one LED at the sample's temperature [A].
    series_resistance : ndarray
        [ohm].
    thermal_voltage : ndarray
        kT/q at the sample's temperature [V].

    Notes
    -----
    Each LED is the exponential diode of the Shockley equation (any semiconductor textbook,
    e.g. Neamen) I = I_s (exp(V_d / (n V_T)) - 1), fitted through its datasheet point:
    V_F(T) = V_F + (dV_F/dT)(T - 298.15 K) and I_s = I_F / expm1(V_F(T) / (n V_T)). With
    a = m n V_T the string obeys v = a ln(1 + i / I_s) + i R_S, whose inverse is

        i = (a / R_S) omega(y) - I_s,   y = ln(I_s R_S / a) + (v + I_s R_S) / a,

    with omega the Wright omega function, omega + ln omega = y, i.e. omega(y) = W(e^y) with
    W the Lambert W function (Corless et al., "On the Lambert W function," Adv. Comput.
    Math. 5, 1996), evaluated by :func:`wright_omega` without overflow for large v.
    Since d omega / dy = omega / (1 + omega), di/dv = omega / (R_S (1 + omega)) > 0: the law
    is analytic and increasing; for very negative v it tends to -I_s, about zero. A shunt of
    ``LED_SHUNT_CONDUCTANCE`` across the whole load keeps the derivative above zero in floating
    point. The LEDs are taken at the sample's temperature (no self-heating).
    """

    kind = "led"

    def __init__(self, supply_voltage, temperature, count, forward_voltage, test_current,
                 ideality, forward_voltage_tempco, series_resistance):
        super().__init__(supply_voltage, temperature)
        self.count = count
        self.ideality = ideality
        self.test_current = test_current
        self.series_resistance = series_resistance
        self.thermal_voltage = BOLTZMANN_OVER_CHARGE * temperature
        self.forward_voltage = forward_voltage + forward_voltage_tempco * (temperature - ROOM)
        x = self.forward_voltage / (ideality * self.thermal_voltage)
        with np.errstate(invalid="ignore", divide="ignore"):
            # ln I_s = ln I_F - ln(expm1(x)), written stably for the large x of real LEDs
            log_is = np.where(x > 0, math.log(test_current) - x - np.log(-np.expm1(-x)), np.nan)
        self.log_saturation_current = log_is
        self.saturation_current = np.exp(log_is)
        self.string_scale = count * ideality * self.thermal_voltage  # a = m n V_T

    def current(self, v):
        """String current and derivative ``(i [A], di_dv [S])`` at load voltage ``v`` [V]."""
        v = _arr(v)
        a = self.string_scale
        r = self.series_resistance
        i_s = self.saturation_current
        y = self.log_saturation_current + np.log(r / a) + (v + i_s * r) / a
        omega = wright_omega(y)
        i = (a / r) * omega - i_s + LED_SHUNT_CONDUCTANCE * v
        di = omega / (r * (1.0 + omega)) + LED_SHUNT_CONDUCTANCE
        return i, di

    def voltage_guess(self, current):
        """The string law ``m n V_T ln(1 + i / I_s) + i R_S`` for ``i > 0`` (the shunt is
        neglected), zero for ``i <= 0`` [V]."""
        i = np.maximum(_arr(current), 0.0)
        # ln(1 + i / I_s) = logaddexp(0, ln i - ln I_s), free of overflow
        log_ratio = np.logaddexp(0.0, np.log(np.maximum(i, 1e-300)) - self.log_saturation_current)
        return self.string_scale * log_ratio + i * self.series_resistance

    def metrics(self, v_on, i_on):
        """``led_current`` [A] (through the LEDs) and ``led_voltage`` (string) [V]."""
        v_on = _arr(v_on)
        i_led = _arr(i_on) - LED_SHUNT_CONDUCTANCE * v_on
        return {"led_current": i_led, "led_voltage": v_on - i_led * self.series_resistance}


# ---------------------------------------------------------------------------------------------
# Load specifications: what the study file says
# ---------------------------------------------------------------------------------------------


class LoadSpec(abc.ABC):
    """A load as configured from a study: fixed settings and the names of its parameters.

    Attributes
    ----------
    kind : str
        One of :data:`KINDS`.
    metrics : dict[str, MetricInfo]
        The load's own metrics (the stage adds its own).
    criteria : list[Criterion]
        Default criteria the load contributes (``source="stage"``).
    parameters : tuple[str, ...]
        Names of the sampled parameters the load registered.
    """

    kind = "abstract"
    METRICS: dict[str, MetricInfo] = {}

    def __init__(self, parameters: tuple[str, ...]):
        self.parameters = tuple(parameters)
        self.metrics: dict[str, MetricInfo] = dict(type(self).METRICS)
        self.criteria: list[Criterion] = []
        #: the library part the load was taken from (``[load] part``), or None
        self.part: str | None = None
        #: the load's fixed figures for the report: ``{"figure", "value", "from"}`` rows
        #: (:func:`read_load`; the sampled ones are in the parameter table)
        self.figures: list[dict] = []

    def assumed(self) -> dict:
        """What the report's "Load assumed" table shows: kind, part and fixed figures."""
        return {"kind": self.kind, "part": self.part, "figures": list(self.figures)}

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.parameters})"

    @staticmethod
    def _inputs(samples, temperature, supply_voltage, names):
        arrays = np.broadcast_arrays(_arr(temperature), _arr(supply_voltage),
                                     *[_arr(samples[name]) for name in names])
        return [np.array(a, dtype=float) for a in arrays]

    def fixed_figures(self) -> list[tuple]:
        """The load's fixed settings as (key, value, unit) (unit None: shown as it is)."""
        return []

    @abc.abstractmethod
    def at(self, samples: dict[str, np.ndarray], temperature, supply_voltage) -> LoadState:
        """The load for a chunk of samples.

        Parameters
        ----------
        samples : dict[str, ndarray]
            Sampled parameters by name (SI units); must hold every name in ``parameters``.
        temperature : ndarray
            Ambient temperature of the load [K].
        supply_voltage : ndarray
            Supply voltage [V].

        Returns
        -------
        LoadState
        """


class ResistorLoad(LoadSpec):
    """A resistor (heater, or any resistive load), see :class:`ResistorState`."""

    kind = "resistor"
    METRICS = {"load_power": MetricInfo("W", "dissipation of the resistive load in the "
                                             "on-state, averaged over the period with a "
                                             "PWM drive")}

    def __init__(self, parameters, tempco: float, power_rating: float | None,
                 thermal_time_constant: float = RESISTOR_TIME_CONSTANT):
        super().__init__(parameters)
        self.tempco = tempco
        self.power_rating = power_rating
        #: the load's own thermal time constant [s]: under a PWM drive the rating is judged
        #: on the peak of its temperature in the cycle (stages.evaluation)
        self.thermal_time_constant = thermal_time_constant
        if power_rating is not None:
            # the key was read and then used by nothing: a heater above its rating passed
            self.criteria = [Criterion("load_rating", "load_power", maximum=power_rating,
                                       source="rating",
                                       description="load within its power rating")]

    def fixed_figures(self):
        out = [("tempco", self.tempco, "1/K")]
        if self.power_rating is not None:
            out.append(("power_rating", self.power_rating, "W"))
        return out + [("thermal_time_constant", self.thermal_time_constant, "s")]

    def at(self, samples, temperature, supply_voltage):
        t, vs, r = self._inputs(samples, temperature, supply_voltage, ["load.resistance"])
        factor = 1.0 + self.tempco * (t - ROOM)
        resistance = np.where(factor > 0, r * factor, np.nan)
        return ResistorState(vs, t, resistance, self.power_rating)


class LampLoad(LoadSpec):
    """A tungsten filament lamp, see :class:`LampState`."""

    kind = "lamp"
    METRICS = {
        "inrush_current": MetricInfo("A", "lamp current at switch-on with the cold filament "
                                          "(supply / cold resistance)"),
        "lamp_power": MetricInfo("W", "lamp power in the on-state (hot filament)"),
    }

    def __init__(self, parameters, exponent: float, thermal_time_constant: float,
                 cold_tempco: float):
        super().__init__(parameters)
        self.exponent = exponent
        self.thermal_time_constant = thermal_time_constant
        self.cold_tempco = cold_tempco

    def fixed_figures(self):
        return [("exponent", self.exponent, "1"),
                ("thermal_time_constant", self.thermal_time_constant, "s"),
                ("cold_tempco", self.cold_tempco, "1/K")]

    def at(self, samples, temperature, supply_voltage):
        t, vs, vr, pr, kc = self._inputs(
            samples, temperature, supply_voltage,
            ["load.rated_voltage", "load.rated_power", "load.cold_ratio"])
        return LampState(vs, t, vr, pr, kc, self.exponent, self.thermal_time_constant,
                         self.cold_tempco)


class CoilLoad(LoadSpec):
    """A relay or solenoid-valve coil, see :class:`CoilState`."""

    kind = "coil"
    METRICS = {
        "coil_voltage": MetricInfo("V", "voltage across the coil in the on-state"),
        "coil_current": MetricInfo("A", "coil current in the static on-state, cold winding "
                                        "(on a PWM drive whose period is short against L/R "
                                        "the winding carries about the duty times it on "
                                        "average: pwm_operate_margin judges that)"),
        "operate_margin": MetricInfo("1", "coil voltage over the must-operate voltage of the "
                                          "hot coil"),
    }

    def __init__(self, parameters, temperature_rise: float, clamp: str,
                 clamp_forward_voltage: float):
        super().__init__(parameters)
        self.temperature_rise = temperature_rise
        self.clamp = clamp
        self.clamp_forward_voltage = clamp_forward_voltage
        self.criteria = [Criterion("coil_operates", "operate_margin", minimum=1.0,
                                   source="stage",
                                   description="coil pulls in with the hot coil")]

    def fixed_figures(self):
        out = [("coil_temperature_rise", self.temperature_rise, "K"),
               ("clamp", self.clamp, None)]
        if self.clamp != "none":
            out.append(("clamp_forward_voltage", self.clamp_forward_voltage, "V"))
        return out

    def at(self, samples, temperature, supply_voltage):
        names = ["load.resistance", "load.inductance", "load.must_operate_voltage"]
        if self.clamp == "zener":
            names.append("load.clamp_voltage")
        t, vs, r, ind, vop, *rest = self._inputs(samples, temperature, supply_voltage, names)
        zener = rest[0] if rest else None
        return CoilState(vs, t, r, ind, vop, self.temperature_rise, self.clamp,
                         self.clamp_forward_voltage, zener)


#: fraction of the LED's test current below which the default check calls a string unlit
LED_LIT_FRACTION = 0.1


class LedLoad(LoadSpec):
    """A string of LEDs with its series resistor, see :class:`LedState`."""

    kind = "led"
    METRICS = {
        "led_current": MetricInfo("A", "current through the LED string in the on-state"),
        "led_voltage": MetricInfo("V", "forward voltage of the LED string in the on-state "
                                       "(without the series resistor)"),
    }

    def __init__(self, parameters, count: int, test_current: float, ideality: float,
                 forward_voltage_tempco: float):
        super().__init__(parameters)
        self.count = count
        self.test_current = test_current
        self.ideality = ideality
        self.forward_voltage_tempco = forward_voltage_tempco
        # without a study window on led_current a string that never lights (its forward
        # voltage above the supply) passed every check; a tenth of the test current is
        # dimly but visibly lit for an indicator LED (from memory). A study's led_current
        # limit replaces this side, or both.
        self.criteria = [Criterion("led_current", "led_current",
                                   minimum=LED_LIT_FRACTION * test_current, source="stage",
                                   description="the string lights: at least a tenth of "
                                               "the LED's test current")]

    def fixed_figures(self):
        # one forward voltage is drawn per string: its LEDs move together (the wider
        # current spread, the safe side; README, Loads)
        return [("count", self.count, None), ("test_current", self.test_current, "A"),
                ("ideality", self.ideality, "1"),
                ("forward_voltage_tempco", self.forward_voltage_tempco, "V/K")]

    def at(self, samples, temperature, supply_voltage):
        t, vs, vf, rs = self._inputs(samples, temperature, supply_voltage,
                                     ["load.forward_voltage", "load.series_resistance"])
        return LedState(vs, t, self.count, vf, self.test_current, self.ideality,
                        self.forward_voltage_tempco, rs)


# ---------------------------------------------------------------------------------------------
# Reading the [load] table
# ---------------------------------------------------------------------------------------------


def _param(reader: Reader, key: str, unit: str, description: str, **kw) -> str:
    return reader.parameter(key, unit, f"load.{key}", description, positive=True, **kw).name


_PER_KELVIN = ("/K", "/degC", "/\u00b0C")


def _voltage_tempco(reader: Reader, key: str, default: float) -> float:
    """A voltage temperature coefficient [V/K]: "-2 mV/K", "-2 mV/degC" or a number in V/K."""
    if not reader.has(key):
        return default
    try:
        text = reader.string(key)
    except StudyError:
        value = reader.quantity(key, "V")  # a plain number, taken in V/K
    else:
        body = next((text.strip()[: -len(s)] for s in _PER_KELVIN if text.strip().endswith(s)),
                    None)
        if body is None:
            raise reader.error(key, f"{text!r} is not a voltage per kelvin; write e.g. -2 mV/K")
        try:
            value = parse_quantity(body, "V")
        except UnitError:
            raise reader.error(key, f"{text!r} is not a voltage per kelvin; "
                                    "write e.g. -2 mV/K") from None
    # real LEDs lie between about -1 and -4 mV/K (from memory); beyond +-10 mV/K is a typo
    if not -10e-3 <= value <= 10e-3:
        raise reader.error(key, f"{value * 1e3:g} mV/K is outside -10 .. +10 mV/K")
    return value


def read_load(reader: Reader) -> LoadSpec:
    """Read the study's ``[load]`` table.

    Parameters
    ----------
    reader : Reader
        Reader of the ``[load]`` table.

    Returns
    -------
    LoadSpec
        A :class:`ResistorLoad`, :class:`LampLoad`, :class:`CoilLoad` or :class:`LedLoad`.

    Raises
    ------
    StudyError
        For a missing, malformed or out-of-range value, naming its key.

    Notes
    -----
    Keys by kind (toleranced ones become parameters ``load.<key>``):

    - ``resistor``: resistance*, tempco [1/K, default 0], power_rating [W, optional],
      thermal_time_constant [s, default 1 s, from memory: the rating's peak under a PWM drive].
    - ``lamp``: rated_voltage*, rated_power*, cold_ratio* [default 12, 5..20], exponent
      [default 0.55], thermal_time_constant [default 20 ms], cold_tempco [1/K, default
      0.0045, tungsten, from memory].
    - ``coil``: resistance* (at 20 degC), inductance*, must_operate_voltage* (at 20 degC),
      coil_temperature_rise [K, default 0], clamp [diode | zener | none, default diode],
      clamp_voltage* (zener only), clamp_forward_voltage [default 0.8 V; not with none].
    - ``led``: count [default 1], forward_voltage*, test_current, ideality [default 2.0,
      typical class value, from memory], forward_voltage_tempco [V/K per LED, default
      -2 mV/K, from memory], series_resistance*.
    """
    own = set(reader.keys()) - {"part"}  # the study's own keys, before a part's are added
    part = reader.string("part") if reader.has("part") else None
    reader = _with_library_part(reader)
    spec = _read_kind(reader)
    # every fixed figure the load was built with and where it came from (found by a review:
    # an LED string's count, ideality, test current and temperature coefficient were
    # stated nowhere in the report, while the transistors had their own table)
    library = load_library().get(part, {}) if part else {}
    spec.part = part
    for key, value, unit in spec.fixed_figures():
        if isinstance(value, str) or unit is None:
            text = str(value)
        elif unit == "V/K":
            text = format_quantity(value, "V") + "/K"
        else:
            text = format_quantity(value, unit)
        origin = ("study" if key in own else f"part {part}" if key in library else "default")
        spec.figures.append({"figure": key, "value": text, "from": origin})
    return spec


def _read_kind(reader: Reader) -> LoadSpec:
    """The load of ``read_load`` from its merged table."""
    kind = reader.string("kind", choices=KINDS)
    if kind == "resistor":
        names = [_param(reader, "resistance", "ohm", "load resistance at 25 degC")]
        tempco = reader.quantity("tempco", "1/K", default=0.0, minimum=-5e-3, maximum=1e-2)
        rating = reader.optional_quantity("power_rating", "W", positive=True)
        tau = reader.quantity("thermal_time_constant", "s", default=RESISTOR_TIME_CONSTANT,
                              positive=True, maximum=1e5)
        return ResistorLoad(names, tempco, rating, tau)

    if kind == "lamp":
        names = [
            _param(reader, "rated_voltage", "V", "lamp rated voltage"),
            _param(reader, "rated_power", "W", "lamp rated power"),
            # hot/cold resistance ratio: 10 to 15 per the lamp references; 5..20 accepted
            _param(reader, "cold_ratio", "1", "lamp hot/cold filament resistance ratio",
                   default=12.0, minimum=5.0, maximum=20.0),
        ]
        # rerating relations give about 0.55 to 0.6; the bounds keep the cold/hot crossover
        # V_r k_c^(-1/(1-p)) far inside the floating-point range
        exponent = reader.quantity("exponent", "1", default=0.55, minimum=0.2, maximum=0.9)
        tau = reader.quantity("thermal_time_constant", "s", default=20e-3, positive=True)
        cold_tempco = reader.quantity("cold_tempco", "1/K", default=TUNGSTEN_TEMPCO,
                                      minimum=0.0, maximum=1e-2)
        return LampLoad(names, exponent, tau, cold_tempco)

    if kind == "coil":
        names = [
            _param(reader, "resistance", "ohm", "coil resistance at 20 degC"),
            _param(reader, "inductance", "H", "coil inductance"),
            _param(reader, "must_operate_voltage", "V", "coil must-operate voltage at 20 degC"),
        ]
        rise = reader.quantity("coil_temperature_rise", "K", default=0.0, minimum=0.0,
                               maximum=200.0)
        clamp = reader.string("clamp", default="diode", choices=("diode", "zener", "none"))
        forward = math.nan
        if clamp == "zener":
            names.append(_param(reader, "clamp_voltage", "V", "zener voltage of the coil clamp"))
        if clamp != "none":
            forward = reader.quantity("clamp_forward_voltage", "V", default=0.8, positive=True,
                                      maximum=5.0)
        return CoilLoad(names, rise, clamp, forward)

    count = reader.integer("count", default=1, minimum=1, maximum=1000)
    names = [_param(reader, "forward_voltage", "V", "LED forward voltage at the test current")]
    test_current = reader.quantity("test_current", "A", positive=True)
    ideality = reader.quantity("ideality", "1", default=2.0, minimum=1.0, maximum=10.0)
    tempco = _voltage_tempco(reader, "forward_voltage_tempco", -2e-3)
    names.append(_param(reader, "series_resistance", "ohm", "LED string series resistor"))
    return LedLoad(names, count, test_current, ideality, tempco)


# --- load library -----------------------------------------------------------------------------

LIBRARY_KEYS = ("description",)


@functools.lru_cache(maxsize=1)
def load_library() -> dict[str, dict]:
    """Load classes of the part library (``models/parts/loads/*.toml``), by name.

    Each entry is the data file's table: ``kind``, ``description`` and the kind's keys in the
    same forms a study uses (typical class values, from memory).
    """
    folder = resources.files("tolerance.models").joinpath("parts", "loads")
    out = {}
    for item in sorted(folder.iterdir(), key=lambda p: p.name):
        if item.name.endswith(".toml"):
            out[item.name[: -len(".toml")]] = tomllib.loads(item.read_text(encoding="utf-8"))
    return out


def _with_library_part(reader: Reader) -> Reader:
    """``[load] part = "<name>"``: the library class's keys, overridden by the study's own.

    Returns a reader over the merged table (same key path), so unknown keys are still reported
    and every error names the study's key.
    """
    if not reader.has("part"):
        return reader
    name = reader.string("part")
    lib = load_library()
    if name not in lib:
        close = difflib.get_close_matches(name, list(lib), n=1, cutoff=0.5)
        hint = f"; did you mean '{close[0]}'?" if close else ""
        raise reader.error("part", f"'{name}' is not a load of the part library (see "
                                   f"'tolerance parts'){hint}")
    entry = {k: v for k, v in lib[name].items() if k not in LIBRARY_KEYS}
    own = {k: reader._data[k] for k in reader.keys() if k != "part"}  # noqa: SLF001
    if "kind" in own and own["kind"] != entry["kind"]:
        raise reader.error("kind", f"'{own['kind']}' contradicts the part '{name}', a "
                                   f"{entry['kind']}")
    for k in own:
        reader.ignore(k)
    return Reader({**entry, **own}, reader.path, reader._ctx)  # noqa: SLF001
