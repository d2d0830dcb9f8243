"""A lamp filament switched on and off: its periodic state and the heat the output takes in
each switch-on.

A flasher (a beacon at 1 Hz) lets the filament cool in every off-time, so every on-edge meets
a filament below its operating resistance and the output limits an inrush again; a fast PWM
dimmer keeps it nearly hot. The filament is one thermal mass (as in
:func:`tolerance.models.stages.evaluation.lamp_inrush`; common practice, no source), its
resistance r in units of its operating resistance R_f:

    heating, held at the output's capability I:  dr/dt = r^a (k r - r^m) / theta
    heating, saturated (the lamp at V_L):         dr/dt = r^a (1/r - r^m) / theta
    cooling, switched off:                        r - r_c falls as exp(-t / tau_c)

with a = 1 - 1/1.2 (tungsten's resistance as T^1.2), m = (1 + p) / (1 - p) from the lamp's
hot law I ~ V^p, k = I^2 R_f / (V_L I_L), r_c the cold resistance and theta calibrated by the
lamp's warm-up time constant. The cooling is the lamp's ``cooling_time_constant``, by default
its warm-up one: the hot law's loss alone (radiation) cools a dim filament far more slowly
than its supports and gas do, and left a 21 W lamp at twice its cold resistance after 5 s
off, where a lamp goes dark within a few warm-up time constants (from memory); the shorter
cooling is the side that gives the output more inrush heat. Each heating phase's time as a
function of r comes from a table of its integral dt = dr / (dr/dt) (Gauss-Legendre panels;
the saturated phase in u = -ln(1 - r), where its time diverges logarithmically), read by its
cubic Hermite interpolant; a phase of given duration ends where its table reaches it (Newton
on the panel's cubic). The periodic state is
the fixed point of one period's map from the resistance at the on-edge, found by bisection
between the cold and the operating resistance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: panels of each phase's table (4-point Gauss-Legendre each; cubic Hermite between edges)
PANELS = 64
#: the saturated phase's table, over u from 0 to U_END, needs finer panels where a short
#: on-time's step is read (at 48, 1 % off at 100 Hz)
SATURATED_PANELS = 160
#: the saturated table reaches 1 - r = e^-U_END of the rise: a longer phase ends there
U_END = 30.0
#: the on-edge resistance of the periodic state is bracketed to this [R_f]
SETTLE = 1e-10
#: most bisection steps (each one period's map)
MAX_PERIODS = 60


@dataclass
class FilamentCycle:
    """One period of a lamp's periodic state under a PWM drive, per sample."""

    start: np.ndarray         #: filament resistance at the on-edge [R_f]
    energy: np.ndarray        #: the output's energy while it limits the inrush, per period [J]
    limited_time: np.ndarray  #: how long it limits it [s]
    #: the saturated warm-up's current above the operating one, as a time: the integral of
    #: (I / I_L - 1) = (1/r - 1) dt [s] (times I_L, the charge; times I_L V_on, the energy)
    excess_time: np.ndarray
    periods: int              #: bisection steps taken for the periodic state


def _grid(a, b, panels):
    """The panels' edges (..., panels + 1), Gauss nodes and weights (..., panels, 4) on
    [a, b] per sample."""
    x, w = np.polynomial.legendre.leggauss(4)
    edges = a[..., None] + (b - a)[..., None] * np.linspace(0.0, 1.0, panels + 1)
    half = 0.5 * np.diff(edges, axis=-1)[..., None]
    return edges, edges[..., :-1, None] + half * (x + 1.0), half * w


class _Table:
    """The integral F(x) = int_a^x f of a positive integrand per sample, on PANELS panels
    (4-point Gauss-Legendre each), read between the panels' edges by the cubic Hermite
    interpolant of F and its derivative f: a short phase's increment F(b) - F(a) within one
    panel then follows f's local value (linear interpolation of F took the panel's mean
    slope: 7 % off on a 0.4 ms on-time)."""

    def __init__(self, edges, weights, at_nodes, at_edges):
        """From the integrand's values at the panels' Gauss nodes and at their edges
        (:func:`_grid`)."""
        self.x = edges
        panel = np.sum(weights * at_nodes, axis=-1)
        self.F = np.concatenate([np.zeros(panel.shape[:-1] + (1,)), np.cumsum(panel, axis=-1)],
                                axis=-1)
        self.f = at_edges

    def _panel(self, grid, value, idx=None):
        if idx is None:
            idx = np.sum(grid < value[..., None], axis=-1)
        idx = np.clip(idx, 1, self.x.shape[-1] - 1)
        pick = lambda t, i: np.take_along_axis(t, i[..., None], -1)[..., 0]  # noqa: E731
        return (pick(self.x, idx - 1), pick(self.x, idx), pick(self.F, idx - 1),
                pick(self.F, idx), pick(self.f, idx - 1), pick(self.f, idx))

    @staticmethod
    def _hermite(t, h, f0, f1, d0, d1):
        t2, t3 = t * t, t * t * t
        return ((2 * t3 - 3 * t2 + 1) * f0 + (t3 - 2 * t2 + t) * h * d0
                + (-2 * t3 + 3 * t2) * f1 + (t3 - t2) * h * d1)

    def value(self, x):
        """F at ``x`` (one point per sample, clipped to the table)."""
        # the edges are evenly spaced: the panel follows from x directly
        a, b = self.x[..., 0], self.x[..., -1]
        with np.errstate(divide="ignore", invalid="ignore"):
            panels = self.x.shape[-1] - 1
            idx = np.floor(np.nan_to_num((x - a) / (b - a) * panels)).astype(np.int64) + 1
        x0, x1, f0, f1, d0, d1 = self._panel(self.x, x, idx)
        h = x1 - x0
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.clip(np.where(h > 0, (x - x0) / h, 0.0), 0.0, 1.0)
        return self._hermite(t, h, f0, f1, d0, d1)

    def where(self, target):
        """The x where F reaches ``target`` (the table's end beyond it): Newton's method on
        the panel's cubic, which rises (its derivative is the positive integrand's
        interpolant)."""
        x0, x1, f0, f1, d0, d1 = self._panel(self.F, target)
        h = x1 - x0
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.clip(np.where(f1 > f0, (target - f0) / (f1 - f0), 1.0), 0.0, 1.0)
            for _ in range(6):
                t2 = t * t
                miss = self._hermite(t, h, f0, f1, d0, d1) - target
                slope = ((6 * t2 - 6 * t) * f0 + (3 * t2 - 4 * t + 1) * h * d0
                         + (-6 * t2 + 6 * t) * f1 + (3 * t2 - 2 * t) * h * d1)
                t = np.clip(np.where(slope > 0, t - miss / slope, t), 0.0, 1.0)
        return x0 + t * h


def lamp_cycle(rc, r1, theta, k, m, lift, limited, supply, current, r_final, cooling,
               frequency, duty) -> FilamentCycle:
    """The filament's periodic state under a PWM drive and what its inrush costs per period.

    Parameters
    ----------
    rc, r1 : ndarray
        Cold resistance and the resistance where the output saturates again (I R = V_L), in
        units of R_f; r1 only matters where ``limited``.
    theta : ndarray
        The filament's time scale [s] (heat capacity over the operating power, calibrated).
    k, m, lift : ndarray
        The heating, loss and tungsten exponents of the module docstring.
    limited : ndarray of bool
        Units whose output limits a cold filament's current (at ``current``, its capability).
    supply, current, r_final : ndarray
        V_S [V], the capability I [A] and R_f [ohm].
    cooling : ndarray
        The filament's cooling time constant [s].
    frequency, duty : float
        The PWM drive.

    Returns
    -------
    FilamentCycle
    """
    t_on = duty / frequency
    t_off = (1.0 - duty) / frequency
    kept = np.exp(-t_off / cooling)  # share of r - r_c an off-time leaves

    def col(v, x):
        """A per-sample figure shaped to broadcast against ``x`` (samples first)."""
        v = np.asarray(v, dtype=float)
        return v.reshape(v.shape + (1,) * (np.ndim(x) - v.ndim))

    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        r_top = np.where(limited, r1, rc + 0.5 * (1.0 - rc))

        def g_l(r):  # dt/dr, limited heating at the capability
            log = np.log(r)
            return col(theta, r) / (np.exp(lift * log) * (col(k, r) * r
                                                          - np.exp(col(m, r) * log)))

        def power(r):  # the output's power while it limits, I (V_S - I R_f r)
            i = col(current, r)
            return i * (col(supply, r) - i * col(r_final, r) * r)

        def r_of(u):  # the saturated phase's variable u = -ln((1 - r) / (1 - r_c))
            return 1.0 - (1.0 - col(rc, u)) * np.exp(-u)

        def g_s(u):  # dt/du, saturated heating at V_L (dr = (1 - r) du)
            r = r_of(u)
            log = np.log(r)
            return (1.0 - r) * col(theta, u) / (np.exp(lift * log)
                                                * (1.0 / r - np.exp(col(m, u) * log)))

        def above(u):  # 1/r - 1: the lamp's current above I_L, in units of I_L
            return 1.0 / r_of(u) - 1.0

        edges, nodes, weights = _grid(rc, r_top, PANELS)
        g_n, g_e = g_l(nodes), g_l(edges)
        time_l = _Table(edges, weights, g_n, g_e)
        energy_l = _Table(edges, weights, g_n * power(nodes), g_e * power(edges))
        edges, nodes, weights = _grid(np.zeros_like(rc), np.full_like(rc, U_END),
                                      SATURATED_PANELS)
        g_n, g_e = g_s(nodes), g_s(edges)
        time_s = _Table(edges, weights, g_n, g_e)
        excess_s = _Table(edges, weights, g_n * above(nodes), g_e * above(edges))
        del g_n, g_e, nodes
        t_top = time_l.value(r_top)

        def period(start):
            """One period from the on-edge resistance ``start``: the next on-edge's, the
            limiting's energy and time, the saturated warm-up's excess (as a time)."""
            in_limit = limited & (start < r1)
            lo = np.where(in_limit, start, rc)
            t_lo = time_l.value(lo)
            t_full = np.where(in_limit, t_top - t_lo, 0.0)
            ends_limited = in_limit & (t_full >= t_on)
            r_stop = np.where(ends_limited, time_l.where(t_lo + t_on), r_top)
            energy = np.where(in_limit, energy_l.value(r_stop) - energy_l.value(lo), 0.0)
            limited_time = np.where(ends_limited, t_on, t_full)
            t_sat = t_on - limited_time
            u0 = -np.log(np.clip((1.0 - np.where(in_limit, r1, start)) / (1.0 - rc),
                                 np.exp(-U_END), 1.0))
            u_end = np.where(t_sat > 0, time_s.where(time_s.value(u0) + t_sat), u0)
            excess = np.where(t_sat > 0, excess_s.value(u_end) - excess_s.value(u0), 0.0)
            r_on = np.where(ends_limited, r_stop, r_of(u_end))
            return rc + (r_on - rc) * kept, energy, limited_time, excess

        # the map rises with its start and moves a cold start up and a hot one down, so
        # its fixed point is bracketed by [r_c, 1]: bisection (iterating the map itself
        # took hundreds of periods where an off-time cools the filament little)
        low, high = rc.copy(), np.ones_like(rc)
        periods = 0
        while periods < MAX_PERIODS and np.nanmax(high - low, initial=0.0) > SETTLE:
            mid = 0.5 * (low + high)
            up = period(mid)[0] >= mid
            low, high = np.where(up, mid, low), np.where(up, high, mid)
            periods += 1
        start = 0.5 * (low + high)
        _, energy, limited_time, excess = period(start)
    return FilamentCycle(start, energy, limited_time, excess, periods)
