"""Statistics for Monte Carlo yield and margin results.

Exact binomial confidence intervals for observed failure counts, summary percentiles,
process capability indices, and model-based (extrapolated) tail probabilities for a margin
metric. Sample-based functions drop NaN entries; count-based functions reject invalid counts.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special, stats

__all__ = [
    "capability",
    "clopper_pearson",
    "gpd_fit",
    "half_width",
    "percentile_summary",
    "tail_check",
    "tail_estimate",
    "zero_failure_upper",
]


def _check_confidence(confidence: float) -> float:
    confidence = float(confidence)
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    return confidence


def _counts(failures, n) -> tuple[np.ndarray, np.ndarray, bool]:
    k = np.asarray(failures)
    m = np.asarray(n)
    scalar = k.ndim == 0 and m.ndim == 0
    kf = np.asarray(k, dtype=float)
    mf = np.asarray(m, dtype=float)
    if not (np.all(np.isfinite(kf)) and np.all(np.isfinite(mf))):
        raise ValueError("failures and n must be finite counts")
    if np.any(kf != np.round(kf)) or np.any(mf != np.round(mf)):
        raise ValueError("failures and n must be whole numbers")
    if np.any(mf < 1):
        raise ValueError("n must be at least 1")
    if np.any(kf < 0) or np.any(kf > mf):
        raise ValueError("failures must lie between 0 and n")
    kf, mf = np.broadcast_arrays(kf, mf)
    return kf, mf, scalar


def clopper_pearson(failures, n, confidence: float = 0.95):
    """Exact (Clopper-Pearson) two-sided confidence interval for a failure probability.

    Parameters
    ----------
    failures : int or array_like of int
        Observed failures ``k`` [count], ``0 <= k <= n``.
    n : int or array_like of int
        Trials [count], at least 1; broadcast against ``failures``.
    confidence : float, optional
        Two-sided confidence level [1], default 0.95.

    Returns
    -------
    low, high : float or numpy.ndarray
        Interval bounds on the failure probability [1]; ``low = 0`` when ``k = 0`` and
        ``high = 1`` when ``k = n``. Floats for scalar inputs.

    Notes
    -----
    ``low = B(alpha/2; k, n - k + 1)`` and ``high = B(1 - alpha/2; k + 1, n - k)`` with ``B``
    the beta quantile function and ``alpha = 1 - confidence``.
    """
    confidence = _check_confidence(confidence)
    k, m, scalar = _counts(failures, n)
    alpha = 1.0 - confidence
    # Safe shape parameters where the closed-form ends apply, to keep beta.ppf in its domain.
    low = stats.beta.ppf(alpha / 2.0, np.maximum(k, 1.0), m - k + 1.0)
    high = stats.beta.ppf(1.0 - alpha / 2.0, k + 1.0, np.maximum(m - k, 1.0))
    low = np.where(k == 0, 0.0, low)
    high = np.where(k == m, 1.0, high)
    if scalar:
        return float(low), float(high)
    return low, high


def _wilson(x: float, n: float, z: float) -> tuple[float, float]:
    """Wilson score interval of a proportion x / n (Wilson, JASA 22 (1927) 209-212)."""
    centre = (x + 0.5 * z * z) / (n + z * z)
    half = z * math.sqrt(x * (n - x) / n + 0.25 * z * z) / (n + z * z)
    return max(centre - half, 0.0), min(centre + half, 1.0)


def paired_difference(first_passes, second_passes, confidence: float = 0.95) -> dict:
    """Difference of two yields measured on the same units (common random numbers).

    Parameters
    ----------
    first_passes, second_passes : array_like of bool
        Whether each unit passes in the first and in the second run, unit by unit.
    confidence : float, optional
        Two-sided confidence level [1], default 0.95.

    Returns
    -------
    dict
        ``difference`` (second yield minus first [1]), ``ci_low``, ``ci_high`` (its
        interval [1]), ``only_first`` and ``only_second`` (units passing in one run only
        [count]) and ``p_value`` (exact two-sided McNemar test of equal yields [1]).

    Notes
    -----
    Only the units that pass in one run and fail in the other tell the runs apart; given
    their number m, those passing only in the second run are Binomial(m, 1/2) when the
    yields are equal: the exact McNemar test (McNemar, Psychometrika 12 (1947) 153-157;
    scipy.stats.binomtest). The interval of the difference is Newcombe's score interval for
    paired proportions (Newcombe, Statistics in Medicine 17 (1998) 2635-2650, method 10,
    from memory): each run's Wilson interval, joined with the runs' correlation phi over the
    units. It holds its level with every discordant unit on one side, where an interval
    that takes m as known collapses onto the estimate (its coverage fell to 43 %; tests
    check this one by simulation). Paired, two yields of 23.5 % and 23.3 % over the same
    5,000 units can differ significantly where their own intervals overlap entirely.
    """
    confidence = _check_confidence(confidence)
    a = np.asarray(first_passes, dtype=bool).reshape(-1)
    b = np.asarray(second_passes, dtype=bool).reshape(-1)
    if a.size != b.size or a.size == 0:
        raise ValueError(f"need two pass columns of the same units, got {a.size} and {b.size}")
    n = a.size
    only_first = int(np.count_nonzero(a & ~b))
    only_second = int(np.count_nonzero(b & ~a))
    both = int(np.count_nonzero(a & b))
    neither = n - both - only_first - only_second
    m = only_first + only_second
    p_value = 1.0 if m == 0 else min(float(stats.binomtest(only_second, m, 0.5).pvalue), 1.0)
    z = float(special.ndtri(0.5 + 0.5 * confidence))
    # Newcombe's notation: cells a (both pass), b (second only), c (first only), d (neither);
    # p1 the second run's yield, p2 the first's, the difference p1 - p2 = (b - c) / n
    p1, p2 = (both + only_second) / n, (both + only_first) / n
    l1, u1 = _wilson(both + only_second, n, z)
    l2, u2 = _wilson(both + only_first, n, z)
    margins = float(both + only_second) * (only_first + neither) * (both + only_first) \
        * (only_second + neither)
    phi = 0.0 if margins == 0 else (both * neither - only_second * only_first) / math.sqrt(
        margins)
    phi = min(max(phi, -1.0), 1.0)
    d1, d2 = p1 - l1, u1 - p1
    e1, e2 = p2 - l2, u2 - p2
    difference = (only_second - only_first) / n
    low = difference - math.sqrt(max(d1 * d1 - 2.0 * phi * d1 * e2 + e2 * e2, 0.0))
    high = difference + math.sqrt(max(e1 * e1 - 2.0 * phi * e1 * d2 + d2 * d2, 0.0))
    return {"difference": difference, "ci_low": max(low, -1.0), "ci_high": min(high, 1.0),
            "only_first": only_first, "only_second": only_second, "p_value": p_value}


def half_width(failures, n, confidence: float = 0.95):
    """Half the width of the Clopper-Pearson interval.

    Parameters
    ----------
    failures : int or array_like of int
        Observed failures [count].
    n : int or array_like of int
        Trials [count].
    confidence : float, optional
        Two-sided confidence level [1], default 0.95.

    Returns
    -------
    float or numpy.ndarray
        ``(high - low) / 2`` [1], used to decide when enough samples were drawn.
    """
    low, high = clopper_pearson(failures, n, confidence)
    result = (np.asarray(high) - np.asarray(low)) / 2.0
    if np.ndim(result) == 0:
        return float(result)
    return result


def zero_failure_upper(n, confidence: float = 0.95):
    """Exact one-sided upper bound on the failure probability after zero failures.

    Parameters
    ----------
    n : int or array_like of int
        Trials without a failure [count], at least 1.
    confidence : float, optional
        One-sided confidence level [1], default 0.95.

    Returns
    -------
    float or numpy.ndarray
        ``1 - (1 - confidence)**(1/n)`` [1]; about ``3/n`` at 95 % for large ``n``.
    """
    confidence = _check_confidence(confidence)
    m = np.asarray(n, dtype=float)
    if np.any(~np.isfinite(m)) or np.any(m < 1) or np.any(m != np.round(m)):
        raise ValueError("n must be a whole number of at least 1")
    result = -np.expm1(np.log1p(-confidence) / m)
    if result.ndim == 0:
        return float(result)
    return result


def _clean(x) -> np.ndarray:
    """Finite entries only: NaN (no solution) and infinities (outside the model's range) are
    left out of every spread, capability and tail figure; the counted criteria see them."""
    arr = np.asarray(x, dtype=float).ravel()
    return arr[np.isfinite(arr)]


#: largest magnitude whose squares, summed over any run, stay far inside double precision;
#: beyond it (or below its reciprocal, where squares underflow) the moments are taken of the
#: data divided by its largest magnitude (common practice, no source)
_PLAIN_MOMENTS = 1e100


def mean_std(data: np.ndarray, ddof: int = 1, nan: bool = False) -> tuple[float, float]:
    """Mean and standard deviation of finite data, also where its squares would overflow.

    Parameters
    ----------
    data : ndarray
        Finite values [any unit] (NaN allowed, and skipped, with ``nan=True``).
    ddof : int
        Delta degrees of freedom of the standard deviation.
    nan : bool
        Skip NaN entries (``np.nanmean`` / ``np.nanstd``).

    Returns
    -------
    (mean, std) : tuple of float
        Exactly numpy's figures for magnitudes between 1e-100 and 1e100; outside that range
        the same moments of ``data / max|data|``, scaled back, where numpy's own would
        overflow to infinity (a metric of 1e200 has a square beyond double precision) or
        underflow to 0. NaN for no data; the spread NaN for no more values than ``ddof``.
    """
    mean_of, std_of = (np.nanmean, np.nanstd) if nan else (np.mean, np.std)
    count = int(np.count_nonzero(~np.isnan(data))) if nan else int(data.size)
    if count == 0:
        return math.nan, math.nan
    big = float(np.nanmax(np.abs(data)))
    scale = 1.0 if big == 0.0 or 1.0 / _PLAIN_MOMENTS <= big <= _PLAIN_MOMENTS else big
    values = data if scale == 1.0 else data / scale
    mean = scale * float(mean_of(values))
    std = scale * float(std_of(values, ddof=ddof)) if count > ddof else math.nan
    return mean, std


_SUMMARY_PERCENTILES = {"p001": 0.1, "p01": 1.0, "p50": 50.0, "p99": 99.0, "p999": 99.9}


def percentile_summary(x) -> dict[str, float]:
    """Mean, spread, extremes and tail percentiles of a sample, ignoring NaN and infinities
    (an infinite metric marks a sample outside the model's range; the counted criteria see it).

    Parameters
    ----------
    x : array_like
        Sample values [any unit]; NaN entries are dropped.

    Returns
    -------
    dict of str to float
        ``mean``, ``std`` (ddof = 1; 0 for a single sample), ``min``, ``max``, and the
        percentiles ``p001`` (0.1 %), ``p01`` (1 %), ``p50`` (median), ``p99`` (99 %),
        ``p999`` (99.9 %), linearly interpolated [same unit as ``x``]. All NaN when no finite
        sample remains.
    """
    raw = _clean(x)
    data = raw[np.isfinite(raw)]
    keys = ["mean", "std", "min", "max", *_SUMMARY_PERCENTILES]
    if data.size == 0:
        return {key: math.nan for key in keys}
    mean, std = mean_std(data)
    out = {
        "mean": mean,
        "std": std if data.size > 1 else 0.0,
        "min": float(np.min(data)),
        "max": float(np.max(data)),
    }
    values = np.percentile(data, list(_SUMMARY_PERCENTILES.values()))
    out.update({key: float(v) for key, v in zip(_SUMMARY_PERCENTILES, values)})
    return out


def capability(x, lower=None, upper=None, confidence: float = 0.95) -> dict[str, float]:
    """Process capability indices of a sample against specification limits.

    Parameters
    ----------
    x : array_like
        Sample values [any unit]; NaN entries are dropped.
    lower, upper : float, optional
        Specification limits [same unit as ``x``]; at least one is required.
    confidence : float, optional
        Two-sided confidence level for the Cpk interval [1], default 0.95.

    Returns
    -------
    dict
        ``cp`` = (U - L) / (6 s) [1], NaN unless both limits are given; ``cpk`` =
        min((U - mean) / (3 s), (mean - L) / (3 s)) over the given limits [1];
        ``cpk_low``, ``cpk_high`` [1], the normal-approximation interval of Bissell (1990),
        Cpk +- z * sqrt(1 / (9 n) + Cpk**2 / (2 (n - 1))); ``n`` [count] as an int. With
        fewer than two samples every index is NaN; with zero spread the indices are +-inf
        (NaN where every value lies on a limit, 0 / 0) and the interval NaN. Equal limits (a metric that must take one value) are allowed:
        Cp is then 0 (NaN with zero spread as well).

    Notes
    -----
    Monte Carlo samples have no rational subgroups, so ``s`` is the overall sample standard
    deviation (ddof = 1); the indices are therefore what is often called Pp and Ppk. The
    interval assumes normally distributed data.

    References
    ----------
    A. F. Bissell, "How reliable is your capability index?", Applied Statistics 39(3),
    331-340 (1990).
    """
    confidence = _check_confidence(confidence)
    if lower is None and upper is None:
        raise ValueError("capability needs at least one specification limit")
    if lower is not None and upper is not None and not float(upper) >= float(lower):
        raise ValueError(f"upper limit {upper!r} must not be below lower limit {lower!r}")
    data = _clean(x)
    n = int(data.size)
    nan = math.nan
    if n < 2:
        return {"cp": nan, "cpk": nan, "cpk_low": nan, "cpk_high": nan, "n": n}
    mean, s = mean_std(data)
    sides = []
    if upper is not None:
        sides.append(float(upper) - mean)
    if lower is not None:
        sides.append(mean - float(lower))
    if s == 0.0:
        # both limits: the window's width over no spread (0 / 0 when the limits coincide)
        cp = ((math.inf if float(upper) > float(lower) else nan)
              if (lower is not None and upper is not None) else nan)
        worst = min(sides)
        # every value on a limit is 0 / 0: no index (0 would read as half the units out)
        cpk = math.inf if worst > 0 else (-math.inf if worst < 0 else nan)
        return {"cp": cp, "cpk": cpk, "cpk_low": nan, "cpk_high": nan, "n": n}
    cp = (float(upper) - float(lower)) / (6.0 * s) if len(sides) == 2 else nan
    cpk = min(sides) / (3.0 * s)
    z = float(stats.norm.ppf(0.5 + confidence / 2.0))
    if abs(cpk) < 1e150:
        se = math.sqrt(1.0 / (9.0 * n) + cpk**2 / (2.0 * (n - 1)))
    else:  # the same root without squaring an index beyond double precision
        se = math.hypot(math.sqrt(1.0 / (9.0 * n)), cpk / math.sqrt(2.0 * (n - 1)))
    return {"cp": cp, "cpk": cpk, "cpk_low": cpk - z * se, "cpk_high": cpk + z * se, "n": n}


_TAIL_FRACTION = 0.05
_TAIL_MIN_SAMPLES = 50
#: Largest fitted generalized Pareto shape extrapolated. Above 0.5 the fitted tail has no
#: finite variance (above 1 no mean), which a margin of a circuit built from bounded parts
#: does not have: such a fit describes a few outlying units (a second population: units in
#: another operating region), not a tail to extend (common practice, no source; the
#: moments' existence: Coles, An Introduction to Statistical Modeling of Extreme Values,
#: 2001, sec. 4.2). A review's heater read 725 ppm overstressed at shape 1.67 for a stress
#: whose largest value lay 115 standard deviations below its limit.
_TAIL_SHAPE_MAX = 0.5


def _normal_upper_ppm(mean: float, s: float, n: int, confidence: float) -> float:
    """One-sided upper confidence bound [ppm] on Phi(-mu/sigma) for a normal sample.

    ``sqrt(n) * mean / s`` follows a noncentral t distribution with ``n - 1`` degrees of
    freedom and noncentrality ``sqrt(n) * mu / sigma``; the bound inverts it for the lowest
    noncentrality still compatible with the observation at the given confidence (the
    construction behind one-sided normal tolerance factors).
    """
    df = n - 1
    t_obs = math.sqrt(n) * mean / s
    cut = _ZERO_BOUND_SIGMAS * math.sqrt(n)
    if t_obs > cut:
        # the CDF falls with the noncentrality: where it still exceeds the confidence at
        # delta = 40 sqrt(n), the root lies beyond, and the bound Phi(-delta_low / sqrt(n))
        # <= Phi(-40) is 0 in double precision (scipy.stats.norm.sf is 0 beyond about 37.6),
        # exactly what the root would give; one CDF evaluation instead of a search, which
        # this far out costs up to 60 ms or cannot be resolved at all
        at_cut = float(special.nctdtr(df, cut, t_obs))
        if math.isfinite(at_cut) and at_cut > confidence:
            return 0.0
    delta_low = _noncentrality_low(t_obs, df, confidence)
    return 1e6 * float(stats.norm.sf(delta_low / math.sqrt(n)))


#: Standard deviations beyond which a normal tail probability is 0 in double precision.
_ZERO_BOUND_SIGMAS = 40.0


def _noncentrality_low(t_obs: float, df: int, confidence: float) -> float:
    """The noncentrality ``delta`` at which the noncentral t CDF at ``t_obs`` equals
    ``confidence`` (NaN where the CDF cannot be resolved).

    The CDF decreases with ``delta``. A bracket is sought first around the normal
    approximation ``delta ~ t - z sqrt(1 + t^2 / (2 df))`` (``T = (Z + delta) / sqrt(W / df)``
    with ``sqrt(W / df)`` nearly normal, mean 1 and variance 1/(2 df); from memory, Johnson,
    Kotz & Balakrishnan, Continuous Univariate Distributions 2, ch. 31), 0.2 % of its
    standard deviation wide and widened fourfold until it holds; only if that fails, around
    the observation. The root is then found by Brent's method, so the approximation only
    saves evaluations of the CDF (each up to several milliseconds far out on many degrees of
    freedom) and
    never changes the result beyond the root-finder's tolerance.
    """
    def excess(delta: float) -> float:
        return float(special.nctdtr(df, delta, t_obs)) - confidence

    spread = math.sqrt(1.0 + t_obs * t_obs / (2.0 * df))
    guess = t_obs - float(special.ndtri(confidence)) * spread
    brackets = []
    width = 2e-3 * spread
    for _ in range(4):  # 0.2 %, 0.8 %, 3.2 % and 12.8 % of the spread
        brackets.append((guess - width, guess + width, True))
        width *= 4.0
    width = 5.0 + abs(t_obs)
    for _ in range(60):  # the plain search: around the observation, doubling
        brackets.append((t_obs - width, t_obs + width, False))
        width *= 2.0
    for lo, hi, near in brackets:
        e_lo, e_hi = excess(lo), excess(hi)
        if not (math.isfinite(e_lo) and math.isfinite(e_hi)):
            if near:
                continue  # the plain search decides
            return math.nan  # the noncentral t CDF is not resolvable this far out
        if e_lo > 0 > e_hi:
            break
    else:
        return math.nan
    try:
        return optimize.brentq(excess, lo, hi, xtol=1e-10, rtol=1e-12)
    except ValueError:  # NaN met inside the bracket
        return math.nan


_ASSUMPTION_GPD = (
    "Extrapolation: assumes the lower tail of the margin beyond its 5 % quantile follows a "
    "generalized Pareto distribution of shape 0 or above (a fitted negative shape is "
    "taken as 0) and the bulk follows a normal distribution for normal_ppm, each limit "
    "fitted apart; neither is checked against the circuit physics."
)

#: where no tail is fitted: only normal_ppm is a model's
_ASSUMPTION_NORMAL = (
    "normal_ppm assumes the margin follows a normal distribution, not checked against the "
    "circuit physics; tail_ppm is no extrapolation (see method)."
)


#: Grid points of the profile-likelihood search in :func:`gpd_fit` [count].
_GPD_GRID = 64


def gpd_fit(excess) -> tuple[float, float]:
    """Maximum-likelihood fit of a generalized Pareto distribution (location 0) to positive
    exceedances, over shapes of at least -1, by Grimshaw's reduction to one dimension.

    With ``theta = shape / scale`` the likelihood equations give ``shape = mean(log(1 +
    theta x))`` for each ``theta``, so the profile log-likelihood per sample is
    ``-log(shape / theta) - 1 - shape``, a function of ``theta`` alone (Grimshaw, "Computing
    maximum likelihood estimates for the generalized Pareto distribution," Technometrics 35,
    1993). It is searched on a grid in ``log(1 + theta max(x))``, each interior maximum of the
    grid refined by bounded Brent minimization between its neighbours.

    Below shape -1 the likelihood grows without bound as the end of the support approaches
    the largest exceedance, so no maximum exists there (Smith, Biometrika 72, 1985). At shape
    -1 the distribution is uniform on ``[0, scale]``, whose best scale is the largest
    exceedance: that corner competes with the interior maxima, and it is the answer for a
    tail that ends abruptly.

    Parameters
    ----------
    excess : array_like
        Exceedances over the threshold [any unit], all positive and finite, not all equal.

    Returns
    -------
    (shape, scale) : tuple of float
        The estimates [1] and [unit of ``excess``].
    """
    x = np.asarray(excess, dtype=float)
    top = float(np.max(x))
    y = x / top  # in (0, 1]; theta * x = t * y with t = theta * top

    def shape_of(t: float) -> float:
        return float(np.mean(np.log1p(t * y)))

    def per_sample_loss(w: float) -> float:
        # minus the log-likelihood per sample at the profile point t = expm1(w), less
        # log(top); the shape -1 corner (uniform on [0, top]) scores 0
        t = math.expm1(w)
        if abs(t) < 1e-12:  # the exponential limit: shape 0, scale mean(x)
            return math.log(float(np.mean(y))) + 1.0
        k = shape_of(t)
        return math.log(k / t) + 1.0 + k

    # shape(t) rises with t, from -inf (t -> -1, where the largest exceedance meets the end
    # of the support; reached only logarithmically, so with many samples not within double
    # precision) through 0 (t = 0). Where the profile's shape falls below -1 the best shape
    # is -1 and the loss -log(-t) falls to the corner's 0, so the search starts at shape -1.
    t_low = -1.0 + 1e-15
    if shape_of(t_low) < -1.0:
        t_low = optimize.brentq(lambda t: shape_of(t) + 1.0, t_low, 0.0, xtol=1e-15,
                                rtol=1e-14)
    # every stationary point of the profile lies below theta = 2 (mean - min) / min^2
    # (Grimshaw 1993, sec. 2); one unit of log(1 + t) beyond it keeps the top grid point
    # clear of the maximum
    low = float(np.min(y))
    # (a smallest exceedance below 1e-150 of the largest would overflow the bound)
    t_top = min(2.0 * (float(np.mean(y)) - low) / (low * low), 1e300) if low > 1e-150 \
        else 1e300
    grid = np.linspace(math.log1p(t_low), math.log1p(t_top) + 1.0, _GPD_GRID)
    losses = np.array([per_sample_loss(w) for w in grid])
    # interior minima of the grid, and its first point where the loss still falls towards it
    starts = list(np.flatnonzero((losses[1:-1] <= losses[:-2]) & (losses[1:-1] <= losses[2:]))
                  + 1)
    if losses[0] < losses[1]:
        starts.append(0)
    best_loss, best_w = 0.0, None  # the shape -1 corner
    for i in starts:
        found = optimize.minimize_scalar(per_sample_loss,
                                         bounds=(grid[max(i - 1, 0)], grid[i + 1]),
                                         method="bounded", options={"xatol": 1e-12})
        w, loss = (float(found.x), float(found.fun))
        if not loss <= losses[i]:
            w, loss = float(grid[i]), float(losses[i])
        if loss < best_loss:
            best_loss, best_w = loss, w
    if best_w is None:
        return -1.0, top
    t = math.expm1(best_w)
    if abs(t) < 1e-12:
        return 0.0, float(np.mean(x))
    shape = shape_of(t)
    return shape, shape / t * top


def tail_check(fit: dict, failures: int, n: int, confidence: float = 0.95) -> str:
    """Whether the model-based figures of :func:`tail_estimate` agree with the counted rate.

    Parameters
    ----------
    fit : dict
        A result of :func:`tail_estimate` (``normal_ppm``, ``tail_ppm`` [ppm]).
    failures, n : int
        Failures counted among the ``n`` samples the fit used [count].
    confidence : float, optional
        Two-sided level [1] of the counted rate's exact interval, default 0.95.

    Returns
    -------
    str
        ``"agrees with the count ..."`` when every figure lies inside the counted rate's
        Clopper-Pearson interval, else which figure lies above or below it: the model does
        not describe this margin's tail, and the count is the answer.
    """
    if n < 1:
        return "no samples counted"
    lo, hi = (1e6 * float(v) for v in clopper_pearson(failures, n, confidence))
    counted = (f"counted {100 * confidence:g} % interval {_ppm_text(lo)} .. {_ppm_text(hi)} "
               "ppm")
    off = []
    for key, label in (("normal_ppm", "normal_ppm"), ("tail_ppm", "tail_ppm")):
        v = fit.get(key)
        if v is None or not math.isfinite(v):
            continue
        if v > hi:
            off.append(f"{label} above")
        elif v < lo:
            off.append(f"{label} below")
    if not off:
        return f"agrees with the count ({counted})"
    return (f"{' and '.join(off)} the {counted}: the model does not describe this margin's "
            "tail; the count is the answer")


def _ppm_text(x: float) -> str:
    return f"{x:.3g}" if x < 1e4 else f"{x:,.0f}"


def tail_estimate(margin, confidence: float = 0.95, *, counted_failures: int = 0,
                  counted_passes: int = 0) -> dict:
    """Model-based failure probability of a margin metric, for rare failures.

    Parameters
    ----------
    margin : array_like, or a sequence of array_like
        Margin samples [any unit]: negative means failure (e.g. metric minus lower limit,
        scaled). NaN entries are dropped. A criterion with two limits gives one array per
        limit (the distance to each): the sides are fitted apart and their probabilities
        added, since the smaller of two distances is not normal even where the metric is.
    confidence : float, optional
        One-sided confidence level [1] of ``normal_ppm_upper``, default 0.95.
    counted_failures, counted_passes : int, optional
        Units outside every model [count]: a criterion's units without a finite value (a
        metric that is infinite, or undefined in a runaway) that fail or pass it. They enter
        as counted, the fits cover the others: ``p = (k + n p_fit) / (k + j + n)``.

    Returns
    -------
    dict
        ``normal_ppm`` [ppm]
            ``1e6 * Phi(-mean / std)`` from a normal fit (std with ddof = 1), per side.
        ``normal_ppm_upper`` [ppm]
            Upper confidence bound on ``normal_ppm`` allowing for the sampling error of mean
            and std (noncentral t), at ``confidence``; with two sides or counted units each
            part's bound is taken at ``1 - (1 - confidence) / parts`` and the bounds added
            (Bonferroni), the counted part's from Clopper-Pearson.
        ``tail_ppm`` [ppm]
            From a generalized Pareto fit (location fixed at the threshold) to the samples
            below the 5 % quantile ``u`` of the margin: ``1e6 * 0.05 * sf(u)`` of the fitted
            distribution of the distance below ``u``. A fitted shape below 0 ends the tail
            at a finite distance, which samples of a light tail also give (a normal's
            exceedances fit shapes near -0.2 and would put every failure beyond 4.7 sigma
            at 0); the shape is then taken as 0, the exponential tail with the mean
            exceedance as its scale, which reads such a tail conservatively. When ``u <=
            0`` the observed failure fraction is returned instead (no extrapolation
            needed). NaN with fewer than 50 samples.
        ``method`` : str
            How ``tail_ppm`` was obtained, or why it could not be.
        ``assumption`` : str
            One sentence stating the model assumption.
        ``n`` : int
            Finite samples used [count].
        ``counted_directly`` : int
            ``counted_failures`` [count]: failures counted, not modelled.

    Notes
    -----
    Every figure is an extrapolation beyond the data and only as good as the assumed
    distribution; an observed count with :func:`clopper_pearson` is the model-free answer.
    """
    confidence = _check_confidence(confidence)
    if isinstance(margin, (list, tuple)) and margin and np.ndim(margin[0]) == 1:
        sides = [np.asarray(m, dtype=float) for m in margin]
    else:
        sides = [np.asarray(margin, dtype=float)]
    k, j = int(counted_failures), int(counted_passes)
    if k < 0 or j < 0:
        raise ValueError(f"counted units must not be negative, got {k} and {j}")
    parts = len(sides) + (1 if k else 0)  # passes without a value only dilute the fit
    level = 1.0 - (1.0 - confidence) / parts  # Bonferroni (common practice, no source)
    fits = [_tail_one_side(side, level) for side in sides]
    out = dict(fits[0])
    n = out["n"]
    if len(fits) > 1:
        for key in ("normal_ppm", "normal_ppm_upper", "tail_ppm"):
            out[key] = float(sum(f[key] for f in fits))  # NaN in one side: NaN
        out["method"] = "; ".join(f"{label}: {f['method']}" for label, f in
                                  zip(("lower limit", "upper limit"), fits))
        if len({f["assumption"] for f in fits}) > 1:
            out["assumption"] = " ".join(dict.fromkeys(f["assumption"] for f in fits))
    out["counted_directly"] = k
    total = n + k + j
    if k + j and total:
        share = n / total
        for key in ("normal_ppm", "tail_ppm"):
            out[key] = (1e6 * k + n * out[key]) / total if n else 1e6 * k / total
        upper = (0.0 if k == 0 else
                 float(stats.beta.ppf(level, k + 1, total - k)) if k < total else 1.0)
        out["normal_ppm_upper"] = 1e6 * upper + share * out["normal_ppm_upper"] \
            if n else 1e6 * upper
        out["method"] += (f"; {k} failing and {j} passing units without a finite value "
                          "counted directly, the fit weighted by the other units' share")
    return out


def _tail_one_side(margin: np.ndarray, confidence: float) -> dict:
    """:func:`tail_estimate` of one one-sided margin."""
    data = _clean(margin)
    n = int(data.size)
    nan = math.nan
    out = {
        "normal_ppm": nan,
        "normal_ppm_upper": nan,
        "tail_ppm": nan,
        "method": "",
        "assumption": _ASSUMPTION_GPD,
        "n": n,
    }
    if n == 0:
        total = int(np.asarray(margin).size)
        out["method"] = ("no samples: nothing to estimate" if total == 0 else
                         f"no finite margin among {total} samples (infinite or not converged): "
                         "nothing to extrapolate; the counted rate is the answer")
        return out
    if n == 1:
        # one value says nothing about the spread: no model, only the count
        out["method"] = ("one finite margin: a spread needs at least two samples, so "
                         "nothing is fitted; the counted rate is the answer")
        out["assumption"] = "No model: one sample."
        return out
    mean, s = mean_std(data)
    if s == 0.0 or not math.isfinite(s):
        fail = 1e6 if mean < 0 else 0.0
        out.update(
            normal_ppm=fail,
            normal_ppm_upper=nan,
            tail_ppm=fail if n >= _TAIL_MIN_SAMPLES else nan,
            method=(
                "zero spread: every sample equals the mean, so the probability is 0 or 1 "
                "by inspection and no distribution can be fitted"
            ),
            assumption="No model: all samples are identical, so the fraction failing is "
            "read off directly.",
        )
        return out
    out["normal_ppm"] = 1e6 * float(stats.norm.sf(mean / s))
    out["normal_ppm_upper"] = _normal_upper_ppm(mean, s, n, confidence)

    if n < _TAIL_MIN_SAMPLES:
        out["method"] = (
            f"not fitted: {n} samples, a tail fit needs at least {_TAIL_MIN_SAMPLES}"
        )
        out["assumption"] = _ASSUMPTION_NORMAL
        return out
    threshold = float(np.quantile(data, _TAIL_FRACTION))
    if threshold <= 0.0:
        out["tail_ppm"] = 1e6 * float(np.mean(data < 0.0))
        out["method"] = (
            "empirical fraction: 0 lies at or above the 5 % quantile, so failures are "
            "observed directly and no extrapolation is needed"
        )
        out["assumption"] = _ASSUMPTION_NORMAL
        return out
    excess = threshold - data[data < threshold]
    if excess.size < 2 or float(np.ptp(excess)) == 0.0:
        out["method"] = (
            "not fitted: too few distinct samples below the 5 % quantile for a tail fit"
        )
        out["assumption"] = _ASSUMPTION_NORMAL
        return out
    shape, scale = gpd_fit(excess)
    if not (math.isfinite(shape) and math.isfinite(scale) and scale > 0):
        out["method"] = "not fitted: the generalized Pareto fit did not converge"
        out["assumption"] = _ASSUMPTION_NORMAL
        return out
    fitted = f"shape {shape:.3g}, scale {scale:.3g}"
    if shape > _TAIL_SHAPE_MAX:
        out["method"] = (
            f"not extrapolated: the generalized Pareto fit to the {excess.size} samples below "
            f"the 5 % quantile {threshold:.4g} has shape {shape:.3g}, above "
            f"{_TAIL_SHAPE_MAX:g}: a tail without finite variance, which a circuit's margin "
            "does not have (a few outlying units, not a tail to extend); the count is the "
            "answer")
        out["assumption"] = _ASSUMPTION_NORMAL
        return out
    if shape < 0.0:
        # a light tail cannot be told from one that ends by some hundred exceedances: the
        # exponential (shape 0, maximum-likelihood scale the mean exceedance) reads it
        # conservatively (common practice, no source)
        shape, scale = 0.0, float(np.mean(excess))
        fitted += f"; shape taken as 0, scale {scale:.3g}"
    sf = float(stats.genpareto.sf(threshold, shape, loc=0.0, scale=scale))
    out["tail_ppm"] = 1e6 * _TAIL_FRACTION * sf
    out["method"] = (
        f"generalized Pareto fit to the {excess.size} samples below the 5 % quantile "
        f"{threshold:.4g} ({fitted}), extrapolated to 0"
    )
    return out
