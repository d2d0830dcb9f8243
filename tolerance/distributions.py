"""Distributions of toleranced quantities.

Each distribution maps uniform numbers on (0, 1) to values through its inverse CDF (``ppf``), so
every sampler (plain random, Latin hypercube, Sobol) and the Gaussian copula work on the same
uniform design. Each also states a ``nominal`` value and the ``low``/``high`` bounds that worst-case
analysis uses as the tolerance limits.

Temperature coefficients are not applied here; the models apply them at each sample's temperature.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

#: smallest distance of a uniform number from 0 or 1 before an unbounded inverse CDF is taken
UNIFORM_EPS = 1e-12


def _clip(u: np.ndarray) -> np.ndarray:
    return np.clip(u, UNIFORM_EPS, 1.0 - UNIFORM_EPS)


@dataclass(frozen=True)
class Distribution:
    """Base class: a one-dimensional distribution with tolerance bounds."""

    kind = "abstract"

    @property
    def nominal(self) -> float:  # pragma: no cover - overridden by every subclass
        raise AttributeError("nominal")

    @property
    def low(self) -> float:  # pragma: no cover - overridden
        raise AttributeError("low")

    @property
    def high(self) -> float:  # pragma: no cover - overridden
        raise AttributeError("high")

    @property
    def varies(self) -> bool:
        """True when the distribution has any spread."""
        return self.high > self.low

    def ppf(self, u: np.ndarray) -> np.ndarray:  # pragma: no cover - overridden
        raise AttributeError("ppf")

    def cdf(self, x: np.ndarray) -> np.ndarray:  # pragma: no cover - overridden
        raise AttributeError("cdf")

    def cdf_below(self, x: np.ndarray) -> np.ndarray:
        """P(X < x): the CDF less the probability of ``x`` itself, which only a discrete set
        gives a value."""
        return self.cdf(x)

    @property
    def support(self) -> tuple[float, float]:
        """The smallest and largest value a unit can take (infinite for an unbounded
        spread): a what-if pin there stands for the end of the spread."""
        return (-np.inf, np.inf)

    def describe(self) -> str:  # pragma: no cover - overridden
        raise AttributeError("describe")


@dataclass(frozen=True)
class Fixed(Distribution):
    """No spread: every sample takes ``value``."""

    value: float
    kind = "fixed"

    @property
    def nominal(self) -> float:
        return self.value

    @property
    def low(self) -> float:
        return self.value

    @property
    def high(self) -> float:
        return self.value

    def ppf(self, u):
        return np.full(np.shape(u), self.value, dtype=float)

    def cdf(self, x):
        return (np.asarray(x, dtype=float) >= self.value).astype(float)

    @property
    def support(self) -> tuple[float, float]:
        return (self.value, self.value)

    def describe(self) -> str:
        return "fixed"


@dataclass(frozen=True)
class Uniform(Distribution):
    """Uniform between ``lower`` and ``upper``; the nominal is the given centre value."""

    lower: float
    upper: float
    center: float | None = None
    kind = "uniform"

    @property
    def nominal(self) -> float:
        return 0.5 * (self.lower + self.upper) if self.center is None else self.center

    @property
    def low(self) -> float:
        return self.lower

    @property
    def high(self) -> float:
        return self.upper

    def ppf(self, u):
        return self.lower + (self.upper - self.lower) * np.asarray(u, dtype=float)

    def cdf(self, x):
        span = self.upper - self.lower
        return np.clip((np.asarray(x, dtype=float) - self.lower) / span, 0.0, 1.0)

    @property
    def support(self) -> tuple[float, float]:
        return (self.lower, self.upper)

    def describe(self) -> str:
        return "uniform"


@dataclass(frozen=True)
class Normal(Distribution):
    """Normal with the tolerance at ``sigmas`` standard deviations (default 3).

    ``low``/``high`` are mean -/+ sigmas * sigma: the tolerance limits, used by worst-case analysis.
    Samples are not truncated; about 0.27 % of them fall outside +-3 sigma.
    """

    mean: float
    sigma: float
    sigmas: float = 3.0
    kind = "normal"

    @property
    def nominal(self) -> float:
        return self.mean

    @property
    def low(self) -> float:
        return self.mean - self.sigmas * self.sigma

    @property
    def high(self) -> float:
        return self.mean + self.sigmas * self.sigma

    def ppf(self, u):
        return self.mean + self.sigma * special.ndtri(_clip(np.asarray(u, dtype=float)))

    def cdf(self, x):
        return special.ndtr((np.asarray(x, dtype=float) - self.mean) / self.sigma)

    def describe(self) -> str:
        return f"normal, tolerance at {self.sigmas:g} sigma"


@dataclass(frozen=True)
class TruncatedNormal(Distribution):
    """Normal with the tolerance at ``sigmas`` sigma, truncated to ``[lower, upper]``.

    Models parts screened at production test: nothing outside the tolerance is shipped.
    """

    mean: float
    sigma: float
    lower: float
    upper: float
    sigmas: float = 3.0
    kind = "truncnormal"
    _frozen: object = field(default=None, init=False, repr=False, compare=False)

    def __post_init__(self):
        # imported here: scipy.stats takes about half a second to import, which every worker
        # process would pay on start even for studies without a truncated normal
        from scipy import stats

        a = (self.lower - self.mean) / self.sigma
        b = (self.upper - self.mean) / self.sigma
        object.__setattr__(
            self, "_frozen", stats.truncnorm(a, b, loc=self.mean, scale=self.sigma)
        )

    @property
    def nominal(self) -> float:
        return self.mean

    @property
    def low(self) -> float:
        return self.lower

    @property
    def high(self) -> float:
        return self.upper

    def ppf(self, u):
        return self._frozen.ppf(np.asarray(u, dtype=float))

    def cdf(self, x):
        return self._frozen.cdf(np.asarray(x, dtype=float))

    @property
    def support(self) -> tuple[float, float]:
        return (self.lower, self.upper)

    def describe(self) -> str:
        return f"normal at {self.sigmas:g} sigma, truncated at the tolerance"


def _split_ppf(centre, sigma_low, sigma_high, u):
    """Inverse CDF of a two-piece normal: below the centre the spread ``sigma_low``, above it
    ``sigma_high``, half the probability on each side."""
    z = special.ndtri(_clip(np.asarray(u, dtype=float)))
    return centre + np.where(z < 0, sigma_low, sigma_high) * z


def _split_cdf(centre, sigma_low, sigma_high, x):
    d = np.asarray(x, dtype=float) - centre
    # a side without spread (the typical value at a limit) is a step there
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(d == 0, 0.0, d / np.where(d < 0, sigma_low, sigma_high))
    return special.ndtr(z)


@dataclass(frozen=True)
class SplitNormal(Distribution):
    """Normal about a typical value with a spread of its own on each side, so that the
    minimum and the maximum both sit at ``sigmas`` sigma (a two-piece normal: half the
    probability on each side of ``centre``, which is its median and mode).

    A range with a typical value off its middle (``{min, max, typ}``) is not symmetric; one
    spread for both sides put one limit at fewer than ``sigmas`` sigma and moved the
    worst-case bounds beyond the stated limit.
    """

    centre: float
    sigma_low: float
    sigma_high: float
    sigmas: float = 3.0
    kind = "normal"

    @property
    def nominal(self) -> float:
        return self.centre

    @property
    def low(self) -> float:
        return self.centre - self.sigmas * self.sigma_low

    @property
    def high(self) -> float:
        return self.centre + self.sigmas * self.sigma_high

    def ppf(self, u):
        return _split_ppf(self.centre, self.sigma_low, self.sigma_high, u)

    def cdf(self, x):
        return _split_cdf(self.centre, self.sigma_low, self.sigma_high, x)

    @property
    def support(self) -> tuple[float, float]:
        # a side without spread (the typical value at a limit) ends at the typical value,
        # where half the units sit
        return (self.centre if self.sigma_low == 0 else -np.inf,
                self.centre if self.sigma_high == 0 else np.inf)

    def describe(self) -> str:
        return f"normal about the typical value, min and max each at {self.sigmas:g} sigma"


@dataclass(frozen=True)
class TruncatedSplitNormal(Distribution):
    """:class:`SplitNormal` cut at ``[lower, upper]``: a screened part whose typical value
    lies off the middle of its limits, each side with the spread that puts its limit at
    ``sigmas`` sigma, so that the cut removes as much on each side (0.135 % at 3 sigma)
    and half the units stay below the typical value. One spread for both sides, the
    larger, put the nearer limit at 1.2 sigma of a gain of 40 .. 100 .. 250 and shifted
    the median to 107."""

    centre: float
    sigma_low: float
    sigma_high: float
    lower: float
    upper: float
    sigmas: float = 3.0
    kind = "truncnormal"

    @property
    def nominal(self) -> float:
        return self.centre

    @property
    def low(self) -> float:
        return self.lower

    @property
    def high(self) -> float:
        return self.upper

    def _cut(self) -> tuple[float, float]:
        return (float(_split_cdf(self.centre, self.sigma_low, self.sigma_high, self.lower)),
                float(_split_cdf(self.centre, self.sigma_low, self.sigma_high, self.upper)))

    def ppf(self, u):
        a, b = self._cut()
        x = _split_ppf(self.centre, self.sigma_low, self.sigma_high,
                       a + (b - a) * np.asarray(u, dtype=float))
        return np.clip(x, self.lower, self.upper)

    def cdf(self, x):
        a, b = self._cut()
        f = _split_cdf(self.centre, self.sigma_low, self.sigma_high, x)
        return np.clip((f - a) / (b - a), 0.0, 1.0)

    @property
    def support(self) -> tuple[float, float]:
        return (self.lower, self.upper)

    def describe(self) -> str:
        return (f"normal about the typical value, min and max each at {self.sigmas:g} sigma, "
                "truncated at them")


@dataclass(frozen=True)
class LogNormal(Distribution):
    """Lognormal between a minimum and a maximum placed at -/+ ``sigmas`` sigma of ln(x).

    The usual description of current gain between a datasheet's minimum and maximum: the
    median is the geometric mean sqrt(min * max) unless a typical value is given, in which case
    the median is the typical value and each side of it has the spread that puts its own limit
    at ``sigmas`` sigma of ln(x) (a two-piece lognormal: half the units below the typical
    value, as many below the minimum as above the maximum, 0.135 % each at 3 sigma).
    """

    lower: float
    upper: float
    typical: float | None = None
    sigmas: float = 3.0
    kind = "lognormal"

    @property
    def median(self) -> float:
        if self.typical is not None:
            return self.typical
        return float(np.sqrt(self.lower * self.upper))

    @property
    def sigma_low_ln(self) -> float:
        """Spread of ln(x) below the median."""
        return float((np.log(self.median) - np.log(self.lower)) / self.sigmas)

    @property
    def sigma_high_ln(self) -> float:
        """Spread of ln(x) above the median."""
        return float((np.log(self.upper) - np.log(self.median)) / self.sigmas)

    @property
    def nominal(self) -> float:
        return self.median

    @property
    def low(self) -> float:
        return self.lower

    @property
    def high(self) -> float:
        return self.upper

    def ppf(self, u):
        return np.exp(_split_ppf(np.log(self.median), self.sigma_low_ln, self.sigma_high_ln, u))

    def cdf(self, x):
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore"):
            return _split_cdf(np.log(self.median), self.sigma_low_ln, self.sigma_high_ln,
                              np.log(np.maximum(x, 0.0)))

    @property
    def support(self) -> tuple[float, float]:
        # as SplitNormal: a typical value at a limit ends the spread there
        return (self.lower if self.sigma_low_ln == 0 else 0.0,
                self.upper if self.sigma_high_ln == 0 else np.inf)

    def describe(self) -> str:
        return f"lognormal, min/max at {self.sigmas:g} sigma"


@dataclass(frozen=True)
class ScreenedLogNormal(Distribution):
    """A part's :class:`LogNormal` population (``lower`` .. ``upper`` at -/+ ``sigmas``
    sigma of ln(x), median ``typical``) cut at a screen's limits ``cut_low`` .. ``cut_high``:
    the units of that population the screen passes, in their proportions (a gain screened
    from a 40 .. 250 class to 50 .. 250 keeps the class's median of 100 where a fresh
    lognormal over 50 .. 250 put it at 112)."""

    lower: float
    upper: float
    typical: float | None
    cut_low: float
    cut_high: float
    sigmas: float = 3.0
    kind = "lognormal"

    @property
    def population(self) -> LogNormal:
        return LogNormal(self.lower, self.upper, self.typical, self.sigmas)

    def _cut(self) -> tuple[float, float]:
        pop = self.population
        return float(pop.cdf(np.array(self.cut_low))), float(pop.cdf(np.array(self.cut_high)))

    @property
    def nominal(self) -> float:
        """The median of the screened units."""
        return float(self.ppf(np.array(0.5)))

    @property
    def low(self) -> float:
        return self.cut_low

    @property
    def high(self) -> float:
        return self.cut_high

    def ppf(self, u):
        a, b = self._cut()
        x = self.population.ppf(a + (b - a) * np.asarray(u, dtype=float))
        return np.clip(x, self.cut_low, self.cut_high)

    def cdf(self, x):
        a, b = self._cut()
        return np.clip((self.population.cdf(x) - a) / (b - a), 0.0, 1.0)

    @property
    def support(self) -> tuple[float, float]:
        return (self.cut_low, self.cut_high)

    def describe(self) -> str:
        pop = self.population
        return (f"lognormal of the part ({pop.lower:g} .. {pop.upper:g} at {self.sigmas:g} "
                f"sigma, median {pop.median:g}), screened to its limits")


@dataclass(frozen=True)
class Discrete(Distribution):
    """A finite set of values with weights (corners, temperature profiles, bins), kept in
    ascending order of value: the inverse CDF then maps low uniform numbers to low values,
    as the CDF and the copula's scores assume (values listed out of order gave a pinned
    value's partners the conditional of another value's stratum, in the other direction)."""

    values: tuple[float, ...]
    weights: tuple[float, ...]
    kind = "discrete"

    def __post_init__(self):
        order = sorted(range(len(self.values)), key=lambda k: self.values[k])
        object.__setattr__(self, "values", tuple(self.values[k] for k in order))
        weights = [float(self.weights[k]) for k in order]
        if not math.isfinite(sum(weights)):
            # weights of 1e308 each overflowed their sum: every share read 0 and every unit
            # was drawn at the last member; only their ratios matter
            top = max(weights)
            weights = [w / top for w in weights]
        object.__setattr__(self, "weights", tuple(weights))

    @property
    def nominal(self) -> float:
        """The most likely value; of several equally likely ones the middle one in size (the
        lower middle of an even count), not the first listed: -20, 25 and 55 degC at equal
        weights have 25 degC as their nominal."""
        w = np.asarray(self.weights, dtype=float)
        tied = np.sort(np.asarray(self.values, dtype=float)[w == w.max()])
        return float(tied[(len(tied) - 1) // 2])

    @property
    def low(self) -> float:
        return float(min(self.values))

    @property
    def high(self) -> float:
        return float(max(self.values))

    @property
    def shares(self) -> tuple[float, ...]:
        """Each member's probability (the weights over their sum)."""
        w = np.asarray(self.weights, dtype=float)
        return tuple(float(x) for x in w / np.sum(w))

    @property
    def support(self) -> tuple[float, float]:
        return (self.low, self.high)

    def member(self, x: float) -> float | None:
        """The member ``x`` stands for (equal to within rounding of its unit's conversion,
        1e-9 relative), or None when ``x`` is no member of the set."""
        v = np.asarray(self.values, dtype=float)
        near = np.flatnonzero(np.isclose(v, x, rtol=1e-9, atol=0.0))
        return float(v[near[0]]) if near.size else None

    def ppf(self, u):
        """The smallest member whose CDF reaches ``u`` (the generalized inverse
        inf{x: F(x) >= u}, as scipy.stats.rv_discrete.ppf and numpy.quantile's
        ``inverted_cdf``): a ``u`` on a step edge takes the member below it, so that the
        median of two equally likely members is the lower one. (The upper one was taken
        there, ``searchsorted(side="right")``; draws at any other ``u`` are unchanged.)"""
        w = np.asarray(self.weights, dtype=float)
        edges = np.cumsum(w) / np.sum(w)
        idx = np.searchsorted(edges, np.asarray(u, dtype=float), side="left")
        return np.asarray(self.values, dtype=float)[np.minimum(idx, len(self.values) - 1)]

    def cdf(self, x):
        x = np.asarray(x, dtype=float)
        w = np.asarray(self.weights, dtype=float) / np.sum(self.weights)
        v = np.asarray(self.values, dtype=float)
        return np.sum(w * (x[..., None] >= v), axis=-1)

    def cdf_below(self, x):
        x = np.asarray(x, dtype=float)
        w = np.asarray(self.weights, dtype=float) / np.sum(self.weights)
        v = np.asarray(self.values, dtype=float)
        return np.sum(w * (x[..., None] > v), axis=-1)

    def describe(self) -> str:
        return f"discrete set of {len(self.values)}"


DISTRIBUTION_KINDS = ("fixed", "uniform", "normal", "truncnormal", "lognormal", "discrete")
