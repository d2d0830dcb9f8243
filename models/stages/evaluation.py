"""What every stage does after its DC solution: the electro-thermal loop, losses averaged
over the PWM period, junction temperatures, ratings and the hot spot.

Flow of :func:`evaluate_stage` for a chunk:

1. **Electro-thermal fixed point** (``[thermal] self_heating = true``, the default): the
   stage's on- and off-states are solved at trial junction temperatures; each device's
   junction peaks in the PWM cycle's periodic steady state at T_j = T_a + theta_JA P_peak,
   P_peak = P_off + w (P_on - P_off) (+ f (E_on + E_off) when the switching transient is
   evaluated), w the duty weighted by the part's two-stage Foster network
   (:func:`tolerance.models.thermal.peak_weight`: D where the period is far shorter than the
   thermal time constants, the period-average rise; 1 where the on-time outlasts them), until
   no junction moves by more than 0.05 K (:func:`tolerance.models.thermal.electrothermal`);
   both states are solved at that peak temperature (the conservative side). A monolithic
   Darlington's two dies share one junction. With a static drive (no PWM frequency) the
   off-state is solved at the ambient: a unit that is switched off has cooled down. Each solve
   starts from the sample's own earlier solution of the same state, its junctions carried to
   the new temperatures, when no junction has moved by more than :data:`WARM_START_KELVIN`
   since (the final solve of step 3 too).
2. **Switching transient** (``[switching] enabled``; default on with a PWM drive or a coil
   load): turn-on and turn-off of every sample at the settled temperatures
   (:func:`tolerance.models.switching.switching_metrics`); with a PWM drive the switching
   energies f (E_on + E_off) join the losses and the loop settles again.
3. **Full DC solution** at the settled temperatures (saturation, threshold, leakage).
4. **Ratings**: junction temperature against T_j max less the study's margin, dissipation
   against P_tot derated linearly from 25 degC to T_j max, resistor dissipation against its
   derating curve (full power to the rated ambient, zero at the maximum element temperature,
   MIL-PRF-39017 / IEC 60115-1 practice), the off-state collector voltage (or the transient's
   peak) against V_(BR)CEO, the peak collector current (a lamp's cold inrush as far as the
   stage can carry it) against I_C max.

A sample whose loop settles nowhere below its cap (T_j max + 100 K: still heating there after
a scan of the residual between the ambient and the cap found no stable crossing, or a loop
that does not settle) has ``thermal_runaway = 1`` and a NaN junction temperature for the
device that ran away (a device on its own thermal path that settled keeps its own); its other
metrics are evaluated with that junction at T_j max. A sample that settles above T_j max is
not a runaway: it fails the T_j max criteria with its settled temperatures.
Resistors are taken at the ambient temperature (their own self-heating is not modelled in
their values). Their ratings, and a resistive load's, are judged under a PWM drive on the
steady dissipation that gives the cycle's peak element temperature through one Foster stage
with the part's thermal time constant (P_off + w (P_on - P_off), w as the transistors'), the
period's average where the period is far below it, the on-state's where each on-time
outlasts it; ``power_<R>`` and ``load_power`` stay the period's average.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from tolerance.models import thermal
from tolerance.models.datasheet import RATING_TEMPERATURE
from tolerance.protocol import Criterion, MetricInfo

#: a DC solve starts from the sample's earlier solution, its forward-biased junctions carried
#: to the new temperatures at constant transport current
#: (:meth:`tolerance.models.transistor.TransistorParameters.carry_junctions`), when no
#: junction has moved by more than this since [K]; a sample that moved further tries the
#: circuit's guesses first. Before the carry the limit was 20 K, since a junction held at its
#: old voltage 20 K hotter carries about four times its current; with it, 100 K lets the
#: loop's first step (ambient to the first estimate, tens of kelvin) start from the ambient
#: solution too: 5 to 8 % fewer Newton iterations on the lamp, heater and Sziklai studies,
#: metrics equal to 2e-10 (common practice, no source: a bound on how far a Newton start is
#: carried over)
WARM_START_KELVIN = 100.0

#: reference temperature of a transistor's total power rating P_tot [K]
POWER_RATING_AMBIENT = RATING_TEMPERATURE


class ThermalSetup:
    """Thermal network and ratings of a stage (picklable).

    Attributes
    ----------
    theta : dict
        Thermal resistance junction to ambient per device [K/W].
    tj_max, power_rating, breakdown, ic_max : dict
        Ratings per device [K], [W], [V], [A].
    shared : dict
        Devices sharing a junction (monolithic pair): name -> carrier.
    roles : dict
        Device -> role in metric names (``driver``, ``output``).
    margin : float
        Required distance below T_j max [K].
    self_heating : bool
        Whether the electro-thermal loop runs.
    """

    #: parts (and ``"load"``) whose thermal time constants the study states
    given_constants: frozenset = frozenset()

    def __init__(self, theta, tj_max, power_rating, breakdown, ic_max, shared, roles, margin,
                 self_heating, pulse_energy=None, case_theta=None, network=None,
                 frequency=None, duty=1.0, resistor_time_constants=None,
                 load_time_constant=None):
        self.theta = theta
        self.tj_max = tj_max
        self.power_rating = power_rating
        self.breakdown = breakdown
        self.ic_max = ic_max
        self.shared = shared
        self.roles = roles
        self.margin = margin
        self.self_heating = self_heating
        self.pulse_energy = dict(pulse_energy or {})
        #: junction-to-case resistance of each part on a heatsink, whose rating is then
        #: referred to its case (read_thermal)
        self.case_theta: dict[str, float] = dict(case_theta or {})
        #: each part's two-stage Foster network ((R, tau), ...) [K/W], [s] (read_thermal)
        self.network: dict[str, tuple] = dict(network or {})
        #: each part's (w_on, w_off): the share of P_on - P_off (P_off - P_on) its junction
        #: carries at the peak of the PWM cycle (thermal.peak_weight; (1, 0) static)
        self.weights: dict[str, tuple[float, float]] = {}
        for name in theta:
            net = self.network.get(name, ((theta[name], 1.0),))
            self.weights[name] = (thermal.peak_weight(net, frequency, duty),
                                  thermal.peak_weight(net, frequency, 1.0 - duty))
        #: each resistor's and a rated resistive load's thermal time constant [s] and their
        #: (w_on, w_off) of one Foster stage, for their ratings (read_thermal)
        self.resistor_time_constants: dict[str, float] = dict(resistor_time_constants or {})
        self.resistor_weights = {name: thermal.single_pole_weights(tau, frequency, duty)
                                 for name, tau in self.resistor_time_constants.items()}
        self.load_time_constant = load_time_constant
        self.load_weights = (None if load_time_constant is None else
                             thermal.single_pole_weights(load_time_constant, frequency, duty))
        self.frequency, self.duty = frequency, duty

    def rating_excess(self, weights) -> float:
        """As :meth:`peak_excess` for a resistor's or the load's (w_on, w_off)."""
        if self.frequency is None:
            return 0.0
        return weights[0] / self.duty - 1.0

    def peak_excess(self, name) -> float:
        """How far the part's peak rise exceeds its period-average rise at P_off = 0, as a
        share of the average: w_on / D - 1 (0 for a static drive, and about 0 where the
        period is far shorter than the part's thermal time constants)."""
        if self.frequency is None:
            return 0.0
        return self.weights[self.shared.get(name, name)][0] / self.duty - 1.0


def read_thermal(reader, parts_reader, stage, roles: dict[str, str],
                 shared: dict[str, str] | None = None) -> None:
    """Read ``[thermal]`` and each transistor's heatsink; add thermal metrics and ratings.

    Keys: ``[thermal] self_heating`` (default true), ``tj_margin`` [K] (default 0);
    ``[parts.Qn] heatsink`` [K/W] (sink to ambient, in parallel with the package's own path
    to the air, see :func:`models.thermal.heatsink_resistance`; absent: free air with the
    part's ``theta_ja``) and ``case_to_sink`` [K/W] (default 0.5 K/W with a heatsink, a greased
    insulating washer, typical value from memory); ``pulse_energy`` [J], the single-pulse
    energy the part may absorb (from its safe-operating-area or single-pulse figure), which
    becomes a rating on a lamp's ``inrush_energy``; ``thermal_time_constant`` [s], the
    package stage's thermal time constant (junction heat reaching the ambient, or the sink's
    own with a heatsink), and ``die_time_constant`` [s], the die stage's (theta_jc), of the
    part's two-stage Foster network (defaults by package class,
    :data:`models.thermal.PACKAGE_TIME_CONSTANTS`); a monolithic pair's are given on
    [parts.Q2], its package's. ``[parts.R..] thermal_time_constant`` [s] is a resistor's
    (default :data:`models.thermal.RESISTOR_TIME_CONSTANT`), for its rating under a PWM
    drive; a rated resistive load's is its ``[load] thermal_time_constant``.
    """
    table = reader.table("thermal")
    self_heating = table.boolean("self_heating", default=True)
    margin = table.quantity("tj_margin", "K", default=0.0, minimum=0.0, maximum=100.0)
    theta, tj_max, rating, breakdown, ic_max, pulse_energy = {}, {}, {}, {}, {}, {}
    case_theta: dict[str, float] = {}
    network = {}
    for name, part in stage.transistors().items():
        ds = part.device.datasheet
        t = parts_reader.table(name)
        constants = _time_constants(t, part, name in (shared or {}))
        sink = t.optional_quantity("heatsink", "K/W", positive=True)
        if sink is not None:
            if ds.theta_jc is None:
                raise t.error("heatsink", "needs the part's theta_jc (junction to case)")
            cs = t.quantity("case_to_sink", "K/W", default=0.5, minimum=0.0)
            theta[name] = float(thermal.heatsink_resistance(ds.theta_jc, cs, sink, ds.theta_ja))
            case_theta[name] = float(ds.theta_jc)
        else:
            if t.has("case_to_sink"):
                raise t.error("case_to_sink", "only applies with a heatsink")
            theta[name] = float(ds.theta_ja)
        network[name] = thermal.foster_network(theta[name], ds.theta_jc, *constants)
        pulse = t.optional_quantity("pulse_energy", "J", positive=True)
        if pulse is not None:
            # accepted and ignored elsewhere before: say where it acts
            if roles.get(name) != "output" or stage.load.kind != "lamp":
                raise t.error("pulse_energy", "rates the output transistor against a lamp's "
                                              "inrush energy; this stage has no such check "
                                              "for this part")
            pulse_energy[name] = pulse
        tj_max[name] = float(ds.tj_max)
        rise = max(float(ds.tj_max) - POWER_RATING_AMBIENT, 0.0)
        # a P_tot is a thermal figure: at its 25 degC reference it may not take the junction
        # beyond T_j max through the part's path (T_j = T_a + theta P, JESD51-1/-2), so the
        # rating used is the lower of the stated one and rise / theta. In free air a case
        # rating entered as power_rating (a TO-220's 65 W against its 2 W in free air) or a
        # study's higher theta_ja no longer leaves the derated P_tot lenient.
        if name in case_theta:
            # on a heatsink the free-air P_tot does not apply: the rating is the case
            # rating (power_rating_case, and (T_j max - 25 degC) / theta_jc), derated on the
            # case temperature (datasheet practice for a mounted part; a 1.25 W free-air
            # rating on a 5 K/W sink failed parts running at 53 degC)
            stated = ds.power_rating_case if ds.power_rating_case is not None else np.inf
            rating[name] = min(float(stated), rise / case_theta[name])
        else:
            rating[name] = min(float(ds.power_rating), rise / float(ds.theta_ja))
        breakdown[name] = float(ds.breakdown_vceo)
        ic_max[name] = float(ds.ic_max)
    for name, carrier in (shared or {}).items():
        network[name] = network[carrier]  # one die, one package: the output's network
    # whose time constants the study states (the notes call the others the defaults)
    given = {name for name in stage.transistors()
             if any(parts_reader.table((shared or {}).get(name, name)).has(k)
                    for k in ("thermal_time_constant", "die_time_constant"))}
    given |= {name for name, r in stage.resistors().items()
              if r.present and parts_reader.table(name).has("thermal_time_constant")}
    if reader.table("load").has("thermal_time_constant"):
        given.add("load")
    # a resistor's rating, and a resistive load's, is thermal too: under a PWM drive each is
    # judged on the peak of its element's temperature, one Foster stage with its own time
    # constant ([parts.R..] thermal_time_constant, [load] thermal_time_constant)
    resistor_tau = {name: parts_reader.table(name).quantity(
                        "thermal_time_constant", "s", default=thermal.RESISTOR_TIME_CONSTANT,
                        positive=True, maximum=1e5)
                    for name, r in stage.resistors().items() if r.present}
    load_tau = (getattr(stage.load, "thermal_time_constant", None)
                if stage.load.kind == "resistor"
                and getattr(stage.load, "power_rating", None) is not None else None)
    setup = ThermalSetup(theta, tj_max, rating, breakdown, ic_max, dict(shared or {}), roles,
                         margin, self_heating, pulse_energy, case_theta, network,
                         stage.drive.frequency, stage.drive.duty if stage.drive.pwm else 1.0,
                         resistor_tau, load_tau)
    setup.given_constants = given
    stage.thermal = setup
    _add_metrics_and_ratings(stage, setup)


def package_of(part) -> str | None:
    """The package class of a transistor from the part library (``package`` of its entry;
    a monolithic pair's die: its pair's), or None for the study's own figures."""
    from tolerance.models.parts import library

    cls = (part.device_class or "").split(",")[0].strip()
    entry = library().get(cls)
    return entry.package if entry is not None and entry.package else None


def _time_constants(t, part, shared: bool) -> tuple[float, float]:
    """(die, package) thermal time constants [s] of a part: its table's
    ``die_time_constant`` and ``thermal_time_constant``, else its package class's."""
    if shared:
        for key in ("thermal_time_constant", "die_time_constant"):
            if t.has(key):
                raise t.error(key, "a monolithic Darlington is one package: give its thermal "
                                   "time constants on [parts.Q2]")
    package = package_of(part)
    die, pkg = thermal.PACKAGE_TIME_CONSTANTS.get(package,
                                                  thermal.UNKNOWN_PACKAGE_TIME_CONSTANTS)
    pkg = t.quantity("thermal_time_constant", "s", default=pkg, positive=True, maximum=1e5)
    die = t.quantity("die_time_constant", "s", default=min(die, pkg), positive=True,
                     maximum=1e5)
    if die > pkg:
        raise t.error("die_time_constant", f"{die:g} s must not exceed the package's thermal "
                                           f"time constant ({pkg:g} s): the die stage is "
                                           "the fast one")
    return die, pkg


def _add_metrics_and_ratings(stage, setup: ThermalSetup) -> None:
    m, crit = stage.metrics, stage.criteria
    # the PWM wording only where the drive switches (a static stage's plots label their axes
    # with these texts, cut at 60 characters)
    pwm = bool(getattr(getattr(stage, "drive", None), "pwm", False))
    for dev, role in setup.roles.items():
        m[f"power_{role}"] = MetricInfo("W", f"dissipation of {dev} ({role})"
                                             + (" averaged over the period" if pwm else "")
                                             + ", at its junction temperature")
        m[f"tj_{role}"] = MetricInfo("temperature", f"junction temperature of {dev} ({role})"
                                                    + (": the peak of the PWM cycle" if pwm
                                                       else ""))
        whose = (f"{dev} (of the die it shares)"
                 if dev in setup.shared or dev in setup.shared.values() else dev)
        m[f"power_stress_{role}"] = MetricInfo("1", f"dissipation of {whose} over its P_tot "
                                                    "derated to the ambient (on a heatsink: "
                                                    "its case rating, to the case)"
                                                    + ("; with a PWM drive the steady "
                                                       "dissipation that gives the cycle's "
                                                       "peak junction rise" if pwm else ""))
        limit = setup.tj_max[dev] - setup.margin
        crit.append(Criterion(f"tj_max_{role}", f"tj_{role}", maximum=limit, source="rating",
                              description=f"{dev} junction below T_j max"
                              + (f" less {setup.margin:g} K" if setup.margin else "")))
        crit.append(Criterion(f"power_rating_{role}", f"power_stress_{role}", maximum=1.0,
                              source="rating", description=f"{dev} within derated P_tot"))
    for name, r in stage.resistors().items():
        if not r.present:
            continue
        m[f"power_{name}"] = MetricInfo("W", f"dissipation of {name} averaged over the period")
        m[f"resistor_stress_{name}"] = MetricInfo("1", f"dissipation of {name} over its "
                                                       "derated power rating"
                                                       + ("; with a PWM drive the steady "
                                                          "dissipation that gives the "
                                                          "cycle's peak element temperature "
                                                          "(one thermal time constant)"
                                                          if pwm else ""))
        crit.append(Criterion(f"resistor_{name}", f"resistor_stress_{name}", maximum=1.0,
                              source="rating", description=f"{name} within its derated rating"))
    if pwm and setup.load_weights is not None:
        # the load's rating, like the resistors', on the cycle's peak (the period's average,
        # load_power, passed a heater on 25 s of every 100 s that fails it when static)
        m["load_power_peak"] = MetricInfo("W", "resistive load: the steady dissipation that "
                                               "gives its peak temperature in the PWM cycle "
                                               "(one thermal time constant), what load_rating "
                                               "judges")
        for k, c in enumerate(crit):
            if c.name == "load_rating" and c.metric == "load_power":
                crit[k] = dataclasses.replace(c, metric="load_power_peak",
                                              description="load within its power rating at "
                                                          "the PWM cycle's peak")
    names = ", ".join(f"{k}={p}" for k, p in enumerate(hot_spot_parts(stage)))
    m["hot_spot"] = MetricInfo("1", f"part closest to its limit ({names})", index=True)
    m["hot_spot_margin"] = MetricInfo("1", "1 minus the largest stress of any part (junction "
                                           "rise over allowed rise, power over derated "
                                           "rating); below 0 something is overstressed")
    m["thermal_runaway"] = MetricInfo("1", "1 when the electro-thermal loop settles nowhere "
                                           "below its cap, T_j max + 100 K (a unit still "
                                           "heating there, where a scan between the ambient "
                                           "and the cap found no stable crossing, or a loop "
                                           "that does not settle); a unit that settles above "
                                           "T_j max fails the T_j max criteria instead")
    m["vce_peak"] = MetricInfo("V", "highest collector-emitter voltage of the output (off-state "
                                    "or transient; a coil with the transient off: V_S + V_clamp, "
                                    "infinite without a clamp)")
    m["peak_current"] = MetricInfo("A", "highest collector current the output carries (a "
                                        "lamp's inrush as far as the drive allows, never "
                                        "below the on-state's current)")
    crit.append(Criterion("thermal_runaway", "thermal_runaway", maximum=0.0, source="rating",
                          description="the electro-thermal loop settles below its cap"))
    out = output_device(stage)
    # the lowest V_(BR)CEO of the parts across the switch (a Darlington's driver sees the
    # output's collector too), named for the part that sets it (it named the output always)
    weakest = min(setup.breakdown, key=setup.breakdown.get)
    crit.append(Criterion("breakdown", "vce_peak", maximum=setup.breakdown[weakest],
                          source="rating", description=f"below V_(BR)CEO of {weakest}"))
    crit.append(Criterion("collector_current", "peak_current", maximum=setup.ic_max[out],
                          source="rating", description=f"within I_C max of {out}"))
    # a discrete driver's own I_C max (a monolithic pair's driver has no rating of its own:
    # the package's is the output's)
    driver = [d for d, role in setup.roles.items()
              if role == "driver" and d not in setup.shared]
    if driver:
        m["peak_current_driver"] = MetricInfo("A", "highest collector current the driver "
                                                   "carries: the output's base current and "
                                                   "RBE2's (with a lamp, at the peak of the "
                                                   "cold filament's inrush)")
        crit.append(Criterion("collector_current_driver", "peak_current_driver",
                              maximum=setup.ic_max[driver[0]], source="rating",
                              description=f"within I_C max of {driver[0]}"))
    if stage.load.kind == "lamp":
        m["inrush_energy"] = MetricInfo("J", "energy the output absorbs while it limits the "
                                             "cold filament's current")
        m["inrush_time"] = MetricInfo("s", "how long the output limits the cold filament's "
                                           "current, the pulse width of inrush_energy (a "
                                           "single-pulse rating holds for its own width)")
        m["inrush_margin"] = MetricInfo("1", "current the stage can carry at the edge of "
                                             "saturation over the cold filament's demand")
        m["tj_inrush"] = MetricInfo("temperature", f"junction temperature of {out} at the "
                                                   "peak of a cold lamp's inrush, from the "
                                                   "ambient through its two-stage Foster "
                                                   "network; never below tj_"
                                                   f"{setup.roles[out]}")
        crit.append(Criterion("tj_max_inrush", "tj_inrush",
                              maximum=setup.tj_max[out] - setup.margin, source="rating",
                              description=f"{out} junction below T_j max while it limits the "
                                          "lamp's inrush"
                              + (f" less {setup.margin:g} K" if setup.margin else "")))
        pulse = setup.pulse_energy.get(out)
        if pulse is not None:
            crit.append(Criterion("pulse_energy", "inrush_energy", maximum=pulse,
                                  source="rating", description=f"within the single-pulse "
                                  f"energy of {out}"))


def inrush_driver_current(on, at_capability, on_current, capability, demand):
    """A pair's driver current at the peak of a cold lamp's inrush [A].

    Where the filament asks for at least what the output carries at the edge of saturation,
    the output limits it there and the driver gives its current of that solved state
    (``at_capability``). Where it asks for less, the output carries the demand, and the
    driver's current lies between its on-state value (``on``, at ``on_current``) and that
    edge value: interpolated linearly in the output's current between the two solved
    states (the driver feeds the output's base current, about proportional to its collector
    current, and RBE2's, nearly constant; common practice, no source). Never below ``on``.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.clip((demand - on_current) / (capability - on_current), 0.0, 1.0)
    share = np.where(demand >= capability, 1.0, np.nan_to_num(share, nan=1.0))
    return np.fmax(on, on + share * (at_capability - on))


# the 10 %/90 % times follow the switch current (the output's collector current, the load
# current less a clamp's): for a coil its clamp takes the current over at turn-off, so
# they end in nanoseconds while the winding's current decays for milliseconds
# (release_time)
SWITCHING_METRICS = {
    "turn_on_delay": "drive edge (50 %) to 10 % of the on-state switch current",
    "rise_time": "switch current 10 % to 90 %",
    "storage_time": "turn-off drive edge (50 %) to 90 % of the on-state switch current (a "
                    "coil without a clamp: the avalanche's share of the decay too)",
    "fall_time": "switch current 90 % to 10 % (a coil's clamp takes its current over; "
                 "without a clamp the coil's current decays through the switch in avalanche)",
    "turn_off_delay": "storage time plus fall time",
    "energy_on": "turn-on energy of the transistors beyond their on-state dissipation "
                 "(negative when the rise dissipates less, e.g. a coil's slow current rise)",
    "energy_off": "turn-off energy of the transistors beyond their off-state dissipation",
    "energy_on_output": "turn-on energy of the output transistor (as energy_on)",
    "energy_off_output": "turn-off energy of the output transistor (as energy_off)",
    "energy_on_driver": "turn-on energy of the driver transistor (as energy_on)",
    "energy_off_driver": "turn-off energy of the driver transistor (as energy_off)",
    "avalanche_energy": "energy the output absorbs in avalanche (unclamped inductive load)",
    "transition_fraction": "turn-on plus turn-off delay and transition times over the PWM "
                           "period",
}
METRIC_UNITS_SWITCHING = {k: ("J" if k.startswith(("energy", "avalanche")) else
                              "1" if k == "transition_fraction" else "s")
                          for k in SWITCHING_METRICS}
_CHARGE_KEYS = {
    # part-table key: (unit, charge_parameters_from_datasheet argument)
    "transition_frequency": ("Hz", "transition_frequency"),
    "transition_current": ("A", "transition_current"),
    "storage_time": ("s", "storage_time"),
    "storage_ic": ("A", "storage_ic"),
    "storage_ib_on": ("A", "storage_ib_on"),
    "storage_ib_off": ("A", "storage_ib_off"),
    "output_capacitance": ("F", "output_capacitance"),
}


#: The share of a linear drive ramp between its 10 % and 90 % points: the ramp of a study's
#: ``edge_time`` (a 10 %/90 % time, as logic datasheets give it) lasts edge_time / 0.8.
EDGE_SPAN = 0.8

#: A coil counts as released when its current has fallen to this fraction of the on-state
#: current (the 10 % of the 90 %/10 % times; relays drop out at 10 to 30 % of their rated
#: voltage, so this is the slow end; common practice, no source).
RELEASE_FRACTION = 0.1


#: The switch current at the end of the storage time, as a fraction of its on-state value
#: (the 90 % of the 90 %/10 % times)
STORAGE_FRACTION = 0.9


def release_time(storage_time, coil, current, avalanche_reverse):
    """A coil's release time [s]: the storage time, then the winding's decay to
    ``RELEASE_FRACTION`` of its on-state ``current`` [A] (closed form,
    :meth:`CoilState.decay_time`).

    A clamp takes the current over within the fall, so the winding still carries its whole
    current when the storage time ends, and decays against the clamp's voltage. Without a
    clamp, or with one whose voltage on top of the supply reaches the switch's breakdown
    (``avalanche_reverse`` [V]: V_(BR)CEO less the supply), the switch avalanches first and
    carries the winding's current itself: the decay then runs against ``avalanche_reverse``,
    and the storage time, which ends at 90 % of the switch current, already holds its first
    tenth. Counting that tenth again made an unclamped valve's release 8 % long, and a zener
    above the breakdown gave the zener's voltage to a decay it never sees.
    """
    reverse = np.asarray(avalanche_reverse, dtype=float)
    avalanche = ~(coil.clamp_voltage < reverse)  # no clamp: infinite
    reverse = np.where(avalanche, reverse, coil.clamp_voltage)
    start = np.where(avalanche, STORAGE_FRACTION, 1.0)
    i0 = np.abs(np.asarray(current, dtype=float))
    with np.errstate(invalid="ignore"):
        decay = coil.decay_time(start * i0, RELEASE_FRACTION / start, reverse)
    # a supply at or above the breakdown holds the switch in avalanche: the winding's
    # current never decays, the coil never releases
    return storage_time + np.where(reverse > 0, decay, np.inf)


class SwitchingSetup:
    """Whether and how a stage's switching transient is evaluated (picklable)."""

    def __init__(self, enabled, topology, charges, roles, options):
        self.enabled = enabled
        self.topology = topology
        self.charges = charges
        self.roles = roles
        self.options = options


def _pwm_coil(stage) -> None:
    """A coil on a PWM drive: its periodic steady state's metrics, and pull-in judged on it.

    The static on-state's ``operate_margin`` stays a metric; the default criterion
    ``coil_operates`` moves to ``pwm_operate_margin``, which never exceeds it (the mean over
    the on-time of a current that tends to the static one), so a unit that passes it also
    pulls in on a static drive."""
    stage.metrics["pwm_operate_margin"] = MetricInfo(
        "1", "mean current of the hot winding over the PWM on-time in the drive's periodic "
             "steady state, over its must-operate current: the static on-state's margin "
             "where each on-time is long against L/R, the mean current's where the period "
             "is short against it, and below the current each on-time reaches in between")
    stage.metrics["coil_current_low"] = MetricInfo(
        "A", "the hot winding's current when the switch turns on, in the PWM drive's "
             "periodic steady state: zero where it dies out in the clamp within the "
             "off-time, else the switch turns on into it")
    stage.criteria = [
        Criterion(c.name, "pwm_operate_margin", c.minimum, c.maximum, c.source,
                  "coil pulls in on the PWM drive with the hot coil")
        if c.name == "coil_operates" else c for c in stage.criteria]


def read_switching(reader, parts_reader, stage, topology: str, roles: dict[str, str],
                   classes: dict[str, str] | None = None) -> None:
    """Read ``[switching]`` and each transistor's charge-storage figures.

    ``[switching] enabled`` (default: true with a PWM drive or a coil load),
    ``relative_tolerance`` (default 5e-4). Part keys (optional; class defaults otherwise):
    ``transition_frequency`` at ``transition_current``, ``storage_time`` at ``storage_ic``,
    ``storage_ib_on``, ``storage_ib_off``, and ``output_capacitance``.
    """
    from tolerance.models.charges import CHARGE_CLASS_DEFAULTS, charge_parameters_from_datasheet

    if stage.load.kind == "coil" and stage.drive.pwm:
        _pwm_coil(stage)
    table = reader.table("switching")
    default = stage.drive.pwm or stage.load.kind == "coil"
    enabled = table.boolean("enabled", default=default)
    rtol = table.quantity("relative_tolerance", "1", default=5e-4, minimum=1e-7, maximum=0.05)
    charges = {}
    for name, part in stage.transistors().items():
        ds = part.device.datasheet
        cls = (classes or {}).get(name) or part.device_class
        if cls not in CHARGE_CLASS_DEFAULTS:
            cls = "small_signal_pnp" if ds.polarity == "pnp" else "small_signal_npn"
        base = CHARGE_CLASS_DEFAULTS[cls]
        t = parts_reader.table(name)
        given = {arg: t.quantity(key, unit, positive=True)
                 for key, (unit, arg) in _CHARGE_KEYS.items()
                 if t.has(key) and key != "storage_ib_off"}
        if t.has("storage_ib_off"):
            # datasheets state the turn-off base current as I_B1 = -I_B2 = 1 mA or as
            # I_B2 = -1 mA: either way its size, drawn out of the base (zero: an open base)
            given["storage_ib_off"] = -abs(t.quantity("storage_ib_off", "A"))
        if given:
            try:
                base = charge_parameters_from_datasheet(
                    defaults=base, forward_beta=ds.hfe_median, reverse_beta=ds.reverse_beta,
                    be_on_voltage=ds.vbe_on, **given)
            except ValueError as exc:
                # a storage-time figure that cannot hold is the storage time's; any other,
                # the transition frequency's
                about = ("storage_time" if "storage" in str(exc) and t.has("storage_time")
                         else next(k for k, (_, a) in _CHARGE_KEYS.items() if a in given))
                raise t.error(about, str(exc).replace(
                    "the given forward_beta", f"the typical h_FE {ds.hfe_median:.3g}")) from None
        charges[name] = base.replace(collector_emitter_breakdown=float(ds.breakdown_vceo))
    setup = SwitchingSetup(enabled, topology, charges, roles, {"relative_tolerance": rtol})
    stage.switching = setup
    pair = len(roles) > 1
    metrics = {key: MetricInfo(METRIC_UNITS_SWITCHING[key], text)
               for key, text in SWITCHING_METRICS.items()
               if pair or not key.endswith("_driver")}
    if stage.load.kind == "coil":
        metrics["release_time"] = MetricInfo(
            "s", "turn-off drive edge (50 %) to the coil current at 10 % of its on-state "
                 "value: storage time, then the decay through the clamp (L/R with the "
                 "clamp's voltage, closed form; without a clamp, or with one above the "
                 "switch's breakdown, from 90 % against V_(BR)CEO less the supply)")
    if stage.drive.pwm:
        metrics["edge_fill"] = MetricInfo(
            "1", "the larger of the turn-on time (delay + rise) over the PWM on-time and the "
                 "turn-off time (storage + fall) over the off-time; above 1 a transition does "
                 "not complete before the next edge")
    if enabled:
        stage.metrics.update(metrics)
        if stage.drive.pwm:
            # the period's loss D P_on + (1 - D) P_off + f (E_on + E_off) and the 10 %/90 %
            # times take each transient as settled before the next edge (a coil's L/R of
            # milliseconds at 1 kHz never does: its turn-on energy beyond the on-state
            # dissipation, negative, then outweighed D P_on)
            stage.criteria.append(Criterion(
                "transitions_fit", "edge_fill", maximum=1.0, source="stage",
                description="each switching transition completes within its PWM half"))
    else:
        # a limit on one of these is refused with how to compute it (the study reader asks)
        stage.dormant_metrics = dict.fromkeys(metrics, "[switching] enabled = true")


def switching_inputs(stage, samples: dict, temps: dict, ambient: np.ndarray):
    """Positional arguments of :func:`tolerance.models.switching.simulate_switching` (and
    ``switching_metrics``) for a batch of samples.

    Devices at ``temps`` [K] with their charge parameters; resistors at the ambient, in
    parallel with any internal base-emitter resistor of a monolithic part; the drive's
    Thevenin levels with its edge time (and PWM frequency and duty); the load at the ambient.
    """
    sw: SwitchingSetup = stage.switching
    n = ambient.shape[0]
    vs = np.asarray(samples[stage.env.supply], dtype=float)
    devices = {}
    for name, part in stage.transistors().items():
        q = part.parameters(samples).at_temperature(temps[name])
        devices[sw.roles[name]] = (q, sw.charges[name].broadcast(n))
    resistors = {}
    for name, r in stage.resistors().items():
        g = r.conductance(samples, ambient)
        internal = getattr(stage, f"internal_{name.lower()}", None)
        if internal is not None:
            g = g + internal.conductance(samples, ambient)
        with np.errstate(divide="ignore"):
            resistors[name] = 1.0 / g
    high, low, r_s = stage.drive.levels(samples)
    drive = {"high": high, "low": low, "source_resistance": r_s,
             # a study's edge time is the 10 % to 90 % time a logic datasheet gives; the
             # linear ramp between the levels takes 1 / 0.8 of it
             "edge_time": np.full(n, stage.drive.edge_time / EDGE_SPAN)}
    if stage.drive.pwm:
        drive["frequency"] = np.full(n, stage.drive.frequency)
        drive["duty"] = np.full(n, stage.drive.duty)
    load_state = stage.load.at(samples, ambient, vs)
    return sw.topology, devices, resistors, drive, vs, load_state, ambient


def _switching(stage, samples, temps, ambient):
    """Switching metrics of the chunk at the device temperatures ``temps``."""
    from tolerance.models.switching import switching_metrics

    return switching_metrics(*switching_inputs(stage, samples, temps, ambient),
                             **stage.switching.options)


def output_device(stage) -> str:
    return "Q2" if "Q2" in stage.transistors() else "Q1"


def hot_spot_parts(stage) -> list[str]:
    return list(stage.transistors()) + [n for n, r in stage.resistors().items() if r.present]


def _average(on, off, duty):
    return duty * np.asarray(on) + (1.0 - duty) * np.asarray(off)


def edge_fill(times, frequency, duty):
    """The larger share of its own part of the PWM period a transition takes: (turn-on
    delay + rise time) over the on-time ``duty / frequency``, (storage + fall time) over the
    off-time. Above 1 a transient does not settle before the next edge, so the period's loss
    is not ``D P_on + (1 - D) P_off + f (E_on + E_off)`` (NaN where the times are)."""
    with np.errstate(invalid="ignore"):  # a stuck unit's infinite times give inf
        return np.maximum(
            (np.asarray(times["turn_on_delay"]) + times["rise_time"]) * frequency / duty,
            (np.asarray(times["storage_time"]) + times["fall_time"]) * frequency / (1.0 - duty))


def _peak_power(res, setup: ThermalSetup, extra=None):
    """Each device's steady dissipation that gives its junction's peak of the PWM cycle
    through its whole thermal resistance (:func:`models.thermal.peak_power` with the part's
    Foster weights; a monolithic pair's dice with their package's), plus the switching
    energies f (E_on + E_off) as in the period's average."""
    p = {}
    for d in res["power_on"]["devices"]:
        weights = setup.weights[setup.shared.get(d, d)]
        p[d] = thermal.peak_power(res["power_on"]["devices"][d], res["power_off"]["devices"][d],
                                  weights)
    if extra:
        for d, e in extra.items():
            p[d] = np.maximum(p[d] + e, 0.0)
    return p


def _device_power(res, duty, extra=None):
    p = {d: _average(res["power_on"]["devices"][d], res["power_off"]["devices"][d], duty)
         for d in res["power_on"]["devices"]}
    if extra:
        # a passive device dissipates on average no less than nothing; a negative sum means
        # the transients do not settle within the period (criterion transitions_fit)
        for d, e in extra.items():
            p[d] = np.maximum(p[d] + e, 0.0)
    return p


#: Gauss-Legendre nodes of the inrush integrals (:func:`lamp_inrush`)
INRUSH_NODES = 64

#: Tungsten's resistance grows as T^1.2 between room temperature and incandescence (from
#: memory), which sets how the filament's stored heat grows with its resistance
TUNGSTEN_RESISTANCE_POWER = 1.2

#: The share of its resistance rise a filament switched onto its voltage has made after one
#: thermal time constant (1 - 1/e, what "time constant" means)
WARM_UP_SHARE = 1.0 - np.exp(-1.0)


def _gauss(a, b):
    """Gauss-Legendre nodes and weights on [a, b] (arrays, one interval per sample)."""
    x, w = np.polynomial.legendre.leggauss(INRUSH_NODES)
    half = 0.5 * (np.asarray(b) - np.asarray(a))[..., None]
    return np.asarray(a)[..., None] + half * (x + 1.0), half * w


def _filament(load_state, supply, capability, lamp_voltage, lamp_current):
    """The filament's figures of :func:`lamp_inrush` per sample, in units of its operating
    resistance R_f = V_L / I_L: which units the output limits (``limited``) and which never
    saturate (``never``), the cold resistance ``rc`` and the end of the limiting ``r1``
    (outside the limited units fixed values 0.5 and 0.75 that keep the integrals finite;
    np.where drops their sums), the exponents ``m`` and ``lift``, the heating factor ``k``
    and the time scale ``theta`` fixed by the free-running warm-up to WARM_UP_SHARE of the
    rise."""
    from types import SimpleNamespace

    f = SimpleNamespace(
        r_cold=np.asarray(load_state.cold_resistance, dtype=float),
        tau=np.asarray(load_state.thermal_time_constant, dtype=float),
        p=np.asarray(load_state.exponent, dtype=float),
        i=np.asarray(capability, dtype=float), vs=np.asarray(supply, dtype=float),
        v_lamp=np.asarray(lamp_voltage, dtype=float),
        i_lamp=np.asarray(lamp_current, dtype=float),
        lift=1.0 - 1.0 / TUNGSTEN_RESISTANCE_POWER)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        f.r_final = f.v_lamp / f.i_lamp
        r_end = f.v_lamp / f.i
        f.limited = (r_end > f.r_cold) & (r_end < f.r_final) & (f.i > 0)
        f.never = (r_end >= f.r_final) & (f.i > 0)
        f.m = ((1.0 + f.p) / (1.0 - f.p)) * np.ones_like(f.r_final)
        f.rc = np.where(f.limited, f.r_cold / f.r_final, 0.5)
        f.r1 = np.where(f.limited, r_end / f.r_final, 0.75)
        r, w = _gauss(f.rc, f.rc + WARM_UP_SHARE * (1.0 - f.rc))
        f.theta = f.tau / np.sum(w / (r ** f.lift * (1.0 / r - r ** f.m[..., None])), axis=-1)
        f.k = f.i * f.i * f.r_final / (f.v_lamp * f.i_lamp)
    return f


def lamp_inrush(load_state, supply, capability, lamp_voltage, lamp_current):
    """Energy the output absorbs while it limits a cold filament's current [J], and for how
    long it limits it [s].

    While the cold filament asks for more than the stage can carry (``capability``, the
    collector current at the edge of saturation), the output runs in its linear region at that
    current I and V_CE = V_S - I R(t). The output saturates again when the lamp takes its
    operating voltage, I R(t1) = V_L (V_CE down to the on-voltage, a Darlington's volt or two,
    not zero); the filament heads for its resistance at the stage's operating point, R_f =
    ``lamp_voltage`` / ``lamp_current`` (the on state: not the rated voltage's R_hot, since
    the lamp sees the supply less the stage's on-voltage).

    The filament's energy balance (common practice, no source), its heat C T with R ~ T^g
    (g = ``TUNGSTEN_RESISTANCE_POWER``), so with r = R / R_f

        dr/dt = r^(1 - 1/g) (P_in / P_f - r^m) / theta,

    the loss from the lamp's own hot law (I ~ V^p, R ~ V^(1-p)): P_loss = P_f r^m with m =
    (1 + p) / (1 - p) and P_f = V_L I_L, exact at the operating point. Switched onto V_L
    (P_in = P_f / r) the filament makes ``WARM_UP_SHARE`` of its resistance rise in one
    thermal time constant tau: that fixes theta = tau / Int dr / (r^(1 - 1/g) (1/r - r^m))
    from r_c = R_cold / R_f. Held at I (P_in = I^2 R_f r, i.e. k r with k = I^2 R_f / P_f)
    it takes

        t1 = theta Int_r_c^r_1 dr / (r^(1 - 1/g) (k r - r^m)),  r_1 = V_L / (I R_f),

    and the output absorbs E = I Int (V_S - I R_f r) dt over it; t1 and each integral by
    Gauss-Legendre quadrature (``INRUSH_NODES`` nodes; scipy.integrate.quad agrees,
    tests/test_stages.py). An earlier estimate let the filament warm at its free-running
    rate whatever current the stage let through: at a current held to a tenth of the
    inrush it read 1.2 J where the filament, heated by I^2 R alone, takes a third of a
    second and some 10 J. Zero when the stage carries the whole inrush (the transistor stays
    saturated); infinite when it cannot carry even the operating current (it never leaves
    the linear region).
    """
    f = _filament(load_state, supply, capability, lamp_voltage, lamp_current)
    limited, never, i, m = f.limited, f.never, f.i, f.m
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        r, w = _gauss(f.rc, f.r1)
        dt = w * f.theta[..., None] / (r ** f.lift * (f.k[..., None] * r - r ** m[..., None]))
        e = i * np.sum((f.vs[..., None] - i[..., None] * f.r_final[..., None] * r) * dt,
                       axis=-1)
        t1 = np.sum(dt, axis=-1)
    return (np.where(limited, e, np.where(never, np.inf, 0.0)),
            np.where(limited, t1, np.where(never, np.inf, 0.0)))


#: panels (in the filament's resistance, each by 4-point Gauss-Legendre) over which the
#: junction's response to the inrush is stepped: 128 agree with 1,024 to 0.003 K on 400 of
#: the beacon study's units (rises of 16 to 67 K), and with 8,192 to 2e-4 where a 2 ms die
#: peaks inside the first panel (tests/test_stages.py, against scipy's solve_ivp)
INRUSH_PANELS = 128


def lamp_inrush_rise(load_state, supply, capability, lamp_voltage, lamp_current, network):
    """Highest rise of the output's junction above its starting temperature while it limits
    a cold filament's current [K] (0 where it does not limit, NaN where it never stops).

    The dissipation's time course is :func:`lamp_inrush`'s, P = I (V_S - I R_f r(t)),
    falling as the filament warms; the junction follows the part's two-stage Foster network
    ((R_die, tau_die), (R_package, tau_package), :func:`models.thermal.foster_network`),
    Z_th(t) = sum R_i (1 - exp(-t / tau_i)) for a step of power (the Foster network's
    transient thermal impedance, JEDEC JESD51-14, as in :mod:`models.thermal`, whose
    first-order stages respond to any power by superposition). The limiting is cut into
    panels of the filament's resistance; over each, of width dt (Gauss-Legendre), the power is taken as
    linear in time between its exact values at the ends, P_0 to P_1 with slope s, to which
    each stage responds exactly: T_i <- T_i a + R_i (P_1 - s tau_i - (P_0 - s tau_i) a),
    a = e^(-dt/tau_i). The peak is the largest sum at a panel's end or at a stage's own
    turning point inside a panel (a fast die catches up with the falling power within the
    first panel and then falls with it)."""
    f = _filament(load_state, supply, capability, lamp_voltage, lamp_current)
    limited, never, rc, r1, i, vs = f.limited, f.never, f.rc, f.r1, f.i, f.vs
    r_final, theta, k, m, lift = f.r_final, f.theta, f.k, f.m, f.lift
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        x, wx = np.polynomial.legendre.leggauss(4)
        edges = rc[..., None] + (r1 - rc)[..., None] * np.linspace(0.0, 1.0, INRUSH_PANELS + 1)
        half = 0.5 * np.diff(edges, axis=-1)[..., None]              # (..., panels, 1)
        r = edges[..., :-1, None] + half * (x + 1.0)                  # (..., panels, 4)
        dt = half * wx * theta[..., None, None] / (
            r ** lift * (k[..., None, None] * r - r ** m[..., None, None]))
        dt = np.sum(dt, axis=-1)                                      # (..., panels)
        # the power at the panels' ends, exact (linear in r), taken as linear in time
        # across each panel: every stage's response to it is then exact
        power = i[..., None] * (vs[..., None] - i[..., None] * r_final[..., None] * edges)
        slope = np.where(dt > 0, np.diff(power, axis=-1) / dt, 0.0)
        rises = [np.zeros(np.shape(r_final)) for _ in network]
        peak = np.zeros(np.shape(r_final))

        def after(x, j):
            """Each stage's rise a time x into panel j (x from 0 to dt)."""
            out = []
            for rise, (r_th, tau_th) in zip(rises, network):
                decay = np.exp(-x / tau_th)
                lag = slope[..., j] * tau_th
                out.append(rise * decay + r_th * (power[..., j] + slope[..., j] * x - lag
                                                  - (power[..., j] - lag) * decay))
            return out

        for j in range(INRUSH_PANELS):
            # a fast stage that has caught up with the falling power peaks inside a panel
            # (a die of 2 ms within a panel of 20 ms): each stage's own turning point,
            # R s + a (R (P_0 - s tau) - T_0) / tau = 0, is a candidate for the sum's
            for rise, (r_th, tau_th) in zip(rises, network):
                lag = slope[..., j] * tau_th
                a_star = -r_th * lag / (r_th * (power[..., j] - lag) - rise)
                inside = (a_star > 0) & (a_star < 1)
                x = np.where(inside, -tau_th * np.log(np.where(inside, a_star, 1.0)), 0.0)
                x = np.minimum(x, dt[..., j])
                peak = np.maximum(peak, sum(after(x, j)))
            rises = after(dt[..., j], j)
            peak = np.maximum(peak, sum(rises))
    return np.where(limited, peak, np.where(never, np.nan, 0.0))


def evaluate_stage(stage, samples, capture=None):
    """All metrics of a chunk: see the module docstring.

    ``capture``, a dict, receives under ``"switching_temperatures"`` the device junction
    temperatures [K] the switching transient was run at (``{device: (S,) array}``), for
    :func:`tolerance.models.waveforms.record_waveforms` to re-simulate a sample's transient
    exactly as its metrics saw it."""
    setup: ThermalSetup = stage.thermal
    ambient = np.asarray(samples[stage.env.temperature], dtype=float)
    n = ambient.shape[0]
    duty = stage.drive.duty if stage.drive.pwm else 1.0
    devices = list(setup.theta)
    static = not stage.drive.pwm

    def off_temps(temps):
        return {d: ambient for d in devices} if static else temps

    switching_power = None
    temps = {d: ambient.copy() for d in devices}
    settled = np.ones(n, dtype=bool)

    from tolerance.models.stages import device_parameters, take_parameters

    params = device_parameters(stage, samples)
    # every sample's latest on- and off-state solution and the junction temperatures it was
    # solved at: a solve at temperatures within WARM_START_KELVIN of those starts from it
    solved: dict[str, np.ndarray] = {}
    solved_at: dict[str, dict[str, np.ndarray]] = {}

    def warm_start(temps_by_state, idx, sub_params):
        """The earlier solutions of samples ``idx``, their junctions carried to the
        temperatures ``{state: {device: T}}`` of this solve, and which of them are close
        enough to start from (:func:`tolerance.models.stages.warm_guesses`)."""
        start = {}
        for key, x in solved.items():
            moved = np.zeros(idx.size)
            now = {}
            for d in devices:
                now[d] = np.broadcast_to(np.asarray(temps_by_state[key][d], dtype=float),
                                         idx.shape)
                moved = np.maximum(moved, np.abs(now[d] - solved_at[key][d][idx]))
            x_start = x[idx].copy()
            for k, d in enumerate(stage.junction_devices):
                with np.errstate(invalid="ignore"):  # never solved: NaN stays NaN
                    x_start[:, 2 * k], x_start[:, 2 * k + 1] = sub_params[d].carry_junctions(
                        x_start[:, 2 * k], x_start[:, 2 * k + 1], solved_at[key][d][idx],
                        now[d])
            start[key] = (x_start, moved <= WARM_START_KELVIN)  # never solved: not near
        return start

    def keep(res, temps_by_state, idx):
        # a sample solved at several temperatures in one call (the loop's scan below its
        # cap) keeps its first solution with that solution's temperatures
        idx, rows = np.unique(idx, return_index=True)
        for key in ("on", "off"):
            x = res[f"x_{key}"]
            if key not in solved:
                solved[key] = np.full((n, x.shape[1]), np.nan)
                solved_at[key] = {d: np.full(n, np.nan) for d in devices}
            solved[key][idx] = x[rows]
            for d in devices:
                solved_at[key][d][idx] = np.asarray(temps_by_state[key][d], dtype=float)[rows]

    def settle():
        def power_at(t, idx):
            sub = {k: np.asarray(v)[idx] for k, v in samples.items()}
            t_off = {d: ambient[idx] for d in devices} if static else t
            at = {"on": t, "off": t_off}
            sub_params = take_parameters(params, idx, n)
            res = stage.dc(sub, t, t_off, full=False, params=sub_params,
                           start=warm_start(at, idx, sub_params))
            keep(res, at, idx)
            extra = None if switching_power is None else {
                d: e[idx] for d, e in switching_power.items()}
            p = _peak_power(res, setup, extra)
            ok = res["converged"]
            return {d: np.where(ok, p[d], np.nan) for d in devices}

        theta = {d: np.full(n, setup.theta[d]) for d in devices}
        limit = {d: np.full(n, setup.tj_max[d]) for d in devices}
        fp = thermal.electrothermal(power_at, ambient, theta, setup.shared, limit)
        return fp.settled, fp.temperatures, fp.failed

    def known(temps):
        """Each device's junction where its loop settled (a runaway's driver on its own
        die included), T_j max where it ran away."""
        return {d: np.where(np.isfinite(temps[d]), temps[d], setup.tj_max[d])
                for d in devices}

    # samples whose circuit did not solve on the way to their fixed point: not converged
    unsolved = np.zeros(n, dtype=bool)
    if setup.self_heating:
        settled, temps, unsolved = settle()
    sw_metrics = None
    sw = getattr(stage, "switching", None)
    if sw is not None and sw.enabled:
        at = known(temps)
        if capture is not None:
            capture["switching_temperatures"] = at
        sw_metrics = _switching(stage, samples, at, ambient)
        if stage.drive.pwm:
            f = stage.drive.frequency
            fits = edge_fill(sw_metrics, f, duty) <= 1.0
            switching_power = {}
            for d in devices:
                role = sw.roles[d]
                e_on = np.nan_to_num(sw_metrics[f"energy_on_{role}"])
                e_off = np.nan_to_num(sw_metrics[f"energy_off_{role}"])
                # a transient cut short by the next edge does not save what its unfinished
                # part would have (a coil's slow current rise dissipates less than the on
                # state): there only the heat each edge adds counts (criterion
                # transitions_fit); the sum of the two let a coil's negative turn-on energy
                # cancel its turn-off loss
                switching_power[d] = np.where(
                    fits, f * (e_on + e_off),
                    f * (np.maximum(e_on, 0.0) + np.maximum(e_off, 0.0)))
            if setup.self_heating:
                settled, temps, unsolved = settle()
    eval_temps = known(temps)
    res = stage.dc(samples, eval_temps, off_temps(eval_temps), full=True, params=params,
                   start=warm_start({"on": eval_temps, "off": off_temps(eval_temps)},
                                    np.arange(n), params))
    converged = np.asarray(res["converged"], dtype=bool) & ~unsolved
    # a thermal runaway settled nowhere below the loop's cap (still heating there with no
    # stable crossing found below it, or not settling); a unit that settles above T_j max
    # fails the T_j max criteria, not this one (it repeated their count under an alarming
    # name)
    runaway = converged & ~settled

    out = {k: res[k] for k in stage.metrics if k in res}
    power = _device_power(res, duty, switching_power)
    # the steady dissipation that gives each junction's peak of the cycle (the average where
    # the period is far below the thermal time constants)
    heat = _peak_power(res, setup, switching_power)
    for d, carrier in setup.shared.items():
        heat[carrier] = heat[carrier] + heat[d]
    stresses = []
    for d in devices:
        role = setup.roles[d]
        carrier = setup.shared.get(d, d)
        p = power[d]
        out[f"power_{role}"] = p
        if setup.self_heating:
            # NaN where this device ran away; a device that settled on its own thermal path
            # keeps its temperature beside a runaway (a discrete driver failed T_j max and was
            # named the hot spot for its output's runaway)
            tj = np.where(np.isfinite(temps[d]), eval_temps[d], np.nan)
        else:  # one pass at the ambient: the DC solution does not see its own heating
            tj = ambient + setup.theta[carrier] * heat[carrier]
        out[f"tj_{role}"] = tj
        # the rating's reference point: the ambient in free air, the case on a heatsink
        # (the junction less theta_jc times the package's dissipation)
        # (a monolithic pair's one die: its package's, the output's, for both roles; the
        # driver's own free-air figures rated a die on a heatsink twice, differently)
        reference = (ambient if carrier not in setup.case_theta else
                     tj - setup.case_theta[carrier] * heat[carrier])
        allowed = thermal.derated_power(setup.power_rating[carrier], reference,
                                        POWER_RATING_AMBIENT, setup.tj_max[carrier])
        room = setup.tj_max[d] - setup.margin - ambient
        with np.errstate(divide="ignore", invalid="ignore"):
            # the rating is the package's: on a monolithic pair's one die, both transistors'
            # dissipation (heat[carrier] is the device's own power otherwise)
            out[f"power_stress_{role}"] = heat[carrier] / allowed
            # the share of the allowed rise used; an ambient at or above the limit allows
            # none, and any junction there is overstressed (the ratio's negative
            # denominator called such units the coolest parts)
            rise = np.where(room > 0, (tj - ambient) / room, np.where(np.isnan(tj), np.nan,
                                                                       np.inf))
        stresses += [rise, out[f"power_stress_{role}"]]
    if "load_power" in out and stage.drive.pwm:
        # a heater's rating is a thermal one: the period's average where the period is far
        # below its thermal time constant (the on-state's 12 W of a 4 W heater at 30 % duty
        # and 1 kHz failed a load taking 3.6 W), the on-state's where each on-time outlasts it
        on, off = res["power_on"]["load"], res["power_off"]["load"]
        out["load_power"] = _average(on, off, duty)
        if "load_power_peak" in stage.metrics:
            out["load_power_peak"] = thermal.peak_power(on, off, setup.load_weights)
    for name, r in stage.resistors().items():
        if not r.present:
            continue
        on, off = res["power_on"]["resistors"][name], res["power_off"]["resistors"][name]
        p = _average(on, off, duty)
        out[f"power_{name}"] = p
        # the rating on the steady dissipation that gives the element's peak temperature in
        # the PWM cycle (its one Foster stage), the on-state's own with a static drive
        peak = (thermal.peak_power(on, off, setup.resistor_weights[name])
                if stage.drive.pwm else p)
        allowed = thermal.derated_power(r.power_rating, ambient, r.rated_ambient,
                                        r.max_temperature)
        with np.errstate(divide="ignore", invalid="ignore"):
            out[f"resistor_stress_{name}"] = peak / allowed
        stresses.append(out[f"resistor_stress_{name}"])
    # one stress per part (in hot_spot_parts order): the larger of a device's temperature
    # and power stresses, then each resistor's
    per_part = []
    k = 0
    for d in devices:
        # a monolithic pair's driver shares the output's die, junction and rating: the die
        # is one part, named by its output (a tie named the driver, a part the study lacks)
        per_part.append(np.full(n, -np.inf) if d in setup.shared else
                        np.maximum(stresses[k], stresses[k + 1]))
        k += 2
    per_part += stresses[k:]
    stack = np.vstack(per_part)
    unknown = np.isnan(stack)  # a runaway junction: that part is the hot spot, margin unknown
    out["hot_spot"] = np.argmax(np.where(unknown, np.inf, stack), axis=0).astype(float)
    out["hot_spot_margin"] = np.where(unknown.any(axis=0), np.nan, 1.0 - np.max(stack, axis=0))
    out["thermal_runaway"] = runaway.astype(float)
    out["vce_peak"] = np.abs(res["vce_off"])
    if sw_metrics is not None:
        # a unit whose off-state still carries a tenth of its on-current never completes a
        # 90 % -> 10 % transition: that is a finding (infinite delays), not a solver failure,
        # also where the transient between its two states converged (its levels are set on
        # the swing between them, a few percent of the on-current for a unit the leakage
        # holds on)
        stuck = converged & (np.abs(res["off_current"]) > 0.1 * np.abs(res["load_current"]))
        sw_ok = np.asarray(sw_metrics["converged"], dtype=bool) | stuck
        converged = converged & sw_ok
        for key in stage.metrics:
            if key in sw_metrics and key != "vce_peak":
                value = np.asarray(sw_metrics[key], dtype=float)
                if METRIC_UNITS_SWITCHING.get(key) == "s":
                    value = np.where(stuck, np.inf, value)
                out[key] = value
        out["vce_peak"] = np.fmax(out["vce_peak"], np.abs(sw_metrics["vce_peak"]))
        if "edge_fill" in stage.metrics:
            out["edge_fill"] = edge_fill(out, stage.drive.frequency, duty)
    load_state = res["load_state"]
    if sw_metrics is None and stage.load.kind == "coil":
        # without the transient a coil's turn-off still drives the switch to the clamp's
        # level, V_S + V_clamp (closed form, Coil.turn_off_peak_voltage), and without a
        # clamp into breakdown (infinite: the winding's energy has no other way out); the
        # off-state voltage alone passed an unclamped valve's breakdown check
        kick = load_state.turn_off_peak_voltage(np.asarray(samples[stage.env.supply],
                                                           dtype=float))
        out["vce_peak"] = np.fmax(out["vce_peak"], kick)
    if "release_time" in stage.metrics:
        # the switching times follow the switch current, which a clamp takes over in
        # nanoseconds; a relay or valve releases on the winding's current, which decays
        # through the clamp for milliseconds (closed form: Coil.decay_time)
        out["release_time"] = release_time(
            out["storage_time"], load_state, res["load_current"],
            setup.breakdown[output_device(stage)] - np.asarray(samples[stage.env.supply],
                                                               dtype=float))
    if "pwm_operate_margin" in stage.metrics:
        # the winding's current under the drive as given: it no longer starts from zero at
        # each edge where its L/R is long against the off-time (closed form,
        # CoilState.pwm_currents); the decay runs against the clamp, or against the
        # switch's breakdown less the supply where that comes first (as release_time)
        supply = np.asarray(samples[stage.env.supply], dtype=float)
        reverse = np.fmin(load_state.clamp_voltage,
                          setup.breakdown[output_device(stage)] - supply)
        low, _, mean = load_state.pwm_currents(res["coil_voltage"], stage.drive.frequency,
                                               duty, np.maximum(reverse, 0.0))
        out["coil_current_low"] = low
        out["pwm_operate_margin"] = mean / load_state.operate_current
    if stage.load.kind == "lamp":
        demand = load_state.inrush_demand(np.asarray(samples[stage.env.supply], dtype=float))
        capability = np.abs(res["capability"])
        # the cold inrush as far as the drive allows, at least the on-state's current: a
        # unit the drive cannot saturate stays in its linear region, whose junction warms
        # and whose gain rises with it, up to 12 % above the current at switch-on (a new
        # user's walk found it below load_current on the I_C max rating)
        out["peak_current"] = np.maximum(np.minimum(demand, capability),
                                         np.abs(res["load_current"]))
        out["inrush_energy"], out["inrush_time"] = lamp_inrush(
            load_state, np.asarray(samples[stage.env.supply], dtype=float), capability,
            res["load_voltage"], np.abs(res["load_current"]))
        # the junction through the limiting, from the ambient (a cold switch-on), and never
        # below its settled temperature: a unit whose limiting never ends settles there
        rise = lamp_inrush_rise(load_state, np.asarray(samples[stage.env.supply], dtype=float),
                                capability, res["load_voltage"], np.abs(res["load_current"]),
                                setup.network[output_device(stage)])
        role = setup.roles[output_device(stage)]
        out["tj_inrush"] = np.fmax(out[f"tj_{role}"], ambient + rise)
        with np.errstate(divide="ignore", invalid="ignore"):
            out["inrush_margin"] = capability / demand
    else:
        out["peak_current"] = np.abs(res["load_current"])
    if "peak_current_driver" in stage.metrics:
        out["peak_current_driver"] = res["ic_driver"]
        if stage.load.kind == "lamp":
            out["peak_current_driver"] = inrush_driver_current(
                res["ic_driver"], res["capability_driver"], np.abs(res["load_current"]),
                capability, demand)
    for key in list(out):
        out[key] = np.where(converged, np.asarray(out[key], dtype=float), np.nan)
    missing = set(stage.metrics) - set(out)
    if missing:
        raise KeyError(f"stage {stage.name} did not produce {sorted(missing)}")
    out["converged"] = converged
    return out


def device_assumptions(stage) -> list[dict]:
    """What each transistor of a stage was taken to be: its device class (or the study's
    own figures) and the datasheet figures the model was fitted to, as text in units, with
    the thermal resistance to ambient the stage uses (a heatsink included). The report
    lists them, so a review sees what was assumed, not only a study's hash."""
    from tolerance.units import format_quantity as q

    thermal = getattr(stage, "thermal", None)
    monolithic = bool(getattr(thermal, "shared", None))
    rows = []
    for name, part in stage.transistors().items():
        ds = part.device.datasheet
        theta = (thermal.theta.get(name) if thermal is not None else None) or ds.theta_ja
        rows.append({
            "part": name,
            "class": part.device_class or "the study's own figures",
            "polarity": ds.polarity.upper(),
            "hfe": f"{ds.hfe_min:g} .. {ds.hfe_max:g} at {q(ds.hfe_current, 'A')}",
            "vce_sat_max": f"{q(ds.vce_sat_max, 'V')} at {q(ds.vce_sat_ic, 'A')} / "
                           f"{q(ds.vce_sat_ib, 'A')}",
            # the figure the drive current follows (found by a review: it was listed nowhere)
            "vbe_sat": ("-" if ds.vbe_sat_max is None else
                        f"{'' if ds.vbe_sat_typ is None else q(ds.vbe_sat_typ, 'V') + ' typ, '}"
                        f"{q(ds.vbe_sat_max, 'V')} max"),
            # with the junction's spread (vbe_on_min, vbe_on_max), its ends
            "vbe_on": (q(ds.vbe_on, "V") if ds.vbe_on_min is None else
                       f"{q(ds.vbe_on, 'V')} typ, {q(ds.vbe_on_min, 'V')} .. "
                       f"{q(ds.vbe_on_max, 'V')}"),
            "icbo_max": _cbo_leakage_text(part.device),
            # a monolithic pair's dies share one junction (thermal.shared): its I_CEO is the
            # whole part's with the internal resistors, and a die's own misleads (the output
            # die's fit, without a roll-off figure, leaked 1,700 times its I_CBO)
            "iceo": ("the part's (internal resistors)" if monolithic
                     else _open_base_leakage(part.device)),
            "breakdown_vceo": q(ds.breakdown_vceo, "V"),
            "ic_max": q(ds.ic_max, "A"),
            "power_rating": _power_rating_text(ds, thermal, name),
            "tj_max": q(ds.tj_max, "temperature"),
            "theta_ja": q(float(theta), "K/W"),
        })
        charge = getattr(getattr(stage, "switching", None), "charges", {}).get(name)
        if charge is not None:
            rows[-1].update(charge_assumptions(charge, ds.hfe_median, ds.reverse_beta))
    return rows


def _power_rating_text(ds, thermal, name) -> str:
    """The P_tot a part's power check uses, as text: on a heatsink the case rating at
    25 degC case (the free-air figure beside it), else the free-air one; either where the
    part's path limits it below the stated figure, (T_j max - 25 degC) / theta, says so.
    A review found the free-air 1.25 W listed while a heatsinked part was judged on 12.5 W."""
    from tolerance.units import format_quantity as q

    used = (thermal.power_rating.get(name) if thermal is not None else None)
    if used is None:
        return q(ds.power_rating, "W")
    on_sink = name in (thermal.case_theta or {})
    stated = ds.power_rating_case if on_sink else ds.power_rating
    why = []
    if stated is None or used < stated * (1 - 1e-9):
        path = "theta_JC" if on_sink else "theta_JA"
        why.append(f"(T_j max - 25 degC) / {path}"
                   + (f", below the stated {q(stated, 'W')}" if stated is not None else ""))
    if on_sink:
        why.append(f"free air {q(ds.power_rating, 'W')}")
    where = " at 25 degC case" if on_sink else ""
    return f"{q(used, 'W')}{where}" + (f" ({'; '.join(why)})" if why else "")


def _cbo_leakage_text(device) -> str:
    """I_CBO max at 25 degC and how it rises, as text: the study's hot figure where it gives
    one (the fit meets it), else the doubling the model takes, marked as the class's."""
    from tolerance.units import format_quantity as q

    ds = device.datasheet
    text = q(ds.icbo_max, "A")
    if ds.icbo_hot_max is not None:
        return (f"{text}; {q(ds.icbo_hot_max, 'A')} at "
                f"{q(ds.icbo_hot_temperature, 'temperature')}")
    return f"{text}; x2 per {device.template.leakage_doubling:.3g} K"


def _open_base_leakage(device) -> str:
    """The collector current with the base open at 25 degC of the highest-gain, leakiest unit
    (what a datasheet's I_CEO maximum bounds), as text: the datasheet's figure where the
    study gives one (the fit meets it), else the model's at the I_CBO test voltage (at most
    V_(BR)CEO), which a review can set beside the part's own datasheet."""
    from tolerance.models.datasheet import iceo_at
    from tolerance.units import format_quantity as q

    ds = device.datasheet
    if ds.iceo_max is not None:
        return f"{q(ds.iceo_max, 'A')} at {q(ds.iceo_vce, 'V')}"
    vce = min(ds.icbo_vcb, ds.breakdown_vceo)
    current = float(iceo_at(device.parameters(ds.hfe_max, ds.icbo_max), vce)[0])
    return f"{q(current, 'A')} at {q(vce, 'V')} (model)"


def charge_assumptions(charge, forward_beta, reverse_beta) -> dict[str, str]:
    """A transistor's charge-storage figures as text in units: the transit times, the
    junctions' zero-bias capacitances and the storage time constant at ``forward_beta``
    (charges.storage_time_constant), which set the storage and fall times."""
    from tolerance.models.charges import storage_time_constant
    from tolerance.units import format_quantity as q

    tau_s = storage_time_constant(float(forward_beta), float(reverse_beta),
                                  float(charge.forward_transit_time),
                                  float(charge.reverse_transit_time))
    return {
        "transit_times": f"{q(float(charge.forward_transit_time), 's')} / "
                         f"{q(float(charge.reverse_transit_time), 's')}",
        "zero_bias_capacitances": f"{q(float(charge.be_zero_bias_capacitance), 'F')} / "
                                  f"{q(float(charge.bc_zero_bias_capacitance), 'F')}",
        "storage_time_constant": q(float(tau_s), "s"),
    }


#: surface temperatures [K] above which touching burns skin within seconds, and above which
#: paper, wood and plastics next to the part start to scorch (from memory: contact burn
#: guidance puts the first near 60 degC for metal, and cellulose browns from about 150 degC)
TOUCH_BURN_TEMPERATURE = 333.15
SCORCH_TEMPERATURE = 423.15


def _hot_part_hazard(tj: float) -> str:
    """What a junction at ``tj`` [K] means for whoever touches the part, as a clause: the
    case runs somewhat cooler than the junction, so the clause says "can"."""
    if tj > SCORCH_TEMPERATURE:
        return ("; a part that hot can burn on touch and scorch what touches it")
    if tj > TOUCH_BURN_TEMPERATURE:
        return "; a part that hot can burn on touch"
    return ""


#: a package thermal time constant below this gets a note: from memory, a die's own is tens
#: of milliseconds and a package's seconds to minutes, so a shorter one is likely a slip of
#: units (1 ms for 1 s)
PACKAGE_TIME_CONSTANT_FLOOR = 0.01

#: a supply above this can take the circuit out of the safety-extra-low-voltage range [V]
#: (60 V DC, the usual SELV limit for dry locations; common practice, from memory)
SELV_LIMIT = 60.0


def review_notes(stage, criteria, nominal: dict, corner: dict | None = None) -> list[str]:
    """Sentences on what a stage's figures leave unjudged or take simply, for a reviewer
    (``Study.notes``): a lamp's inrush energy with nothing to judge it against, a coil's
    pull-in judged at DC under a PWM drive whose period is shorter than its nominal L/R
    (``nominal``: each parameter's nominal value by name), a PWM period long against a
    part's thermal time constants, a supply beyond the safety-extra-low-voltage range, and
    junctions above T_j max at ``corner`` (the nominal point with the hottest ambient and
    the highest supply, :func:`corner_notes`)."""
    out = []
    out += _peak_notes(stage)
    judged = {c.metric for c in criteria}
    thermal = getattr(stage, "thermal", None)
    if (stage.load.kind == "lamp" and "inrush_energy" not in judged
            and not (thermal is not None and thermal.pulse_energy)):
        out.append("The output's energy while it limits the cold lamp's inrush "
                   "(inrush_energy) is computed but judged by nothing: give the output part's "
                   "single-pulse rating (pulse_energy) or a [limits] inrush_energy.")
    if stage.load.kind == "lamp" and stage.drive.pwm:
        from tolerance.units import format_quantity as q

        f = stage.drive.frequency
        # the filament's periodic state under the drive is not modelled: a first model was
        # withdrawn (DEVELOPERS.md), so the review is told what the figures leave out
        out.append(f"The lamp is switched at {q(f, 'Hz')}: each on-edge finds the filament "
                   "as the off-time left it, and the output limits or carries its inrush "
                   "again. That heat is not in the output's dissipation and junction "
                   "(power_output, tj_output); its bound, each on-edge finding the filament "
                   f"cold, is f times inrush_energy ({q(f, 'W')} per joule), which a "
                   "flasher whose off-time is long against the lamp's thermal time constant "
                   "reaches. tj_inrush is the first switch-on's, from a cold junction. "
                   "Check the output's temperature on the bench, or judge its power rating "
                   "with that heat added.")
    if thermal is not None:
        for name, network in thermal.network.items():
            package = network[-1][1]
            if name not in thermal.shared and package < PACKAGE_TIME_CONSTANT_FLOOR:
                from tolerance.units import format_quantity as q

                out.append(f"{name}'s package thermal time constant is "
                           f"{q(package, 's')}, below {q(PACKAGE_TIME_CONSTANT_FLOOR, 's')}: "
                           "a package's own is seconds to minutes and a die's tens of "
                           "milliseconds (from memory), so the junction's peaks (tj_inrush, "
                           "the PWM cycle's) come out as its steady rise at once; check the "
                           "unit of thermal_time_constant in [parts." + name + "].")
    if stage.load.kind == "coil" and stage.drive.pwm:
        out += _pwm_coil_notes(stage, judged, {c.name for c in criteria}, nominal)
    capped = sorted({c.metric for c in criteria if c.maximum is not None
                     and c.metric in ("drive_current", "base_current")})
    # parts a vbe_sat_typ could spread: a figure of their own, not a monolithic pair's die
    # (found by a mutation round: the note sent a monolithic study to a key it refuses)
    monolithic = bool(getattr(thermal, "shared", None))
    fixed_vbe = [name for name, part in stage.transistors().items()
                 if getattr(part, "vbe_sat_parameter", None) is None and not monolithic
                 and part.device.datasheet.vbe_sat_max is not None]
    if capped and fixed_vbe:
        # found by a review: the fit meets vbe_sat_max with the lowest-gain unit, and every
        # unit keeps that base resistance, which is the safe side for saturation only
        out.append(f"{' and '.join(capped)} {'is' if len(capped) == 1 else 'are'} limited "
                   "from above, but every unit's base-emitter voltage follows the "
                   "datasheet's V_BE(sat) maximum (the fit meets vbe_sat_max with the "
                   "lowest-gain unit: the safe side for saturation), so a unit with a "
                   "typical V_BE(sat) draws more"
                   + (" (with a V_BE(on) spread the unit at vbe_on_max meets it, and a lower "
                      "junction sits below it by its distance)" if any(
                          getattr(stage.transistors()[n], "vbe_on_parameter", None)
                          for n in fixed_vbe) else "")
                   + ". The model carries the gap between the two "
                   "as base resistance, so at a base current I_B it lowers V_BE by the gap "
                   "times I_B over the datasheet's test current, and the drive current rises "
                   "by that over the series resistance (the whole gap, some 5 to 10 % on a "
                   "3.3 V to 5 V drive, where I_B is the test current's). Give the "
                   "datasheet's typical V_BE(sat) as vbe_sat_typ in "
                   f"[parts.{fixed_vbe[0]}]" + (" (and the others')" if len(fixed_vbe) > 1
                                                 else "") +
                   ": the units then spread between it and the maximum.")
    top = getattr(stage.env, "supply_maximum", 0.0)
    vf = nominal.get("load.forward_voltage")
    if stage.load.kind == "led" and vf is not None and top > 0:
        from tolerance.units import format_quantity as q

        # the string's voltage at the lit threshold (a tenth of the test current): the diode
        # law takes n V_T ln 10 off each LED's forward voltage (Shockley; 25 degC). A string
        # above the highest supply passed `check` silently and failed every unit (a review)
        from tolerance.models.transistor import REFERENCE_TEMPERATURE, thermal_voltage

        load = stage.load
        lit = load.count * (vf - load.ideality * float(thermal_voltage(REFERENCE_TEMPERATURE))
                            * np.log(10.0))
        if lit >= top:
            out.append(f"The LED string needs about {q(lit, 'V')} to carry a tenth of its test "
                       f"current ({load.count} x {q(vf, 'V')} less the diode law's "
                       f"n V_T ln 10 each, at 25 degC), at or above the highest supply "
                       f"({q(top, 'V')}): no unit lights, and every unit fails led_current. "
                       "Check the LED count and forward voltage, or the supply.")
    if top > SELV_LIMIT:
        out.append(f"The supply reaches {top:.4g} V, above the {SELV_LIMIT:g} V DC of the "
                   f"safety-extra-low-voltage range: touching the circuit can be dangerous. "
                   f"Its wiring, insulation, spacing and protection defer to local electrical "
                   f"codes and licensed practice, which this analysis does not cover.")
    if corner is not None:
        out += corner_notes(stage, corner)
    return out


def _pwm_coil_notes(stage, judged: set, names: set, nominal: dict) -> list[str]:
    """A coil on a PWM drive: how its pull-in is judged, and, where the nominal coil's
    current does not settle within a half of the period (the rise to 90 % takes L/R ln 10),
    what the failing transitions_fit means."""
    from tolerance.units import format_quantity as q

    out = []
    if "pwm_operate_margin" in judged:
        out.append(f"The coil's pull-in is judged on the {stage.drive.duty:g} duty PWM drive "
                   f"as given (pwm_operate_margin: the hot winding's mean current over each "
                   f"on-time in the drive's periodic steady state, over its must-operate "
                   f"current). A stage that pulls the coil in with a static drive and then "
                   f"holds it with the PWM judges the pull-in with [limits] operate_margin = "
                   f"{{min = 1}} and the hold with [limits] pwm_operate_margin = {{min = ...}}, "
                   f"the coil's hold current over its must-operate current.")
    ind, res = nominal.get("load.inductance"), nominal.get("load.resistance")
    if "transitions_fit" in names and ind is not None and res:
        tau = ind / res
        f, duty = stage.drive.frequency, stage.drive.duty
        half = min(duty, 1.0 - duty) / f
        if tau * np.log(10.0) > half:
            # (found by a review: "L/R (2.08 ms) is long against the on-time (2.4 ms)" read
            # as a contradiction; the rise to 90 % is what is compared)
            out.append(f"The nominal coil's current takes 2.3 L/R "
                       f"({q(tau * np.log(10.0), 's')}; L/R {q(tau, 's')} at 20 degC) to "
                       f"reach 90 %, longer than the PWM's on-time ({q(duty / f, 's')}) "
                       f"or off-time ({q((1.0 - duty) / f, 's')}): its current "
                       f"does not settle at each edge, and transitions_fit fails such units. "
                       f"The switching energies are those of settled edges, of which only "
                       f"the heat each edge adds is counted there, and the turn-on into the "
                       f"current still circulating in the clamp (coil_current_low) is not "
                       f"modelled: measure that loss on the bench, or lower the PWM "
                       f"frequency until each half outlasts about 2.3 L/R.")
    return out


def _peak_notes(stage) -> list[str]:
    """A note per transistor whose junction peaks in the PWM cycle more than
    :data:`models.thermal.PEAK_NOTE_SHARE` above its period-average rise, and one for the
    resistors and the resistive load whose rated dissipation does so."""
    from tolerance.units import format_quantity as q

    setup = getattr(stage, "thermal", None)
    if setup is None or not stage.drive.pwm:
        return []
    out = []
    for name in setup.theta:
        if name in setup.shared:
            continue  # the die's note is its package's, the carrier's
        excess = setup.peak_excess(name)
        if not excess > thermal.PEAK_NOTE_SHARE:
            continue
        taus = " and ".join(q(tau, "s") for _, tau in setup.network[name])
        period = 1.0 / stage.drive.frequency
        source = ("the study's" if name in setup.given_constants else
                  f"typical of the package class (from memory), so give the part's own "
                  f"(thermal_time_constant, die_time_constant in [parts.{name}]) where they "
                  f"are known")
        out.append(f"The PWM period ({q(period, 's')}, on for {q(setup.duty * period, 's')}) "
                   f"is long against {name}'s thermal time constants ({taus}): its junction "
                   f"peaks in each cycle at up to {1.0 + excess:.3g} times its period-average "
                   f"rise. The junction temperatures and power stresses are the cycle's peaks; "
                   f"the time constants are {source}.")
    given = setup.given_constants
    rated = [(name, f"[parts.{name}]", w, setup.resistor_time_constants[name], name)
             for name, w in setup.resistor_weights.items()]
    if setup.load_weights is not None:
        rated.append(("the load", "[load]", setup.load_weights, setup.load_time_constant,
                      "load"))
    long = [(who, table, 1.0 + setup.rating_excess(w), tau, key)
            for who, table, w, tau, key in rated
            if setup.rating_excess(w) > thermal.PEAK_NOTE_SHARE]
    if long:
        period = 1.0 / stage.drive.frequency
        named = [f"{who} ({q(tau, 's')})" for who, _, _, tau, _ in long]
        whose = (", ".join(named[:-1]) + " and " + named[-1]) if len(named) > 1 else named[0]
        most = max(factor for _, _, factor, _, _ in long)
        metrics = ", ".join(
            (["resistor_stress_<R>"] if any(k != "load" for *_, k in long) else [])
            + (["load_rating"] if any(k == "load" for *_, k in long) else []))
        text = (f"The PWM period ({q(period, 's')}, on for {q(setup.duty * period, 's')}) "
                f"is long against the thermal time constant of {whose}: "
                f"{'their ratings are' if len(long) > 1 else 'its rating is'} judged "
                f"({metrics}) on the dissipation that gives the cycle's peak element "
                f"temperature, up to {most:.3g} times the period's average (power_<R> and "
                f"load_power stay the average).")
        defaults = [table for _, table, _, _, key in long if key not in given]
        if defaults:
            text += (f" The default, {q(thermal.RESISTOR_TIME_CONSTANT, 's')}, is a short one "
                     f"for small resistors (from memory), so give each part's own "
                     f"(thermal_time_constant in {', '.join(defaults)}) where it is known.")
        out.append(text)
    return out


def corner_notes(stage, corner: dict) -> list[str]:
    """A note per transistor whose junction at ``corner`` (parameter values by name; the
    study's nominal point with its hottest ambient and highest supply) settles above its
    T_j max, or settles nowhere below its cap: a hot part is a burn hazard beside the rating.
    Evaluated once per corner and stage (one sample)."""
    from tolerance.units import format_quantity as q

    setup = getattr(stage, "thermal", None)
    if setup is None or not setup.self_heating:
        return []
    key = tuple(sorted(corner.items()))
    cache = stage.__dict__.setdefault("_corner_notes", {})
    if key in cache:
        return list(cache[key])
    samples = {k: np.array([float(v)]) for k, v in corner.items()}
    with np.errstate(all="ignore"):
        res = stage.evaluate(samples)
    out = []
    where = (f"at the nominal point with the hottest ambient "
             f"({q(corner[stage.env.temperature], 'temperature')}) and the highest supply "
             f"({q(corner[stage.env.supply], 'V')})")
    if bool(res["converged"][0]):
        for name, role in setup.roles.items():
            if name in setup.shared:
                continue
            tj = float(res[f"tj_{role}"][0])
            limit = setup.tj_max[name]
            if np.isnan(tj):
                out.append(f"{where[:1].upper() + where[1:]}, {name}'s junction settles "
                           f"nowhere below T_j max + 100 K (thermal runaway): the part "
                           f"overheats and can burn what touches it; check its rating and "
                           f"cooling.")
            elif tj > limit:
                out.append(f"{where[:1].upper() + where[1:]}, {name}'s junction settles at "
                           f"{q(tj, 'temperature')}, above its T_j max of "
                           f"{q(limit, 'temperature')}: it is outside its rating"
                           f"{_hot_part_hazard(tj)}; check the part's rating, its cooling, or "
                           f"a part rated for it.")
    cache[key] = list(out)
    return out
