"""Plot tests: each figure is built without pyplot and carries the marks a reviewer relies on."""

from __future__ import annotations

import io
import re
import textwrap

import numpy as np
import pandas as pd
import pytest
from matplotlib import image as mpl_image
from matplotlib.figure import Figure

from tolerance import plots
from tolerance.api import load_study, run
from tolerance.report import format_interval, format_rate, write_reports

STUDY = """
stage = "linear_test"
title = "plot check"
[run]
samples = 2000
seed = 5
sampler = "lhs"
[inputs]
x1 = {min = "-1 V", max = "3 V"}
x2 = {nominal = "1 V", tolerance = "30%", distribution = "normal"}
[limits]
y = {min = "0.5 V", max = "5 V"}
z = {max = 2}
"""


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    base = tmp_path_factory.mktemp("plots")
    path = base / "study.toml"
    path.write_text(textwrap.dedent(STUDY), encoding="utf-8")
    return run(load_study(path), out=base / "r")


def _lines(fig, prefix):
    return [a for ax in fig.axes for a in ax.get_lines() if str(a.get_gid()).startswith(prefix)]


def _patch_x_extent(patch):
    verts = patch.get_patch_transform().transform(patch.get_path().vertices)
    return float(verts[:, 0].min()), float(verts[:, 0].max())


def _patches(fig, prefix):
    return [p for ax in fig.axes for p in ax.patches if str(p.get_gid()).startswith(prefix)]


# --- histogram --------------------------------------------------------------------------------

def test_histogram_draws_limits_and_failing_regions(result):
    fig = plots.histogram(result.samples, "y", result.summary)
    assert isinstance(fig, Figure)
    assert len(fig.axes) == 2  # histogram and ECDF panel
    for side, x in (("min", 0.5), ("max", 5.0)):
        lines = _lines(fig, f"limit:y_positive:{side}")
        assert len(lines) == 2  # one per panel
        for line in lines:
            assert np.allclose(line.get_xdata(), [x, x])
        regions = _patches(fig, f"fail-region:y_positive:{side}")
        assert len(regions) == 2
        lo, hi = _patch_x_extent(regions[0])
        xlim = fig.axes[0].get_xlim()
        # the shaded region runs from the limit outward to the edge of the axis
        assert (lo, hi) == pytest.approx((xlim[0], x) if side == "min" else (x, xlim[1]))
        assert regions[0].get_hatch() == plots.FAIL_HATCH


def test_histogram_annotates_the_summary_figures_not_recomputed(result):
    summary = dict(result.summary)
    crit = dict(summary["criteria"]["z"])
    # deliberately not what the samples show: the plot must echo the summary
    crit.update(failures=7, evaluated=2000, rate=0.0035, ci_low=0.0014, ci_high=0.0072)
    summary["criteria"] = {**summary["criteria"], "z": crit}
    fig = plots.histogram(result.samples, "z", summary)
    title = fig.axes[0].get_title(loc="left")
    assert "7 of 2000 failed" in title
    assert format_rate(0.0035) in title and format_interval(0.0014, 0.0072) in title


def test_histogram_axis_uses_engineering_units(result):
    fig = plots.histogram(result.samples, "y", result.summary)
    fmt = fig.axes[1].xaxis.get_major_formatter()
    assert fmt(0.5, 0) == "500 mV" and fmt(2.0, 0) == "2 V"


def test_histogram_of_values_equal_but_for_rounding_is_one_bar(result, tmp_path):
    # a clamp's peak of 2.4999998999970083 V and 2.49999989999701 V in the units of a run:
    # numpy.histogram_bin_edges(bins="auto") cannot cut 1e-15 V into finite bins and raised,
    # which lost the run's report
    df = result.samples[["y"]].copy()
    df["y"] = np.where(np.arange(len(df)) % 2, 2.4999998999970083, 2.49999989999701)
    fig = plots.histogram(df, "y", result.summary)
    heights = [p.get_height() for p in fig.axes[0].patches if p.get_gid() == "histogram"]
    assert heights == [len(df)]
    assert plots.save(fig, tmp_path / "y.png").read_bytes()[:4] == b"\x89PNG"


def test_histogram_of_a_margin_beyond_any_prefix_saves_cleanly(result, tmp_path):
    # common practice, no source: a dimensionless margin of 2e301 (a limit typed as 1e-300)
    # once wrote its tick labels in three hundred digits, and the layout collapsed with a
    # warning (an error in this test run); it is drawn and saved like any other
    summary = dict(result.summary)
    summary["metrics"] = {**summary["metrics"], "y": {**summary["metrics"]["y"], "unit": "1"}}
    df = result.samples[["y"]].copy() * 1e301
    fig = plots.histogram(df, "y", summary)
    path = plots.save(fig, tmp_path / "margin.png")
    assert path.stat().st_size > 0
    labels = [t.get_text() for t in fig.axes[1].get_xticklabels()]
    assert labels and max(len(t) for t in labels) <= 12, labels


def test_histogram_counts_samples_left_out(result):
    df = result.samples[["y"]].copy()
    df.loc[:9, "y"] = np.nan
    fig = plots.histogram(df, "y", result.summary)
    assert "10 samples without a value" in fig.axes[0].get_title(loc="left")


def test_histogram_panels_show_every_sample(result):
    fig = plots.histogram(result.samples, "y", result.summary)
    y = result.samples["y"].to_numpy()
    bars = [p for p in fig.axes[0].patches if p.get_gid() == "histogram"]
    # common practice, no source: the bars count every finite sample once
    assert sum(b.get_height() for b in bars) == np.isfinite(y).sum()
    (line,) = _lines(fig, "ecdf")
    xs, fs = line.get_xdata(), line.get_ydata()
    # numpy as the reference: at every drawn step the ECDF is the fraction of samples <= x
    assert np.allclose(fs[1:], [np.mean(y <= v) for v in xs[1:]])
    assert fs[0] == 0.0 and fs[-1] == 1.0


def test_ecdf_ranks_thin_long_columns_exactly():
    x = np.random.default_rng(2).normal(size=100_003)
    xs, fs = plots._ecdf_ranks(x, most=500)
    assert xs.size <= 501 and xs[1] == x.min() and xs[-1] == x.max()
    # numpy as the reference: searchsorted counts the samples at or below each drawn point
    assert np.allclose(fs[1:], np.searchsorted(np.sort(x), xs[1:], side="right") / x.size)


# --- tornado --------------------------------------------------------------------------------

def _top_to_bottom(ax):
    ticks = sorted(zip(ax.get_yticks(), [t.get_text() for t in ax.get_yticklabels()]),
                   key=lambda p: -p[0])
    return [name for _, name in ticks]


def test_tornado_sorts_by_magnitude_and_hatches_by_sign():
    rows = [{"input": "a", "metric": "m", "spearman": 0.1, "srrc": 0.2, "prcc": 0.3},
            {"input": "b", "metric": "m", "spearman": -0.8, "srrc": -0.7, "prcc": -0.9},
            {"input": "c", "metric": "m", "spearman": 0.5, "srrc": 0.4, "prcc": 0.6},
            {"input": "d", "metric": "m", "spearman": 0.0, "srrc": float("nan"), "prcc": 0.0},
            {"input": "a", "metric": "other", "spearman": 0.9, "srrc": 0.9, "prcc": 0.9}]
    fig = plots.tornado(rows, "m")
    ax = fig.axes[0]
    assert _top_to_bottom(ax) == ["b", "c", "a"]  # NaN left out
    bars = {p.get_gid(): p for p in ax.patches if str(p.get_gid()).startswith("bar:")}
    assert bars["bar:b"].get_hatch() == plots.NEGATIVE_HATCH
    assert bars["bar:c"].get_hatch() == plots.POSITIVE_HATCH
    assert bars["bar:b"].get_facecolor() != bars["bar:c"].get_facecolor()
    assert len(plots.tornado(pd.DataFrame(rows), "m", top=2).axes[0].get_yticks()) == 2
    prcc = plots.tornado(rows, "m", measure="prcc").axes[0]
    assert _top_to_bottom(prcc) == ["b", "c", "a", "d"]


# --- driver scatter ---------------------------------------------------------------------------

def test_driver_scatter_pass_and_fail_differ_in_marker_and_colour(result):
    df = result.samples
    fig = plots.driver_scatter(df, "x1", "z", result.summary, {"x1": "V"})
    (ok,) = _lines(fig, "pass")
    (bad,) = _lines(fig, "fail")
    assert ok.get_marker() != bad.get_marker()
    assert ok.get_color() != bad.get_color()
    n_fail = int((~df["pass.z"]).sum())
    assert len(bad.get_xdata()) == n_fail == result.summary["criteria"]["z"]["failures"]
    # margin to the upper limit 2: positive inside
    assert np.allclose(bad.get_ydata(), 2.0 - df.loc[~df["pass.z"], "z"].to_numpy())
    assert np.all(np.asarray(ok.get_ydata()) >= 0)
    assert fig.axes[0].xaxis.get_major_formatter()(0.5, 0) == "500 mV"


def test_margin_uses_the_nearest_limit():
    m = plots.margin([0.0, 1.0, 4.0, np.nan], [{"min": 0.5, "max": 3.0}])
    assert np.allclose(m[:3], [-0.5, 0.5, -1.0]) and np.isnan(m[3])


def test_driver_scatter_thins_passes_but_keeps_every_failure(result, monkeypatch):
    monkeypatch.setattr(plots, "MAX_SCATTER_POINTS", 600)
    df = result.samples
    fig = plots.driver_scatter(df, "x1", "z", result.summary)
    (ok,) = _lines(fig, "pass")
    (bad,) = _lines(fig, "fail")
    assert len(bad.get_xdata()) == int((~df["pass.z"]).sum())
    assert len(ok.get_xdata()) + len(bad.get_xdata()) <= max(600, len(bad.get_xdata()))


# --- what-if, yield map, frontier, waveforms ---------------------------------------------------

def test_whatif_overlay_has_two_line_styles_and_limits():
    rng = np.random.default_rng(0)
    fig = plots.whatif_overlay(rng.normal(1, 0.1, 500), rng.normal(1.2, 0.1, 500), "vce", "V",
                               {"min": None, "max": 1.3})
    a, b = _lines(fig, "ecdf:baseline")[0], _lines(fig, "ecdf:pinned")[0]
    assert a.get_linestyle() != b.get_linestyle() and a.get_color() != b.get_color()
    (limit,) = _lines(fig, "limit:")
    assert np.allclose(limit.get_xdata(), [1.3, 1.3])
    assert len(_patches(fig, "fail-region:")) == 1


@pytest.mark.parametrize("empty", ["baseline", "pinned"])
def test_whatif_overlay_of_a_run_without_a_finite_value(empty, tmp_path):
    # a pin at 200 degC made every stress metric infinite: the overlay raised a matplotlib
    # ValueError for the empty side, and the what-if command ended in a traceback
    rng = np.random.default_rng(0)
    values = {"baseline": rng.normal(1, 0.1, 300), "pinned": rng.normal(1.2, 0.1, 300)}
    values[empty] = np.full(300, np.inf)
    fig = plots.whatif_overlay(values["baseline"], values["pinned"], "stress", "1",
                               {"max": 1.0})
    (gone,) = _lines(fig, f"ecdf:{empty}")
    assert len(gone.get_xdata()) == 0 and "no finite value" in gone.get_label()
    (kept,) = _lines(fig, "ecdf:" + ({"baseline", "pinned"} - {empty}).pop())
    assert len(kept.get_xdata()) == 301  # one step per sample and the zero at the first
    plots.save(fig, tmp_path / "overlay.png")
    assert (tmp_path / "overlay.png").stat().st_size > 0


def test_yield_map_one_part_error_bars():
    df = pd.DataFrame({"R1": [1e3, 2.2e3, 4.7e3], "yield": [0.9, 0.99, 0.95],
                       "ci_low": [0.85, 0.97, 0.92], "ci_high": [0.94, 1.0, 0.97]})
    fig = plots.yield_map(df, "R1", x_unit="ohm")
    ax = fig.axes[0]
    (container,) = ax.containers
    line = container.lines[0]
    assert np.allclose(line.get_ydata(), [90, 99, 95])
    segs = container.lines[2][0].get_segments()
    assert np.allclose([s[:, 1].min() for s in segs], [85, 97, 92])
    assert np.allclose([s[:, 1].max() for s in segs], [94, 100, 97])
    assert ax.xaxis.get_major_formatter()(2.2e3, 0) == "2.2 kOhm"


def test_yield_map_two_parts_annotates_every_cell():
    grid = [(a, b) for a in (1e3, 2e3) for b in (10.0, 20.0, 30.0)]
    df = pd.DataFrame({"R1": [a for a, _ in grid], "R2": [b for _, b in grid],
                       "yield": np.linspace(0.5, 1.0, 6)})
    fig = plots.yield_map(df, "R1", "R2")
    texts = sorted(t.get_text() for t in fig.axes[0].texts)
    assert texts == sorted(f"{100 * v:.1f}" for v in np.linspace(0.5, 1.0, 6))


def test_pareto_mask_matches_brute_force():
    rng = np.random.default_rng(4)
    x, y = rng.random(60), rng.random(60)
    got = plots.pareto_mask(x, y)
    # definition of Pareto dominance (common practice, no source), checked pairwise
    expect = [not any((x[j] <= x[i] and y[j] <= y[i]) and (x[j] < x[i] or y[j] < y[i])
                      for j in range(60)) for i in range(60)]
    assert got.tolist() == expect
    flipped = plots.pareto_mask(-x, y, minimize_x=False)
    assert flipped.tolist() == expect


def test_frontier_draws_the_non_dominated_points():
    df = pd.DataFrame({"loss": [1.0, 2.0, 3.0, 2.5], "cost": [3.0, 1.0, 0.5, 2.0],
                       "name": list("abcd")})
    fig = plots.frontier(df, "loss", "cost", label="name")
    (front,) = _lines(fig, "front-points")
    assert list(front.get_xdata()) == [1.0, 2.0, 3.0]  # d is dominated by b
    (dominated,) = _lines(fig, "dominated")
    assert list(dominated.get_xdata()) == [2.5]
    assert _lines(fig, "frontier")
    # every candidate is named, the dominated one as well (16 anonymous points could not be
    # told apart)
    assert sorted(t.get_text() for t in fig.axes[0].texts) == list("abcd")


def test_waveforms_differ_in_line_style():
    t = np.linspace(0, 1e-3, 50)
    fig = plots.waveforms([t, t, t], [np.sin(t), np.cos(t), t], ["a", "b", "c"], "V")
    styles = [line.get_linestyle() for line in _lines(fig, "trace:")]
    assert len(set(styles)) == 3
    assert fig.axes[0].xaxis.get_major_formatter()(5e-4, 0) == "500 us"
    with pytest.raises(ValueError, match="same number"):
        plots.waveforms([t], [t, t], ["a"], "V")


def test_save_writes_png_at_110_dpi(tmp_path):
    fig = plots.waveforms([np.arange(3.0)], [np.arange(3.0)], ["a"], "V")
    path = plots.save(fig, tmp_path / "sub" / "w.png")
    data = path.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    img = mpl_image.imread(io.BytesIO(data), format="png")
    w, h = fig.get_size_inches()
    assert img.shape[:2] == (round(h * plots.DPI), round(w * plots.DPI))
    assert plots.save(fig, tmp_path / "again.png").read_bytes() == data


def test_no_pyplot_figure_state_is_used(result):
    import matplotlib.pyplot as plt

    before = plt.get_fignums()
    plots.histogram(result.samples, "y", result.summary)
    assert plt.get_fignums() == before


# --- reports -----------------------------------------------------------------------------------

def test_write_reports_plots_every_limited_metric(result):
    paths = write_reports(result.folder)
    names = {p.name for p in paths["plots"]}
    limited = {c["metric"] for c in result.summary["criteria"].values()}
    assert {f"hist-{m}.png" for m in limited} <= names
    for p in paths["plots"]:
        assert p.parent == result.folder / "plots" and p.read_bytes()[:4] == b"\x89PNG"


def test_a_dollar_sign_in_a_label_is_drawn_as_written(tmp_path):
    # a study titled "Heater switch, $10 % cheaper than the $11 module" ended the run in a
    # traceback from matplotlib's formula parser after its results were written
    rng = np.random.default_rng(0)
    label = "Heater switch, $10 % cheaper than the $11 module"
    fig = plots.whatif_overlay(rng.normal(1, 0.1, 50), rng.normal(1.1, 0.1, 50), label, "V",
                               {"max": 1.3, "description": label})
    plots.save(fig, tmp_path / "dollar.png")
    assert (tmp_path / "dollar.png").read_bytes()[:4] == b"\x89PNG"
    assert any(t.get_text() == f"What-if: {label}" for t in fig.findobj(
        lambda a: hasattr(a, "get_text")))


def test_a_temperature_axis_ticks_at_round_degrees_celsius():
    # common practice, no source: ticks at round kelvin read "-23.1 degC" and put a
    # "152 degC" tick beside a 150 degC limit; an axis in kelvin ticks at round degC
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    rng = np.random.default_rng(1)
    summary = {"metrics": {"tj_output": {"unit": "temperature"}},
               "criteria": {"tj": {"metric": "tj_output", "limit": {"min": None, "max": 423.15},
                                   "failures": 0, "evaluated": 4000, "rate": 0.0,
                                   "ci_low": 0.0, "ci_high": 0.001, "verdict": "pass"}}}
    fig = plots.histogram(pd.DataFrame({"tj_output": rng.normal(350.0, 30.0, 4000)}),
                          "tj_output", summary)
    FigureCanvasAgg(fig).draw()
    labels = [t.get_text() for t in fig.axes[1].get_xticklabels() if t.get_text()]
    assert labels and all(re.fullmatch(r"-?\d*0 degC", t) for t in labels), labels
