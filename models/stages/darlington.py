"""Darlington pair low-side switch (discrete pair or one monolithic die).

Circuit: the drive feeds the driver Q1's base through RB; Q1's emitter drives the output
Q2's base; both collectors join at the output node, which the load pulls to the supply; Q2's
emitter is ground. Optional base-emitter resistors: RBE1 across Q1 (base to Q2's base) and
RBE2 across Q2 (Q2's base to ground). Parts ``RB``, ``RBE1``, ``RBE2``, ``Q1``, ``Q2``.

A monolithic Darlington is one part: ``[parts.Q2] monolithic = true`` with
``device = "monolithic_darlington"`` (or another library entry of kind ``darlington``) gives
both transistors from the entry's ``[driver]`` and ``[output]`` dies and its internal
base-emitter resistors (parameters ``Q2.rbe_driver`` and ``Q2.rbe_output``, spread by the
entry's ``rbe_tolerance``, in parallel with any external RBE1/RBE2); ``[parts.Q1]`` may still
override driver figures. The two dies share the temperature (the ambient) and, on one die,
their gains track: add ``[[correlation]] parameters = ["Q1.hfe", "Q2.hfe"]`` with a coefficient
such as 0.8 (suggested in ``suggested_correlations``; common practice, no source).

Unknowns: the junction voltages (v_BE1, v_BC1, v_BE2, v_BC2). With Q2's terminals relative
to ground, V_B2 = o_B2, V_C = o_C2, and Q1's relative to its emitter (= V_B2),
V_B1 = V_B2 + o_B1, V_C1 = V_B2 + o_C1:

========  ======================================================================
row       residual [A]
========  ======================================================================
input     (V_in - V_B1) G_in - (V_B1 - V_B2) G_BE1 - I_B1
middle    I_C1 + I_B1 + (V_B1 - V_B2) G_BE1 - V_B2 G_BE2 - I_B2
output    I_load(V_supply - V_C) - I_C1 - I_C2
loop      1 mS (V_C1 - V_C)                       (the two collectors are one node)
target    I_load(V_supply - V_C) - 0.01 I_load,on (threshold mode)
========  ======================================================================

Textbook behaviour the tests check: in the active region the pair's gain is
beta1 beta2 + beta1 + beta2; fully on it sits near V_BE2 + V_CE1(sat), above a single
transistor's V_CE(sat), because the output transistor cannot saturate.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from tolerance.models.parts import library, read_transistor
from tolerance.models.stages import (
    JUNCTION_LEAK,
    LOOP_CONDUCTANCE,
    PairStage,
    PairSystem,
    ResistorPart,
    read_drive,
    read_environment,
    read_load_table,
    read_resistor,
    transistor_power,
    vbe_guess,
)
from tolerance.models.transistor import junction_currents, terminal_offsets
from tolerance.models.stages.evaluation import read_switching, read_thermal
from tolerance.protocol import register_stage
from tolerance.study import Reader

__all__ = ["DarlingtonStage", "DarlingtonSystem", "configure"]


class DarlingtonSystem(PairSystem):
    """Equations of the Darlington stage (see the module docstring)."""

    def equations(self, xf, jacobian=True):
        vbe1, vbc1, vbe2, vbc2 = xf[:, 0], xf[:, 1], xf[:, 2], xf[:, 3]
        c1 = junction_currents(self.q1, vbe1, vbc1)
        o1 = terminal_offsets(self.q1, vbe1, vbc1, c1)
        c2 = junction_currents(self.q2, vbe2, vbc2)
        o2 = terminal_offsets(self.q2, vbe2, vbc2, c2)
        v_b2 = o2.base
        v_c = o2.collector
        v_b1 = v_b2 + o1.base
        v_c1 = v_b2 + o1.collector
        i_load, g_load = self.load.current(self.supply - v_c)
        g_in, g1, g2 = self.g_in, self.g_be1, self.g_be2
        gl = LOOP_CONDUCTANCE
        i_be1 = (v_b1 - v_b2) * g1
        f = [
            (self.v_in - v_b1) * g_in - i_be1 - c1.base,  # input
            c1.collector + c1.base + i_be1 - v_b2 * g2 - c2.base,  # middle
            i_load - c1.collector - c2.collector,  # output
            gl * (v_c1 - v_c),  # loop
            i_load - self.i_target,  # threshold target
        ]
        gg = g_in + g1
        j = None
        if jacobian:
            j = [
                [-gg * o1.dbase_dvbe - c1.dbase_dvbe, -gg * o1.dbase_dvbc - c1.dbase_dvbc,
                 -g_in * o2.dbase_dvbe, -g_in * o2.dbase_dvbc],
                [c1.dcollector_dvbe + c1.dbase_dvbe + g1 * o1.dbase_dvbe,
                 c1.dcollector_dvbc + c1.dbase_dvbc + g1 * o1.dbase_dvbc,
                 -g2 * o2.dbase_dvbe - c2.dbase_dvbe, -g2 * o2.dbase_dvbc - c2.dbase_dvbc],
                [-c1.dcollector_dvbe, -c1.dcollector_dvbc,
                 -g_load * o2.dcollector_dvbe - c2.dcollector_dvbe,
                 -g_load * o2.dcollector_dvbc - c2.dcollector_dvbc],
                [gl * o1.dcollector_dvbe, gl * o1.dcollector_dvbc,
                 gl * (o2.dbase_dvbe - o2.dcollector_dvbe),
                 gl * (o2.dbase_dvbc - o2.dcollector_dvbc)],
                [0.0, 0.0, -g_load * o2.dcollector_dvbe, -g_load * o2.dcollector_dvbc],
            ]
        scale = np.abs(self.v_in * g_in) + np.abs(i_load)
        state = {
            "v_b1": v_b1, "v_b2": v_b2, "v_out": v_c, "i_load": i_load,
            "i_out": c1.collector + c2.collector,
            "ib1": c1.base, "ib2": c2.base, "ic1": c1.collector,
            "i_rb_out": i_be1 + c1.base,
            "p1": transistor_power(c1.collector, c1.base, v_c1 - v_b2, v_b1 - v_b2),
            "p2": transistor_power(c2.collector, c2.base, v_c, v_b2),
        }
        return f, j, scale, state


class DarlingtonStage(PairStage):
    """The configured Darlington stage (picklable)."""

    name = "darlington"
    system = DarlingtonSystem

    @staticmethod
    def resistor_voltages(state):
        """Voltages across RBE1 (driver base to output base) and RBE2 (output base to
        ground) [V]."""
        return state["v_b1"] - state["v_b2"], state["v_b2"]

    def guesses(self, mode, q1, q2, vs, current, g_be2, v_in=None, g_in=None, g_be1=None,
                load=None):
        """Starting points (S, 4) for the ``on``, ``off`` and ``threshold`` solves, best first.

        With the circuit (``v_in``, ``g_in``, ``g_be1``, ``load``) the ``off`` guess is the
        linear divider of RB, RBE1 and RBE2 with the junctions nearly open, the collector where
        the load passes the collector-base leakage, and the ``threshold`` guess puts the
        collector where the load carries the target ``current``.
        """
        pol = q1.polarity
        n = vs.shape[0]
        if mode == "off":
            vbe = np.full(n, pol * 0.2)
            plain = np.stack([vbe, 2 * vbe - vs, vbe, vbe - vs], axis=1)
            if load is None:
                return [plain]
            return self._off_guess(q1, q2, vs, g_be2, v_in, g_in, g_be1, load) + [plain]
        vbe2 = vbe_guess(q2, current)
        # the driver carries the output's base current (at its ideal gain) and the current of
        # the output's base-emitter resistor
        vbe1 = vbe_guess(q1, np.abs(current) * q2.inv_forward_beta + np.abs(vbe2) * g_be2)
        if mode == "threshold":
            half = np.stack([vbe1, vbe1 + vbe2 - 0.5 * vs, vbe2, vbe2 - 0.5 * vs], axis=1)
            vc = 0.9 * vs
            tenth = np.stack([vbe1, vbe1 + vbe2 - vc, vbe2, vbe2 - vc], axis=1)
            if load is None:
                return [tenth, half]
            # the collector where the load carries the threshold current (above 0.5 V)
            vc = np.maximum(vs - pol * load.voltage_guess(np.abs(current)), 0.5)
            at_load = np.stack([vbe1, vbe1 + vbe2 - vc, vbe2, vbe2 - vc], axis=1)
            return [at_load, tenth, half]
        vce1 = pol * 0.02
        sat = np.stack([vbe1, vbe1 - vce1, vbe2, -vce1 * np.ones(n)], axis=1)
        act = np.stack([vbe1, vbe1 + vbe2 - 0.5 * vs, vbe2, vbe2 - 0.5 * vs], axis=1)
        return [sat, act]

    @staticmethod
    def _off_guess(q1, q2, vs, g_be2, v_in, g_in, g_be1, load):
        """Off-state starting points: RB, RBE1 and RBE2 as a divider from the drive's low level,
        each junction a 1 nS leak, the output's collector-base leakage into its base node;
        junction voltages capped where the junction would carry that leakage; the collector
        where the load passes the leakage of both transistors, but not below the bases; then
        the same with the collector at the output's base."""
        g1 = g_be1 + JUNCTION_LEAK
        g2 = g_be2 + JUNCTION_LEAK
        chain = v_in / (1.0 / g_in + 1.0 / g1 + 1.0 / g2)  # divider current [A]
        i_cbo = np.abs(q1.cbo_leakage) + np.abs(q2.cbo_leakage) + 1e-12
        cap1 = np.abs(vbe_guess(q1, i_cbo))
        cap2 = np.abs(vbe_guess(q2, i_cbo))
        pol = q1.polarity
        vbe1 = np.minimum(pol * chain / g1, cap1)
        vbe2 = np.minimum(pol * chain / g2 + np.abs(q2.cbo_leakage) / g2, cap2)
        # not below the bases: a load that cannot pass the leakage at any voltage (an LED
        # string above the supply) would put the guess below ground, both collector junctions
        # forward-biased by volts, where Newton crawls at a junction-limited step
        vc = np.maximum(pol * vs - load.voltage_guess(i_cbo), vbe1 + vbe2)
        vbe1, vbe2 = pol * vbe1, pol * vbe2
        vc = pol * vc
        passing = np.stack([vbe1, vbe1 + vbe2 - vc, vbe2, vbe2 - vc], axis=1)
        # such a starved collector settles where the output's leakage fades, near its base:
        # the second guess puts it there (the driver's collector junction forward-biased)
        starved = np.stack([vbe1, vbe1, vbe2, np.zeros_like(vbe2)], axis=1)
        return [passing, starved]


def _read_internal(part: Reader, entry, name: str) -> tuple[ResistorPart, ResistorPart]:
    """Internal base-emitter resistors of a monolithic entry as parameters of the part."""
    from tolerance.models.parts import _derived_parameter

    out = []
    tol = entry.figures.get("rbe_tolerance", 0.0)
    for key, label in (("rbe_driver", "driver"), ("rbe_output", "output")):
        value = entry.figures.get(key)
        if value is None:
            out.append(ResistorPart(f"{name}.{key}", False))
            continue
        if part.has(key):
            part.parameter(key, "ohm", f"{name}.{key}", f"internal base-emitter resistor of "
                           f"the {label}", positive=True)
        else:
            spec = {"nominal": value, "tolerance": tol} if tol > 0 else {"nominal": value}
            _derived_parameter(part, key, spec, "ohm", f"{name}.{key}",
                               f"internal base-emitter resistor of the {label}")
        out.append(ResistorPart(f"{name}.{key}", True, f"{name}.{key}", None,
                                entry.figures.get("rbe_tempco", 0.0)))
    return out[0], out[1]


@register_stage("darlington", description="Darlington pair low-side switch (discrete or "
                                          "monolithic), optional base-emitter resistors",
                parts=("RB", "RBE1", "RBE2", "Q1", "Q2"))
def configure(reader):
    """Build the Darlington stage from a study (``reader`` is the top-level reader)."""
    env = read_environment(reader)
    drive = read_drive(reader)
    parts = reader.table("parts", required=True)
    rb = read_resistor(parts, "RB", "base resistor", required=True)
    rbe1 = read_resistor(parts, "RBE1", "driver base-emitter resistor", required=False)
    rbe2 = read_resistor(parts, "RBE2", "output base-emitter resistor", required=False)
    q2_table = parts.table("Q2", required=True)
    monolithic = q2_table.boolean("monolithic", default=False)
    internal1 = internal2 = None
    if monolithic:
        device = q2_table.string("device", default="monolithic_darlington")
        lib = library()
        entry = lib.get(device)
        if entry is None or entry.kind != "darlington":
            choices = [k for k, e in lib.items() if e.kind == "darlington"]
            raise q2_table.error("device", f"'{device}' is not a monolithic Darlington of the "
                                           f"library (one of: {', '.join(choices)})")
        internal1, internal2 = _read_internal(q2_table, entry, "Q2")
        q1_table = parts.table("Q1")
        for key in ("device", "heatsink", "case_to_sink", "pulse_energy"):
            if q1_table.has(key):
                # one package: the driver die is the library entry's, and the package's
                # mounting is given once, on [parts.Q2] (these were accepted and ignored)
                raise q1_table.error(key, "a monolithic Darlington is one part: its driver "
                                          "die comes with [parts.Q2]'s device, and its "
                                          "mounting is given on [parts.Q2]")
        q1 = read_transistor(parts, "Q1", "Darlington driver", polarity="npn",
                             base_figures=entry.dies["driver"],
                             supply_minimum=env.supply_minimum, required=False)
        q2 = read_transistor(parts, "Q2", "Darlington output", polarity="npn",
                             base_figures=entry.dies["output"],
                             supply_minimum=env.supply_minimum, read_device=False,
                             table=q2_table)
        # the dies come from the library entry (the devices table says so, not "the study's
        # own figures")
        q1 = dataclasses.replace(q1, device_class=f"{device}, driver die")
        q2 = dataclasses.replace(q2, device_class=f"{device}, output die")
    else:
        entry = library().get(q2_table.string("device", default=""))
        if entry is not None and entry.kind == "darlington":
            # a monolithic pair named as a discrete output: [parts.Q1] "required but
            # missing", or "a darlington, not a single transistor"
            device = q2_table.string("device")
            raise q2_table.error("device", f"'{device}' is a monolithic Darlington (driver "
                                           "and output in one part): add monolithic = true "
                                           "to [parts.Q2]")
        q1 = read_transistor(parts, "Q1", "Darlington driver", polarity="npn",
                             supply_minimum=env.supply_minimum)
        q2 = read_transistor(parts, "Q2", "Darlington output", polarity="npn",
                             supply_minimum=env.supply_minimum, table=q2_table)
    load = read_load_table(reader)
    names = [env.temperature, env.supply, drive.high, drive.low, drive.source_resistance,
             rb.value_parameter, rb.tempco_parameter]
    for r in (rbe1, rbe2):
        if r.present:
            names += [r.value_parameter, r.tempco_parameter]
    for r in (internal1, internal2):
        if r is not None and r.present:
            names.append(r.value_parameter)
    names += [q1.hfe_parameter, q1.icbo_parameter, q2.hfe_parameter, q2.icbo_parameter]
    names += list(load.parameters)
    stage = DarlingtonStage(env, drive, rb, rbe1, rbe2, q1, q2, load, names,
                            internal_rbe1=internal1, internal_rbe2=internal2,
                            suggested_correlations=((("Q1.hfe", "Q2.hfe"), 0.8),)
                            if monolithic else ())
    # one die: both transistors share the output's junction and thermal resistance
    read_thermal(reader, parts, stage, {"Q1": "driver", "Q2": "output"},
                 shared={"Q1": "Q2"} if monolithic else None)
    read_switching(reader, parts, stage, "darlington", {"Q1": "driver", "Q2": "output"},
                   classes={"Q1": device, "Q2": device} if monolithic else None)
    return stage
