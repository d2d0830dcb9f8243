"""Batched damped Newton solver for small nonlinear circuit systems.

Every sample of a chunk is its own small system ``F(x) = 0`` with ``n`` unknowns (node or
junction voltages [V]); all samples iterate together, as struct-of-arrays. A sample that has
converged drops out of the active set (the set is compacted whenever enough samples have
finished, so the remaining work shrinks), junction limiting keeps the exponentials in range, the
step is damped to a maximum size, and a sample that has not converged after ``max_iterations``
(or whose residual or Jacobian became non-finite) is returned as NaN with ``converged=False``:
flagged, never dropped.

The stacked linear systems are solved by :func:`solve_stacked`, Gaussian elimination with
partial pivoting vectorized over the samples. For the 1 to 4 unknowns of a switching stage it is
several times faster than ``numpy.linalg.solve`` on a stack (whose per-matrix LAPACK call
dominates at this size), and a singular sample gives non-finite values instead of an exception
for the whole stack.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np

__all__ = ["NewtonResult", "NewtonSystem", "newton_solve", "solve_stacked"]


class NewtonSystem(Protocol):
    """What :func:`newton_solve` needs from a stage's equations."""

    def residual(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Residuals ``F`` (S, n) [A], Jacobian ``J`` (S, n, n) [A/V] and a current scale
        (S,) or (S, n) [A] for the relative residual test, at the unknowns ``x`` (S, n) [V]."""
        ...

    def subset(self, idx: np.ndarray) -> "NewtonSystem":
        """The same system restricted to the samples ``idx``."""
        ...

    def limit(self, x_new: np.ndarray, x_old: np.ndarray) -> np.ndarray:
        """Junction limiting of a proposed iterate (return ``x_new`` when nothing applies)."""
        ...


@dataclass
class NewtonResult:
    """Solution of a batch: unknowns (NaN where not converged), convergence flags and the
    number of iterations each sample took."""

    x: np.ndarray
    converged: np.ndarray
    iterations: np.ndarray


def _all_columns(mask: np.ndarray) -> np.ndarray:
    """``mask.all(axis=1)`` for a few columns (column by column: far faster than the
    reduction along a short last axis)."""
    out = mask[:, 0].copy()
    for k in range(1, mask.shape[1]):
        out &= mask[:, k]
    return out


def _max_abs_columns(a: np.ndarray) -> np.ndarray:
    """``abs(a).max(axis=1)`` column by column (NaN propagates)."""
    out = np.abs(a[:, 0])
    for k in range(1, a.shape[1]):
        out = np.maximum(out, np.abs(a[:, k]))
    return out


def solve_stacked(a, b: np.ndarray) -> np.ndarray:
    """Solve the stacked linear systems ``a[s] @ x[s] = b[s]``.

    Parameters
    ----------
    a : ndarray, shape (S, n, n), or nested list
        The matrices, or (structure of arrays) ``a[i][j]`` an (S,) array or a scalar for each
        entry, as a system may return them to avoid assembling the stack.
    b : ndarray, shape (S, n)

    Returns
    -------
    ndarray, shape (S, n)
        Solutions; non-finite for a singular (or non-finite) system.

    Notes
    -----
    Gaussian elimination with partial (row) pivoting, each elimination step vectorized over the
    samples (textbook algorithm, e.g. Golub & Van Loan, Matrix Computations, alg. 3.4.1).
    """
    b = np.asarray(b, dtype=float)
    s, n = b.shape
    if isinstance(a, list):
        m = [[np.array(np.broadcast_to(e, (s,)), dtype=float) for e in row] for row in a]
    else:
        a = np.asarray(a, dtype=float)
        if n == 1:
            with np.errstate(divide="ignore", invalid="ignore"):
                return b / a[:, :, 0]
        if n == 2:
            return _solve_two(a[:, 0, 0], a[:, 0, 1], a[:, 1, 0], a[:, 1, 1], b[:, 0], b[:, 1])
        m = [[np.array(a[:, i, j]) for j in range(n)] for i in range(n)]
    if n == 1:
        with np.errstate(divide="ignore", invalid="ignore"):
            return (b[:, 0] / m[0][0])[:, None]
    if n == 2:
        return _solve_two(m[0][0], m[0][1], m[1][0], m[1][1], b[:, 0], b[:, 1])
    return _eliminate(m, b)


def _solve_two(a00, a01, a10, a11, b0, b1):
    """2 x 2 systems by elimination with pivoting on the larger first-column entry."""
    swap = np.abs(a10) > np.abs(a00)
    p00 = np.where(swap, a10, a00)
    p01 = np.where(swap, a11, a01)
    q0 = np.where(swap, b1, b0)
    r10 = np.where(swap, a00, a10)
    r11 = np.where(swap, a01, a11)
    q1 = np.where(swap, b0, b1)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        f = r10 / p00
        x1 = (q1 - f * q0) / (r11 - f * p01)
        x0 = (q0 - p01 * x1) / p00
    return np.stack([x0, x1], axis=1)


def _eliminate(m, b):
    """Gaussian elimination with partial pivoting on per-entry arrays ``m[i][j]`` (modified)."""
    s, n = b.shape
    r = [np.array(b[:, i]) for i in range(n)]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for k in range(n):
            # partial pivoting: pairwise exchanges bring the largest |a_ik| (i >= k) to row k;
            # only the samples that need an exchange are touched
            for i in range(k + 1, n):
                idx = np.flatnonzero(np.abs(m[i][k]) > np.abs(m[k][k]))
                if idx.size:
                    for j in range(k, n):
                        top = m[k][j][idx]
                        m[k][j][idx] = m[i][j][idx]
                        m[i][j][idx] = top
                    top = r[k][idx]
                    r[k][idx] = r[i][idx]
                    r[i][idx] = top
            inv_p = 1.0 / m[k][k]
            for i in range(k + 1, n):
                f = m[i][k] * inv_p
                for j in range(k + 1, n):
                    m[i][j] -= f * m[k][j]
                r[i] -= f * r[k]
        x = np.empty((s, n))
        for i in range(n - 1, -1, -1):
            acc = r[i]
            for j in range(i + 1, n):
                acc = acc - m[i][j] * x[:, j]
            x[:, i] = acc / m[i][i]
    return x


def newton_solve(system: NewtonSystem, x0: np.ndarray, max_iterations: int = 60,
                 xtol: float = 1e-9, atol: float = 1e-12, rtol: float = 1e-9,
                 max_step: float = 5.0, compact_fraction: float = 0.75) -> NewtonResult:
    """Damped Newton iteration on a batch of small systems.

    Parameters
    ----------
    system : NewtonSystem
        Residuals, Jacobians, sample subsetting and junction limiting.
    x0 : ndarray, shape (S, n)
        Initial unknowns [V].
    max_iterations : int
        Cap on Newton iterations; samples still active afterwards are not converged.
    xtol : float
        Convergence on the step: every ``|dx| <= xtol`` [V].
    atol, rtol : float
        Convergence on the residual: every ``|F| <= atol + rtol * scale`` [A], ``scale``
        being the current scale the system reports.
    max_step : float
        Largest change of any unknown in one iteration [V]; a longer Newton step is scaled down
        as a whole (damping), keeping its direction.
    compact_fraction : float
        The active set is compacted when fewer than this fraction of the samples in the
        current working set are still iterating.

    Returns
    -------
    NewtonResult
        ``x`` (NaN where not converged), ``converged`` (S,) and ``iterations`` (S,).

    Notes
    -----
    A sample counts as converged when both tests pass at the same iterate: the residual test
    at ``x_k`` and the step test on the Newton step from ``x_k``; the returned value is the
    stepped iterate ``x_k + dx``.
    """
    x0 = np.asarray(x0, dtype=float)
    n_samples, n = x0.shape
    x_out = np.full((n_samples, n), np.nan)
    converged = np.zeros(n_samples, dtype=bool)
    iterations = np.full(n_samples, max_iterations, dtype=np.int64)
    work_idx = np.arange(n_samples)
    work_sys = system
    x = x0.copy()
    done = np.zeros(n_samples, dtype=bool)
    f, jac, scale = work_sys.residual(x)
    for it in range(1, max_iterations + 1):
        dx = solve_stacked(jac, -f)
        with np.errstate(invalid="ignore", over="ignore"):
            size_dx = _max_abs_columns(dx)
            bad = ~(np.isfinite(size_dx) & np.isfinite(_max_abs_columns(f)))
            if np.any(bad):
                dx[bad] = 0.0
                size_dx[bad] = 0.0
            damp = np.minimum(1.0, max_step / np.maximum(size_dx, 1e-300))
        x_new = work_sys.limit(x + dx * damp[:, None], x)
        sc = np.asarray(scale, dtype=float)
        if sc.ndim == 1:
            sc = sc[:, None]
        ok = _all_columns(np.abs(f) <= atol + rtol * sc) & (size_dx <= xtol) & ~bad
        newly = ok & ~done
        if np.any(newly):
            gidx = work_idx[newly]
            x_out[gidx] = x_new[newly]
            converged[gidx] = True
            iterations[gidx] = it
        failed = bad & ~done
        if np.any(failed):
            iterations[work_idx[failed]] = it
        done |= ok | bad
        remaining = np.count_nonzero(~done)
        if remaining == 0 or it == max_iterations:
            break
        x_new = np.where(done[:, None], x, x_new)
        if remaining < compact_fraction * done.size:
            keep = np.flatnonzero(~done)
            work_idx = work_idx[keep]
            work_sys = work_sys.subset(keep)
            x, x_new, f = x[keep], x_new[keep], f[keep]
            done = np.zeros(keep.size, dtype=bool)
        x = x_new
        f, jac, scale = work_sys.residual(x)
    return NewtonResult(x_out, converged, iterations)
