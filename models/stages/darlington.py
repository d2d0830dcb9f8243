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
import math

import numpy as np

from tolerance.models.datasheet import DatasheetError, FittedDevice
from tolerance.models.parts import (
    DARLINGTON_FIGURES,
    TransistorPart,
    library,
    read_transistor,
    supply_floor,
)
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
    solve_with_restarts,
    transistor_power,
    vbe_guess,
)
from tolerance.models.transistor import (
    REFERENCE_TEMPERATURE,
    junction_currents,
    terminal_offsets,
)
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
    #: a monolithic pair's fit to its own figures (:class:`PairFit`), else None
    pair_fit = None

    def assumptions(self):
        """The dies' rows, and for a monolithic pair the pair's own figures and what its
        fit put into the output die."""
        rows = super().assumptions()
        fit = self.pair_fit
        if fit is not None:
            from tolerance.units import format_quantity as q

            f = fit.figures
            for row in rows:
                if row["part"] == "Q2":
                    # the pair's own figures beside the output die's (the die's are class
                    # equivalents; the datasheet states the pair's)
                    how = (f"met by {q(fit.added_emitter_resistance, 'ohm')} in the "
                           f"output's emitter" if fit.added_emitter_resistance > 0 else
                           "above the figure, kept: the higher one is the safe side")
                    row["vce_sat_max"] += (
                        f"; pair {q(f['pair_vce_sat_max'], 'V')} at "
                        f"{q(f['pair_vce_sat_ic'], 'A')} / {q(f['pair_vce_sat_ib'], 'A')} "
                        f"(dies alone {q(fit.vce_sat_dies, 'V')}, {how})")
                    if f.get("pair_hfe_min") is not None:
                        row["hfe"] += (f"; pair {f['pair_hfe_min']:g} min at "
                                       f"{q(f['pair_hfe_current'], 'A')} (model, both dies "
                                       f"at minimum: {fit.hfe_min_model:.0f})")
        return rows

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


#: the figures of a monolithic pair's V_CE(sat) test, which [parts.Q2] may state for its part
PAIR_SATURATION_KEYS = ("pair_vce_sat_max", "pair_vce_sat_ic", "pair_vce_sat_ib")


class _CurrentSink:
    """A load that draws a fixed current whatever its voltage (a datasheet's test set)."""

    kind = "test"

    def __init__(self, current: np.ndarray):
        self.i = np.asarray(current, dtype=float)
        self.n_samples = self.i.shape[0]

    def current(self, v):
        return self.i, np.zeros_like(self.i)

    def voltage_guess(self, current):
        return np.ones_like(np.asarray(current, dtype=float))

    def take(self, idx):
        return _CurrentSink(self.i[idx])


#: the conductance of the test set's base current source: the drive is ib / G volts behind
#: 1 / G, so the base current is ib to (V_B1 G) / ib, below 1e-9 relative [S]
_SOURCE_CONDUCTANCE = 1e-12


def pair_collector_voltage(q1, q2, g_be1, g_be2, ic, ib, temperature=REFERENCE_TEMPERATURE):
    """Collector-emitter voltage of a Darlington pair carrying ``ic`` with base current ``ib``
    (arrays of one length, or scalars) at ``temperature`` [K], both dies' parameters given
    (``TransistorParameters``), the internal base-emitter conductances ``g_be1``, ``g_be2``
    [S]; NaN where the solve did not converge. The datasheet test of a pair's V_CE(sat) and,
    at a stated V_CE, of its gain."""
    ic, ib = np.broadcast_arrays(np.atleast_1d(np.asarray(ic, dtype=float)),
                                 np.atleast_1d(np.asarray(ib, dtype=float)))
    n = ic.shape[0]
    t = np.full(n, float(temperature))
    s1, s2 = q1.at_temperature(t), q2.at_temperature(t)
    sink = _CurrentSink(ic.copy())
    supply = np.full(n, 100.0)
    g = np.full(n, _SOURCE_CONDUCTANCE)
    system = DarlingtonSystem(s1, s2, sink, supply, ib / g, g, np.full(n, float(g_be1)),
                              np.full(n, float(g_be2)), "on")
    # the stage's own on-state starting points (that mode reads nothing of the instance)
    starts = DarlingtonStage.guesses(None, "on", s1, s2, supply, ic, np.full(n, float(g_be2)))
    res = solve_with_restarts(system, starts)
    return np.where(res.converged, system.state(np.nan_to_num(res.x))["v_out"], np.nan)


@dataclasses.dataclass(frozen=True)
class PairFit:
    """What a monolithic pair's own figures did to its dies (for the report and tests).

    ``vce_sat_dies`` is the pair's V_CE(sat) of the minimum-gain dies alone [V],
    ``added_emitter_resistance`` the resistance put in series with the output die's emitter
    so that the minimum-gain pair meets ``pair_vce_sat_max`` [ohm] (0 where the dies alone
    reach it), ``hfe_min_model`` the minimum-gain pair's gain at ``pair_hfe_current`` and
    ``pair_hfe_vce`` [1], ``rbe_driver`` and ``rbe_output`` the internal resistors the fit
    took [ohm] (the study's nominal values where it gives them)."""

    figures: dict
    vce_sat_dies: float
    added_emitter_resistance: float
    hfe_min_model: float
    rbe_driver: float | None = None
    rbe_output: float | None = None


#: die figures a monolithic pair's datasheet states for the whole part, refused on either
#: die's table: its I_CEO (the dies' leakage shunted by the internal resistors), its hot
#: I_CBO (found by a review: it fitted one die's doubling while the other kept the class's),
#: its V_BE(sat) (two junctions', which cannot spread one die's base resistance) and its
#: V_BE(on) spread (likewise two junctions')
WHOLE_PART_FIGURES = (
    (("iceo_max", "iceo_vce"),
     "a monolithic Darlington's I_CEO is the whole part's, set by its internal base-emitter "
     "resistors, not a die's open-base figure; state an off_current window in [limits] "
     "instead"),
    (("icbo_hot_max", "icbo_hot_temperature"),
     "a monolithic Darlington's hot I_CBO is the whole part's, not one die's; give each "
     "die's leakage_doubling, or an off_current window in [limits]"),
    (("vbe_sat_typ",),
     "a monolithic Darlington's V_BE(sat) is the whole pair's (two junctions), not one "
     "die's; it cannot spread a die's base resistance"),
    (("vbe_on_min", "vbe_on_max"),
     "a monolithic Darlington's V_BE(on) is the whole pair's (two junctions), not one "
     "die's; it cannot spread a die's junction"),
)


@dataclasses.dataclass(frozen=True)
class LeadedDevice(FittedDevice):
    """A fitted die with a resistance in series with its emitter outside the die (a
    monolithic pair's output: what its own V_CE(sat) figure asks beyond the dies). Each
    unit's gain is mapped on the die as fitted, then the resistance is added, so the die's
    gain at its test point stays the sampled one whatever the resistance."""

    lead_resistance: float = 0.0

    def parameters(self, hfe, icbo=None, vbe_sat=None, vbe_on=None):
        q = super().parameters(hfe, icbo, vbe_sat, vbe_on)
        return dataclasses.replace(q, emitter_resistance=q.emitter_resistance
                                   + self.lead_resistance)


def _pair_gain(q1, q2, g_be1, g_be2, ic, vce):
    """The pair's gain I_C / I_B at collector current ``ic`` and voltage ``vce`` (25 degC):
    the base current whose collector voltage is ``vce``, from a grid in log(I_B) refined
    twice (the collector voltage falls monotonically with the base current)."""
    lo, hi = ic / 1e6, ic / 2.0
    for _ in range(3):
        ib = np.geomspace(lo, hi, 64)
        v = pair_collector_voltage(q1, q2, g_be1, g_be2, np.full(64, ic), ib)
        above = np.flatnonzero(np.isfinite(v) & (v > vce))
        below = np.flatnonzero(np.isfinite(v) & (v <= vce))
        if not above.size or not below.size:
            return math.nan
        k = above[-1]
        if k + 1 >= 64 or k + 1 not in below:
            return math.nan
        lo, hi = ib[k], ib[k + 1]
    # linear in log(I_B) across the last cell
    w = (v[k] - vce) / (v[k] - v[k + 1])
    return float(ic / math.exp(math.log(lo) + w * (math.log(hi) - math.log(lo))))


def fit_pair(q1: TransistorPart, q2: TransistorPart, figures: dict, rbe_driver: float | None,
             rbe_output: float | None) -> tuple[TransistorPart, PairFit]:
    """Make the minimum-gain pair (both dies at hfe_min, internal resistors nominal, 25 degC)
    meet the pair's stated maximum V_CE(sat), as the single transistor's fit puts its
    maximum on its minimum-gain unit (conservative for the saturation and dissipation checks).

    The pair's V_CE(sat) is the output's V_BE plus the driver's V_CE(sat); what the dies'
    class figures leave below the pair's maximum goes into a resistance in series with the
    output die's emitter (:class:`LeadedDevice`; the one place that raises it at every unit:
    the output itself never saturates in a Darlington, so a collector resistance would not
    show), found by secant steps (V_CE(sat) rises almost linearly with it). Returns the
    output part with that resistance and the figures of the fit. A pair whose dies already
    reach the maximum is left as it is (the dies' figure is the higher, conservative one).

    Raises
    ------
    DatasheetError
        Naming the pair figure that cannot hold: a test current above the output's I_C max,
        a base current not below the collector current, or a maximum the dies' model does
        not reach.
    """
    g_be1 = 0.0 if not rbe_driver else 1.0 / rbe_driver
    g_be2 = 0.0 if not rbe_output else 1.0 / rbe_output
    d1, d2 = q1.device, q2.device
    p1 = d1.parameters(d1.datasheet.hfe_min)
    ic, ib = figures["pair_vce_sat_ic"], figures["pair_vce_sat_ib"]
    target = figures["pair_vce_sat_max"]
    if ic > d2.datasheet.ic_max * (1 + 1e-9):
        raise DatasheetError("pair_vce_sat_ic", f"{ic:g} A is above the output's I_C max "
                                                f"({d2.datasheet.ic_max:g} A)")
    if ib >= ic:
        raise DatasheetError("pair_vce_sat_ib", f"{ib:g} A is not below the collector "
                                                f"current pair_vce_sat_ic = {ic:g} A")

    def output_with(extra):
        fields = {f.name: getattr(d2, f.name) for f in dataclasses.fields(FittedDevice)
                  if f.name != "_cache"}
        return LeadedDevice(**fields, lead_resistance=extra)

    def vce_at(extra):
        dev = output_with(extra)
        return float(pair_collector_voltage(p1, dev.parameters(dev.datasheet.hfe_min),
                                            g_be1, g_be2, ic, ib)[0])

    v0 = vce_at(0.0)
    if not math.isfinite(v0):
        raise DatasheetError("pair_vce_sat_max", f"the pair's saturation point ({ic:g} A, "
                                                 f"{ib:g} A) could not be solved from its "
                                                 f"dies")
    extra = 0.0
    if v0 < target:
        r_a, v_a = 0.0, v0
        r_b = (target - v0) / ic
        v_b = vce_at(r_b)
        for _ in range(30):
            if not math.isfinite(v_b):
                raise DatasheetError("pair_vce_sat_max", f"{target:g} V cannot be met: the "
                                                         f"dies' on-state does not solve "
                                                         f"with {r_b:.3g} ohm in the "
                                                         f"output's emitter")
            if abs(v_b - target) < 1e-9 * target or v_b == v_a:
                break
            r_a, v_a, r_b = r_b, v_b, r_b + (target - v_b) * (r_b - r_a) / (v_b - v_a)
            v_b = vce_at(r_b)
        extra = r_b
    dev2 = output_with(extra)
    gain = math.nan
    if figures.get("pair_hfe_current") is not None and figures.get("pair_hfe_vce") is not None:
        gain = _pair_gain(p1, dev2.parameters(dev2.datasheet.hfe_min), g_be1, g_be2,
                          figures["pair_hfe_current"], figures["pair_hfe_vce"])
    return (dataclasses.replace(q2, device=dev2),
            PairFit(dict(figures), v0, extra, gain, rbe_driver, rbe_output))


def _read_internal(part: Reader, entry, name: str):
    """Internal base-emitter resistors of a monolithic entry as parameters of the part, and
    their nominal values [ohm] (the study's where it gives them; None for an absent one)."""
    from tolerance.models.parts import _derived_parameter

    out, nominal = [], []
    tol = entry.figures.get("rbe_tolerance", 0.0)
    for key, label in (("rbe_driver", "driver"), ("rbe_output", "output")):
        value = entry.figures.get(key)
        if value is None:
            out.append(ResistorPart(f"{name}.{key}", False))
            nominal.append(None)
            continue
        if part.has(key):
            param = part.parameter(key, "ohm", f"{name}.{key}", f"internal base-emitter "
                                   f"resistor of the {label}", positive=True)
        else:
            spec = {"nominal": value, "tolerance": tol} if tol > 0 else {"nominal": value}
            param = _derived_parameter(part, key, spec, "ohm", f"{name}.{key}",
                                       f"internal base-emitter resistor of the {label}")
        out.append(ResistorPart(f"{name}.{key}", True, f"{name}.{key}", None,
                                entry.figures.get("rbe_tempco", 0.0)))
        nominal.append(float(param.nominal))
    return out[0], out[1], (nominal[0], nominal[1])


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
    pair_fit = None
    if monolithic:
        device = q2_table.string("device", default="monolithic_darlington")
        lib = library()
        entry = lib.get(device)
        if entry is None or entry.kind != "darlington":
            choices = [k for k, e in lib.items() if e.kind == "darlington"]
            raise q2_table.error("device", f"'{device}' is not a monolithic Darlington of the "
                                           f"library (one of: {', '.join(choices)})")
        internal1, internal2, internal_nominal = _read_internal(q2_table, entry, "Q2")
        q1_table = parts.table("Q1")
        for key in PAIR_SATURATION_KEYS + ("pair_hfe_min", "pair_hfe_current", "pair_hfe_vce"):
            if q1_table.has(key):
                raise q1_table.error(key, "a monolithic pair's own figures go on [parts.Q2], "
                                          "the part's table")
        for key in ("device", "heatsink", "case_to_sink", "pulse_energy"):
            if q1_table.has(key):
                # one package: the driver die is the library entry's, and the package's
                # mounting is given once, on [parts.Q2] (these were accepted and ignored)
                raise q1_table.error(key, "a monolithic Darlington is one part: its driver "
                                          "die comes with [parts.Q2]'s device, and its "
                                          "mounting is given on [parts.Q2]")
        for table in (q1_table, q2_table):
            for keys, why in WHOLE_PART_FIGURES:
                for key in keys:
                    if table.has(key):
                        raise table.error(key, why)
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
        pair_figures = dict(entry.figures)
        for key in PAIR_SATURATION_KEYS:
            if q2_table.has(key):
                pair_figures[key] = q2_table.quantity(key, DARLINGTON_FIGURES[key][0],
                                                      positive=True)
        for key in ("pair_hfe_min", "pair_hfe_current", "pair_hfe_vce"):
            if q2_table.has(key):
                raise q2_table.error(key, "the pair's gain follows from its dies' gains: give "
                                          "hfe_min (and hfe_max) in [parts.Q1] for the driver "
                                          "die and in [parts.Q2] for the output die")
        if all(pair_figures.get(k) is not None for k in PAIR_SATURATION_KEYS):
            if pair_figures["pair_vce_sat_max"] >= env.supply_minimum:
                raise q2_table.error("pair_vce_sat_max" if q2_table.has("pair_vce_sat_max")
                                     else "device",
                                     f"the pair's saturation voltage "
                                     f"{pair_figures['pair_vce_sat_max']:g} V is at or above "
                                     f"the lowest supply {env.supply_minimum:g} V ([supply] "
                                     f"voltage): the stage could never saturate; check the "
                                     f"supply's value and unit")
            supply_floor(q2_table, pair_figures["pair_vce_sat_max"], "the pair")
            try:
                # the part's internal resistors as the study states them (a pair with
                # stiffer ones saturates higher: its own figure is met with them)
                q2, pair_fit = fit_pair(q1, q2, pair_figures, *internal_nominal)
            except DatasheetError as exc:
                # the pair figure the study gave, where the conflict is with one of its own
                # (a test current of 1 nA against the class's 12 mA base current)
                given = [k for k in (exc.key, *PAIR_SATURATION_KEYS) if q2_table.has(k)]
                key = given[0] if given else "device"
                raise q2_table.error(key, exc.message if key == exc.key
                                     else f"{exc.key}: {exc.message}") from None
    else:
        entry = library().get(q2_table.string("device", default=""))
        if entry is not None and entry.kind == "darlington":
            # a monolithic pair named as a discrete output: [parts.Q1] "required but
            # missing", or "a darlington, not a single transistor"
            device = q2_table.string("device")
            raise q2_table.error("device", f"'{device}' is a monolithic Darlington (driver "
                                           "and output in one part): add monolithic = true "
                                           "to [parts.Q2]")
        for key in PAIR_SATURATION_KEYS:
            if q2_table.has(key):
                raise q2_table.error(key, "a pair's own figures belong to a monolithic "
                                          "Darlington (monolithic = true with a device of "
                                          "that kind); a discrete pair's come from its two "
                                          "transistors")
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
    stage.pair_fit = pair_fit
    # one die: both transistors share the output's junction and thermal resistance
    read_thermal(reader, parts, stage, {"Q1": "driver", "Q2": "output"},
                 shared={"Q1": "Q2"} if monolithic else None)
    read_switching(reader, parts, stage, "darlington", {"Q1": "driver", "Q2": "output"},
                   classes={"Q1": device, "Q2": device} if monolithic else None)
    return stage
