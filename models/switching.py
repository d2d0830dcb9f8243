"""Switching transients of the three stage topologies and their switching metrics.

:func:`switching_metrics` takes a batch of samples of a switching stage (devices at their
temperatures with their charge parameters, resistors, drive, supply, load) and returns the
turn-on and turn-off times and energies measured on the switch current, vectorized over the
samples. Each sample is simulated twice, both runs in one batch of the integrator
(:func:`tolerance.models.transient.integrate`): a turn-on from the DC off-state (drive at its low
level, ramping to the high level over ``edge_time``) and a turn-off from the DC on-state. Both
start from steady state, i.e. after a long on or off time: the datasheet convention.

Circuits (unknowns in brackets; ``G`` ground = emitter of the stage)::

    single      drive -- R_s -- RB --+-- r_B -- B'   Q (NPN): B', C', G       [B', C']
                                    RPD
    darlington  drive ... -- B1'     Q1 (driver): B1', C, B2'                 [B1', B2', C]
                                     Q2 (output): B2', C, G;  RBE1: B1'-B2', RBE2: B2'-G
    sziklai     drive ... -- B1'     Q1 (driver, NPN): B1', N, G              [B1', N, C]
                                     Q2 (output, PNP): base N, emitter C, collector G;
                                     RBE1: B1'-G, RBE2: N-C

The load runs from the supply to the switch node (C' for the single, C otherwise); a coil adds
its current as an unknown, with the clamp (diode to the supply, zener plus diode, or none) at
the switch node. Series resistances: the input transistor's base resistance is added to the
drive's Thevenin resistance (exact with no RBE1 at the base; with one, the base resistance is
taken outside it); the resistance in series with the switch node (the single NPN's collector
resistance, the Sziklai output's emitter resistance) is added to the load branch (exact for a
resistor, lamp and LED string; for a coil it lies inside the clamp loop, where it carries the
freewheeling current too); the other series resistances (emitter resistances, the inner
connection of a pair, the collector resistances of a Darlington, whose output never saturates)
are not represented in the transient circuit.

Loads: resistor; lamp at its hot operating resistance (the on-state resistance of the static
lamp law; the filament's thermal time constant is long against a switching edge); LED string by
its static law; coil with inductance, the clamp current
``I_ref (exp((v - V_cl)/V_sl) - exp(-V_cl/V_sl))`` of the clamp's voltage ``V_cl`` (diode forward
voltage, or zener plus diode) reaching the on-current ``I_ref`` at ``V_cl`` with the slope
voltage ``V_sl`` (n V_T with n = 1.5 for the diode, 0.1 V for the zener; typical class values,
from memory). The output transistor's collector-emitter avalanche is a current source
``I_BR exp((v_CE - V_(BR)CEO) / V_av)`` with ``I_BR`` = 10 mA (the usual test current of a
V_(BR)CEO rating, from memory) and ``V_av`` = 0.5 % of V_(BR)CEO (a steep, smooth breakdown;
common practice, no source).

Metrics (standard 10 %/90 % definitions on the switch current, the current the load circuit
delivers into the switch node, i.e. load current minus clamp current):

=====================  =====  =========================================================
turn_on_delay          s      drive at 50 % of its swing to the switch current at 10 %
rise_time              s      10 % to 90 % of the on current
storage_time           s      turn-off drive at 50 % to the switch current at 90 %
fall_time              s      90 % to 10 %
turn_off_delay         s      storage_time + fall_time
energy_on_<device>     J      turn-on energy of a device
energy_off_<device>    J      turn-off energy of a device
energy_on, energy_off  J      sums over the devices
energy_off_clamp       J      energy dissipated in the clamp at turn-off (coil)
energy_off_load        J      energy dissipated in the load (for a coil, its winding) at
                              turn-off
energy_off_supply      J      energy the supply delivers during turn-off
vce_peak               V      highest switch voltage during turn-off
avalanche_energy       J      integral of v_CE times the avalanche current
transition_fraction    1      (turn-on delay + rise + storage + fall) / PWM period
converged              bool   both transients and both DC states solved
=====================  =====  =========================================================

Energies are the integral of v_CE i_C (static collector current, the avalanche current
included) in excess of the power of the final steady state, from the drive edge until the
sample has settled: ``E = int_0^T (p - p_final) dt``. So the mean loss over a PWM period is
``D P_on + (1 - D) P_off + f (E_on + E_off)`` when the on and off times are counted from the
drive edges, whatever the end of the integration window, provided each transient settles
before the next edge (common practice, no source; the stage's ``edge_fill`` and criterion
``transitions_fit`` check that).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field, fields

import numpy as np

from tolerance.models.charges import ChargeParameters, stored_charges
from tolerance.models.loads import LoadState
from tolerance.models.newton import newton_solve
from tolerance.models.transient import SETTLED, Observation, TransientResult, integrate
from tolerance.models.transistor import (
    ScaledTransistor,
    critical_voltage,
    junction_currents,
    limit_junction_step,
)

__all__ = [
    "DEVICE_ROLES",
    "METRIC_UNITS",
    "TOPOLOGIES",
    "StageCircuit",
    "SwitchingResult",
    "simulate_switching",
    "switching_metrics",
]

TOPOLOGIES = ("single", "darlington", "sziklai")
#: Device names each topology expects in ``devices``.
DEVICE_ROLES = {"single": ("output",), "darlington": ("driver", "output"),
                "sziklai": ("driver", "output")}
#: Units of the metrics :func:`switching_metrics` returns.
METRIC_UNITS = {
    "turn_on_delay": "s", "rise_time": "s", "storage_time": "s", "fall_time": "s",
    "turn_off_delay": "s", "energy_on": "J", "energy_off": "J", "energy_on_output": "J",
    "energy_off_output": "J", "energy_on_driver": "J", "energy_off_driver": "J",
    "energy_off_clamp": "J", "energy_off_load": "J", "energy_off_supply": "J",
    "vce_peak": "V", "avalanche_energy": "J", "transition_fraction": "1", "converged": "bool",
}

#: Most steps of one run per sample: a coil's slow decay through its clamp while a floating
#: node of a pair keeps the steps short can take tens of thousands (a sample that needs more is
#: reported as not converged)
MAX_STEPS = 100_000
#: Avalanche energy below this is reported as none [J] (see :func:`simulate_switching`).
AVALANCHE_FLOOR = 1e-12
#: Test current of a V_(BR)CEO rating, where the avalanche source reaches it [A].
BREAKDOWN_TEST_CURRENT = 10e-3
#: Slope voltage of the avalanche law as a fraction of V_(BR)CEO [1].
AVALANCHE_SLOPE_FRACTION = 0.005
#: Emission coefficient of the clamp diode [1] (typical class value, from memory).
CLAMP_DIODE_EMISSION = 1.5
#: Slope voltage of a zener clamp [V] (typical class value, from memory).
ZENER_SLOPE_VOLTAGE = 0.1
_CLAMP_EXP_MAX = 30.0  # linear continuation of the clamp and avalanche exponentials

# power columns of the observation
_P_OUTPUT, _P_DRIVER, _P_AVALANCHE, _P_CLAMP, _P_LOAD, _P_SUPPLY = range(6)


def _exp_lin(arg, limit=_CLAMP_EXP_MAX):
    """exp(arg) continued linearly above ``limit`` (C1): value and derivative."""
    e = np.exp(np.minimum(arg, limit))
    return np.where(arg > limit, e * (1.0 + (arg - limit)), e), e


def _take(v, idx):
    if isinstance(v, np.ndarray) and v.ndim >= 1:
        return v[idx]
    return v


@dataclass
class _Device:
    role: str
    scaled: ScaledTransistor
    charges: ChargeParameters
    b: int
    c: int
    e: int
    nvt_f: np.ndarray
    nvt_r: np.ndarray
    vcrit_f: np.ndarray
    vcrit_r: np.ndarray

    def subset(self, idx):
        return _Device(self.role, self.scaled.subset(idx), self.charges.subset(idx), self.b,
                       self.c, self.e, *(_take(a, idx) for a in (self.nvt_f, self.nvt_r,
                                                                  self.vcrit_f, self.vcrit_r)))


def _node(x, i):
    return x[:, i] if i >= 0 else 0.0


def _stamp(vec, jac, row, value, d_be, d_bc, b, c, e):
    """Add a device quantity depending on (v_be, v_bc) to node ``row`` and its Jacobian."""
    if row < 0:
        return
    vec[:, row] += value
    if b >= 0:
        jac[:, row, b] += d_be + d_bc
    if c >= 0:
        jac[:, row, c] -= d_bc
    if e >= 0:
        jac[:, row, e] -= d_be


class StageCircuit:
    """The transient circuit of a batch of switching stages (a :class:`ChargeSystem`).

    Built by :func:`simulate_switching`; see the module docstring for the circuits. Every
    per-sample attribute is an array over the batch, so :meth:`subset` selects samples.
    """

    def __init__(self, topology, devices, n_unknowns, switch_node, coil_index, drive,
                 resistors, load, supply, merged_resistance, avalanche, x_final, settle_scale,
                 ringing=None):
        if any(d.b < 0 for d in devices):  # evaluate() takes the junction voltages as (w,)
            raise ValueError("a transistor's base must be a node of the circuit, not ground")
        self.topology = topology
        self.devices: list[_Device] = devices
        self.n_unknowns = n_unknowns
        self.switch_node = switch_node
        self.coil_index = coil_index
        self.drive = drive  # dict: conductance, start, end, edge
        self.resistors = resistors  # list of (a, b, conductance)
        self.load = load  # dict
        self.supply = supply
        self.merged_resistance = merged_resistance
        self.avalanche = avalanche  # dict or None
        self.x_final = x_final
        self.settle_scale = settle_scale
        self.ringing = ringing  # dict or None: see settled()

    # -- ChargeSystem -------------------------------------------------------------------------
    def subset(self, idx):
        """The same circuit for the samples ``idx``."""
        load = {k: (v.take(idx) if isinstance(v, LoadState) else _take(v, idx))
                for k, v in self.load.items()}
        aval = None if self.avalanche is None else {k: _take(v, idx)
                                                    for k, v in self.avalanche.items()}
        return StageCircuit(
            self.topology, [d.subset(idx) for d in self.devices], self.n_unknowns,
            self.switch_node, self.coil_index, {k: _take(v, idx) for k, v in self.drive.items()},
            [(a, b, _take(g, idx)) for a, b, g in self.resistors], load,
            _take(self.supply, idx), _take(self.merged_resistance, idx), aval,
            _take(self.x_final, idx), _take(self.settle_scale, idx),
            None if self.ringing is None else {k: _take(v, idx) for k, v in self.ringing.items()})

    def drive_voltage(self, t):
        """Thevenin voltage of the drive at the input transistor's base [V] at times ``t``."""
        d = self.drive
        ramping = d["edge"] > 0
        # the same values as clip(t / edge, 0, 1) where the edge takes time; no division by 0
        ramp = np.minimum(np.maximum(t / np.where(ramping, d["edge"], 1.0), 0.0), 1.0)
        return d["start"] + (d["end"] - d["start"]) * np.where(ramping, ramp, 1.0)

    def _load_current(self, vc):
        """Current of the load branch into the switch node and d/dV_C (> 0 means the current
        falls as V_C rises, returned as di/dv of the load voltage)."""
        ld = self.load
        v = self.supply - vc
        kind = ld["kind"]
        if kind == "resistor":
            g = ld["conductance"]
            return v * g, g
        if kind == "led":
            return ld["state"].current(v)
        return None, None

    def _clamp(self, vc):
        ld = self.load
        if ld["clamp"] == "none":
            return None, None
        arg = (vc - self.supply - ld["clamp_voltage"]) / ld["clamp_slope"]
        e, de = _exp_lin(arg)
        i = ld["clamp_reference"] * (e - ld["clamp_offset"])
        return i, ld["clamp_reference"] * de / ld["clamp_slope"]

    def _avalanche(self, x):
        a = self.avalanche
        dev = self.devices[-1]
        vce = (_node(x, dev.c) - _node(x, dev.e)) * dev.scaled.polarity
        arg = (vce - a["breakdown"]) / a["slope"]
        e, de = _exp_lin(arg)
        return vce, BREAKDOWN_TEST_CURRENT * e, BREAKDOWN_TEST_CURRENT * de / a["slope"]

    def evaluate(self, t, x):
        """Currents ``f``, charges ``q`` and their Jacobians (see ChargeSystem)."""
        w, n = x.shape
        f = np.zeros((w, n))
        df = np.zeros((w, n, n))
        q = np.zeros((w, n))
        dq = np.zeros((w, n, n))
        g = self.drive["conductance"]
        f[:, 0] += g * (x[:, 0] - self.drive_voltage(t))
        df[:, 0, 0] += g
        for a, b, gr in self.resistors:
            i = gr * (_node(x, a) - _node(x, b))
            if a >= 0:
                f[:, a] += i
                df[:, a, a] += gr
                if b >= 0:
                    df[:, a, b] -= gr
            if b >= 0:
                f[:, b] -= i
                df[:, b, b] += gr
                if a >= 0:
                    df[:, b, a] -= gr
        aux = np.empty((w, len(self.devices)))
        for k_dev, dev in enumerate(self.devices):
            vb, vc, ve = _node(x, dev.b), _node(x, dev.c), _node(x, dev.e)
            vbe, vbc = vb - ve, vb - vc  # (w,): a base is never the ground node (__init__)
            jc = junction_currents(dev.scaled, vbe, vbc)
            ch = stored_charges(dev.scaled, dev.charges, vbe, vbc, jc.transport)
            b, c, e = dev.b, dev.c, dev.e
            _stamp(f, df, c, jc.collector, jc.dcollector_dvbe, jc.dcollector_dvbc, b, c, e)
            _stamp(f, df, b, jc.base, jc.dbase_dvbe, jc.dbase_dvbc, b, c, e)
            _stamp(f, df, e, -(jc.collector + jc.base), -(jc.dcollector_dvbe + jc.dbase_dvbe),
                   -(jc.dcollector_dvbc + jc.dbase_dvbc), b, c, e)
            _stamp(q, dq, b, ch.base_emitter + ch.base_collector, ch.dbe_dvbe,
                   ch.dbe_dvbc + ch.dbc_dvbc, b, c, e)
            _stamp(q, dq, e, -ch.base_emitter, -ch.dbe_dvbe, -ch.dbe_dvbc, b, c, e)
            _stamp(q, dq, c, -ch.base_collector, 0.0, -ch.dbc_dvbc, b, c, e)
            aux[:, k_dev] = jc.collector
        sw = self.switch_node
        vsw = x[:, sw]
        i_load, di = self._load_current(vsw)
        if i_load is not None:
            f[:, sw] -= i_load
            df[:, sw, sw] += di
        else:  # coil
            k = self.coil_index
            ld = self.load
            il = x[:, k]
            f[:, sw] -= il
            df[:, sw, k] -= 1.0
            f[:, k] = vsw + ld["resistance"] * il - self.supply
            df[:, k, sw] = 1.0
            df[:, k, k] = ld["resistance"]
            q[:, k] = ld["inductance"] * il
            dq[:, k, k] = ld["inductance"]
            ic, dic = self._clamp(vsw)
            if ic is not None:
                f[:, sw] += ic
                df[:, sw, sw] += dic
        if self.avalanche is not None:
            dev = self.devices[-1]
            _, iav, gav = self._avalanche(x)
            pol = dev.scaled.polarity
            # NPN: from collector to emitter; PNP: from emitter to collector
            src, dst = (dev.c, dev.e) if pol == 1 else (dev.e, dev.c)
            if src >= 0:
                f[:, src] += iav
                df[:, src, src] += gav
                if dst >= 0:
                    df[:, src, dst] -= gav
            if dst >= 0:
                f[:, dst] -= iav
                df[:, dst, dst] += gav
                if src >= 0:
                    df[:, dst, src] -= gav
        return f, df, q, dq, aux

    def switch_current(self, x):
        """Current the load circuit delivers into the switch node [A]."""
        vsw = x[:, self.switch_node]
        i_load, _ = self._load_current(vsw)
        if i_load is not None:
            return i_load
        ic, _ = self._clamp(vsw)
        il = x[:, self.coil_index]
        return il if ic is None else il - ic

    def observe(self, t, x, aux):
        """Switch current, device / avalanche / clamp / load / supply powers, switch voltage."""
        w = x.shape[0]
        vsw = x[:, self.switch_node]
        isw = self.switch_current(x)
        r = self.merged_resistance
        p = np.zeros((w, 6))
        for k_dev, dev in enumerate(self.devices):
            ic = aux[:, k_dev]
            pd = (_node(x, dev.c) - _node(x, dev.e)) * ic
            col = _P_OUTPUT if dev.role == "output" else _P_DRIVER
            p[:, col] += pd
        p[:, _P_OUTPUT] += r * isw * isw
        if self.avalanche is not None:
            vce, iav, _ = self._avalanche(x)
            p[:, _P_AVALANCHE] = vce * iav
            p[:, _P_OUTPUT] += vce * iav
        # the load branch carries the merged collector (emitter) resistance, whose r i^2 is
        # the output transistor's above: the load's own share is the branch's less that
        # (a coil's winding carries i_L, the switch i_L less the clamp's current, so while
        # the clamp conducts the model's r (i_L^2 - i_sw^2) stays with the winding and the
        # parts still add up to the supply's energy)
        ld = self.load
        if ld["kind"] == "coil":
            il = x[:, self.coil_index]
            ic, _ = self._clamp(vsw)
            if ic is not None:
                p[:, _P_CLAMP] = (vsw - self.supply) * ic
            p[:, _P_LOAD] = ld["resistance"] * il * il - r * isw * isw
        else:
            p[:, _P_LOAD] = (self.supply - vsw - r * isw) * isw
        p[:, _P_SUPPLY] = self.supply * isw
        return Observation(isw, p, vsw + r * isw)

    def settled(self, x):
        """Every unknown within its settling scale of the final DC state, or (a coil load)
        only the switch node still ringing with too little energy to change a metric.

        The second case is the coil's free oscillation with the switch node's capacitance
        after a turn-off: every other unknown (the coil current too) is settled, no junction,
        clamp or avalanche conducts more than ``ringing["current"]``, so the transistors are
        cut off and the oscillation only exchanges energy with the winding and the supply
        (what a cut-off device can still take is bounded separately, to a thousandth of
        that).
        Its energy ``0.5 dv' C dv + 0.5 L di^2`` (``dv``, ``di``: distance of the node
        voltages and the coil current from the final state, ``C`` the node capacitances there)
        plus the supply's share ``V_S |(C dv)_switch|`` bounds what the rest of the run can
        still add to any energy metric, and ``ringing["energy"]`` bounds that; the switch
        node's amplitude it allows stays below the clamp and breakdown conduction and does
        not forward-bias a junction at the switch node (checked), so the peak voltage is
        final.
        """
        near = np.abs(x - self.x_final) <= self.settle_scale
        plain = near.all(axis=1)
        rg = self.ringing
        if rg is None:
            return plain
        sw, k = self.switch_node, self.coil_index
        cand = near[:, k] & ~plain
        if not cand.any():
            return plain
        energy, dq_sw = self.ringing_energy(x)
        di = x[:, k] - self.x_final[:, k]
        bound = energy + np.abs(self.supply * dq_sw)
        ok = cand & (bound <= rg["energy"])
        cap = rg["capacitance"][:, sw, sw]
        # the largest swing the remaining energy allows must not reach a conduction level
        amp = np.sqrt(2.0 * energy / cap)
        reach = self.x_final[:, sw] + amp
        i_max = rg["current"]
        i_dev = np.zeros(x.shape[0])
        for d, dev in enumerate(self.devices):
            pol = dev.scaled.polarity
            i_s = dev.scaled.saturation_current
            i_dev = i_dev + np.abs(rg["collector"][:, d])
            for other, nvt in ((dev.e, dev.nvt_f), (dev.c, dev.nvt_r)):
                if other == sw:  # its most forward bias over the swing
                    vj = pol * (_node(x, dev.b) - self.x_final[:, sw]) + amp
                else:
                    vj = pol * (_node(x, dev.b) - _node(x, other))
                i_j = i_s * np.exp(np.minimum(vj / nvt, 80.0))
                ok &= i_j <= i_max
                i_dev = i_dev + i_j
        ld = self.load
        # a cut-off device carries its final current (leakage) plus at most the junction
        # currents above, so its power moves with v (v - v_final) times that current, whose
        # integral over the rest of the run follows from the winding (L di/dt = -dv - R di):
        # |int dv dt| <= L |di| + R |dq| with dq the charge the coil still moves into the
        # switch node (to first order in the swing: the device current's own dependence on it,
        # the Early effect, adds a second-order share that this does not bound; up to 7e-4
        # of the turn-off energy in the example studies)
        flux = ld["inductance"] * np.abs(di) + ld["resistance"] * np.abs(dq_sw)
        ok &= i_dev * flux <= 1e-3 * rg["energy"]
        if ld["clamp"] != "none":
            ic, _ = self._clamp(reach)
            ok &= ic <= i_max
        if self.avalanche is not None:
            _, iav, _ = self._avalanche(np.where(np.arange(x.shape[1]) == sw, reach[:, None], x))
            ok &= iav <= i_max
        return plain | ok

    def ringing_energy(self, x):
        """Energy of a coil circuit relative to its final state [J], ``0.5 dv' C dv +
        0.5 L di^2`` with the node capacitances ``C`` of the final state, and the charge the
        switch node holds above its final charge, ``(C dv)_switch`` [C] (see settled())."""
        rg, k = self.ringing, self.coil_index
        dx = x - self.x_final
        dx[:, k] = 0.0
        dq = np.einsum("sij,sj->si", rg["capacitance"], dx)  # the coil's row and column are 0
        di = x[:, k] - self.x_final[:, k]
        energy = (0.5 * np.abs(np.einsum("si,si->s", dx, dq))
                  + 0.5 * self.load["inductance"] * di * di)
        return energy, dq[:, self.switch_node]

    def limit(self, x_new, x_old):
        """Scale the update so that no junction exceeds the classical junction limit."""
        alpha = None
        for dev in self.devices:
            pol = dev.scaled.polarity
            for other, nvt, vcrit in ((dev.e, dev.nvt_f, dev.vcrit_f),
                                      (dev.c, dev.nvt_r, dev.vcrit_r)):
                vn = pol * (_node(x_new, dev.b) - _node(x_new, other))
                vo = pol * (_node(x_old, dev.b) - _node(x_old, other))
                vl = limit_junction_step(vn, vo, nvt, vcrit)
                if vl is vn:  # no step of this junction limited: its ratio is 1 everywhere
                    continue
                moved = vl != vn  # a limited step is more than 2 n V_T: vn - vo is not 0
                with np.errstate(divide="ignore", invalid="ignore"):
                    r = np.where(moved, (vl - vo) / (vn - vo), 1.0)
                r = np.clip(np.where(np.isfinite(r), r, 1.0), 1e-3, 1.0)
                alpha = r if alpha is None else np.minimum(alpha, r)
        if alpha is None or (alpha == 1.0).all():
            return x_new
        return x_old + alpha[:, None] * (x_new - x_old)


class _DCSystem:
    """A :class:`StageCircuit` at the end level of its drive, for ``newton_solve``."""

    def __init__(self, circuit: StageCircuit, current_scale):
        self.circuit = circuit
        self.current_scale = current_scale

    def residual(self, x):
        t = np.full(x.shape[0], np.inf)
        f, df, _, _, _ = self.circuit.evaluate(t, x)
        return f, df, self.current_scale

    def subset(self, idx):
        return _DCSystem(self.circuit.subset(idx), _take(self.current_scale, idx))

    def limit(self, x_new, x_old):
        return self.circuit.limit(x_new, x_old)


@dataclass
class SwitchingResult:
    """Metrics and the two transient runs behind them.

    ``turn_on`` and ``turn_off`` hold the integrator's results for the samples (index ``i`` of
    each is sample ``i``); ``circuit`` is the batch of both runs (turn-on runs first).
    """

    metrics: dict[str, np.ndarray]
    turn_on: TransientResult
    turn_off: TransientResult
    circuit: StageCircuit
    initial_state: np.ndarray
    final_power: np.ndarray
    on_current: np.ndarray
    end_time: np.ndarray = field(default_factory=lambda: np.zeros(0))


def _arr(v, n):
    return np.broadcast_to(np.asarray(v, dtype=float), (n,)).copy()


def _broadcast_fields(obj, n):
    """A dataclass copy with every array field broadcast to length ``n``."""
    out = {}
    for f in fields(obj):
        v = getattr(obj, f.name)
        if isinstance(v, np.ndarray) and v.ndim >= 1:
            v = np.broadcast_to(v, (n,)).copy()
        out[f.name] = v
    return type(obj)(**out)


def _resistor(resistors, key, n):
    v = resistors.get(key)
    if v is None:
        return np.full(n, np.inf)
    return _arr(v, n)


def simulate_switching(topology, devices, resistors, drive, supply, load_state, temperature, *,
                       relative_tolerance=5e-4, voltage_tolerance=1e-3, time_limit=None,
                       settle_voltage=2e-3, charge_fraction=0.5, record=(),
                       max_steps=MAX_STEPS) -> SwitchingResult:
    """Turn-on and turn-off transients of a batch of stages and their switching metrics.

    Parameters are those of :func:`switching_metrics`; in addition ``record`` names sample
    indices whose waveforms the integrator stores (turn-on and turn-off).

    Returns
    -------
    SwitchingResult
    """
    if topology not in TOPOLOGIES:
        raise ValueError(f"topology must be one of {TOPOLOGIES}, got {topology!r}")
    roles = DEVICE_ROLES[topology]
    missing = [r for r in roles if r not in devices]
    if missing:
        raise ValueError(f"{topology}: devices {missing} missing (expected {roles})")
    if "RB" not in resistors:
        raise ValueError("resistors: the base resistor 'RB' is required")
    supply = np.atleast_1d(np.asarray(supply, dtype=float))
    s = supply.size
    temperature = _arr(temperature, s)
    high, low = _arr(drive["high"], s), _arr(drive["low"], s)
    r_src, edge = _arr(drive["source_resistance"], s), _arr(drive["edge_time"], s)
    rb = _arr(resistors["RB"], s)
    rpd = _resistor(resistors, "RPD", s)
    rbe1 = _resistor(resistors, "RBE1", s)
    rbe2 = _resistor(resistors, "RBE2", s)

    two = np.concatenate([np.arange(s), np.arange(s)])  # runs: turn-on, then turn-off
    scaled = {r: _broadcast_fields(devices[r][0], s) for r in roles}
    charges = {r: devices[r][1].broadcast(s) for r in roles}
    inp = scaled[roles[0]]
    out = scaled["output"]
    if topology == "single" and out.polarity != 1:
        raise ValueError("single: the output transistor must be an NPN")
    if topology == "darlington" and (inp.polarity != 1 or out.polarity != 1):
        raise ValueError("darlington: both transistors must be NPN")
    if topology == "sziklai" and (inp.polarity != 1 or out.polarity != -1):
        raise ValueError("sziklai: the driver must be an NPN and the output a PNP")

    # drive Thevenin at the input transistor's intrinsic base
    r_path = r_src + rb
    with np.errstate(divide="ignore", invalid="ignore"):
        divider = np.where(np.isinf(rpd), 1.0, rpd / (r_path + rpd))
        r_th = np.where(np.isinf(rpd), r_path, r_path * rpd / (r_path + rpd))
    r_th = r_th + _arr(inp.base_resistance, s)
    drive_run = {
        "conductance": (1.0 / r_th)[two],
        "start": np.concatenate([low * divider, high * divider]),
        "end": np.concatenate([high * divider, low * divider]),
        "edge": edge[two],
    }

    # nodes and devices
    def dev(role, b, c, e):
        p = scaled[role]
        nvt_f = 1.0 / _arr(p.inv_forward_nvt, s)
        nvt_r = 1.0 / _arr(p.inv_reverse_nvt, s)
        vcf = critical_voltage(_arr(p.saturation_current, s), nvt_f)
        vcr = critical_voltage(_arr(p.saturation_current, s), nvt_r)
        d = _Device(role, p, charges[role], b, c, e, nvt_f, nvt_r, vcf, vcr)
        return d.subset(two)

    g = lambda r: np.where(np.isinf(r), 0.0, 1.0 / r)[two]  # noqa: E731
    if topology == "single":
        devs = [dev("output", 0, 1, -1)]
        switch, n = 1, 2
        res = [(0, -1, g(rbe1))]
        merged = _arr(out.collector_resistance, s)
    elif topology == "darlington":
        devs = [dev("driver", 0, 2, 1), dev("output", 1, 2, -1)]
        switch, n = 2, 3
        res = [(0, 1, g(rbe1)), (1, -1, g(rbe2))]
        merged = np.zeros(s)
    else:
        devs = [dev("driver", 0, 1, -1), dev("output", 1, -1, 2)]
        switch, n = 2, 3
        res = [(0, -1, g(rbe1)), (1, 2, g(rbe2))]
        merged = _arr(out.emitter_resistance, s)
    res = [(a, b, gr) for a, b, gr in res if np.any(gr > 0)]

    # load
    kind = load_state.kind
    coil_index = -1
    t_scale = np.zeros(s)
    if kind in ("resistor", "lamp"):
        if kind == "resistor":
            r_load = _arr(load_state.resistance, s)
        else:
            i0, _ = load_state.current(supply)
            r_load = supply / i0  # refined below at the on-state
        load = {"kind": "resistor", "conductance": (1.0 / (r_load + merged))[two]}
        i_ref = supply / r_load
    elif kind == "led":
        st = copy.copy(load_state)
        st.series_resistance = _arr(load_state.series_resistance, s) + merged
        load = {"kind": "led", "state": st.take(two)}
        i_ref = np.maximum(supply / st.series_resistance, 1e-6)
    elif kind == "coil":
        r_coil = _arr(load_state.resistance, s) + merged
        ind = _arr(load_state.inductance, s)
        i_ref = supply / r_coil
        clamp = load_state.clamp
        load = {"kind": "coil", "resistance": r_coil[two], "inductance": ind[two],
                "clamp": clamp}
        if clamp != "none":
            vcl = _arr(load_state.clamp_voltage, s)
            if clamp == "diode":
                slope = CLAMP_DIODE_EMISSION * 1.380649e-23 / 1.602176634e-19 * temperature
            else:
                slope = np.full(s, ZENER_SLOPE_VOLTAGE)
            load.update(clamp_voltage=vcl[two], clamp_slope=slope[two],
                        clamp_reference=i_ref[two], clamp_offset=np.exp(-vcl / slope)[two])
        coil_index = n
        n += 1
        t_scale = ind / r_coil
    else:
        raise ValueError(f"load kind {kind!r} is not supported in transient")

    bv = _arr(charges["output"].collector_emitter_breakdown, s)
    aval = None
    if np.any(np.isfinite(bv)):
        aval = {"breakdown": bv[two], "slope": (AVALANCHE_SLOPE_FRACTION * bv)[two]}

    settle = np.full((2 * s, n), settle_voltage)
    if coil_index >= 0:
        settle[:, coil_index] = (1e-3 * i_ref)[two]
    circuit = StageCircuit(topology, devs, n, switch, coil_index, drive_run, res, load,
                           supply[two], merged[two], aval, np.zeros((2 * s, n)), settle)

    # ---- DC states at the end level of each run's drive
    vs = supply[two]
    x_guess = np.zeros((2 * s, n))
    on = np.arange(2 * s) < s
    v_sat = np.where(on, 0.2, vs)
    if topology == "single":
        x_guess[:, 0] = np.where(on, 0.75, np.minimum(drive_run["end"], 0.3))
        x_guess[:, 1] = v_sat
    elif topology == "darlington":
        x_guess[:, 0] = np.where(on, 1.4, np.minimum(drive_run["end"], 0.3))
        x_guess[:, 1] = np.where(on, 0.7, 0.0)
        x_guess[:, 2] = np.where(on, 0.9, vs)
    else:
        x_guess[:, 0] = np.where(on, 0.7, np.minimum(drive_run["end"], 0.3))
        x_guess[:, 1] = np.where(on, 0.2, vs)
        x_guess[:, 2] = np.where(on, 0.9, vs)
    if coil_index >= 0:
        x_guess[:, coil_index] = np.where(on, i_ref[two], 0.0)
    current_scale = np.maximum(i_ref[two], 1e-6)

    def solve_dc(x_start):
        res_dc = newton_solve(_DCSystem(circuit, current_scale), x_start, max_iterations=100)
        return res_dc.x, res_dc.converged

    x_dc, ok_dc = solve_dc(x_guess)
    retry = np.flatnonzero(~ok_dc)
    if retry.size:
        # second starts. An off state whose load passes little current near the supply (an
        # LED string near or above its forward voltage) ran from the supply to below ground
        # and back: its nodes that start at the supply start where the load passes the
        # transistors' leakage instead. An on state far from saturation (a base resistor
        # a thousand times too large) starts with its switch node at half the supply.
        leak = 1e-12 + sum(np.abs(_arr(q.cbo_leakage, s)) for q, _ in devices.values())
        v_leak = np.clip(supply - load_state.voltage_guess(leak), 0.0, supply)[two]
        alt = np.where((np.arange(n) != coil_index) & (x_guess == vs[:, None]) & ~on[:, None],
                       v_leak[:, None], x_guess)
        alt[on, switch] = 0.5 * vs[on]
        if topology == "sziklai":  # the output's base a junction below its emitter
            alt[on, 1] = np.maximum(0.5 * vs[on] - 0.7, 0.0)
        system = _DCSystem(circuit, current_scale)
        again = newton_solve(system.subset(retry), alt[retry], max_iterations=100)
        x_dc[retry] = again.x
        ok_dc[retry] = again.converged
        slow = np.flatnonzero(~ok_dc)
        if slow.size:
            # and short steps, as the stages' DC solves end (a Newton two-cycle between two
            # collector voltages on either side of the solution)
            last = newton_solve(system.subset(slow), alt[slow], max_iterations=300,
                                max_step=0.05)
            x_dc[slow] = last.x
            ok_dc[slow] = last.converged
        # an off state that the leakage holds on (a driver above 200 degC, its I_CBO in tens
        # of milliamperes, turned on through its base resistor) lies near the on state: from
        # the on state's solution, short steps
        near = np.flatnonzero(~ok_dc & (np.arange(2 * s) >= s) & np.tile(ok_dc[:s], 2))
        if near.size:
            from_on = newton_solve(system.subset(near), x_dc[near - s], max_iterations=300,
                                   max_step=0.05)
            x_dc[near] = from_on.x
            ok_dc[near] = from_on.converged
    if kind == "lamp":
        # hot operating resistance: fixed point of R = v / i(v) at the on-state
        for _ in range(4):
            # the lamp's share of the voltage across lamp plus merged series resistance
            v_branch = supply - np.where(ok_dc[:s], x_dc[:s, switch], 0.0)
            v_on = v_branch * r_load / (r_load + merged)
            i_on, _ = load_state.current(v_on)
            r_load = v_on / i_on
            circuit.load["conductance"] = (1.0 / (r_load + merged))[two]
            x_dc, ok_dc = solve_dc(np.where(ok_dc[:, None], x_dc, x_guess))
    circuit.x_final = np.where(ok_dc[:, None], x_dc, 0.0)
    x0 = np.concatenate([circuit.x_final[s:], circuit.x_final[:s]])
    ok0 = np.concatenate([ok_dc[s:], ok_dc[:s]]) & ok_dc

    # final powers and switch currents
    t_inf = np.full(2 * s, np.inf)
    _, _, _, dq_final, aux_final = circuit.evaluate(t_inf, circuit.x_final)
    obs_final = circuit.observe(t_inf, circuit.x_final, aux_final)
    if coil_index >= 0:
        # the ringing end of a run (StageCircuit.settled): 1 % of the relative tolerance of
        # the coil's stored energy (the scale of the turn-off energies of clamp, winding and
        # supply), and cut-off below 1e-6 of the on-current
        circuit.ringing = {
            "capacitance": np.where(np.arange(n) == coil_index, 0.0, dq_final),
            "energy": (1e-2 * relative_tolerance * 0.5 * ind * i_ref**2)[two],
            "current": (1e-6 * i_ref)[two],
            "collector": aux_final,
        }
    i_on = obs_final.current[:s]
    i_off = obs_final.current[s:]
    swing = i_on - i_off
    lv = np.stack([i_off + 0.1 * swing, i_off + 0.9 * swing], axis=1)
    levels = np.concatenate([lv, lv[:, ::-1]])
    dirs = np.concatenate([np.ones((s, 2)), -np.ones((s, 2))])
    ok0 &= np.concatenate([swing > 0, swing > 0])

    # tolerances, steps, end times
    atol = np.full((2 * s, n), voltage_tolerance)
    if coil_index >= 0:
        atol[:, coil_index] = (voltage_tolerance / r_coil)[two]
    tf = np.min([_arr(charges[r].forward_transit_time, s) for r in roles], axis=0)
    h0 = np.clip(np.where(tf > 0, 0.05 * tf, 1e-11), 1e-12, 1e-7)
    h0 = np.where(edge > 0, 0.05 * edge, h0)
    if time_limit is None:
        t_end = np.maximum(1e-3, 60.0 * t_scale)
    else:
        t_end = _arr(time_limit, s)
    t_end_run = np.where(ok0, t_end[two], 0.0)
    bps = np.where(edge > 0, edge, np.inf)[two][:, None]
    rec = [int(r) for r in record] + [int(r) + s for r in record]
    # charge tolerance: the voltage tolerance times each node's capacitance in the off-state
    # (depletion capacitance; the stored charge of the on-state is held to the relative
    # tolerance)
    x_start = np.where(ok0[:, None], x0, 0.0)
    x_off = np.concatenate([x_start[:s], circuit.x_final[s:]])[two]
    _, _, _, dq_s, _ = circuit.evaluate(np.zeros(2 * s), x_off)
    cap = np.abs(np.einsum("sii->si", dq_s))
    x_on = np.concatenate([circuit.x_final[:s], x_start[s:]])[two]
    _, _, q_on, _, _ = circuit.evaluate(np.zeros(2 * s), x_on)
    # a floor of 1 % of the relative tolerance on the on-state charge, for nodes whose
    # charge vanishes in the off-state (no depletion capacitance)
    qtol = voltage_tolerance * cap + 1e-2 * relative_tolerance * np.abs(q_on)
    if coil_index >= 0:
        qtol[:, coil_index] = (ind * voltage_tolerance / r_coil)[two]
    result = integrate(circuit, x_start, t_end_run, charge_tolerance=qtol,
                       charge_relative_tolerance=charge_fraction * relative_tolerance,
                       absolute_tolerance=atol, relative_tolerance=relative_tolerance,
                       breakpoints=bps, event_levels=levels, event_directions=dirs,
                       initial_step=h0[two], record=rec, max_steps=max_steps)

    if circuit.ringing is not None:
        # a run that ended on the ringing rule (StageCircuit.settled) still holds a little
        # energy: the coil still moves the switch node's excess charge, which the supply
        # delivers at V_S, and the winding dissipates that work plus the stored energy
        # (conservation of charge and energy; the cut-off devices' share is bounded there)
        xe = result.final_state
        ringing = (result.status == SETTLED) & ~np.all(
            np.abs(xe - circuit.x_final) <= circuit.settle_scale, axis=1)
        if np.any(ringing):
            energy, dq_sw = circuit.ringing_energy(xe)
            work = -circuit.supply * dq_sw
            result.integrals[:, _P_SUPPLY] += np.where(ringing, work, 0.0)
            result.integrals[:, _P_LOAD] += np.where(ringing, energy + work, 0.0)
    ok_run = ok0 & result.ok & np.all(np.isfinite(result.event_times), axis=1)
    converged = ok_run[:s] & ok_run[s:]
    t50 = 0.5 * edge
    ev_on, ev_off = result.event_times[:s], result.event_times[s:]
    excess = result.integrals - obs_final.power * result.end_time[:, None]
    e_on, e_off = excess[:s], excess[s:]
    metrics = {
        "turn_on_delay": ev_on[:, 0] - t50,
        "rise_time": ev_on[:, 1] - ev_on[:, 0],
        "storage_time": ev_off[:, 0] - t50,
        "fall_time": ev_off[:, 1] - ev_off[:, 0],
    }
    metrics["turn_off_delay"] = metrics["storage_time"] + metrics["fall_time"]
    metrics["energy_on_output"] = e_on[:, _P_OUTPUT]
    metrics["energy_off_output"] = e_off[:, _P_OUTPUT]
    if topology != "single":
        metrics["energy_on_driver"] = e_on[:, _P_DRIVER]
        metrics["energy_off_driver"] = e_off[:, _P_DRIVER]
    metrics["energy_on"] = e_on[:, _P_OUTPUT] + e_on[:, _P_DRIVER]
    metrics["energy_off"] = e_off[:, _P_OUTPUT] + e_off[:, _P_DRIVER]
    metrics["energy_off_clamp"] = e_off[:, _P_CLAMP]
    metrics["energy_off_load"] = e_off[:, _P_LOAD]
    metrics["energy_off_supply"] = e_off[:, _P_SUPPLY]
    metrics["vce_peak"] = result.peak_voltage[s:]
    # absorbed energy, never below zero: a clamped coil's leftover is the final state's
    # vanishing avalanche power times the run's length taken off a zero integral (-4e-41 J);
    # and below a picojoule none at all: a diode clamp holds the switch tens of volts under
    # V_(BR)CEO, where the exponential law still carries some 1e-50 A (7e-60 J printed), not
    # an avalanche, and a single-pulse rating is millijoules
    aval = e_off[:, _P_AVALANCHE]
    metrics["avalanche_energy"] = np.where(aval < AVALANCHE_FLOOR, 0.0, aval)
    freq = drive.get("frequency")
    total = (metrics["turn_on_delay"] + metrics["rise_time"] + metrics["storage_time"]
             + metrics["fall_time"])
    if freq is None:
        metrics["transition_fraction"] = np.full(s, np.nan)
    else:
        metrics["transition_fraction"] = total * _arr(freq, s)
    for key in metrics:
        metrics[key] = np.where(converged, metrics[key], np.nan)
    metrics["converged"] = converged

    def part(sl):
        return TransientResult(result.event_times[sl], result.integrals[sl],
                               result.peak_voltage[sl], result.end_time[sl],
                               result.final_state[sl], result.status[sl], result.steps[sl],
                               result.rejected[sl],
                               {(r - sl.start): w for r, w in result.waveforms.items()
                                if sl.start <= r < sl.stop})

    return SwitchingResult(metrics, part(slice(0, s)), part(slice(s, 2 * s)), circuit, x0,
                           obs_final.power, i_on, result.end_time)


def switching_metrics(topology, devices, resistors, drive, supply, load_state, temperature,
                      **options) -> dict[str, np.ndarray]:
    """Switching metrics of a batch of stages.

    Parameters
    ----------
    topology : {"single", "darlington", "sziklai"}
    devices : dict[str, tuple[ScaledTransistor, ChargeParameters]]
        ``"output"`` (and ``"driver"`` for the pairs; the Sziklai output is the PNP), each at
        the sample temperatures.
    resistors : dict[str, ndarray]
        ``"RB"`` base resistor [ohm] (required); ``"RPD"`` base pull-down, ``"RBE1"``,
        ``"RBE2"`` base-emitter resistors of driver and output [ohm]; absent or ``inf``: not
        fitted.
    drive : dict[str, ndarray]
        ``"high"``, ``"low"`` open-circuit levels [V], ``"source_resistance"`` [ohm],
        ``"edge_time"`` (linear ramp between the levels, 0 for a step) [s]; optional
        ``"frequency"`` [Hz] and ``"duty"`` [1] of the PWM.
    supply : ndarray
        Supply voltage [V].
    load_state : LoadState
        The load for these samples (:mod:`tolerance.models.loads`).
    temperature : ndarray
        Ambient temperature [K] (clamp diode).
    **options
        ``max_steps`` per run and sample (default :data:`MAX_STEPS`);
        ``relative_tolerance`` [1] (default 5e-4) and ``voltage_tolerance`` [V] (default
        1 mV) of the local error of the unknowns; the node charges are held to
        ``charge_fraction`` (default 0.5) times the relative tolerance and to the voltage
        tolerance times each node's off-state capacitance; ``time_limit`` [s] per sample
        (default 1 ms, or 60 coil time constants if longer); ``settle_voltage`` [V] (default
        2 mV): a run ends once every node is this close to its final DC state (coil currents:
        0.1 % of the on-current) and both events have been seen, or (a coil load) once only
        the coil's free oscillation with the switch node's capacitance is left, with too
        little energy to change a metric (``StageCircuit.settled``; the charge and energy it
        still holds are added to the supply's and the winding's energies). A sample whose run
        does not see both events within the time limit is not converged.


    Returns
    -------
    dict[str, ndarray]
        The metrics of the module docstring (NaN where ``converged`` is False).

    Notes
    -----
    ``drive["duty"]`` is accepted for a stage's thermal averaging and not used here: both
    transitions start from steady state whatever the duty. The defaults keep the delays within
    1 % and the energies within 2 % of a solve_ivp reference (tests/test_switching.py).
    """
    return simulate_switching(topology, devices, resistors, drive, supply, load_state,
                              temperature, **options).metrics
