"""Single NPN low-side switch.

Circuit: the drive (Thevenin: level V_in, source resistance R_S) feeds the base through the base
resistor RB; an optional pull-down RPD sits from base to emitter (ground); the load runs from
the supply to the collector. Parts ``RB``, ``RPD`` (optional), ``Q1``.

Unknowns of each solve: the intrinsic junction voltages ``x = (v_BE, v_BC)`` of Q1 [V]. With
``V_B = o_B(x)`` and ``V_C = o_C(x)`` the terminal voltages through the series resistances
(:func:`tolerance.models.transistor.terminal_offsets`) the equations are

==========  ===============================================================  ===============
name        residual [A]                                                      used in
==========  ===============================================================  ===============
input       (V_in - V_B) / (R_S + R_B) - V_B / R_PD - I_B                     on, edge
collector   I_load(V_supply - V_C) - I_C                                      on, threshold
threshold   I_load(V_supply - V_C) - 0.01 I_load,on                           threshold
==========  ===============================================================  ===============

In the ``edge`` solve v_BC = 0 is fixed and the collector equation is dropped; in the
``threshold`` solve the input equation is dropped and the input voltage follows from it.
"""

from __future__ import annotations

import numpy as np

from tolerance.models.parts import read_transistor
from tolerance.models.stages import (
    device_parameters,
    COMMON_METRICS,
    drive_demand,
    THRESHOLD_FRACTION,
    Subsettable,
    junction_limit,
    read_drive,
    read_environment,
    read_load_table,
    read_resistor,
    saturation_criterion,
    solve_with_restarts,
    stays_off_criterion,
    threshold_voltage,
    vbe_guess,
    warm_guesses,
)
from tolerance.models.transistor import critical_voltage, junction_currents, terminal_offsets
from tolerance.models.stages.evaluation import read_switching, read_thermal
from tolerance.protocol import register_stage

__all__ = ["SingleStage", "SingleSystem", "configure"]


def _junction_columns(q, vbe_col, vbc_col):
    nvt_f = 1.0 / q.inv_forward_nvt
    nvt_r = 1.0 / q.inv_reverse_nvt
    cols = [(vbe_col, q.polarity, nvt_f, critical_voltage(q.saturation_current, nvt_f))]
    if vbc_col is not None:
        cols.append((vbc_col, q.polarity, nvt_r, critical_voltage(q.saturation_current, nvt_r)))
    return cols


def _starved(vb_off):
    """Off-state start for a load that cannot pass the collector-base leakage at any voltage
    (an LED string above the supply): the collector at the base, where the leakage fades,
    instead of at the supply."""
    return np.stack([vb_off, np.zeros_like(vb_off)], axis=1)


class SingleSystem(Subsettable):
    """Equations of the single-NPN stage for one mode (``on``, ``edge``, ``threshold``).

    Parameters
    ----------
    q : ScaledTransistor
        Q1 at the sample temperatures.
    load : LoadState
        The load for the chunk.
    supply, v_in : ndarray
        Supply voltage and drive level [V].
    g_in, g_pd : ndarray
        Conductances of the input path R_S + R_B and of the pull-down [S].
    mode : str
        ``on``, ``edge`` or ``threshold``.
    i_target : ndarray, optional
        Load current of the threshold solve [A].
    """

    def __init__(self, q, load, supply, v_in, g_in, g_pd, mode, i_target=None):
        self.q = q
        self.load = load
        self.supply = supply
        self.v_in = v_in
        self.g_in = g_in
        self.g_pd = g_pd
        self.mode = mode
        self.i_target = i_target
        self.n_samples = supply.shape[0]

    def full(self, x):
        """Junction voltages (S, 2) of the mode's unknowns ``x``."""
        if self.mode == "edge":
            return np.stack([x[:, 0], np.zeros(x.shape[0])], axis=1)
        return x

    def state(self, x):
        """Currents, terminal offsets and load current at the unknowns ``x``."""
        xf = self.full(x)
        vbe, vbc = xf[:, 0], xf[:, 1]
        c = junction_currents(self.q, vbe, vbc)
        o = terminal_offsets(self.q, vbe, vbc, c)
        i_load, g_load = self.load.current(self.supply - o.collector)
        return c, o, i_load, g_load

    def residual(self, x):
        c, o, i_load, g_load = self.state(x)
        s = x.shape[0]
        g_b = self.g_in + self.g_pd
        if self.mode == "edge":
            f = ((self.v_in - o.base) * self.g_in - o.base * self.g_pd - c.base)[:, None]
            j = (-g_b * o.dbase_dvbe - c.dbase_dvbe)[:, None, None]
            scale = np.abs(self.v_in * self.g_in)
            return f, j, scale
        f = np.empty((s, 2))
        j = np.empty((s, 2, 2))
        if self.mode == "on":
            f[:, 0] = (self.v_in - o.base) * self.g_in - o.base * self.g_pd - c.base
            j[:, 0, 0] = -g_b * o.dbase_dvbe - c.dbase_dvbe
            j[:, 0, 1] = -g_b * o.dbase_dvbc - c.dbase_dvbc
        else:  # threshold: the load current is prescribed
            f[:, 0] = i_load - self.i_target
            j[:, 0, 0] = -g_load * o.dcollector_dvbe
            j[:, 0, 1] = -g_load * o.dcollector_dvbc
        f[:, 1] = i_load - c.collector
        j[:, 1, 0] = -g_load * o.dcollector_dvbe - c.dcollector_dvbe
        j[:, 1, 1] = -g_load * o.dcollector_dvbc - c.dcollector_dvbc
        # relative test against the drive's and the load's currents (bounded by the circuit),
        # never against the device currents of a wild iterate
        scale = np.abs(self.v_in * self.g_in) + np.abs(i_load)
        return f, j, scale

    def limit(self, x_new, x_old):
        cols = _junction_columns(self.q, 0, None if self.mode == "edge" else 1)
        return junction_limit(x_new, x_old, cols)


class SingleStage:
    """The configured single-NPN stage (picklable)."""

    name = "single"
    #: the transistor whose (v_BE, v_BC) are the columns of the on- and off-state unknowns
    junction_devices = ("Q1",)

    def __init__(self, env, drive, rb, rpd, q1, load, parameters):
        self.env = env
        self.drive = drive
        self.rb = rb
        self.rpd = rpd
        self.q1 = q1
        self.load = load
        self.parameters = parameters
        self.metrics = dict(COMMON_METRICS)
        self.metrics.update(load.metrics)
        self.criteria = [saturation_criterion(), stays_off_criterion()] + list(load.criteria)
        self.solver_options = {}

    devices = ("Q1",)

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
        return {"Q1": self.q1}

    def resistors(self):
        return {"RB": self.rb, "RPD": self.rpd}

    def _setup(self, samples, temps=None, params=None):
        t = np.asarray(samples[self.env.temperature], dtype=float)
        tq = t if temps is None else temps["Q1"]
        vs = np.asarray(samples[self.env.supply], dtype=float)
        v_high, v_low, r_s = self.drive.levels(samples)
        g_in = 1.0 / (r_s + self.rb.resistance(samples, t))
        g_pd = self.rpd.conductance(samples, t)
        q = (params or device_parameters(self, samples))["Q1"].at_temperature(tq)
        load = self.load.at(samples, t, vs)
        return t, vs, v_high, v_low, g_in, g_pd, q, load

    def evaluate(self, samples):
        """All metrics for a chunk: DC, switching and electro-thermal (see
        :func:`tolerance.models.stages.evaluation.evaluate_stage`)."""
        from tolerance.models.stages.evaluation import evaluate_stage

        return evaluate_stage(self, samples)

    def _powers(self, samples, t, v_in, g_in, g_pd, c, o, i_load, vs):
        """Dissipation of every part and the source powers of one solved state [W]."""
        r_s = self.drive.levels(samples)[2]
        i_in = (v_in - o.base) * g_in
        return {
            "devices": {"Q1": c.collector * o.collector + c.base * o.base},
            "resistors": {"RB": i_in ** 2 * self.rb.resistance(samples, t),
                          "RPD": o.base ** 2 * g_pd},
            "source": i_in ** 2 * r_s,
            "load": (vs - o.collector) * i_load,
            "supply": vs * i_load,
            "drive": v_in * i_in,
        }

    def dc(self, samples, temps=None, temps_off=None, full=True, params=None, start=None):
        """DC solution at the given device temperatures [K] (default: the ambient).

        ``temps_off`` are the temperatures of the off-state solve (default ``temps``). With
        ``full`` False only the on- and off-states are solved (the electro-thermal loop needs
        no more); the result then holds the powers, convergence and the solved unknowns
        ``x_on``, ``x_off`` (NaN rows where not converged) only. ``start`` (``{"on": (x,
        near), "off": (x, near)}``: an earlier solution of the same samples and which of them
        are close enough to start from) joins the guesses
        (:func:`tolerance.models.stages.warm_guesses`).
        """
        params = params or device_parameters(self, samples)
        t, vs, v_high, v_low, g_in, g_pd, q, load = self._setup(samples, temps, params)
        if temps_off is not None and temps_off is not temps:
            q_off = params["Q1"].at_temperature(temps_off["Q1"])
        else:
            q_off = q
        n = vs.shape[0]
        opts = self.solver_options

        pol = q.polarity
        # on-state: from a lightly saturated start, else from the active region
        on = SingleSystem(q, load, vs, v_high, g_in, g_pd, "on")
        demand_guess = load.current(vs - 0.2)[0]
        vbe0 = vbe_guess(q, demand_guess)
        sat0 = np.stack([vbe0, vbe0 - pol * 0.15], axis=1)
        act0 = np.stack([vbe0, vbe0 - 0.5 * vs], axis=1)
        r_on = solve_with_restarts(on, warm_guesses(start, "on", [sat0, act0]), **opts)
        c, o, i_on, _ = on.state(np.nan_to_num(r_on.x))
        x_on = np.where(r_on.converged[:, None], r_on.x, sat0)

        if not full:
            off = SingleSystem(q_off, load, vs, v_low, g_in, g_pd, "on")
            vb_off = np.minimum(np.abs(v_low) * g_in / (g_in + g_pd), 0.3) * q.polarity
            off_starts = [np.stack([vb_off, vb_off - vs], axis=1), x_on, act0,
                          _starved(vb_off)]
            r_off = solve_with_restarts(off, warm_guesses(start, "off", off_starts), **opts)
            c_off, o_off, i_l_off, _ = off.state(np.nan_to_num(r_off.x))
            return {"converged": r_on.converged & r_off.converged, "x_on": r_on.x,
                    "x_off": r_off.x,
                    "power_on": self._powers(samples, t, v_high, g_in, g_pd, c, o, i_on, vs),
                    "power_off": self._powers(samples, t, v_low, g_in, g_pd, c_off, o_off,
                                              c_off.collector, vs)}

        # edge of saturation
        edge = SingleSystem(q, load, vs, v_high, g_in, g_pd, "edge")
        r_edge = solve_with_restarts(edge, [x_on[:, :1], vbe0[:, None],
                                            np.full((n, 1), pol * 0.6)], **opts)
        ce, oe, _, _ = edge.state(np.nan_to_num(r_edge.x))
        demand = pol * drive_demand(pol * load.current(vs - oe.collector)[0], pol * i_on)

        # off-state: from cut-off, else from the on-state (a hot unit may conduct)
        off = SingleSystem(q_off, load, vs, v_low, g_in, g_pd, "on")
        vb_off = pol * np.minimum(np.abs(v_low) * g_in / (g_in + g_pd), 0.3)
        off_starts = [np.stack([vb_off, vb_off - vs], axis=1), x_on, act0, _starved(vb_off)]
        r_off = solve_with_restarts(off, warm_guesses(start, "off", off_starts), **opts)
        # the transistor's collector current (equal to the load's at the solution) keeps its
        # relative accuracy where the load voltage is a tiny difference of two large ones
        c_off, o_off, _, _ = off.state(np.nan_to_num(r_off.x))
        i_off = c_off.collector

        # switching threshold: input voltage for 1 % of the on-state load current
        target = THRESHOLD_FRACTION * np.where(r_on.converged, i_on, 1.0)
        thr = SingleSystem(q_off, load, vs, v_high, g_in, g_pd, "threshold", i_target=target)
        vbe_t = vbe_guess(q_off, target)
        thr_starts = [np.stack([vbe_t, vbe_t - 0.9 * vs], axis=1),
                      np.stack([vbe_t, vbe_t - 0.5 * vs], axis=1)]

        def solve_threshold():
            r = solve_with_restarts(thr, thr_starts, slow=False, **opts)
            ct, ot, _, _ = thr.state(np.nan_to_num(r.x))
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                return r, ot.base + (ot.base * g_pd + ct.base) / g_in

        def zero_drive_current(idx):
            zero = SingleSystem(q_off, load, vs, np.zeros(n), g_in, g_pd, "on").subset(idx)
            # the off state (drive low, a few hundred millivolts at most) first, then cut-off
            # and the starved collector at zero drive, then the off state's guesses
            near = np.where(r_off.converged[idx, None], r_off.x[idx], off_starts[0][idx])
            base = np.zeros(idx.size)
            cut = np.stack([base, -vs[idx]], axis=1)
            r = solve_with_restarts(zero, [near, cut, _starved(base)]
                                    + [g[idx] for g in off_starts], **opts)
            return r.converged, zero.state(np.nan_to_num(r.x))[0].collector

        v_threshold, thr_ok = threshold_voltage(solve_threshold, zero_drive_current, target,
                                                opts)
        with np.errstate(divide="ignore", invalid="ignore"):
            converged = r_on.converged & r_edge.converged & r_off.converged & thr_ok
            out = {
                "load_current": i_on,
                "vce_on": o.collector,
                "load_voltage": vs - o.collector,
                "base_current": c.base,
                "drive_current": (v_high - o.base) * g_in,
                "drive_margin": (ce.collector) / demand,
                "power_output": c.collector * o.collector + c.base * o.base,
                "off_current": i_off,
                "off_margin": v_threshold - v_low,
                "off_fraction": np.abs(i_off) / np.abs(i_on),
            }
            out.update(load.metrics(vs - o.collector, i_on))
        for key, value in out.items():
            out[key] = np.where(converged, np.asarray(value, dtype=float), np.nan)
        out["converged"] = converged
        out["power_on"] = self._powers(samples, t, v_high, g_in, g_pd, c, o, i_on, vs)
        out["power_off"] = self._powers(samples, t, v_low, g_in, g_pd, c_off, o_off, i_off, vs)
        out["vce_off"] = o_off.collector
        out["capability"] = ce.collector
        out["load_state"] = load
        return out


@register_stage("single", description="single NPN low-side switch with base resistor and "
                                      "optional base pull-down",
                parts=("RB", "RPD", "Q1"))
def configure(reader):
    """Build the single-NPN stage from a study (``reader`` is the top-level reader)."""
    env = read_environment(reader)
    drive = read_drive(reader)
    parts = reader.table("parts", required=True)
    rb = read_resistor(parts, "RB", "base resistor", required=True)
    rpd = read_resistor(parts, "RPD", "base pull-down resistor", required=False)
    q1 = read_transistor(parts, "Q1", "switching transistor", polarity="npn",
                         supply_minimum=env.supply_minimum)
    load = read_load_table(reader)
    names = [env.temperature, env.supply, drive.high, drive.low, drive.source_resistance,
             rb.value_parameter, rb.tempco_parameter, q1.hfe_parameter, q1.icbo_parameter]
    if rpd.present:
        names += [rpd.value_parameter, rpd.tempco_parameter]
    names += list(load.parameters)
    stage = SingleStage(env, drive, rb, rpd, q1, load, names)
    read_thermal(reader, parts, stage, {"Q1": "output"})
    read_switching(reader, parts, stage, "single", {"Q1": "output"})
    return stage
