"""Stored switching waveforms: ``tolerance run --waveforms K``, waveforms.json and its plots."""

from __future__ import annotations

import base64
import io
import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from matplotlib import image as mpl_image

from tolerance import plots
from tolerance.api import load_study
from tolerance.cli import main
from tolerance.models.waveforms import (
    MAX_POINTS,
    check_recordable,
    downsample,
    record_waveforms,
)

STUDY = Path(__file__).resolve().parent.parent / "studies" / "irrigation_valve_single.toml"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
SAMPLES, SEED = 300, 11


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    out = tmp_path_factory.mktemp("wf") / "run"
    code = main(["run", str(STUDY), "--samples", str(SAMPLES), "--seed", str(SEED),
                 "--waveforms", "3", "--out", str(out), "--quiet"])
    assert code in (0, 1)  # the verdict of 300 samples does not matter here
    return out


@pytest.fixture(scope="module")
def stored(folder):
    return json.loads((folder / "waveforms.json").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def frame(folder):
    return pd.read_parquet(folder / "samples.parquet")


def test_three_labelled_entries_with_monotone_time(stored):
    entries = stored["samples"]
    assert [e["label"] for e in entries] == ["nominal", "worst turn-off", "random 1"]
    assert entries[0]["sample"] is None
    assert all(isinstance(e["sample"], int) for e in entries[1:])
    assert entries[1]["sample"] != entries[2]["sample"]
    assert stored["units"] == {"time": "s", "load_current": "A", "vce": "V"}
    assert stored["device_temperature"] == "junction"
    for e in entries:
        assert e["converged"] is True
        for run in ("turn_on", "turn_off"):
            t = np.asarray(e[run]["time"])
            assert t.size >= 10 and t.size <= MAX_POINTS
            assert t[0] == 0.0 and np.all(np.diff(t) > 0)
            assert len(e[run]["load_current"]) == len(e[run]["vce"]) == t.size


def test_turn_on_ends_at_the_on_state_load_current(stored, frame):
    for e in stored["samples"][1:]:
        row = frame.loc[frame["sample"] == e["sample"]].iloc[0]
        final = e["turn_on"]["load_current"][-1]
        # common practice, no source: the transient ends once the coil current is within
        # 0.1 % of its on-state DC value (the devices sit at the junction temperatures the
        # run's transient saw, as the on-state's)
        assert final == pytest.approx(row["load_current"], rel=2e-3)
        # from memory (Kirchhoff's voltage law): off, only the leakage (< 1 uA) flows in the
        # ~70 ohm winding, so V_CE starts at the supply voltage; 10 mV is the DC solver's slack
        assert e["turn_on"]["vce"][0] == pytest.approx(row["supply.voltage"], abs=0.01)
        # common practice, no source: the turn-off ends with the coil current decayed to
        # 0.1 % of its on value (the settling rule), so below 1 % of it
        assert abs(e["turn_off"]["load_current"][-1]) < 0.01 * row["load_current"]
        # the clamped turn-off peak is the vce_peak metric of the same sample: the same
        # transient at the same junction temperatures (the waveform is thinned to 2,000
        # points, so its highest point may miss the peak by a little)
        assert max(e["turn_off"]["vce"]) == pytest.approx(row["vce_peak"], rel=1e-3)


def test_worst_turn_off_is_the_argmax_of_turn_off_delay(stored, frame):
    worst = int(frame["sample"].iloc[int(np.nanargmax(frame["turn_off_delay"].to_numpy()))])
    assert stored["samples"][1]["sample"] == worst
    assert 0 <= stored["samples"][2]["sample"] < SAMPLES


def test_api_is_reproducible_and_limits_the_count(stored, frame):
    study = load_study(STUDY)
    again = json.loads(json.dumps(record_waveforms(study, frame, 3, SEED)))
    assert again == stored
    few = frame.iloc[:2]
    out = record_waveforms(study, few, 5, SEED)  # only two rows to choose from
    assert [e["label"] for e in out["samples"]] == ["nominal", "worst turn-off", "random 1"]
    only = record_waveforms(study, frame, 1, SEED)
    assert [e["label"] for e in only["samples"]] == ["nominal"]
    with pytest.raises(ValueError, match="missing the columns"):
        record_waveforms(study, frame.drop(columns=["RB"]), 2, SEED)


def test_report_lists_the_waveform_plots_and_they_decode(folder):
    md = (folder / "report.md").read_text(encoding="utf-8")
    html = (folder / "report.html").read_text(encoding="utf-8")
    for run in ("turn_on", "turn_off"):
        rel = f"plots/waveforms-{run}.png"
        assert f"]({rel})" in md
        data = (folder / rel).read_bytes()
        assert data[:8] == PNG_MAGIC
        img = mpl_image.imread(io.BytesIO(data), format="png")
        assert img.shape[0] > 100 and img.shape[1] > 100
        m = re.search(r'<img src="data:image/png;base64,([^"]+)"[^>]*><figcaption>[^<]*\('
                      + re.escape(rel) + r"\)</figcaption>", html)
        assert m is not None
        assert base64.b64decode(m.group(1), validate=True) == data


def test_zero_waveforms_is_refused_before_the_run(tmp_path, capsys):
    out = tmp_path / "o"
    with pytest.raises(SystemExit) as exc:
        main(["run", str(STUDY), "--samples", "50", "--waveforms", "0", "--out", str(out)])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "--waveforms" in err and "at least 1" in err and "Traceback" not in err
    assert not out.exists()


def test_study_without_switching_is_refused_before_the_run(tmp_path, capsys):
    out = tmp_path / "o"
    assert main(["run", "--waveforms", "2", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert "[switching] enabled = true" in err and "PWM drive" in err
    assert not out.exists()
    with pytest.raises(ValueError, match="switching"):
        check_recordable(load_study(None), 2)
    for bad in (0, -3, True, 2.0):
        with pytest.raises(ValueError, match="at least 1"):
            check_recordable(load_study(STUDY), bad)


def test_downsample_keeps_ends_and_at_most_the_limit():
    idx = downsample(12_345)
    assert idx.size <= MAX_POINTS and idx[0] == 0 and idx[-1] == 12_344
    assert np.all(np.diff(idx) > 0)
    assert np.array_equal(downsample(10), np.arange(10))
    with pytest.raises(ValueError):
        downsample(10, 1)


def _lines(fig, prefix):
    return [ln for ax in fig.axes for ln in ax.get_lines()
            if (ln.get_gid() or "").startswith(prefix)]


def test_two_panel_waveforms_keep_one_style_per_trace():
    t = np.linspace(0.0, 1e-2, 200)
    fig = plots.waveforms([t, t, t], [t, 2 * t, 3 * t], ["a", "b", "c"], "A",
                          lower_traces=[t, t, t], lower_unit="V", time_scale="symlog")
    upper, lower = _lines(fig, "trace:"), _lines(fig, "lower:")
    assert len(upper) == len(lower) == 3 and len(fig.axes) == 2
    assert len({ln.get_linestyle() for ln in upper}) == 3
    for a, b in zip(upper, lower):
        assert a.get_linestyle() == b.get_linestyle() and a.get_color() == b.get_color()
    assert fig.axes[1].get_xscale() == "symlog"
    assert fig.axes[0].yaxis.get_major_formatter()(0.25, 0) == "250 mA"
    with pytest.raises(ValueError, match="time_scale"):
        plots.waveforms([t], [t], ["a"], "V", time_scale="log")
    with pytest.raises(ValueError, match="lower traces"):
        plots.waveforms([t], [t], ["a"], "V", lower_traces=[t, t])


def test_many_waveforms_keep_a_legible_legend(tmp_path):
    # found by probing: --waveforms 100000 on 300 samples gave a legend of 301 entries that
    # covered both panels, and matplotlib warned (with its installation path) that the
    # layout collapsed; beyond NAMED_TRACES the traces are thin grey lines under one entry
    import warnings
    t = np.linspace(0.0, 1e-3, 50)
    n = plots.NAMED_TRACES + 30
    fig = plots.waveforms([t] * n, [t * (1 + i) for i in range(n)],
                          [f"s{i}" for i in range(n)], "A", lower_traces=[t] * n,
                          lower_unit="V", time_scale="symlog")
    legend = [x.get_text() for x in fig.axes[0].get_legend().get_texts()]
    assert legend == [f"s{i}" for i in range(plots.NAMED_TRACES)] + ["30 more stored samples"]
    assert len(_lines(fig, "trace:")) == len(_lines(fig, "lower:")) == n
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        plots.save(fig, tmp_path / "w.png")


def test_fewer_waveforms_than_asked_are_noted(tmp_path, capsys):
    # --waveforms 5 on a run of 2 samples stored 3 without a word
    out = tmp_path / "o"
    assert main(["run", str(STUDY), "--samples", "2", "--waveforms", "5", "--out", str(out),
                 "--quiet"]) in (0, 1)
    stored = json.loads((out / "waveforms.json").read_text())
    assert stored["asked"] == 5 and len(stored["samples"]) == 3
    err = capsys.readouterr().err
    assert "holds 3 of the 5 waveforms asked for: the run has 2 samples" in err


def test_waveforms_are_the_transient_at_the_samples_junction_temperatures(stored, frame):
    # a review: the waveforms were re-simulated with the devices at the ambient, so a unit
    # that its hot leakage holds on (an infinite storage time) was plotted turning off
    # cleanly. They are now the transient the sample's metrics came from, the devices at the
    # junction temperatures of its settled electro-thermal loop (a static drive: tj_output)
    from tolerance.models.switching import simulate_switching
    from tolerance.models.waveforms import switching_inputs

    study = load_study(STUDY)
    stage = study.stage
    entries = stored["samples"][1:]
    rows = [frame.loc[frame["sample"] == e["sample"]].iloc[0] for e in entries]
    samples = {p.name: np.array([r[p.name] for r in rows], dtype=float)
               for p in study.parameters}
    ambient = samples[stage.env.temperature]
    tj = np.array([r["tj_output"] for r in rows], dtype=float)
    assert np.all(tj > ambient + 1.0)  # each self-heated by more than a kelvin

    def simulate(temps):
        return simulate_switching(*switching_inputs(stage, samples, {"Q1": temps}, ambient),
                                  **stage.switching.options, record=range(len(rows)))

    with np.errstate(all="ignore"):
        hot, cold = simulate(tj), simulate(ambient)
    # the run's own storage times come back at the junction temperatures, not at the ambient
    run = np.array([r["storage_time"] for r in rows], dtype=float)
    np.testing.assert_allclose(hot.metrics["storage_time"], run, rtol=1e-9)
    assert np.all(np.abs(cold.metrics["storage_time"] / run - 1.0) > 1e-4)
    for i, e in enumerate(entries):
        t = np.asarray(hot.turn_off.waveforms[i]["t"], dtype=float)
        assert e["turn_off"]["time"] == t[downsample(t.size)].tolist()
