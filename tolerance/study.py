"""Study files: TOML to a validated, immutable :class:`Study`.

A study file is data only (stdlib ``tomllib``; nothing is evaluated). The engine reads the
top-level keys it owns (``stage``, ``title``, ``description``, ``[run]``, ``[limits]``,
``[[correlation]]``); the stage reads everything else through a :class:`Reader`, which turns
toleranced quantities into :class:`~tolerance.protocol.Parameter` objects and remembers every key
it consumed, so that any key nobody read is reported as unknown, with a did-you-mean.

Every error is a :class:`StudyError` naming the file, the key path and what was expected.
"""

from __future__ import annotations

import difflib
import hashlib
import inspect
import itertools
import math
import re
import tomllib
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from tolerance import distributions as dist
from tolerance.protocol import (ConfiguredStage, Criterion, Parameter, get_stage, range_problem,
                                stage_names)
from tolerance.units import UnitError, format_quantity, parse_quantity

SAMPLERS = ("random", "lhs", "sobol")
_MISSING = object()


class StudyError(ValueError):
    """Bad input: the message names the file, the key path and what was expected."""

    def __init__(self, file: str, key: str, message: str):
        self.file = file
        self.key = key
        self.message = message
        super().__init__(f"{file}: {key}: {message}" if key else f"{file}: {message}")


def _did_you_mean(word: str, candidates) -> str:
    close = difflib.get_close_matches(word, list(candidates), n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""


def parameter_hint(word: str, names) -> str:
    """"; did you mean 'Q1.hfe'?" for a parameter name typed without its part or misspelt.

    Case is ignored. A name that is the last part of exactly one parameter's name (``hfe``
    for ``Q1.hfe``) points to that parameter (to each, where several end so); otherwise the
    closest spelling, if any.
    """
    names = list(names)
    lowered = word.lower()
    for candidates in ([n for n in names if n.lower() == lowered],
                       [n for n in names if n.lower().endswith("." + lowered)]):
        if len(candidates) == 1:
            return f"; did you mean '{candidates[0]}'?"
        if candidates:
            return f"; did you mean one of {', '.join(repr(c) for c in candidates)}?"
    close = difflib.get_close_matches(lowered, [n.lower() for n in names], n=1, cutoff=0.6)
    return f"; did you mean '{names[[n.lower() for n in names].index(close[0])]}'?" if close else ""


#: names a base-emitter (pull-down) resistor goes by in the stages
_BASE_EMITTER_NAMES = ("RPD", "RBE1", "RBE2")


def _part_role_hint(key: str, roles: set, stage_name: str) -> str | None:
    """For a base-emitter resistor named as in another stage (``RBE1`` on the single stage,
    ``RPD`` on a pair) or a transistor the stage does not have (``Q2`` on the single
    stage), the names this stage uses; None otherwise."""
    if re.fullmatch(r"[Qq]\d+", key):
        have = sorted(r for r in roles if re.fullmatch(r"Q\d+", r))
        if have and key not in have:
            return (f"; the {stage_name} stage's transistor"
                    + ("s are " if len(have) > 1 else " is ")
                    + " and ".join(f"'{n}'" for n in have))
        return None
    if key.upper() not in _BASE_EMITTER_NAMES + ("RBE",):
        return None
    names = [n for n in _BASE_EMITTER_NAMES if n in roles]
    if not names or key in names:
        return None
    return (f"; the {stage_name} stage's base-emitter resistor"
            + ("s are " if len(names) > 1 else " is ")
            + " and ".join(f"'{n}'" for n in names))


def _shown(x: float, unit: str) -> str:
    """A value in its unit as a study writes it (a temperature in degC, not kelvin)."""
    try:
        return format_quantity(x, unit, 6)
    except UnitError:
        return f"{x:g}"


def _type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a true/false value"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, (int, float)):
        return "a number"
    return "a string"


@dataclass
class _Context:
    file: str
    parameters: dict[str, Parameter] = field(default_factory=dict)
    readers: list["Reader"] = field(default_factory=list)


class Reader:
    """Reads one table of a study file, recording what it consumed.

    Parameters
    ----------
    data : dict
        The table.
    path : str
        Its key path ('' for the top level).
    context : _Context
        Shared state: the file name and the parameters created so far.
    """

    def __init__(self, data: dict, path: str, context: _Context, exists: bool = True):
        self._data = data
        self.path = path
        self._ctx = context
        self._used: set[str] = set()
        # every key asked for, present or not: the keys an unknown key may be a misspelling of
        self._asked: set[str] = set()
        self.exists = exists
        context.readers.append(self)

    # -- helpers ---------------------------------------------------------------------------
    @property
    def file(self) -> str:
        return self._ctx.file

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def error(self, name: str | None, message: str) -> StudyError:
        return StudyError(self.file, self.key(name) if name else self.path, message)

    def has(self, name: str) -> bool:
        self._asked.add(name)
        return name in self._data

    def keys(self) -> list[str]:
        return list(self._data)

    def _get(self, name: str, default):
        self._asked.add(name)
        if name in self._data:
            self._used.add(name)
            return self._data[name]
        if default is _MISSING:
            raise self.error(name, "is required but missing")
        return default

    def ignore(self, name: str) -> None:
        """Mark a key as consumed without reading it (it is read elsewhere)."""
        self._used.add(name)

    # -- plain values ----------------------------------------------------------------------
    def table(self, name: str, required: bool = False) -> "Reader":
        self._asked.add(name)
        if name not in self._data:
            if required:
                raise self.error(name, "is required but missing; expected a table")
            return Reader({}, self.key(name), self._ctx, exists=False)
        value = self._get(name, _MISSING)
        if not isinstance(value, dict):
            raise self.error(name, f"expected a table, got {_type_name(value)}")
        return Reader(value, self.key(name), self._ctx)

    def string(self, name: str, default=_MISSING, choices=None) -> str:
        value = self._get(name, default)
        if value is default and default is not _MISSING:
            return value
        if not isinstance(value, str):
            raise self.error(name, f"expected a string, got {_type_name(value)}")
        if choices is not None and value not in choices:
            raise self.error(
                name,
                f"'{value}' is not one of {', '.join(map(str, choices))}"
                + _did_you_mean(value, choices),
            )
        return value

    def boolean(self, name: str, default=_MISSING) -> bool:
        value = self._get(name, default)
        if not isinstance(value, bool):
            raise self.error(name, f"expected true or false, got {_type_name(value)}")
        return value

    def integer(self, name: str, default=_MISSING, minimum: int | None = None,
                maximum: int | None = None) -> int:
        value = self._get(name, default)
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            else:
                raise self.error(name, f"expected a whole number, got {value!r}")
        if minimum is not None and value < minimum:
            raise self.error(name, f"must be at least {minimum}, got {value}")
        if maximum is not None and value > maximum:
            raise self.error(name, f"must be at most {maximum}, got {value}")
        return value

    def _convert(self, name: str, raw, unit: str) -> float:
        if isinstance(raw, (dict, list)):
            raise self.error(name, f"expected a single quantity, got {_type_name(raw)}")
        try:
            return parse_quantity(raw, unit)
        except UnitError as exc:
            raise self.error(name, str(exc)) from None

    def _check_range(self, name: str, value: float, unit: str, positive: bool,
                     minimum: float | None, maximum: float | None) -> None:
        problem = range_problem(value, unit, positive, minimum, maximum)
        if problem:
            raise self.error(name, problem)

    def quantity(self, name: str, unit: str, default=_MISSING, positive: bool = False,
                 minimum: float | None = None, maximum: float | None = None) -> float:
        """A fixed quantity (no spread) in SI units."""
        raw = self._get(name, default)
        if raw is default and default is not _MISSING:
            return raw
        value = self._convert(name, raw, unit)
        self._check_range(name, value, unit, positive, minimum, maximum)
        return value

    def optional_quantity(self, name: str, unit: str, **kw) -> float | None:
        return self.quantity(name, unit, default=None, **kw) if self.has(name) else None

    # -- toleranced values -----------------------------------------------------------------
    def parameter(self, name: str, unit: str, parameter_name: str, description: str = "",
                  default=_MISSING, positive: bool = False, minimum: float | None = None,
                  maximum: float | None = None, default_distribution: str = "normal",
                  allow_tolerance_key: bool = False,
                  range_distribution: str = "uniform") -> Parameter:
        """A toleranced quantity, registered as a sampled parameter.

        Accepted forms of the value at ``name``:

        - a single quantity: fixed (``"4k7"``, ``12``, ``"3.3 V"``);
        - ``{nominal = ..., tolerance = "5%" | "0.2 V", distribution = ..., sigmas = 3}``;
        - ``{min = ..., max = ..., typ = ..., distribution = ...}`` (default uniform;
          ``lognormal`` places min and max at -/+ ``sigmas`` sigma of the logarithm);
        - ``{values = [...], weights = [...]}``: a discrete set.

        With ``allow_tolerance_key`` the sibling keys ``tolerance``, ``distribution`` and
        ``sigmas`` of the enclosing table apply to a single quantity (the parts form
        ``[parts.RB] value = "4k7"  tolerance = "1%"``). ``range_distribution`` is the
        ``{min, max}`` form's distribution when the table names none (a leakage current's
        is lognormal, as the part library draws it).
        """
        key = self.key(name)
        self._asked.add(name)
        if name not in self._data and default is not _MISSING:
            raw = default
        else:
            raw = self._get(name, _MISSING)
        drift = 0.0
        if allow_tolerance_key and self.has("drift"):
            drift = self._drift(self, "drift")
        if isinstance(raw, dict) and "drift" in raw:
            # read by its own reader over the same table: the table's keys count as one
            drift = self._drift(Reader(raw, key, self._ctx), "drift")
        if drift and unit == "temperature":
            raise StudyError(self.file, f"{key}.drift", "a temperature does not age; its "
                                                        "range is given directly")
        if drift and isinstance(raw, dict) and "values" in raw:
            # a set's members are the values units take; aged ones belong in the set (a
            # drift made the set a range, and the worst case searched between members)
            raise StudyError(self.file, f"{key}.drift", "a discrete set lists the values "
                                                        "units take; put aged values in the "
                                                        "set itself")
        if allow_tolerance_key and not isinstance(raw, dict) and (
            self.has("tolerance") or self.has("distribution") or self.has("sigmas")
        ):
            spec = {name: raw}
            for extra in ("tolerance", "distribution", "sigmas"):
                if self.has(extra):
                    spec[extra] = self._get(extra, _MISSING)
            sub = Reader(spec, self.path, self._ctx)
            distribution = sub._distribution(unit, positive, minimum, maximum,
                                             default_distribution, name, range_distribution)
        elif isinstance(raw, dict):
            sub = Reader(raw, key, self._ctx)
            distribution = sub._distribution(unit, positive, minimum, maximum,
                                             default_distribution, None, range_distribution)
        else:
            value = self._convert(name, raw, unit)
            self._check_range(name, value, unit, positive, minimum, maximum)
            distribution = dist.Fixed(value)
        if parameter_name in self._ctx.parameters:
            raise self.error(name, f"defines parameter '{parameter_name}' a second time")
        param = Parameter(parameter_name, unit, distribution, description, key, drift,
                          positive, minimum, maximum)
        self._ctx.parameters[parameter_name] = param
        return param

    @staticmethod
    def _drift(reader: "Reader", name: str) -> float:
        """End-of-life drift: a relative figure such as 1% or 0.01 (below 50 %)."""
        return reader.quantity(name, "1", minimum=0.0, maximum=0.5)

    def _distribution(self, unit, positive, minimum, maximum, default_distribution,
                      nominal_key, range_distribution: str = "uniform") -> dist.Distribution:
        """Build a distribution from this (inline) table."""
        nkey = nominal_key or "nominal"
        kinds = dist.DISTRIBUTION_KINDS
        if self.has("values"):
            raw = self._get("values", _MISSING)
            if not isinstance(raw, list) or not raw:
                raise self.error("values", "expected a non-empty list of quantities")
            values = tuple(self._convert(f"values[{i}]", v, unit) for i, v in enumerate(raw))
            for i, v in enumerate(values):
                self._check_range(f"values[{i}]", v, unit, positive, minimum, maximum)
            if self.has("weights"):
                wraw = self._get("weights", _MISSING)
                if not isinstance(wraw, list) or len(wraw) != len(values):
                    raise self.error("weights", f"expected a list of {len(values)} numbers")
                weights = []
                for i, w in enumerate(wraw):
                    if isinstance(w, bool) or not isinstance(w, (int, float)) or not (
                        math.isfinite(w) and w > 0
                    ):
                        raise self.error(f"weights[{i}]", f"expected a positive number, got {w!r}")
                    weights.append(float(w))
            else:
                weights = [1.0] * len(values)
            self.string("distribution", default="discrete", choices=("discrete",))
            return dist.Discrete(values, tuple(weights))

        kind = self.string("distribution", default=None, choices=kinds)
        sigmas = 3.0
        if self.has("sigmas"):
            raw = self._get("sigmas", _MISSING)
            if isinstance(raw, bool) or not isinstance(raw, (int, float)) or not (
                math.isfinite(raw) and 0.5 <= raw <= 10
            ):
                raise self.error("sigmas", f"expected a number between 0.5 and 10, got {raw!r}")
            sigmas = float(raw)

        has_range = self.has("min") or self.has("max")
        has_nominal = self.has(nkey)
        if has_range and (has_nominal and self.has("tolerance")):
            raise self.error(None, "give either min/max or nominal with tolerance, not both")
        if has_range:
            if not (self.has("min") and self.has("max")):
                missing = "max" if self.has("min") else "min"
                raise self.error(missing, "is required with the other bound")
            lo = self.quantity("min", unit)
            hi = self.quantity("max", unit)
            self._check_range("min", lo, unit, positive, minimum, maximum)
            self._check_range("max", hi, unit, positive, minimum, maximum)
            if lo > hi:
                raise self.error("min", f"min ({_shown(lo, unit)}) is above max "
                                        f"({_shown(hi, unit)})")
            if self.has("typ") and self.has("nominal"):
                raise self.error("nominal", "give typ or nominal, not both (they mean the same "
                                            "here)")
            typ = None
            for tkey in ("typ", "nominal"):
                if self.has(tkey):
                    typ = self.quantity(tkey, unit)
                    if not lo <= typ <= hi:
                        raise self.error(tkey, f"{_shown(typ, unit)} lies outside min..max "
                                               f"({_shown(lo, unit)} .. {_shown(hi, unit)})")
            kind = kind or range_distribution
            self._check_sigmas_used(kind)
            if lo == hi or kind == "fixed":
                return dist.Fixed(typ if typ is not None else 0.5 * (lo + hi))
            if kind == "uniform":
                return dist.Uniform(lo, hi, typ)
            if kind == "lognormal":
                if lo <= 0:
                    raise self.error("min", "a lognormal needs a positive minimum")
                return dist.LogNormal(lo, hi, typ, sigmas)
            centre = typ if typ is not None else 0.5 * (lo + hi)
            sigma = max(centre - lo, hi - centre) / sigmas
            if kind == "normal":
                low_sigma = (centre - lo) / sigmas if typ is not None else sigma
                self._check_normal_tail("min", centre, low_sigma, unit, positive, minimum)
                if typ is not None and centre - lo != hi - centre:
                    # each side its own spread: both limits at `sigmas` sigma, as stated
                    return dist.SplitNormal(centre, (centre - lo) / sigmas,
                                            (hi - centre) / sigmas, sigmas)
                return dist.Normal(centre, sigma, sigmas)
            if kind == "truncnormal":
                if typ is not None and centre - lo != hi - centre:
                    return dist.TruncatedSplitNormal(centre, (centre - lo) / sigmas,
                                                     (hi - centre) / sigmas, lo, hi, sigmas)
                return dist.TruncatedNormal(centre, sigma, lo, hi, sigmas)
            raise self.error("distribution", f"'{kind}' needs a list of values")

        if not has_nominal:
            raise self.error(None, f"expected '{nkey}' (with 'tolerance'), 'min' and 'max', "
                                   "or 'values'")
        nominal = self.quantity(nkey, unit)
        self._check_range(nkey, nominal, unit, positive, minimum, maximum)
        if not self.has("tolerance"):
            if kind not in (None, "fixed"):
                raise self.error("tolerance", f"is required for a {kind} distribution")
            return dist.Fixed(nominal)
        if kind == "fixed":
            raise self.error("distribution", '"fixed" takes no tolerance; remove one of them')
        half = self._tolerance(nominal, unit)
        kind = kind or default_distribution
        self._check_sigmas_used(kind)
        lo, hi = nominal - half, nominal + half
        if half == 0 or kind == "fixed":
            return dist.Fixed(nominal)
        if positive and lo <= 0:
            raise self.error("tolerance", f"takes the value to {lo:g} or below; it must stay positive")
        if minimum is not None and lo < minimum:
            raise self.error("tolerance", f"takes the value below {minimum:g} ({unit})")
        if kind == "uniform":
            return dist.Uniform(lo, hi, nominal)
        if kind == "normal":
            self._check_normal_tail("tolerance", nominal, half / sigmas, unit, positive, minimum)
            return dist.Normal(nominal, half / sigmas, sigmas)
        if kind == "truncnormal":
            return dist.TruncatedNormal(nominal, half / sigmas, lo, hi, sigmas)
        if kind == "lognormal":
            if lo <= 0:
                raise self.error("tolerance", "a lognormal needs the value to stay positive")
            return dist.LogNormal(lo, hi, nominal, sigmas)
        raise self.error("distribution", f"'{kind}' needs a list of values")

    #: An unbounded normal spread of a quantity that must stay positive (or above a minimum)
    #: may not reach that bound within this many sigma (about one unit in a billion beyond;
    #: common practice, no source): a 50 % tolerance at 1 sigma gave 2 % negative resistors,
    #: solved as converged, with negative dissipations that passed their ratings.
    NORMAL_TAIL_SIGMAS = 6.0

    def _check_sigmas_used(self, kind: str) -> None:
        """``sigmas`` places the limits of a normal or lognormal spread; elsewhere it was
        accepted and ignored."""
        if self.has("sigmas") and kind not in ("normal", "truncnormal", "lognormal"):
            raise self.error("sigmas", f"has no meaning for a {kind} distribution (it places "
                                       "the limits of a normal or lognormal spread)")

    def _check_normal_tail(self, key: str, centre: float, sigma: float, unit: str,
                           positive: bool, minimum: float | None) -> None:
        floor = 0.0 if positive else minimum
        if floor is None or sigma <= 0:
            return
        reach = centre - self.NORMAL_TAIL_SIGMAS * sigma
        bound = "zero" if positive else f"{floor:g} ({unit})"
        if reach <= floor if positive else reach < floor:
            raise self.error(key, f"this normal spread reaches {bound} "
                                  f"within {self.NORMAL_TAIL_SIGMAS:g} sigma, so some units "
                                  "would get impossible values; narrow it, give more "
                                  '"sigmas", or use distribution = "truncnormal" or '
                                  '"lognormal"')

    def _tolerance(self, nominal: float, unit: str) -> float:
        """Half-width of a tolerance: relative ('5%', 0.05) or absolute ('0.2 V')."""
        raw = self._get("tolerance", _MISSING)
        if isinstance(raw, bool) or isinstance(raw, (dict, list)):
            raise self.error("tolerance", f"expected a tolerance like 5% or 0.05, got {_type_name(raw)}")
        absolute = None
        if isinstance(raw, str) and "%" not in raw and "ppm" not in raw:
            try:
                absolute = parse_quantity(raw, unit if unit != "temperature" else "K")
            except UnitError:
                absolute = None
        if absolute is not None and not _is_plain_number(raw):
            half = abs(absolute)
        else:
            try:
                rel = parse_quantity(raw, "1")
            except UnitError:
                raise self.error(
                    "tolerance",
                    f"{raw!r} is not a tolerance; write 5% or 0.05, or an absolute value with "
                    "its unit",
                ) from None
            if not 0 <= rel < 1:
                hint = (f" (a plain number is a fraction: {rel:g} is {100 * rel:g} %; write "
                        f"\"{rel:g}%\" or {rel / 100:g} for {rel:g} percent)"
                        if 1 <= rel < 100 and _is_plain_number(raw) else "")
                # the value as written ("150%" read back as "got 1.5" in a review)
                got = (repr(raw) if isinstance(raw, str) and not _is_plain_number(raw)
                       else f"{rel:g}")
                raise self.error("tolerance", f"must be at least 0 and below 100 %, got "
                                              f"{got}{hint}")
            if unit == "temperature" and rel > 0:
                # a share of an absolute temperature: 10 % of 0 degC was +-27.3 K
                raise self.error("tolerance", f"{raw!r} would be a share of the absolute "
                                              "temperature (kelvin); give the tolerance in "
                                              'kelvin, e.g. "5 K"')
            half = abs(nominal) * rel
        return half


def _is_plain_number(raw) -> bool:
    try:
        float(raw)
        return True
    except (TypeError, ValueError):
        return False


@dataclass(frozen=True)
class RunSettings:
    samples: int = 10_000
    seed: int = 1
    sampler: str = "lhs"
    chunk_size: int = 16_384
    max_failure_rate: float = 0.0


@dataclass(frozen=True)
class Correlation:
    parameters: tuple[str, ...]
    coefficient: float


@dataclass(frozen=True)
class Study:
    """A validated study: immutable once built."""

    path: str
    study_hash: str
    title: str
    description: str
    stage_name: str
    stage: ConfiguredStage
    parameters: tuple[Parameter, ...]
    criteria: tuple[Criterion, ...]
    settings: RunSettings
    correlations: tuple[Correlation, ...]
    text: str

    @property
    def parameter_names(self) -> list[str]:
        return [p.name for p in self.parameters]

    def parameter(self, name: str) -> Parameter:
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def notes(self) -> list[str]:
        """Sentences on a valid study that a reviewer should read before its results: a
        rating the study's [limits] loosen, and an ambient range reaching above a
        transistor's T_j max (where no circuit helps and the device models leave their
        range)."""
        out = (self._relaxed_ratings() + self._typical_at_a_limit()
               + self._gain_outside_datasheet())
        stage_notes = getattr(self.stage, "review_notes", None)
        thermal = getattr(self.stage, "thermal", None)
        env = getattr(self.stage, "env", None)
        if stage_notes is not None:
            # a stage's own notes may take the nominal point with the hottest ambient and
            # the highest supply (where a junction above T_j max is named)
            nominal = {p.name: p.nominal for p in self.parameters}
            corner = None
            if (env is not None and "corner" in inspect.signature(stage_notes).parameters
                    and {env.temperature, env.supply} <= set(nominal)):
                corner = dict(nominal)
                for name in (env.temperature, env.supply):
                    p = self.parameter(name)
                    corner[name] = p.high if p.varies else p.nominal
            out += (stage_notes(self.criteria, nominal, corner=corner) if corner is not None
                    else stage_notes(self.criteria, nominal))
        if thermal is None or env is None or env.temperature not in self.parameter_names:
            return out
        amb = self.parameter(env.temperature)
        hottest = amb.high if amb.varies else amb.nominal
        over = {d: t for d, t in thermal.tj_max.items() if hottest > t}
        if over:
            names = ", ".join(f"{d} ({format_quantity(t, 'temperature')})"
                              for d, t in over.items())
            out.append(f"The ambient reaches {format_quantity(hottest, 'temperature')}, above "
                       f"the T_j max of "
                       f"{names}: units there fail T_j max whatever the circuit does, and the "
                       f"device models work outside their range (some may not converge).")
        return out

    def _gain_outside_datasheet(self) -> list[str]:
        """A sentence per transistor whose gain the study fixes (``hfe = 1000``, a what-if)
        outside its datasheet's hfe_min .. hfe_max: no unit of that part has that gain."""
        out = []
        transistors = getattr(self.stage, "transistors", None)
        if transistors is None:
            return out
        for name, part in transistors().items():
            if part.hfe_parameter not in self.parameter_names:
                continue
            p = self.parameter(part.hfe_parameter)
            ds = part.device.datasheet
            if p.varies or ds.hfe_min <= p.nominal <= ds.hfe_max:
                continue
            out.append(f"{p.key or p.name}: the gain is fixed at {p.nominal:g}, outside the "
                       f"datasheet's {ds.hfe_min:g} .. {ds.hfe_max:g} for {name}: no unit of "
                       f"that part has it, so the results describe another part.")
        return out

    def _typical_at_a_limit(self) -> list[str]:
        """A sentence per normal or lognormal range whose typical value sits at one of its
        limits: that side has no spread, so half the units take the limit exactly (a drive's
        low level given as min 0 V, typ 0 V, max 0.4 V is 0 V in half the units and spread
        towards 0.4 V in the other half); a one-sided spread is a cut normal."""
        out = []
        for p in self.parameters:
            d = p.distribution
            if isinstance(d, dist.SplitNormal):
                low_side, high_side = d.sigma_low == 0, d.sigma_high == 0
            elif isinstance(d, dist.LogNormal) and d.typical is not None and d.varies:
                low_side, high_side = d.typical == d.lower, d.typical == d.upper
            else:
                continue
            if low_side == high_side:
                continue
            end, other = ("min", d.high) if low_side else ("max", d.low)
            kind = "lognormal" if isinstance(d, dist.LogNormal) else "normal"
            at = format_quantity(d.nominal, p.unit)
            out.append(f"{p.key or p.name}: typ lies at {end} ({at}) with distribution "
                       f"\"{kind}\", which spreads each side of typ by its own limit: the "
                       f"{end} side has none, so half the units sit exactly at {at} and the "
                       f"other half spread to {format_quantity(other, p.unit)}. For a "
                       f"one-sided spread (a logic output's low level above 0 V, a gain "
                       f"screened at its minimum) write distribution = \"truncnormal\": a "
                       f"half-normal from {at} with nothing beyond it.")
        return out

    def _relaxed_ratings(self) -> list[str]:
        """A sentence per rating whose limit the study's [limits] table loosens: the study's
        limit is what the verdict judges, which a reviewer must see (a T_j limit of 200 degC
        on a 150 degC part passed units that thermal_runaway, still on the rating, failed)."""
        out = []
        ratings = {c.metric: c for c in self.stage.criteria if c.source == "rating"}
        for c in self.criteria:
            d = ratings.get(c.metric)
            if d is None or c.source != "rating":
                continue
            looser = ((d.maximum is not None and (c.maximum is None or c.maximum > d.maximum))
                      or (d.minimum is not None and (c.minimum is None or c.minimum < d.minimum)))
            if not looser:
                continue
            unit = self.stage.metrics[c.metric].unit

            def fmt(x, unit=unit):
                return format_quantity(x, unit)

            margin = (" (the part's T_j max less the study's [thermal] tj_margin)"
                      if c.metric.startswith("tj_") else "")
            out.append(f"The study's [limits] loosen the rating check {c.name}: {c.metric} "
                       f"{c.limit_text(fmt)} where the check would ask {d.limit_text(fmt)}"
                       f"{margin}. The verdict judges the study's limit; the part's other "
                       f"checks (thermal runaway, stresses) keep its rating.")
        return out

    def run(self, **kwargs):
        """Run the Monte Carlo analysis; see :func:`tolerance.api.run` for the arguments."""
        from tolerance.api import run

        return run(self, **kwargs)

    def whatif(self, *pins: str, **kwargs):
        """Pinned run against the baseline (common random numbers), e.g.
        ``study.whatif("Q2.hfe=min")``; see :func:`tolerance.whatif.whatif`."""
        from tolerance.whatif import whatif

        # a list of pins, as tolerance.whatif.whatif takes them, is taken as well
        flat = [p for item in pins for p in ([item] if isinstance(item, str) else item)]
        return whatif(self, flat, **kwargs)

    def worstcase(self, samples: int | None = None, seed: int | None = None,
                  sampler: str | None = None, chunk_size: int | None = None,
                  jobs: int = 1) -> dict:
        """Extreme-value, RSS and optimizer worst case beside the Monte Carlo extremes (its
        run on ``jobs`` workers; the results do not depend on them)."""
        from tolerance.analysis import study_worst_case

        return study_worst_case(self, samples, seed, sampler, chunk_size, jobs=jobs)

    def sensitivity(self, samples: int | None = None, seed: int | None = None,
                    sobol_samples: int = 1024, sampler: str | None = None,
                    chunk_size: int | None = None, jobs: int = 1) -> dict:
        """Rank sensitivities and Sobol indices (``sobol_samples`` a power of two from 64 to
        2^18; the Monte Carlo run on ``jobs`` workers)."""
        from tolerance.analysis import study_sensitivity

        return study_sensitivity(self, samples, seed, sobol_samples, sampler=sampler,
                                 chunk_size=chunk_size, jobs=jobs)

    def choose(self, *vary, **kwargs) -> dict:
        """Preferred-value sweep, e.g. ``study.choose("RBE2=E24:47..1k")``; see
        :func:`tolerance.choose.choose`."""
        from tolerance.choose import choose

        # a list of sweeps, as tolerance.choose.choose takes them, is taken as well
        flat = [v for item in vary for v in ([item] if isinstance(item, str) else item)]
        return choose(self, flat, **kwargs)

    def correlation_matrix(self) -> np.ndarray:
        """Correlation matrix of the normal scores of all parameters (identity if none)."""
        names = self.parameter_names
        c = np.eye(len(names))
        for corr in self.correlations:
            idx = [names.index(n) for n in corr.parameters]
            for i in idx:
                for j in idx:
                    if i != j:
                        c[i, j] = corr.coefficient
        return c


ENGINE_KEYS = ("stage", "title", "description", "run", "limits", "correlation")


#: Unicode categories a title may not hold: control, format, surrogate, private-use and
#: unassigned characters, line and paragraph separators (the Unicode standard's general
#: categories, from memory)
_NOT_IN_A_TITLE = frozenset({"Cc", "Cf", "Cs", "Co", "Cn", "Zl", "Zp"})

#: the largest chunk of samples, for the study file, the command line and the API (a chunk's
#: columns are held in memory at once)
MAX_CHUNK = 10**7
#: the longest title (common practice, no source: a heading of one line)
MAX_TITLE = 200
#: the largest study file read (common practice, no source: a study is a page or two)
MAX_STUDY_BYTES = 4 * 2**20


def load_study(path, text: str | None = None) -> Study:
    """Read, validate and configure a study file.

    Parameters
    ----------
    path : str or Path
        The study file (TOML).
    text : str, optional
        The file contents, when already read (used for the built-in demo).

    Raises
    ------
    StudyError
        For anything wrong with the file, naming the file, the key and what was expected.
    """
    path = Path(path)
    file = str(path)
    if text is None:
        try:
            if not path.is_file():  # a folder, a pipe or a device such as /dev/zero
                if not path.exists():
                    raise FileNotFoundError
                raise StudyError(file, "", "is not a regular file (a study is a TOML file)")
            with path.open("rb") as f:
                raw_bytes = f.read(MAX_STUDY_BYTES + 1)
        except FileNotFoundError:
            raise StudyError(file, "", "no such study file") from None
        except OSError as exc:
            raise StudyError(file, "", f"cannot be read ({exc.strerror})") from None
        if len(raw_bytes) > MAX_STUDY_BYTES:
            raise StudyError(file, "", f"is larger than {MAX_STUDY_BYTES // 2**20} MiB; a study "
                                       "is a short TOML file")
        try:
            text = raw_bytes.decode("utf-8")
        except UnicodeDecodeError:
            raise StudyError(file, "", "is not UTF-8 text") from None
        # a byte-order mark, which some editors put first, is no TOML
        text = text.removeprefix("\ufeff")
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StudyError(file, "", f"is not valid TOML ({exc})") from None
    return build_study(data, file, text)


def build_study(data: dict, file: str, text: str) -> Study:
    ctx = _Context(file)
    top = Reader(data, "", ctx)
    names = stage_names()
    stage_name = top.string("stage", choices=names)
    title = top.string("title", default=Path(file).stem)
    # the title heads every report, plot and table: one printable line of a sensible length
    # (no control or format character, such as a right-to-left override that reverses what
    # follows it in every report, and no line or paragraph separator; a no-break space is
    # a space)
    if len(title) > MAX_TITLE or any(unicodedata.category(ch) in _NOT_IN_A_TITLE
                                     for ch in title):
        raise top.error("title", f"expected one line of at most {MAX_TITLE} characters "
                                 "without control or format characters (a longer text goes "
                                 "in description)")
    description = top.string("description", default="")
    run = _read_run(top.table("run"))

    entry = get_stage(stage_name)
    stage = entry.configure(top)

    parameters = tuple(ctx.parameters.values())
    criteria = _read_limits(top.table("limits"), stage)
    correlations = _read_correlations(top, ctx)

    # several readers may read one table (a stage and a helper each take their keys): a key
    # is known when any reader of that table consumed it
    used_by_table: dict[int, set[str]] = {}
    asked_by_table: dict[int, set[str]] = {}
    for reader in ctx.readers:
        used_by_table.setdefault(id(reader._data), set()).update(reader._used)
        asked_by_table.setdefault(id(reader._data), set()).update(reader._asked)
    for reader in ctx.readers:
        if not reader.exists:
            continue
        used = used_by_table[id(reader._data)]
        for k in reader._data:
            if k not in used:
                # the keys read and the keys the readers asked for but the file lacks
                # ("sed" for the run's "seed", "tempcoo" for a resistor's "tempco")
                known = used | asked_by_table[id(reader._data)]
                if reader.path == "":
                    known |= set(ENGINE_KEYS)
                hint = None
                if reader.path == "parts":
                    roles = set(stage.resistors()) | set(stage.devices)
                    known |= roles
                    hint = _part_role_hint(k, roles, stage_name)
                raise StudyError(file, reader.key(k),
                                 "unknown key" + (hint or _did_you_mean(k, known)))

    study_hash = hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]
    return Study(file, study_hash, title, description, stage_name, stage, parameters,
                 criteria, run, correlations, text)


def _read_run(r: Reader) -> RunSettings:
    d = RunSettings()
    return RunSettings(
        samples=r.integer("samples", default=d.samples, minimum=1, maximum=10**9),
        seed=r.integer("seed", default=d.seed, minimum=0, maximum=2**63 - 1),
        sampler=r.string("sampler", default=d.sampler, choices=SAMPLERS),
        chunk_size=r.integer("chunk_size", default=d.chunk_size, minimum=1, maximum=MAX_CHUNK),
        max_failure_rate=r.quantity("max_failure_rate", "1", default=d.max_failure_rate,
                                    minimum=0.0, maximum=0.5),
    )


#: a temperature limit below this [K] (-100 degC) is taken for a slip of the unit
LOWEST_TEMPERATURE_LIMIT = 173.15


def _read_limits(r: Reader, stage: ConfiguredStage) -> tuple[Criterion, ...]:
    """Study limits replace the stage's defaults for the same metric; ratings stay."""
    study_criteria = []
    for metric in r.keys():
        if metric not in stage.metrics:
            how = getattr(stage, "dormant_metrics", {}).get(metric)
            if how:  # a metric the stage computes once a table asks for it
                raise r.error(metric, f"is computed only with {how}")
            raise r.error(metric, "is not a metric of this stage" +
                          _did_you_mean(metric, stage.metrics))
        spec = r.table(metric)
        if not spec.exists or not (spec.has("min") or spec.has("max")):
            raise r.error(metric, "expected a table with min and/or max, e.g. {min = 1.5}")
        unit = stage.metrics[metric].unit
        lo = spec.optional_quantity("min", unit)
        hi = spec.optional_quantity("max", unit)
        if lo is not None and hi is not None and lo > hi:
            raise spec.error("min", f"min ({_shown(lo, unit)}) is above max "
                                    f"({_shown(hi, unit)})")
        if unit == "temperature":
            # "100 K" meant as 100 degC (or as a rise) would fail every unit without a word
            for side, value in (("min", lo), ("max", hi)):
                if value is not None and value < LOWEST_TEMPERATURE_LIMIT:
                    shown = format_quantity(value, "temperature")
                    raise spec.error(side, f"{shown} ({value:g} K) is below any operating "
                                           f"temperature (-100 degC); a temperature limit "
                                           f"reads e.g. '125 degC'")
        desc = spec.string("description", default="")
        study_criteria.append(Criterion(metric, metric, lo, hi, "study", desc))
    # a study limit on a metric replaces the stage's default or the rating on that metric on
    # the sides it gives (tightening or relaxing them) and keeps its name; a side it does not
    # give keeps the default's (a maximum on drive_margin dropped the saturation check's
    # minimum, so no unit could fail it); order: stage defaults, study, ratings
    defaults = {c.metric: c for c in stage.criteria}
    replaced = []
    for c in study_criteria:
        d = defaults.get(c.metric)
        lo = c.minimum if c.minimum is not None or d is None else d.minimum
        hi = c.maximum if c.maximum is not None or d is None else d.maximum
        if lo is not None and hi is not None and lo > hi:
            side = "min" if c.minimum is not None else "max"
            raise r.table(c.metric).error(side, f"with the default {d.name} criterion's "
                                                f"other side the window is empty ({lo:g} .. "
                                                f"{hi:g})")
        replaced.append(Criterion(d.name if d else c.name, c.metric, lo, hi,
                                  d.source if d else "study",
                                  c.description or (d.description if d else "")))
    overridden = {c.metric for c in replaced}
    kept = [c for c in stage.criteria if c.metric not in overridden]
    # a stage default keeps its place when a study window replaces it (saturation first)
    in_place = {c.metric: c for c in replaced if c.source == "stage"}
    ordered = ([in_place.get(c.metric, c) for c in stage.criteria if c.source == "stage"]
               + [c for c in replaced if c.source == "study"]
               + [c for c in kept if c.source == "rating"]
               + [c for c in replaced if c.source == "rating"])
    seen, out = set(), []
    for c in ordered:
        if c.name not in seen:
            seen.add(c.name)
            out.append(c)
    return tuple(out)


def _read_correlations(top: Reader, ctx: _Context) -> tuple[Correlation, ...]:
    if not top.has("correlation"):
        return ()
    raw = top._get("correlation", _MISSING)
    if not isinstance(raw, list):
        raise top.error("correlation", "expected an array of tables [[correlation]]")
    out = []
    paired: dict[frozenset, str] = {}
    for i, item in enumerate(raw):
        key = f"correlation[{i}]"
        if not isinstance(item, dict):
            raise StudyError(ctx.file, key, "expected a table with parameters and coefficient")
        r = Reader(item, key, ctx)
        plist = r._get("parameters", _MISSING)
        if not isinstance(plist, list) or len(plist) < 2 or not all(isinstance(p, str) for p in plist):
            raise r.error("parameters", "expected a list of at least two parameter names")
        for p in plist:
            if p not in ctx.parameters:
                raise r.error("parameters", f"'{p}' is not a parameter of this study" +
                              parameter_hint(p, ctx.parameters))
            if not ctx.parameters[p].varies:
                raise r.error("parameters", f"'{p}' has no spread, so it cannot be correlated")
        if len(set(plist)) != len(plist):
            twice = next(p for p in plist if plist.count(p) > 1)
            raise r.error("parameters", f"'{twice}' is listed twice")
        for a, b in itertools.combinations(plist, 2):
            # a later entry on the same pair silently replaced the earlier coefficient
            earlier = paired.get(frozenset((a, b)))
            if earlier is not None:
                raise r.error("parameters", f"'{a}' and '{b}' are already correlated in "
                                            f"{earlier}; give each pair one coefficient")
            paired[frozenset((a, b))] = key
        coef = r._get("coefficient", _MISSING)
        if isinstance(coef, bool) or not isinstance(coef, (int, float)) or not (
            math.isfinite(coef) and -1 < coef < 1
        ):
            raise r.error("coefficient", f"expected a number strictly between -1 and 1, got {coef!r}")
        out.append(Correlation(tuple(plist), float(coef)))
    names = list(ctx.parameters)
    c = np.eye(len(names))
    for corr in out:
        idx = [names.index(n) for n in corr.parameters]
        for a in idx:
            for b in idx:
                if a != b:
                    c[a, b] = corr.coefficient
    if np.min(np.linalg.eigvalsh(c)) <= 0:
        # name what breaks it: a group of k at one coefficient r needs r > -1 / (k - 1) on
        # its own (the equicorrelation matrix's smallest eigenvalue is 1 + (k - 1) r, any
        # linear-algebra text); otherwise the entries contradict each other together
        for j, corr in enumerate(out):
            k = len(corr.parameters)
            if k > 2 and corr.coefficient <= -1.0 / (k - 1):
                raise StudyError(ctx.file, f"correlation[{j}].coefficient",
                                 f"{corr.coefficient:g} is too negative for a group of {k}: "
                                 f"{k} parameters can be tied the opposite way to one "
                                 f"another only above {-1.0 / (k - 1):.3g} (no valid, "
                                 f"positive definite, correlation matrix)")
        raise StudyError(ctx.file, "correlation",
                         f"the {len(out)} entries together do not form a valid (positive "
                         "definite) correlation matrix: they contradict each other (two "
                         "parameters each strongly tied to a third cannot be tied the "
                         "opposite way, or untied, to each other); check the signs and sizes "
                         "of the coefficients")
    return tuple(out)
