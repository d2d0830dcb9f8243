"""Reports a reviewer can sign: a self-contained HTML page and a Markdown twin of a run.

:func:`write_reports` reads a run folder (summary.json, samples.parquet and, when present, the
JSON files of the sensitivity, worst-case, what-if and value-choice analyses and the stored
switching waveforms), draws the plots into ``plots/`` and writes ``report.html`` and
``report.md``. Both reports are rendered from one document model (headings, paragraphs, tables
of already formatted strings, figures), so every figure they share is the very same string.
Nothing depends on the clock or on the machine: the same saved files give byte-identical
reports.
"""

from __future__ import annotations

import base64
import errno
import html
import json
import math
import re
import sys
import threading
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from tolerance import runner
from tolerance.cli import SAFETY
from tolerance.files import PLOT_PREFIXES, TMP_SUFFIX, DamagedFile, write_atomic
from tolerance.units import UnitError, format_ppm, format_quantity, format_yield, spread_unit

__all__ = [
    "EXTRA_FILES",
    "PlotTask",
    "format_interval",
    "format_number",
    "format_rate",
    "format_value",
    "render_html",
    "render_markdown",
    "render_plots",
    "write_reports",
]

SUMMARY_FILE = "summary.json"
SAMPLES_DIR = "samples.parquet"
PLOTS_DIR = "plots"
HTML_FILE = "report.html"
MD_FILE = "report.md"
#: Optional analysis files rendered when present, with their section titles.
EXTRA_FILES = {
    "sensitivity.json": "Sensitivity analysis",
    "worstcase.json": "Worst case",
    "whatif.json": "What-if runs",
    "choose.json": "Value choice",
}
#: Sample waveforms of the switching transient (``tolerance run --waveforms K``).
WAVEFORMS_FILE = "waveforms.json"
WHATIF_SAMPLES = "whatif_samples.parquet"
VERDICT_WORDS = {"pass": "PASS", "fail": "FAIL", "undecided": "UNDECIDED"}
VERDICT_MEANING = {
    "pass": "every limit met",
    "fail": "a limit is not met",
    "undecided": "not enough samples to tell",
}
_MAX_DEPTH = 3


# --- number formatting (the one place both reports take their figures from) --------------------

def format_number(x) -> str:
    """Plain number for tables: integers as such, floats to 4 significant digits.

    Parameters
    ----------
    x : object
        ``None`` gives ``"-"``, booleans ``"yes"``/``"no"``, NaN ``"nan"``.

    Returns
    -------
    str
    """
    if x is None:
        return "-"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    if isinstance(x, (float, np.floating)):
        x = float(x)
        if math.isnan(x):
            return "nan"
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        return f"{x:.4g}"
    return str(x)


def format_rate(p) -> str:
    """A probability as a percentage with 3 significant digits, e.g. ``"0.0599 %"``.

    Parameters
    ----------
    p : float or None
        Probability [1].

    Returns
    -------
    str
    """
    if p is None:
        return "-"
    p = float(p)
    if math.isnan(p):
        return "nan"
    if p == 0:
        return "0 %"
    digits = 3
    text = f"{100.0 * p:.{digits}g}"
    # a yield of 99.99999 % must not read 100 %
    while digits < 12 and p < 1 and float(text) >= 100.0:
        digits += 1
        text = f"{100.0 * p:.{digits}g}"
    return f"{text} %"


def format_points(p, word: str = "points") -> str:
    """A difference of two probabilities in percentage points, e.g. ``"-0.4 points"`` (a
    review read "-69.2 %" of a yield change as a relative one)."""
    text = format_rate(p)
    return text[:-2] + " " + word if text.endswith(" %") else text


def yield_bound(p, down: bool, unit: bool = True) -> str:
    """One end of a yield's interval as a percentage, rounded away from the estimate: the
    lower end down, the upper end up, with digits enough for two significant ones of its
    distance to 0 % or 100 % (found by a review: 99.9877 %, 123 ppm failing, read "99.99 %",
    which states at most 100 ppm)."""
    if p is None:
        return "-"
    p = float(p)
    if math.isnan(p):
        return "nan"
    if p <= 0.0 or p >= 1.0:
        return format_rate(min(max(p, 0.0), 1.0)) if unit else f"{100.0 * min(max(p, 0), 1):g}"
    miss = 100.0 * min(p, 1.0 - p)
    k = min(max(0, 1 - math.floor(math.log10(miss))) + 1, 12)
    scale = 10.0 ** k
    value = (math.floor if down else math.ceil)(round(100.0 * p * scale, 6)) / scale
    return f"{value:.{k}f}" + (" %" if unit else "")


def yield_interval(low, high, unit: bool = True) -> str:
    """A yield's interval, its ends rounded outwards (:func:`yield_bound`)."""
    return f"{yield_bound(low, True, unit)} .. {yield_bound(high, False, unit)}"


def format_interval(low, high) -> str:
    """An interval of probabilities, e.g. ``"0.0123 % .. 0.456 %"``."""
    return f"{format_rate(low)} .. {format_rate(high)}"


def format_value(x, unit: str | None) -> str:
    """A value in engineering notation with its unit when it is a number of a known unit."""
    if x is None:
        return "-"
    if isinstance(x, (bool, np.bool_)) or not isinstance(x, (int, float, np.integer,
                                                              np.floating)):
        return str(x)
    if math.isnan(x):
        # no value, as a saved file's null reads (the console printed "nan" where the
        # report of the same figures read "-")
        return "-"
    if unit:
        try:
            return format_quantity(float(x), unit)
        except UnitError:
            return f"{format_number(x)} {unit}"
    return format_number(x)


# --- document model -------------------------------------------------------------------------------

@dataclass
class Table:
    """A table of already formatted cells."""

    header: list[str]
    rows: list[list[str]]
    table_id: str | None = None
    caption: str | None = None
    classes: list[list[str]] = field(default_factory=list)  # optional CSS class per cell


@dataclass
class Block:
    kind: str  # "h1", "h2", "h3", "p", "note", "verdict", "table", "figure", "stamp", "pre"
    text: str = ""
    table: Table | None = None
    path: str | None = None  # figures: relative path of the PNG
    data: bytes | None = None  # figures: the PNG bytes
    extra: dict = field(default_factory=dict)


def verdict_word(v) -> str:
    """PASS, FAIL or UNDECIDED for a saved verdict; anything else in capitals, "-" for none."""
    return "-" if v is None else VERDICT_WORDS.get(v, str(v).upper())


def _limits_text(limit: dict, unit: str | None) -> str:
    lo, hi = limit.get("min"), limit.get("max")
    if lo is not None and hi is not None:
        return f"{format_value(lo, unit)} .. {format_value(hi, unit)}"
    if lo is not None:
        return f">= {format_value(lo, unit)}"
    if hi is not None:
        return f"<= {format_value(hi, unit)}"
    return "none"


def interval_label(summary: dict) -> str:
    """The level of a run summary's exact intervals as text: "95 %", or "97.5 %" for a run
    whose length the counts decided (``--target-ci``; tolerance.summary)."""
    level = summary.get("interval_level", summary.get("confidence", 0.95))
    if not isinstance(level, (int, float)) or isinstance(level, bool):
        level = 0.95
    return f"{100 * level:g} %"


def verdict_table(summary: dict) -> Table:
    """The per-criterion verdict table (id ``verdict-table``)."""
    header = ["Criterion", "Metric", "Limits", "Failures", "Evaluated", "Counted rate",
              f"{interval_label(summary)} exact interval", "Zero-failure upper bound",
              "Verdict"]
    rows, classes = [], []
    metrics = summary.get("metrics", {})
    for name, c in summary.get("criteria", {}).items():
        unit = metrics.get(c["metric"], {}).get("unit")
        zfu = c.get("zero_failure_upper")
        v = c.get("verdict", "")
        rows.append([name, c["metric"], _limits_text(c.get("limit", {}), unit),
                     format_number(c["failures"]), format_number(c["evaluated"]),
                     format_rate(c["rate"]), format_interval(c["ci_low"], c["ci_high"]),
                     format_rate(zfu) if zfu is not None else "-",
                     verdict_word(v)])
        classes.append([""] * 8 + [f"v-{v}"])
    return Table(header, rows, "verdict-table", "Counted failures per criterion", classes)


_PERCENTILES = [("mean", "mean"), ("std", "std"), ("min", "min"), ("p001", "0.1 %"),
                ("p01", "1 %"), ("p50", "median"), ("p99", "99 %"), ("p999", "99.9 %"),
                ("max", "max")]


def metrics_table(summary: dict) -> Table:
    header = ["Metric", "Description"] + [label for _, label in _PERCENTILES]
    rows = []
    for name, m in summary.get("metrics", {}).items():
        unit = m.get("unit")
        row = [name, str(m.get("description", ""))]
        for key, _ in _PERCENTILES:
            u = spread_unit(unit) if key == "std" else unit
            row.append(format_value(m.get(key), u))
        rows.append(row)
    return Table(header, rows, "metrics-table", "Metric percentiles (not converged left out)")


def infinite_note(summary: dict) -> str | None:
    """A sentence naming the metrics with infinite samples, which the percentiles leave out
    (a figure without any finite sample reads '-'), and why such values arise."""
    n = summary.get("samples")
    infinite = [(name, m) for name, m in summary.get("metrics", {}).items()
                if m.get("infinite")]
    if not infinite:
        return None
    reasons = []
    if any(name.startswith("inrush_") for name, _ in infinite):
        # (a review: the lamp's infinite inrush figures were explained as switching times)
        reasons.append("a lamp's inrush that never ends: the drive holds the output's current "
                       "below the hot lamp's, so the filament never warms to its operating "
                       "point (inrush_energy, inrush_time)")
    if any((m.get("unit") == "s" and not name.startswith("inrush_"))
           or name == "transition_fraction" for name, m in infinite):
        reasons.append("a switching time where the transition never completes (the switch "
                       "current never crosses its 10 % or 90 % level: a unit that never "
                       "turns off, held on by its leakage or the drive's low level, or a "
                       "load that does not conduct)")
    if any("stress" in name for name, _ in infinite):
        reasons.append("a stress above its rating's maximum temperature, where the derated "
                       "rating is zero")
    why = "; ".join(reasons) if reasons else "outside the model's range"
    parts = [f"{name} {format_number(m['infinite'])} of {format_number(n)}"
             for name, m in infinite]
    return (f"Infinite values ({why}) are left out of the percentiles and fail any criterion "
            "on their metric: " + ", ".join(parts) + ".")


def undefined_note(summary: dict) -> str | None:
    """A sentence naming the metrics that have no value in some converged samples (a unit in
    thermal runaway settles at no junction temperature), which the percentiles leave out
    while the counted criteria fail them."""
    n = summary.get("samples")
    limited = {c.get("metric") for c in (summary.get("criteria") or {}).values()
               if isinstance(c, dict)}
    missing = [(name, m) for name, m in summary.get("metrics", {}).items()
               if m.get("undefined")]
    # a metric no unit has and no criterion judges is one the study does not define (the
    # transition fraction without a PWM frequency), not a failure of every unit
    solved = (n - (summary.get("not_converged") or 0)) if isinstance(n, int) else None
    # (a junction or hot-spot figure every unit lacks is a runaway in every unit, not that)
    absent = [name for name, m in missing
              if name not in limited and solved and m["undefined"] >= solved
              and not name.startswith(("tj_", "hot_spot"))]
    missing = [(name, m) for name, m in missing if name not in absent]
    said = []
    if missing:
        parts = [f"{name} {format_number(m['undefined'])} of {format_number(n)}"
                 for name, m in missing]
        why = (" (a unit in thermal runaway settles at no junction temperature)"
               if any(name.startswith(("tj_", "hot_spot")) for name, _ in missing) else "")
        said.append(f"Units without a value{why} are left out of the percentiles, so the "
                    "extremes above do not show them; they fail any criterion on their "
                    "metric: " + ", ".join(parts) + ".")
    if absent:
        why = (" (the transition fraction needs a PWM frequency in [drive])"
               if "transition_fraction" in absent else "")
        said.append(f"Not defined for this study{why}, so no unit has a value and no "
                    f"criterion judges it: {', '.join(absent)}.")
    return " ".join(said) or None


def verdict_basis(summary: dict) -> str | None:
    """A sentence saying what the overall verdict rests on: how strong a PASS is (no failure
    in n samples only bounds the rate, 950,000 ppm for one sample), or why it is UNDECIDED."""
    v = summary.get("verdict")
    allowed = summary.get("max_failure_rate") or 0.0
    n = summary.get("samples")
    criteria = summary.get("criteria", {})
    if v == "pass" and allowed <= 0:
        bound = summary.get("zero_failure_upper")
        if not isinstance(n, int) or bound is None:
            return None
        rate = format_rate(bound) if bound >= 1e-3 else f"{format_ppm(bound)} ppm"
        units = "sample" if n == 1 else "samples"
        return (f"No failure in {format_number(n)} {units}: that shows each criterion's failure "
                f"rate below {rate} at 95 % confidence (one-sided), and no lower rate; more "
                f"samples lower that bound.")
    label = interval_label(summary)
    if v == "pass":
        # one end of a two-sided interval at level c is a one-sided bound at (1 + c) / 2;
        # a stopped run's 97.5 % interval keeps that end's real level at 97.5 % or more
        # (tolerance.summary.STOPPED_RUN_CONFIDENCE)
        side = "97.5 %" if label == "95 %" else "97.5 % or more"
        return (f"Every criterion's exact {label} interval lies at or below the allowed "
                f"{format_ppm(allowed)} ppm: each rate is below it at {side} confidence "
                f"(one-sided).")
    if v == "undecided":
        open_ = [k for k, c in criteria.items() if c.get("verdict") == "undecided"]
        if open_:
            return (f"Undecided: the exact {label} interval of {', '.join(open_)} holds the "
                    f"allowed {format_ppm(allowed)} ppm; more samples would decide.")
    return None


def sampler_note(summary: dict) -> str | None:
    """A sentence for a Sobol run whose sample count is not a power of two, where the
    sequence loses the balance it is chosen for."""
    n = summary.get("samples")
    if summary.get("sampler") != "sobol" or not isinstance(n, int) or n < 1 or n & (n - 1) == 0:
        return None
    below = 1 << (n.bit_length() - 1)
    return (f"The Sobol sequence keeps its balance (every elementary interval holds its "
            f"share of points) only at a power of two samples; {format_number(n)} is not one: "
            f"--samples {2 * below} (or {below}) gives the balanced design.")


def _set_text(members: dict, unit) -> str | None:
    """A discrete set's members with their shares: "discrete: -20 degC (25 %), ..."."""
    values, shares = members.get("values"), members.get("shares")
    if not isinstance(values, list) or not isinstance(shares, list) or \
            len(values) != len(shares):
        return None
    shares = [format_number(100 * s) if isinstance(s, (int, float)) else "-" for s in shares]
    return "discrete: " + ", ".join(f"{format_value(v, unit)} ({s} %)"
                                    for v, s in zip(values, shares))


def parameter_table(parameters: list[dict], sets: dict | None = None) -> Table:
    header = ["Parameter", "Nominal", "Low", "High", "Distribution", "Unit"]
    rows = []
    for p in parameters:
        unit = p.get("unit")
        members = (sets or {}).get(p.get("name"))
        shown = _set_text(members, unit) if isinstance(members, dict) else None
        rows.append([str(p.get("name", "")), format_value(p.get("nominal"), unit),
                     format_value(p.get("low"), unit), format_value(p.get("high"), unit),
                     shown or _cell(p.get("distribution")),
                     str(unit) if unit is not None else "-"])
    return Table(header, rows, "parameter-table", "Toleranced parameters")


#: what a correlation coefficient of a study means, under the report's table of them
CORRELATION_NOTE = ("The coefficients correlate the parameters' normal scores (a Gaussian "
                    "copula: each parameter's value is mapped through its own distribution "
                    "to a standard normal score), not their values; each parameter keeps its "
                    "own distribution. The worst case takes the parameters independent.")


def correlation_table(pairs) -> Table | None:
    """The study's correlated pairs (summary.json "correlations"), or None without any."""
    rows = [[" - ".join(str(n) for n in c.get("parameters") or []),
             format_number(c.get("coefficient"))]
            for c in pairs or [] if isinstance(c, dict)]
    if not rows:
        return None
    return Table(["Parameters", "Coefficient (normal scores)"], rows, "correlation-table",
                 "Correlations assumed")


#: what the table of units beyond their parameters' limits means
BEYOND_NOTE = (
    "Units beyond the stated limits: an uncut normal or lognormal spread draws about 0.27 % "
    "of its units beyond the limits it was given at 3 sigma (a gain below the datasheet's "
    "minimum, a resistor outside its tolerance), and the Monte Carlo counts them like any "
    "other. Where the part is screened at its limits, give distribution = \"truncnormal\". "
    "Compare the share failing among them with the run's own.")


def beyond_table(summary: dict) -> Table | None:
    """The parameters with units beyond their limits (summary ``beyond_limits``) as a
    table, with the share of those units failing beside the run's; None without any."""
    entries = summary.get("beyond_limits")
    if not isinstance(entries, list) or not entries:
        return None
    units = {p.get("name"): p.get("unit") for p in summary.get("parameters") or []
             if isinstance(p, dict)}
    y = summary.get("yield") or {}
    overall = (1.0 - y["estimate"] if isinstance(y.get("estimate"), (int, float))
               else None)
    rows = []
    for e in entries:
        if not isinstance(e, dict):
            continue
        unit = units.get(e.get("name"))
        count = (e.get("below") or 0) + (e.get("above") or 0)
        rows.append([str(e.get("name")),
                     f"{format_value(e.get('low'), unit)} .. {format_value(e.get('high'), unit)}",
                     format_number(e.get("below")), format_number(e.get("above")),
                     format_rate(e.get("failing", 0) / count) if count else "-",
                     format_rate(overall) if overall is not None else "-"])
    if not rows:
        return None
    return Table(["parameter", "stated limits", "units below", "units above",
                  "failing among them", "failing among all"], rows, "beyond-table",
                 "Units beyond their parameters' stated limits")


def _cell(value) -> str:
    """One table cell from any JSON value."""
    if isinstance(value, (dict, list)):
        return json.dumps(value, sort_keys=False, default=str, allow_nan=True)
    return format_number(value)


def _is_scalar(v) -> bool:
    return not isinstance(v, (dict, list))


def _flatten(record: dict) -> dict:
    """Inline one level of nested dicts of scalars as ``outer.inner`` columns."""
    flat = {}
    for k, v in record.items():
        if isinstance(v, dict) and v and all(_is_scalar(x) for x in v.values()):
            for k2, v2 in v.items():
                flat[f"{k}.{k2}"] = v2
        else:
            flat[k] = v
    return flat


def _records_table(records: list[dict], caption: str | None = None) -> Table:
    records = [_flatten(r) for r in records]
    keys: list[str] = []
    for r in records:
        for k in r:
            if k not in keys:
                keys.append(k)
    rows = [[_p_cell(r.get(k)) if k == "p_value" else _cell(r.get(k)) for k in keys]
            for r in records]
    return Table([str(k) for k in keys], rows, None, caption)


def _p_cell(value) -> str:
    """A p-value cell: one that underflowed to 0 (scipy's tail probabilities do so near the
    smallest double, 5e-324) reads as below 1e-300, not as an impossibility."""
    if isinstance(value, (int, float)) and value == 0:
        return "< 1e-300"
    return _cell(value)


def _keyed_table(data: dict, first: str, caption: str | None = None) -> Table:
    """A dict of dicts as a table: one row per key, one column per inner key."""
    keys: list[str] = []
    for v in data.values():
        for k in (v if isinstance(v, dict) else {"value": v}):
            if k not in keys:
                keys.append(k)
    rows = []
    for name, v in data.items():
        v = v if isinstance(v, dict) else {"value": v}
        rows.append([str(name)] + [_cell(v.get(k)) for k in keys])
    return Table([first] + [str(k) for k in keys], rows, None, caption)


def generic_blocks(data, title: str | None = None, depth: int = 0) -> list[Block]:
    """Render any JSON value as tables: lists of dicts and dicts of dicts become tables.

    Parameters
    ----------
    data : object
        Parsed JSON.
    title : str, optional
        Sub-heading for this value.
    depth : int
        Nesting level; beyond three levels values are shown as JSON text in cells.

    Returns
    -------
    list of Block
    """
    out: list[Block] = []
    if title:
        out.append(Block("h3", title))
    if isinstance(data, list):
        if data and all(isinstance(r, dict) for r in data):
            out.append(Block("table", table=_records_table(data)))
        elif data:
            out.append(Block("p", ", ".join(_cell(v) for v in data)))
        else:
            out.append(Block("p", "(empty)"))
        return out
    if not isinstance(data, dict):
        out.append(Block("p", _cell(data)))
        return out
    if data and all(isinstance(v, dict) for v in data.values()) and all(
            all(_is_scalar(x) for x in v.values()) for v in data.values()):
        out.append(Block("table", table=_keyed_table(data, "name")))
        return out
    scalars = {k: v for k, v in data.items() if _is_scalar(v)}
    if scalars:
        out.append(Block("table", table=Table(["key", "value"],
                                              [[str(k), _cell(v)] for k, v in scalars.items()])))
    for k, v in data.items():
        if _is_scalar(v):
            continue
        if depth >= _MAX_DEPTH:
            out.append(Block("table", table=Table(["key", "value"], [[str(k), _cell(v)]])))
        else:
            out.extend(generic_blocks(v, str(k), depth + 1))
    return out


# --- analysis sections: the tables the console prints and the reports show ----------------------

def _span(low, high, unit) -> str:
    return f"{format_value(low, unit)} .. {format_value(high, unit)}"


def _extremes(*values) -> list[float]:
    """The numbers among ``values``, infinities included ("inf" and "-inf" as a worst-case
    file writes them); None, NaN and other text are no value."""
    out = []
    for v in values:
        if isinstance(v, str) and v in ("inf", "-inf"):
            v = float(v)
        if isinstance(v, (int, float)) and not isinstance(v, bool) and not math.isnan(v):
            out.append(float(v))
    return out


def worst_case_within(m: dict, limits: list[dict]) -> str:
    """"yes" when every worst-case extreme (extreme-value corners, optimizer, and the Monte
    Carlo samples, which can reach beyond the ranges searched) lies within every limit of its
    metric; "no" when one does not; "unknown" when they do but corners went unsolved
    (``eva_dropped``); "-" without a limit or an extreme."""
    lows = _extremes(m.get("eva_min"), m.get("opt_min"), m.get("mc_min"))
    highs = _extremes(m.get("eva_max"), m.get("opt_max"), m.get("mc_max"))
    if not limits or not (lows or highs):
        return "-"
    for c in limits:
        if c.get("min") is not None and (not lows or min(lows) < c["min"]):
            return "no"
        if c.get("max") is not None and (not highs or max(highs) > c["max"]):
            return "no"
    return "unknown" if m.get("eva_dropped") else "yes"


def monte_carlo_beyond_sides(m: dict) -> list[str]:
    """The sides (``"min"``, ``"max"``) on which the Monte Carlo extreme reaches past the
    corners' and the optimizer's."""
    lows = _extremes(m.get("eva_min"), m.get("opt_min"))
    highs = _extremes(m.get("eva_max"), m.get("opt_max"))
    mc_lo, mc_hi = _extremes(m.get("mc_min")), _extremes(m.get("mc_max"))
    sides = []
    if lows and mc_lo and mc_lo[0] < min(lows):
        sides.append("min")
    if highs and mc_hi and mc_hi[0] > max(highs):
        sides.append("max")
    return sides


def monte_carlo_beyond(m: dict) -> bool:
    """True when the Monte Carlo extremes reach past the corners' and the optimizer's."""
    return bool(monte_carlo_beyond_sides(m))


def worstcase_notes(data: dict) -> list[str]:
    """Sentences on what the worst-case table cannot show by itself: corners the model did
    not solve, and Monte Carlo units beyond the ranges searched."""
    notes = [str(n)[:1].upper() + str(n)[1:] + "." for n in data.get("notes") or []]
    metrics = data.get("metrics") or {}
    if any(isinstance(m, dict) and m.get("eva_method") == "sensitivity-directed"
           for m in metrics.values()):
        # said where a reviewer reads the corners, not only in worstcase.json
        notes.append(
            "Too many parameters vary for every corner (more than 12): each metric's corners "
            "are the ones the signs of its sensitivities at nominal point to, improved by "
            "single flips of one parameter at a time while that moves the metric further; a "
            "worst corner reachable only through less extreme ones can be missed, so set a "
            "parameter that matters little to fixed, or read the optimizer and Monte Carlo "
            "columns beside the corners.")
    unsolved = {name: m["eva_dropped"] for name, m in metrics.items()
                if isinstance(m, dict) and m.get("eva_dropped")}
    if unsolved:
        counts = sorted(set(unsolved.values()))
        notes.append(
            f"{'/'.join(format_number(c) for c in counts)} corners did not solve (no value) "
            f"for {', '.join(unsolved)}: the extremes there are of the solved corners only, so "
            "their worst case is unknown until those corners are solved (a supply below the "
            "stage's turn-on, a part outside its model's range).")
    outside = data.get("monte_carlo_outside")
    # a beyond extreme is an inner one when the unit that gave it lies inside the box
    # searched (as every unit does without normal or lognormal spreads); an older file
    # without the flags puts it down to the units outside when there are any
    inner, unsearched, drawn_out = [], [], []
    known = True  # whether the file says where each extreme's unit lies
    for name, m in metrics.items():
        if not isinstance(m, dict):
            continue
        sides = monte_carlo_beyond_sides(m)
        if not sides:
            continue
        known &= all(f"mc_{side}_inside" in m for side in sides)
        # side by side (found by a review: the note said "the search missed" of sides
        # never searched, a stress's lowest value, and not which side)
        missed, bare, out = [], [], []
        for side in sides:
            if not m.get(f"mc_{side}_inside", not outside):
                out.append(side)
            elif m.get(f"opt_{side}") is not None:
                missed.append(side)
            else:
                bare.append(side)
        for group, found in ((inner, missed), (unsearched, bare)):
            if found:
                group.append(f"{name} ({' and '.join(_SIDE_WORDS[s] for s in found)})")
        if out:
            drawn_out.append(name)
    if drawn_out:
        notes.append(
            f"The Monte Carlo samples reach beyond the worst-case extremes for "
            f"{', '.join(drawn_out)}: {format_number(outside)} of "
            f"{format_number(data.get('monte_carlo_samples'))} Monte Carlo samples drew a "
            "parameter outside the ranges searched (normal and lognormal spreads are not cut "
            "at their tolerance: truncnormal is)"
            + (", and the extreme is one of them" if known else "")
            + "; 'worst case within' counts them.")
    if inner:
        notes.append(
            f"The Monte Carlo samples reach beyond the worst-case extremes for "
            f"{', '.join(inner)} with a unit inside the ranges searched: an extreme inside "
            "the box (a metric that turns around within a parameter's range, e.g. a derating "
            "that starts at 25 degC) that the corners cannot reach and the search missed; "
            "'worst case within' counts it.")
    if unsearched:
        notes.append(
            f"The Monte Carlo samples reach beyond the corners for {', '.join(unsearched)} "
            "with a unit inside the ranges searched: an extreme inside the box that the "
            "corners cannot reach, on a side the optimizer does not search (it searches the "
            "limited metrics, a rating on its limited side only); 'worst case within' counts "
            "it.")
    endless = [name for name, m in metrics.items() if isinstance(m, dict) and any(
        math.isinf(v) for v in _extremes(*(m.get(k) for k in (
            "eva_min", "eva_max", "opt_min", "opt_max", "mc_min", "mc_max"))))]
    if endless:
        # found by a review: a corner's "inf" turn-on delay stood unexplained
        notes.append(
            f"An extreme of inf ({', '.join(endless)}) is a corner or unit where the metric "
            "has no finite value: a switching time whose transition never completes (the "
            "stage stays on, or never turns on, there: see off_fraction and drive_margin at "
            "that end), or a stress beyond its rating's maximum temperature.")
    below = [name for name, m in metrics.items() if isinstance(m, dict)
             and _below_every_value(m)]
    if below:
        # found by a review: the note put every case down to leakage, where most were a
        # gain's 1/h_FE over its wide, uneven range; and a second one: it said "RSS or
        # linear band" where only the linear band, which no table shows, reached below zero
        rss = [n for n in below if _extremes(metrics[n].get("rss_low"))
               and min(_extremes(metrics[n].get("rss_low"))) < 0]
        linear = [n for n in below if n not in rss]
        which = " and ".join(
            part for part in (
                f"the RSS band of {', '.join(rss)}" if rss else "",
                f"the linear band (worstcase.json's linear_low, not in the table) of "
                f"{', '.join(linear)}" if linear else "") if part)
        notes.append(
            f"{which[:1].upper() + which[1:]} reach{'es' if len(below) == 1 else ''} below "
            "zero, where no "
            "corner and no Monte Carlo unit lies: the metric is far from linear over the "
            "tolerances (a base current or stress that goes as 1/h_FE over a gain's wide, "
            "uneven range; leakage, exponential in temperature), so its band is no estimate "
            "there; read the EVA and Monte Carlo columns.")
    short = _short_bands(data)
    if short:
        notes.append(
            f"The RSS band of {', '.join(short)} stops well short of the Monte Carlo's 0.1 % "
            "or 99.9 % point on the limited side: the metric is far from linear there, so "
            "the band understates that side; read the EVA, optimizer and Monte Carlo "
            "columns.")
    return notes


_SIDE_WORDS = {"min": "lowest", "max": "highest"}

#: the share of the Monte Carlo 0.1 % (99.9 %) point's distance from nominal below which an
#: RSS band counts as short: a linear metric of normal inputs has its 3-sigma band at 3 /
#: 3.09 = 0.97 of it, of uniform inputs beyond it (common practice, no source)
SHORT_BAND = 0.8


def _short_bands(data: dict) -> list[str]:
    """Limited metrics (with the side) whose RSS band ends nearer the nominal than
    :data:`SHORT_BAND` times the Monte Carlo's 0.1 % or 99.9 % point on a limited side."""
    out = []
    for c in data.get("criteria") or []:
        m = (data.get("metrics") or {}).get(c["metric"])
        if not isinstance(m, dict):
            continue
        nominal = m.get("nominal")
        for side, band, point in (("min", "rss_low", "mc_p001"), ("max", "rss_high", "mc_p999")):
            if c.get(side) is None:
                continue
            values = _extremes(nominal, m.get(band), m.get(point))
            if len(values) < 3 or any(math.isinf(v) for v in values):
                continue
            reach, spread = abs(m[band] - nominal), abs(m[point] - nominal)
            said = f"{c['metric']} ({_SIDE_WORDS[side]})"
            if spread > 0 and reach < SHORT_BAND * spread and said not in out:
                out.append(said)
    return out


def _below_every_value(m: dict) -> bool:
    """Whether a metric's linearized band reaches below zero while its nominal, its solved
    corners and its Monte Carlo units all lie at or above zero."""
    band = _extremes(m.get("rss_low"), m.get("linear_low"))
    seen = _extremes(m.get("nominal"), m.get("eva_min"), m.get("mc_min"))
    return bool(band) and min(band) < 0 and len(seen) == 3 and min(seen) >= 0


def worstcase_tables(data: dict) -> list[Table]:
    """The worst-case analysis as tables: every metric's nominal, extreme-value (EVA), RSS,
    optimizer and Monte Carlo extremes beside its limits, then the parameter bounds."""
    units = data.get("units") or {}
    limits: dict[str, list[dict]] = {}
    for c in data.get("criteria") or []:
        limits.setdefault(c["metric"], []).append(c)
    rows, classes = [], []
    for name, m in data["metrics"].items():
        u = units.get(name)
        within = worst_case_within(m, limits.get(name, []))
        rows.append([name, format_value(m.get("nominal"), u),
                     _span(m.get("eva_min"), m.get("eva_max"), u),
                     _span(m.get("rss_low"), m.get("rss_high"), u),
                     _span(m.get("opt_min"), m.get("opt_max"), u),
                     _span(m.get("mc_min"), m.get("mc_max"), u),
                     "; ".join(_limits_text(c, u) for c in limits.get(name, [])) or "-",
                     within])
        classes.append([""] * 7 + ["v-fail" if within in ("no", "unknown") else ""])
    metrics = Table(["metric", "nominal", "EVA min .. max", "RSS band", "optimizer min .. max",
                     "Monte Carlo min .. max", "limit", "worst case within"], rows,
                    "worstcase-table", "Worst case of every metric", classes)
    bounds = Table(["parameter", "nominal", "low", "high"],
                   [[b["name"], format_value(b.get("nominal"), b.get("unit")),
                     format_value(b.get("low"), b.get("unit")),
                     format_value(b.get("high"), b.get("unit"))]
                    for b in data.get("bounds") or []],
                   "bounds-table", "Parameter ranges searched (tolerance, widened by any drift)")
    return [metrics, bounds]


WORST_CASE_METHODS = (
    "EVA: every parameter at an end of its range (all corners, or where more than 12 vary "
    "the corners the sensitivities at nominal point to, improved by single flips). RSS: the sensitivities at "
    "nominal times each parameter's room to its own limit on each side, added in quadrature "
    "(a discrete set: the metric's change at the set's ends); it takes the metric as linear "
    "and the "
    "parameters as independent, so for a metric exponential in its inputs (leakage, off "
    "current) the band can reach values the circuit cannot (a negative current). Optimizer: "
    "bounded searches from several starts for the limited metrics (a rating on its limited "
    "side), which finds an extreme inside the ranges that no corner shows. Monte Carlo: the "
    "extremes of the samples drawn, "
    "which can lie beyond the ranges searched. 'worst case within' compares the EVA, optimizer "
    "and Monte Carlo extremes with the metric's limits; it reads 'unknown' where corners did "
    "not solve.")


def paired_sentence(change: dict | None, what: str, first: str, second: str) -> str | None:
    """One sentence on a yield change measured unit by unit (:func:`stats.paired_difference`)
    between the runs named ``first`` and ``second``."""
    if not isinstance(change, dict) or "difference" not in change:
        return None
    p = change.get("p_value")
    low, high = change.get("ci_low"), change.get("ci_high")
    significant = isinstance(p, (int, float)) and p < 0.05
    # the interval (Newcombe's, unconditional) and the exact test (conditional on the
    # discordant units) are different methods and can disagree near 5 %: a review found
    # "no change shown" beside an interval that excluded zero; such a case is said so
    excludes = (isinstance(low, (int, float)) and isinstance(high, (int, float))
                and (low > 0.0 or high < 0.0))
    if significant and excludes or not significant and not excludes:
        shown = ("a change at 5 % significance" if significant
                 else "no change shown at 5 % significance")
    else:
        shown = ("borderline at 5 % significance: the exact test "
                 + ("shows a change while the interval still includes zero" if significant
                    else "shows no change while the interval excludes zero")
                 + ", so treat the change as unresolved and run more samples")
    return (f"Unit by unit (the same units in both runs) {what} changes the yield by "
            f"{format_points(change['difference'], 'percentage points')} (95 % interval "
            f"{format_points(change.get('ci_low'))} .. {format_points(change.get('ci_high'))}"
            f"): "
            f"{format_number(change.get('only_first'))} units pass only {first}, "
            f"{format_number(change.get('only_second'))} only {second}; exact McNemar "
            f"p {'< 1e-15' if isinstance(p, (int, float)) and p < 1e-15 else f'= {p:.2g}'}, "
            f"{shown}.")


def whatif_tables(data: dict) -> list[Table]:
    """A what-if as tables: the pins, yield and verdict of the baseline and the pinned run,
    each criterion's counted rate, and each metric's 0.1 % and 99.9 % points."""
    pins = Table(["parameter", "pinned at"],
                 [[n, str(v)] for n, v in (data.get("pinned_values") or {}).items()],
                 "pins-table", "Parameters pinned (the rest keep their samples)")
    yb, yp = data["yield"]["baseline"], data["yield"]["pinned"]
    verdicts = data.get("verdict") or {}
    nc = data.get("not_converged") or {}
    runs = Table(["", "baseline", "pinned"], [
        ["yield", format_rate(yb.get("estimate")), format_rate(yp.get("estimate"))],
        ["95 % exact interval", yield_interval(yb.get("ci_low"), yb.get("ci_high")),
         yield_interval(yp.get("ci_low"), yp.get("ci_high"))],
        ["verdict", *(verdict_word(verdicts.get(k)) for k in ("baseline", "pinned"))],
        ["not converged", format_number(nc.get("baseline")), format_number(nc.get("pinned"))],
    ], "whatif-yield-table", "Baseline and pinned run")
    metrics = data.get("metrics") or {}
    rows, classes = [], []
    for name, c in data["criteria"].items():
        unit = (metrics.get(c.get("metric")) or {}).get("unit")
        b, q = c["baseline"], c["pinned"]
        rows.append([name, _limits_text(c.get("limit") or {}, unit), format_ppm(b.get("rate")),
                     format_ppm(q.get("rate")),
                     verdict_word(b.get("verdict")), verdict_word(q.get("verdict"))])
        classes.append([""] * 4 + [f"v-{b.get('verdict')}", f"v-{q.get('verdict')}"])
    criteria = Table(["criterion", "limit", "baseline ppm", "pinned ppm", "baseline",
                      "pinned"], rows, "whatif-criteria-table",
                     "Counted failure rate per criterion", classes)
    rows = []
    for name, m in metrics.items():
        u = m.get("unit")
        b, q = m["baseline"], m["pinned"]
        rows.append([name, f"{format_value(b.get('p001'), u)} / {format_value(b.get('p999'), u)}",
                     f"{format_value(q.get('p001'), u)} / {format_value(q.get('p999'), u)}"])
    spread = Table(["metric", "baseline p0.1 / p99.9", "pinned p0.1 / p99.9"], rows,
                   "whatif-metrics-table", "Spread of every metric")
    return [pins, runs, criteria, spread]


def sensitivity_tables(data: dict, top: int = 6) -> list[Table]:
    """One ranking per limited metric (all metrics for a file without that list): the
    ``top`` inputs by their share of the metric's variance, the larger of the squared
    Spearman coefficient and the Sobol total index (:func:`_variance_share`), with SRRC,
    PRCC and the Sobol first and total indices."""
    rank = data["rank"]
    order = data.get("limited") or list(dict.fromkeys(r["metric"] for r in rank))
    sobol = data.get("sobol") or {}

    def cell(v):
        # + 0.0 after rounding: "0.000", not "-0.000" (found by a review)
        return f"{round(v, 3) + 0.0:.3f}" if _finite(v) else "-"

    tables = []
    for metric in order:
        sob = sobol.get(metric) or {}
        rows = sorted((r for r in rank if r["metric"] == metric),
                      key=lambda r: -_variance_share(r, sob.get(r["input"]) or {}))[:top]
        if not rows:
            continue
        # an index with its bootstrap interval: on a few hundred rows a total index of 1.06
        # read as impossible where its interval, 0.39 .. 2.47, says it is only noise
        spread = any(_finite((sob.get(r["input"]) or {}).get(f"{k}_low"))
                     for r in rows for k in ("first", "total"))
        suffix = " (95 % interval)" if spread else ""
        tables.append(Table(
            ["input", "spearman", "srrc", "prcc", f"sobol S1{suffix}", f"sobol ST{suffix}"],
            [[r["input"], cell(r["spearman"]), cell(r.get("srrc")), cell(r.get("prcc")),
              _index_cell(sob.get(r["input"]) or {}, "first", cell),
              _index_cell(sob.get(r["input"]) or {}, "total", cell)] for r in rows],
            None, metric))
    return tables


def _finite(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _variance_share(rank_row: dict, sobol_row: dict) -> float:
    """An input's share of a metric's variance for ordering a ranking: the larger of its
    squared Spearman coefficient (a monotone input's share: rho^2 = S_1 for a linear
    additive model, Saltelli et al., Global Sensitivity Analysis: The Primer, 2008, ch. 1)
    and its Sobol total index, which also sees an input whose effect changes sign (found by
    a review: an ambient temperature of total index 0.043 and Spearman -0.02 was left out
    for inputs of 0.0003); 0 where neither is known."""
    rho = rank_row.get("spearman")
    shares = [rho * rho] if _finite(rho) else []
    if _finite(sobol_row.get("total")):
        shares.append(sobol_row["total"])
    return max(shares, default=0.0)


def _index_cell(row: dict, kind: str, cell) -> str:
    """A Sobol index, with its bootstrap interval where the file has one, all three to the
    same three decimals (found by a review: "0.008 (0.01 .. 0.01)" read as an index
    outside its interval)."""
    lo, hi = row.get(f"{kind}_low"), row.get(f"{kind}_high")
    if not (_finite(row.get(kind)) and _finite(lo) and _finite(hi)):
        return cell(row.get(kind))
    return f"{cell(row[kind])} ({cell(lo)} .. {cell(hi)})"


def choose_table(data: dict) -> Table:
    """A value choice as a table: each candidate's values, yield with its exact interval, the
    trade-off metrics and the criterion that fails most often (with its rate); the best
    candidate marked "best", the frontier "frontier"."""
    names = list(data["vary"])
    units = data.get("units") or {}
    trade = data.get("tradeoff") or {}
    front = set(data.get("frontier") or [])
    best = data.get("best")
    rows, classes = [], []
    for i, c in enumerate(data["candidates"]):
        marks = (["best"] if c == best else []) + (["frontier"] if i in front else [])
        rates = {k: r for k, r in (c.get("criteria") or {}).items()
                 if isinstance(r, (int, float)) and r > 0}
        # units whose solve did not converge count as failures in the yield and in no
        # criterion's rate: a candidate failing only by them read "fails most: -"
        stuck, n = c.get("not_converged"), data.get("samples")
        if isinstance(stuck, int) and stuck > 0 and isinstance(n, int) and n > 0:
            rates["not converged"] = stuck / n
        worst = max(rates, key=rates.get) if rates else None
        rows.append([*(format_value(c["values"][n], units.get(n)) for n in names),
                     format_yield(c["yield"], 3),
                     yield_interval(c["ci_low"], c["ci_high"], unit=False),
                     *(format_value(c.get(m), t.get("unit")) for m, t in trade.items()),
                     f"{worst} {format_rate(rates[worst])}" if worst else "-",
                     _least_room(c),
                     _versus_best(c, c == best),
                     ", ".join(marks)])
        classes.append([""] * (len(names) + 5 + len(trade)) + ["v-pass" if c == best else ""])
    return Table([*names, "yield %", "95 % interval %",
                  *(f"{m} {t.get('statistic', '')}".strip() for m, t in trade.items()),
                  "fails most", "least room (sd)",
                  "yield vs best, paired (percentage points)", ""],
                 rows, "choose-table", "Candidates (common random numbers)", classes)


def _least_room(candidate: dict) -> str:
    """The candidate's smallest room to a limit in standard deviations and the criterion it
    belongs to, which decides among candidates of equal yield (found by a review: a best
    value chosen by its room to a current rating that no column showed)."""
    room = candidate.get("robust_margin")
    if not _finite(room):
        return "-"
    name = candidate.get("robust_criterion")
    return f"{room:.3g}" + (f" ({name})" if name else "")


def _versus_best(candidate: dict, is_best: bool) -> str:
    """A candidate's yield change against the best one, unit by unit, and its p-value."""
    v = candidate.get("vs_best")
    if is_best or not isinstance(v, dict) or "difference" not in v:
        return "-"
    p = v["p_value"]
    return f"{format_points(v['difference'])} (p {'< 1e-15' if p < 1e-15 else f'{p:.2g}'})"


def choose_separation(data: dict) -> str | None:
    """Whether the best candidate's lead is more than the draw: the candidates whose yield
    an exact McNemar test on the same units does not tell from the best's at 5 %; and, when
    no candidate passes, that the best is only the least bad."""
    failing = [c for c in data.get("candidates") or [] if isinstance(c, dict)]
    if failing and all(c.get("verdict") == "fail" for c in failing):
        lead = ("No candidate passes every criterion: the best is the one with the highest "
                "yield, not a design that passes; the choice alone does not make this stage "
                "pass. ")
    else:
        lead = ""
    text = _choose_separation(data)
    return (lead + (text or "")).strip() or None


def _choose_separation(data: dict) -> str | None:
    best = data.get("best") or {}
    units = data.get("units") or {}
    close = [c for c in data.get("candidates") or []
             if c != best and isinstance(c.get("vs_best"), dict)
             and c["vs_best"].get("p_value", 0.0) >= 0.05]
    if not any(isinstance(c.get("vs_best"), dict) for c in data.get("candidates") or []):
        return None
    every = [c for c in data.get("candidates") or [] if isinstance(c, dict)]
    if every and all(c.get("yield") == 1.0 for c in every):
        # (a review read "more samples would settle it" where no unit of any candidate failed)
        return ("Every unit of every candidate passes: the yields cannot tell the candidates "
                "apart, and the best is the one with the most room to its limits (the least "
                "room column, in the metrics' standard deviations, within a tenth of one a "
                "tie), then the value nearest the study's own.")
    if not close:
        return ("Unit by unit (the same units for every candidate) the best candidate's yield "
                "is ahead of every other at 5 % significance (exact McNemar test).")
    names = ["; ".join(f"{n} = {format_value(v, units.get(n))}"
                       for n, v in (c.get("values") or {}).items()) for c in close]
    return (f"Unit by unit (the same units for every candidate) the best candidate's yield is "
            f"not told apart at 5 % significance (exact McNemar test) from {', '.join(names)}: "
            "the choice among them is not settled by this run; more samples would settle it, "
            "or take the one the other figures favour.")


def _worstcase_blocks(data: dict) -> list[Block]:
    metrics, bounds = worstcase_tables(data)
    failing = [row[0] for row in metrics.rows if row[-1] == "no"]
    unknown = [row[0] for row in metrics.rows if row[-1] == "unknown"]
    said = []
    if failing:
        said.append(f"Worst case beyond a limit: {', '.join(failing)}.")
    if unknown:
        said.append(f"Worst case unknown (corners unsolved): {', '.join(unknown)}.")
    if not said and any(row[-1] == "yes" for row in metrics.rows):
        said.append("Every limited metric's worst case lies within its limits.")
    out = [Block("p", f"{format_number(data.get('evaluations'))} evaluations, beside a "
                      f"{format_number(data.get('monte_carlo_samples'))}-sample Monte Carlo "
                      "run. " + " ".join(said)),
           Block("table", table=metrics)]
    out += [Block("note", n) for n in worstcase_notes(data)]
    out += [Block("p", WORST_CASE_METHODS), Block("table", table=bounds)]
    return out


def _whatif_blocks(data: dict) -> list[Block]:
    followers = data.get("followers") or []
    moved = (f" and their correlated partners {', '.join(followers)}, drawn given the pins "
             "(each unit keeps its own deviation from the conditional mean)" if followers else "")
    change = paired_sentence(data.get("yield_change"), "the pin", "in the baseline",
                             "pinned")
    return ([Block("p", f"{format_number(data.get('samples'))} samples each, common random "
                        f"numbers: the pinned run differs from the baseline only by the pins"
                        f"{moved}.")]
            + [Block("note", str(n)) for n in data.get("pin_notes") or []]
            + ([Block("p", change)] if change else [])
            + [Block("table", table=t) for t in whatif_tables(data)])


def _sensitivity_blocks(data: dict) -> list[Block]:
    out = [Block("p", f"Rank coefficients from {format_number(data.get('samples'))} samples; "
                      f"Sobol indices from {format_number(data.get('sobol_n'))} rows "
                      f"({format_number(data.get('sobol_evaluations'))} evaluations). The six "
                      "inputs with the largest share of each metric's variance (the larger of "
                      "the squared Spearman coefficient and the Sobol total index, which also "
                      "sees an input whose effect changes sign); every input's figures are in "
                      "sensitivity.json.")]
    out += [Block("table", table=t) for t in sensitivity_tables(data)]
    out += [Block("note", str(n)) for n in data.get("notes") or []]
    return out


def _choose_blocks(data: dict) -> list[Block]:
    best = data.get("best") or {}
    units = data.get("units") or {}
    text = ", ".join(f"{n} = {format_value(v, units.get(n))}"
                     for n, v in (best.get("values") or {}).items())
    separation = choose_separation(data)
    return ([Block("p", f"{format_number(data.get('samples'))} samples per candidate. Best: "
                        f"{text} (yield {format_rate(best.get('yield'))}); the frontier holds "
                        "the candidates no other beats on both trade-off metrics.")]
            + ([Block("p", separation)] if separation else [])
            + [Block("table", table=choose_table(data))]
            + [Block("note", str(n)) for n in data.get("notes") or []])


#: the section builder of each analysis file; a file they cannot read (written by hand or by
#: another version) is shown as saved
ANALYSIS_BLOCKS = {"worstcase.json": _worstcase_blocks, "whatif.json": _whatif_blocks,
                   "sensitivity.json": _sensitivity_blocks, "choose.json": _choose_blocks}


def analysis_blocks(fname: str, data) -> list[Block]:
    """The report section of one analysis file: its tables, or its contents as saved."""
    build = ANALYSIS_BLOCKS.get(fname)
    if build is not None and isinstance(data, dict):
        try:
            return build(data)
        except _WRONG_KIND:
            pass
    if isinstance(data, dict) and "pinned_values" in data:
        # the pins in their units stand for the SI values (K, not degC) kept for programs
        data = {k: v for k, v in data.items() if k != "pins"}
    return [Block("note", "This file is not laid out as this version writes it; its "
                          "contents follow as saved.")] * (build is not None) + \
        generic_blocks(data)


# --- reading the run ----------------------------------------------------------------------------

#: Top-level keys a saved result file cannot lack (the summary's sections; an analysis
#: file's tables, which are otherwise rendered as they come); a file without them was not
#: written by a command (``{}``, a list, another program's JSON).
REQUIRED_KEYS = {
    SUMMARY_FILE: ("study", "seed", "samples", "criteria", "metrics", "verdict"),
    "sensitivity.json": ("rank",),
    "worstcase.json": ("metrics",),
    "whatif.json": ("criteria", "metrics"),
    "choose.json": ("candidates",),
    WAVEFORMS_FILE: ("samples",),
}


def _read_json(path: Path) -> dict:
    """A saved result file, or :class:`DamagedFile` naming it when it is not valid JSON or
    lacks what the command writes."""
    mend = "run the command again to write it anew"
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except UnicodeDecodeError:
        raise DamagedFile(path, f"not UTF-8 text; {mend}") from None
    except json.JSONDecodeError as exc:
        raise DamagedFile(path, f"not valid JSON ({exc.msg} at line {exc.lineno} column "
                                f"{exc.colno}); {mend}") from None
    if not isinstance(data, dict):
        raise DamagedFile(path, f"expected a JSON object, found a {type(data).__name__}; {mend}")
    missing = [k for k in REQUIRED_KEYS.get(path.name, ()) if k not in data]
    if missing:
        raise DamagedFile(path, f"lacks {', '.join(missing)}: not a result file of this "
                                f"tool; {mend}")
    # the summary's counts and tables as the run writes them ("samples": "many" was
    # printed as "194048 of many samples")
    kinds = REQUIRED_TYPES.get(path.name, {})
    wrong = [f"{k} ({kind.__name__} expected)" for k, kind in kinds.items()
             if k in data and (not isinstance(data[k], kind) or isinstance(data[k], bool))]
    if wrong:
        raise DamagedFile(path, f"holds {', '.join(wrong)} of another kind: not as this tool "
                                f"writes it; {mend}")
    return data


#: the types of the required keys a command writes
REQUIRED_TYPES = {
    SUMMARY_FILE: {"study": str, "seed": int, "samples": int, "criteria": dict,
                   "metrics": dict, "verdict": str},
    "whatif.json": {"criteria": dict, "metrics": dict},
    "choose.json": {"candidates": list},
}


class _Kept(dict):
    """A saved file's JSON object that notes each key read from it, so that a value of
    another kind than the command writes (``"yield": "x"``) is refused naming its file and
    key, not ended in a traceback."""

    def __init__(self, items, file: str, where: str, seen: list):
        super().__init__(items)
        self._file, self._where, self._seen = file, where, seen

    def __getitem__(self, key):
        self._seen[0] = (self._file, f"{self._where}{key}")
        return super().__getitem__(key)

    def get(self, key, default=None):
        self._seen[0] = (self._file, f"{self._where}{key}")
        return super().get(key, default)


def _kept(value, file: str, seen: list, where: str = ""):
    """``value`` (parsed JSON of ``file``) with every object a :class:`_Kept`."""
    if isinstance(value, dict):
        return _Kept({k: _kept(v, file, seen, f"{where}{k}.") for k, v in value.items()},
                     file, where, seen)
    if isinstance(value, list):
        return [_kept(v, file, seen, f"{where[:-1]}[{i}].") for i, v in enumerate(value)]
    return value


#: what a value of an unexpected kind raises where the report reads it
_WRONG_KIND = (KeyError, TypeError, ValueError, AttributeError, IndexError)


def _wrong_kind(folder: Path, seen: list) -> DamagedFile:
    """The refusal of a saved value the report could not read as the command writes it."""
    file, key = seen[0] if seen[0] else ("", "")
    return DamagedFile(folder / file if file else folder,
                       f"holds a value of another kind than this tool writes, or lacks one"
                       + (f" (found while reading {key})" if key else "")
                       + "; run the command again to write it anew")


def _safe_name(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", text).strip("_") or "x"


def _limited_metrics(summary: dict) -> list[str]:
    seen: list[str] = []
    for c in summary.get("criteria", {}).values():
        if c["metric"] not in seen:
            seen.append(c["metric"])
    return seen


def _sensitivity_rows(summary: dict, extras: dict) -> list[dict]:
    rows = summary.get("sensitivity")
    if not rows:
        data = extras.get("sensitivity.json")
        if isinstance(data, dict):
            data = data.get("rows", data.get("rank", data.get("sensitivity")))
        rows = data
    if isinstance(rows, list) and rows and all(
            isinstance(r, dict) and "input" in r and "metric" in r for r in rows):
        return rows
    return []


@dataclass(frozen=True)
class PlotTask:
    """One figure of a report: the :mod:`tolerance.plots` function that draws it, its
    arguments, the PNG file it goes to and its caption. Tasks are independent of each other,
    so :func:`render_plots` may draw them in any process."""

    draw: str
    args: tuple
    kwargs: dict
    path: Path
    caption: str


def _import_plotting() -> bool:
    from tolerance import plots  # noqa: F401  (matplotlib, scipy.stats, seaborn)

    return True


#: the background warm-up of :func:`warm_plot_workers`, joined before any figure is drawn
_warm_up: threading.Thread | None = None


def warm_plot_workers(jobs: int) -> None:
    """Have the ``jobs`` loky workers import the plotting stack in the background.

    A worker's first figure costs it about 2.5 s of imports (matplotlib, and seaborn with
    scipy.stats). A command that knows figures will follow calls this once its samples are
    written, so the workers import while the parent computes the summary and insights;
    :func:`render_plots` waits for the warm-up before it hands out figures. Nothing happens
    with fewer than two jobs (the parent draws). A failure here is left for the drawing to
    report.
    """
    global _warm_up
    if jobs < 2 or _warm_up is not None:
        return
    from joblib import Parallel, delayed

    def work() -> None:
        try:
            Parallel(n_jobs=jobs, backend="loky")(delayed(_import_plotting)()
                                                  for _ in range(jobs))
        except Exception:  # noqa: BLE001 - the figures themselves will say what is wrong
            pass

    _warm_up = threading.Thread(target=work, name="plot-worker-warm-up", daemon=True)
    _warm_up.start()


def _join_warm_up() -> None:
    global _warm_up
    if _warm_up is not None:
        _warm_up.join()
        _warm_up = None


#: key of :func:`build_document`'s ``section_notes`` for the figures that could not be drawn
NOT_DRAWN = "plots"


def _render(task: PlotTask) -> Path | str:
    """The saved figure's path, or why it could not be drawn: one figure that fails (data
    no plot foresaw) costs that figure, named in the report, not the whole report."""
    # imported here: with workers drawing, the parent never pays for matplotlib and seaborn
    from tolerance import plots

    try:
        with warnings.catch_warnings():
            # a limit of 1e308 overflows the axis's tick arithmetic: the figure is still
            # drawn, and matplotlib's warning, with its file path, only puzzled the console
            warnings.simplefilter("ignore", RuntimeWarning)
            return plots.save(getattr(plots, task.draw)(*task.args, **task.kwargs),
                              task.path)
    except (ValueError, TypeError, ArithmeticError, IndexError) as exc:
        import matplotlib.pyplot as plt

        plt.close("all")
        return f"{task.path.name}: {type(exc).__name__}: {exc}"


def render_plots(tasks: list[PlotTask], jobs: int = 1) -> list[Path | str]:
    """Draw and save every task's figure, in ``jobs`` joblib workers (loky) when more than one.
    Each entry is the figure's path, or a line saying why it could not be drawn.

    Each figure depends only on its own task, and matplotlib's Agg rendering is the same in
    every process, so the PNG files are byte-identical whatever the number of workers
    (``tests/test_report.py`` checks it). With the run's workers still alive (joblib keeps
    its process pool), a report after a run with ``--jobs 2`` starts no new processes; each
    worker imports matplotlib and seaborn once.
    """
    if jobs < 1:
        raise ValueError(f"jobs must be at least 1, got {jobs}")
    _join_warm_up()
    if jobs == 1 or len(tasks) < 2:
        return [_render(t) for t in tasks]
    from joblib import Parallel, delayed

    return Parallel(n_jobs=min(jobs, len(tasks)), backend="loky")(
        delayed(_render)(t) for t in tasks)


def _remove_stale_plots(plot_dir: Path) -> None:
    for stale in sorted([*plot_dir.glob("*.png"), *plot_dir.glob("*.png" + TMP_SUFFIX)]):
        if stale.name.startswith(PLOT_PREFIXES):
            stale.unlink()


#: most passing samples a plot draws (memory stays flat for long runs)
PLOT_ROWS = 500_000

#: column of a plot's frame holding how many units each drawn one stands for
WEIGHT_COLUMN = "__units_drawn_for"


def _run_plots(folder: Path, summary: dict, extras: dict,
               plot_dir: Path) -> list[PlotTask]:
    """Histograms, tornado charts and driver scatters of a Monte Carlo run."""
    samples_dir = folder / SAMPLES_DIR
    with runner.ChunkColumns(samples_dir) as read:
        return _run_plot_tasks(read, summary, extras, plot_dir)


def _plot_rows(passed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows a long run's plots draw and the units each stands for: of the passing and of
    the failing units each, all of them up to :data:`PLOT_ROWS`, else a random
    ``PLOT_ROWS`` of them (numpy's generator, seed 0: the same figures every time), weighted
    so that each group's weights add up to its count."""
    rng = np.random.default_rng(0)
    rows, weights = [], []
    for group in (np.flatnonzero(~passed), np.flatnonzero(passed)):
        if group.size > PLOT_ROWS:
            pick = np.sort(rng.choice(group, size=PLOT_ROWS, replace=False))
            rows.append(pick)
            weights.append(np.full(PLOT_ROWS, group.size / PLOT_ROWS))
        else:
            rows.append(group)
            weights.append(np.ones(group.size))
    order = np.argsort(np.concatenate(rows), kind="stable")
    return np.concatenate(rows)[order], np.concatenate(weights)[order]


def _run_plot_tasks(read, summary: dict, extras: dict, plot_dir: Path) -> list[PlotTask]:
    made: list[PlotTask] = []
    columns: dict[str, np.ndarray] = {}
    # beyond PLOT_ROWS units the plots draw a seeded random PLOT_ROWS of the passing units
    # and of the failing ones (every failing unit while there are fewer), each drawn unit
    # standing for its group's count over the drawn (weight): the failing tail is drawn whole
    # where it matters (every k-th unit lost the 1 failure in 600,000 of a driver scatter),
    # the bars and legends count every unit exactly, and a random pick is fair on a Sobol
    # run, whose every other point lies in one half of an input's range
    n = summary.get("samples") if isinstance(summary.get("samples"), int) else None
    if n is None:
        n = len(read(next(iter(_limited_metrics(summary)), "converged")))
    drawn = weight = None
    if n > PLOT_ROWS:
        try:
            passed = read("pass").astype(bool)
        except (KeyError, OSError, ValueError):  # a folder without the overall flag
            passed = np.ones(n, dtype=bool)
        drawn, weight = _plot_rows(passed)
    thinned = ("" if drawn is None else
               f" (a random {PLOT_ROWS:,} of the passing units and of the failing ones, "
               f"every failing unit where fewer fail, weighted to count every unit)")

    def col(name):
        if name not in columns:
            full = read(name)
            columns[name] = full[drawn] if drawn is not None else full
        return columns[name]

    def weights() -> dict:
        return {} if weight is None else {WEIGHT_COLUMN: weight}

    criteria = summary.get("criteria", {})
    for metric in _limited_metrics(summary):
        # copy=False: the task holds the cached column itself, not a second copy
        frame = pd.DataFrame({metric: col(metric), **weights()}, copy=False)
        made.append(PlotTask("histogram", (frame, metric, summary),
                             {}, plot_dir / f"hist-{_safe_name(metric)}.png",
                             f"Distribution of {metric} with its limits and counted failure "
                             f"rate{thinned}"))

    rows = _sensitivity_rows(summary, extras)
    spreads = summary.get("metrics") or {}
    for metric in _limited_metrics(summary):
        spread = spreads.get(metric) if isinstance(spreads.get(metric), dict) else {}
        if spread.get("min") is not None and spread.get("min") == spread.get("max"):
            continue  # a constant metric (no unit ran away) has no ranks to draw
        if any(r["metric"] == metric for r in rows):
            made.append(PlotTask("tornado", (rows, metric), {},
                                 plot_dir / f"tornado-{_safe_name(metric)}.png",
                                 f"Rank sensitivity of {metric} (SRRC)"))

    units = {p["name"]: p.get("unit") for p in summary.get("parameters", []) or []
             if isinstance(p, dict) and "name" in p}
    drivers = summary.get("failure_drivers") or {}
    for name, info in drivers.items():
        ranking = (info or {}).get("ranking") or []
        if name not in criteria or not ranking or ranking[0].get("input") is None:
            continue
        top = ranking[0]["input"]
        metric = criteria[name]["metric"]
        related = [f"pass.{n}" for n, c in criteria.items() if c["metric"] == metric]
        frame = pd.DataFrame({top: col(top), metric: col(metric),
                              **{r: col(r) for r in related}, **weights()})
        made.append(PlotTask("driver_scatter", (frame, top, metric, summary, units), {},
                             plot_dir / f"driver-{_safe_name(name)}.png",
                             f"Top failure driver of {name}: {top} against the margin of "
                             f"{metric}{thinned}"))
    return made


_RUN_TITLES = {"turn_on": "Turn-on", "turn_off": "Turn-off"}


def _waveform_plots(data: dict, plot_dir: Path) -> list[PlotTask]:
    """Load current and V_CE against time of the stored samples, one figure per transient."""
    entries = [e for e in (data.get("samples") or []) if isinstance(e, dict)]
    units = data.get("units") or {}
    temp = data.get("device_temperature")
    made = []
    for run, word in _RUN_TITLES.items():
        traces = [(e, e[run]) for e in entries if isinstance(e.get(run), dict)
                  and all(k in e[run] for k in ("time", "load_current", "vce"))]
        if not traces:
            continue
        labels = [str(e.get("label", "")) + ("" if e.get("sample") is None
                                             else f" (sample {e['sample']})")
                  for e, _ in traces]
        args = ([np.asarray(t["time"], dtype=float) for _, t in traces],
                [np.asarray(t["load_current"], dtype=float) for _, t in traces],
                labels, units.get("load_current", "A"), units.get("time", "s"))
        kwargs = dict(ylabel="load current",
                      lower_traces=[np.asarray(t["vce"], dtype=float) for _, t in traces],
                      lower_unit=units.get("vce", "V"), lower_ylabel="V_CE",
                      title=f"{word} transient of {len(traces)} stored samples",
                      time_scale="symlog")
        note = f"; devices at the {temp} temperature of each sample" if temp else ""
        made.append(PlotTask("waveforms", args, kwargs, plot_dir / f"waveforms-{run}.png",
                             f"{word} transient: load current and V_CE against time from the "
                             f"drive edge (linear near zero, logarithmic beyond) of the stored "
                             f"samples ({', '.join(labels)}){note}"))
    return made


def _whatif_plots(folder: Path, whatif: dict, summary: dict | None,
                  plot_dir: Path) -> list[PlotTask]:
    """ECDF overlays from whatif_samples.parquet (columns baseline.<metric>, pinned.<metric>)."""
    path = folder / WHATIF_SAMPLES
    if not path.is_file() or not isinstance(whatif, dict):
        return []
    frame = pd.read_parquet(path)
    metrics = whatif.get("metrics") if isinstance(whatif.get("metrics"), dict) else {}
    wanted = []
    for c in (whatif.get("criteria") or {}).values():
        if isinstance(c, dict) and c.get("metric") not in wanted:
            wanted.append(c.get("metric"))
    limits = {}
    # the what-if's own criteria carry their limits (a what-if folder has no summary.json,
    # and its overlays drew none)
    for c in (whatif.get("criteria") or {}).values():
        if isinstance(c, dict) and isinstance(c.get("limit"), dict):
            limits.setdefault(c.get("metric"), []).append(c["limit"])
    if summary:
        own = set(limits)
        for c in summary.get("criteria", {}).values():
            if c["metric"] not in own:
                limits.setdefault(c["metric"], []).append(c["limit"])
    made = []
    # the values in their units (-40 degC, not 233.1); a file without them gives the SI values
    shown = whatif.get("pinned_values") or whatif.get("pins") or {}
    pins = ", ".join(f"{k} = {v if isinstance(v, str) else format_number(v)}"
                     for k, v in shown.items())
    for metric in wanted:
        b, q = f"baseline.{metric}", f"pinned.{metric}"
        if b not in frame or q not in frame:
            continue
        unit = (metrics.get(metric) or {}).get("unit")
        made.append(PlotTask(
            "whatif_overlay", (frame[b].to_numpy(dtype=float), frame[q].to_numpy(dtype=float),
                               metric, unit, limits.get(metric)),
            {"labels": ("baseline", f"pinned {pins}" if pins else "pinned")},
            plot_dir / f"whatif-{_safe_name(metric)}.png",
            f"What-if {pins or ''}: distribution of {metric}, baseline vs pinned"))
    return made


#: the point of a metric a trade-off reads, by its summary key
_POINT_NAMES = {"p001": "0.1 % point", "p999": "99.9 % point"}

#: the frame column naming each candidate on the frontier plot
CANDIDATE_LABEL = "candidate"


def _choose_plots(choose: dict, plot_dir: Path) -> list[PlotTask]:
    """Yield map over the candidate values and the trade-off frontier, from choose.json."""
    if not isinstance(choose, dict) or not isinstance(choose.get("candidates"), list):
        return []
    cands = [c for c in choose["candidates"] if isinstance(c, dict)
             and isinstance(c.get("values"), dict) and "yield" in c]
    names = list(choose.get("vary") or (cands[0]["values"] if cands else {}))
    if not cands or not 1 <= len(names) <= 2:
        return []
    units = choose.get("units") or {}
    trade = choose.get("tradeoff") or {}
    # a trade-off axis says which point of the metric it plots (the 0.1 % point of a drive
    # margin read as its typical value)
    axis = {m: f"{m}, {_POINT_NAMES.get((t or {}).get('statistic'), 'robust end')}"
            for m, t in trade.items()}
    rows = []
    for c in cands:
        row = {n: c["values"].get(n) for n in names}
        row.update({k: c.get(k) for k in ("yield", "ci_low", "ci_high")})
        for m in trade:
            row[axis[m]] = c.get(m)
        row[CANDIDATE_LABEL] = ", ".join(f"{n} = {format_value(c['values'].get(n), units.get(n))}"
                                         for n in names)
        rows.append(row)
    df = pd.DataFrame(rows)
    made = []
    y = names[1] if len(names) == 2 else None
    made.append(PlotTask("yield_map", (df, names[0], y),
                         {"x_unit": units.get(names[0]), "y_unit": units.get(y) if y else None},
                         plot_dir / "choose-yield.png",
                         f"Yield over the candidate values of {', '.join(names)}"))
    if len(trade) == 2:
        (mx, ix), (my, iy) = trade.items()
        # a metric judged at its low percentile has a lower limit: larger is better
        made.append(PlotTask("frontier", (df, axis[mx], axis[my]),
                             {"minimize_x": ix.get("statistic") != "p001",
                              "minimize_y": iy.get("statistic") != "p001",
                              "x_unit": ix.get("unit"), "y_unit": iy.get("unit"),
                              "label": CANDIDATE_LABEL},
                             plot_dir / "choose-frontier.png",
                             f"Trade-off between {mx} and {my} with the non-dominated "
                             f"frontier"))
    return made


# --- the document ---------------------------------------------------------------------------------

STAMP_KEYS = ("tool_version", "study_hash", "seed", "samples", "sampler", "created")


def _stamp(summary: dict | None, extras: dict) -> Table:
    """Reproducibility stamp from the summary, completed from the analysis files."""
    sources = ([summary] if summary else []) + [v for v in extras.values() if isinstance(v, dict)]
    rows = []
    for k in STAMP_KEYS:
        value = next((src[k] for src in sources if k in src), None)
        if value is None and k == "samples":  # a worst case's own Monte Carlo run
            value = next((src["monte_carlo_samples"] for src in sources
                          if "monte_carlo_samples" in src), None)
        rows.append([k, format_number(value)])
    return Table(["item", "value"], rows, "stamp", "Reproducibility stamp")


def capability_note(capability: dict) -> str:
    """A sentence on the units the capability indices leave out (no finite value, failing),
    or an empty string."""
    left = {name: int(c.get("failing_not_finite") or 0) for name, c in capability.items()
            if isinstance(c, dict)}
    left = {name: k for name, k in left.items() if k}
    if not left:
        return ""
    listed = ", ".join(f"{name} {format_number(k)}" for name, k in left.items())
    return (f"Units that fail with no finite value (an infinite metric, or none in a "
            f"runaway) are left out of the indices, which describe only the others: "
            f"{listed}. The tail estimates count them as failures.")


def _per_criterion_table(data: dict, caption: str) -> Table:
    return _keyed_table(data, "criterion", caption)


def target_sentence(target: dict, rate) -> str:
    """One sentence on a run's ``--target-ci``: reached or not, with the widest interval."""
    head = (f"Target 95 % interval half-width {rate(target.get('half_width'))}: "
            + ("reached" if target.get("reached") else "NOT reached"))
    widest = (f"the widest is {rate(target.get('widest'))} "
              f"({target.get('widest_criterion')})")
    n, planned = target.get("samples"), target.get("planned_samples")
    if target.get("reached"):
        text = (f"{head} after {format_number(n)} of at most {format_number(planned)} "
                f"samples; {widest}.")
    else:
        text = (f"{head} within the {format_number(planned)} samples allowed (--samples); "
                f"{widest}; more samples would narrow it.")
    level = target.get("interval_level")
    if isinstance(level, (int, float)) and level > 0.95:
        text += (f" The counts decided where the run stopped, which lowers an exact 95 % "
                 f"interval's coverage (to about 94 %): the intervals reported are exact at "
                 f"{100 * level:g} %, which keeps their coverage at 95 % or more "
                 f"(simulated), so they are wider than the half-width the target measures; "
                 f"the zero-failure bounds need no such change and stay at 95 %.")
    return text


#: what the device table means and what it asks of a reviewer
DEVICES_NOTE = (
    "The datasheet figures each transistor's model was fitted to: its device class's, with "
    "any figure the study gives in their place. The library's classes hold typical class "
    "values from memory, not a datasheet: for a sign-off enter the chosen part's own figures "
    "in its [parts.Qn] table (README, 'Stage keys') and check them here. theta_JA is the "
    "path the stage uses, a heatsink included, and P_tot the rating its power check uses "
    "(on a heatsink the case rating at 25 degC case; never above (T_j max - 25 degC) over "
    "the path's theta). I_CBO max is at 25 degC, with the study's "
    "hot figure (icbo_hot_max) where it gives one, else the rise the model takes (doubling "
    "every leakage_doubling kelvin). I_CEO is the collector current with the base "
    "open (the highest-gain unit at I_CBO max, 25 degC): the study's iceo_max where it gives "
    "one, else the model's own figure, marked (model), to set beside the part's datasheet; "
    "it decides the off-state leakage of an output without a base-emitter resistor.")

#: the device table's columns: heading, key of :func:`models.stages.evaluation.device_assumptions`
DEVICE_COLUMNS = (("part", "part"), ("class", "class"), ("type", "polarity"),
                  ("h_FE min .. max", "hfe"), ("V_CE(sat) max", "vce_sat_max"),
                  ("V_BE(sat)", "vbe_sat"), ("V_BE(on)", "vbe_on"), ("I_CBO max", "icbo_max"),
                  ("I_CEO max (base open)", "iceo"),
                  ("V_(BR)CEO", "breakdown_vceo"), ("I_C max", "ic_max"),
                  ("P_tot", "power_rating"), ("T_j max", "tj_max"), ("theta_JA", "theta_ja"))


#: the charge-storage table's columns, as DEVICE_COLUMNS
CHARGE_COLUMNS = (("part", "part"), ("tau_F / tau_R", "transit_times"),
                  ("C_je0 / C_jc0", "zero_bias_capacitances"),
                  ("tau_s at typical h_FE", "storage_time_constant"))

#: what the charge-storage table means
CHARGE_NOTE = (
    "The charge-storage figures behind the switching times: forward and reverse transit "
    "times, the junctions' zero-bias depletion capacitances, and the storage time constant "
    "tau_s = alpha_F (tau_F + alpha_R tau_R) / (1 - alpha_F alpha_R) at the typical gain, "
    "with which t_s = tau_s ln((I_B1 + I_B2) / (I_C / beta_F + I_B2)) in the charge-control "
    "model, I_B1 the base current that held the unit on and I_B2 the magnitude of the "
    "reverse base current that turns it off (as storage_ib_off is entered). They are the "
    "class's typical values from memory unless the study gives transition_frequency, "
    "storage_time or output_capacitance in [parts.Qn].")


def load_note(load: dict) -> str:
    """What the "Load assumed" table holds, for the load of a run summary (``load``)."""
    part = load.get("part")
    kind = load.get("kind", "load")
    text = (f"The {kind} load's fixed figures, each with where it came from: the study's own "
            "table, " + (f"the library part {part} (typical class values from memory: "
                         "check them against the chosen part's data), " if part else "")
            + "or the tool's default. The sampled ones are in the Parameters table.")
    if kind == "led":
        text += (" One forward voltage is drawn per unit for the whole string: its LEDs move "
                 "together, the wider spread of the string's current (the safe side).")
    return text


def load_table(load) -> Table | None:
    """The load's fixed figures of a run summary (``load``); None without them."""
    if not isinstance(load, dict) or not isinstance(load.get("figures"), list):
        return None
    rows = [[str(f.get("figure", "-")), str(f.get("value", "-")), str(f.get("from", "-"))]
            for f in load["figures"] if isinstance(f, dict)]
    if not rows:
        return None
    return Table(["figure", "value", "from"], rows, "load-table", "Load assumed")


def charge_table(devices) -> Table | None:
    """The charge-storage figures a run assumed (summary ``devices``); None without them."""
    if not isinstance(devices, list):
        return None
    rows = [[str(d.get(key, "-")) for _, key in CHARGE_COLUMNS]
            for d in devices if isinstance(d, dict) and "storage_time_constant" in d]
    if not rows:
        return None
    return Table([h for h, _ in CHARGE_COLUMNS], rows, "charge-table",
                 "Charge storage of each transistor")


def device_table(devices) -> Table | None:
    """The devices a run assumed (summary ``devices``) as a table; None without them."""
    if not isinstance(devices, list) or not devices:
        return None
    rows = [[str(d.get(key, "-")) for _, key in DEVICE_COLUMNS]
            for d in devices if isinstance(d, dict)]
    return Table([h for h, _ in DEVICE_COLUMNS], rows, "device-table",
                 "Datasheet figures of each transistor")


#: what the rank measures and the failure drivers mean, for a reader who has not met them
SENSITIVITY_MEASURES = (
    "Failure drivers: the inputs whose values among the failing units differ most from "
    "those among the passing ones (Kolmogorov-Smirnov statistic and p-value), with the range "
    "that holds most failures. Rank measures, from -1 to 1, positive where the metric rises "
    "with the input: Spearman, the rank correlation of input and metric; SRRC, the "
    "standardized coefficient of a regression of the metric's ranks on all inputs' ranks "
    "(its square is about the input's share of the rank variance); PRCC, the correlation "
    "left between input and metric once the other inputs' ranks are regressed out. They "
    "measure monotone effects only.")


def _summary_blocks(summary: dict) -> list[Block]:
    doc: list[Block] = []
    doc.append(Block("h2", "Verdict"))
    v = summary.get("verdict", "")
    word = verdict_word(v)
    doc.append(Block("verdict", f"Overall verdict: {word} ({VERDICT_MEANING.get(v, v)})",
                     extra={"verdict": v}))
    basis = verdict_basis(summary)
    if basis:
        doc.append(Block("p", basis))
    # next to the verdict, where a reader stops: not after the figures
    doc.append(Block("note", "Caution: " + SAFETY))
    # what the study itself asks a reviewer to read first (Study.notes)
    for note in summary.get("study_notes") or []:
        doc.append(Block("note", str(note)))
    y = summary.get("yield", {})
    if y:
        doc.append(Block("p", f"Yield {format_rate(y.get('estimate'))} "
                              f"({format_number(y.get('passes'))} of "
                              f"{format_number(summary.get('samples'))} samples pass every "
                              f"criterion; {interval_label(summary)} exact interval "
                              f"{yield_interval(y.get('ci_low'), y.get('ci_high'))})."))
    allowed = summary.get("max_failure_rate")
    rule = (" (a criterion passes only with no failure)." if not allowed else
            "; a criterion passes when its interval lies at or below it, fails when it lies "
            "above it, and is undecided otherwise.")
    doc.append(Block("p", f"Allowed failure rate per criterion: {format_rate(allowed)}{rule}"
                          f" Samples not converged: {format_number(summary.get('not_converged'))}"
                          " (they count against the yield, never as passes)."))
    target = summary.get("target_ci")
    if isinstance(target, dict):
        doc.append(Block("p", target_sentence(target, format_rate)))
    note = sampler_note(summary)
    if note:
        doc.append(Block("p", note))
    doc.append(Block("table", table=verdict_table(summary)))
    if summary.get("overrides"):
        doc.append(Block("table", table=Table(
            ["parameter", "change", "value"],
            [[k, str(o.get("kind")), format_number(o.get("value"))]
             for k, o in summary["overrides"].items()], None, "Parameter overrides in this run")))

    doc.append(Block("h2", "Metrics"))
    doc.append(Block("table", table=metrics_table(summary)))
    for note in (infinite_note(summary), undefined_note(summary)):
        if note:
            doc.append(Block("note", note))

    if summary.get("parameters"):
        doc.append(Block("h2", "Parameters"))
        doc.append(Block("table", table=parameter_table(summary["parameters"],
                                                        summary.get("discrete_sets"))))
    correlations = correlation_table(summary.get("correlations"))
    if correlations is not None:
        doc.append(Block("h3", "Correlations assumed"))
        doc.append(Block("p", CORRELATION_NOTE))
        doc.append(Block("table", table=correlations))
    beyond = beyond_table(summary)
    if beyond is not None:
        doc.append(Block("p", BEYOND_NOTE))
        doc.append(Block("table", table=beyond))
    devices = device_table(summary.get("devices"))
    if devices is not None:
        doc.append(Block("h2", "Devices assumed"))
        doc.append(Block("p", DEVICES_NOTE))
        doc.append(Block("table", table=devices))
        charges = charge_table(summary.get("devices"))
        if charges is not None:
            doc.append(Block("p", CHARGE_NOTE))
            doc.append(Block("table", table=charges))
    load = load_table(summary.get("load"))
    if load is not None:
        doc.append(Block("h2", "Load assumed"))
        doc.append(Block("p", load_note(summary["load"])))
        doc.append(Block("table", table=load))

    if summary.get("capability"):
        doc.append(Block("h2", "Capability"))
        doc.append(Block("p", "Capability indices from the overall sample standard deviation "
                              "(Pp/Ppk in SPC terms); the interval assumes normal data."))
        doc.append(Block("table", table=_per_criterion_table(summary["capability"],
                                                             "Capability per criterion")))
        note = capability_note(summary["capability"])
        if note:
            doc.append(Block("note", note))
    if summary.get("tail"):
        doc.append(Block("h2", "Tail estimates (model-based extrapolation, not counted)"))
        doc.append(Block("note", "These figures extrapolate fitted distributions beyond the "
                                 "samples drawn. They are not counted failures and do not enter "
                                 "the verdict. The fits work on each unit's margin: its "
                                 "distance to the limit in units of the metric's standard "
                                 "deviation, negative where it fails (the quantiles in the "
                                 "method column are margins)."))
        doc.append(Block("table", table=_per_criterion_table(
            summary["tail"], "Model-based tail estimates (extrapolated, not counted)")))

    rows = summary.get("sensitivity")
    drivers = summary.get("failure_drivers")
    if rows or drivers:
        doc.append(Block("h2", "Sensitivity and failure drivers"))
        doc.append(Block("p", SENSITIVITY_MEASURES))
        basis = _insight_basis(summary)
        if basis:
            doc.append(Block("note", basis))
        for name, info in (drivers or {}).items():
            info = info or {}
            doc.append(Block("p", f"{name}: {info.get('text', '-')}"))
            if info.get("ranking"):
                # the p-values are each input's own; a review counted two listed inputs as
                # drivers whose p-values lay above the corrected threshold
                limit = info.get("p_threshold")
                said = (f" (an input counts as a driver at p below {limit:.2g}: 5 % over the "
                        "varying inputs, Bonferroni)" if _finite(limit) else "")
                doc.append(Block("table", table=_records_table(
                    info["ranking"], f"Failure drivers of {name}{said}")))
        if rows:
            # a heading of its own: after the last criterion's drivers it read as theirs
            doc.append(Block("h3", "Rank measures of every metric"))
            from tolerance.sensitivity import undefined_prcc_note

            blank = undefined_prcc_note(rows) if isinstance(rows, list) else None
            if blank:
                doc.append(Block("note", blank))
            doc.extend(generic_blocks(rows))
    return doc


def _insight_basis(summary: dict) -> str | None:
    """What the insights of a long run were computed on: the rank sensitivities on their
    first rows and the failure drivers, capability and tail fits on the first million
    (``analysis.INSIGHT_ROWS``), not on every unit the counts and the verdict use."""
    n = summary.get("samples")
    rows = summary.get("insight_rows")
    if not isinstance(n, int) or not isinstance(rows, int) or rows >= n:
        return None
    ranked = summary.get("sensitivity_rows")
    text = (f"The failure drivers (their unit counts included), capability and tail "
            f"estimates use the first {rows:,} of the {n:,} units")
    if isinstance(ranked, int) and ranked < n:
        text += f", the rank measures the first {ranked:,}"
    return text + "; the counts, rates and verdict use every unit."


def build_document(summary: dict | None, extras: dict,
                   figures: list[tuple[str, bytes, str]],
                   section_notes: dict[str, str] | None = None) -> list[Block]:
    """The report as a list of blocks, shared by the HTML and the Markdown renderer.

    Parameters
    ----------
    summary : dict or None
        Parsed summary.json of a Monte Carlo run (None for an analysis-only folder).
    extras : dict
        File name -> parsed JSON of the analysis files present.
    figures : list of (str, bytes, str)
        Relative PNG path, PNG bytes and caption of every plot.
    section_notes : dict, optional
        Analysis file name -> a sentence shown under its section heading (what is missing).

    Returns
    -------
    list of Block
    """
    doc: list[Block] = []
    info = summary or next((v for v in extras.values() if isinstance(v, dict)), {})
    title = info.get("title") or info.get("study") or "Tolerance analysis"
    doc.append(Block("h1", f"Tolerance report: {title}"))
    if summary:
        doc.append(Block("p", f"Study {summary.get('study', '-')}, stage "
                              f"{summary.get('stage', '-')}, "
                              f"{format_number(summary.get('samples'))} samples "
                              f"({summary.get('sampler', '-')} sampler, seed "
                              f"{format_number(summary.get('seed'))})."))
        doc.extend(_summary_blocks(summary))
    else:
        doc.append(Block("p", f"Study {info.get('study', '-')}; analysis files: "
                              f"{', '.join(extras)}."))
        doc.append(Block("note", "Caution: " + SAFETY))
        for note in info.get("study_notes") or []:
            doc.append(Block("note", str(note)))

    for fname, section in EXTRA_FILES.items():
        if fname in extras:
            doc.append(Block("h2", f"{section} ({fname})"))
            if section_notes and fname in section_notes:
                doc.append(Block("note", section_notes[fname]))
            doc.extend(analysis_blocks(fname, extras[fname]))

    not_drawn = (section_notes or {}).get(NOT_DRAWN)
    if figures or not_drawn:
        doc.append(Block("h2", "Plots"))
        if not_drawn:
            doc.append(Block("note", not_drawn))
        for rel, data, caption in figures:
            doc.append(Block("figure", caption, path=rel, data=data))

    doc.append(Block("h2", "Reproducibility"))
    doc.append(Block("p", "Re-running the study file with this seed, sample count and sampler "
                          "reproduces every counted figure; the command \"tolerance report\" on "
                          "this folder reproduces this report."))
    doc.append(Block("table", table=_stamp(summary, extras)))
    return doc


# --- renderers ------------------------------------------------------------------------------------

_CSS = """
:root { --ink: #1a1a1a; --rule: #8a8a8a; --soft: #f2f2f2; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, Helvetica, Arial, sans-serif; }
main { max-width: 1100px; margin: 0 auto; padding: 1.5rem 1.25rem 3rem; }
h1 { font-size: 1.6rem; margin: 0 0 .4rem; }
h2 { font-size: 1.2rem; margin: 2rem 0 .6rem; padding-bottom: .2rem;
     border-bottom: 2px solid var(--ink); }
h3 { font-size: 1.02rem; margin: 1.2rem 0 .4rem; }
.table-wrap { overflow-x: auto; margin: .5rem 0 1rem; }
table { border-collapse: collapse; font-size: .88rem; font-variant-numeric: tabular-nums; }
caption { text-align: left; font-weight: 600; padding: .2rem 0; }
th, td { border: 1px solid var(--rule); padding: .25rem .5rem; text-align: left;
         vertical-align: top; }
th { background: var(--soft); }
td.v-pass { font-weight: 700; }
td.v-fail { font-weight: 700; text-decoration: underline; background: #fde2dd; }
td.v-undecided { font-weight: 700; font-style: italic; background: #fff3cd; }
.verdict { font-size: 1.35rem; font-weight: 800; padding: .5rem .8rem; border: 3px solid var(--ink);
           display: inline-block; margin: .3rem 0 .6rem; }
.verdict.v-fail { border-style: double; background: #fde2dd; }
.verdict.v-undecided { border-style: dashed; background: #fff3cd; }
.verdict.v-pass { background: #e3f1e3; }
.note { border-left: 5px solid var(--ink); background: var(--soft); padding: .5rem .8rem; }
figure { margin: 1rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { font-size: .85rem; }
@media print {
  body { font-size: 10pt; }
  main { max-width: none; padding: 0; }
  h2 { break-after: avoid; page-break-after: avoid; }
  table, figure, .verdict, .note { break-inside: avoid; page-break-inside: avoid; }
  thead { display: table-header-group; }
  .table-wrap { overflow: visible; }
  td.v-fail, td.v-undecided, .verdict, .note { -webkit-print-color-adjust: exact;
                                                print-color-adjust: exact; }
  figure img { max-width: 16cm; }
}
""".strip()


def _e(text) -> str:
    return html.escape(str(text), quote=True)


def _html_table(t: Table) -> str:
    attr = f' id="{_e(t.table_id)}"' if t.table_id else ""
    parts = [f'<div class="table-wrap"><table{attr}>']
    if t.caption:
        parts.append(f"<caption>{_e(t.caption)}</caption>")
    parts.append("<thead><tr>" + "".join(f'<th scope="col">{_e(h)}</th>' for h in t.header)
                 + "</tr></thead><tbody>")
    for i, row in enumerate(t.rows):
        cls = t.classes[i] if i < len(t.classes) else []
        cells = []
        for j, cell in enumerate(row):
            c = cls[j] if j < len(cls) and cls[j] else ""
            cells.append(f'<td class="{_e(c)}">{_e(cell)}</td>' if c else f"<td>{_e(cell)}</td>")
        parts.append("<tr>" + "".join(cells) + "</tr>")
    parts.append("</tbody></table></div>")
    return "".join(parts)


def render_html(doc: list[Block], title: str) -> str:
    """Self-contained HTML page: inline CSS, images as data URIs, no scripts, no fonts."""
    out = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{_e(title)}</title>", f"<style>\n{_CSS}\n</style>", "</head>", "<body>",
           "<main>"]
    for b in doc:
        if b.kind in ("h1", "h2", "h3"):
            out.append(f"<{b.kind}>{_e(b.text)}</{b.kind}>")
        elif b.kind == "p":
            out.append(f"<p>{_e(b.text)}</p>")
        elif b.kind == "note":
            out.append(f'<p class="note">{_e(b.text)}</p>')
        elif b.kind == "verdict":
            out.append(f'<p id="overall-verdict" class="verdict v-{_e(b.extra.get("verdict"))}">'
                       f"{_e(b.text)}</p>")
        elif b.kind == "table":
            out.append(_html_table(b.table))
        elif b.kind == "figure":
            uri = "data:image/png;base64," + base64.b64encode(b.data).decode("ascii")
            out.append(f'<figure><img src="{uri}" alt="{_e(b.text)}">'
                       f"<figcaption>{_e(b.text)} ({_e(b.path)})</figcaption></figure>")
    out += ["</main>", "</body>", "</html>", ""]
    return "\n".join(out)


_MD_SPECIAL = re.compile(r"([\\`*|<>\[\]])")


def _md_escape(text: str) -> str:
    """Backslash-escape Markdown's active characters (and the table pipe); one line."""
    return _MD_SPECIAL.sub(r"\\\1", str(text)).replace("\n", " ")


def _md_table(t: Table) -> str:
    lines = []
    if t.caption:
        lines.append(f"*{_md_escape(t.caption)}*")
        lines.append("")
    lines.append("| " + " | ".join(_md_escape(h) for h in t.header) + " |")
    lines.append("|" + "|".join("---" for _ in t.header) + "|")
    for row in t.rows:
        lines.append("| " + " | ".join(_md_escape(c) for c in row) + " |")
    return "\n".join(lines)


def render_markdown(doc: list[Block]) -> str:
    """Markdown twin of the HTML page; figures are linked from ``plots/``."""
    out: list[str] = []
    for b in doc:
        text = _md_escape(b.text)
        if b.kind == "h1":
            out.append(f"# {text}")
        elif b.kind == "h2":
            out.append(f"## {text}")
        elif b.kind == "h3":
            out.append(f"### {text}")
        elif b.kind == "p":
            out.append(text)
        elif b.kind == "note":
            out.append(f"> {text}")
        elif b.kind == "verdict":
            out.append(f"**{text}**")
        elif b.kind == "table":
            out.append(_md_table(b.table))
        elif b.kind == "figure":
            out.append(f"![{text}]({b.path})")
        out.append("")
    return "\n".join(out).rstrip("\n") + "\n"


def write_reports(folder, jobs: int = 1) -> dict:
    """Write plots, report.html and report.md for a finished run or analysis folder.

    Parameters
    ----------
    folder : path-like
        Result folder. A Monte Carlo run holds summary.json and samples.parquet (chunk
        files); any of sensitivity.json, worstcase.json, whatif.json (with
        whatif_samples.parquet) and choose.json present is rendered as tables, plus ECDF
        overlays for a what-if and a yield map / trade-off frontier for a value choice;
        waveforms.json (``tolerance run --waveforms K``) gives the turn-on and turn-off
        waveform plots.
    jobs : int
        Workers drawing the plots (:func:`render_plots`); the files do not depend on it.

    Returns
    -------
    dict
        ``{"html": Path, "md": Path, "plots": [Path, ...]}``; the plots lie in
        ``folder/plots``.

    Raises
    ------
    FileNotFoundError
        When the folder holds neither summary.json nor an analysis file, or summary.json
        without its samples.
    """
    folder = Path(folder)
    summary_path = folder / SUMMARY_FILE
    extras = {name: _read_json(folder / name) for name in EXTRA_FILES
              if (folder / name).is_file()}
    summary = _read_json(summary_path) if summary_path.is_file() else None
    # every saved file is read before anything is removed or written, so a damaged one is
    # refused with the folder as it was
    waveforms = (_read_json(folder / WAVEFORMS_FILE) if (folder / WAVEFORMS_FILE).is_file()
                 else None)
    if summary is None and not extras:
        raise FileNotFoundError(f"{folder}: holds neither {SUMMARY_FILE} nor an analysis file "
                                f"({', '.join(EXTRA_FILES)}); run the study first")
    if summary is not None and not runner.chunk_files(folder / SAMPLES_DIR):
        raise FileNotFoundError(f"{folder / SAMPLES_DIR}: no sample files next to "
                                f"{SUMMARY_FILE}; run the study again")
    if summary is not None:
        wrong = runner.summary_mismatch(folder / SAMPLES_DIR, summary)
        if wrong is not None:
            raise runner.UnreadableChunk(
                errno.EINVAL, f"does not hold the samples {SUMMARY_FILE} describes: {wrong}; "
                "continue the run with --resume, or run it again with --force",
                str(folder / SAMPLES_DIR))
    # the saved files as copies that note what is read from them: a value of another kind
    # than the command writes is refused naming its file and key, before anything is
    # removed or drawn (the report's text is built once for that, then again with figures)
    seen: list = [None]
    summary = None if summary is None else _kept(summary, SUMMARY_FILE, seen)
    extras = {name: _kept(data, name, seen) for name, data in extras.items()}
    waveforms = None if waveforms is None else _kept(waveforms, WAVEFORMS_FILE, seen)
    plot_dir = folder / PLOTS_DIR
    made: list[PlotTask] = []
    try:
        build_document(summary, extras, [], {})
        if summary is not None:
            made += _run_plots(folder, summary, extras, plot_dir)
        if "whatif.json" in extras:
            made += _whatif_plots(folder, extras["whatif.json"], summary, plot_dir)
        if "choose.json" in extras:
            made += _choose_plots(extras["choose.json"], plot_dir)
        if waveforms is not None:
            made += _waveform_plots(waveforms, plot_dir)
    except _WRONG_KIND:
        raise _wrong_kind(folder, seen) from None
    plot_dir.mkdir(exist_ok=True)
    _remove_stale_plots(plot_dir)
    paths = render_plots(made, jobs)
    if not made and not any(plot_dir.iterdir()):
        plot_dir.rmdir()  # an analysis without figures leaves no empty folder
    figures = [(f"{PLOTS_DIR}/{p.name}", p.read_bytes(), t.caption)
               for p, t in zip(paths, made) if isinstance(p, Path)]
    notes = {}
    failed = [p for p in paths if not isinstance(p, Path)]
    if failed:
        notes[NOT_DRAWN] = ("Not drawn (the figures' data defeated the plotting; the tables "
                            "above hold the same figures): " + "; ".join(failed) + ".")
        for line in failed:
            print(f"warning: figure not drawn: {line}", file=sys.stderr)
    if "whatif.json" in extras and not (folder / WHATIF_SAMPLES).is_file():
        notes["whatif.json"] = (f"{WHATIF_SAMPLES} is missing from this folder, so the overlay "
                                "plots of the two runs are not drawn; run the what-if again to "
                                "have them.")
    doc = build_document(summary, extras, figures, notes)
    title = doc[0].text
    html_path, md_path = folder / HTML_FILE, folder / MD_FILE
    write_atomic(html_path, render_html(doc, title))
    write_atomic(md_path, render_markdown(doc))
    return {"html": html_path, "md": md_path, "plots": paths}
