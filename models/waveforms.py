"""Sample waveforms of the switching transient, stored beside a run for its plots.

:func:`record_waveforms` picks a few samples of a finished Monte Carlo run (the nominal point,
the sample with the longest turn-off delay and some random ones), simulates their turn-on and
turn-off transients once more with the integrator recording every accepted step
(:func:`tolerance.models.switching.simulate_switching` with ``record``) and returns the load
current and the switch voltage of each run against time as a JSON-ready dict
(``waveforms.json`` of ``tolerance run --waveforms K``).

The inputs of the transient are built from the stage exactly as the Monte Carlo evaluation
builds them (``models/stages/evaluation.py``, ``_switching``), the devices at the junction
temperatures the evaluation ran the sample's transient at (see :func:`record_waveforms`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from tolerance.models.stages.evaluation import evaluate_stage, switching_inputs

__all__ = ["MAX_POINTS", "UNITS", "check_recordable", "downsample", "record_waveforms",
           "switching_inputs"]

#: Most points a stored trace keeps.
MAX_POINTS = 2000
#: Units of the stored traces.
UNITS = {"time": "s", "load_current": "A", "vce": "V"}

NOMINAL, WORST = "nominal", "worst turn-off"


def check_recordable(study, k: int) -> None:
    """Refuse a waveform request the study cannot serve (before any run starts).

    Parameters
    ----------
    study : Study
    k : int
        Number of waveforms asked for [1].

    Raises
    ------
    ValueError
        When ``k`` is below 1, or the stage evaluates no switching transient.
    """
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise ValueError(f"the number of waveforms must be a whole number of at least 1, got "
                         f"{k!r}")
    sw = getattr(study.stage, "switching", None)
    if sw is None or not sw.enabled:
        raise ValueError(f"{study.path}: waveforms need the switching transient; this study "
                         "does not evaluate it (add [switching] enabled = true, or use a PWM "
                         "drive or a coil load)")


def downsample(n: int, limit: int = MAX_POINTS) -> np.ndarray:
    """Indices of at most ``limit`` of ``n`` points, evenly spaced in index, ends kept.

    The integrator's steps crowd where the waveform moves fast, so thinning by index keeps
    that crowding: the edges stay resolved and the settled tail gets few points.

    Parameters
    ----------
    n : int
        Number of points.
    limit : int
        Most points to keep (at least 2).

    Returns
    -------
    ndarray of int
        Strictly increasing indices, first 0 and last ``n - 1``.
    """
    if limit < 2:
        raise ValueError(f"limit must be at least 2, got {limit}")
    if n <= limit:
        return np.arange(n)
    return np.unique(np.round(np.linspace(0, n - 1, limit)).astype(np.int64))


def _choose_rows(samples_df: pd.DataFrame, k: int, seed: int) -> list[tuple[str, int]]:
    """(label, row position) of the worst turn-off row and the random rows."""
    chosen: list[tuple[str, int]] = []
    if k < 2 or len(samples_df) == 0:
        return chosen
    delay = samples_df["turn_off_delay"].to_numpy(dtype=float)
    taken = np.zeros(len(samples_df), dtype=bool)
    if np.any(np.isfinite(delay)):
        worst = int(np.nanargmax(delay))
        chosen.append((WORST, worst))
        taken[worst] = True
    rest = np.flatnonzero(~taken)
    m = min(k - 1 - len(chosen), rest.size)
    if m > 0:
        rng = np.random.default_rng(seed)
        picks = rng.choice(rest, size=m, replace=False)
        chosen += [(f"random {i + 1}", int(r)) for i, r in enumerate(picks)]
    return chosen


def record_waveforms(study, samples_df: pd.DataFrame, k: int, seed: int) -> dict:
    """Turn-on and turn-off waveforms of ``k`` samples of a run.

    Parameters
    ----------
    study : Study
        The study of the run; its stage must evaluate the switching transient.
    samples_df : pandas.DataFrame
        Rows of the run: the column ``sample`` (sample index), every parameter column (SI
        units) and ``turn_off_delay`` [s]. Other columns are ignored.
    k : int
        Number of waveforms [1]: the nominal point, then the row with the largest
        ``turn_off_delay`` (left out when no row has one, i.e. none converged), then random
        rows (without replacement, not the worst one) drawn by
        ``numpy.random.default_rng(seed)`` until ``k`` are stored or the rows run out.
    seed : int
        Seed of the random choice.

    Returns
    -------
    dict
        ``{"samples": [entry, ...], "units": {"time": "s", "load_current": "A", "vce": "V"},
        "device_temperature": "junction", "seed": seed, "max_points": 2000}``; each entry is
        ``{"label": "nominal" | "worst turn-off" | "random 1" ..., "sample": index or None,
        "converged": bool, "turn_on": trace, "turn_off": trace}`` with ``trace`` =
        ``{"time": [...], "load_current": [...], "vce": [...]}``: time from the drive edge
        [s], the load current (a coil's winding current; otherwise the current into the
        switch node) [A] and the switch voltage, output terminal to ground (the stage's V_CE,
        the quantity of the ``vce_peak`` metric) [V], each thinned to at most 2000 points
        (:func:`downsample`). The nominal entry is the nominal value of every parameter
        (``sample`` None), not a row of the run.

    Raises
    ------
    ValueError
        When ``k`` is below 1 or the stage evaluates no switching transient
        (:func:`check_recordable`), or a parameter column is missing.

    Notes
    -----
    The chosen samples are evaluated once more (:func:`evaluate_stage`, a batch of ``k``) for
    the junction temperatures their transient runs at (the settled electro-thermal loop, T_j
    max for a device that ran away, the ambient without self-heating), and re-simulated
    there, so a waveform is the transient the sample's metrics in samples.parquet were taken
    from. Until a review, the devices sat at the ambient: a unit that its hot leakage holds
    on (an infinite storage time) was plotted turning off cleanly. All chosen samples run in
    one batch of the integrator.
    """
    from tolerance.models.switching import simulate_switching

    check_recordable(study, k)
    names = study.parameter_names
    missing = [c for c in names + ["sample", "turn_off_delay"] if c not in samples_df.columns]
    if missing:
        raise ValueError(f"samples are missing the columns {', '.join(missing)}")
    rows = _choose_rows(samples_df, k, seed)
    labels = [NOMINAL] + [label for label, _ in rows]
    positions = np.array([r for _, r in rows], dtype=np.int64)
    index = samples_df["sample"].to_numpy()
    samples = {}
    for p in study.parameters:
        column = samples_df[p.name].to_numpy(dtype=float)[positions]
        samples[p.name] = np.concatenate([[float(p.nominal)], column])
    stage = study.stage
    ambient = np.asarray(samples[stage.env.temperature], dtype=float)
    captured: dict = {}
    with np.errstate(all="ignore"):
        evaluate_stage(stage, samples, capture=captured)
    temps = captured.get("switching_temperatures") or {name: ambient
                                                        for name in stage.transistors()}
    args = switching_inputs(stage, samples, temps, ambient)
    n = ambient.shape[0]
    with np.errstate(all="ignore"):
        result = simulate_switching(*args, **stage.switching.options, record=range(n))
    converged = np.asarray(result.metrics["converged"], dtype=bool)
    coil = result.circuit.coil_index
    entries = []
    for i, label in enumerate(labels):
        entry = {"label": label, "sample": None if i == 0 else int(index[positions[i - 1]]),
                 "converged": bool(converged[i])}
        for run_name, run in (("turn_on", result.turn_on), ("turn_off", result.turn_off)):
            w = run.waveforms.get(i, {"t": [], "x": [], "current": [], "voltage": []})
            t = np.asarray(w["t"], dtype=float)
            keep = downsample(t.size)
            if coil >= 0 and t.size:
                load = np.asarray(w["x"], dtype=float)[:, coil]
            else:
                load = np.asarray(w["current"], dtype=float)
            vce = np.asarray(w["voltage"], dtype=float)
            entry[run_name] = {"time": t[keep].tolist(), "load_current": load[keep].tolist(),
                               "vce": vce[keep].tolist()}
        entries.append(entry)
    return {"samples": entries, "units": dict(UNITS), "device_temperature": "junction",
            "seed": int(seed), "max_points": MAX_POINTS, "asked": int(k)}
