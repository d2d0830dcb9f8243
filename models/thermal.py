"""Thermal models: junction temperature, derating, electro-thermal fixed point.

Symbol | variable name | meaning
------ | ------------- | -------
T_a    | ambient       | ambient temperature [K]
T_j    | junction      | junction temperature [K]
P      | power         | dissipation averaged over the PWM period [W]
P_on, P_off | p_on, p_off | dissipation in the on- and off-state [W]
R_i, tau_i | network     | thermal resistance [K/W] and time constant [s] of Foster stage i
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
.. [3] JEDEC JESD51-14, "Transient Dual Interface Test Method for the Measurement of the
   Thermal Resistance Junction to Case of Semiconductor Devices with Heat Flow Through a
   Single Path," 2010 (Foster RC networks of the transient thermal impedance); the periodic
   steady state of each stage is the textbook first-order RC response to a square wave.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

#: the electro-thermal loop stops when no junction temperature moves by more than this [K]
SETTLE_KELVIN = 0.05
#: most fixed-point iterations before a sample is called a runaway
MAX_ITERATIONS = 100
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


#: Thermal time constants [s] of the two-stage Foster network of a package class: the die
#: stage (junction to case, resistance theta_JC) and the package stage (the rest of the path
#: to the ambient, theta - theta_JC). Typical class values, from memory (orders of magnitude
#: read off transient-thermal-impedance curves of such packages in free air); a study gives
#: its part's own figures with ``[parts.Qn] thermal_time_constant`` (the package stage) and
#: ``die_time_constant``. On a heatsink the package's constant is kept for the sink path: a
#: sink's own constant is longer (minutes), and the shorter constant gives the higher peak.
PACKAGE_TIME_CONSTANTS = {
    "TO-92": (0.3, 30.0),     # from memory
    "TO-126": (0.1, 60.0),    # from memory
    "TO-220": (0.05, 120.0),  # from memory
}
#: the (die, package) constants taken for a part of unknown package (the study's own
#: figures): each stage's shortest of the table, the side that gives the higher peak (a
#: stage's share of the peak, (1 - exp(-t_on / tau)) / (1 - exp(-T / tau)), falls from 1 to
#: the duty as tau grows)
UNKNOWN_PACKAGE_TIME_CONSTANTS = (min(d for d, _ in PACKAGE_TIME_CONSTANTS.values()),
                                  min(p for _, p in PACKAGE_TIME_CONSTANTS.values()))
#: without theta_JC, the share of theta given to the die stage (with the die's constant; the
#: rest with the package's): small packages' theta_JC is some 30 to 50 % of their free-air
#: theta_JA, larger ones' less (from memory; the library's TO-92 class 83 of 200 K/W, its
#: TO-126 class 10 of 100, TO-220 1.9 of 62.5). The peak rises with the fast stage's share,
#: so half, the upper end, is never below the two-stage network of a part whose theta_JC is
#: at most half its theta
DIE_SHARE_WITHOUT_JC = 0.5
#: a resistor's thermal time constant (element to ambient) [s] where the study gives none:
#: small film and chip resistors (0.1 to 0.5 W) settle in seconds to tens of seconds (from
#: memory); the short side, which gives the higher peak of a PWM cycle
RESISTOR_TIME_CONSTANT = 1.0
#: a PWM period whose junction peak exceeds the period-average rise by more than this share
#: (at P_off = 0) gets a study note
PEAK_NOTE_SHARE = 0.03


def foster_network(theta, theta_jc, die_time_constant, package_time_constant):
    """The two-stage Foster network ((R_die, tau_die), (R_package, tau_package)) of a part
    whose junction-to-ambient resistance is ``theta`` [K/W].

    The die stage carries theta_JC with the short constant, the package stage the rest,
    theta - theta_JC, with the package's. Without a theta_JC (a part given by its free-air
    figure alone) the die stage takes :data:`DIE_SHARE_WITHOUT_JC` of theta, the
    conservative side: one stage with the package's constant gave a lower peak than the
    part's own two stages (a TO-92 at a 10 s period, duty 0.5: weight 0.54 against 0.73).
    """
    if theta_jc is None or not 0.0 < theta_jc < theta:
        theta_jc = DIE_SHARE_WITHOUT_JC * float(theta)
    return ((float(theta_jc), float(die_time_constant)),
            (float(theta) - float(theta_jc), float(package_time_constant)))


def peak_weight(network, frequency, duty):
    """Share of the on-state's extra dissipation P_on - P_off that reaches the junction at
    the peak of the PWM cycle's periodic steady state, as a weighted duty.

    A Foster stage (R, tau) driven by P_on for t_on = D T and by P_off for the rest of the
    period T settles into a periodic response whose highest point, at the end of the
    on-time, lies R [P_off + (P_on - P_off) (1 - exp(-t_on / tau)) / (1 - exp(-T / tau))]
    above the ambient (superposition of the single-pole step responses over the past
    periods, a geometric series [3]). Summed over the stages and divided by their total
    resistance, the peak rise is theta [P_off + w (P_on - P_off)] with the weight w returned
    here. w tends to D where T is far shorter than every tau (the period-average rise) and
    to 1 where the on-time outlasts them (the on-state's own rise). A static drive
    (``frequency`` None) gives 1 for a duty of 1 (always on) and 0 for 0 (never on).
    """
    if frequency is None:
        return float(duty)
    period = 1.0 / float(frequency)
    total, weighted = 0.0, 0.0
    for r, tau in network:
        # expm1 keeps the ratio exact where T / tau is tiny (it tends to D)
        k = np.expm1(-duty * period / tau) / np.expm1(-period / tau)
        total += r
        weighted += r * k
    return float(weighted / total)


def single_pole_weights(time_constant, frequency, duty):
    """(w_on, w_off) of :func:`peak_power` for a part with one thermal time constant [s]
    (a resistor's element, a resistive load): :func:`peak_weight` of the one-stage network
    for the duty and for 1 - duty; (1, 0) for a static drive that is on (``frequency``
    None, ``duty`` 1), the on-state's own dissipation."""
    network = ((1.0, float(time_constant)),)
    return (peak_weight(network, frequency, duty), peak_weight(network, frequency, 1.0 - duty))


def peak_power(p_on, p_off, weights):
    """The steady dissipation [W] that gives the PWM cycle's peak junction rise through the
    part's whole thermal resistance: P_off + w_on (P_on - P_off) where the on-state
    dissipates more (the peak ends the on-time), P_on + w_off (P_off - P_on) where the
    off-state does (it ends the off-time); ``weights`` = (w_on, w_off), the
    :func:`peak_weight` of the duty and of 1 - duty. Both readings tend to the period's
    average where the period is far shorter than the thermal time constants."""
    w_on, w_off = weights
    p_on, p_off = np.asarray(p_on, dtype=float), np.asarray(p_off, dtype=float)
    return np.maximum(p_off + w_on * (p_on - p_off), p_on + w_off * (p_off - p_on))


def periodic_peak_rise(p_on, p_off, network, frequency, duty):
    """Highest junction rise above the ambient [K] in the periodic steady state of a PWM
    drive (P_on for the on-time, P_off for the rest; see :func:`peak_weight`)."""
    theta = sum(r for r, _ in network)
    weights = (peak_weight(network, frequency, duty),
               peak_weight(network, frequency, 1.0 - duty))
    return theta * peak_power(p_on, p_off, weights)


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
    """Junction temperatures [K] per device, settled flag, iterations, and ``failed``:
    samples whose circuit did not solve at a trial temperature (neither settled nor a
    runaway: not converged). A temperature is NaN where that device ran away (or its loop
    did not settle) and in a failed sample; in a runaway sample a device on a thermal path
    of its own that settled keeps its temperature (a discrete driver beside a runaway
    output). ``runaway``: per device, where it ran away."""

    temperatures: dict[str, np.ndarray]
    settled: np.ndarray
    iterations: np.ndarray
    failed: np.ndarray
    runaway: dict[str, np.ndarray] | None = None


#: times a trial temperature whose circuit did not solve is moved half way back towards the
#: last one that did, before the sample is given up as not converged
MAX_RETREATS = 6
#: points of the scan between the ambient and the cap that a device first found heating at its
#: cap gets before it is called a runaway (:func:`electrothermal`): 3 K apart over a 190 K
#: span; a dip of the residual below zero narrower than that can still be missed
SCAN_POINTS = 64
#: a step is taken as settled when the distance it leaves to the fixed point, the step times
#: 1 / (1 - F'), is below ``settle``; that factor is counted up to this much where F' nears or
#: passes 1 (a loop that creeps along a nearly tangent curve has not settled)
MAX_DISTANCE_FACTOR = 100.0


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

    Iterates T_j = T_a + theta P(T_j) for every device until no temperature is further than
    ``settle`` kelvin from its fixed point. ``power_at(temperatures)`` evaluates the whole
    chunk's dissipation per device at the given junction temperatures (one vectorized call per
    iteration; samples that have settled keep their temperatures). Devices listed in
    ``shared`` (device -> the device whose junction it shares, e.g. the two transistors of a
    monolithic Darlington) take the sum of both powers through the shared thermal resistance.

    The fixed point sought is the first one above the ambient, where a unit switched on cold
    stops heating: below it the residual r(T) = T_a + theta P(T) - T is positive, above it
    negative. From the second iteration on, each device's step is the secant step on r: the
    plain step r times 1 / (1 - F'), with the loop slope F' = d(theta P)/dT estimated from the
    device's last two iterates. Where the dissipation falls steeply with temperature (a stage
    at the edge of saturation, or one past V_s / 2R whose dissipation falls as its current
    rises) F' is negative and the plain iteration would swing; where it rises steeply
    (leakage and gain growing with T) F' nears 1 and the plain iteration creeps up on its
    fixed point by a factor F' per step. The secant step converges superlinearly in both; it
    extrapolates (F' > 0) only while the approach stays on one side, by at most
    :data:`MAX_EXTRAPOLATION` plain steps and :data:`EXTRAPOLATION_KELVIN` beyond the plain
    step, and is not used where F' is unknown (the first step, a device whose temperature did
    not move) or near and above 1. There the plain step is taken: relaxed (halved, down to
    1/64) only where a device's step grows and changes sign, a swing that widens; doubled at
    each step (up to :data:`MAX_EXTRAPOLATION` times, within the extrapolation's reach) while
    it creeps on one side with F' near or above 1, where the curve nearly touches the
    diagonal and the residual is millikelvin (it may pass the diagonal by, with the fixed
    point degrees further on).

    Each device keeps a bracket, the highest temperature seen with r > 0 below the lowest
    seen with r < 0; a step that would leave it bisects it instead (a sharp knee in P(T), with
    F' of -10 or steeper, otherwise locks the secant into a cycle, on one die or two). With
    two dice a point's residual moves with the other die, so an old bracket can shut the fixed
    point out: a bracket that has shrunk to a thousandth of ``settle`` while the residual
    stays above a fifth of ``settle`` is dropped. No step goes beyond the cap, ``limit`` +
    100 K (or :data:`RUNAWAY_KELVIN`): a first plain step from a hot ambient can overshoot far
    past a stable point, and only a unit still heating at the cap is a runaway. A device first
    found heating at its cap gets one scan first: its residual at :data:`SCAN_POINTS` - 1
    even steps between the ambient and the cap, the sample's other devices where they are, in
    one batched call; where it turns negative the device restarts inside the first such
    bracket, the stable point its first steps jumped (a heater's output found at 219.8 degC,
    its residual dipping 0.3 K below zero over 12 K, where the cap is 250 degC). A runaway is
    thus a device with no settled point found below its cap, not one proven to have none. A
    sample still moving after ``max_iterations`` is one too (``settled = False``). A device found
    heating at its cap is held there while the sample's other devices (their own dice, their
    own thermal paths) settle on their own loops, with it held at its ``limit`` (where a
    stage evaluates a runaway's other metrics), so they keep their temperatures: only the
    device that ran away reads NaN (a monolithic pair's dice run away together).

    A trial temperature where ``power_at`` gives no finite power (the circuit did not solve
    there) is moved half way back towards the last solved one, up to :data:`MAX_RETREATS`
    times; then, or when the ambient itself does not solve, or when the iterations end on
    such a trial, the sample is ``failed``: not converged, neither settled nor a runaway,
    unless it was already seen heating at or above its ``limit``, which makes it a runaway.

    Limits, as found: the distance to the fixed point is read from the slope across the last
    step, so a residual that bends sharply within a long step (nearly touching zero between
    two crossings: F' near 1 there while the step's secant says F' < 0) can pass as settled
    off the point, 1.7 K on a synthetic parabola; a guard costs a further iteration on most
    real units, and an audit of 8,800 real units found no such case. The first plain step can
    likewise jump a stable crossing and its unstable partner lying close together beyond a
    large first residual; the audit saw the lowest one taken wherever there were several.

    Parameters
    ----------
    power_at : callable
        ``power_at({device: T_j [K]}, idx) -> {device: P [W]}``, arrays of ``len(idx)``;
        ``idx`` may hold a sample several times (the scan below the cap evaluates each
        sample at its points in one call).
    ambient : ndarray
        Ambient temperature per sample [K].
    theta : dict
        Thermal resistance junction to ambient per device [K/W].
    shared : dict, optional
        Devices on one die: name -> name of the device that carries the junction.
    limit : dict, optional
        Maximum junction temperature per device [K]; a sample still heating 100 K beyond it
        is declared a runaway without more iterations.
    """
    shared = shared or {}
    names = list(theta)
    n = len(ambient)
    ambient = np.asarray(ambient, dtype=float)
    temps = {d: ambient.copy() for d in names}
    settled = np.zeros(n, dtype=bool)
    runaway = np.zeros(n, dtype=bool)
    failed = np.zeros(n, dtype=bool)
    iterations = np.zeros(n, dtype=np.int64)
    cap = {}  # no step goes above this [K]
    hold = {}  # where a device that ran away is held while the others settle [K]
    for d in names:
        cap[d] = np.full(n, RUNAWAY_KELVIN)
        if limit is not None and d in limit:
            cap[d] = np.minimum(cap[d], np.asarray(limit[d], dtype=float) + 100.0)
        hold[d] = (np.minimum(cap[d], np.asarray(limit[d], dtype=float))
                   if limit is not None and d in limit else cap[d])

    def seen_hot(sel):
        """Whether samples ``sel`` were seen still heating at or above a limit: runaways,
        whatever their circuit does further up."""
        out = np.zeros(np.size(lo[names[0]][sel]), dtype=bool)
        for d in names:
            out |= lo[d][sel] >= cap[d][sel] - 100.0
        return out

    relax = {d: np.ones(n) for d in names}
    boost = {d: np.ones(n) for d in names}  # the creeping plain step's growing multiple
    # each device's previous iterate and its residual theta P(T) + T_a - T, for the secant
    prev_t = {d: np.full(n, np.nan) for d in names}
    prev_r = {d: np.full(n, np.nan) for d in names}
    # each device's bracket of the crossing: highest T seen heating, lowest T seen cooling
    lo = {d: np.full(n, np.nan) for d in names}
    hi = {d: np.full(n, np.nan) for d in names}
    # the last temperatures whose circuit solved, and how often a sample has backed off
    good = {d: np.full(n, np.nan) for d in names}
    retreats = np.zeros(n, dtype=np.int64)
    pending = np.zeros(n, dtype=bool)  # backed off, not yet solved again
    pinned = {d: np.zeros(n, dtype=bool) for d in names}  # held at the cap: ran away
    spread = {d: np.full(n, np.inf) for d in names}  # each device's last distance [K]
    scanned = {d: np.zeros(n, dtype=bool) for d in names}  # searched below its cap once

    def scan_below_cap(jdx, pos, fresh, temps_now, hot, new):
        """Samples ``jdx[pos]`` have a device first found heating at its cap (``fresh``,
        per device over ``jdx``): scan each such device's residual at ``SCAN_POINTS`` - 1
        even steps between the ambient and the cap (the sample's other devices at their
        temperatures ``temps_now``), in one batched ``power_at`` call. A device whose
        residual turns negative restarts inside the first such bracket (the last heating
        point below the first cooling one): the stable crossing its first steps jumped.
        ``hot`` and ``new`` (per device over ``jdx``) are updated in place."""
        s = jdx[pos]
        frac = np.arange(1, SCAN_POINTS) / SCAN_POINTS
        rows = np.repeat(s, frac.size)
        grid, trial = {}, {}
        for d in names:
            carrier = shared.get(d, d)
            grid[d] = ambient[s, None] + (cap[carrier][s] - ambient[s])[:, None] * frac
            trial[d] = np.where(fresh[d][pos, None], grid[d],
                                temps_now[d][pos, None]).ravel()
        power = power_at(trial, rows)
        heat = {d: np.broadcast_to(np.asarray(power[d], dtype=float), rows.shape)
                for d in names}
        for d, carrier in shared.items():
            heat[carrier] = heat[carrier] + heat[d]
        column = np.arange(frac.size)
        for d in names:
            carrier = shared.get(d, d)
            mine = fresh[d][pos]
            scanned[d][s[mine]] = True
            r = (ambient[rows] + _at(theta[carrier], rows) * heat[carrier]
                 - trial[d]).reshape(s.size, frac.size)
            with np.errstate(invalid="ignore"):
                cooling, heating = r < 0.0, r > 0.0  # a trial that did not solve: neither
            found = mine & cooling.any(axis=1)
            if not found.any():
                continue
            first = np.argmax(cooling, axis=1)
            below = np.max(np.where(heating & (column < first[:, None]), column, -1), axis=1)
            k = np.arange(s.size)
            upper = grid[d][k, first]
            lower = np.where(below >= 0, grid[d][k, np.maximum(below, 0)], ambient[s])
            at, g = s[found], pos[found]
            lo[d][at], hi[d][at] = lower[found], upper[found]
            # the secant starts from the cooling end: the next trial is the bracket's middle
            prev_t[d][at], prev_r[d][at] = upper[found], r[k, first][found]
            relax[d][at], boost[d][at], spread[d][at] = 1.0, 1.0, np.inf
            new[d][g] = 0.5 * (lower + upper)[found]
            hot[d][g] = False
    for it in range(1, max_iterations + 1):
        active = ~(settled | runaway | failed)
        if not active.any():
            break
        idx = np.flatnonzero(active)
        iterations[idx] = it
        # only the samples still moving are evaluated: the cost follows the active set
        power = power_at({d: temps[d][idx] for d in names}, idx)
        heat = {d: np.broadcast_to(np.asarray(power[d], dtype=float), idx.shape)
                for d in names}
        for d, carrier in shared.items():
            heat[carrier] = heat[carrier] + heat[d]
        unsolved = np.zeros(idx.size, dtype=bool)
        for d in names:
            unsolved |= ~np.isfinite(heat[d])
        pending[idx] = unsolved
        if unsolved.any():
            u = idx[unsolved]
            give_up = ~np.isfinite(good[names[0]][u]) | (retreats[u] >= MAX_RETREATS)
            # one already seen heating at or above its limit runs away, whether or not its
            # circuit solves further up; the others are not converged
            above = seen_hot(u)
            runaway[u[give_up & above]] = True
            failed[u[give_up & ~above]] = True
            pending[u[give_up]] = False
            back = u[~give_up]
            retreats[back] += 1
            for d in names:
                temps[d][back] = 0.5 * (temps[d][back] + good[d][back])
        keep = np.flatnonzero(~unsolved)
        jdx = idx[keep]
        if not jdx.size:
            continue
        distance = np.zeros(jdx.size)
        hot = {}
        new = {}
        for d in names:
            carrier = shared.get(d, d)
            target = ambient[jdx] + _at(theta[carrier], jdx) * heat[carrier][keep]
            t_now = temps[d][jdx]
            good[d][jdx] = t_now
            delta = target - t_now
            with np.errstate(divide="ignore", invalid="ignore"):
                slope = (delta - prev_r[d][jdx]) / (t_now - prev_t[d][jdx])  # F' - 1
            gain = slope + 1.0  # F' = d(theta P)/dT along the last step
            # the secant step where F' is known and below 1: damping where the loop swings
            # (F' < 0), extrapolation where it creeps up on its fixed point from one side
            usable = (np.isfinite(gain) & (gain < 1.0 - 1.0 / MAX_EXTRAPOLATION)
                      & ((gain < 0.0) | (delta * prev_r[d][jdx] > 0.0)))
            with np.errstate(divide="ignore", invalid="ignore"):
                secant_w = np.clip(1.0 / (1.0 - gain), 1.0 / 64.0, MAX_EXTRAPOLATION)
                # an extrapolation moves at most EXTRAPOLATION_KELVIN beyond the plain step
                reach = np.maximum(1.0, 1.0 + EXTRAPOLATION_KELVIN / np.abs(delta))
                # how far the fixed point still is: the step itself where F' is unknown or
                # negative, up to MAX_DISTANCE_FACTOR steps where F' nears or passes 1
                factor = np.where(np.isfinite(gain),
                                  np.clip(1.0 / np.maximum(1.0 - gain, 1e-300), 1.0,
                                          MAX_DISTANCE_FACTOR), 1.0)
            rel = relax[d][jdx]
            # creeping: F' near or above 1 and the residual keeping its sign, so the plain
            # step shrinks to millikelvin where the curve nearly touches the diagonal (and
            # may pass it by: a near-tangency with the fixed point degrees further on); the
            # plain step doubles while that lasts, within the extrapolation's reach
            creeping = (~usable & np.isfinite(gain) & (gain >= 1.0 - 1.0 / MAX_EXTRAPOLATION)
                        & (delta * prev_r[d][jdx] > 0.0))
            push = np.where(creeping, np.minimum(boost[d][jdx] * 2.0, MAX_EXTRAPOLATION), 1.0)
            boost[d][jdx] = push
            plain = np.where(creeping, np.minimum(rel * push, reach), rel)
            step = t_now + np.where(usable, np.minimum(secant_w, reach), plain) * delta
            widening = (np.abs(delta) > np.abs(prev_r[d][jdx])) & (delta * prev_r[d][jdx] < 0.0)
            relax[d][jdx] = np.where(widening, np.maximum(rel * 0.5, 1 / 64), rel)
            prev_t[d][jdx] = t_now
            prev_r[d][jdx] = delta
            # the bracket: a point heating above one seen cooling (or cooling below one seen
            # heating) belongs to another crossing, or the other die moved the curve: that
            # side starts afresh
            heating, cooling = delta > 0.0, delta < 0.0
            low, high = lo[d][jdx], hi[d][jdx]
            high = np.where(heating & (t_now >= high), np.nan, high)
            low = np.where(cooling & (t_now <= low), np.nan, low)
            low = np.where(heating, np.fmax(low, t_now), low)
            high = np.where(cooling, np.fmin(high, t_now), high)
            # with two dice a point's residual moves with the other die's temperature, so an
            # old bracket can shut the fixed point out: one that has shrunk to a thousandth
            # of ``settle`` around a residual still above a fifth of ``settle`` holds no
            # crossing (at the steepest slope seen, F' of -25, a crossing inside leaves an
            # eighth of that; a driver die's residual of 0.046 K in a stale bracket left its
            # output 1.1 K off, so the bracket must go before the residual passes as settled)
            stale = (high - low < 1e-3 * settle) & (np.abs(delta) > 0.2 * settle)
            low, high = np.where(stale, np.nan, low), np.where(stale, np.nan, high)
            lo[d][jdx], hi[d][jdx] = low, high
            closed = np.isfinite(low) & np.isfinite(high)
            step = np.where(closed & ~((step > low) & (step < high)), 0.5 * (low + high), step)
            top = cap[d][jdx]
            hot[d] = pinned[d][jdx] | (heating & (t_now >= top))
            new[d] = np.minimum(step, top)
            spread[d][jdx] = np.abs(delta) * factor
        for d, carrier in shared.items():  # one die runs away whole
            hot[d] = hot[carrier] = hot[d] | hot[carrier]
        # a device first found heating at its cap may yet have a stable point below it that
        # its first steps jumped (a residual dipping below zero on the way up and rising
        # again short of the cap): one scan each, before it is called a runaway
        fresh = {d: hot[d] & ~pinned[d][jdx] & ~scanned[d][jdx] for d in names}
        look = np.zeros(jdx.size, dtype=bool)
        for d in names:
            look |= fresh[d]
        if look.any():
            scan_below_cap(jdx, np.flatnonzero(look), fresh,
                           {d: temps[d][jdx] for d in names}, hot, new)
            for d, carrier in shared.items():
                hot[d] = hot[carrier] = hot[d] | hot[carrier]
        any_hot = np.zeros(jdx.size, dtype=bool)
        every_hot = np.ones(jdx.size, dtype=bool)
        for d in names:
            # a device that ran away is held at its limit (where the stage evaluates its
            # other metrics); the others go on with their loops
            pinned[d][jdx] = hot[d]
            temps[d][jdx] = np.where(hot[d], hold[d][jdx], new[d])
            any_hot |= hot[d]
            every_hot &= hot[d]
            distance = np.maximum(distance, np.where(hot[d], 0.0, spread[d][jdx]))
        done = every_hot | (distance < settle)
        runaway[jdx] |= any_hot & done
        settled[jdx] |= ~any_hot & done
    # a sample whose last trial did not solve ends as one that gave up would
    stuck = pending & ~(settled | runaway | failed)
    failed |= stuck & ~seen_hot(slice(None))
    runaway |= ~settled & ~failed
    # a device keeps its temperature where the sample settled, or where the sample ran away
    # but the device itself was not at its cap and had settled on its own loop
    ran = {d: runaway & (pinned[d] | ~(spread[d] < settle)) for d in names}
    for d, carrier in shared.items():
        ran[d] = ran[carrier] = ran[d] | ran[carrier]
    out = {d: np.where(ran[d] | failed, np.nan, t) for d, t in temps.items()}
    return FixedPointResult(out, ~runaway & ~failed, iterations, failed, ran)
