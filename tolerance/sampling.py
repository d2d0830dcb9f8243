"""Sampling designs: plain random, Latin hypercube and scrambled Sobol.

Every design produces uniform numbers on [0, 1) (a scrambled Sobol point is a multiple of
2^-30, so 0 comes up once in 2^30 points; the inverse CDFs clip the ends), one column per
parameter of the study (fixed ones included, so a column always belongs to the same
parameter: what-if pins and value sweeps change values, never the random numbers of the other
parameters). The uniform numbers go through
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


def uniforms(sampler: str, seed: int, total: int, start: int, stop: int, dim: int,
             correlation: np.ndarray | None = None) -> np.ndarray:
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
    correlation : ndarray, optional
        Correlation of the normal scores; given, the rows come correlated (Gaussian
        copula, :func:`apply_copula`), and a Latin hypercube block keeps every column's
        strata (:func:`restratify`).

    Returns
    -------
    ndarray, shape (stop - start, dim)
        Values in [0, 1).
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
        return apply_copula(u, correlation)
    out = np.empty((n, dim))
    first, last = start // BLOCK, (stop - 1) // BLOCK
    for block in range(first, last + 1):
        b0 = block * BLOCK
        size = min(BLOCK, total - b0)
        u = _block_uniforms(sampler, seed, block, size, dim)
        mixed = apply_copula(u, correlation)
        u = restratify(u, mixed) if sampler == "lhs" and mixed is not u else mixed
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


def restratify(design: np.ndarray, mixed: np.ndarray) -> np.ndarray:
    """A Latin hypercube block's columns in the order the copula put them: each column of
    ``mixed`` (the block's uniforms after :func:`apply_copula`) is replaced by the sorted
    column of ``design`` (the stratified block) in ``mixed``'s rank order.

    The copula mixes a correlated column's strata (the Cholesky factor leaves only the
    first column of a group alone; the others filled about 63 % of their strata, as random
    draws do). Every column's ranks stay the copula's, so the dependence is the Gaussian
    copula's sample (a copula is a joint law of ranks; Nelsen, "An Introduction to Copulas",
    2nd ed., theorem 2.4.3, from memory), and every column holds one point per stratum
    again (McKay, Beckman and Conover 1979); each value moves to the stratum of its rank,
    by the error of the empirical quantile (about 1/sqrt(size): up to 0.02 in a block of
    4,096). The sort's ranks are Iman and Conover's device (Communications in Statistics B
    11 (1982) 311-334), here applied to a Gaussian-copula sample instead of to scores with a
    target rank correlation, so the stated normal-score correlation is kept.
    """
    out = mixed.copy()
    changed = np.flatnonzero(np.any(mixed != design, axis=0))
    for j in changed:
        out[np.argsort(mixed[:, j], kind="stable"), j] = np.sort(design[:, j])
    return out


#: largest normal score a pin stands for in :func:`condition_on_pins`: a tolerance limit's
#: (limits sit at 3 sigma); a uniform's end or a value beyond its range would be infinite
PIN_SCORE = 3.0


def _stratum(distribution, value: float) -> tuple[float, float] | None:
    """The CDF below and at ``value`` where the value has a probability of its own (a member
    of a discrete set), else None."""
    top = float(distribution.cdf(np.array(value)))
    bottom = float(distribution.cdf_below(np.array(value)))
    return (bottom, top) if top > bottom else None


def pin_score(distribution, value: float) -> float:
    """Normal score of a pin at ``value`` that is not a member of a discrete set:
    Phi^-1(F(value)), at most ``PIN_SCORE`` in size; at an end of the spread (a uniform's or
    a cut normal's limit, or a typical value at a limit, where half the units sit and F is
    0.5) or beyond it, the end's score, -/+ ``PIN_SCORE``."""
    low, high = distribution.support
    if value <= low:
        return -PIN_SCORE
    if value >= high:
        return PIN_SCORE
    with np.errstate(divide="ignore"):
        score = float(special.ndtri(float(distribution.cdf(np.array(value)))))
    return float(np.clip(np.nan_to_num(score, nan=0.0), -PIN_SCORE, PIN_SCORE))


def _pin_scores(distribution, value: float, u: np.ndarray) -> np.ndarray:
    """Each sample's normal score of a pin (its column of correlated uniforms ``u``)."""
    stratum = _stratum(distribution, value)
    if stratum is not None:  # a discrete value: a score in its stratum, from the sample's own u
        bottom, top = stratum
        return special.ndtri(np.clip(bottom + (top - bottom) * u, 1e-15, 1 - 1e-15))
    return np.full(u.shape, pin_score(distribution, value))


def _mean_pin_score(distribution, value: float) -> float:
    """The mean of a pin's normal score: its score, or for a member of a discrete set the
    mean of the standard normal over the member's stratum of scores (the truncated normal's
    mean, (phi(a) - phi(b)) / (Phi(b) - Phi(a)))."""
    stratum = _stratum(distribution, value)
    if stratum is None:
        return pin_score(distribution, value)
    bottom, top = stratum
    with np.errstate(divide="ignore"):
        a, b = float(special.ndtri(bottom)), float(special.ndtri(top))
    density = [0.0 if not np.isfinite(x) else float(np.exp(-0.5 * x * x) / np.sqrt(2 * np.pi))
               for x in (a, b)]
    return (density[0] - density[1]) / (top - bottom)


def pin_tension(parameters, correlation: np.ndarray | None,
                pins: dict[str, float]) -> dict | None:
    """How far the pins together lie from the centre of the study's units, given the
    correlation of their normal scores S.

    The pins' mean scores t (:func:`_mean_pin_score`) have the Mahalanobis distance
    sqrt(t' S_PP^-1 t) from the centre, in standard deviations of the joint normal (at
    most 3 sqrt(k) for k pins at their tolerance ends with no correlation among them); a
    partner R correlated with a pin is drawn at the mean score S_RP S_PP^-1 t with the
    spread sqrt(S_RR - S_RP S_PP^-1 S_PR) (the conditional normal, as in
    :func:`condition_on_pins`).

    Returns
    -------
    dict or None
        None without a correlation among the pinned parameters and their partners; else
        ``distance`` (the Mahalanobis distance), ``pins`` (pinned parameter -> mean score),
        ``independent`` (3 sqrt(k): the distance of k independent pins at their tolerance
        ends) and ``partners`` (partner -> {``mean``, ``sd``, ``beyond``: the share of its
        draws beyond a score of 3 in size}).
    """
    if correlation is None or not pins:
        return None
    names = [p.name for p in parameters]
    pinned = [names.index(n) for n in pins]
    rest = [j for j in range(len(names))
            if j not in pinned and np.any(correlation[j, pinned] != 0.0)]
    s_pp = correlation[np.ix_(pinned, pinned)]
    if not rest and np.allclose(s_pp, np.eye(len(pinned))):
        return None
    t = np.array([_mean_pin_score(parameters[i].distribution, pins[n])
                  for i, n in zip(pinned, pins)])
    distance = float(np.sqrt(max(float(t @ np.linalg.solve(s_pp, t)), 0.0)))
    partners = {}
    if rest:
        gain = np.linalg.solve(s_pp, correlation[np.ix_(pinned, rest)])  # S_PP^-1 S_PR
        mean = t @ gain
        var = 1.0 - np.sum(correlation[np.ix_(pinned, rest)] * gain, axis=0)
        sd = np.sqrt(np.maximum(var, 0.0))
        for k, j in enumerate(rest):
            if sd[k] > 0:
                beyond = float(special.ndtr((mean[k] - PIN_SCORE) / sd[k])
                               + special.ndtr((-PIN_SCORE - mean[k]) / sd[k]))
            else:
                beyond = float(abs(mean[k]) > PIN_SCORE)
            partners[names[j]] = {"mean": float(mean[k]), "sd": float(sd[k]),
                                  "beyond": beyond}
    return {"distance": distance, "independent": PIN_SCORE * float(np.sqrt(len(pinned))),
            "pins": {n: float(x) for n, x in zip(pins, t)}, "partners": partners}


def condition_on_pins(parameters, correlation: np.ndarray | None, u: np.ndarray,
                      pins: dict[str, float]) -> dict[str, np.ndarray]:
    """Values of the parameters correlated with pinned ones, drawn given the pins.

    With a Gaussian copula the normal scores z are jointly normal with ``correlation`` S;
    pinning parameters P at scores t makes the others' scores z_R + S_RP S_PP^-1 (t - z_P):
    their part independent of z_P (each sample's own random numbers) is kept and their mean
    moves with the pin, which is the conditional distribution of z_R given z_P = t (any text
    on the multivariate normal, e.g. Anderson, "An Introduction to Multivariate Statistical
    Analysis", theorem 2.5.1, from memory). A pin's score is Phi^-1(F(value)), at most
    ``PIN_SCORE`` in size, and at an end of the spread the end's (:func:`pin_score`: a
    typical value at a limit holds half the units, F = 0.5 there, and its pin moved no
    partner). A value of a discrete set stands for a stratum of scores,
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
        t[:, k] = _pin_scores(parameters[i].distribution, pins[n], u[:, i])
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
    """Uniform design rows (correlated) and parameter values for samples ``start:stop``."""
    u = uniforms(sampler, seed, total, start, stop, len(parameters), correlation)
    return u, values(parameters, u)
