"""Figures for tolerance reports: histograms with limits, tornado charts, drivers, what-ifs.

Every function returns a :class:`matplotlib.figure.Figure` built without pyplot, so no display
and no global figure state are involved: the figures work the same in a script, a notebook or
a headless CI job. Seaborn draws on the figure's axes; its style is applied only inside the
functions (``seaborn.axes_style`` as a context), never globally.

The figures are meant to stay readable when printed in greyscale: pass and fail differ in
marker shape as well as colour, limit lines differ in line style, failing regions are hatched,
and bars of opposite sign carry different hatch patterns.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd
import seaborn as sns
from matplotlib.figure import Figure
from matplotlib.text import Text
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MaxNLocator

from tolerance.files import atomic_path
from tolerance.units import format_quantity, spread_unit

__all__ = [
    "DPI",
    "driver_scatter",
    "frontier",
    "histogram",
    "pareto_mask",
    "save",
    "tornado",
    "waveforms",
    "whatif_overlay",
    "yield_map",
]

#: Resolution of saved figures [dots per inch].
DPI = 110
#: most points of a drawn ECDF (some five per pixel of the plot's width at DPI)
ECDF_POINTS = 4000

#: Colour-blind safe palette (seaborn "colorblind"), as RGB tuples.
PALETTE = tuple(sns.color_palette("colorblind", 10))
PASS_COLOR, FAIL_COLOR = PALETTE[0], PALETTE[3]
PASS_MARKER, FAIL_MARKER = "o", "X"
LINESTYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1)), (0, (1, 3)))

#: the most traces of a waveform figure drawn in their own style with a legend entry each;
#: the rest are drawn as thin grey lines under one entry
NAMED_TRACES = 12

LIMIT_STYLES = {"min": "--", "max": "-."}
FAIL_HATCH = "///"
POSITIVE_HATCH, NEGATIVE_HATCH = "//", ".."
_STYLE = "whitegrid"
# Above this many points a scatter keeps every failure and an evenly spaced subset of passes,
# so a report of a million samples stays small; the choice depends only on the sample order.
MAX_SCATTER_POINTS = 20_000


def _figure(width: float = 7.0, height: float = 4.5, **kwargs) -> Figure:
    return Figure(figsize=(width, height), layout="constrained", **kwargs)


def _unit_formatter(unit: str | None, digits: int = 3) -> FuncFormatter:
    """Axis tick labels in engineering notation via :func:`format_quantity`."""

    def fmt(value, _pos=None):
        if unit is None:
            return f"{value:.{digits}g}"
        return format_quantity(value, unit, digits)

    return FuncFormatter(fmt)


class _CelsiusLocator(MaxNLocator):
    """Ticks at round degrees Celsius on an axis in kelvin (round kelvin read as -23.1 degC,
    152 degC beside a 150 degC limit)."""

    def tick_values(self, vmin, vmax):
        return super().tick_values(vmin - _ZERO_CELSIUS, vmax - _ZERO_CELSIUS) + _ZERO_CELSIUS


#: 0 degC [K]
_ZERO_CELSIUS = 273.15


def _unit_axis(axis, unit: str | None) -> None:
    """Engineering-notation tick labels on ``axis``; a temperature's ticks at round degC."""
    axis.set_major_formatter(_unit_formatter(unit))
    if unit == "temperature":
        axis.set_major_locator(_CelsiusLocator(nbins="auto", steps=[1, 2, 2.5, 5, 10]))


def _finite(values) -> np.ndarray:
    x = np.asarray(values, dtype=float).ravel()
    return x[np.isfinite(x)]


def _limits_of(limits) -> list[dict]:
    """Normalise ``{"min", "max"}`` or a list of such dicts to a list."""
    if limits is None:
        return []
    if isinstance(limits, dict):
        return [limits]
    return list(limits)


def _bin_edges(x: np.ndarray, max_bins: int = 80) -> np.ndarray:
    if x.size == 0:
        return np.array([0.0, 1.0])
    lo, hi = float(x.min()), float(x.max())
    # values equal but for rounding (a clamp's 2.4999999 V in every unit, spread over 1e-15
    # V) are one bar: numpy cannot cut a few ulps into finite bins and raised
    if hi - lo <= 1e-9 * max(abs(lo), abs(hi)):
        mid = 0.5 * (lo + hi)
        half = abs(mid) * 1e-6 if mid != 0 else 1e-12
        return np.array([mid - half, mid + half])
    edges = np.histogram_bin_edges(x, bins="auto")
    if edges.size - 1 > max_bins:
        edges = np.linspace(lo, hi, max_bins + 1)
    return edges


def _x_range(x: np.ndarray, marks: Sequence[float]) -> tuple[float, float]:
    """Axis range covering the data and every limit, padded by 5 %."""
    values = [float(v) for v in marks if v is not None and math.isfinite(v)]
    if x.size:
        values += [float(x.min()), float(x.max())]
    if not values:
        return 0.0, 1.0
    lo, hi = min(values), max(values)
    span = hi - lo
    if span <= 0:
        span = abs(lo) * 0.1 if lo != 0 else 1.0
    return lo - 0.05 * span, hi + 0.05 * span


def _metric_criteria(summary: dict, metric: str) -> list[tuple[str, dict]]:
    return [(name, c) for name, c in summary.get("criteria", {}).items()
            if c.get("metric") == metric]


def _draw_limits(axes, criteria: list[tuple[str, dict]], lo_edge: float, hi_edge: float,
                 unit: str | None, shade: bool = True) -> list:
    """Limit lines (dashed min, dash-dot max) and hatched failing regions on every axis."""
    handles = []
    labelled = set()
    for name, c in criteria:
        limit = c.get("limit", c)
        for side in ("min", "max"):
            value = limit.get(side)
            if value is None or not math.isfinite(value):
                continue
            for ax in axes:
                line = ax.axvline(value, color="black", linewidth=1.4,
                                  linestyle=LIMIT_STYLES[side], zorder=4)
                line.set_gid(f"limit:{name}:{side}")
            label = f"{name} {side} {format_quantity(value, unit) if unit else value}"
            handles.append(Line2D([], [], color="black", linestyle=LIMIT_STYLES[side],
                                  label=label))
            if shade:
                start, stop = (lo_edge, value) if side == "min" else (value, hi_edge)
                if stop > start:
                    for ax in axes:
                        span = ax.axvspan(start, stop, facecolor=FAIL_COLOR, alpha=0.18,
                                          hatch=FAIL_HATCH, edgecolor=FAIL_COLOR,
                                          linewidth=0, zorder=0)
                        span.set_gid(f"fail-region:{name}:{side}")
                    if "fail" not in labelled:
                        labelled.add("fail")
                        handles.append(Patch(facecolor=FAIL_COLOR, alpha=0.18,
                                             hatch=FAIL_HATCH, edgecolor=FAIL_COLOR,
                                             label="failing region"))
    return handles


def histogram(samples: pd.DataFrame, metric: str, summary: dict) -> Figure:
    """Histogram and empirical CDF of a metric with its limits and counted failure rate.

    Parameters
    ----------
    samples : pandas.DataFrame
        Per-sample results; column ``metric`` [SI unit of the metric], NaN where the solver
        did not converge (those samples are left out and their number is stated).
    metric : str
        Metric name, a key of ``summary["metrics"]``.
    summary : dict
        Run summary (summary.json). The limits come from every criterion whose ``metric`` is
        this one; the failure counts, rates and exact intervals annotated are the summary's
        own figures, not recomputed from ``samples``.

    Returns
    -------
    matplotlib.figure.Figure
        Two panels sharing the x axis [metric unit, engineering notation]: counts on top, the
        ECDF [1] below. Limit lines carry the gid ``limit:<criterion>:<min|max>`` and the
        hatched failing regions ``fail-region:<criterion>:<min|max>``.
    """
    from tolerance.report import WEIGHT_COLUMN, format_interval, format_rate

    info = summary.get("metrics", {}).get(metric, {})
    unit = info.get("unit")
    raw = np.asarray(samples[metric], dtype=float)
    # a thinned run's drawn units stand for several (report: every failure, 1 in k passes)
    w_all = (np.asarray(samples[WEIGHT_COLUMN], dtype=float) if WEIGHT_COLUMN in samples
             else np.ones(raw.size))
    keep = np.isfinite(raw)
    x, w = raw[keep], w_all[keep]
    missing = int(round(w_all[~keep].sum()))
    criteria = _metric_criteria(summary, metric)
    marks = [c["limit"].get(s) for _, c in criteria for s in ("min", "max")]
    lo_edge, hi_edge = _x_range(x, marks)

    with sns.axes_style(_STYLE):
        fig = _figure(7.0, 5.6)
        ax, ax_cdf = fig.subplots(2, 1, sharex=True, height_ratios=[2.2, 1.0])
        if x.size:
            # the bars from their counts and the ECDF at a few thousand of its ranks: the
            # same picture at this size, without handing half a million points to seaborn's
            # histogram and ECDF (half of the figure's time at that count)
            edges = _bin_edges(x)
            counts, _ = np.histogram(x, bins=edges, weights=w)
            ax.bar(edges[:-1], counts, width=np.diff(edges), align="edge", color=PALETTE[0],
                   edgecolor="white", linewidth=0.4, alpha=0.85, zorder=2, gid="histogram")
            xs, fs = _ecdf_ranks(x, weights=None if WEIGHT_COLUMN not in samples else w)
            ax_cdf.step(xs, fs, where="post", color=PALETTE[0], linewidth=1.6, zorder=3,
                        gid="ecdf")
        handles = _draw_limits([ax, ax_cdf], criteria, lo_edge, hi_edge, unit)
        ax.set_xlim(lo_edge, hi_edge)
        ax.set_ylabel("samples")
        ax_cdf.set_ylabel("cumulative fraction")
        ax_cdf.set_ylim(0.0, 1.02)
        description = info.get("description") or ""
        if len(description) > 60:  # long meanings live in the report's metrics table
            description = description[:57].rstrip() + "..."
        ax_cdf.set_xlabel(metric + (f" ({description})" if description else ""))
        _unit_axis(ax_cdf.xaxis, unit)
        lines = []
        from tolerance.report import interval_label

        label = interval_label(summary)
        for name, c in criteria:
            text = (f"{name}: {c['failures']} of {c['evaluated']} failed, "
                    f"counted rate {format_rate(c['rate'])}, {label} interval "
                    f"{format_interval(c['ci_low'], c['ci_high'])}")
            if c.get("zero_failure_upper") is not None:
                # on a line of its own: at the end of the long one it ran off the figure
                text += f",\nzero-failure upper bound {format_rate(c['zero_failure_upper'])}"
            lines.append(text)
        if missing:
            lines.append(f"{missing} samples without a value (not converged or runaway), left out")
        ax.set_title("\n".join(lines), fontsize=8, loc="left", gid="rates")
        if handles:
            fig.legend(handles=handles, loc="outside lower center", ncol=min(len(handles), 3),
                       fontsize=8, frameon=False)
        title = summary.get("title") or ""
        fig.suptitle(f"{metric}" + (f" - {title}" if title else ""), fontsize=11)
    return fig


def _rows_frame(rows) -> pd.DataFrame:
    if isinstance(rows, pd.DataFrame):
        return rows.reset_index(drop=True)
    return pd.DataFrame(list(rows))


def tornado(sensitivity_rows, metric: str, top: int = 10, measure: str = "srrc") -> Figure:
    """Tornado chart: one horizontal bar per input, largest magnitude on top.

    Parameters
    ----------
    sensitivity_rows : list of dict or pandas.DataFrame
        Rows with ``input``, ``metric`` and the measures ``spearman``, ``srrc``, ``prcc`` [1].
    metric : str
        Which metric's rows to draw.
    top : int, default 10
        Number of inputs kept.
    measure : str, default "srrc"
        Column drawn; rows where it is NaN are left out.

    Returns
    -------
    matplotlib.figure.Figure
        Bars in decreasing order of ``abs(measure)`` from top to bottom; positive bars are
        hatched ``//``, negative ones ``..``, in different colours.
    """
    df = _rows_frame(sensitivity_rows)
    if df.empty or "metric" not in df or measure not in df:
        df = pd.DataFrame({"input": [], "metric": [], measure: []})
    df = df[df["metric"] == metric]
    values = pd.to_numeric(df[measure], errors="coerce").to_numpy(dtype=float)
    names = df["input"].astype(str).to_numpy()
    keep = np.isfinite(values)
    values, names = values[keep], names[keep]
    # stable sort: equal magnitudes keep the input order of the rows
    order = np.argsort(-np.abs(values), kind="stable")[: max(int(top), 0)]
    values, names = values[order], names[order]
    n = values.size
    with sns.axes_style(_STYLE):
        fig = _figure(7.0, max(2.2, 0.42 * n + 1.3))
        ax = fig.subplots()
        y = np.arange(n)[::-1]  # first (largest) at the top
        for yi, v, name in zip(y, values, names):
            pos = v >= 0
            ax.barh(yi, v, color=PALETTE[0] if pos else PALETTE[1],
                    hatch=POSITIVE_HATCH if pos else NEGATIVE_HATCH, edgecolor="black",
                    linewidth=0.6, height=0.7, gid=f"bar:{name}")
            ax.text(v, yi, f" {v:+.2f} ", va="center",
                    ha="left" if pos else "right", fontsize=8)
        ax.set_yticks(y, labels=list(names))
        ax.axvline(0.0, color="black", linewidth=0.8)
        ax.set_xlim(-1.15, 1.15)
        ax.set_xlabel(f"{measure} [1]")
        ax.set_title(f"Sensitivity of {metric} ({measure})", fontsize=10)
        ax.legend(handles=[Patch(facecolor=PALETTE[0], hatch=POSITIVE_HATCH, edgecolor="black",
                                 label="raises the metric"),
                           Patch(facecolor=PALETTE[1], hatch=NEGATIVE_HATCH, edgecolor="black",
                                 label="lowers the metric")],
                  loc="lower right", fontsize=8)
        if n == 0:
            ax.text(0.5, 0.5, "no finite sensitivity values", transform=ax.transAxes,
                    ha="center", va="center")
    return fig


def margin(values, criteria: list[dict]) -> np.ndarray:
    """Distance of a metric to its nearest limit, positive inside the limits.

    Parameters
    ----------
    values : array_like
        Metric values [metric unit].
    criteria : list of dict
        Limit dicts ``{"min", "max"}`` (either may be None).

    Returns
    -------
    numpy.ndarray
        ``min(x - min, max - x)`` over the given limits [metric unit]; NaN where ``x`` is NaN
        or no limit is given.
    """
    x = np.asarray(values, dtype=float)
    out = np.full(x.shape, np.inf)
    for limit in criteria:
        if limit.get("min") is not None:
            out = np.minimum(out, x - limit["min"])
        if limit.get("max") is not None:
            out = np.minimum(out, limit["max"] - x)
    out = np.where(np.isfinite(x) & np.isfinite(out), out, np.nan)
    return out


def _thin(n: int, keep: np.ndarray, limit: int) -> np.ndarray:
    """Indices to plot: all of ``keep`` plus evenly spaced others, at most ``limit`` total."""
    idx = np.arange(n)
    forced = idx[keep]
    others = idx[~keep]
    room = max(limit - forced.size, 0)
    if others.size > room:
        others = others[np.linspace(0, others.size - 1, room).astype(int)] if room else others[:0]
    return np.sort(np.concatenate([forced, others]))


def driver_scatter(samples: pd.DataFrame, input_name: str, metric: str, summary: dict,
                   units: dict[str, str] | None = None) -> Figure:
    """Scatter of an input against the metric's margin to its nearest limit.

    Parameters
    ----------
    samples : pandas.DataFrame
        Columns ``input_name`` [input unit], ``metric`` [metric unit] and, when present,
        ``pass.<criterion>`` for the criteria on this metric (else pass/fail follows from
        the margin's sign).
    input_name : str
        Input on the x axis, typically the top failure driver.
    metric : str
        Metric whose margin is drawn.
    summary : dict
        Run summary; gives the limits and the metric unit.
    units : dict of str to str, optional
        Unit per input name, for the x axis (default: plain numbers).

    Returns
    -------
    matplotlib.figure.Figure
        Passing samples as blue circles, failing ones as orange-red crosses ("X"); the
        margin axis [metric unit] is 0 at the limit and positive inside. Non-converged
        samples (NaN metric) are left out and counted in the title. With more than
        ``MAX_SCATTER_POINTS`` samples every failure and an even subset of passes is drawn.
    """
    units = units or {}
    criteria = _metric_criteria(summary, metric)
    unit = summary.get("metrics", {}).get(metric, {}).get("unit")
    x = np.asarray(samples[input_name], dtype=float)
    m = margin(samples[metric], [c["limit"] for _, c in criteria])
    cols = [f"pass.{name}" for name, _ in criteria if f"pass.{name}" in samples]
    if cols and len(cols) == len(criteria):
        ok = np.logical_and.reduce([samples[c].to_numpy(dtype=bool) for c in cols])
    else:
        ok = m >= 0
    from tolerance.report import WEIGHT_COLUMN

    valid = np.isfinite(m) & np.isfinite(x)
    fail = valid & ~ok
    passing = valid & ok
    # a thinned run's drawn units stand for several (report: every failure, 1 in k passes)
    w = (np.asarray(samples[WEIGHT_COLUMN], dtype=float) if WEIGHT_COLUMN in samples
         else np.ones(x.size))
    idx = _thin(x.size, fail, MAX_SCATTER_POINTS)
    sel_pass = idx[passing[idx]]
    sel_fail = idx[fail[idx]]
    with sns.axes_style(_STYLE):
        fig = _figure(7.0, 4.6)
        ax = fig.subplots()
        ax.plot(x[sel_pass], m[sel_pass], linestyle="none", marker=PASS_MARKER, markersize=3,
                color=PASS_COLOR, alpha=0.5, label=f"pass ({int(round(w[passing].sum()))})", gid="pass")
        ax.plot(x[sel_fail], m[sel_fail], linestyle="none", marker=FAIL_MARKER, markersize=5,
                color=FAIL_COLOR, alpha=0.9, label=f"fail ({int(round(w[fail].sum()))})", gid="fail")
        ax.axhline(0.0, color="black", linestyle="--", linewidth=1.2, label="nearest limit")
        _unit_axis(ax.xaxis, units.get(input_name))
        _unit_axis(ax.yaxis, spread_unit(unit))
        ax.set_xlabel(input_name)
        ax.set_ylabel(f"margin of {metric} (inside > 0)")
        skipped = int((~valid).sum())
        ax.set_title(f"{metric} margin vs {input_name}"
                     + (f" ({skipped} without a value, left out)" if skipped else ""),
                     fontsize=10)
        ax.legend(loc="best", fontsize=8)
    return fig


def _ecdf_ranks(x: np.ndarray, most: int = ECDF_POINTS,
                weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The empirical CDF of ``x`` at its steps, or at ``most`` evenly spaced ranks (the first
    and the last included) where it has more: exact values of the ECDF, (rank + 1) / n.
    With ``weights`` (units each value stands for) the CDF is the weighted one."""
    if weights is not None:
        order = np.argsort(x, kind="stable")
        xs = x[order]
        cum = np.cumsum(weights[order])
        if xs.size == 0:
            return xs, np.zeros(0)
        pick = np.unique(np.linspace(0, xs.size - 1, min(most, xs.size)).round()
                         .astype(np.int64))
        return np.concatenate([xs[:1], xs[pick]]), np.concatenate([[0.0],
                                                                   cum[pick] / cum[-1]])
    xs = np.sort(x)
    n = xs.size
    if n == 0:  # nothing to draw: no steps, not one step at an undefined value
        return xs, np.zeros(0)
    if n <= most:
        return np.concatenate([xs[:1], xs]), np.concatenate([[0.0], np.arange(1, n + 1) / n])
    ranks = np.unique(np.linspace(0, n - 1, most).round().astype(np.int64))
    return (np.concatenate([xs[:1], xs[ranks]]),
            np.concatenate([[0.0], (ranks + 1) / n]))


def whatif_overlay(baseline: np.ndarray, pinned: np.ndarray, metric: str, unit: str | None,
                   limits=None, labels: tuple[str, str] = ("baseline", "pinned")) -> Figure:
    """ECDFs of a metric before and after a what-if change, with its limits.

    Parameters
    ----------
    baseline, pinned : ndarray
        Metric values of the two runs [metric unit]; NaN values are left out.
    metric : str
        Metric name (axis label).
    unit : str or None
        Unit for the engineering-notation x axis.
    limits : dict or list of dict, optional
        ``{"min", "max"}`` limit dicts drawn as lines with hatched failing regions.
    labels : tuple of str
        Legend labels of the two curves.

    Returns
    -------
    matplotlib.figure.Figure
        Baseline as a solid step line, the what-if run dashed, in different colours.
    """
    base, pin = _finite(baseline), _finite(pinned)
    b, fb = _ecdf_ranks(base)
    p, fp = _ecdf_ranks(pin)
    lims = _limits_of(limits)
    marks = [lim.get(s) for lim in lims for s in ("min", "max")]
    lo_edge, hi_edge = _x_range(np.concatenate([b, p]), marks)
    with sns.axes_style(_STYLE):
        fig = _figure(7.0, 4.4)
        ax = fig.subplots()
        # a run whose samples all lack a finite value (a pin that makes the metric infinite,
        # every sample not converged) keeps its legend entry, saying so, and draws no curve
        for k, (xs, fs, n, gid) in enumerate(((b, fb, base.size, "ecdf:baseline"),
                                              (p, fp, pin.size, "ecdf:pinned"))):
            ax.step(xs, fs, where="post", linestyle=LINESTYLES[k], color=PALETTE[k],
                    linewidth=1.8, gid=gid,
                    label=f"{labels[k]} ({n})" if n else f"{labels[k]} (no finite value)")
        handles = _draw_limits([ax], [(f"limit {i + 1}", lim) for i, lim in enumerate(lims)],
                               lo_edge, hi_edge, unit)
        ax.set_xlim(lo_edge, hi_edge)
        ax.set_ylim(0.0, 1.02)
        _unit_axis(ax.xaxis, unit)
        ax.set_xlabel(metric)
        ax.set_ylabel("cumulative fraction")
        ax.set_title(f"What-if: {metric}", fontsize=10)
        curve_handles, _ = ax.get_legend_handles_labels()
        fig.legend(handles=curve_handles + handles, loc="outside lower center",
                   ncol=min(len(curve_handles + handles), 3), fontsize=8, frameon=False)
    return fig


def yield_map(candidates: pd.DataFrame, x: str, y: str | None = None, *,
              yield_col: str = "yield", low_col: str = "ci_low", high_col: str = "ci_high",
              x_unit: str | None = None, y_unit: str | None = None) -> Figure:
    """Yield against candidate part values.

    Parameters
    ----------
    candidates : pandas.DataFrame
        One row per candidate: the value column(s) ``x`` (and ``y``) [part unit] and the yield
        with its interval (``yield_col``, ``low_col``, ``high_col`` [1]).
    x, y : str
        Value columns; with ``y`` None a single part is drawn.
    x_unit, y_unit : str, optional
        Units for engineering-notation labels.

    Returns
    -------
    matplotlib.figure.Figure
        One part: yield [%] against value with the interval as error bars and a connecting
        dotted line. Two parts: a heat map (greyscale-safe "cividis" map) with each cell's
        yield written into it.
    """
    df = candidates.reset_index(drop=True)
    with sns.axes_style(_STYLE if y is None else "white"):
        if y is None:
            d = df.sort_values(x, kind="stable")
            xv = d[x].to_numpy(dtype=float)
            yv = 100 * d[yield_col].to_numpy(dtype=float)
            err = None
            if low_col in d and high_col in d:
                lo = 100 * d[low_col].to_numpy(dtype=float)
                hi = 100 * d[high_col].to_numpy(dtype=float)
                err = np.vstack([np.clip(yv - lo, 0, None), np.clip(hi - yv, 0, None)])
            fig = _figure(7.0, 4.4)
            ax = fig.subplots()
            ax.errorbar(xv, yv, yerr=err, fmt="o", linestyle=":", color=PALETTE[0],
                        ecolor="black", elinewidth=1.0, capsize=4, markersize=6, gid="yield")
            _unit_axis(ax.xaxis, x_unit)
            if x_unit is None:
                ax.set_xticks(xv)
            ax.set_xlabel(x)
            ax.set_ylabel("yield [%] (95 % interval)")
            ax.set_title(f"Yield vs {x}", fontsize=10)
            return fig
        table = df.pivot_table(index=y, columns=x, values=yield_col, aggfunc="first",
                               sort=True) * 100
        fig = _figure(max(5.0, 0.9 * table.shape[1] + 2.5), max(3.2, 0.6 * table.shape[0] + 1.8))
        ax = fig.subplots()
        sns.heatmap(table, ax=ax, annot=True, fmt=".1f", cmap="cividis", vmin=0, vmax=100,
                    linewidths=0.5, linecolor="white", cbar_kws={"label": "yield [%]"},
                    annot_kws={"fontsize": 8})
        xf, yf = _unit_formatter(x_unit), _unit_formatter(y_unit)
        ax.set_xticks(np.arange(table.shape[1]) + 0.5, labels=[xf(v) for v in table.columns])
        ax.set_yticks(np.arange(table.shape[0]) + 0.5, labels=[yf(v) for v in table.index],
                      rotation=0)
        ax.set_xlabel(x)
        ax.set_ylabel(y)
        ax.set_title(f"Yield [%] over {x} and {y}", fontsize=10)
    return fig


def pareto_mask(x, y, minimize_x: bool = True, minimize_y: bool = True) -> np.ndarray:
    """Non-dominated points of a two-objective trade-off.

    Parameters
    ----------
    x, y : array_like
        Objective values per candidate [any units]; NaN candidates are never on the front.
    minimize_x, minimize_y : bool
        Direction of each objective.

    Returns
    -------
    numpy.ndarray of bool
        True where no other candidate is at least as good in both objectives and strictly
        better in one.
    """
    a = np.asarray(x, dtype=float) * (1 if minimize_x else -1)
    b = np.asarray(y, dtype=float) * (1 if minimize_y else -1)
    ok = np.isfinite(a) & np.isfinite(b)
    le = (a[None, :] <= a[:, None]) & (b[None, :] <= b[:, None])
    lt = (a[None, :] < a[:, None]) | (b[None, :] < b[:, None])
    dominated = np.any(le & lt & ok[None, :], axis=1)
    return ok & ~dominated


def frontier(candidates: pd.DataFrame, metric_x: str, metric_y: str, *,
             minimize_x: bool = True, minimize_y: bool = True, label: str | None = None,
             x_unit: str | None = None, y_unit: str | None = None) -> Figure:
    """Trade-off scatter of candidates with the non-dominated frontier drawn.

    Parameters
    ----------
    candidates : pandas.DataFrame
        One row per candidate with columns ``metric_x`` and ``metric_y``.
    metric_x, metric_y : str
        Objectives on the axes.
    minimize_x, minimize_y : bool
        Direction of each objective (for the frontier).
    label : str, optional
        Column whose text names each candidate beside its point.
    x_unit, y_unit : str, optional
        Units for engineering-notation axes.

    Returns
    -------
    matplotlib.figure.Figure
        Dominated candidates as grey circles, frontier candidates as squares joined by a
        dashed step line (gid ``frontier``).
    """
    df = candidates.reset_index(drop=True)
    xv = df[metric_x].to_numpy(dtype=float)
    yv = df[metric_y].to_numpy(dtype=float)
    front = pareto_mask(xv, yv, minimize_x, minimize_y)
    order = np.argsort(xv[front], kind="stable")
    fx, fy = xv[front][order], yv[front][order]
    with sns.axes_style(_STYLE):
        fig = _figure(7.0, 4.6)
        ax = fig.subplots()
        ax.plot(xv[~front], yv[~front], linestyle="none", marker="o", color="0.55",
                markersize=5, label="dominated", gid="dominated")
        ax.plot(fx, fy, linestyle="none", marker="s", color=PALETTE[0], markersize=7,
                markeredgecolor="black", label="non-dominated", gid="front-points")
        where = "post" if minimize_x == minimize_y else "pre"
        ax.step(fx, fy, where=where, linestyle="--", color="black", linewidth=1.2,
                label="frontier", gid="frontier")
        if label is not None and label in df:
            # every candidate named (unnamed points could not be told apart), the dominated
            # ones in grey
            names = df[label].astype(str).to_numpy()
            for a, b, t, on in zip(xv, yv, names, front):
                if np.isfinite(a) and np.isfinite(b):
                    ax.annotate(t, (a, b), textcoords="offset points", xytext=(4, 4),
                                fontsize=7, color="black" if on else "0.45",
                                annotation_clip=False)
        _unit_axis(ax.xaxis, x_unit)
        _unit_axis(ax.yaxis, y_unit)
        ax.set_xlabel(metric_x + (" (lower is better)" if minimize_x else " (higher is better)"))
        ax.set_ylabel(metric_y + (" (lower is better)" if minimize_y else " (higher is better)"))
        ax.set_title(f"Trade-off: {metric_x} vs {metric_y}", fontsize=10)
        ax.legend(loc="best", fontsize=8)
    return fig


def waveforms(times: list[np.ndarray], traces: list[np.ndarray], labels: Sequence[str],
              unit: str | None, time_unit: str = "s", *, ylabel: str = "value",
              lower_traces: list[np.ndarray] | None = None, lower_unit: str | None = None,
              lower_ylabel: str = "value", title: str | None = None,
              time_scale: str = "linear", decades: float = 5.0) -> Figure:
    """Several time traces on one axis, each in its own line style and colour.

    Parameters
    ----------
    times : list of ndarray
        Time points of each trace [s].
    traces : list of ndarray
        Values of each trace [``unit``].
    labels : sequence of str
        Legend label per trace.
    unit : str or None
        Unit of the traces, for the engineering-notation y axis.
    time_unit : str, default "s"
        Unit of the time axis.
    ylabel : str, default "value"
        Label of the (upper) value axis.
    lower_traces : list of ndarray, optional
        A second quantity of the same traces (same time points) [``lower_unit``], drawn in a
        lower panel that shares the time axis; trace ``i`` keeps its line style and colour in
        both panels.
    lower_unit : str or None
        Unit of ``lower_traces``.
    lower_ylabel : str, default "value"
        Label of the lower value axis.
    title : str, optional
        Title above the (upper) panel.
    time_scale : {"linear", "symlog"}, default "linear"
        ``"symlog"``: the time axis is linear up to ``10**-decades`` times the longest time
        and logarithmic above, so a fast edge and a slow settling tail both show.
    decades : float, default 5
        Logarithmic decades of a ``"symlog"`` time axis.

    Returns
    -------
    matplotlib.figure.Figure
        Lines carry the gid ``trace:<i>`` (upper panel) and ``lower:<i>`` (lower panel).
    """
    if not (len(times) == len(traces) == len(labels)):
        raise ValueError(f"got {len(times)} time arrays, {len(traces)} traces and "
                         f"{len(labels)} labels; expected the same number of each")
    if time_scale not in ("linear", "symlog"):
        raise ValueError(f"time_scale must be 'linear' or 'symlog', got {time_scale!r}")
    if lower_traces is not None and len(lower_traces) != len(traces):
        raise ValueError(f"got {len(lower_traces)} lower traces for {len(traces)} traces; "
                         "expected the same number of each")
    with sns.axes_style(_STYLE):
        if lower_traces is None:
            fig = _figure(7.0, 4.2)
            panels = [(fig.subplots(), traces, unit, ylabel, "trace")]
        else:
            fig = _figure(7.0, 6.0)
            top, bottom = fig.subplots(2, 1, sharex=True)
            panels = [(top, traces, unit, ylabel, "trace"),
                      (bottom, lower_traces, lower_unit, lower_ylabel, "lower")]
        crowd = max(0, len(labels) - NAMED_TRACES)
        for ax, values, u, label, gid in panels:
            for i, (t, v, name) in enumerate(zip(times, values, labels)):
                if i < NAMED_TRACES:
                    style = dict(linestyle=LINESTYLES[i % len(LINESTYLES)],
                                 color=PALETTE[i % len(PALETTE)], linewidth=1.6,
                                 label=str(name), zorder=3)
                else:
                    # beyond the named traces a legend entry each would cover the panels
                    # (301 stored samples collapsed the layout): thin grey lines under them
                    style = dict(linestyle="-", color="0.7", linewidth=0.6, zorder=2,
                                 label=f"{crowd} more stored samples" if i == NAMED_TRACES
                                 else "_nolegend_")
                ax.plot(np.asarray(t, dtype=float), np.asarray(v, dtype=float),
                        gid=f"{gid}:{i}", **style)
            _unit_axis(ax.yaxis, u)
            ax.set_ylabel(label)
        bottom_ax = panels[-1][0]
        t_max = max((float(np.max(np.abs(t))) for t in times if np.size(t)), default=0.0)
        if time_scale == "symlog" and t_max > 0:
            bottom_ax.set_xscale("symlog", linthresh=t_max * 10.0 ** -decades)
        _unit_axis(bottom_ax.xaxis, time_unit)
        bottom_ax.set_xlabel("time")
        if title:
            panels[0][0].set_title(title, fontsize=10)
        if len(labels):
            panels[0][0].legend(loc="best", fontsize=8)
    return fig


def save(fig: Figure, path) -> Path:
    """Write a figure as PNG at :data:`DPI` dots per inch.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : path-like
        Target file; parent folders are created.

    Returns
    -------
    pathlib.Path
        The path written. The file carries no software stamp, so the same figure gives the
        same bytes.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    # every text is shown as written: a "$" in a study's title or a limit's description began
    # matplotlib's formula notation, garbled the text or raised while the figure was drawn
    for text in fig.findobj(Text):
        text.set_parse_math(False)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=DPI, format="png", metadata={"Software": None})
    return path
