"""Global sensitivity measures for tolerance studies.

Three families of measures are provided, all working on batches of samples:

* :func:`rank_sensitivity` -- rank-based measures computed from an existing Monte Carlo
  sample: Spearman rank correlation, standardized rank regression coefficients (SRRC) and
  partial rank correlation coefficients (PRCC).
* :func:`sobol_analysis` -- variance-based first-order and total Sobol indices estimated
  with :func:`scipy.stats.sobol_indices` on a dedicated quasi-random design.
* :func:`failure_drivers` -- which inputs separate failing from passing samples, and a
  plain-language description of the failure region.

A *model* is a callable ``model(samples: dict[str, ndarray]) -> dict[str, ndarray]`` that
takes whole batches (one 1-D array per input, all the same length) and returns one 1-D array
per metric. Metric arrays may contain NaN for samples whose solver did not converge; every
analysis here drops (or, for Sobol indices, replaces) such values per metric and reports how
many were affected.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping

import numpy as np
import pandas as pd
from scipy import stats

from tolerance.threads import thread_map

__all__ = [
    "as_array_function",
    "average_ranks",
    "failure_drivers",
    "failure_drivers_of",
    "rank_sensitivity",
    "sobol_analysis",
]


# ---------------------------------------------------------------------------------------------
# rank-based measures
# ---------------------------------------------------------------------------------------------

# common practice, no source: below 64 base rows the Saltelli estimators of a handful of
# inputs scatter by more than the indices themselves (N = 2 gave S1 = 3.4 and ST = 9.6), and a
# bootstrap needs several rows to resample
MIN_SOBOL_N = 64
#: the largest Sobol base sample: its design holds N (d + 2) points of d numbers beside the
#: d N of its B-in-A columns, some 3 GB at 2^18 and 26 parameters (sobol_analysis), and
#: costs N (d + 2) evaluations of the stage, 7.3 million there; 2^40 asked for 208 TiB
MAX_SOBOL_N = 2**18
#: largest share of a metric's Sobol outputs that may be replaced by their mean (common
#: practice, no source: the bias grows with the share; a quarter gave a total index of 6.7)
MAX_REPLACED = 0.01


def _run_ends(xs: np.ndarray) -> np.ndarray:
    """Index of the last element of every run of equal values of a sorted array."""
    return np.flatnonzero(np.append(xs[1:] != xs[:-1], True))


def _column_ranks(col: np.ndarray) -> np.ndarray:
    """Average ranks from 1 of one contiguous 1-D column (see :func:`average_ranks`)."""
    order = np.argsort(col)
    ends = _run_ends(col[order])
    starts = np.concatenate(([0], ends[:-1] + 1))
    ranks = np.empty(col.size)
    ranks[order] = np.repeat(0.5 * (starts + ends) + 1.0, ends - starts + 1)
    return ranks


def average_ranks(values: np.ndarray, threads: int = 1) -> np.ndarray:
    """Column-wise ranks from 1, ties given the mean of the ranks they span.

    Parameters
    ----------
    values : ndarray, shape (n, k) or (n,)
        Finite data, one variable per column.
    threads : int
        Columns ranked at once (:func:`tolerance.threads.thread_map`); the ranks do not
        depend on it.

    Returns
    -------
    ndarray of float, the shape of ``values``
        Equal to ``scipy.stats.rankdata(values, axis=0)`` (method ``"average"``; the ranks
        are exact halves, ``tests/test_sensitivity.py`` checks the equality). Each column is
        sorted once as a contiguous copy with numpy's default (unstable) sort, whose order
        within a run of equal values does not matter here: about three times faster than
        the stable sort along the first axis of the whole array.
    """
    x = np.asarray(values, dtype=float)
    flat = x.ndim == 1
    x = x[:, None] if flat else x
    n, k = x.shape
    ranks = np.empty((n, k), order="F")  # column by column, as scipy returns them
    columns = thread_map(lambda j: _column_ranks(np.ascontiguousarray(x[:, j])),
                         range(k if n else 0), threads)
    for j, col in enumerate(columns):
        ranks[:, j] = col
    return ranks[:, 0] if flat else ranks


def _standardized_column(col: np.ndarray) -> tuple[np.ndarray, bool]:
    ranks = _column_ranks(np.ascontiguousarray(col))
    ranks -= ranks.mean()
    scale = np.sqrt(np.mean(ranks**2))
    if scale == 0.0:
        return np.zeros_like(ranks), True
    ranks /= scale
    return ranks, False


def _standardized_ranks(values: np.ndarray, threads: int = 1
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Column-wise average ranks, centred and scaled to unit (population) variance.

    Parameters
    ----------
    values : ndarray, shape (n, k)
        Data, one variable per column.
    threads : int
        Columns worked on at once; the result does not depend on it.

    Returns
    -------
    z : ndarray, shape (n, k)
        Standardized ranks; columns with zero rank variance are left at zero.
    constant : ndarray of bool, shape (k,)
        True for columns whose values are all equal.
    """
    x = np.asarray(values, dtype=float)
    n, k = x.shape
    z = np.zeros((n, k), order="F")
    constant = np.zeros(k, dtype=bool)
    if n == 0:
        return z, constant
    for j, (col, const) in enumerate(thread_map(lambda j: _standardized_column(x[:, j]),
                                                range(k), threads)):
        z[:, j] = col
        constant[j] = const
    return z, constant


#: an output's unexplained rank variance at or below this share counts as none (rounding
#: leaves some 1e-16 of it), and so does a rank regression coefficient this small relative
#: to the largest
EXPLAINED_FLOOR = 1e-9


def undefined_prcc_note(records, metrics=None) -> str | None:
    """A sentence naming the metrics whose ranks one input gives exactly, so that the other
    inputs' PRCC is undefined ("-" in the tables), or None.

    ``records``: rows ``{"input", "metric", "spearman", "prcc"}`` of
    :func:`rank_sensitivity`; ``metrics`` limits the sentence to those metrics."""
    carried: dict[str, str] = {}
    blank: set[str] = set()
    for r in records:
        metric = r.get("metric")
        if metrics is not None and metric not in metrics:
            continue
        prcc, rho = r.get("prcc"), r.get("spearman")
        if not (isinstance(rho, (int, float)) and math.isfinite(rho)):
            continue
        if isinstance(prcc, (int, float)) and math.isfinite(prcc):
            if abs(prcc) >= 1.0 - 1e-9:
                carried.setdefault(metric, r.get("input"))
        else:
            blank.add(metric)
    names = [f"{m} (carried by {carried[m]})" for m in sorted(blank) if m in carried]
    if not names:
        return None
    # found by a review: the example (a junction that follows the ambient) was given for a
    # coil's peak voltage, which follows the supply; the example now goes by the input
    said = sorted({CARRIED_EXAMPLES[carried[m]] for m in blank
                   if carried.get(m) in CARRIED_EXAMPLES})
    return (f"PRCC reads '-' for the other inputs of {', '.join(names)}: that input alone "
            "gives the metric's ranks exactly"
            + (f" ({'; '.join(said)})" if said else "")
            + ", so the others' partial rank correlations are 0 / 0; their Spearman and "
            "Sobol figures say how little they move it.")


#: why an input alone can give a metric's ranks, by input (:func:`undefined_prcc_note`)
CARRIED_EXAMPLES = {
    "ambient.temperature": "a junction whose own heating is millikelvin follows the ambient",
    "supply.voltage": "a voltage the supply sets alone, such as a clamped coil's peak",
}


def _rank_measures(x: np.ndarray, y: np.ndarray, threads: int = 1
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spearman, SRRC and PRCC for every input column against every output column.

    Parameters
    ----------
    x : ndarray, shape (n, p)
        Finite input samples.
    y : ndarray, shape (n, m)
        Finite output samples (rows already filtered to be complete).

    Returns
    -------
    spearman, srrc, prcc : ndarray, shape (p, m)
        NaN where the input or the output is constant, or where the rank regression is
        singular (collinear inputs); PRCC also where the other inputs' ranks give the
        output's exactly (its partial correlation is then 0 / 0).

    Notes
    -----
    With ``R`` the correlation matrix of the standardized ranks of the non-constant inputs
    and ``r`` the vector of their rank correlations with the output, the SRRC vector is the
    least-squares solution ``b = R^-1 r``. The PRCC follows from the inverse of the augmented
    correlation matrix ``[[R, r], [r', 1]]`` (the partial correlation of ``x_i`` and ``y``
    given all other inputs equals ``-P_iy / sqrt(P_ii P_yy)`` for its inverse ``P``). By the
    block-inverse formula, with ``s = 1 - r' b`` (the unexplained rank variance of ``y``),
    ``PRCC_i = b_i / sqrt(s (R^-1)_ii + b_i^2)``. This equals the correlation of the
    residuals of ``rank(x_i)`` and ``rank(y)`` each regressed on the other ranks, but is
    computed for all inputs and all metrics with one matrix inverse.
    """
    n, p = x.shape
    m = y.shape[1]
    spearman = np.full((p, m), np.nan)
    srrc = np.full((p, m), np.nan)
    prcc = np.full((p, m), np.nan)
    if n < 3:
        return spearman, srrc, prcc
    zx, const_x = _standardized_ranks(x, threads)
    zy, const_y = _standardized_ranks(y, threads)
    rho = zx.T @ zy / n  # (p, m) rank correlations
    rho[const_x, :] = np.nan
    rho[:, const_y] = np.nan
    # a correlation, so within [-1, 1] (rounding gave 1.0000000000000002 for a monotone pair)
    spearman[:] = np.clip(rho, -1.0, 1.0)

    keep = np.flatnonzero(~const_x)
    if keep.size == 0 or n <= keep.size + 1:
        return spearman, srrc, prcc
    zk = zx[:, keep]
    corr = zk.T @ zk / n
    try:
        inv = np.linalg.inv(corr)
    except np.linalg.LinAlgError:
        return spearman, srrc, prcc
    # Collinear inputs make the rank regression meaningless even when inversion "succeeds".
    if not np.all(np.isfinite(inv)) or np.linalg.cond(corr) > 1e12:
        return spearman, srrc, prcc
    good_y = ~const_y
    r = rho[np.ix_(keep, np.flatnonzero(good_y))]  # (k, m_good)
    b = inv @ r
    s = 1.0 - np.sum(r * b, axis=0)  # unexplained share of the output rank variance
    s = np.clip(s, 0.0, None)
    denom = np.sqrt(s[None, :] * np.diag(inv)[:, None] + b**2)
    with np.errstate(invalid="ignore", divide="ignore"):
        pr = np.where(denom > 0, b / denom, np.nan)
    # an output whose ranks the inputs' ranks give exactly (a junction temperature that
    # follows the ambient's ranks while its own heating is millikelvin) leaves nothing to
    # correlate: the other inputs' partial correlations are 0 / 0, which rounding made +-1
    # (found by a review: every input at PRCC -1 beside Spearman 0.03 and Sobol 0); the
    # input that carries the output keeps +-1, the others' are undefined
    exact = s <= EXPLAINED_FLOOR
    noise = np.abs(b) <= EXPLAINED_FLOOR * np.max(np.abs(b), axis=0, initial=0.0)
    pr = np.where(exact[None, :] & noise, np.nan, pr)
    srrc[np.ix_(keep, np.flatnonzero(good_y))] = b
    prcc[np.ix_(keep, np.flatnonzero(good_y))] = np.clip(pr, -1.0, 1.0)
    return spearman, srrc, prcc


def rank_sensitivity(inputs: pd.DataFrame, outputs: pd.DataFrame, threads: int = 1
                     ) -> pd.DataFrame:
    """Rank-based sensitivity measures of every metric to every input.

    Parameters
    ----------
    inputs : pandas.DataFrame
        Monte Carlo input samples, one column per parameter, one row per sample.
    outputs : pandas.DataFrame
        Model outputs for the same samples (same number of rows, aligned by position), one
        column per metric. NaN marks samples that did not converge.
    threads : int
        Columns ranked at once (:func:`tolerance.threads.thread_map`); the measures do not
        depend on it.

    Returns
    -------
    pandas.DataFrame
        One row per (input, metric) pair with columns

        ``input``, ``metric``
            Names.
        ``spearman``
            Spearman rank correlation between the input and the metric.
        ``srrc``
            Standardized rank regression coefficient: the least-squares coefficient of the
            standardized ranks of the metric regressed on the standardized ranks of all
            non-constant inputs together.
        ``prcc``
            Partial rank correlation coefficient: the correlation between the residuals of
            ``rank(x_i)`` and ``rank(y)`` after each is linearly regressed on the ranks of
            all other inputs (Marino et al., J. Theor. Biol. 254 (2008) 178-196).
        ``n``
            Number of samples used for this metric.
        ``dropped``
            Number of samples dropped for this metric (NaN output, or an input that is not
            finite); an infinite output is ranked at its end.

        Constant inputs (fixed parameters) and constant metrics yield NaN measures rather
        than errors; so do collinear inputs for ``srrc`` and ``prcc``.

    Notes
    -----
    Ties receive average ranks (:func:`scipy.stats.rankdata`). Rows are dropped per metric,
    so metrics with different convergence patterns use different sample sets; metrics that
    share the same set of complete rows are processed together in one matrix computation.
    """
    if len(inputs) != len(outputs):
        raise ValueError(
            f"inputs has {len(inputs)} rows but outputs has {len(outputs)}; they must match"
        )
    in_names = [str(c) for c in inputs.columns]
    out_names = [str(c) for c in outputs.columns]
    x_all = inputs.to_numpy(dtype=float)
    y_all = outputs.to_numpy(dtype=float)
    x_ok = np.all(np.isfinite(x_all), axis=1)
    # an infinite metric has a rank (the last or the first): those are the worst units, so
    # they stay; only a unit without a value (NaN) is dropped
    y_ok = ~np.isnan(y_all)
    rows_ok = y_ok & x_ok[:, None]

    p, m = len(in_names), len(out_names)
    spearman = np.full((p, m), np.nan)
    srrc = np.full((p, m), np.nan)
    prcc = np.full((p, m), np.nan)
    counts = rows_ok.sum(axis=0)

    # Group metrics that share the same set of complete rows.
    groups: dict[bytes, list[int]] = {}
    for j in range(m):
        groups.setdefault(np.packbits(rows_ok[:, j]).tobytes(), []).append(j)
    for cols in groups.values():
        mask = rows_ok[:, cols[0]]
        sp, sr, pr = _rank_measures(x_all[mask], y_all[np.ix_(mask, cols)], threads)
        spearman[:, cols] = sp
        srrc[:, cols] = sr
        prcc[:, cols] = pr

    total = len(inputs)
    return pd.DataFrame(
        {
            "input": np.repeat(in_names, m),
            "metric": np.tile(out_names, p),
            "spearman": spearman.ravel(),
            "srrc": srrc.ravel(),
            "prcc": prcc.ravel(),
            "n": np.tile(counts, p).astype(int),
            "dropped": np.tile(total - counts, p).astype(int),
        }
    )


# ---------------------------------------------------------------------------------------------
# Sobol indices
# ---------------------------------------------------------------------------------------------


def as_array_function(
    model: Callable[[dict[str, np.ndarray]], dict[str, np.ndarray]],
    names: list[str],
    metrics: list[str],
) -> Callable[[np.ndarray], np.ndarray]:
    """Adapt a dict-based batch model to the array convention of :mod:`scipy.stats`.

    Parameters
    ----------
    model : callable
        ``model(samples: dict[str, ndarray]) -> dict[str, ndarray]``.
    names : list of str
        Input names, in the row order of the array the adapted function receives.
    metrics : list of str
        Metric names, in the row order of the array the adapted function returns.

    Returns
    -------
    callable
        ``func(x)`` with ``x`` of shape ``(d, n)`` returning an array of shape ``(s, n)``
        (``s = len(metrics)``), computed with one call of ``model`` for all metrics.
    """

    def func(x: np.ndarray) -> np.ndarray:
        x = np.atleast_2d(np.asarray(x, dtype=float))
        if x.shape[0] != len(names):
            raise ValueError(f"expected {len(names)} input rows, got {x.shape[0]}")
        out = model({name: x[i] for i, name in enumerate(names)})
        missing = [k for k in metrics if k not in out]
        if missing:
            raise KeyError(f"model did not return metric(s) {missing}")
        y = np.vstack([np.asarray(out[k], dtype=float).reshape(-1) for k in metrics])
        if y.shape[1] != x.shape[1]:
            raise ValueError(
                f"model returned {y.shape[1]} values per metric for {x.shape[1]} samples"
            )
        return y

    return func


def _is_power_of_two(n: int) -> bool:
    return n >= 1 and (n & (n - 1)) == 0


#: A Sobol metric whose largest single output holds more than this share of the base
#: designs' variance, or whose total indices sum to less than :data:`TOTAL_SUM_FLOOR`, gets a
#: note that its indices are noise (common practice, no source)
DOMINANT_SHARE = 0.5
TOTAL_SUM_FLOOR = 0.5


def sobol_analysis(
    model: Callable[[dict[str, np.ndarray]], dict[str, np.ndarray]],
    ppf: Mapping[str, Callable[[np.ndarray], np.ndarray]],
    metrics: list[str] | None,
    n: int,
    seed,
    bootstrap: int = 200,
    confidence: float = 0.95,
) -> dict:
    """First-order and total Sobol indices with bootstrap confidence intervals.

    Parameters
    ----------
    model : callable
        Batch model ``model(samples: dict[str, ndarray]) -> dict[str, ndarray]``.
    ppf : dict of str to callable
        Independent inputs: name -> vectorized inverse CDF on (0, 1).
    metrics : list of str or None
        Metrics to analyse; None analyses every metric the model returns.
    n : int
        Base sample size; must be a power of two (balance of the Sobol sequence).
    seed : int, SeedSequence, Generator or None
        Seed for the scrambled Sobol design and for the bootstrap resampling, passed to
        :func:`numpy.random.default_rng`.
    bootstrap : int, default 200
        Number of bootstrap resamples for the confidence intervals; 0 skips them (the
        interval bounds are then NaN).
    confidence : float, default 0.95
        Confidence level of the intervals.

    Returns
    -------
    dict
        ``result[metric][input]`` is a dict with float entries ``first``, ``total``,
        ``first_low``, ``first_high``, ``total_low``, ``total_high``. In addition:

        ``"evaluations"`` : int
            Model samples used, ``n * (d + 2)``.
        ``"nan_replaced"`` : dict of str to int
            Per metric, how many outputs were NaN/inf and were replaced by the mean of the
            finite outputs of that metric.
        ``"notes"`` : list of str
            Human-readable remarks (replacements, constant metrics).

    Raises
    ------
    ValueError
        If ``n`` is not a power of two or below ``MIN_SOBOL_N``, or no inputs are given.

    Notes
    -----
    The design follows the usual Saltelli scheme: a scrambled Sobol sequence with ``2 d``
    dimensions gives the two base matrices ``A`` and ``B``; the ``d`` matrices ``AB_i`` take
    ``A`` with column ``i`` from ``B``. All ``n (d + 2)`` points are evaluated in a single
    model call (through :func:`as_array_function`, i.e. scipy's ``(d, n) -> (s, n)``
    convention) so that non-converged samples can be replaced with the metric's overall mean
    before the indices are formed; the evaluations are then handed to
    :func:`scipy.stats.sobol_indices` in its dictionary form (estimator of Saltelli et al.,
    Comput. Phys. Commun. 181 (2010) 259-270). Replacing NaN by the mean biases the indices
    toward zero in proportion to the replaced fraction; above ``MAX_REPLACED`` of a metric's
    outputs its indices are withheld (NaN, with a note).

    Confidence intervals are percentile bootstrap intervals over the ``n`` rows of the
    design (each resample keeps the A/B/AB structure), drawn from the seeded generator so
    that results are reproducible.

    Constant metrics have undefined indices and are reported as NaN.
    """
    n_int = int(n)
    if n_int != n or not _is_power_of_two(n_int):
        # the nearest power of two within the allowed range (0 and -64 were told "try 2")
        near = 2 ** round(math.log2(min(max(float(n), MIN_SOBOL_N), MAX_SOBOL_N)))
        raise ValueError(
            f"n must be a power of two from {MIN_SOBOL_N} to {MAX_SOBOL_N:,} for the Sobol "
            f"design (got {n!r}); try {near}"
        )
    n = n_int
    if n < MIN_SOBOL_N:
        raise ValueError(f"n must be at least {MIN_SOBOL_N} for the Sobol design (got {n}): "
                         "on fewer rows the indices and their bootstrap intervals mean nothing")
    if n > MAX_SOBOL_N:
        raise ValueError(f"n must be at most {MAX_SOBOL_N:,} for the Sobol design (got {n:,}): "
                         "its design would not fit in memory")
    names = list(ppf)
    d = len(names)
    if d == 0:
        raise ValueError("ppf must describe at least one input")
    rng = np.random.default_rng(seed)

    sampler = stats.qmc.Sobol(d=2 * d, scramble=True, bits=64, rng=rng)
    u = sampler.random(n).T  # (2d, n)
    # Keep the unit-cube points strictly inside (0, 1) so unbounded inverse CDFs stay finite.
    u = np.clip(u, np.finfo(float).tiny, 1.0 - np.finfo(float).epsneg)
    a_mat = np.empty((d, n))
    b_mat = np.empty((d, n))
    for i, name in enumerate(names):
        a_mat[i] = np.asarray(ppf[name](u[i]), dtype=float)
        b_mat[i] = np.asarray(ppf[name](u[d + i]), dtype=float)
    ab = np.repeat(a_mat[None, :, :], d, axis=0)  # (d, d, n): page i = A with row i from B
    idx = np.arange(d)
    ab[idx, idx] = b_mat[idx]
    design = np.concatenate([a_mat, b_mat, ab.transpose(1, 0, 2).reshape(d, d * n)], axis=1)

    if metrics is None:
        probe = model({name: design[i] for i, name in enumerate(names)})
        metrics = list(probe)
        y = as_array_function(lambda s: probe, names, metrics)(design)
    else:
        metrics = list(metrics)
        y = as_array_function(model, names, metrics)(design)
    s = len(metrics)

    notes: list[str] = []
    nan_replaced: dict[str, int] = {}
    constant = np.zeros(s, dtype=bool)
    withheld: dict[int, list[str]] = {}  # metrics by their count of outputs not finite
    for j, metric in enumerate(metrics):
        bad = ~np.isfinite(y[j])
        nan_replaced[metric] = int(bad.sum())
        if bad.all():
            constant[j] = True
            notes.append(f"{metric}: no finite output; indices undefined")
            y[j] = 0.0
            continue
        if bad.mean() > MAX_REPLACED:
            # 192 of 768 outputs replaced gave a total index of 6.7: the indices of a
            # metric that many units lack are withheld, not printed distorted
            constant[j] = True
            y[j] = 0.0
            withheld.setdefault(int(bad.sum()), []).append(metric)
            continue
        if bad.any():
            mean = float(np.mean(y[j, ~bad]))
            y[j, bad] = mean
            notes.append(
                f"{metric}: {int(bad.sum())} of {y.shape[1]} outputs not finite, "
                f"replaced by the mean {mean:.6g}"
            )
        if np.ptp(y[j]) == 0.0:
            constant[j] = True
            notes.append(f"{metric}: constant output; indices undefined")

    for count, names_out in withheld.items():
        notes.append(f"Sobol indices withheld for {', '.join(names_out)}: {count:,} of "
                     f"{y.shape[1]:,} outputs not finite (units whose solve did not converge, "
                     f"or an infinite metric), more than {100 * MAX_REPLACED:g} %")
    f_a = y[:, :n]
    f_b = y[:, n : 2 * n]
    f_ab = y[:, 2 * n :].reshape(s, d, n).transpose(1, 0, 2)  # (d, s, n)

    result: dict = {}
    live = np.flatnonzero(~constant)
    first = np.full((s, d), np.nan)
    total = np.full((s, d), np.nan)
    lo_f = np.full((s, d), np.nan)
    hi_f = np.full((s, d), np.nan)
    lo_t = np.full((s, d), np.nan)
    hi_t = np.full((s, d), np.nan)
    if live.size:
        fa, fb, fab = f_a[live], f_b[live], f_ab[:, live]

        def indices(cols) -> tuple[np.ndarray, np.ndarray]:
            res = stats.sobol_indices(
                func={"f_A": fa[:, cols], "f_B": fb[:, cols], "f_AB": fab[..., cols]}, n=n
            )
            return (
                np.asarray(res.first_order).reshape(live.size, d),
                np.asarray(res.total_order).reshape(live.size, d),
            )

        fo, to = indices(slice(None))
        first[live], total[live] = fo, to
        if bootstrap and bootstrap > 0:

            def statistic(rows: np.ndarray) -> np.ndarray:
                f1, ft = indices(rows)
                return np.concatenate([f1.ravel(), ft.ravel()])

            boot = stats.bootstrap(
                (np.arange(n),),
                statistic,
                n_resamples=int(bootstrap),
                vectorized=False,
                confidence_level=confidence,
                method="percentile",
                rng=rng,
            )
            low = np.asarray(boot.confidence_interval.low).reshape(2, live.size, d)
            high = np.asarray(boot.confidence_interval.high).reshape(2, live.size, d)
            lo_f[live], lo_t[live] = low[0], low[1]
            hi_f[live], hi_t[live] = high[0], high[1]

    # indices that rest on a few units: the estimators divide by the variance of f_A and f_B
    # together, and a unit far from all others (a review's one latched unit among 256 rows,
    # its off_fraction 0.99 against microunits) holds nearly all of it while the numerators
    # see it only where the swapped column alone causes it: the total indices summed to
    # 4e-5, where the true ones sum to at least 1 for independent inputs (Saltelli et al.,
    # Global Sensitivity Analysis: The Primer, 2008, ch. 4)
    for j in live:
        yy = np.concatenate([f_a[j], f_b[j]])
        dev = (yy - yy.mean()) ** 2
        share = float(dev.max() / dev.sum())
        tsum = float(np.nansum(total[j]))
        if share > DOMINANT_SHARE or tsum < TOTAL_SUM_FLOOR:
            notes.append(
                f"{metrics[j]}: its Sobol indices rest on few units and read as noise (one "
                f"of the {yy.size:,} outputs of the base designs holds "
                f"{100 * share:.3g} % of their variance; the total indices sum to "
                f"{tsum:.2g}, where the true ones sum to at least 1): rank by the Spearman "
                f"coefficients, which a few extreme units do not dominate, or raise "
                f"--sobol-samples")
    for j, metric in enumerate(metrics):
        result[metric] = {
            name: {
                "first": float(first[j, i]),
                "total": float(total[j, i]),
                "first_low": float(lo_f[j, i]),
                "first_high": float(hi_f[j, i]),
                "total_low": float(lo_t[j, i]),
                "total_high": float(hi_t[j, i]),
            }
            for i, name in enumerate(names)
        }
    result["evaluations"] = int(n * (d + 2))
    result["nan_replaced"] = nan_replaced
    result["notes"] = notes
    return result


# ---------------------------------------------------------------------------------------------
# failure drivers
# ---------------------------------------------------------------------------------------------


def _best_threshold(x: np.ndarray, failed: np.ndarray, side: str) -> tuple[float, float]:
    """One-sided threshold on ``x`` maximising Youden's J for the failure label.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Input values.
    failed : ndarray of bool, shape (n,)
        Failure label; must contain at least one failure.
    side : {"below", "above"}
        ``"below"``: region is ``x < threshold``; ``"above"``: ``x > threshold``.

    Returns
    -------
    threshold : float
        Midpoint between the two neighbouring distinct values at the optimal cut (or just
        beyond the data range when the region holds every sample).
    j : float
        Youden's J = (share of failures inside) - (share of passes inside).
    """
    order = np.argsort(x)  # cuts lie between distinct values: ties may come in any order
    xs = x[order]
    fs = failed[order]
    n_fail = fs.sum()
    n_pass = fs.size - n_fail
    cum_f = np.concatenate([[0], np.cumsum(fs)])  # failures among the k smallest
    cum_p = np.concatenate([[0], np.cumsum(~fs)])
    # Admissible cut positions k (region = the k smallest) lie between distinct values.
    k = np.concatenate([[0], np.flatnonzero(np.diff(xs) > 0) + 1, [xs.size]])
    if side == "below":
        tpr = cum_f[k] / n_fail
        fpr = cum_p[k] / n_pass if n_pass else np.zeros(k.size)
    else:
        tpr = (n_fail - cum_f[k]) / n_fail
        fpr = (n_pass - cum_p[k]) / n_pass if n_pass else np.zeros(k.size)
    j = tpr - fpr
    best = int(np.argmax(j))
    kb = int(k[best])
    # in Python floats, halves taken first: values near the end of double precision (a
    # part swept up to 1e308) must not overflow on the way to a threshold between them
    lo, hi = float(xs[0]), float(xs[-1])
    span = (0.5 * hi - 0.5 * lo) or 0.5
    if kb == 0:
        thr = lo - span / xs.size
    elif kb == xs.size:
        thr = hi + span / xs.size
    else:
        thr = 0.5 * float(xs[kb - 1]) + 0.5 * float(xs[kb])
    return thr, float(j[best])


def _default_formatter() -> Callable[[float, str], str]:
    try:
        from tolerance.units import format_quantity
    except ImportError:
        return lambda value, unit: f"{value:.3g}"
    return lambda value, unit: format_quantity(value, unit)


def _percent(fraction: float) -> str:
    """A share in percent, never rounded to 100 unless it is (0.9973 of failures read
    "100 %": as many decimals as it takes to stay below)."""
    v = 100.0 * fraction
    if v == 0.0:
        return "0"
    if 99.5 <= v < 100.0:
        for digits in range(1, 16):
            text = f"{v:.{digits}f}"
            if float(text) < 100.0:
                return text.rstrip("0").rstrip(".")
        return f"{v!r}"
    if v >= 10.0:
        return f"{v:.0f}"
    if v >= 1.0:
        return f"{v:.1f}".rstrip("0").rstrip(".")
    return f"{v:.2g}"


def _ks_table(x: np.ndarray, failed: list[np.ndarray], threads: int = 1
              ) -> tuple[np.ndarray, np.ndarray]:
    """Two-sample Kolmogorov-Smirnov statistics, failed against passed samples, of every
    input column for every failure label, from one sort of each column.

    Parameters
    ----------
    x : ndarray, shape (n, p)
        Finite inputs.
    failed : list of ndarray of bool, shape (n,)
        Failure labels, each with at least one failure and one pass.

    Returns
    -------
    d, sign : ndarray, shape (len(failed), p)
        The statistic ``max |F_failed - F_passed|`` and its sign as
        :func:`scipy.stats.ks_2samp` reports them (+1 where ``F_failed - F_passed`` reaches
        its largest distance above zero, ties included, else -1).

    Notes
    -----
    Both empirical CDFs are counts among the samples at or below each distinct value
    (the ends of runs of equal values in the sorted column) divided by the group sizes, the
    same integers and divisions as scipy's ``searchsorted`` form, so the statistics are
    equal to its own (``tests/test_sensitivity.py`` checks it). Each column is sorted once
    for every label instead of both groups for every label (the failure drivers of a
    400,000-sample lamp run with four failing criteria: 3.4 s -> 1.2 s).
    """
    n, p = x.shape
    d = np.zeros((len(failed), p))
    sign = np.ones((len(failed), p))
    k = np.arange(1, n + 1)
    sizes = [int(np.count_nonzero(f)) for f in failed]

    def column(i: int) -> list[tuple[float, float]]:
        col = np.ascontiguousarray(x[:, i])
        order = np.argsort(col)  # the order within runs of equal values does not matter
        ends = _run_ends(col[order])
        out = []
        for c, fail in enumerate(failed):
            cum_f = np.cumsum(fail[order])[ends]
            diff = cum_f / sizes[c] - (k[ends] - cum_f) / (n - sizes[c])
            high = float(diff.max())
            low = float(np.clip(-diff.min(), 0.0, 1.0))
            # scipy.stats.ks_2samp: the negative side wins only when strictly larger
            out.append((low, -1.0) if low > high else (high, 1.0))
        return out

    for i, entries in enumerate(thread_map(column, range(p), threads)):
        for c, (stat, side) in enumerate(entries):
            d[c, i], sign[c, i] = stat, side
    return d, sign


#: largest product of failures and passes whose KS p-value scipy's exact method computes
#: (a few milliseconds an input; the beacon study's 20,000-sample run with its insights took
#: 0.64 to 0.66 s with 0, 2e5 or 1e6 here, within the noise); beyond it Smirnov's asymptotic
#: form, which at 20 failures of a million units is within a factor 2.5 of the exact value
#: at p = 1e-40 and closer above, and at D = 1 the closed form
EXACT_KS_PAIRS = 200_000


def _ks_p_value(d: float, n_fail: int, n_pass: int) -> float:
    """Two-sided p-value of a two-sample KS statistic by Smirnov's asymptotic form with the
    effective size ``m n / (m + n)``, as :func:`scipy.stats.ks_2samp` computes it with
    ``method="asymp"``.

    At ``d = 1`` (every failure beyond every pass) that form gives 0 when the failures are
    few (an effective size of 1 or 2, whose statistic cannot exceed 1); the exact value is
    the chance that the ``m`` failures are the ``m`` largest or smallest of the ``m + n``
    units, ``2 / C(m + n, m)`` (at most 1; exchangeability, from memory; two arrangements
    for equal group sizes too, as scipy.stats.ks_2samp's exact method gives: 1/3 for two
    against two): one failure among 20,000 units gives 1e-4, not 0."""
    m, k = sorted([float(n_fail), float(n_pass)], reverse=True)
    if d >= 1.0:
        ways = (math.lgamma(m + k + 1) - math.lgamma(m + 1) - math.lgamma(k + 1))
        return float(min(1.0, 2.0 * math.exp(-ways)))
    return float(np.clip(stats.kstwo.sf(d, np.round(m * k / (m + k))), 0.0, 1.0))


def failure_drivers(
    inputs: pd.DataFrame,
    failed: np.ndarray,
    units: dict[str, str] | None = None,
    formatter: Callable[[float, str], str] | None = None,
    top: int = 5,
) -> dict:
    """Rank the inputs that drive failures and describe the failure region.

    Parameters
    ----------
    inputs : pandas.DataFrame
        Monte Carlo input samples, one column per parameter.
    failed : ndarray of bool, shape (n,)
        True for samples that failed a requirement.
    units : dict of str to str, optional
        Unit name per input (default ``"1"``, dimensionless), passed to ``formatter``.
    formatter : callable, optional
        ``formatter(value, unit) -> str`` used for thresholds in the text. Defaults to
        ``tolerance.units.format_quantity`` when that module is importable, else ``"%.3g"``.
    top : int, default 5
        Number of inputs kept in the ranking.

    Returns
    -------
    dict
        ``ranking`` : list of dict
            Top inputs by two-sample Kolmogorov-Smirnov statistic between the failed and
            the passed samples, each ``{"input", "ks", "direction", "p_value"}``;
            ``direction`` is ``"low"`` when failures sit at lower values than passes,
            ``"high"`` for higher values, ``"none"`` when the statistic is zero.
        ``region`` : list of dict
            One or two conditions ``{"input", "side": "below" | "above", "threshold"}``
            combined with "and".
        ``share_of_failures`` : float
            Fraction of all failures inside the region.
        ``rate_inside``, ``rate_outside`` : float
            Failure rate among samples inside / outside the region.
        ``text`` : str
            Plain-language summary, e.g. ``"Q2.hfe below 410 and ambient below -10 degC:
            92 % of failures, failure rate 31 % inside (920 of 2,968 units; 0.4 % outside)"``.
        ``units_inside`` : int
            Units inside the region.
        ``failures``, ``samples``, ``dropped`` : int
            Failure count, samples used, and rows dropped for non-finite inputs.

    Notes
    -----
    Each condition is a one-sided threshold on one input, on the side given by the KS
    direction. The threshold maximises Youden's J statistic, the share of failures inside
    minus the share of passes inside (equivalently, the vertical distance between the two
    empirical CDFs), and is placed midway between neighbouring sample values.

    The second-ranked input is then thresholded the same way *within* the first region, and
    the "and" combination is kept only if it raises the failure rate inside while keeping at
    least 90 % of the failures the first condition captured, and the second input separates
    the failures from the passes inside the first region at :data:`DRIVER_SIGNIFICANCE`
    after Bonferroni's correction (:func:`_separates_within`).

    With no failures the ranking is empty and the text reads ``"no failures"``; when every
    sample failed the text reads ``"all samples failed: ..."``.
    """
    return failure_drivers_of(inputs, {"": failed}, units, formatter, top)[""]


def failure_drivers_of(
    inputs: pd.DataFrame,
    failed: Mapping[str, np.ndarray],
    units: dict[str, str] | None = None,
    formatter: Callable[[float, str], str] | None = None,
    top: int = 5,
    threads: int = 1,
) -> dict[str, dict]:
    """:func:`failure_drivers` of several failure labels (one per criterion) on the same
    inputs, each input column sorted once for all of them, up to ``threads`` columns at once
    (the drivers do not depend on it).

    Returns
    -------
    dict
        For each key of ``failed``, what :func:`failure_drivers` returns for its label.
    """
    units = units or {}
    fmt = formatter if formatter is not None else _default_formatter()
    names = [str(c) for c in inputs.columns]
    x_all = inputs.to_numpy(dtype=float)
    ok = np.all(np.isfinite(x_all), axis=1)
    x = x_all[ok]
    labels = {}
    for key, f in failed.items():
        f = np.asarray(f, dtype=bool).reshape(-1)
        if f.size != len(inputs):
            raise ValueError(f"failed has {f.size} entries but inputs has {len(inputs)} rows")
        labels[key] = f[ok]
    # up to 200 samples the drivers take scipy's exact test instead (:func:`_drivers`)
    mixed = [key for key, f in labels.items()
             if 0 < np.count_nonzero(f) < f.size and f.size > 200]
    d, sign = (_ks_table(x, [labels[key] for key in mixed], threads) if mixed
               else (None, None))
    out = {}
    for key, fail in labels.items():
        ks = None
        if key in mixed:
            c = mixed.index(key)
            ks = (d[c], sign[c])
        out[key] = _drivers(names, x, fail, ks, int((~ok).sum()), units, fmt, top)
    return out


#: the family-wise significance a failure driver's region needs (Bonferroni over the inputs)
DRIVER_SIGNIFICANCE = 0.05

#: up to this many failures a driver text that names no region says where each failing unit
#: lies furthest out among the units
FEW_FAILURES = 3


def _chance_text(names, x, fail, best, varying, units, fmt) -> str:
    """What to say of failures no input separates from the passes at
    :data:`DRIVER_SIGNIFICANCE`: the best input's p-value and, for a few failures, each
    failing unit's three inputs furthest out in the units' own spread (two-sided
    percentile), which a reviewer can pin in a what-if."""
    n_fail = int(fail.sum())
    what = "failing unit" if n_fail == 1 else "failing units"
    text = (f"{n_fail:,} {what}: no input separates {'it' if n_fail == 1 else 'them'} "
            f"from the passes at "
            f"{100 * DRIVER_SIGNIFICANCE:g} % significance (best {best['input']}, p = "
            f"{best['p_value']:.2g} against {DRIVER_SIGNIFICANCE / varying:.2g} for "
            f"{varying} varying inputs), so no driver is named")
    if n_fail > FEW_FAILURES:
        return text
    spread = np.ptp(x, axis=0) > 0
    seen = []
    for row in x[fail]:
        # the share of units below the failing unit's value, ties counted half
        below = (np.count_nonzero(x < row, axis=0) + 0.5 * np.count_nonzero(x == row, axis=0)
                 - 0.5) / max(len(x) - 1, 1)
        out = np.where(spread, np.abs(below - 0.5), -1.0)
        far = [i for i in np.argsort(-out, kind="stable")[:3] if out[i] >= 0]
        seen.append(", ".join(
            f"{names[i]} {fmt(row[i], units.get(names[i], '1'))} "
            f"({_percentile_words(below[i])})" for i in far))
    lead = "the unit lies furthest out in" if n_fail == 1 else "furthest out lie"
    return text + f"; {lead}: " + "; ".join(seen)


def _percentile_words(share: float) -> str:
    """A unit's place among the other units, e.g. "above 99.6 % of the other units"."""
    if share >= 0.5:
        return f"above {_percent(share)} % of the other units"
    return f"below {_percent(1.0 - share)} % of the other units"


def _separates_within(values, fail, mask, varying) -> bool:
    """Whether ``values`` separate the failures from the passes among the units of ``mask``
    at :data:`DRIVER_SIGNIFICANCE` after Bonferroni's correction over ``varying`` inputs
    (two-sample KS test, scipy's exact distribution where it is affordable)."""
    f, p = values[mask & fail], values[mask & ~fail]
    if f.size == 0 or p.size == 0:
        return False
    method = "exact" if f.size * p.size <= EXACT_KS_PAIRS else "asymp"
    return float(stats.ks_2samp(f, p, method=method).pvalue) * varying <= DRIVER_SIGNIFICANCE


def _drivers(names, x, fail, ks, dropped, units, fmt, top) -> dict:
    """The failure drivers of one label, with its KS statistics ``ks = (d, sign)`` (None
    when the label has no failure or no pass, or up to 200 samples, where scipy's exact
    test gives them)."""
    n_fail = int(fail.sum())
    n = int(fail.size)
    varying = max(int(np.count_nonzero(np.ptp(x, axis=0) > 0)) if n else 0, 1)
    base = {
        "failures": n_fail,
        "samples": n,
        "dropped": dropped,
        # the p-value an input's KS test must stay below to count as a driver (5 % over the
        # varying inputs, Bonferroni); the ranking's p-values are each input's own
        "p_threshold": DRIVER_SIGNIFICANCE / varying,
    }
    empty = {
        "ranking": [],
        "region": [],
        "share_of_failures": float("nan"),
        "rate_inside": float("nan"),
        "rate_outside": float("nan"),
    }
    if n_fail == 0:
        return {**empty, "share_of_failures": 0.0, "text": "no failures", **base}
    if n_fail == n:
        return {
            **empty,
            "share_of_failures": 1.0,
            "rate_inside": 1.0,
            "text": "all samples failed: with no passing unit to compare them with, no "
                    "input can be named as a driver",
            **base,
        }

    n_pass = n - n_fail
    ranking = []
    for i, name in enumerate(names):
        # small runs or few failures (of a large run): scipy's exact distribution of the
        # statistic, which costs some m n operations (2 ms at 10 failures of 20,000 units)
        if n <= 200 or n_fail * n_pass <= EXACT_KS_PAIRS:
            res = stats.ks_2samp(x[fail, i], x[~fail, i], method="exact")
            stat, above, p_value = float(res.statistic), res.statistic_sign > 0, float(res.pvalue)
        else:
            stat, above = float(ks[0][i]), ks[1][i] > 0
            p_value = _ks_p_value(stat, n_fail, n_pass)
        if stat == 0.0:
            direction = "none"
        else:
            # above: the CDF of the failures lies above that of the passes,
            # i.e. failures concentrate at lower values.
            direction = "low" if above else "high"
        ranking.append({"input": name, "ks": stat, "direction": direction, "p_value": p_value})
    ranking.sort(key=lambda r: -r["ks"])
    ranking = ranking[: max(int(top), 0)] if top is not None else ranking

    drivers = [r for r in ranking if r["direction"] != "none"]
    if not drivers:
        return {
            **empty,
            "ranking": ranking,
            "text": "no input separates failures from passes",
            **base,
        }
    # a region drawn round a few failures that chance alone would place as far out names
    # inputs that do not matter (found by a review: one unit failing stays_off read "Q1.icbo
    # above 41 nA and supply.voltage above 26.2 V: 100 % of failures", where pinning the
    # supply at its maximum failed none and the drive's low level was the cause). The best
    # input must separate them at 5 % after Bonferroni's correction over the varying inputs
    # (common practice, no source)
    if drivers[0]["p_value"] * varying > DRIVER_SIGNIFICANCE:
        return {
            **empty,
            "ranking": ranking,
            "text": _chance_text(names, x, fail, drivers[0], varying, units, fmt),
            **base,
        }

    col = {name: i for i, name in enumerate(names)}

    def condition(rank_entry, mask):
        i = col[rank_entry["input"]]
        side = "below" if rank_entry["direction"] == "low" else "above"
        thr, _ = _best_threshold(x[mask, i], fail[mask], side)
        inside = x[:, i] < thr if side == "below" else x[:, i] > thr
        return {"input": rank_entry["input"], "side": side, "threshold": thr}, inside

    everything = np.ones(n, dtype=bool)
    cond1, inside = condition(drivers[0], everything)
    region = [cond1]

    def rates(mask):
        k_in = int(mask.sum())
        f_in = int((fail & mask).sum())
        share = f_in / n_fail
        r_in = f_in / k_in if k_in else float("nan")
        k_out = n - k_in
        r_out = (n_fail - f_in) / k_out if k_out else float("nan")
        return share, r_in, r_out

    share, r_in, r_out = rates(inside)
    if len(drivers) > 1 and (fail & inside).any() and (~fail & inside).any():
        cond2, inside2 = condition(drivers[1], inside)
        both = inside & inside2
        share2, r_in2, r_out2 = rates(both)
        # the second input must itself separate the failures from the passes inside the
        # first region, at the same significance (found by a review: one unit failing
        # stays_off among three above a leakage threshold read "Q2.icbo above 11.6 uA and
        # RB below 2.19 kOhm: 100 % of failures"; any input that left the unit in and the
        # two others out would have been named)
        if (r_in2 > r_in and share2 >= 0.9 * share
                and _separates_within(x[:, col[drivers[1]["input"]]], fail, inside,
                                      varying)):
            region.append(cond2)
            inside, share, r_in, r_out = both, share2, r_in2, r_out2

    parts = [
        f"{c['input']} {c['side']} {fmt(c['threshold'], units.get(c['input'], '1'))}"
        for c in region
    ]
    # how many units the region holds: a region drawn round a single failing unit reads
    # "failure rate 100 % inside", true by construction and no finding (an audit's beacon
    # run: one unit, beyond the class's maximum gain)
    k_in = int(inside.sum())
    text = (
        " and ".join(parts)
        + f": {_percent(share)} % of failures, failure rate {_percent(r_in)} % inside "
        + f"({int((fail & inside).sum()):,} of {k_in:,} units"
    )
    if math.isfinite(r_out):
        text += f"; {_percent(r_out)} % outside"
    text += ")"
    return {
        "ranking": ranking,
        "region": region,
        "share_of_failures": float(share),
        "rate_inside": float(r_in),
        "rate_outside": float(r_out),
        "units_inside": k_in,
        "text": text,
        **base,
        "passes": int(n_pass),
    }
