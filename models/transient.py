"""Batched implicit integration of charge-based nodal equations, each sample with its own step.

A switching stage in transient is a small system of ``n`` unknowns (node voltages [V], coil
currents [A]) per sample::

    f(x, t) + d q(x) / dt = 0,

where ``f`` collects the static currents leaving each node (device currents, resistors, sources;
for a coil the voltage balance of its winding) and ``q`` the stored charges (junction charges;
for a coil its flux L i). :func:`integrate` advances S such systems together: every sample has
its own time, its own step and its own history, so a fast sample takes long steps while a slow
one still resolves its edges; the work is vectorized over the samples that are still running.

Method
------
- Variable-step BDF2 (second-order backward differentiation) with a backward-Euler step at the
  start and after every breakpoint (the drive's edge corners): BDF2 is L-stable, which suits the
  algebraic nodes (no charge) and the stiff junction exponentials.
- A damped Newton iteration per step, the stacked small linear systems solved by
  :func:`tolerance.models.newton.solve_stacked`; the system's ``limit`` (junction limiting)
  applies to every iterate.
- Local truncation error from the difference between the corrector and the polynomial
  predictor through the last points (Milne's device), per sample, of the unknowns and (when a
  charge tolerance is given) of the node charges; the backward-Euler step is checked against
  the explicit Euler prediction of the charges. A sample whose error exceeds its tolerance, or
  whose Newton iteration fails, rejects its step and retries with a shorter one while the
  others go on. Samples whose Newton iteration has converged leave the iteration; the rest go
  on as a subset.
- Steps are shortened to land exactly on breakpoints (corners of the drive; the history is
  kept across them, the error estimate shortens the steps that need it).
- A sample leaves the active set when it reaches its end time, or when it has passed its last
  breakpoint, found all its events and the system reports it settled; the working arrays are
  compacted when enough samples have left, so the remaining work shrinks with them.
- Per-sample event crossings (levels of an observed current, with a direction; the crossing
  of the parabola through the last three points), running integrals of observed powers (the
  trapezoid corrected by the curvature of that parabola) and the running maximum of an
  observed voltage are kept, so no waveform needs to be stored; a few waveforms can be
  recorded on request.

Notes
-----
Variable-step BDF2 (e.g. Hairer & Wanner, Solving Ordinary Differential Equations II, sec. III.5;
Brayton, Gustavson & Hachtel, "A new efficient algorithm for solving differential-algebraic
systems using implicit backward differentiation formulas," Proc. IEEE 60, 1972), with
``omega = h_n / h_(n-1)``::

    (1 + 2 omega)/(1 + omega) q_(n+1) - (1 + omega) q_n + omega^2/(1 + omega) q_(n-1)
        + h_n f(x_(n+1), t_(n+1)) = 0.

Its local error is ``x''' h_n^2 (h_n + h_(n-1))^2 / (6 (2 h_n + h_(n-1)))`` and that of the
quadratic predictor through ``t_n, t_(n-1), t_(n-2)`` is ``x''' h_n (h_n + h_(n-1))
(h_n + h_(n-1) + h_(n-2)) / 6``; with the two errors L and P of opposite sign the corrector's
error is ``L / (L + P) |x_corr - x_pred|`` (2/11 at constant step; Milne's device). The step
factor is ``0.7 (1 / err)^(1/3)`` (a low safety factor: fewer rejected steps,
which cost more Newton iterations than accepted ones), limited to [0.2, 2].
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from tolerance.models.newton import solve_stacked

__all__ = ["ChargeSystem", "Observation", "TransientResult", "integrate"]

#: Step status codes of :class:`TransientResult`.
RUNNING, FINISHED, SETTLED, FAILED_NEWTON, FAILED_STEPS = 0, 1, 2, 3, 4


def _row_max(a):
    """``a.max(axis=1)`` of an (S, n) array for the few columns of a stage, column by
    column (far faster than numpy's reduction along a short last axis; NaN propagates)."""
    out = a[:, 0].copy()
    for k in range(1, a.shape[1]):
        np.maximum(out, a[:, k], out=out)
    return out


def _solve(a, b):
    """Stacked small linear solves: Cramer's rule for 3 unknowns, else
    :func:`~tolerance.models.newton.solve_stacked` (non-finite where singular)."""
    if b.shape[1] != 3:
        return solve_stacked(a, b)
    a00, a01, a02 = a[:, 0, 0], a[:, 0, 1], a[:, 0, 2]
    a10, a11, a12 = a[:, 1, 0], a[:, 1, 1], a[:, 1, 2]
    a20, a21, a22 = a[:, 2, 0], a[:, 2, 1], a[:, 2, 2]
    c00 = a11 * a22 - a12 * a21
    c01 = a12 * a20 - a10 * a22
    c02 = a10 * a21 - a11 * a20
    det = a00 * c00 + a01 * c01 + a02 * c02
    b0, b1, b2 = b[:, 0], b[:, 1], b[:, 2]
    out = np.empty_like(b)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        inv = 1.0 / det
        out[:, 0] = (c00 * b0 + (a02 * a21 - a01 * a22) * b1 + (a01 * a12 - a02 * a11) * b2) * inv
        out[:, 1] = (c01 * b0 + (a00 * a22 - a02 * a20) * b1 + (a02 * a10 - a00 * a12) * b2) * inv
        out[:, 2] = (c02 * b0 + (a01 * a20 - a00 * a21) * b1 + (a00 * a11 - a01 * a10) * b2) * inv
    return out


@dataclass
class Observation:
    """What the integrator tracks of a system between steps (all per sample).

    Attributes
    ----------
    current : ndarray, shape (S,)
        The current whose level crossings are the events [A].
    power : ndarray, shape (S, m)
        Powers whose running integrals are kept [W].
    voltage : ndarray, shape (S,)
        The voltage whose running maximum is kept [V].
    """

    current: np.ndarray
    power: np.ndarray
    voltage: np.ndarray


class ChargeSystem(Protocol):
    """What :func:`integrate` needs from a batch of charge-based nodal systems."""

    n_unknowns: int

    def evaluate(self, t: np.ndarray, x: np.ndarray):
        """``(f, df_dx, q, dq_dx, aux)`` at per-sample times ``t`` (S,) and unknowns ``x``
        (S, n): shapes (S, n), (S, n, n), (S, n), (S, n, n) and (S, a); ``aux`` holds whatever
        per-sample values :meth:`observe` wants to reuse (e.g. device currents)."""
        ...

    def observe(self, t: np.ndarray, x: np.ndarray, aux: np.ndarray) -> Observation:
        """The tracked quantities at ``x``; ``aux`` comes from :meth:`evaluate` at the last
        Newton iterate before ``x`` (within the Newton tolerance of it)."""
        ...

    def settled(self, x: np.ndarray) -> np.ndarray:
        """Per sample: has the state come to rest (S,) bool."""
        ...

    def limit(self, x_new: np.ndarray, x_old: np.ndarray) -> np.ndarray:
        """Junction limiting of a Newton iterate (return ``x_new`` when nothing applies)."""
        ...

    def subset(self, idx: np.ndarray) -> "ChargeSystem":
        """The same systems for the samples ``idx``."""
        ...


@dataclass
class TransientResult:
    """Outcome of :func:`integrate` per sample.

    Attributes
    ----------
    event_times : ndarray, shape (S, k)
        Time of the first crossing of each event level [s]; NaN if it did not happen.
    integrals : ndarray, shape (S, m)
        Integrals of the observed powers from the start to ``end_time`` [J].
    peak_voltage : ndarray, shape (S,)
        Maximum of the observed voltage at the accepted step points [V].
    end_time : ndarray, shape (S,)
        Time at which the sample left the active set [s].
    final_state : ndarray, shape (S, n)
        Unknowns at ``end_time``.
    status : ndarray, shape (S,)
        ``FINISHED`` (end time reached), ``SETTLED``, ``FAILED_NEWTON`` (step below the minimum
        after Newton or error failures) or ``FAILED_STEPS`` (step budget exhausted).
    steps, rejected : ndarray, shape (S,)
        Accepted and rejected steps.
    waveforms : dict[int, dict[str, ndarray]]
        For each recorded sample: ``t`` (N,), ``x`` (N, n), ``current`` (N,), ``voltage`` (N,).
    """

    event_times: np.ndarray
    integrals: np.ndarray
    peak_voltage: np.ndarray
    end_time: np.ndarray
    final_state: np.ndarray
    status: np.ndarray
    steps: np.ndarray
    rejected: np.ndarray
    waveforms: dict = field(default_factory=dict)

    @property
    def ok(self) -> np.ndarray:
        """Samples that ended normally (end time reached or settled)."""
        return (self.status == FINISHED) | (self.status == SETTLED)


def integrate(system: ChargeSystem, x0, t_end, *, absolute_tolerance, relative_tolerance=1e-3,
              charge_tolerance=None, charge_relative_tolerance=None,
              breakpoints=None, event_levels=None, event_directions=None,
              initial_step=1e-11, minimum_step=1e-18, max_steps=20000,
              max_newton_iterations=8, first_step_iterations=60, newton_fraction=0.05,
              record=(),
              compact_fraction=0.75) -> TransientResult:
    """Integrate ``f(x, t) + dq(x)/dt = 0`` from ``t = 0`` for a batch of samples.

    Parameters
    ----------
    system : ChargeSystem
        The batch of systems.
    x0 : ndarray, shape (S, n)
        Consistent initial unknowns at ``t = 0`` (a DC solution).
    t_end : ndarray, shape (S,)
        End time of each sample [s].
    absolute_tolerance : ndarray, shape (n,) or (S, n)
        Absolute local-error tolerance of each unknown [V] or [A].
    relative_tolerance : float
        Relative local-error tolerance [1], of the unknowns and of the charges.
    charge_tolerance : ndarray, shape (n,) or (S, n), optional
        Absolute local-error tolerance of each node's charge [C] (or flux [Wb]); with it the
        error of the charges is controlled as well as that of the unknowns. Stored charge
        follows the junction voltages exponentially, so a charge tolerance keeps storage
        times accurate where a voltage tolerance alone would need to be very tight.
    charge_relative_tolerance : float, optional
        Relative tolerance of the charges [1] (default: ``relative_tolerance``).
    breakpoints : ndarray, shape (S, b), optional
        Increasing times the steps must land on (drive edge corners) [s]; ``inf`` pads.
    event_levels : ndarray, shape (S, k), optional
        Levels of the observed current whose first crossings are recorded [A].
    event_directions : ndarray, shape (S, k) or (k,), optional
        +1 for a rising crossing, -1 for a falling one.
    initial_step : float or ndarray
        First step, and the step after a breakpoint at most [s].
    minimum_step : float
        A sample whose step falls below this fails [s].
    max_steps : int
        Budget of accepted plus rejected steps per sample.
    max_newton_iterations : int
        Newton iterations per step before the step is rejected.
    first_step_iterations : int
        Newton iterations allowed on a backward-Euler step (the start), where a node without
        charge may have to jump like a DC solution.
    newton_fraction : float
        Newton convergence: every ``|dx|`` below this fraction of the error tolerance.
    record : sequence of int
        Sample indices whose waveforms are stored.
    compact_fraction : float
        Compact the working arrays when fewer than this fraction are still running.

    Returns
    -------
    TransientResult

    Notes
    -----
    Method and error estimate: see the module docstring.
    """
    x0 = np.asarray(x0, dtype=float)
    n_samples, n = x0.shape
    t_end = np.broadcast_to(np.asarray(t_end, dtype=float), (n_samples,)).copy()
    atol_all = np.broadcast_to(np.asarray(absolute_tolerance, dtype=float), (n_samples, n)).copy()
    qtol_all = (None if charge_tolerance is None else
                np.broadcast_to(np.asarray(charge_tolerance, dtype=float), (n_samples, n)).copy())
    rtol = float(relative_tolerance)
    qrtol = rtol if charge_relative_tolerance is None else float(charge_relative_tolerance)
    if breakpoints is None:
        breakpoints = np.full((n_samples, 1), np.inf)
    bps_all = np.asarray(breakpoints, dtype=float).reshape(n_samples, -1)
    bps_all = np.concatenate([bps_all, np.full((n_samples, 1), np.inf)], axis=1)
    n_bp = bps_all.shape[1]
    if event_levels is None:
        event_levels = np.zeros((n_samples, 0))
    lev_all = np.asarray(event_levels, dtype=float).reshape(n_samples, -1)
    k = lev_all.shape[1]
    dir_all = np.broadcast_to(np.asarray(event_directions if event_directions is not None
                                         else np.ones(k), dtype=float),
                              (n_samples, k)).copy()
    h_init_all = np.broadcast_to(np.asarray(initial_step, dtype=float), (n_samples,)).copy()

    # outputs
    out_events = np.full((n_samples, k), np.nan)
    out_status = np.zeros(n_samples, dtype=np.int64)
    out_end = np.zeros(n_samples)
    out_state = x0.copy()
    out_steps = np.zeros(n_samples, dtype=np.int64)
    out_rejected = np.zeros(n_samples, dtype=np.int64)
    waveforms: dict[int, dict[str, list]] = {int(r): {"t": [], "x": [], "current": [],
                                                     "voltage": []} for r in record}

    t_zero = np.zeros(n_samples)
    *_, aux0 = system.evaluate(t_zero, x0)
    obs = system.observe(t_zero, x0, aux0)
    m = obs.power.shape[1]
    out_integrals = np.zeros((n_samples, m))
    out_peak = np.asarray(obs.voltage, dtype=float).copy()

    # working set
    gidx = np.arange(n_samples)
    sys_w = system
    t = np.zeros(n_samples)
    h = np.minimum(h_init_all, np.where(bps_all[:, 0] > 0, bps_all[:, 0], np.inf))
    h = np.minimum(h, np.maximum(t_end, minimum_step))
    xa = x0.copy()  # x_n
    xb = x0.copy()  # x_(n-1)
    xc = x0.copy()  # x_(n-2)
    f_start, _, qa, _, _ = sys_w.evaluate(t, xa)
    qa = np.array(qa, dtype=float)
    qb = qa.copy()
    qc = qa.copy()
    f_prev = np.array(f_start, dtype=float)
    h1 = np.ones(n_samples)
    h2 = np.ones(n_samples)
    npts = np.ones(n_samples, dtype=np.int64)
    bp_i = np.zeros(n_samples, dtype=np.int64)
    # skip breakpoints at or before the start
    while True:
        at_start = bps_all[gidx, np.minimum(bp_i, n_bp - 1)] <= 0.0
        if not np.any(at_start):
            break
        bp_i = bp_i + at_start
    y_prev = np.asarray(obs.current, dtype=float).copy()
    y_prev2 = y_prev.copy()
    p_prev = np.asarray(obs.power, dtype=float).copy()
    p_prev2 = p_prev.copy()
    integ = np.zeros((n_samples, m))
    peak = out_peak.copy()
    ev = np.full((n_samples, k), np.nan)
    steps = np.zeros(n_samples, dtype=np.int64)
    rejected = np.zeros(n_samples, dtype=np.int64)
    atol = atol_all
    qtol = qtol_all if qtol_all is not None else np.zeros((n_samples, 0))
    levels, dirs, bps, tend, h_init = lev_all, dir_all, bps_all, t_end, h_init_all
    active = np.ones(n_samples, dtype=bool)
    rec_map = {}

    def remap_records():
        return {int(g): int(i) for i, g in enumerate(gidx) if int(g) in waveforms}

    rec_map = remap_records()
    for r, i in rec_map.items():
        w = waveforms[r]
        w["t"].append(0.0)
        w["x"].append(xa[i].copy())
        w["current"].append(float(y_prev[i]))
        w["voltage"].append(float(peak[i]))

    # samples with nothing to do
    empty = t_end <= 0.0
    if np.any(empty):
        active &= ~empty
        out_status[empty] = FINISHED

    while active.any():
        # ---- step size: land on the next breakpoint and on the end time
        bp_next = bps[np.arange(gidx.size), np.minimum(bp_i, n_bp - 1)]
        to_bp = bp_next - t
        h = np.where(to_bp < 2.0 * h, np.where(t + h >= bp_next - 1e-3 * h, to_bp,
                                                np.minimum(h, 0.5 * to_bp)), h)
        land_bp = np.isfinite(bp_next) & (h >= to_bp)
        h = np.minimum(h, to_bp)
        to_end = tend - t
        land_end = h >= to_end
        h = np.minimum(h, to_end)
        h = np.maximum(h, minimum_step)
        t_new = t + h

        # ---- predictor
        with np.errstate(divide="ignore", invalid="ignore"):
            d01 = (xa - xb) / h1[:, None]
            d12 = (xb - xc) / h2[:, None]
            d012 = (d01 - d12) / (h1 + h2)[:, None]
        lin = xa + h[:, None] * d01
        quad = lin + (h * (h + h1))[:, None] * d012
        xp = np.where((npts >= 3)[:, None], quad, np.where((npts == 2)[:, None], lin, xa))
        xp = np.where(np.isfinite(xp), xp, xa)

        # ---- BDF coefficients (BE when there is no history since the last breakpoint)
        omega = h / h1
        bdf2 = npts >= 2
        a0 = np.where(bdf2, (1.0 + 2.0 * omega) / (1.0 + omega), 1.0)
        a1 = np.where(bdf2, -(1.0 + omega), -1.0)
        a2 = np.where(bdf2, omega * omega / (1.0 + omega), 0.0)
        hist = a1[:, None] * qa + a2[:, None] * qb

        # ---- Newton (samples that converge leave the iteration; the rest go on as a subset)
        scale = atol + rtol * np.abs(xp)
        x = xp.copy()
        q_new = np.empty_like(qa)
        f_new = np.empty_like(qa)
        aux = None
        conv = np.zeros(gidx.size, dtype=bool)
        it_idx = np.arange(gidx.size)  # samples still iterating (indices into the work set)
        it_sys = sys_w
        xi, prev_norm = x, None
        a0i, histi, hi, ti, scalei, qtoli = a0, hist, h, t_new, scale, qtol
        be_i = npts == 1
        for it in range(max(max_newton_iterations, first_step_iterations)):
            if it == max_newton_iterations:
                # only backward-Euler steps go on iterating
                keep = np.flatnonzero(be_i)
                if keep.size == 0:
                    break
                if keep.size < it_idx.size:
                    it_idx = it_idx[keep]
                    it_sys = it_sys.subset(keep)
                    xi, a0i, histi, hi, ti, scalei, qtoli, be_i, prev_norm = (
                        v[keep] for v in (xi, a0i, histi, hi, ti, scalei, qtoli, be_i,
                                          prev_norm))
            f, df, q, dq, auxi = it_sys.evaluate(ti, xi)
            if aux is None:
                aux = np.empty((gidx.size, auxi.shape[1]))
            g = a0i[:, None] * q + histi + hi[:, None] * f
            jac = a0i[:, None, None] * dq + hi[:, None, None] * df
            dx = _solve(jac, -g)
            finite = np.isfinite(_row_max(np.abs(dx)))
            if not finite.all():
                dx = np.where(finite[:, None], dx, 0.0)
            x_try = it_sys.limit(xi + dx, xi)
            step = x_try - xi
            dq_step = np.einsum("sij,sj->si", dq, step)
            norm = _row_max(np.abs(step) / scalei)
            if qtol_all is not None:
                np.maximum(norm, _row_max(np.abs(dq_step) / (qtoli + qrtol * np.abs(q))),
                           out=norm)
            ok = norm <= newton_fraction
            if prev_norm is not None:
                # contraction-rate test (Hairer & Wanner II, sec. IV.8)
                with np.errstate(divide="ignore", invalid="ignore"):
                    theta = norm / prev_norm
                    ok |= (theta < 0.9) & (theta / (1.0 - theta) * norm <= newton_fraction)
            ok &= finite
            xi = xi + step
            q_i = q + dq_step
            # this iteration is stored for the samples that had not converged before it; a
            # converged sample keeps the iterate it converged at, whatever the others in its
            # batch still need (further iterations moved its last digits, so a result
            # depended on the chunk it was computed in)
            if it_idx.size == gidx.size:  # the whole working set
                # (at most a quarter of the set has converged here, compact_fraction: the
                # plain copies and the few converged rows put back cost less than a masked
                # copy of every row)
                done = np.flatnonzero(conv) if it else np.empty(0, dtype=np.intp)
                kept = [a[done] for a in (x, q_new, f_new, aux)] if done.size else None
                x[...] = xi
                q_new[...] = q_i
                f_new[...] = f
                aux[...] = auxi
                if kept is not None:
                    x[done], q_new[done], f_new[done], aux[done] = kept
                conv |= ok
                still = ~conv
            else:
                fresh = ~conv[it_idx]
                rows = it_idx[fresh]
                x[rows] = xi[fresh]
                q_new[rows] = q_i[fresh]
                f_new[rows] = f[fresh]
                aux[rows] = auxi[fresh]
                conv[it_idx[ok]] = True
                still = ~conv[it_idx]
            n_still = int(np.count_nonzero(still))
            if n_still == 0:
                break
            if n_still < compact_fraction * it_idx.size:
                keep = np.flatnonzero(still)
                it_idx = it_idx[keep]
                it_sys = it_sys.subset(keep)
                xi, a0i, histi, hi, ti, scalei, qtoli, be_i = (
                    v[keep] for v in (xi, a0i, histi, hi, ti, scalei, qtoli, be_i))
                norm = norm[keep]
            prev_norm = norm
        conv &= np.isfinite(_row_max(np.abs(x)))

        # ---- local error
        diff = np.abs(x - xp)
        hh1 = h + h1
        lerr = h * h * hh1 * hh1 / (2.0 * h + h1)
        perr = h * hh1 * (hh1 + h2)
        factor = np.where(npts >= 3, lerr / (lerr + perr), np.where(npts == 2, 0.5, 0.0))
        err = _row_max(diff / (atol + rtol * np.abs(x))) * factor
        if qtol_all is not None:
            with np.errstate(divide="ignore", invalid="ignore"):
                e01 = (qa - qb) / h1[:, None]
                e12 = (qb - qc) / h2[:, None]
                e012 = (e01 - e12) / (h1 + h2)[:, None]
            qlin = qa + h[:, None] * e01
            qquad = qlin + (h * (h + h1))[:, None] * e012
            qp = np.where((npts >= 3)[:, None], qquad, np.where((npts == 2)[:, None], qlin,
                                                                  qa - h[:, None] * f_prev))
            # backward Euler steps: error h/2 |dq/dt(t_n+1) - dq/dt(t_n)| with dq/dt = -f,
            # i.e. half the distance to the explicit Euler prediction
            qfac = np.where(npts == 1, 0.5, factor)
            qerr = _row_max(np.abs(q_new - qp) / (qtol + qrtol * np.abs(q_new))) * qfac
            err = np.maximum(err, np.where(np.isfinite(qerr), qerr, np.inf))
        err = np.where(np.isfinite(err), err, np.inf)
        accept = active & conv & (err <= 1.0)
        reject = active & ~accept

        # ---- step factors (order 2 after the start, order 1 for the backward Euler step)
        with np.errstate(divide="ignore"):
            expo = np.where(npts == 1, -0.5, -1.0 / 3.0)
            grow = 0.7 * np.power(np.maximum(err, 1e-12), expo)
        # np.clip's bounds by two ufuncs (the same values, NaN included, at less overhead)
        fac = np.where(accept, np.minimum(np.maximum(grow, 0.2), 2.0),
                       np.where(conv, np.minimum(np.maximum(grow, 0.1), 0.5), 0.25))
        if qtol_all is None:
            fac = np.where(accept & (npts == 1), 2.0, fac)

        if accept.any():
            obs = sys_w.observe(t_new, x, aux)
            y = np.asarray(obs.current, dtype=float)
            p = np.asarray(obs.power, dtype=float)
            # events (first crossings, linear interpolation inside the step)
            if k:
                before = (y_prev[:, None] - levels) * dirs
                after = (y[:, None] - levels) * dirs
                hit = accept[:, None] & np.isnan(ev) & (before < 0.0) & (after >= 0.0)
                if hit.any():
                    # crossing of the parabola through the last three points, from the
                    # linear interpolation by Newton's method (it stays inside the step)
                    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                        slope = (y - y_prev) / h
                        curv = (slope - (y_prev - y_prev2) / h1) / (h + h1)
                        curv = np.where((npts >= 2) & np.isfinite(curv), curv, 0.0)
                        hh = h[:, None]
                        tau = (levels - y_prev[:, None]) / slope[:, None]
                        tau = np.clip(np.where(np.isfinite(tau), tau, hh), 0.0, hh)
                        for _ in range(3):
                            val = (y_prev[:, None] + slope[:, None] * tau
                                   + curv[:, None] * tau * (tau - hh) - levels)
                            der = slope[:, None] + curv[:, None] * (2.0 * tau - hh)
                            tau = tau - val / der
                            tau = np.clip(np.where(np.isfinite(tau), tau, hh), 0.0, hh)
                    ev = np.where(hit, t[:, None] + tau, ev)
            acc2 = accept[:, None]
            # trapezoid with the curvature of the parabola through the last three points
            with np.errstate(divide="ignore", invalid="ignore"):
                d2 = ((p - p_prev) / h[:, None] - (p_prev - p_prev2) / h1[:, None]) / (
                    h + h1)[:, None]
            d2 = np.where((npts >= 2)[:, None] & np.isfinite(d2), d2, 0.0)
            piece = 0.5 * h[:, None] * (p_prev + p) - (h**3 / 6.0)[:, None] * d2
            # history, shifted in place (oldest first) for the accepted samples
            np.add(integ, piece, out=integ, where=acc2)
            np.copyto(p_prev2, p_prev, where=acc2)
            np.copyto(p_prev, p, where=acc2)
            np.copyto(y_prev2, y_prev, where=accept)
            np.copyto(y_prev, y, where=accept)
            np.copyto(peak, np.maximum(peak, obs.voltage), where=accept)
            for older, newer in ((xc, xb), (xb, xa), (xa, x), (qc, qb), (qb, qa), (qa, q_new),
                                 (f_prev, f_new)):
                np.copyto(older, newer, where=acc2)
            np.copyto(h2, h1, where=accept)
            np.copyto(h1, h, where=accept)
            np.copyto(t, t_new, where=accept)
            landed = accept & land_bp
            npts = np.where(accept, np.minimum(npts + 1, 3), npts)
            bp_i = bp_i + landed
            if rec_map:
                for r, i in rec_map.items():
                    if accept[i]:
                        w = waveforms[r]
                        w["t"].append(float(t[i]))
                        w["x"].append(x[i].copy())
                        w["current"].append(float(y[i]))
                        w["voltage"].append(float(obs.voltage[i]))
        steps += accept
        rejected += reject
        h = np.where(active, h * fac, h)

        # ---- who is finished
        all_events = (~np.isnan(ev)).all(axis=1) if k else np.ones(gidx.size, dtype=bool)
        past_bp = ~np.isfinite(bps[np.arange(gidx.size), np.minimum(bp_i, n_bp - 1)])
        settled = accept & past_bp & all_events
        if settled.any():  # the system's test only where it can end a run
            settled &= sys_w.settled(xa)
        ended = accept & land_end
        failed_newton = active & (h < minimum_step)
        failed_steps = active & (steps + rejected >= max_steps)
        # the first that applies, in this order (np.select's rule, without its overhead)
        status_now = np.where(settled, SETTLED, np.where(
            ended, FINISHED, np.where(failed_newton, FAILED_NEWTON,
                                      np.where(failed_steps, FAILED_STEPS, RUNNING))))
        done = active & (status_now != RUNNING)
        if done.any():
            gi = gidx[done]
            out_status[gi] = status_now[done]
            out_events[gi] = ev[done]
            out_integrals[gi] = integ[done]
            out_peak[gi] = peak[done]
            out_end[gi] = t[done]
            out_state[gi] = xa[done]
            out_steps[gi] = steps[done]
            out_rejected[gi] = rejected[done]
            active = active & ~done
        remaining = int(np.count_nonzero(active))
        if remaining == 0:
            break
        if remaining < compact_fraction * gidx.size:
            keep = np.flatnonzero(active)
            sys_w = sys_w.subset(keep)
            (gidx, t, h, xa, xb, xc, qa, qb, qc, f_prev, h1, h2, npts, bp_i, y_prev, y_prev2,
             p_prev, p_prev2, integ, peak, ev, steps, rejected, atol, qtol, levels, dirs, bps,
             tend, h_init) = (
                a[keep] for a in (gidx, t, h, xa, xb, xc, qa, qb, qc, f_prev, h1, h2, npts,
                                  bp_i, y_prev, y_prev2, p_prev, p_prev2, integ, peak, ev,
                                  steps, rejected, atol, qtol, levels, dirs, bps, tend,
                                  h_init))
            active = np.ones(keep.size, dtype=bool)
            rec_map = remap_records()

    wf = {r: {key: np.asarray(v) for key, v in w.items()} for r, w in waveforms.items()}
    return TransientResult(out_events, out_integrals, out_peak, out_end, out_state, out_status,
                           out_steps, out_rejected, wf)
