"""Switching-stage topologies and what they share.

Each stage module registers ``configure(reader)`` with :func:`tolerance.protocol.register_stage`
and returns a picklable configured stage whose ``evaluate(samples)`` solves, vectorized over the
chunk, four DC problems with the batched Newton solver of :mod:`tolerance.models.newton`:

``on``
    the drive at its high level: load current, V_CE, base currents, dissipation;
``edge``
    the same drive with the (driver) transistor held at the edge of saturation, intrinsic
    V_BC = 0, and the load removed: the collector current the drive can sustain there, which
    ``drive_margin`` divides by the load's current (:func:`drive_demand`): the on-state
    current of a saturated unit (the usual overdrive factor), the load's demand at the
    edge's collector voltage of one that is not. Because both operating points coincide when
    the on-state sits exactly at the edge, ``drive_margin > 1`` is the same statement as "the
    on-state is saturated";
``off``
    the drive at its low level: the off-state leakage through the load;
``threshold``
    the input voltage at which the load current reaches 1 % of the sample's own on-state load
    current (the input equation is replaced by that current constraint and the input voltage
    follows explicitly); ``off_margin`` is its distance above the low level.

The unknowns of every solve are the intrinsic junction voltages of the transistors: the series
resistances and every node voltage then follow explicitly (:func:`terminal_offsets`), so
series resistances add no unknowns, and junction limiting acts directly on the unknowns. Where
two devices close a loop (the joined collectors of a Darlington) one extra equation states the
loop's voltage balance, scaled by 1 mS so that 1 nV counts as 1 pA.

Resistor temperature coefficients are applied at the sample's temperature:
``R(T) = R (1 + tempco (T - 298.15 K))``. The transistors sit at the ambient temperature (no
self-heating in this static model).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tolerance.models.drive import DriveSpec, read_drive
from tolerance.models.newton import newton_solve
from tolerance.models.transistor import (
    REFERENCE_TEMPERATURE,
    critical_voltage,
    limit_junction_step,
)
from tolerance.protocol import Criterion, MetricInfo
from tolerance.study import Reader

__all__ = [
    "COMMON_METRICS",
    "JUNCTION_LEAK",
    "LOOP_CONDUCTANCE",
    "Environment",
    "ResistorPart",
    "Subsettable",
    "read_environment",
    "read_load_table",
    "read_resistor",
    "saturation_criterion",
]

#: scale of voltage-balance equations [S]: 1 nV of imbalance counts as 1 pA of residual
LOOP_CONDUCTANCE = 1e-3
#: conductance standing for a nearly open junction in the off-state starting points [S]
JUNCTION_LEAK = 1e-9
#: fraction of the on-state load current that defines the switching threshold of off_margin
THRESHOLD_FRACTION = 0.01

COMMON_METRICS: dict[str, MetricInfo] = {
    "load_current": MetricInfo("A", "load current, drive high"),
    "vce_on": MetricInfo("V", "output voltage (collector to emitter of the stage), drive high"),
    "load_voltage": MetricInfo("V", "voltage across the load, drive high"),
    "base_current": MetricInfo("A", "base current of the (driver) transistor, drive high"),
    "drive_current": MetricInfo("A", "current the drive output sources, drive high"),
    "drive_margin": MetricInfo("1", "collector current sustainable at the edge of saturation "
                                    "over the load's current (on-state where saturated: the "
                                    "overdrive factor; else its demand at the edge's "
                                    "voltage); > 1 means fully on"),
    "power_output": MetricInfo("W", "dissipation of the output transistor, drive high"),
    "off_current": MetricInfo("A", "load current, drive low (leakage)"),
    "off_margin": MetricInfo("V", "input voltage giving 1 % of the on-state load current, "
                                  "minus the drive's low level"),
    "off_fraction": MetricInfo("1", "load current with the drive low over the load current "
                                    "with the drive high"),
}


def drive_demand(at_edge, on_state):
    """The load current ``drive_margin`` divides the edge-of-saturation capability by [A]:
    the larger of the load's demand at the edge's collector voltage and its on-state
    current.

    A saturated unit sits below the edge's voltage and draws more than its demand there: its
    on-state current, so that the margin is the usual overdrive factor (capability over the
    current carried). A unit in its active region sits above that voltage, where the
    transistor limits its current; the load's demand at the edge says how much it would
    draw, and the margin how far the drive falls short. The two meet at the edge, where both
    equal the capability. The demand at the edge alone went through zero where the edge's
    voltage (its V_BE and the collector resistance's drop at a capability of amperes)
    reached the supply: a 2.5 V stage driven hard read -126 and failed saturation at 0.03 V
    across its junctions, and one just below read 177 against an overdrive of 30.
    """
    return np.maximum(at_edge, on_state)


def saturation_criterion() -> Criterion:
    return Criterion("saturation", "drive_margin", minimum=1.0, source="stage",
                     description="output fully on (saturation)")


def stays_off_criterion() -> Criterion:
    """The load current with the drive low below 1 % of its on-value (the fraction that
    defines ``off_margin``'s threshold): a stage the leakage holds on, or whose low drive level
    turns it on, fails. A study's ``off_current`` or ``off_fraction`` window tightens it."""
    return Criterion("stays_off", "off_fraction", maximum=THRESHOLD_FRACTION, source="stage",
                     description="output off at the drive's low level (load current below "
                                 f"{100 * THRESHOLD_FRACTION:g} % of its on-value)")


class Subsettable:
    """Mixin: ``subset(idx)`` copies the object with every per-sample array indexed.

    Attributes that are 1-D arrays of the chunk's length are indexed; objects with a
    ``subset`` (transistor parameters) or ``take`` (load states) method are asked for theirs;
    everything else is shared.
    """

    n_samples: int

    def subset(self, idx):
        out = object.__new__(type(self))
        n = self.n_samples
        for key, value in vars(self).items():
            if isinstance(value, np.ndarray) and value.ndim >= 1 and value.shape[0] == n:
                value = value[idx]
            elif hasattr(value, "subset") and not isinstance(value, type):
                value = value.subset(idx)
            elif hasattr(value, "take") and not isinstance(value, (np.ndarray, type)):
                value = value.take(idx)
            setattr(out, key, value)
        out.n_samples = len(idx)
        return out


@dataclass(frozen=True)
class ResistorPart:
    """A resistor of the stage: its parameter names (``value``/``tempco``), or absent.

    ``tempco_parameter`` None means the fixed coefficient ``tempco_value`` [1/K].
    """

    name: str
    present: bool
    value_parameter: str | None = None
    tempco_parameter: str | None = None
    power_rating: float = 0.25
    rated_ambient: float = 343.15
    max_temperature: float = 428.15
    tempco_value: float = 0.0

    def resistance(self, samples, temperature) -> np.ndarray:
        """Resistance at the sample temperatures [ohm] (infinite when absent)."""
        t = np.asarray(temperature, dtype=float)
        if not self.present:
            return np.full(t.shape, np.inf)
        r = np.asarray(samples[self.value_parameter], dtype=float)
        if self.tempco_parameter is None:
            tc = self.tempco_value
        else:
            tc = np.asarray(samples[self.tempco_parameter], dtype=float)
        return r * (1.0 + tc * (t - REFERENCE_TEMPERATURE))

    def conductance(self, samples, temperature) -> np.ndarray:
        """1/R at the sample temperatures [S] (0 when absent)."""
        with np.errstate(divide="ignore"):
            return 1.0 / self.resistance(samples, temperature)


def read_resistor(parts: Reader, name: str, description: str, required: bool) -> ResistorPart:
    """Read ``[parts.<name>]``: ``value`` (toleranced), ``tempco`` (default 0), and the power
    rating with its derating curve (``power_rating`` [W] default 0.25 W, ``rated_ambient``
    default 70 degC, ``max_temperature`` default 155 degC).

    Parameters ``<name>`` [ohm] and ``<name>.tempco`` [1/K].
    """
    if not parts.has(name):
        if required:
            raise parts.error(name, "is required but missing; expected a table with a value")
        return ResistorPart(name, False)
    table = parts.table(name, required=True)
    table.parameter("value", "ohm", name, description, positive=True, allow_tolerance_key=True)
    table.parameter("tempco", "1/K", f"{name}.tempco", f"{description}: temperature "
                    "coefficient", default=0.0, minimum=-5e-3, maximum=5e-3)
    # power rating and its derating curve: full power to rated_ambient, zero at
    # max_temperature (film-resistor defaults 0.25 W, 70 degC, 155 degC; common practice)
    rating = table.quantity("power_rating", "W", default=0.25, positive=True)
    rated_ambient = table.quantity("rated_ambient", "temperature", default=343.15)
    max_temperature = table.quantity("max_temperature", "temperature", default=428.15)
    if not max_temperature > rated_ambient:
        raise table.error("max_temperature", "must lie above the rated ambient temperature")
    return ResistorPart(name, True, name, f"{name}.tempco", rating, rated_ambient,
                        max_temperature)


@dataclass(frozen=True)
class Environment:
    """Names of the ambient temperature and supply voltage parameters."""

    temperature: str = "ambient.temperature"
    supply: str = "supply.voltage"
    supply_minimum: float = 0.0
    supply_maximum: float = 0.0


def read_environment(reader: Reader) -> Environment:
    """Read ``[ambient] temperature`` (default 25 degC) and ``[supply] voltage``."""
    ambient = reader.table("ambient")
    ambient.parameter("temperature", "temperature", "ambient.temperature",
                      "ambient temperature", default="25 degC", minimum=150.0, maximum=500.0)
    supply = reader.table("supply", required=True)
    p = supply.parameter("voltage", "V", "supply.voltage", "supply voltage", positive=True)
    return Environment(supply_minimum=p.low, supply_maximum=p.high)


def read_load_table(reader: Reader):
    """The study's load (:func:`tolerance.models.loads.read_load` on ``[load]``)."""
    from tolerance.models.loads import read_load

    return read_load(reader.table("load", required=True))


def device_parameters(stage, samples) -> dict:
    """Model parameters of every transistor of the stage for a chunk (name -> parameters).

    Mapping each unit's sampled h_FE to its forward gain takes a small Newton solve per device;
    callers that evaluate the same samples at several temperatures compute this once and pass
    it on (``params``).
    """
    return {name: part.parameters(samples) for name, part in stage.transistors().items()}


def take_parameters(params: dict, idx: np.ndarray, n: int) -> dict:
    """The same parameters for the samples ``idx`` of a chunk of ``n``."""
    from dataclasses import fields

    out = {}
    for name, p in params.items():
        changes = {}
        for f in fields(p):
            v = getattr(p, f.name)
            if isinstance(v, np.ndarray) and v.ndim >= 1 and v.shape[0] == n:
                changes[f.name] = v[idx]
        out[name] = p.replace(**changes) if changes else p
    return out


def junction_limit(x_new, x_old, columns):
    """Apply :func:`limit_junction_step` to the junction columns of an iterate.

    ``columns`` lists ``(column, polarity, emission_vt, critical_voltage)``.
    """
    out = x_new.copy()
    for col, pol, nvt, vcrit in columns:
        out[:, col] = pol * limit_junction_step(pol * x_new[:, col], pol * x_old[:, col], nvt,
                                                vcrit)
    return out


def warm_guesses(start, key, guesses):
    """``guesses`` with the samples' own earlier solution of the same state among them.

    ``start`` maps a state (``"on"``, ``"off"``) to ``(x, near)``: unknowns of the same samples
    solved before (NaN rows where that solve did not converge) and a mask of the samples whose
    junctions have moved little since. A near sample starts from its earlier solution and then
    tries the guesses in turn; any other sample with an earlier solution tries the guesses
    first and its earlier solution last, before the slow attempt of
    :func:`solve_with_restarts`; a sample without one gets NaN for that last start, which
    :func:`tolerance.models.newton.newton_solve` gives up at its first iteration instead of
    repeating a guess it has tried. ``None`` or a missing key leaves ``guesses`` as they are.
    The electro-thermal loop solves the same states at junction temperatures a fraction of a
    kelvin to a few kelvin apart, so the earlier solution is a far closer start than any guess
    from the circuit; a sample that none of the circuit's guesses brings to convergence at its
    new temperatures still may from there.
    """
    entry = None if start is None else start.get(key)
    if entry is None:
        return guesses
    prev, near = entry
    known = np.all(np.isfinite(prev), axis=1)
    near = (near & known)[:, None]
    last = np.where(known[:, None], prev, np.nan)
    ordered = [np.where(near, prev, guesses[0])]
    ordered += [np.where(near, guesses[k - 1], guesses[k]) for k in range(1, len(guesses))]
    ordered.append(np.where(near, guesses[-1], last))
    return ordered


#: iterations of each short-step retry after the first (0.05 V steps: 5 V of travel)
SLOW_RETRY_ITERATIONS = 100


def solve_with_restarts(system, guesses, slow=True, **options):
    """Newton from the first guess; samples that fail retry from the next guesses in turn,
    and finally (``slow``) with a short maximum step (0.05 V, up to 300 iterations) from the
    first, then from each of the others (up to :data:`SLOW_RETRY_ITERATIONS` each).

    Parameters
    ----------
    system : NewtonSystem
    guesses : list of ndarray, each (S, n)
        Starting points in order of preference.
    slow : bool
        Whether to make the final short-step attempt.
    **options
        Passed to :func:`tolerance.models.newton.newton_solve`.

    Returns
    -------
    NewtonResult
    """
    res = newton_solve(system, guesses[0], **options)
    attempts = [(g, options) for g in guesses[1:]]
    if slow and options.get("max_iterations", 60) >= 20:
        attempts.append((guesses[0], dict(options, max_step=0.05, max_iterations=300)))
        # full steps can cycle between two states (a collector junction swinging by volts
        # each iteration) from every start, and short steps from a far start walk into the
        # same cycle; from a nearer one they settle (a latched-on complementary pair's off
        # state: 30 short steps from the starved guess, 9 from the on-state solution)
        attempts += [(g, dict(options, max_step=0.05, max_iterations=SLOW_RETRY_ITERATIONS))
                     for g in guesses[1:]]
    for guess, opts in attempts:
        bad = np.flatnonzero(~res.converged)
        if bad.size == 0:
            break
        retry = newton_solve(system.subset(bad), guess[bad], **opts)
        res.x[bad] = retry.x
        res.converged[bad] = retry.converged
        res.iterations[bad] += retry.iterations
    return res


def threshold_voltage(solve_threshold, zero_drive_current, target, options):
    """Input voltage at which the load current reaches ``target``, searched from 0 V up.

    Parameters
    ----------
    solve_threshold : callable
        ``solve_threshold(slow)`` -> (NewtonResult, v_threshold) for the whole chunk.
    zero_drive_current : callable
        ``zero_drive_current(idx)`` -> (converged, current) of the stage with the drive at
        0 V, for the samples ``idx``.
    target : ndarray
        The threshold current [A].
    options : dict
        Solver options.

    Returns
    -------
    (ndarray, ndarray)
        Threshold voltage [V] (0 where the stage conducts the target already at 0 V: a logic
        output cannot go lower, so the threshold is taken as 0 V) and a success flag.
    """
    res, v_th = solve_threshold()
    ok = res.converged.copy()
    bad = np.flatnonzero(~ok)
    if bad.size:
        conv, i0 = zero_drive_current(bad)
        stuck_on = conv & (np.abs(i0) >= np.abs(target[bad]))
        v_th[bad[stuck_on]] = 0.0
        ok[bad[stuck_on]] = True
    with np.errstate(invalid="ignore"):
        v_th = np.where(ok, np.maximum(v_th, 0.0), np.nan)
    return v_th, ok


PAIR_METRICS: dict[str, MetricInfo] = {
    "base_current_driver": MetricInfo("A", "base current of the driver transistor, drive high"),
    "base_current_output": MetricInfo("A", "base current magnitude of the output transistor, "
                                           "drive high"),
    "power_driver": MetricInfo("W", "dissipation of the driver transistor, drive high"),
}

#: rows of a pair system's equations: input KCL, middle-node KCL, output KCL, loop balance,
#: threshold condition; columns: v_BE1, v_BC1, v_BE2, v_BC2
_PAIR_MODES = {
    "on": ((0, 1, 2, 3), (0, 1, 2, 3)),
    "edge": ((0, 1, 3), (0, 2, 3)),
    "threshold": ((4, 1, 2, 3), (0, 1, 2, 3)),
}


class PairSystem(Subsettable):
    """Equations of a two-transistor stage for one mode (``on``, ``edge``, ``threshold``).

    Subclasses implement ``equations(xf)`` returning the five residual rows (a list of (S,)
    arrays) [A], their Jacobian with respect to the four junction voltages as a 5 x 4 nested
    list of (S,) arrays or scalar zeros [A/V], the current scale (S,) [A] and a dict of node
    voltages and currents for the metrics (``equations(xf, jacobian=False)`` skips the
    Jacobian, giving None in its place). In the ``edge`` mode the
    driver's v_BC1 is held at zero; in ``threshold`` the input row is replaced by the load
    current condition.
    """

    def __init__(self, q1, q2, load, supply, v_in, g_in, g_be1, g_be2, mode, i_target=None):
        self.q1 = q1
        self.q2 = q2
        self.load = load
        self.supply = supply
        self.v_in = v_in
        self.g_in = g_in
        self.g_be1 = g_be1
        self.g_be2 = g_be2
        self.mode = mode
        self.i_target = np.zeros_like(supply) if i_target is None else i_target
        self.n_samples = n = supply.shape[0]
        # junction limiting data per unknown column: emission voltage and critical voltage
        nvt, vcrit, pol = [], [], []
        for q in (q1, q2):
            for inv in (q.inv_forward_nvt, q.inv_reverse_nvt):
                e = np.broadcast_to(1.0 / inv, (n,))
                nvt.append(e)
                vcrit.append(np.broadcast_to(critical_voltage(q.saturation_current, e), (n,)))
                pol.append(q.polarity)
        keep = [0, 2, 3] if mode == "edge" else [0, 1, 2, 3]
        self.limit_nvt = np.stack([nvt[k] for k in keep], axis=1)
        self.limit_vcrit = np.stack([vcrit[k] for k in keep], axis=1)
        self.limit_polarity = tuple(pol[k] for k in keep)

    def full(self, x):
        if self.mode == "edge":
            return np.stack([x[:, 0], np.zeros(x.shape[0]), x[:, 1], x[:, 2]], axis=1)
        return x

    def residual(self, x):
        f, j, scale, _ = self.equations(self.full(x))
        rows, cols = _PAIR_MODES[self.mode]
        return (np.stack([f[r] for r in rows], axis=1), [[j[r][c] for c in cols] for r in rows],
                scale)

    def state(self, x):
        return self.equations(self.full(x), jacobian=False)[3]

    def limit(self, x_new, x_old):
        cols = [(k, pol, self.limit_nvt[:, k], self.limit_vcrit[:, k])
                for k, pol in enumerate(self.limit_polarity)]
        return junction_limit(x_new, x_old, cols)


def vbe_guess(q, current):
    """Base-emitter voltage that carries the collector ``current`` [A] (actual polarity) [V]:
    the larger of the ideal-diode value and the high-injection value
    ``2 n V_T ln(I / sqrt(I_S I_KF))`` (Gummel-Poon q_b for q_2 >> 1)."""
    nvt = 1.0 / q.inv_forward_nvt
    cur = np.maximum(np.abs(current), 1e-12)
    v = nvt * np.log1p(cur / q.saturation_current)
    if not (np.ndim(q.inv_knee) == 0 and float(q.inv_knee) == 0.0):
        with np.errstate(divide="ignore"):
            v = np.maximum(v, 2.0 * nvt * np.log(cur / np.sqrt(q.saturation_current /
                                                               q.inv_knee)))
    return q.polarity * v


def transistor_power(ic, ib, vc_minus_ve, vb_minus_ve):
    """Dissipation of a transistor from its terminal currents and voltages [W]."""
    return ic * vc_minus_ve + ib * vb_minus_ve


class PairStage:
    """A configured two-transistor stage (Darlington or Sziklai); picklable.

    Subclasses set ``name`` and ``system`` (a :class:`PairSystem` subclass) and implement
    ``guesses(mode, ...)`` and ``outputs(state, ...)``.
    """

    name = "pair"
    system = PairSystem
    #: the transistors whose (v_BE, v_BC) are the columns of the on- and off-state unknowns,
    #: in order
    junction_devices = ("Q1", "Q2")

    def __init__(self, env, drive, rb, rbe1, rbe2, q1, q2, load, parameters,
                 internal_rbe1=None, internal_rbe2=None, suggested_correlations=()):
        self.env = env
        self.drive = drive
        self.rb = rb
        self.rbe1 = rbe1
        self.rbe2 = rbe2
        self.q1 = q1
        self.q2 = q2
        self.load = load
        self.parameters = parameters
        self.internal_rbe1 = internal_rbe1
        self.internal_rbe2 = internal_rbe2
        self.suggested_correlations = tuple(suggested_correlations)
        self.metrics = dict(COMMON_METRICS)
        self.metrics.update(PAIR_METRICS)
        self.metrics.update(load.metrics)
        self.criteria = [saturation_criterion(), stays_off_criterion()] + list(load.criteria)
        self.solver_options = {}

    devices = ("Q1", "Q2")

    def review_notes(self, criteria, nominal, corner=None) -> list[str]:
        """What the stage's figures leave unjudged or find hazardous, for ``Study.notes``
        (``corner``: the nominal point with the hottest ambient and highest supply)."""
        from tolerance.models.stages.evaluation import review_notes

        return review_notes(self, criteria, nominal, corner)

    def assumptions(self) -> list[dict]:
        """Each transistor's device class and fitted datasheet figures, for the report."""
        from tolerance.models.stages.evaluation import device_assumptions

        return device_assumptions(self)

    def transistors(self):
        """The stage's transistors by name (for ratings and the thermal network)."""
        return {"Q1": self.q1, "Q2": self.q2}

    def resistors(self):
        return {"RB": self.rb, "RBE1": self.rbe1, "RBE2": self.rbe2}

    def _setup(self, samples, temps=None, params=None):
        t = np.asarray(samples[self.env.temperature], dtype=float)
        t1 = t if temps is None else temps["Q1"]
        t2 = t if temps is None else temps["Q2"]
        vs = np.asarray(samples[self.env.supply], dtype=float)
        v_high, v_low, r_s = self.drive.levels(samples)
        g_in = 1.0 / (r_s + self.rb.resistance(samples, t))
        g_be1 = self.rbe1.conductance(samples, t)
        g_be2 = self.rbe2.conductance(samples, t)
        if self.internal_rbe1 is not None:
            g_be1 = g_be1 + self.internal_rbe1.conductance(samples, t)
        if self.internal_rbe2 is not None:
            g_be2 = g_be2 + self.internal_rbe2.conductance(samples, t)
        params = params or device_parameters(self, samples)
        q1 = params["Q1"].at_temperature(t1)
        q2 = params["Q2"].at_temperature(t2)
        load = self.load.at(samples, t, vs)
        return t, vs, v_high, v_low, g_in, g_be1, g_be2, q1, q2, load

    def _powers(self, samples, v_in, g_in, g_be1, g_be2, state, vs):
        """Dissipation of every part and the source powers of one solved state [W].

        A monolithic pair's internal resistors heat its die: their power counts with the
        output's (the die's), not with the external resistors they parallel, whose ratings
        see only their own V^2 / R (lumped, a 1 kohm beside an internal 120 ohm read nine
        times its dissipation).
        """
        r_s = self.drive.levels(samples)[2]
        i_in = (v_in - state["v_b1"]) * g_in
        v_be1, v_be2 = self.resistor_voltages(state)
        t = np.asarray(samples[self.env.temperature], dtype=float)
        g_ext1 = self.rbe1.conductance(samples, t) if self.internal_rbe1 is not None else g_be1
        g_ext2 = self.rbe2.conductance(samples, t) if self.internal_rbe2 is not None else g_be2
        internal = v_be1 ** 2 * (g_be1 - g_ext1) + v_be2 ** 2 * (g_be2 - g_ext2)
        return {
            "devices": {"Q1": state["p1"], "Q2": state["p2"] + internal},
            "resistors": {"RB": i_in ** 2 * (1.0 / g_in - r_s), "RBE1": v_be1 ** 2 * g_ext1,
                          "RBE2": v_be2 ** 2 * g_ext2},
            "source": i_in ** 2 * r_s,
            "load": (vs - state["v_out"]) * state["i_load"],
            "supply": vs * state["i_load"],
            "drive": v_in * i_in,
        }

    def evaluate(self, samples):
        """All metrics for a chunk: DC, switching and electro-thermal (see
        :func:`tolerance.models.stages.evaluation.evaluate_stage`)."""
        from tolerance.models.stages.evaluation import evaluate_stage

        return evaluate_stage(self, samples)

    def dc(self, samples, temps=None, temps_off=None, full=True, params=None, start=None):
        """DC solution at the given device temperatures [K] (default: the ambient); see
        :meth:`tolerance.models.stages.single.SingleStage.dc`."""
        params = params or device_parameters(self, samples)
        t, vs, v_high, v_low, g_in, g_be1, g_be2, q1, q2, load = self._setup(samples, temps,
                                                                             params)
        if temps_off is not None and temps_off is not temps:
            q1_off = params["Q1"].at_temperature(temps_off["Q1"])
            q2_off = params["Q2"].at_temperature(temps_off["Q2"])
        else:
            q1_off, q2_off = q1, q2
        n = vs.shape[0]
        opts = self.solver_options
        make = lambda v, mode, target=None: self.system(  # noqa: E731
            q1, q2, load, vs, v, g_in, g_be1, g_be2, mode, target)
        make_off = lambda v, mode, target=None: self.system(  # noqa: E731
            q1_off, q2_off, load, vs, v, g_in, g_be1, g_be2, mode, target)

        def circuit(v):
            return {"v_in": v, "g_in": g_in, "g_be1": g_be1, "load": load}

        demand_guess = load.current(vs - 1.0)[0]
        on = make(v_high, "on")
        starts = self.guesses("on", q1, q2, vs, demand_guess, g_be2)
        r_on = solve_with_restarts(on, warm_guesses(start, "on", starts), **opts)
        s_on = on.state(np.nan_to_num(r_on.x))
        x_on = np.where(r_on.converged[:, None], r_on.x, starts[0])

        if not full:
            off = make_off(v_low, "on")
            off_starts = self.guesses("off", q1_off, q2_off, vs, demand_guess, g_be2,
                                      **circuit(v_low))
            r_off = solve_with_restarts(off, warm_guesses(start, "off", off_starts + [x_on]),
                                        **opts)
            s_off = off.state(np.nan_to_num(r_off.x))
            return {"converged": r_on.converged & r_off.converged, "x_on": r_on.x,
                    "x_off": r_off.x,
                    "power_on": self._powers(samples, v_high, g_in, g_be1, g_be2, s_on, vs),
                    "power_off": self._powers(samples, v_low, g_in, g_be1, g_be2, s_off, vs)}

        edge = make(v_high, "edge")
        cols = [0, 2, 3]
        r_edge = solve_with_restarts(edge, [x_on[:, cols]] + [g[:, cols] for g in starts], **opts)
        s_edge = edge.state(np.nan_to_num(r_edge.x))
        demand = drive_demand(load.current(vs - s_edge["v_out"])[0], s_on["i_load"])

        off = make_off(v_low, "on")
        off_starts = self.guesses("off", q1_off, q2_off, vs, demand_guess, g_be2,
                                  **circuit(v_low))
        r_off = solve_with_restarts(off, warm_guesses(start, "off", off_starts + [x_on]), **opts)
        s_off = off.state(np.nan_to_num(r_off.x))

        target = THRESHOLD_FRACTION * np.where(r_on.converged, s_on["i_out"], 1.0)
        thr = make_off(v_high, "threshold", target)
        thr_starts = self.guesses("threshold", q1_off, q2_off, vs, target, g_be2,
                                  **circuit(v_high))

        def solve_threshold():
            r = solve_with_restarts(thr, thr_starts, slow=False, **opts)
            s_t = thr.state(np.nan_to_num(r.x))
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                return r, s_t["v_b1"] + s_t["i_rb_out"] / g_in

        def zero_drive_current(idx):
            zero = make_off(np.zeros(n), "on").subset(idx)
            # the off state (drive low, a few hundred millivolts at most) first, then the
            # off-state guesses at zero drive
            near = np.where(r_off.converged[idx, None], r_off.x[idx], off_starts[0][idx])
            zero_starts = self.guesses("off", q1_off, q2_off, vs, demand_guess, g_be2,
                                       **circuit(np.zeros(n)))
            r = solve_with_restarts(zero, [near] + [g[idx] for g in zero_starts], **opts)
            return r.converged, zero.state(np.nan_to_num(r.x))["i_out"]

        v_threshold, thr_ok = threshold_voltage(solve_threshold, zero_drive_current, target,
                                                opts)
        converged = r_on.converged & r_edge.converged & r_off.converged & thr_ok

        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            out = {
                "load_current": s_on["i_load"],
                "vce_on": s_on["v_out"],
                "load_voltage": vs - s_on["v_out"],
                "base_current": s_on["ib1"],
                "base_current_driver": s_on["ib1"],
                "base_current_output": np.abs(s_on["ib2"]),
                "drive_current": (v_high - s_on["v_b1"]) * g_in,
                "drive_margin": s_edge["i_out"] / demand,
                "power_driver": s_on["p1"],
                "power_output": s_on["p2"],
                "off_current": s_off["i_out"],
                "off_margin": v_threshold - v_low,
                "off_fraction": np.abs(s_off["i_out"]) / np.abs(s_on["i_load"]),
            }
            out.update(load.metrics(vs - s_on["v_out"], s_on["i_load"]))
        for key, value in out.items():
            out[key] = np.where(converged, np.asarray(value, dtype=float), np.nan)
        out["converged"] = converged
        out["power_on"] = self._powers(samples, v_high, g_in, g_be1, g_be2, s_on, vs)
        out["power_off"] = self._powers(samples, v_low, g_in, g_be1, g_be2, s_off, vs)
        out["vce_off"] = s_off["v_out"]
        out["capability"] = s_edge["i_out"]
        # the driver's collector current (the output's base current and RBE2's) on, and
        # where the output carries that capability (the driver at the edge of saturation,
        # its most: a saturated driver gives less for the same base current)
        out["ic_driver"] = np.abs(s_on["ic1"])
        out["capability_driver"] = np.abs(s_edge["ic1"])
        out["load_state"] = load
        return out


__all__ += ["DriveSpec", "THRESHOLD_FRACTION", "junction_limit", "read_drive",
            "solve_with_restarts", "warm_guesses"]
__all__ += ["PAIR_METRICS", "PairStage", "PairSystem", "threshold_voltage", "transistor_power",
            "vbe_guess"]
