"""Worst-case tolerance analysis: extreme-value, root-sum-square and bounded optimisation.

Every parameter is described by a :class:`Bound` (nominal value and a closed interval).
Three complementary methods estimate the spread of each metric:

* :func:`extreme_value` -- extreme value analysis (EVA): every varying parameter at one of
  its bounds, either all ``2^d`` vertices (full factorial) or, for many parameters, the two
  vertices selected by the signs of the local sensitivities.
* :func:`root_sum_square` -- linearised analysis at nominal: the root-sum-square (RSS)
  statistical band and the linear worst-case band.
* :func:`optimize_extreme` -- bounded numerical search for the true extreme of metrics that
  are not monotonic in their parameters (where every vertex can miss the extreme).

:func:`worst_case_table` runs all three per metric and lines them up, optionally beside Monte
Carlo extremes. :func:`combine_tolerances` builds a relative tolerance budget from initial,
temperature and ageing contributions.

A *model* is ``model(samples: dict[str, ndarray]) -> dict[str, ndarray]`` evaluated on whole
batches. Metric arrays may contain NaN where a solver did not converge; such points are
ignored (and counted) when searching for extremes.
"""

from __future__ import annotations

import itertools
import math
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize

__all__ = [
    "Bound",
    "combine_tolerances",
    "extreme_value",
    "optimize_extreme",
    "root_sum_square",
    "worst_case_table",
]

Model = Callable[[dict[str, np.ndarray]], dict[str, np.ndarray]]


@dataclass(frozen=True)
class Bound:
    """Nominal value and closed interval of one parameter.

    Parameters
    ----------
    name : str
        Parameter name as the model expects it.
    nominal : float
        Nominal (design-centre) value.
    low, high : float
        Interval limits, ``low <= nominal <= high``. ``low == high`` marks a fixed
        parameter, which every method keeps at its nominal value.
    values : tuple of float, optional
        The only values the parameter takes (a discrete set: variants, bins, a temperature
        profile), ascending, from ``low`` to ``high`` with ``nominal`` among them. The
        methods then evaluate the parameter at its members only: the corners take its
        ends, the bands its changes to them, and the optimizer searches the other
        parameters at each member (see :func:`optimize_extreme`). None: a continuous range.
    """

    name: str
    nominal: float
    low: float
    high: float
    values: tuple[float, ...] | None = None

    def __post_init__(self) -> None:
        values = (self.nominal, self.low, self.high)
        if not all(math.isfinite(float(v)) for v in values):
            raise ValueError(f"{self.name}: nominal and bounds must be finite, got {values}")
        if not (self.low <= self.nominal <= self.high):
            raise ValueError(
                f"{self.name}: need low <= nominal <= high, got "
                f"{self.low} <= {self.nominal} <= {self.high}"
            )
        if self.values is not None:
            members = tuple(float(v) for v in self.values)
            if (not members or list(members) != sorted(set(members))
                    or members[0] != self.low or members[-1] != self.high
                    or self.nominal not in members):
                raise ValueError(
                    f"{self.name}: a discrete set must be ascending and distinct, from low "
                    f"to high, with the nominal among its values; got {members} for "
                    f"{self.low} <= {self.nominal} <= {self.high}"
                )
            object.__setattr__(self, "values", members)

    @property
    def discrete(self) -> bool:
        """True for a varying parameter that takes only the values of a set."""
        return self.values is not None and not self.fixed

    @property
    def fixed(self) -> bool:
        """True when the parameter does not vary (``low == high``)."""
        return self.low == self.high

    @property
    def half_range(self) -> float:
        """Half the interval width, ``(high - low) / 2``."""
        return 0.5 * (self.high - self.low)


# ---------------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------------


def _check_bounds(bounds: Sequence[Bound]) -> list[Bound]:
    bounds = list(bounds)
    names = [b.name for b in bounds]
    if len(set(names)) != len(names):
        raise ValueError(f"duplicate parameter names in bounds: {names}")
    return bounds


#: optional boolean output of a model: which points it solved. With it, a point that was
#: solved but has a NaN metric (a figure the stage does not define there) is not counted as
#: unsolved in ``dropped``.
SOLVED = "solved"


def _evaluate(
    model: Model, bounds: list[Bound], x: np.ndarray, metrics: list[str] | None
) -> tuple[dict[str, np.ndarray], list[str]]:
    """Evaluate ``model`` on the rows of ``x`` (shape (k, len(bounds))) in one batch."""
    x = np.atleast_2d(np.asarray(x, dtype=float))
    out = model({b.name: x[:, i].copy() for i, b in enumerate(bounds)})
    if metrics is None:
        metrics = [k for k in out if k != SOLVED]
    missing = [m for m in metrics if m not in out]
    if missing:
        raise KeyError(f"model did not return metric(s) {missing}")
    result = {}
    for m in metrics:
        y = np.asarray(out[m], dtype=float).reshape(-1)
        if y.size != x.shape[0]:
            raise ValueError(
                f"model returned {y.size} values of {m!r} for a batch of {x.shape[0]}"
            )
        result[m] = y
    if SOLVED in out:
        result[SOLVED] = np.asarray(out[SOLVED], dtype=bool).reshape(-1)
    return result, list(metrics)


def _nominal(bounds: list[Bound]) -> np.ndarray:
    return np.array([b.nominal for b in bounds], dtype=float)


def _point(bounds: list[Bound], row: np.ndarray) -> dict[str, float]:
    return {b.name: float(v) for b, v in zip(bounds, row)}


def _fd_steps(bounds: list[Bound], rel_step: float) -> np.ndarray:
    """Central-difference step per parameter: relative to the half-range, else |nominal|."""
    steps = np.empty(len(bounds))
    for i, b in enumerate(bounds):
        scale = b.half_range if b.half_range > 0 else abs(b.nominal)
        steps[i] = rel_step * (scale if scale > 0 else 1.0)
    return steps


def _central_differences(
    model: Model, bounds: list[Bound], metrics: list[str] | None, rel_step: float
) -> tuple[dict[str, np.ndarray], dict[str, float], list[str], int, dict]:
    """Sensitivities dy/dx_i at nominal from one batch of 2d + 1 points.

    A discrete parameter (``Bound.values``) steps to the ends of its set instead, values it
    takes (a step between two variants' drive levels may land where the stage behaves like
    neither): its sensitivity is the secant across the set, and ``ends[m]`` holds the
    metric's changes from nominal at its high and low end (NaN for the other parameters).

    Returns the sensitivities per metric (array over all bounds), the nominal value per
    metric, the metric list, the number of evaluations and ``ends``.
    """
    d = len(bounds)
    x0 = _nominal(bounds)
    steps = _fd_steps(bounds, rel_step)
    discrete = np.array([b.discrete for b in bounds], dtype=bool)
    highs = np.array([b.high for b in bounds])
    lows = np.array([b.low for b in bounds])
    batch = np.repeat(x0[None, :], 2 * d + 1, axis=0)
    idx = np.arange(d)
    batch[1 + idx, idx] = np.where(discrete, highs, x0 + steps)
    batch[1 + d + idx, idx] = np.where(discrete, lows, x0 - steps)
    span = np.where(discrete, highs - lows, 2.0 * steps)
    y, metrics = _evaluate(model, bounds, batch, metrics)
    # a metric infinite at both neighbours (a stress beyond its rating's temperature range)
    # has no derivative: NaN, as the table shows it, not a warning on the terminal
    with np.errstate(invalid="ignore"):
        sens = {m: (y[m][1 : 1 + d] - y[m][1 + d :]) / span for m in metrics}
        ends = {m: (np.where(discrete, y[m][1 : 1 + d] - y[m][0], np.nan),
                    np.where(discrete, y[m][1 + d :] - y[m][0], np.nan)) for m in metrics}
    nominal = {m: float(y[m][0]) for m in metrics}
    return sens, nominal, metrics, 2 * d + 1, ends


# ---------------------------------------------------------------------------------------------
# extreme value analysis
# ---------------------------------------------------------------------------------------------


def extreme_value(
    model: Model,
    bounds: list[Bound],
    metrics: list[str] | None = None,
    max_factorial: int = 12,
    max_rounds: int = 8,
) -> dict:
    """Extreme value analysis with every varying parameter at one of its bounds.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples) -> dict[str, ndarray]``.
    bounds : list of Bound
        Parameters; fixed ones (``low == high``) stay at nominal.
    metrics : list of str, optional
        Metrics to analyse; default every metric the model returns.
    max_factorial : int, default 12
        Largest number of varying parameters for which all ``2^d`` vertices are evaluated.
    max_rounds : int, default 8
        Rounds of single flips that improve the sensitivity-directed vertices (see Notes).

    Returns
    -------
    dict
        Per metric a dict with ``nominal``, ``min``, ``max`` (floats), ``argmin`` and
        ``argmax`` (dict name -> value, all parameters; empty when every vertex is NaN),
        ``method`` (``"full factorial"`` or
        ``"sensitivity-directed"``), ``evaluations`` (model samples used, shared by all
        metrics of the call) and ``dropped`` (evaluated points the model did not solve, by
        its ``SOLVED`` output, else whose value was NaN; an infinite value is a value and
        can be the extreme).

    Notes
    -----
    *Full factorial* (``d <= max_factorial``): the nominal point and all ``2^d`` vertices are
    evaluated in one batch (``2^d + 1`` evaluations). This is exact for metrics that are
    monotonic in each parameter over the box.

    *Sensitivity-directed* (``d > max_factorial``): central finite differences at nominal
    (step ``1e-3`` of the half-range; ``2 d + 1`` evaluations) give the sign of each
    sensitivity; per metric, the vertex with every parameter on the side that increases the
    metric and its mirror image are evaluated (at most ``2`` per metric, duplicates shared).
    A parameter with zero sensitivity is put at its low bound in both vertices. Each such
    vertex is then improved by single flips (a local search over the vertices, as in
    coordinate ascent): every vertex one parameter away is evaluated, all metrics' in one
    batch per round, and the best one that moves the metric further is kept, until none
    does or ``max_rounds`` rounds are done (``d`` new vertices per metric and sense and
    round). The result is exact for metrics that are monotonic in every parameter with the
    sign seen at nominal, and the flips find a corner whose signs differ from nominal's where
    it lies one improving flip after another from the directed one (the engine-bay pair's
    hottest corner, 1.9 K above the directed vertex: a drive and two leakages whose effects
    change sign between nominal and the hot, low-gain corner); a corner reachable only
    through worse ones can still be missed.

    ``min`` and ``max`` are taken over the evaluated vertices only (every vertex of the
    batch, also those selected for other metrics), ignoring NaN; the nominal value is
    reported separately and is not a candidate, so for a non-monotonic metric ``max`` can
    lie below ``nominal``. ``dropped`` counts NaN vertices.
    """
    bounds = _check_bounds(bounds)
    varying = np.array([not b.fixed for b in bounds], dtype=bool)
    vidx = np.flatnonzero(varying)
    d = int(vidx.size)
    x0 = _nominal(bounds)
    lows = np.array([b.low for b in bounds])
    highs = np.array([b.high for b in bounds])

    if d <= max_factorial:
        method = "full factorial"
        bits = (np.arange(2**d)[:, None] >> np.arange(d)[None, :]) & 1
        batch = np.repeat(x0[None, :], 2**d + 1, axis=0)
        batch[1:, vidx] = np.where(bits == 1, highs[vidx], lows[vidx])
        y, metrics = _evaluate(model, bounds, batch, metrics)
        evaluations = int(batch.shape[0])
        y_nom = {m: float(y[m][0]) for m in metrics}
        candidates = {m: (batch[1:], y[m][1:]) for m in metrics}
        solved = y[SOLVED][1:] if SOLVED in y else None
    else:
        method = "sensitivity-directed"
        sens, _, metrics, n_fd, _ = _central_differences(model, bounds, metrics, 1e-3)
        rows = []
        for m in metrics:
            up = sens[m][vidx] > 0
            v_max = x0.copy()
            v_max[vidx] = np.where(up, highs[vidx], lows[vidx])
            down = sens[m][vidx] < 0
            v_min = x0.copy()
            v_min[vidx] = np.where(down, highs[vidx], lows[vidx])
            rows.extend([v_max, v_min])
        batch = np.unique(np.vstack([x0[None, :], *rows]), axis=0)
        y, _ = _evaluate(model, bounds, batch, metrics)
        batch, y, n_flips = _flip_search(model, bounds, metrics, vidx, lows, highs, batch, y,
                                         rows, max_rounds)
        evaluations = int(n_fd + batch.shape[0])
        is_nominal = np.all(batch == x0[None, :], axis=1)
        on_vertex = np.all(
            (batch[:, vidx] == lows[vidx]) | (batch[:, vidx] == highs[vidx]), axis=1
        )
        y_nom = {m: float(y[m][is_nominal][0]) for m in metrics}
        candidates = {m: (batch[on_vertex], y[m][on_vertex]) for m in metrics}
        solved = y[SOLVED][on_vertex] if SOLVED in y else None

    result: dict = {}
    for m in metrics:
        pts, vals = candidates[m]
        finite = ~np.isnan(vals)  # an infinite value (a transition that never ends) counts
        if solved is not None:
            finite &= solved  # an unsolved point's figures are no extreme
        entry = {
            "nominal": y_nom[m],
            "method": method,
            "evaluations": evaluations,
            "dropped": int((~finite).sum() if solved is None else (~solved).sum()),
        }
        if finite.any():
            masked_lo = np.where(finite, vals, np.inf)
            masked_hi = np.where(finite, vals, -np.inf)
            i_min = int(np.argmin(masked_lo))
            i_max = int(np.argmax(masked_hi))
            entry.update(
                min=float(vals[i_min]),
                max=float(vals[i_max]),
                argmin=_point(bounds, pts[i_min]),
                argmax=_point(bounds, pts[i_max]),
            )
        else:
            entry.update(min=float("nan"), max=float("nan"), argmin={}, argmax={})
        result[m] = entry
    return result


def _flip_search(model, bounds, metrics, vidx, lows, highs, batch, y, starts, max_rounds):
    """Improve each metric's directed vertices (``starts``: max and min vertex per metric, in
    order) by single flips (:func:`extreme_value`, Notes). ``batch`` and ``y`` are the points
    evaluated so far and their outputs; returns them with every vertex the search evaluated
    (each once) and the number of rounds run."""
    index = {row.tobytes(): k for k, row in enumerate(batch)}
    solved = y.get(SOLVED)

    def value(m, k, sense):
        v = y[m][k]
        ok = not np.isnan(v) and (solved is None or bool(solved[k]))
        return sense * v if ok else -np.inf

    current = {}
    for j, m in enumerate(metrics):
        for sense, row in ((1.0, starts[2 * j]), (-1.0, starts[2 * j + 1])):
            k = index[np.asarray(row, dtype=float).tobytes()]
            current[(m, sense)] = (k, value(m, k, sense))
    other = np.where(np.isin(np.arange(lows.size), vidx), lows + highs, 0.0)
    rounds = 0
    for rounds in range(1, max_rounds + 1):
        # every vertex one flip from each search's current one, new ones evaluated at once
        flips = {}
        fresh = []
        for key, (k, _) in current.items():
            base = batch[k]
            rows = np.repeat(base[None, :], vidx.size, axis=0)
            rows[np.arange(vidx.size), vidx] = other[vidx] - base[vidx]  # the other bound
            flips[key] = rows
            fresh.extend(r for r in rows if r.tobytes() not in index)
        if fresh:
            new = np.unique(np.vstack(fresh), axis=0)
            y_new, _ = _evaluate(model, bounds, new, metrics)
            for r in new:
                index[r.tobytes()] = len(index)
            batch = np.vstack([batch, new])
            y = {m: np.concatenate([y[m], y_new[m]]) for m in y}
            solved = y.get(SOLVED)
        moved = False
        for key, rows in flips.items():
            m, sense = key
            ks = [index[r.tobytes()] for r in rows]
            vals = [value(m, k, sense) for k in ks]
            best = int(np.argmax(vals))
            now = current[key][1]
            if vals[best] > (now + 1e-12 * abs(now) if np.isfinite(now) else now):
                current[key] = (ks[best], vals[best])
                moved = True
        if not moved:
            break
    return batch, y, rounds


# ---------------------------------------------------------------------------------------------
# root-sum-square and linear bands
# ---------------------------------------------------------------------------------------------


def root_sum_square(
    model: Model,
    bounds: list[Bound],
    metrics: list[str] | None = None,
    rel_step: float = 1e-3,
) -> dict:
    """Linearised worst-case and root-sum-square bands from sensitivities at nominal.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples) -> dict[str, ndarray]``.
    bounds : list of Bound
        Parameters. Fixed parameters get a sensitivity (step relative to ``|nominal|``, or
        absolute ``rel_step`` at zero) but contribute nothing to the bands.
    metrics : list of str, optional
        Metrics to analyse; default every metric the model returns.
    rel_step : float, default 1e-3
        Central-difference step as a fraction of each parameter's half-range.

    Returns
    -------
    dict
        Per metric a dict with ``nominal``, ``rss_low``, ``rss_high``, ``linear_low``,
        ``linear_high`` (floats), ``sensitivities`` (dict name -> dy/dx) and
        ``evaluations`` (``2 d + 1``, all in one batch, ``d`` = number of parameters).

    Notes
    -----
    With sensitivities ``s_i = dy/dx_i`` and each parameter's room below and above its
    nominal, ``d_i = nominal_i - low_i`` and ``u_i = high_i - nominal_i``, the metric falls
    by ``f_i = s_i d_i`` (``|s_i| u_i`` for a negative slope) where the parameter moves to
    the end that lowers it, and rises by ``r_i = s_i u_i`` (``|s_i| d_i``) at the other:

    * linear extreme-value band: ``nominal - sum_i f_i .. nominal + sum_i r_i`` -- the worst
      case of the linearised model, exact for a model that is linear over the box;
    * RSS band: ``nominal - sqrt(sum_i f_i^2) .. nominal + sqrt(sum_i r_i^2)``.

    A nominal off the middle of its range (a gain's typical value, a lognormal's median)
    has its own room on each side; half the range on both sides put a band of a gain of
    40 .. 100 .. 250 at -5 .. 205. With a centred nominal both forms are the familiar
    ``nominal +- sum_i |s_i| h_i`` and ``nominal +- sqrt(sum_i (s_i h_i)^2)``.

    The RSS band treats every room as the same multiple of the parameter's standard
    deviation on that side (for example 3 sigma) and the parameters as independent, so it
    estimates the output spread at that same multiple of sigma. It is a statistical estimate, not a
    guarantee: a fraction of real units lies outside it, more so when the distributions are
    not normal, the model is not linear, or the half-ranges correspond to different sigma
    multiples.

    Central differences have truncation error of order ``rel_step^2`` times the curvature;
    the step lies inside the box unless the nominal sits on a bound. A discrete parameter
    (``Bound.values``) is not differentiated between its members: its ``f_i`` and ``r_i``
    are the metric's own changes when it moves from its nominal to the low and the high
    end of its set (the larger fall and the larger rise of the two, none below zero), and
    its sensitivity is the secant across the set.
    """
    bounds = _check_bounds(bounds)
    sens, nominal, metrics, evaluations, ends = _central_differences(
        model, bounds, metrics, rel_step
    )
    down = np.array([b.nominal - b.low for b in bounds])
    up = np.array([b.high - b.nominal for b in bounds])
    fixed = np.array([b.fixed for b in bounds], dtype=bool)
    discrete = np.array([b.discrete for b in bounds], dtype=bool)
    result = {}
    for m in metrics:
        s = sens[m]
        # Fixed parameters have no room and contribute nothing, even if their slope is NaN.
        with np.errstate(invalid="ignore"):
            fall = np.where(fixed, 0.0, np.where(s >= 0, s * down, -s * up))
            rise = np.where(fixed, 0.0, np.where(s >= 0, s * up, -s * down))
            # a discrete parameter moves the metric by its own changes at the set's ends
            to_high, to_low = ends[m]
            fall = np.where(discrete, np.maximum(0.0, -np.minimum(to_high, to_low)), fall)
            rise = np.where(discrete, np.maximum(0.0, np.maximum(to_high, to_low)), rise)
        fall = np.where(np.isnan(s) & ~fixed, np.nan, fall)
        rise = np.where(np.isnan(s) & ~fixed, np.nan, rise)
        y0 = nominal[m]
        result[m] = {
            "nominal": y0,
            "rss_low": y0 - float(np.sqrt(np.sum(fall**2))),
            "rss_high": y0 + float(np.sqrt(np.sum(rise**2))),
            "linear_low": y0 - float(np.sum(fall)),
            "linear_high": y0 + float(np.sum(rise)),
            "sensitivities": {b.name: float(v) for b, v in zip(bounds, s)},
            "evaluations": int(evaluations),
        }
    return result


# ---------------------------------------------------------------------------------------------
# bounded optimisation
# ---------------------------------------------------------------------------------------------


# Floating-point warnings the bounded search deliberately silences: non-finite objective
# values (solver failures) are returned as +inf, so the finite-difference gradients then
# contain inf/nan. Those steps are simply rejected by the line search, so the warnings they
# raise carry no information.
_SEARCH_ERRSTATE = {"invalid": "ignore", "over": "ignore", "divide": "ignore"}

# Relative forward-difference step in normalised coordinates.
_GRADIENT_STEP = 1e-6

# L-BFGS-B stops when an iteration improves the objective by less than this, relative
# (scipy's ``ftol``; its default is 2.2e-9). The objective comes from Newton solves converged
# to 1e-9, so its forward-difference gradients may carry up to about 1e-3 relative error (1e-9
# over the 1e-6 step) and a start near its optimum goes on with steps too small to matter: at
# 1e-15 one start of the lamp study took 541 objective calls. At 1e-12 the worst-case table moved by at most 4e-9
# relative (the maximum of vce_on) and the analysis took 18 s instead of 33.
_RELATIVE_IMPROVEMENT = 1e-12


@dataclass(frozen=True)
class _SearchGroup:
    """One multi-start search: a metric, a sense and how its start points are drawn.

    Parameters
    ----------
    metric : str
        Metric to extremise.
    sense : {"min", "max"}
        Direction of the search.
    starts : int
        Number of starting points (nominal, ``vertex``, then random points).
    rng : numpy.random.Generator
        Source of the random starting points.
    vertex : dict or None
        Extreme-value vertex used as the second start, or None.
    """

    metric: str
    sense: str
    starts: int
    rng: np.random.Generator
    vertex: dict[str, float] | None


class _Search:
    """One L-BFGS-B start of one search group, with its own best point and sample count.

    Parameters
    ----------
    bounds : list of Bound
        Parameters; fixed ones stay at nominal.
    metric : str
        Metric to extremise.
    sign : float
        ``+1`` to minimise, ``-1`` to maximise.
    u0 : ndarray
        Start point in normalised coordinates of the varying parameters (empty when no
        parameter varies).

    Notes
    -----
    :meth:`run` talks to the model only through the ``evaluate`` function it is given, so
    the same search runs alone (``evaluate`` calls the model directly) or as one of many in
    :func:`_run_lockstep` (``evaluate`` blocks until the shared batch has been evaluated).
    Its sequence of points depends only on the values it receives.
    """

    def __init__(self, bounds: list[Bound], metric: str, sign: float, u0: np.ndarray):
        self.metric = metric
        self.sign = sign
        self.u0 = np.clip(np.asarray(u0, dtype=float), 0.0, 1.0)
        self.x0 = _nominal(bounds)
        self.vidx = np.array([i for i, b in enumerate(bounds) if not b.fixed], dtype=int)
        self.lows = np.array([b.low for b in bounds])[self.vidx]
        self.span = np.array([b.high - b.low for b in bounds])[self.vidx]
        self.best_f = math.inf
        self.best_x = self.x0.copy()
        self.best_y = float("nan")
        self.evaluations = 0

    def run(self, evaluate: Callable[[np.ndarray], np.ndarray], maxiter: int) -> None:
        """Run the search to completion.

        Parameters
        ----------
        evaluate : callable
            ``evaluate(xs) -> values`` of this search's metric at the rows of ``xs``
            (full parameter vectors, shape ``(k, len(bounds))``).
        maxiter : int
            L-BFGS-B iteration limit.

        Notes
        -----
        Without varying parameters the nominal point is evaluated once. Otherwise
        :func:`scipy.optimize.minimize` (``"L-BFGS-B"``, box ``[0, 1]^d``) is run from
        ``u0``; every objective call asks ``evaluate`` for the point and its ``d``
        forward-difference neighbours in one block of ``d + 1`` rows. Every evaluated row
        is a candidate for the best point (the first strictly better one is kept).
        """
        sign, x0, vidx, lows, span = self.sign, self.x0, self.vidx, self.lows, self.span
        d = int(vidx.size)
        if d == 0:
            val = float(np.asarray(evaluate(x0[None, :]), dtype=float)[0])
            self.evaluations += 1
            if math.isfinite(val) and sign * val < self.best_f:
                self.best_f, self.best_x, self.best_y = sign * val, x0.copy(), val
            return

        def objective_and_gradient(u: np.ndarray) -> tuple[float, np.ndarray]:
            """Value and forward-difference gradient from ONE block of d + 1 points (the
            model's cost is mostly per call, so this is about d times faster than letting
            the optimizer difference point by point)."""
            u = np.clip(np.asarray(u, dtype=float), 0.0, 1.0)
            steps = np.where(u + _GRADIENT_STEP <= 1.0, _GRADIENT_STEP, -_GRADIENT_STEP)
            pts = np.vstack([u, u + np.diag(steps)])
            xs = np.tile(x0, (d + 1, 1))
            xs[:, vidx] = lows + pts * span
            vals = np.asarray(evaluate(xs), dtype=float)
            self.evaluations += d + 1
            finite = np.isfinite(vals)
            if finite.any():
                k = int(np.argmin(np.where(finite, sign * vals, np.inf)))
                if sign * vals[k] < self.best_f:
                    self.best_f = float(sign * vals[k])
                    self.best_x = xs[k].copy()
                    self.best_y = float(vals[k])
            if not finite[0]:
                return math.inf, np.zeros(d)
            grad = np.where(finite[1:], sign * (vals[1:] - vals[0]) / steps, 0.0)
            return float(sign * vals[0]), grad

        optimize.minimize(
            objective_and_gradient,
            self.u0,
            jac=True,
            method="L-BFGS-B",
            bounds=[(0.0, 1.0)] * d,
            options={"maxiter": int(maxiter), "ftol": _RELATIVE_IMPROVEMENT, "gtol": 1e-10},
        )


#: most combinations of discrete members the optimizer searches one by one; beyond it
#: each discrete parameter keeps its low end, nominal and high end only
MAX_DISCRETE_COMBINATIONS = 64


def discrete_combinations(bounds: list[Bound]) -> tuple[list[tuple[float, ...]], bool]:
    """The combinations of the discrete parameters' members the optimizer searches at.

    Every combination of every member while there are at most
    :data:`MAX_DISCRETE_COMBINATIONS`, else of each set's ends and nominal, else the
    nominal combination and the all-low and all-high ones. Returns the combinations (in
    the order of the discrete bounds) and whether they are every combination.
    """
    sets = [b.values for b in bounds if b.discrete]
    if math.prod(len(v) for v in sets) <= MAX_DISCRETE_COMBINATIONS:
        return list(itertools.product(*sets)), True
    ends = [tuple(sorted({b.low, b.nominal, b.high})) for b in bounds if b.discrete]
    if math.prod(len(v) for v in ends) <= MAX_DISCRETE_COMBINATIONS:
        return list(itertools.product(*ends)), False
    picks = [tuple(b.nominal for b in bounds if b.discrete),
             tuple(b.low for b in bounds if b.discrete),
             tuple(b.high for b in bounds if b.discrete)]
    return list(dict.fromkeys(picks)), False


def _start_searches(bounds: list[Bound], group: _SearchGroup) -> list[_Search]:
    """The starts of one search group, in order: nominal, vertex, then random points.

    Draws the random start points from ``group.rng`` (one ``(n, d)`` draw). Without varying
    parameters there is a single start at nominal. With discrete parameters the starts are
    made for each combination of their members (:func:`discrete_combinations`), the
    discrete parameters held there, since a point between two members is no unit that can
    be built.
    """
    if not any(b.discrete for b in bounds):
        return _starts_at(bounds, group)
    combos, _ = discrete_combinations(bounds)
    searches = []
    for combo in combos:
        held = iter(combo)
        at = []
        for b in bounds:
            if b.discrete:
                v = next(held)
                at.append(Bound(b.name, v, v, v))
            else:
                at.append(b)
        searches.extend(_starts_at(at, group))
    return searches


def _starts_at(bounds: list[Bound], group: _SearchGroup) -> list[_Search]:
    """The starts of one search group in a box without discrete parameters."""
    if group.sense not in ("min", "max"):
        raise ValueError(f"sense must be 'min' or 'max', got {group.sense!r}")
    sign = 1.0 if group.sense == "min" else -1.0
    x0 = _nominal(bounds)
    vidx = np.array([i for i, b in enumerate(bounds) if not b.fixed], dtype=int)
    lows = np.array([b.low for b in bounds])[vidx]
    span = np.array([b.high - b.low for b in bounds])[vidx]
    d = int(vidx.size)
    if d == 0:
        return [_Search(bounds, group.metric, sign, np.zeros(0))]
    start_points = [(x0[vidx] - lows) / span]
    if group.vertex is not None:
        v = np.array([group.vertex[b.name] for b in bounds])[vidx]
        start_points.append((v - lows) / span)
    n_random = max(int(group.starts) - len(start_points), 0)
    if n_random:
        start_points.extend(group.rng.random((n_random, d)))
    start_points = start_points[: max(int(group.starts), 1)]
    return [_Search(bounds, group.metric, sign, u0) for u0 in start_points]


def _combine(bounds: list[Bound], searches: list[_Search]) -> dict:
    """Result of one search group from its starts: the first strictly best value wins.

    Taking the starts in order, with strict comparison, gives the same point as tracking
    one running best over the starts run one after the other.
    """
    best_f, best_x, best_y = math.inf, _nominal(bounds), float("nan")
    for s in searches:
        if s.best_f < best_f:
            best_f, best_x, best_y = s.best_f, s.best_x, s.best_y
    return {
        "value": best_y,
        "at": _point(bounds, best_x),
        "evaluations": int(sum(s.evaluations for s in searches)),
        "starts": len(searches),
    }


class _Abort(Exception):
    """Unwinds a search thread whose lockstep run was abandoned."""


class _Lockstep:
    """Batching coordinator: one model call per round for all searches still running.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples) -> dict[str, ndarray]``.
    bounds : list of Bound
        Parameters.
    searches : list
        Objects with a ``metric`` attribute and a ``run(evaluate, maxiter)`` method
        (:class:`_Search`).

    Attributes
    ----------
    calls : int
        Model calls made so far.
    """

    def __init__(self, model: Model, bounds: list[Bound], searches: list) -> None:
        self._model = model
        self._bounds = bounds
        self._searches = list(searches)
        n = len(self._searches)
        self._cond = threading.Condition()
        self._live = set(range(n))
        self._pending: dict[int, np.ndarray] = {}
        self._replies: list[np.ndarray | None] = [None] * n
        self._wake = [threading.Event() for _ in range(n)]
        self._abort = False
        self._errors: list[BaseException] = []
        self.calls = 0

    def _request(self, i: int, xs: np.ndarray) -> np.ndarray:
        """Called in search thread ``i``: submit ``xs`` and block until its values arrive."""
        with self._cond:
            if self._abort:
                raise _Abort
            self._pending[i] = xs
            self._cond.notify()
        self._wake[i].wait()
        self._wake[i].clear()
        reply, self._replies[i] = self._replies[i], None
        if reply is None:
            raise _Abort
        return reply

    def _thread(self, i: int, maxiter: int) -> None:
        """Body of search thread ``i``; records any exception for the coordinator."""
        error = None
        try:
            # np.errstate is context-local: each thread sets its own.
            with np.errstate(**_SEARCH_ERRSTATE):
                self._searches[i].run(lambda xs: self._request(i, xs), maxiter)
        except _Abort:
            pass
        except BaseException as exc:  # noqa: BLE001 - re-raised in the calling thread
            error = exc
        finally:
            with self._cond:
                self._live.discard(i)
                if error is not None:
                    self._errors.append(error)
                self._cond.notify()

    def _serve(self, batch: list[tuple[int, np.ndarray]]) -> None:
        """Evaluate all pending blocks in one model call and hand each search its rows."""
        metrics = list(dict.fromkeys(self._searches[i].metric for i, _ in batch))
        xs = np.vstack([block for _, block in batch])
        with np.errstate(**_SEARCH_ERRSTATE):
            y, _ = _evaluate(self._model, self._bounds, xs, metrics)
        self.calls += 1
        start = 0
        for i, block in batch:
            stop = start + block.shape[0]
            self._replies[i] = y[self._searches[i].metric][start:stop]
            start = stop
            self._wake[i].set()

    def run(self, maxiter: int) -> None:
        """Run every search to completion in lockstep; re-raise the first error."""
        threads = []
        try:
            for i in range(len(self._searches)):
                t = threading.Thread(
                    target=self._thread, args=(i, maxiter), name=f"wc-search-{i}", daemon=True
                )
                t.start()
                threads.append(t)
            while True:
                with self._cond:
                    self._cond.wait_for(
                        lambda: self._errors or len(self._pending) == len(self._live)
                    )
                    if self._errors:
                        raise self._errors[0]
                    if not self._live:
                        return
                    # Ordered by search index, so every round's batch is reproducible.
                    batch = sorted(self._pending.items())
                    self._pending.clear()
                self._serve(batch)
        finally:
            with self._cond:
                self._abort = True
            for event in self._wake:
                event.set()
            for t in threads:
                t.join()


def _run_lockstep(
    model: Model, bounds: list[Bound], groups: Sequence[_SearchGroup], maxiter: int
) -> list[dict]:
    """Run every start of every search group in lockstep, one model call per round.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples) -> dict[str, ndarray]``.
    bounds : list of Bound
        Search box; fixed parameters stay at nominal.
    groups : sequence of _SearchGroup
        The multi-start searches (metric, sense, starts, generator, vertex).
    maxiter : int
        L-BFGS-B iteration limit per start.

    Returns
    -------
    list of dict
        Per group, in order, the result described in :func:`optimize_extreme`
        (``value``, ``at``, ``evaluations``, ``starts``), without extreme-value samples.

    Notes
    -----
    The model's cost is mostly per call, and L-BFGS-B asks for one small block of ``d + 1``
    points at a time, so running the searches one after the other makes about as many
    model calls as all searches make objective calls together. Here every start of every
    group is one :class:`_Search` in its own :class:`threading.Thread`; its objective
    submits its block to a shared :class:`_Lockstep` coordinator and blocks. The calling
    thread waits until every live search has either submitted a block or finished, then
    evaluates all blocks in one model call (asking for the union of their metrics, blocks
    in search order), hands each search its rows and waits again. The run therefore needs
    as many model calls as the longest single start has objective calls.

    The result is identical to running the starts one after the other, provided the model
    evaluates every sample independently of the others in its batch (values do not depend
    on the batch they are in): each search's sequence of points depends only on its own
    values, evaluation counts are per start, and :func:`_combine` takes the first strictly
    best value over the starts in order, as one running best would. The random start
    points come from each group's own generator, drawn before any search starts.

    An exception in the model (raised in the calling thread) or in a search thread stops
    the run: every waiting search is woken and unwound, all threads are joined, and the
    first exception is re-raised in the caller. Only the calling thread calls the model.
    """
    searches = [_start_searches(bounds, g) for g in groups]
    flat = [s for group in searches for s in group]
    if flat:
        _Lockstep(model, bounds, flat).run(maxiter)
    return [_combine(bounds, group) for group in searches]


def _optimize(
    model: Model,
    bounds: list[Bound],
    metric: str,
    sense: str,
    starts: int,
    rng: np.random.Generator,
    maxiter: int,
    vertex: dict[str, float] | None,
) -> dict:
    """Multi-start L-BFGS-B search in normalised coordinates; see :func:`optimize_extreme`.

    A single search group run by :func:`_run_lockstep` (its starts share model calls).
    """
    group = _SearchGroup(metric, sense, starts, rng, vertex)
    return _run_lockstep(model, bounds, [group], maxiter)[0]


def optimize_extreme(
    model: Model,
    bounds: list[Bound],
    metric: str,
    sense: str,
    starts: int = 8,
    seed=0,
    maxiter: int = 200,
) -> dict:
    """Bounded multi-start search for the true minimum or maximum of one metric.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples) -> dict[str, ndarray]``.
    bounds : list of Bound
        Search box; fixed parameters stay at nominal.
    metric : str
        Metric to extremise.
    sense : {"min", "max"}
        Direction of the search.
    starts : int, default 8
        Number of starting points: the nominal point, the best extreme-value vertex for
        this metric and sense, then random points in the box.
    seed : int, SeedSequence, Generator or None, default 0
        Seed for the random starting points (:func:`numpy.random.default_rng`).
    maxiter : int, default 200
        Iteration limit per start.

    Returns
    -------
    dict
        ``value`` : float
            Best metric value found (NaN if every evaluation failed).
        ``at`` : dict
            Parameter values (all parameters) at the best point.
        ``evaluations`` : int
            Model samples used, including the extreme-value analysis that supplies the
            vertex start.
        ``starts`` : int
            Number of starts actually run.

    Notes
    -----
    Each start runs :func:`scipy.optimize.minimize` with method ``"L-BFGS-B"`` in normalised
    coordinates ``u in [0, 1]^d`` (``x = low + u (high - low)``), so all parameters are on a
    common scale and the box is the unit cube. Gradients come from forward differences:
    every objective call evaluates the point and its ``d`` neighbours in one block of
    ``d + 1`` points. L-BFGS-B is inherently sequential, so the starts run in lockstep
    (see :func:`_run_lockstep`): each model call evaluates the pending blocks of all starts
    still running, and the search needs as many model calls as its longest start has
    objective calls; the result equals running the starts one after the other. This is the
    one place in the package where the model is not fed large batches. NaN results
    (non-converged solver) count as ``+inf`` for the search and the best finite value seen
    across all starts is returned.

    Multi-start search finds local extrema; it cannot prove that the global one was found.
    Compare its result with the vertices and with Monte Carlo extremes.
    """
    bounds = _check_bounds(bounds)
    rng = np.random.default_rng(seed)
    eva = extreme_value(model, bounds, [metric])[metric]
    key = "argmin" if sense == "min" else "argmax"
    vertex = eva[key] or None
    res = _optimize(model, bounds, metric, sense, starts, rng, maxiter, vertex)
    res["evaluations"] += int(eva["evaluations"])
    return res


# ---------------------------------------------------------------------------------------------
# combined table
# ---------------------------------------------------------------------------------------------


def worst_case_table(
    model: Model,
    bounds: list[Bound],
    metrics: list[str] | None = None,
    mc_extremes: dict | None = None,
    seed=0,
    optimize_metrics: list[str] | None = None,
    starts: int = 8,
    maxiter: int = 200,
    optimize_senses: dict[str, tuple[str, ...]] | None = None,
) -> dict:
    """Extreme-value, RSS and optimised extremes of every metric, side by side.

    ``optimize_metrics`` limits the (costly) optimizer search to those metrics (default:
    all); the others get ``opt_min``/``opt_max`` of None. The searches of all those metrics,
    both senses and every start run in lockstep (see :func:`_run_lockstep`), so the search
    needs about as many model calls as its longest single start, each call evaluating the
    pending points of every search still running; the figures equal those of running the
    searches one after the other.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples) -> dict[str, ndarray]``.
    bounds : list of Bound
        Parameters.
    metrics : list of str, optional
        Metrics to analyse; default every metric the model returns.
    mc_extremes : dict, optional
        Monte Carlo results per metric, ``{metric: {"min", "max", "p001", "p999"}}``, placed
        beside the worst-case figures as ``mc_min``, ``mc_max``, ``mc_p001``, ``mc_p999``;
        ``None`` (how a run summary stores a figure no sample produced) becomes NaN.
    seed : int, SeedSequence or None, default 0
        Root seed; independent child seeds are spawned for each metric and sense.
    optimize_metrics : list of str, optional
        Metrics given to the optimizer search; default all of ``metrics``.
    optimize_senses : dict, optional
        The senses (``"min"``, ``"max"``) searched for a metric of ``optimize_metrics``;
        default both. A search's seed depends only on its metric's place in ``metrics`` and
        its sense, so a sense left out changes no other search.
    starts : int, default 8
        Starting points per metric and sense, as in :func:`optimize_extreme`.
    maxiter : int, default 200
        L-BFGS-B iteration limit per start.

    Returns
    -------
    dict
        ``result[metric]`` is a flat, table-ready dict with ``nominal``, ``eva_min``,
        ``eva_max``, ``eva_argmin``, ``eva_argmax``, ``eva_method``, ``eva_dropped`` (corners
        without a value, NaN: not solved), ``rss_low``,
        ``rss_high``, ``linear_low``, ``linear_high``, ``opt_min``, ``opt_max``,
        ``opt_argmin``, ``opt_argmax`` and, with ``mc_extremes``, the ``mc_*`` entries.
        ``result["evaluations"]`` is the total number of model samples used by all methods
        (the extreme-value and RSS batches are shared by all metrics).
    """
    bounds = _check_bounds(bounds)
    eva = extreme_value(model, bounds, metrics)
    metrics = list(eva)
    rss = root_sum_square(model, bounds, metrics)
    total = int(eva[metrics[0]]["evaluations"]) if metrics else 0
    total += int(rss[metrics[0]]["evaluations"]) if metrics else 0
    children = np.random.SeedSequence(seed).spawn(2 * len(metrics))
    groups, keys = [], []
    for k, m in enumerate(metrics):
        if optimize_metrics is not None and m not in optimize_metrics:
            continue
        senses = (optimize_senses or {}).get(m, ("min", "max"))
        for j, sense in enumerate(("min", "max")):
            if sense not in senses:
                continue
            rng = np.random.default_rng(children[2 * k + j])
            vertex = eva[m]["arg" + sense] or None
            groups.append(_SearchGroup(m, sense, starts, rng, vertex))
            keys.append((m, sense))
    found = dict(zip(keys, _run_lockstep(model, bounds, groups, maxiter)))
    table: dict = {}
    for m in metrics:
        e, r = eva[m], rss[m]
        opt = {}
        for sense in ("min", "max"):
            if (m, sense) not in found:
                opt[sense] = {"value": None, "at": {}}
                continue
            opt[sense] = found[(m, sense)]
            total += int(opt[sense]["evaluations"])
        row = {
            "nominal": e["nominal"],
            "eva_min": e["min"],
            "eva_max": e["max"],
            "eva_argmin": e["argmin"],
            "eva_argmax": e["argmax"],
            "eva_method": e["method"],
            "eva_dropped": e["dropped"],
            "rss_low": r["rss_low"],
            "rss_high": r["rss_high"],
            "linear_low": r["linear_low"],
            "linear_high": r["linear_high"],
            "opt_min": opt["min"]["value"],
            "opt_max": opt["max"]["value"],
            "opt_argmin": opt["min"]["at"],
            "opt_argmax": opt["max"]["at"],
        }
        if mc_extremes is not None and m in mc_extremes:
            for key in ("min", "max", "p001", "p999"):
                # a metric no Monte Carlo sample produced (every one NaN) has no extremes
                value = mc_extremes[m].get(key)
                row["mc_" + key] = float("nan") if value is None else float(value)
        table[m] = row
    table["evaluations"] = total
    return table


# ---------------------------------------------------------------------------------------------
# tolerance budgets
# ---------------------------------------------------------------------------------------------


def combine_tolerances(
    initial: float,
    temperature: float = 0.0,
    ageing: float = 0.0,
    method: str = "linear",
) -> float:
    """Relative tolerance budget of a part parameter from its drift contributions.

    Parameters
    ----------
    initial : float
        Initial (purchase) tolerance, relative, e.g. ``0.01`` for 1 %.
    temperature : float, default 0
        Relative drift over the operating temperature range.
    ageing : float, default 0
        Relative end-of-life drift (ageing, and where relevant radiation).
    method : {"linear", "rss"}, default "linear"
        ``"linear"``: ``|initial| + |temperature| + |ageing|``, the worst-case budget in
        which every contribution is at its limit simultaneously. ``"rss"``:
        ``sqrt(initial^2 + temperature^2 + ageing^2)``, a statistical budget for
        independent contributions quoted at the same confidence level.

    Returns
    -------
    float
        Combined relative tolerance.

    Notes
    -----
    Worst-case analysis practice in space-grade electronics (ECSS-Q-HB-30-01A, 2011, on
    worst case circuit performance analysis) builds each part parameter's end-of-life
    tolerance from the initial tolerance plus the drifts due to temperature and ageing.
    Contributions that are bias-like (always in the same direction) belong in a linear
    sum; random, independent contributions may be combined by root-sum-square. Use
    ``"linear"`` for a guaranteed worst case and ``"rss"`` for a statistical estimate.
    """
    parts = np.array([initial, temperature, ageing], dtype=float)
    if not np.all(np.isfinite(parts)):
        raise ValueError(f"tolerances must be finite, got {parts.tolist()}")
    if method == "linear":
        return float(np.sum(np.abs(parts)))
    if method == "rss":
        return float(np.sqrt(np.sum(parts**2)))
    raise ValueError(f"method must be 'linear' or 'rss', got {method!r}")
