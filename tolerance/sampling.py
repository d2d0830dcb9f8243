"""Sampling designs: plain random, Latin hypercube and scrambled Sobol.

Every design produces uniform numbers on (0, 1), one column per parameter of the study (fixed
ones included, so a column always belongs to the same parameter: what-if pins and value sweeps
change values, never the random numbers of the other parameters). The uniform numbers go through
an optional Gaussian copula (correlated parameters) and then each parameter's inverse CDF.

Reproducibility does not depend on how the run is cut into chunks or spread over workers: the
random numbers are defined per fixed block of :data:`BLOCK` samples, each block with its own
stream ``SeedSequence(seed, spawn_key=(block,))``, and a chunk regenerates the blocks it
overlaps. The Latin hypercube is stratified within each block (a blocked design, so memory stays
flat at any sample count). Sobol points come from one scrambled sequence, reached at any offset
with ``fast_forward``.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import special

from tolerance.protocol import Parameter

#: samples per random block; part of the definition of a seed's results, never change lightly
BLOCK = 4096


def _block_uniforms(kind: str, seed: int, block: int, size: int, dim: int) -> np.ndarray:
    if kind == "random":
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))
        return rng.random((size, dim))
    if kind == "lhs":
        return latin_hypercube(seed, block, size, dim)
    raise ValueError(f"unknown block design {kind!r}")


def latin_hypercube(seed: int, block: int, size: int, dim: int) -> np.ndarray:
    """The Latin hypercube of one block: in every column one point in each of the ``size``
    equal strata, the strata paired at random across columns, each point uniform within its
    stratum (McKay, Beckman and Conover, Technometrics 21 (1979) 239-245).

    The numbers are those ``scipy.stats.qmc.LatinHypercube(d=dim, rng=...).random(size)``
    draws from the block's generator (a child stream of the block's seed sequence, the
    in-stratum offsets, then one shuffle per column), so a seed's results are unchanged; it is
    written here because importing ``scipy.stats`` costs a worker process half a second before
    its first chunk (tests/test_engine.py compares the two).
    """
    child = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block, 0)))
    offsets = child.uniform(size=(size, dim))
    strata = np.tile(np.arange(1, size + 1), (dim, 1))
    for column in strata:  # one shuffle per parameter, in the order scipy draws them
        child.shuffle(column)
    return (strata.T - offsets) / size


def uniforms(sampler: str, seed: int, total: int, start: int, stop: int, dim: int) -> np.ndarray:
    """Uniform design rows ``start:stop`` of a run of ``total`` samples.

    Parameters
    ----------
    sampler : {'random', 'lhs', 'sobol'}
    seed : int
        The run's seed.
    total : int
        Total samples of the run (the Latin hypercube's last block is sized by it).
    start, stop : int
        Row range wanted.
    dim : int
        Number of parameters.

    Returns
    -------
    ndarray, shape (stop - start, dim)
        Values in (0, 1).
    """
    n = stop - start
    if dim == 0:
        return np.empty((n, 0))
    if sampler == "sobol":
        from scipy.stats import qmc

        engine = qmc.Sobol(d=dim, scramble=True,
                           rng=np.random.default_rng(np.random.SeedSequence(seed)))
        if start:
            engine.fast_forward(start)
        with warnings.catch_warnings():
            # the balance warning concerns sample counts that are not powers of two; a chunk
            # of a longer sequence is still the same sequence
            warnings.simplefilter("ignore", UserWarning)
            u = engine.random(n)
        return u
    out = np.empty((n, dim))
    first, last = start // BLOCK, (stop - 1) // BLOCK
    for block in range(first, last + 1):
        b0 = block * BLOCK
        size = min(BLOCK, total - b0)
        u = _block_uniforms(sampler, seed, block, size, dim)
        lo, hi = max(start, b0), min(stop, b0 + size)
        out[lo - start:hi - start] = u[lo - b0:hi - b0]
    return out


def apply_copula(u: np.ndarray, correlation: np.ndarray | None) -> np.ndarray:
    """Impose a correlation of the normal scores (Gaussian copula) on uniform columns.

    ``correlation`` is the matrix of the normal scores (identity: nothing to do). Marginals stay
    uniform: z = Phi^-1(u), z' = z L^T with L the Cholesky factor, u' = Phi(z').
    """
    if correlation is None or np.allclose(correlation, np.eye(len(correlation))):
        return u
    active = np.flatnonzero(np.any(correlation - np.eye(len(correlation)) != 0, axis=0))
    sub = correlation[np.ix_(active, active)]
    chol = np.linalg.cholesky(sub)
    z = special.ndtri(np.clip(u[:, active], 1e-15, 1 - 1e-15))
    out = u.copy()
    out[:, active] = special.ndtr(z @ chol.T)
    return out


#: largest normal score a pin stands for in :func:`condition_on_pins`: a tolerance limit's
#: (limits sit at 3 sigma); a uniform's end or a value beyond its range would be infinite
PIN_SCORE = 3.0


def condition_on_pins(parameters, correlation: np.ndarray | None, u: np.ndarray,
                      pins: dict[str, float]) -> dict[str, np.ndarray]:
    """Values of the parameters correlated with pinned ones, drawn given the pins.

    With a Gaussian copula the normal scores z are jointly normal with ``correlation`` S;
    pinning parameters P at scores t makes the others' scores z_R + S_RP S_PP^-1 (t - z_P):
    their part independent of z_P (each sample's own random numbers) is kept and their mean
    moves with the pin, which is the conditional distribution of z_R given z_P = t (any text
    on the multivariate normal, e.g. Anderson, "An Introduction to Multivariate Statistical
    Analysis", theorem 2.5.1, from memory). A pin's score is Phi^-1(F(value)), at most
    ``PIN_SCORE`` in size. A value of a discrete set stands for a stratum of scores,
    Phi^-1(F(value-)) .. Phi^-1(F(value)), the values the copula maps to it: each sample
    takes its score there from its own uniform number (a truncated normal draw), so that
    the partners follow the conditional distribution given the value, not given one edge
    of its stratum (the edge put the upper end of three equally likely temperatures at a
    score of 3 and moved a partner correlated at 0.8 by 2.4 sigma instead of the 0.87 of
    the truncated normal's mean).

    Parameters
    ----------
    parameters : sequence of Parameter
        The study's parameters, in the columns' order of ``u``.
    correlation : ndarray or None
        Correlation of the normal scores [1]; None: nothing is correlated.
    u : ndarray
        The correlated uniform design rows (:func:`apply_copula`), one column per parameter.
    pins : dict
        Pinned parameter -> value [SI].

    Returns
    -------
    dict
        New values [SI] of every unpinned parameter correlated with a pinned one; the other
        parameters keep their values bit for bit.
    """
    if correlation is None or not pins:
        return {}
    names = [p.name for p in parameters]
    pinned = [names.index(n) for n in pins]
    rest = [j for j in range(len(names))
            if j not in pinned and np.any(correlation[j, pinned] != 0.0)]
    if not rest:
        return {}
    t = np.empty((u.shape[0], len(pinned)))
    for k, (i, n) in enumerate(zip(pinned, pins)):
        d = parameters[i].distribution
        top = float(d.cdf(np.array(pins[n])))
        bottom = float(d.cdf_below(np.array(pins[n])))
        if top > bottom:  # a discrete value: a score in its stratum, from the sample's own u
            t[:, k] = special.ndtri(np.clip(bottom + (top - bottom) * u[:, i], 1e-15,
                                            1 - 1e-15))
        else:
            with np.errstate(divide="ignore"):
                score = float(special.ndtri(top))
            t[:, k] = np.clip(np.nan_to_num(score, nan=0.0), -PIN_SCORE, PIN_SCORE)
    z_p = special.ndtri(np.clip(u[:, pinned], 1e-15, 1 - 1e-15))
    z_r = special.ndtri(np.clip(u[:, rest], 1e-15, 1 - 1e-15))
    gain = np.linalg.solve(correlation[np.ix_(pinned, pinned)],
                           correlation[np.ix_(pinned, rest)])  # S_PP^-1 S_PR
    u_r = special.ndtr(z_r + (t - z_p) @ gain)
    return {names[j]: np.asarray(parameters[j].distribution.ppf(u_r[:, k]), dtype=float)
            for k, j in enumerate(rest)}


def values(parameters: list[Parameter] | tuple[Parameter, ...], u: np.ndarray) -> dict[str, np.ndarray]:
    """Map uniform columns to parameter values through each inverse CDF."""
    return {p.name: np.asarray(p.distribution.ppf(u[:, i]), dtype=float)
            for i, p in enumerate(parameters)}


def draw(parameters, correlation, sampler: str, seed: int, total: int, start: int,
         stop: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Uniform design rows and parameter values for samples ``start:stop``."""
    u = uniforms(sampler, seed, total, start, stop, len(parameters))
    u = apply_copula(u, correlation)
    return u, values(parameters, u)
