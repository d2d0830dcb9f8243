"""Thermal models: junction temperature, derating, electro-thermal fixed point.

Symbol | variable name | meaning
------ | ------------- | -------
T_a    | ambient       | ambient temperature [K]
T_j    | junction      | junction temperature [K]
P      | power         | dissipation averaged over the PWM period [W]
theta_JA | theta_ja    | thermal resistance junction to ambient [K/W]
theta_JC, theta_CS, theta_SA | theta_jc, theta_cs, theta_sa | junction-case, case-sink,
         |             | sink-ambient [K/W]

References
----------
.. [1] JEDEC JESD51-1, "Integrated Circuit Thermal Measurement Method - Electrical Test
   Method (Single Semiconductor Device)," 1995; JESD51-2, "Integrated Circuits Thermal Test
   Method Environmental Conditions - Natural Convection (Still Air)," 1995.
.. [2] MIL-PRF-39017, "Resistors, Fixed, Film (Insulated), Nonestablished Reliability,
   Established Reliability, and Space Level," derating figure; IEC 60115-1, "Fixed resistors
   for use in electronic equipment - Part 1: Generic specification" (rated ambient
   temperature, upper category temperature).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

#: the electro-thermal loop stops when no junction temperature moves by more than this [K]
SETTLE_KELVIN = 0.05
#: most fixed-point iterations before a sample is called a runaway
MAX_ITERATIONS = 60
#: a junction above this is beyond any model (and any silicon): the loop has run away [K]
RUNAWAY_KELVIN = 1000.0

#: largest step of the secant relaxation, in plain fixed-point steps (see
#: :func:`electrothermal`): the secant is used where the estimated loop slope is below
#: 1 - 1 / MAX_EXTRAPOLATION
MAX_EXTRAPOLATION = 100.0
#: and by at most this beyond the plain step [K]: an iterate far from the last one starts its
#: DC solves from the circuit's guesses, not from the last solution
EXTRAPOLATION_KELVIN = 5.0


def junction_temperature(power, ambient, theta_ja):
    """Steady junction temperature in natural convection.

    Parameters
    ----------
    power : array_like
        Dissipation [W].
    ambient : array_like
        Ambient temperature [K].
    theta_ja : array_like
        Thermal resistance junction to ambient [K/W].

    Returns
    -------
    ndarray
        T_j = T_a + theta_JA P [K] (JESD51-1/-2 [1]).
    """
    return np.asarray(ambient, dtype=float) + np.asarray(theta_ja) * np.asarray(power)


def heatsink_resistance(theta_jc, theta_cs, theta_sa, theta_ja=None):
    """Thermal resistance junction to ambient through a heatsink [K/W].

    The case reaches the air through the sink, theta_CS + theta_SA, and through the
    package's own surface and leads, theta_CA = theta_JA - theta_JC with theta_JA the
    free-air figure; the two paths are in parallel behind theta_JC (the steady thermal
    network of [1], resistances combined as in an electric circuit):

        theta = theta_JC + 1 / (1 / (theta_CS + theta_SA) + 1 / theta_CA)

    Without ``theta_ja`` the package's own path is left out (the plain series chain
    theta_JC + theta_CS + theta_SA, the usual hand estimate, a little hotter). The sink
    covers part of the package, so its own path is somewhat weaker than in free air; on a
    useful sink (a few K/W against tens) it carries under a tenth of the heat either way,
    and only a sink poorer than free air made the series chain absurd.
    """
    if theta_ja is None:
        return np.asarray(theta_jc) + np.asarray(theta_cs) + np.asarray(theta_sa)
    own = np.asarray(theta_ja) - np.asarray(theta_jc)
    path = np.asarray(theta_cs) + np.asarray(theta_sa)
    return np.asarray(theta_jc) + path * own / (path + own)


def derated_power(rated_power, ambient, rated_ambient, zero_power_temperature):
    """Allowed dissipation of a part at an ambient temperature (linear derating curve).

    Full rated power up to ``rated_ambient``, falling linearly to zero at
    ``zero_power_temperature`` (the maximum element / junction temperature), zero above it —
    the shape of the MIL-PRF-39017 resistor derating figure and of IEC 60115-1 practice [2],
    and of a transistor's total-power derating (P_tot from 25 degC to T_j max).

    Parameters
    ----------
    rated_power : array_like
        Rated power [W].
    ambient : array_like
        Ambient temperature [K].
    rated_ambient : array_like
        Ambient up to which the full rating applies [K] (70 degC for film resistors).
    zero_power_temperature : array_like
        Temperature at which the allowed power reaches zero [K].

    Returns
    -------
    ndarray
        Allowed power [W].
    """
    ta = np.asarray(ambient, dtype=float)
    span = np.asarray(zero_power_temperature, dtype=float) - np.asarray(rated_ambient)
    frac = np.clip((np.asarray(zero_power_temperature) - ta) / span, 0.0, 1.0)
    return np.asarray(rated_power) * frac


@dataclass
class FixedPointResult:
    """Junction temperatures [K] per device (NaN where runaway), settled flag, iterations."""

    temperatures: dict[str, np.ndarray]
    settled: np.ndarray
    iterations: np.ndarray


def _at(value, idx):
    """``value[idx]`` for a per-sample array, the value itself for a scalar."""
    arr = np.asarray(value, dtype=float)
    return arr[idx] if arr.ndim else arr


def electrothermal(power_at: Callable[[dict[str, np.ndarray], np.ndarray],
                                      dict[str, np.ndarray]],
                   ambient: np.ndarray, theta: dict[str, np.ndarray],
                   shared: dict[str, str] | None = None, limit: dict[str, np.ndarray] | None = None,
                   settle: float = SETTLE_KELVIN, max_iterations: int = MAX_ITERATIONS
                   ) -> FixedPointResult:
    """Electro-thermal fixed point of every sample, vectorized.

    Iterates T_j = T_a + theta P(T_j) for every device until no temperature moves by more than
    ``settle`` kelvin. ``power_at(temperatures)`` evaluates the whole chunk's dissipation per
    device at the given junction temperatures (one vectorized call per iteration; samples that
    have settled keep their temperatures). Devices listed in ``shared`` (device -> the device
    whose junction it shares, e.g. the two transistors of a monolithic Darlington) take the
    sum of both powers through the shared thermal resistance.

    The iteration is damped (a relaxation factor that halves for a sample whose step grows),
    so a stable electro-thermal loop converges even when d(theta P)/dT approaches 1. From the
    second iteration on, each device's step is the secant step on T - T_a - theta P(T):
    the plain step times 1 / (1 - F'), with the loop slope F' = d(theta P)/dT estimated from
    the device's last two iterates. Where the dissipation falls steeply with temperature (a
    stage at the edge of saturation that saturates as its gain rises with T) F' nears -1
    and the plain iteration would swing between two temperatures for dozens of steps; where
    it rises steeply (leakage and gain growing with T) F' nears 1 and the plain iteration
    creeps up on its fixed point by a factor F' per step. The secant step converges
    superlinearly in both; it extrapolates (F' > 0) only while the approach stays on one side,
    by at most :data:`MAX_EXTRAPOLATION` plain steps and :data:`EXTRAPOLATION_KELVIN` beyond
    the plain step, and is not used where F' is unknown (the first step, a device whose
    temperature did not move) or near and above 1 (the damped plain step takes over, and a
    runaway heats on until it is flagged). A sample whose
    temperature is still moving after ``max_iterations``, whose temperature exceeds
    ``limit`` + 100 K (the loop would only go on heating), or whose power is not finite, is
    returned with ``settled = False``: thermal runaway. So is one that passes
    :data:`RUNAWAY_KELVIN`.

    Parameters
    ----------
    power_at : callable
        ``power_at({device: T_j [K]}, idx) -> {device: P [W]}``, arrays of ``len(idx)``.
    ambient : ndarray
        Ambient temperature per sample [K].
    theta : dict
        Thermal resistance junction to ambient per device [K/W].
    shared : dict, optional
        Devices on one die: name -> name of the device that carries the junction.
    limit : dict, optional
        Maximum junction temperature per device [K]; far beyond it a sample is declared a
        runaway without more iterations.
    """
    shared = shared or {}
    names = list(theta)
    n = len(ambient)
    temps = {d: np.array(ambient, dtype=float) for d in names}
    ambient = np.asarray(ambient, dtype=float)
    settled = np.zeros(n, dtype=bool)
    runaway = np.zeros(n, dtype=bool)
    iterations = np.zeros(n, dtype=np.int64)
    # each device's relaxation factor: halved where its step grows and changes sign (a loop
    # that swings ever wider, F' < -1), kept where it grows on one side (F' > 1: the plain
    # step heads for a stable point above, or for a runaway that is then flagged sooner)
    relax = {d: np.ones(n) for d in names}
    # each device's previous iterate and its residual theta P(T) + T_a - T, for the secant
    prev_t = {d: np.full(n, np.nan) for d in names}
    prev_r = {d: np.full(n, np.nan) for d in names}
    for it in range(1, max_iterations + 1):
        active = ~(settled | runaway)
        if not active.any():
            break
        idx = np.flatnonzero(active)
        # only the samples still moving are evaluated: the cost follows the active set
        power = power_at({d: temps[d][idx] for d in names}, idx)
        heat = {d: np.asarray(power[d], dtype=float) for d in names}
        for d, carrier in shared.items():
            heat[carrier] = heat[carrier] + heat[d]
        step_max = np.zeros(idx.size)
        new = {}
        for d in names:
            carrier = shared.get(d, d)
            target = np.asarray(ambient)[idx] + _at(theta[carrier], idx) * heat[carrier]
            t_now = temps[d][idx]
            delta = target - t_now
            with np.errstate(divide="ignore", invalid="ignore"):
                slope = (delta - prev_r[d][idx]) / (t_now - prev_t[d][idx])  # F' - 1
            gain = slope + 1.0  # F' = d(theta P)/dT along the last step
            # the secant step where F' is known and below 1: damping where the loop swings
            # (F' < 0), extrapolation where it creeps up on its fixed point from one side
            usable = (np.isfinite(gain) & (gain < 1.0 - 1.0 / MAX_EXTRAPOLATION)
                      & ((gain < 0.0) | (delta * prev_r[d][idx] > 0.0)))
            with np.errstate(divide="ignore", invalid="ignore"):
                secant_w = np.clip(1.0 / (1.0 - gain), 1.0 / 64.0, MAX_EXTRAPOLATION)
                # an extrapolation moves at most EXTRAPOLATION_KELVIN beyond the plain step
                reach = np.maximum(1.0, 1.0 + EXTRAPOLATION_KELVIN / np.abs(delta))
            rel = relax[d][idx]
            w = np.where(usable, np.minimum(secant_w, reach), rel)
            new[d] = t_now + w * delta
            widening = (np.abs(delta) > np.abs(prev_r[d][idx])) & (delta * prev_r[d][idx] < 0.0)
            relax[d][idx] = np.where(widening, np.maximum(rel * 0.5, 1 / 64), rel)
            prev_t[d][idx] = t_now
            prev_r[d][idx] = delta
            step_max = np.maximum(step_max, np.abs(delta))
        bad = ~np.isfinite(step_max)
        for d in names:
            bad |= new[d] > RUNAWAY_KELVIN
            if limit is not None and d in limit:
                bad |= new[d] > _at(limit[d], idx) + 100.0
        for d in names:
            temps[d][idx] = np.where(bad, temps[d][idx], new[d])
        runaway[idx] |= bad
        iterations[idx] = it
        settled[idx] |= ~bad & (step_max < settle)
    runaway |= ~settled
    out = {d: np.where(runaway, np.nan, t) for d, t in temps.items()}
    return FixedPointResult(out, ~runaway, iterations)
