"""The small contract between the engine and the physics.

The engine samples :class:`Parameter` objects and hands a chunk of samples (a dict of 1-D arrays,
SI units) to a configured stage's ``evaluate``; the stage returns a dict of metric arrays plus a
boolean ``converged`` array. The engine never imports a concrete model: stages register
themselves with :func:`register_stage`, and :func:`get_stage` imports ``tolerance.models`` on
first use so that the registry is filled.

A stage class is built from the study by ``configure(reader)``: it reads its sections through
the :class:`tolerance.study.Reader`, which records every parameter it creates and every key it
consumes (so unknown keys are reported with a did-you-mean).
"""

from __future__ import annotations

import importlib
import math
from dataclasses import dataclass, field
from typing import Callable, Protocol

import numpy as np

from tolerance.distributions import Distribution


@dataclass(frozen=True)
class Parameter:
    """A named, sampled input of a stage.

    Parameters
    ----------
    name : str
        Dotted name used everywhere (samples, reports, ``--pin``), e.g. ``RB``, ``Q1.hfe``,
        ``supply.voltage``, ``ambient.temperature``.
    unit : str
        Unit of the SI value, as understood by :mod:`tolerance.units` (``ohm``, ``V``,
        ``temperature`` for kelvin values, ``1`` for dimensionless).
    distribution : Distribution
        How the value spreads between units.
    description : str
        One line for the parameter table.
    key : str
        Key path in the study file the parameter came from (for messages).
    drift : float
        End-of-life drift, relative [1]: worst-case analysis widens the tolerance bounds by it
        (initial tolerance plus ageing, ECSS-Q-HB-30-01A practice); the Monte Carlo run samples
        the initial spread.
    positive, minimum, maximum : bool, float or None
        The values the study file accepts for it (in its SI unit); a what-if pin or a value
        choice outside them is refused as the study file would refuse it.
    above, above_reason : float or None, str
        A value the parameter must exceed, and why (a supply above the saturation voltage,
        a gain above 1): the study file's own checks of the parts, applied to pins and
        value choices.
    """

    name: str
    unit: str
    distribution: Distribution
    description: str = ""
    key: str = ""
    drift: float = 0.0
    positive: bool = False
    minimum: float | None = None
    maximum: float | None = None
    above: float | None = None
    above_reason: str = ""

    def out_of_range(self, value: float) -> str | None:
        """Why ``value`` is not a value of this parameter, or None when it is one."""
        if not math.isfinite(value):
            return f"expected a finite value, got {value:g}"
        problem = range_problem(value, self.unit, self.positive, self.minimum, self.maximum)
        if problem is None and self.above is not None and not value > self.above:
            from tolerance.units import format_quantity

            problem = (f"must be above {format_quantity(self.above, self.unit, 6)} "
                       f"({self.above_reason}), got {format_quantity(value, self.unit, 6)}")
        return problem

    @property
    def nominal(self) -> float:
        return self.distribution.nominal

    @property
    def low(self) -> float:
        return self.distribution.low

    @property
    def high(self) -> float:
        return self.distribution.high

    @property
    def varies(self) -> bool:
        return self.distribution.varies


def range_problem(value: float, unit: str, positive: bool, minimum: float | None,
                  maximum: float | None) -> str | None:
    """Why ``value`` lies outside the accepted values of a quantity, or None; the figures in
    the quantity's own unit (a temperature in degC, as a study writes it, not in kelvin)."""
    from tolerance.units import UnitError, format_quantity

    def text(x: float) -> str:
        try:
            return format_quantity(x, unit, 6)
        except UnitError:
            return f"{x:g} ({unit})"

    if positive and not value > 0:
        return f"must be positive, got {text(value)}"
    if minimum is not None and value < minimum:
        return f"must be at least {text(minimum)}, got {text(value)}"
    if maximum is not None and value > maximum:
        return f"must be at most {text(maximum)}, got {text(value)}"
    return None


@dataclass(frozen=True)
class MetricInfo:
    """Unit and meaning of a metric; the nomenclature table of every report reads these."""

    unit: str
    description: str
    #: the values name something (a part's index), not a quantity: no worst case or band
    index: bool = False


@dataclass(frozen=True)
class Criterion:
    """A pass/fail test of one metric: pass when ``minimum <= value <= maximum``.

    ``source`` says where it came from: ``study`` (the [limits] table), ``stage`` (a default the
    stage always applies, e.g. the saturation criterion) or ``rating`` (a part's rating).
    """

    name: str
    metric: str
    minimum: float | None = None
    maximum: float | None = None
    source: str = "study"
    description: str = ""

    def passes(self, values: np.ndarray) -> np.ndarray:
        ok = np.isfinite(values)
        if self.minimum is not None:
            ok &= values >= self.minimum
        if self.maximum is not None:
            ok &= values <= self.maximum
        return ok

    def limit_text(self, fmt: Callable[[float], str] = lambda x: f"{x:.4g}") -> str:
        parts = []
        if self.minimum is not None:
            parts.append(f">= {fmt(self.minimum)}")
        if self.maximum is not None:
            parts.append(f"<= {fmt(self.maximum)}")
        return " and ".join(parts)


class ConfiguredStage(Protocol):
    """A stage bound to one study: its parameters, metrics and default criteria."""

    name: str
    parameters: list[Parameter]
    metrics: dict[str, MetricInfo]
    criteria: list[Criterion]

    def evaluate(self, samples: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        """Evaluate every metric for a chunk of samples (vectorized).

        Returns a dict with one float array per metric named in ``metrics`` (NaN where the
        solver failed) and a boolean array ``converged``.
        """
        ...


@dataclass
class StageEntry:
    name: str
    configure: Callable  # (reader) -> ConfiguredStage
    description: str
    parts: tuple[str, ...] = field(default_factory=tuple)


_REGISTRY: dict[str, StageEntry] = {}


def register_stage(name: str, description: str, parts: tuple[str, ...] = ()):
    """Class or function decorator: register ``configure(reader)`` under ``name``."""

    def wrap(configure):
        _REGISTRY[name] = StageEntry(name, configure, description, tuple(parts))
        return configure

    return wrap


def _load_models() -> None:
    importlib.import_module("tolerance.models")


def stage_names() -> list[str]:
    _load_models()
    return sorted(_REGISTRY)


def get_stage(name: str) -> StageEntry | None:
    _load_models()
    return _REGISTRY.get(name)
