"""The transistor part library and the reading of ``[parts.Qn]`` tables.

The library holds generic device classes (no part numbers), one TOML data file each under
``parts/`` (shipped as package data); every figure in them is a typical class value, from memory.
A study uses a class (``device = "small_signal_npn"``), overrides any figure of it, or defines a
device inline (``device = "inline"``, or no ``device`` key, with all required figures).

Per-sample spread of a transistor enters through two parameters:

- ``<Q>.hfe``: the DC current gain at the datasheet test point, lognormal between hfe_min and
  hfe_max (each at -/+3 sigma of the logarithm) with the typical value as median when given:
  the usual description of gain spread. The stage maps it onto the model's ideal forward gain
  (:meth:`tolerance.models.datasheet.FittedDevice.forward_beta_for_hfe`).
- ``<Q>.icbo``: the collector-base cut-off current at 25 degC, lognormal between
  icbo_max / icbo_spread (default 30) and icbo_max. The datasheet states only a maximum; a
  spread over about one and a half decades below it is a common working assumption (common
  practice, no source).
"""

from __future__ import annotations

import dataclasses
import difflib
import functools
import hashlib
import json
import os
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np

from tolerance.models.datasheet import (
    DATASHEET_FIGURES,
    Datasheet,
    DatasheetError,
    FittedDevice,
    fit_datasheet,
)
from tolerance.models.transistor import TransistorParameters
from tolerance.distributions import ScreenedLogNormal, TruncatedSplitNormal
from tolerance.study import Reader, StudyError
from tolerance.units import UnitError, parse_quantity

__all__ = [
    "DARLINGTON_FIGURES",
    "LibraryEntry",
    "TransistorPart",
    "device_for",
    "library",
    "read_transistor",
]

#: Figures of a monolithic Darlington entry beside its [driver] and [output] dies.
DARLINGTON_FIGURES: dict[str, tuple[str, str]] = {
    "rbe_driver": ("ohm", "internal resistor across the driver's base-emitter"),
    "rbe_output": ("ohm", "internal resistor across the output's base-emitter"),
    "rbe_tolerance": ("1", "spread of the internal resistors"),
    "rbe_tempco": ("1/K", "temperature coefficient of the internal resistors"),
    "pair_hfe_min": ("1", "minimum gain of the pair at pair_hfe_current"),
    "pair_hfe_current": ("A", "collector current of the pair gain figure"),
    "pair_hfe_vce": ("V", "collector-emitter voltage of the pair gain figure"),
    "pair_vce_sat_max": ("V", "maximum saturation voltage of the pair"),
    "pair_vce_sat_ic": ("A", "collector current of the pair V_CE(sat) figure"),
    "pair_vce_sat_ib": ("A", "base current of the pair V_CE(sat) figure"),
}

_ENTRY_KEYS = ("kind", "description", "package")


@dataclass(frozen=True)
class LibraryEntry:
    """One device class of the library.

    Attributes
    ----------
    name : str
        Library name (the data file's stem), used as ``device = "<name>"``.
    kind : str
        ``transistor`` or ``darlington`` (a monolithic pair).
    description, package : str
        One line and the package class.
    figures : dict
        SI figures: a transistor's datasheet figures, or a Darlington's pair figures.
    dies : dict
        For a Darlington: ``{"driver": figures, "output": figures}``; empty otherwise.
    text : dict
        The figures as written in the data file (for listings).
    """

    name: str
    kind: str
    description: str
    package: str
    figures: dict = field(default_factory=dict)
    dies: dict = field(default_factory=dict)
    text: dict = field(default_factory=dict)


def _parse_figures(raw: dict, table: dict[str, tuple[str, str]], where: str) -> dict:
    out = {}
    for key, value in raw.items():
        if key == "polarity":
            out[key] = value
            continue
        if key not in table:
            raise ValueError(f"{where}: {key}: not a known figure")
        try:
            out[key] = parse_quantity(value, table[key][0])
        except UnitError as exc:
            raise ValueError(f"{where}: {key}: {exc}") from None
    return out


@functools.lru_cache(maxsize=1)
def library() -> dict[str, LibraryEntry]:
    """The device classes of the library, by name (read once from the package data)."""
    out = {}
    folder = resources.files("tolerance.models").joinpath("parts")
    for item in sorted(folder.iterdir(), key=lambda p: p.name):
        if not item.name.endswith(".toml"):
            continue
        name = item.name[: -len(".toml")]
        data = tomllib.loads(item.read_text(encoding="utf-8"))
        where = f"parts/{item.name}"
        kind = data.get("kind", "transistor")
        text = {k: v for k, v in data.items() if not isinstance(v, dict)}
        if kind == "darlington":
            dies = {}
            for die in ("driver", "output"):
                dies[die] = _parse_figures(data[die], DATASHEET_FIGURES, f"{where}: {die}")
                text[die] = dict(data[die])
            pair = {k: v for k, v in data.items() if k not in _ENTRY_KEYS and k not in dies}
            figures = _parse_figures(pair, DARLINGTON_FIGURES, where)
        else:
            dies = {}
            figures = _parse_figures({k: v for k, v in data.items() if k not in _ENTRY_KEYS},
                                     DATASHEET_FIGURES, where)
        out[name] = LibraryEntry(name, kind, data.get("description", ""),
                                 data.get("package", ""), figures, dies, text)
    return out


#: environment variable naming the folder of the datasheet-fit cache; set to an empty string
#: it turns the cache off
CACHE_ENV = "TOLERANCE_CACHE_DIR"


def fit_cache_dir() -> Path | None:
    """Folder of the fit cache: ``$TOLERANCE_CACHE_DIR``, else ``tolerance/fits`` in the user
    cache folder (``$XDG_CACHE_HOME`` or ``~/.cache``); None when turned off."""
    env = os.environ.get(CACHE_ENV)
    if env is not None:
        return Path(env) / "fits" if env else None
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "tolerance" / "fits"


@functools.lru_cache(maxsize=1)
def _fit_code() -> str:
    """Digest of the code a fit depends on: any change to it makes every cached fit stale."""
    digest = hashlib.sha256()
    models = Path(__file__).resolve().parent
    for name in ("datasheet.py", "transistor.py", "newton.py", "parts.py"):
        digest.update((models / name).read_bytes())
    return digest.hexdigest()


@functools.lru_cache(maxsize=64)
def _fit_cached(items: tuple) -> FittedDevice:
    """The fit of a set of datasheet figures, from the fit cache when it holds one.

    A fit takes one to three seconds (about 1,500 scalar root-finding steps) and every
    command reads its study's transistors again, so fits are kept as JSON files named by a
    digest of the figures and of the fitting code (:func:`_fit_code`): the same figures with
    the same code give the same parameters, and a changed fit never reads an old file. An
    unreadable or malformed file is fitted again and rewritten; a cache that cannot be
    written is skipped.
    """
    datasheet = Datasheet.from_figures(dict(items))
    folder = fit_cache_dir()
    path = None
    if folder is not None:
        key = hashlib.sha256(json.dumps([list(items), _fit_code()]).encode()).hexdigest()
        path = folder / f"{key[:40]}.json"
        try:
            data = json.loads(path.read_text())
            template = data["template"]
            if not all(isinstance(v, (int, float)) for v in template.values()):
                raise ValueError("a cached parameter is not a number")
            return FittedDevice(datasheet, TransistorParameters(**template),
                                int(data["iterations"]))
        except (OSError, ValueError, TypeError, KeyError):
            pass
    fit = fit_datasheet(datasheet)
    if path is not None:
        data = {"figures": list(items), "template": dataclasses.asdict(fit.template),
                "iterations": fit.iterations}
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            tmp = path.with_suffix(f".{os.getpid()}.tmp")
            tmp.write_text(json.dumps(data))
            os.replace(tmp, path)
        except OSError:
            pass
    return fit


def device_for(figures: dict) -> FittedDevice:
    """Fitted model of a set of datasheet figures (cached: fitting takes about a second)."""
    return _fit_cached(tuple(sorted((k, v) for k, v in figures.items() if v is not None)))


@dataclass(frozen=True)
class TransistorPart:
    """A transistor of a stage: its fitted device and the names of its sampled parameters."""

    name: str
    device: FittedDevice
    hfe_parameter: str
    icbo_parameter: str
    device_class: str | None = None
    #: the unit's V_BE(sat) parameter, where the datasheet gives vbe_sat_typ
    vbe_sat_parameter: str | None = None
    #: the unit's V_BE(on) parameter, where the datasheet gives vbe_on_min and vbe_on_max
    vbe_on_parameter: str | None = None

    @property
    def polarity(self) -> int:
        return self.device.template.polarity

    def parameters(self, samples: dict[str, np.ndarray]) -> TransistorParameters:
        """Model parameters of this transistor for a chunk of samples."""
        vbe_sat = (samples[self.vbe_sat_parameter] if self.vbe_sat_parameter is not None
                   else None)
        vbe_on = (samples[self.vbe_on_parameter] if self.vbe_on_parameter is not None
                  else None)
        return self.device.parameters(samples[self.hfe_parameter],
                                      samples[self.icbo_parameter], vbe_sat, vbe_on)


def _derived_parameter(reader: Reader, name: str, spec: dict, unit: str, parameter_name: str,
                       description: str):
    """Register a parameter whose distribution the model derives (key path reader.name)."""
    # The Reader has no public way to register a distribution built by the caller; a reader
    # over a one-key table at the same path gives the right key path in every message.
    sub = Reader({name: spec}, reader.path, reader._ctx)  # noqa: SLF001
    return sub.parameter(name, unit, parameter_name, description, positive=True)


#: the supply's parameter (``models.stages.Environment``)
SUPPLY_PARAMETER = "supply.voltage"


def _must_exceed(reader: Reader, name: str, floor: float, reason: str) -> None:
    """Make the registered parameter ``name`` refuse pins and value choices at or below
    ``floor`` (:attr:`Parameter.above`), the highest such floor kept."""
    params = reader._ctx.parameters  # noqa: SLF001
    p = params.get(name)
    if p is not None and (p.above is None or p.above < floor):
        params[name] = dataclasses.replace(p, above=float(floor), above_reason=reason)


def supply_floor(reader: Reader, vce_sat: float, what: str) -> None:
    """The study file refuses a supply at or below a saturation voltage ("could never
    saturate"); ``--pin supply.voltage=0.3V`` ran and passed every criterion. Pins and
    value choices of the supply now must exceed ``vce_sat`` (``what``: whose it is)."""
    _must_exceed(reader, SUPPLY_PARAMETER, vce_sat,
                 f"the saturation voltage of {what}: at or below it the stage could never "
                 "saturate")


def read_transistor(parts: Reader, name: str, description: str, *, polarity: str | None = None,
                    base_figures: dict | None = None, supply_minimum: float | None = None,
                    required: bool = True, read_device: bool = True,
                    table: Reader | None = None) -> TransistorPart:
    """Read ``[parts.<name>]``: the device, figure overrides and the gain and leakage spread.

    Parameters
    ----------
    parts : Reader
        Reader of the ``[parts]`` table.
    name : str
        The part's name (``Q1``); its parameters are ``<name>.hfe`` and ``<name>.icbo``.
    description : str
        The part's role, for the parameter table.
    polarity : {"npn", "pnp"}, optional
        Required polarity of the stage position.
    base_figures : dict, optional
        Figures to start from instead of a library class (a die of a monolithic pair); the
        table may still override them.
    supply_minimum : float, optional
        Lowest supply voltage [V]; a V_CE(sat) figure at or above it is an error.
    required : bool
        Whether the table must exist (it may be absent when ``base_figures`` are given).
    read_device : bool
        Whether the table may name a library ``device`` (False when the caller has read it,
        e.g. a monolithic pair).
    table : Reader, optional
        The reader of ``[parts.<name>]`` when the caller has opened it already (every
        table is read through one reader, so that unknown keys are found).

    Raises
    ------
    StudyError
        Naming the key of an unknown device, a bad or inconsistent figure.
    """
    part = table if table is not None else parts.table(
        name, required=required and base_figures is None)
    figures: dict = dict(base_figures or {})
    device = part.string("device", default=None) if read_device else None
    if device is not None and device != "inline":
        lib = library()
        if device not in lib:
            close = difflib.get_close_matches(device, list(lib), n=1, cutoff=0.5)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            raise part.error("device", f"'{device}' is not in the part library (see "
                                       f"'tolerance parts'){hint}")
        entry = lib[device]
        if entry.kind != "transistor":
            raise part.error("device", f"'{device}' is a {entry.kind}, not a single transistor")
        figures.update(entry.figures)
    if part.has("polarity"):
        figures["polarity"] = part.string("polarity", choices=("npn", "pnp"))
    for key, (unit, _) in DATASHEET_FIGURES.items():
        if key == "hfe_min" or key == "hfe_max" or key == "hfe_typ":
            if part.has(key):
                figures[key] = part.quantity(key, unit)
            continue
        if part.has(key):
            figures[key] = part.quantity(key, unit)
    # a study's own gain limits with the class's typical value outside them (a review's
    # 1000 .. 5000 on a class of typ 60 was refused for the typ it never gave): the class's
    # typ goes, as it does for a {min, max} table below; a typ the study gives is checked
    typ = figures.get("hfe_typ")
    if ((part.has("hfe_min") or part.has("hfe_max")) and not part.has("hfe_typ")
            and typ is not None and figures.get("hfe_min") is not None
            and figures.get("hfe_max") is not None
            and not figures["hfe_min"] <= typ <= figures["hfe_max"]):
        figures.pop("hfe_typ")

    hfe_spec = None
    screen = None
    if part.has("hfe"):
        try:
            t = part.table("hfe")
        except StudyError:
            t = None
        if t is None:
            # one number: this unit's gain (a what-if); the class figures stay as they are
            fixed = part.quantity("hfe", "1", positive=True)
            hfe_spec = {"min": fixed, "max": fixed}
        else:
            for key in ("nominal", "tolerance"):
                if t.has(key):
                    raise t.error(key, "a gain's spread is given by its limits, as a "
                                       "datasheet states them: hfe = {min = ..., max = ...} "
                                       "(with typ, distribution or sigmas if needed)")
            lo = t.quantity("min", "1", positive=True)
            hi = t.quantity("max", "1", positive=True)
            if lo > hi:
                raise t.error("min", f"min ({lo:g}) is above max ({hi:g})")
            typ = t.optional_quantity("typ", "1", positive=True)
            kind = t.string("distribution", default="lognormal",
                            choices=("lognormal", "uniform", "normal", "truncnormal", "fixed"))
            stated = (figures.get("hfe_min"), figures.get("hfe_max"))
            if stated[0] is not None and stated[1] is not None:
                # a screen of the datasheet's spread: the device keeps the figures it was
                # fitted to (refitting it to the screen's ends made the same unit weaker at
                # high current, so a better-screened batch read worse), and the screen lies
                # within them
                source = ("the study's" if part.has("hfe_min") or part.has("hfe_max")
                          else f"the device class's ({device})" if device
                          else "the datasheet's")
                for key, value, bound in (("min", lo, stated[0]), ("max", hi, stated[1])):
                    outside = value < bound * (1 - 1e-9) if key == "min" else \
                        value > bound * (1 + 1e-9)
                    if outside:
                        side = "below" if key == "min" else "above"
                        # (a review gave a monolithic pair's own gain here, where the
                        # table is its output die's)
                        die = (" On a monolithic pair this is the output die's gain; the "
                               "pair's own minimum gain is pair_hfe_min (at "
                               "pair_hfe_current)." if base_figures is not None else "")
                        raise t.error(key, f"{value:g} is {side} {source} hfe_{key} = "
                                           f"{bound:g}: this table screens the datasheet's "
                                           f"spread ({stated[0]:g} .. {stated[1]:g}); for a "
                                           f"part whose datasheet states {value:g}, give "
                                           f"hfe_min and hfe_max (its figures) as well.{die}")
            else:
                figures["hfe_min"], figures["hfe_max"] = lo, hi
                if typ is not None:
                    figures["hfe_typ"] = typ
                elif figures.get("hfe_typ") is not None and not lo <= figures["hfe_typ"] <= hi:
                    figures.pop("hfe_typ")
            hfe_spec = {"min": lo, "max": hi, "distribution": kind}
            if typ is not None:
                hfe_spec["typ"] = typ
            if t.has("sigmas"):
                hfe_spec["sigmas"] = t.quantity("sigmas", "1")
            if stated[0] is not None and stated[1] is not None:
                # a screen passes no unit beyond its limits: a plain one draws the part's own
                # population cut there; one with its own typ or sigmas a lognormal of its
                # own, cut there too (uncut, 2.25 % of a 2-sigma screen's units lay beyond
                # each limit, below the datasheet's minimum); a normal one is cut as
                # truncnormal; uniform, truncnormal and fixed end at the limits already
                if typ is None and not t.has("distribution") and not t.has("sigmas"):
                    screen = ScreenedLogNormal(stated[0], stated[1], figures.get("hfe_typ"),
                                               lo, hi)
                elif kind == "lognormal":
                    screen = ScreenedLogNormal(lo, hi, typ, lo, hi,
                                               hfe_spec.get("sigmas", 3.0))
                elif kind == "normal":
                    hfe_spec["distribution"] = "truncnormal"
    if polarity is not None and figures.get("polarity", polarity) != polarity:
        key = "polarity" if part.has("polarity") else "device"
        article = "an" if polarity == "npn" else "a"
        raise part.error(key, f"this position needs {article} {polarity.upper()} transistor")
    figures.setdefault("polarity", polarity or "npn")

    vce_sat = figures.get("vce_sat_max")
    if supply_minimum is not None and vce_sat is not None and vce_sat >= supply_minimum:
        key = "vce_sat_max" if part.has("vce_sat_max") else "device"
        raise part.error(key, f"the saturation voltage {vce_sat:g} V is at or above the "
                              f"lowest supply {supply_minimum:g} V ([supply] voltage): the "
                              f"stage could never saturate; check the supply's value and "
                              f"unit")
    if supply_minimum is not None and vce_sat is not None:
        supply_floor(part, vce_sat, name)  # the same check for pins and value choices
    if part.has("leakage_doubling") and figures.get("icbo_hot_max") is not None:
        # the fit sets the doubling from the hot figure (models.datasheet._fit_doubling)
        raise part.error("leakage_doubling", "is what icbo_hot_max and icbo_hot_temperature "
                                             "set: give the hot figure or the doubling, not "
                                             "both")
    try:
        ds = Datasheet.from_figures(figures)
    except DatasheetError as exc:
        key = exc.key if part.has(exc.key) or device is None else next(
            (k for k in exc.related if part.has(k)), "device")
        if exc.key.startswith("hfe") and part.has("hfe"):
            key = "hfe"
        elif (exc.key == "hfe_min" and part.has("hfe_max") and not part.has("hfe_min")
              and figures["hfe_min"] > figures["hfe_max"]):
            # the study's own hfe_max against the class's hfe_min: the study's key is wrong
            raise part.error("hfe_max", f"{figures['hfe_max']:g} is below the device class's "
                                        f"hfe_min ({figures['hfe_min']:g}); give hfe_min as "
                                        f"well") from None
        raise part.error(key, exc.message if key == exc.key else f"{exc.key}: {exc.message}") \
            from None
    try:
        fitted = device_for(ds.figures())
    except ArithmeticError:
        given = [k for k in figures if part.has(k)] + (["hfe"] if part.has("hfe") else [])
        raise part.error(given[0] if given else "device",
                         "the transistor model cannot be fitted to these figures (a number "
                         "overflowed): check their values and units") from None
    except DatasheetError as exc:
        if part.has(exc.key):
            raise part.error(exc.key, exc.message) from None
        given = [k for k in figures if part.has(k)] + (["hfe"] if part.has("hfe") else [])
        if device is None or not given:
            raise part.error("device", f"{exc.key}: {exc.message}") from None
        # a class figure the study did not write, against one it did (hfe_min = 60 on a
        # class whose gain at high current is 20: the model's fall-off cannot join them)
        value = figures.get(exc.key)
        shown = f" = {value:g}" if isinstance(value, (int, float)) else ""
        raise part.error(given[0], f"with {', '.join(given)} as given, the device class's "
                                   f"{exc.key}{shown} {exc.message}; give {exc.key} for "
                                   f"this part as well (its datasheet's figure)") from None

    if hfe_spec is None:
        hfe_spec = {"min": ds.hfe_min, "max": ds.hfe_max, "distribution": "lognormal"}
        if ds.hfe_typ is not None:
            hfe_spec["typ"] = ds.hfe_typ
    if hfe_spec["min"] == hfe_spec["max"]:
        hfe_spec = {"min": hfe_spec["min"], "max": hfe_spec["max"]}
    param = _derived_parameter(part, "hfe", hfe_spec, "1", f"{name}.hfe",
                               f"{description}: DC current gain at {ds.hfe_current * 1e3:g} mA")
    if screen is not None and screen.cut_low < screen.cut_high:
        # registered through the reader (its key path and messages), then given the
        # screened lognormal (the study format has no such form of its own)
        part._ctx.parameters[param.name] = dataclasses.replace(  # noqa: SLF001
            param, distribution=screen)
    # a gain of 1 or less is no transistor's (Datasheet refuses it in the study file); a
    # what-if pin or a value choice of 0.5 ran
    _must_exceed(part, param.name, 1.0, "a transistor's current gain I_C / I_B is above 1")
    if part.has("icbo"):
        # a range of the study's own spreads over decades like the derived one: lognormal
        # unless the table names another distribution
        part.parameter("icbo", "A", f"{name}.icbo", f"{description}: I_CBO at 25 degC",
                       positive=True, range_distribution="lognormal")
    else:
        spec = {"min": ds.icbo_max / ds.icbo_spread, "max": ds.icbo_max,
                "distribution": "lognormal"}
        if ds.icbo_spread == 1:
            spec = {"min": ds.icbo_max, "max": ds.icbo_max}
        _derived_parameter(part, "icbo", spec, "A", f"{name}.icbo",
                           f"{description}: I_CBO at 25 degC")
    vbe_sat = None
    if ds.vbe_sat_typ is not None:
        # typ the median and max at +3 sigma, cut there (a tested limit); below typ as wide,
        # or, where that would take a unit's base resistance below zero, down to the
        # model's floor with a spread of its own (half the units below typ either way;
        # common practice, no source)
        sigma = (ds.vbe_sat_max - ds.vbe_sat_typ) / 3.0
        floor = fitted.intrinsic_vbe_sat
        low = max(ds.vbe_sat_typ - 3.0 * sigma, floor)
        param = _derived_parameter(part, "vbe_sat", {
            "min": low, "max": ds.vbe_sat_max}, "V", f"{name}.vbe_sat",
            f"{description}: V_BE(sat) at {ds.vce_sat_ic * 1e3:g} mA / "
            f"{ds.vce_sat_ib * 1e3:g} mA")
        part._ctx.parameters[param.name] = dataclasses.replace(  # noqa: SLF001
            param, distribution=TruncatedSplitNormal(ds.vbe_sat_typ,
                                                     (ds.vbe_sat_typ - low) / 3.0, sigma,
                                                     low, ds.vbe_sat_max, 3.0))
        # a pin below the floor would be read as the floor (found by a review: 0.6 V and
        # 0.72 V gave the same units), so it is refused as the study file refuses a typ there
        _must_exceed(part, param.name, floor - 1e-9,
                     f"the model's V_BE with no base resistance ({floor:.4g} V at the "
                     f"V_CE(sat) point) is the lowest V_BE(sat) a unit can have")
        vbe_sat = param.name
    vbe_on = None
    if ds.vbe_on_min is not None:
        # the junction's own spread: vbe_on the median, each limit at 3 sigma of its side,
        # cut there (tested limits; common practice, no source)
        param = _derived_parameter(part, "vbe_on", {
            "min": ds.vbe_on_min, "max": ds.vbe_on_max}, "V", f"{name}.vbe_on",
            f"{description}: V_BE(on) at {ds.vbe_on_current * 1e3:g} mA")
        part._ctx.parameters[param.name] = dataclasses.replace(  # noqa: SLF001
            param, distribution=TruncatedSplitNormal(
                ds.vbe_on, (ds.vbe_on - ds.vbe_on_min) / 3.0,
                (ds.vbe_on_max - ds.vbe_on) / 3.0, ds.vbe_on_min, ds.vbe_on_max, 3.0))
        vbe_on = param.name
    return TransistorPart(name, fitted, f"{name}.hfe", f"{name}.icbo",
                          device if device not in (None, "inline") else None, vbe_sat,
                          vbe_on)
