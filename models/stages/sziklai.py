"""Complementary (Sziklai) pair low-side switch: NPN driver, PNP output.

Circuit: the drive feeds the NPN driver Q1's base through RB (optional pull-down RBE1 from Q1's
base to ground); Q1's collector pulls the PNP output Q2's base down; Q2's emitter is the output
node that the load pulls to the supply, and Q2's collector returns to ground with Q1's emitter.
The pair acts as one NPN whose V_BE is Q1's alone; fully on it sits at V_EB2 + V_CE1(sat), since
the PNP's collector-base junction stays reverse biased (common practice; textbooks). Optional
RBE2 from Q2's base to its emitter speeds turn-off and shunts Q1's leakage. Parts ``RB``,
``RBE1``, ``RBE2``, ``Q1`` (NPN), ``Q2`` (PNP).

Unknowns: (v_BE1, v_BC1, v_BE2, v_BC2) with Q2's in their actual (negative when on) sign.
Q1's terminals are relative to ground; Q2's relative to its emitter, whose collector is at
ground, so V_out = -o_C2 and V_B2 = V_out + o_B2:

========  =================================================================
row       residual [A]
========  =================================================================
input     (V_in - V_B1) G_in - V_B1 G_BE1 - I_B1
middle    (V_out - V_B2) G_BE2 - I_C1 - I_B2        (node Q1 collector / Q2 base)
output    I_load(V_supply - V_out) + I_B2 + I_C2 - (V_out - V_B2) G_BE2
loop      1 mS (V_C1 - V_B2)                        (Q1's collector is Q2's base)
target    I_load(V_supply - V_out) - 0.01 I_load,on (threshold mode)
========  =================================================================
"""

from __future__ import annotations

import numpy as np

from tolerance.models.parts import read_transistor
from tolerance.models.stages import (
    JUNCTION_LEAK,
    LOOP_CONDUCTANCE,
    PairStage,
    PairSystem,
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

__all__ = ["SziklaiStage", "SziklaiSystem", "configure"]


class SziklaiSystem(PairSystem):
    """Equations of the Sziklai stage (see the module docstring)."""

    def equations(self, xf, jacobian=True):
        vbe1, vbc1, vbe2, vbc2 = xf[:, 0], xf[:, 1], xf[:, 2], xf[:, 3]
        c1 = junction_currents(self.q1, vbe1, vbc1)
        o1 = terminal_offsets(self.q1, vbe1, vbc1, c1)
        c2 = junction_currents(self.q2, vbe2, vbc2)
        o2 = terminal_offsets(self.q2, vbe2, vbc2, c2)
        v_b1, v_c1 = o1.base, o1.collector
        v_out = -o2.collector
        v_b2 = v_out + o2.base
        i_load, g_load = self.load.current(self.supply - v_out)
        g_in, g1, g2 = self.g_in, self.g_be1, self.g_be2
        gl = LOOP_CONDUCTANCE
        i_be2 = (v_out - v_b2) * g2
        f = [
            (self.v_in - v_b1) * g_in - v_b1 * g1 - c1.base,  # input
            i_be2 - c1.collector - c2.base,  # middle
            i_load + c2.base + c2.collector - i_be2,  # output
            gl * (v_c1 - v_b2),  # loop
            i_load - self.i_target,  # threshold target
        ]
        # derivatives of V_out and V_B2 with respect to (v_BE2, v_BC2)
        dout_be, dout_bc = -o2.dcollector_dvbe, -o2.dcollector_dvbc
        db2_be, db2_bc = dout_be + o2.dbase_dvbe, dout_bc + o2.dbase_dvbc
        dbe2_be, dbe2_bc = g2 * (dout_be - db2_be), g2 * (dout_bc - db2_bc)  # of i_be2
        gg = g_in + g1
        j = None
        if jacobian:
            j = [
                [-gg * o1.dbase_dvbe - c1.dbase_dvbe, -gg * o1.dbase_dvbc - c1.dbase_dvbc,
                 0.0, 0.0],
                [-c1.dcollector_dvbe, -c1.dcollector_dvbc,
                 dbe2_be - c2.dbase_dvbe, dbe2_bc - c2.dbase_dvbc],
                [0.0, 0.0,
                 -g_load * dout_be + c2.dbase_dvbe + c2.dcollector_dvbe - dbe2_be,
                 -g_load * dout_bc + c2.dbase_dvbc + c2.dcollector_dvbc - dbe2_bc],
                [gl * o1.dcollector_dvbe, gl * o1.dcollector_dvbc, -gl * db2_be, -gl * db2_bc],
                [0.0, 0.0, -g_load * dout_be, -g_load * dout_bc],
            ]
        scale = np.abs(self.v_in * g_in) + np.abs(i_load)
        state = {
            "v_b1": v_b1, "v_b2": v_b2, "v_out": v_out, "i_load": i_load,
            # current the stage takes from the output node: the PNP's emitter and RBE2
            "i_out": -(c2.base + c2.collector) + i_be2,
            "ib1": c1.base, "ib2": c2.base, "ic1": c1.collector,
            "i_rb_out": v_b1 * g1 + c1.base,
            "p1": transistor_power(c1.collector, c1.base, v_c1, v_b1),
            "p2": transistor_power(c2.collector, c2.base, -v_out, v_b2 - v_out),
        }
        return f, j, scale, state


class SziklaiStage(PairStage):
    """The configured Sziklai stage (picklable)."""

    name = "sziklai"
    system = SziklaiSystem

    @staticmethod
    def resistor_voltages(state):
        """Voltages across RBE1 (driver base to ground) and RBE2 (output base to its emitter,
        the output node) [V]."""
        return state["v_b1"], state["v_out"] - state["v_b2"]

    def guesses(self, mode, q1, q2, vs, current, g_be2, v_in=None, g_in=None, g_be1=None,
                load=None):
        """Starting points (S, 4) for the ``on``, ``off`` and ``threshold`` solves, best first.

        With the circuit (``v_in``, ``g_in``, ``g_be1``, ``load``) the ``off`` guess is the
        driver's base divider (RB, RBE1, the junction a 1 nS leak), the output node where the
        load passes the collector-base leakage (its base not below the driver's) and the
        output's base at its emitter, then the same with the output's base at ground; the
        ``threshold`` guess puts the output node where the load carries the target
        ``current``.
        """
        n = vs.shape[0]
        if mode == "off":
            vbe1 = np.full(n, 0.2)
            # Q2's base and emitter near the supply, its collector at ground
            plain = np.stack([vbe1, vbe1 - vs, np.zeros(n), vs], axis=1)
            if load is None:
                return [plain]
            i_cbo = np.abs(q1.cbo_leakage) + np.abs(q2.cbo_leakage) + 1e-12
            vbe1 = np.minimum(v_in * g_in / (g_in + g_be1 + JUNCTION_LEAK),
                              vbe_guess(q1, i_cbo))
            # Q1's leakage through RBE2, or through Q2's emitter junction without it (PNP:
            # negative)
            vbe2 = np.maximum(-np.abs(q1.cbo_leakage) / (g_be2 + JUNCTION_LEAK),
                              vbe_guess(q2, i_cbo))
            # the output's base not below the driver's: a load that cannot pass the leakage
            # at any voltage (an LED string above the supply) would put the guess below
            # ground, the collector junctions forward-biased by volts
            v_out = np.maximum(vs - load.voltage_guess(i_cbo), vbe1 - vbe2)
            v_b2 = v_out + vbe2
            passing = np.stack([vbe1, vbe1 - v_b2, vbe2, v_b2], axis=1)
            # such a starved output node settles where the output's collector-base leakage
            # fades: its base near ground (its collector), the driver's collector junction
            # forward-biased
            starved = np.stack([vbe1, vbe1, vbe2, np.zeros(n)], axis=1)
            return [passing, starved, plain]
        vbe2 = vbe_guess(q2, current)  # negative: PNP
        # the driver carries the output's base current (at its ideal gain) and the current of
        # the output's base-emitter resistor
        vbe1 = vbe_guess(q1, np.abs(current) * q2.inv_forward_beta + np.abs(vbe2) * g_be2)
        if mode == "threshold":
            half = np.stack([vbe1, vbe1 - 0.5 * vs, vbe2, 0.5 * vs], axis=1)
            v_out = 0.9 * vs
            v_b2 = v_out + vbe2
            tenth = np.stack([vbe1, vbe1 - v_b2, vbe2, v_b2], axis=1)
            if load is None:
                return [tenth, half]
            # the output node where the load carries the threshold current (above 0.5 V)
            v_out = np.maximum(vs - load.voltage_guess(np.abs(current)), 0.5)
            v_b2 = v_out + vbe2
            return [np.stack([vbe1, vbe1 - v_b2, vbe2, v_b2], axis=1), tenth, half]
        vce1 = 0.05
        sat = np.stack([vbe1, vbe1 - vce1, vbe2, np.full(n, vce1)], axis=1)
        act = np.stack([vbe1, vbe1 - 0.5 * vs, vbe2, 0.5 * vs], axis=1)
        return [sat, act]


@register_stage("sziklai", description="complementary (Sziklai) pair low-side switch: NPN "
                                       "driver, PNP output, optional base-emitter resistors",
                parts=("RB", "RBE1", "RBE2", "Q1", "Q2"))
def configure(reader):
    """Build the Sziklai stage from a study (``reader`` is the top-level reader)."""
    env = read_environment(reader)
    drive = read_drive(reader)
    parts = reader.table("parts", required=True)
    rb = read_resistor(parts, "RB", "base resistor", required=True)
    rbe1 = read_resistor(parts, "RBE1", "driver base pull-down resistor", required=False)
    rbe2 = read_resistor(parts, "RBE2", "output base-emitter resistor", required=False)
    q1 = read_transistor(parts, "Q1", "Sziklai driver", polarity="npn",
                         supply_minimum=env.supply_minimum)
    q2 = read_transistor(parts, "Q2", "Sziklai output", polarity="pnp",
                         supply_minimum=env.supply_minimum)
    load = read_load_table(reader)
    names = [env.temperature, env.supply, drive.high, drive.low, drive.source_resistance,
             rb.value_parameter, rb.tempco_parameter]
    for r in (rbe1, rbe2):
        if r.present:
            names += [r.value_parameter, r.tempco_parameter]
    names += [q1.hfe_parameter, q1.icbo_parameter, q2.hfe_parameter, q2.icbo_parameter]
    names += list(load.parameters)
    stage = SziklaiStage(env, drive, rb, rbe1, rbe2, q1, q2, load, names)
    read_thermal(reader, parts, stage, {"Q1": "driver", "Q2": "output"})
    read_switching(reader, parts, stage, "sziklai", {"Q1": "driver", "Q2": "output"})
    return stage
