"""Study-level analyses: the generic methods of :mod:`sensitivity`, :mod:`worstcase` and
:mod:`stats` applied to a study's stage, parameters and criteria.

The run summary carries a parameter table, rank sensitivities, failure drivers, capability and
tail estimates per criterion (:func:`insights`); ``tolerance sensitivity`` adds Sobol indices on a
dedicated design (:func:`study_sensitivity`); ``tolerance worstcase`` lines up extreme-value,
root-sum-square and optimizer extremes beside the Monte Carlo extremes
(:func:`study_worst_case`).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from tolerance import sensitivity, stats, worstcase
from tolerance.study import Study
from tolerance.threads import thread_map

#: rows used for rank sensitivities in a run summary (ranks of very long runs add nothing)
SENSITIVITY_ROWS = 200_000
#: rows used for capability, tail estimates and failure drivers: the first million samples
#: (counted rates and percentiles always use every sample; this keeps memory flat)
INSIGHT_ROWS = 1_000_000

#: metrics that are 0/1 flags: the worst-case optimizer does not search them (no slope)
FLAG_METRICS = frozenset({"thermal_runaway"})


def model_for(study: Study):
    """The stage as a batch model: dict of parameter arrays -> dict of metric arrays.

    Metrics of samples that did not converge are NaN (the generic analyses drop them).
    """
    stage = study.stage
    fixed = {p.name: p.nominal for p in study.parameters}

    def model(samples: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        n = len(next(iter(samples.values())))
        full = {name: np.full(n, value) for name, value in fixed.items()}
        full.update({k: np.asarray(v, dtype=float) for k, v in samples.items()})
        with np.errstate(all="ignore"):
            out = stage.evaluate(full)
        ok = np.asarray(out.pop("converged"), dtype=bool)
        result = {m: np.where(ok, np.asarray(out[m], dtype=float), np.nan)
                  for m in stage.metrics}
        result[worstcase.SOLVED] = ok
        return result

    return model


def ranked_metrics(study: Study) -> list[str]:
    """The metrics that have ranks, sensitivities and a worst case: all but those whose
    values name a part (``hot_spot``), whose codes are no order."""
    return [m for m, info in study.stage.metrics.items() if not info.index]


def bounds_for(study: Study) -> list[worstcase.Bound]:
    """Worst-case bounds of every parameter: its tolerance limits, widened by any drift.

    A normal distribution's limits are its tolerance (``sigmas`` sigma); a lognormal gain's are
    the datasheet minimum and maximum. End-of-life drift (``drift`` of a part) is added
    linearly, as extreme-value practice does (ECSS-Q-HB-30-01A).
    """
    out = []
    for p in study.parameters:
        lo, hi, nom = p.low, p.high, p.nominal
        values = None
        if p.drift:
            lo, hi = lo - abs(nom) * p.drift, hi + abs(nom) * p.drift
        if p.distribution.kind == "discrete" and lo < hi:
            # a set (variants, bins, a temperature profile): the methods take its members
            values = tuple(sorted(set(float(v) for v in p.distribution.values)))
        out.append(worstcase.Bound(p.name, nom, min(lo, nom), max(hi, nom), values))
    return out


def _worst_case_notes(study: Study, bounds: list[worstcase.Bound]) -> list[str]:
    """What the worst case's methods take simply on this study: correlated inputs taken
    independent, and discrete sets taken at their ends (corners) or at some of their
    members' combinations (optimizer)."""
    notes = []
    if study.correlations:
        notes.append("the corners, bands and searches take every input independent of the "
                     "others: the study's correlations act in the Monte Carlo run only; a "
                     "corner may join values that correlated parts seldom take together, "
                     "while the RSS band, which adds independent shares, can be narrower "
                     "than correlated inputs make the spread")
    sets = [b for b in bounds if b.discrete]
    if sets:
        combos, complete = worstcase.discrete_combinations(bounds)
        names = ", ".join(b.name for b in sets)
        if complete:
            notes.append(f"the discrete sets ({names}) enter the corners and the bands at "
                         f"their ends, and the optimizer at every one of their "
                         f"{len(combos)} combinations of members")
        else:
            total = math.prod(len(b.values) for b in sets)
            notes.append(f"the discrete sets ({names}) enter the corners and the bands at "
                         f"their ends, and the optimizer at {len(combos)} of their {total} "
                         f"combinations of members (each set's ends and nominal): a member "
                         f"in between can be worse, which only the Monte Carlo run covers")
    return notes


def parameters_table(study: Study) -> list[dict]:
    return [{"name": p.name, "unit": p.unit, "nominal": p.nominal, "low": p.low,
             "high": p.high, "distribution": p.distribution.describe(),
             "varies": bool(p.varies), "key": p.key, "description": p.description}
            for p in study.parameters]


def _margins(values: np.ndarray, lo, hi) -> list[np.ndarray]:
    """Signed distance to each limit, scaled by the spread: negative fails. One array per
    limit given, since the tail of the smaller of two distances is not that of either."""
    values = np.where(np.isfinite(values), values, np.nan)  # out-of-range entries: no margin
    scale = stats.mean_std(values, ddof=0, nan=True)[1] if np.isfinite(values).sum() > 1 \
        else 1.0
    scale = scale if scale > 0 else 1.0
    parts = []
    # a distance beyond double precision in units of the spread (a limit of 1e308 against a
    # spread of microvolts) is an infinite margin: the tail fits leave it out like any other
    with np.errstate(over="ignore"):
        if lo is not None:
            parts.append((values - lo) / scale)
        if hi is not None:
            parts.append((hi - values) / scale)
    return parts


def insights(study: Study, column, threads: int = 1, level: float = 0.95) -> dict:
    """Parameter table, rank sensitivities, failure drivers, capability, tail estimates.

    ``column(name)`` returns one column of the run in sample order; it is only called from
    this thread. ``threads`` columns are ranked or sorted at once
    (:func:`tolerance.threads.thread_map`); the insights do not depend on it. ``level`` is
    the run's exact-interval level, which the tail estimates' count checks use too.
    """
    varying = [p for p in study.parameters if p.varies]
    metrics = ranked_metrics(study)
    n = len(column("converged"))
    rows = slice(0, min(n, SENSITIVITY_ROWS))
    head = slice(0, min(n, INSIGHT_ROWS))
    converged = column("converged")[head].astype(bool)
    # every input read once for both uses; copies, because a slice is a view that would
    # keep every full column alive (memory ~ run length)
    sensitivity_inputs, driver_inputs = {}, {}
    for p in varying:
        values = column(p.name)
        sensitivity_inputs[p.name] = values[rows].copy()
        driver_inputs[p.name] = values[head][converged]
        del values
    inputs = pd.DataFrame(sensitivity_inputs)
    outputs = pd.DataFrame({m: column(m)[rows].copy() for m in metrics})
    result: dict = {"parameters": parameters_table(study)}
    if varying and len(inputs) > 2:
        table = sensitivity.rank_sensitivity(inputs, outputs, threads)
        result["sensitivity"] = _records(table)
        result["sensitivity_rows"] = len(inputs)
    else:
        result["sensitivity"] = []
    del inputs, outputs, sensitivity_inputs

    units = {p.name: p.unit for p in study.parameters}
    drivers, capability, tail = {}, {}, {}
    failing = {}

    def criterion_values():  # read here, in the calling thread; fitted in the threads
        for c in study.criteria:
            yield c, column(c.metric)[head][converged]

    def fits(item):
        c, values = item
        # units without a finite value (infinite, or undefined in a runaway) are outside
        # every fit: their failures count as they are, and the capability says how many
        outside = ~np.isfinite(values)
        failing = int(np.count_nonzero(outside & ~c.passes(values)))
        cap = stats.capability(values, c.minimum, c.maximum)
        cap["failing_not_finite"] = failing
        return (cap, stats.tail_estimate(_margins(values, c.minimum, c.maximum),
                                         counted_failures=failing,
                                         counted_passes=int(outside.sum()) - failing))

    for c, (cap, fit) in zip(study.criteria, thread_map(fits, criterion_values(), threads)):
        capability[c.name], tail[c.name] = cap, fit
    counted = int(converged.sum())
    for c in study.criteria:
        failed = converged & ~column(f"pass.{c.name}")[head].astype(bool)
        tail[c.name]["count_check"] = stats.tail_check(tail[c.name], int(failed.sum()),
                                                       counted, level)
        if failed.any() and varying:
            failing[c.name] = failed[converged]
    if failing:
        # every criterion's drivers at once: each input column is sorted once for all
        frame = pd.DataFrame(driver_inputs)
        driver_inputs.clear()  # the frame holds its own copy
        drivers = sensitivity.failure_drivers_of(frame, failing, units, threads=threads)
    result["failure_drivers"] = drivers
    result["beyond_limits"] = beyond_limits(study, column, head)
    result["insight_rows"] = min(n, INSIGHT_ROWS)
    result["capability"] = capability
    result["tail"] = tail
    return result


def beyond_limits(study: Study, column, rows: slice) -> list[dict]:
    """The units of ``rows`` whose value of a parameter lies beyond its stated limits: an
    uncut normal or lognormal spread draws about 0.27 % of them (a gain below the
    datasheet's minimum), which a review should see with how many of them fail. One entry
    a parameter that has any: ``name``, ``low``, ``high``, ``below``, ``above`` and
    ``failing`` (of those beyond, the units failing a criterion or not converged)."""
    out = []
    passed = None
    for p in study.parameters:
        lo, hi = p.distribution.support
        if not p.varies or (lo >= p.low and hi <= p.high):
            continue
        values = column(p.name)[rows]
        below, above = values < p.low, values > p.high
        beyond = below | above
        if not beyond.any():
            continue
        if passed is None:
            passed = column("pass")[rows].astype(bool)
        out.append({"name": p.name, "low": p.low, "high": p.high,
                    "below": int(below.sum()), "above": int(above.sum()),
                    "failing": int((beyond & ~passed).sum())})
    return out


def _records(df: pd.DataFrame) -> list[dict]:
    out = []
    for rec in df.to_dict(orient="records"):
        out.append({k: (None if isinstance(v, float) and math.isnan(v) else
                        (v.item() if isinstance(v, np.generic) else v)) for k, v in rec.items()})
    return out


def check_varies(study: Study) -> list:
    """The parameters that vary, or a UsageError when none does (nothing to rank)."""
    from tolerance.api import UsageError

    varying = [p for p in study.parameters if p.varies]
    if not varying:
        raise UsageError(f"{study.path}: no parameter varies, so there is no sensitivity to "
                         "rank; give a part or a condition a tolerance or a range")
    return varying


def _samples_and_seed(study: Study, samples, seed) -> tuple[int, int]:
    """The run's sample count and seed as whole numbers, the study's own where None: both
    are recorded and the seed also draws the analysis's own design, so a float seed that the
    run took (3.0) ended in a traceback there, and None gave other figures every call."""
    from tolerance.api import make_spec

    spec = make_spec(study, samples, seed)
    return spec.samples, spec.seed


def study_sensitivity(study: Study, samples: int | None, seed: int | None, sobol_n: int,
                      bootstrap: int = 200, sampler: str | None = None,
                      chunk_size: int | None = None, jobs: int = 1) -> dict:
    """Rank sensitivities on a Monte Carlo run and Sobol indices on a dedicated design
    (``samples`` and ``seed`` None: the study's; ``sobol_n`` a power of two from
    ``sensitivity.MIN_SOBOL_N`` to ``MAX_SOBOL_N``; ``jobs`` workers for the run).

    Sobol indices assume independent inputs: correlations of the study are not applied to the
    Sobol design (the result says so when the study has any).
    """
    from tolerance.api import UsageError, _whole, as_study, run

    study = as_study(study)
    varying = check_varies(study)
    samples, seed = _samples_and_seed(study, samples, seed)
    sobol_n = _whole(sobol_n, "sobol_samples")
    if sobol_n & (sobol_n - 1) or not (sensitivity.MIN_SOBOL_N <= sobol_n
                                         <= sensitivity.MAX_SOBOL_N):
        # before the Monte Carlo run, not after it (2^20 ran out of memory there)
        raise UsageError(f"sobol_samples must be a power of two from "
                         f"{sensitivity.MIN_SOBOL_N} to {sensitivity.MAX_SOBOL_N:,} (e.g. "
                         f"1024), got {sobol_n:,}")
    res = run(study, samples=samples, seed=seed, sampler=sampler, chunk_size=chunk_size,
              jobs=jobs)
    df = res.samples
    ranked = ranked_metrics(study)
    rank = sensitivity.rank_sensitivity(df[[p.name for p in varying]], df[ranked])
    ppf = {p.name: p.distribution.ppf for p in varying}
    sob = sensitivity.sobol_analysis(model_for(study), ppf, ranked, sobol_n, seed,
                                     bootstrap=bootstrap)
    notes = list(sob.pop("notes", []))
    stuck = int(res.summary["not_converged"])
    if stuck:
        notes.insert(0, f"{stuck:,} of {samples:,} units of the Monte Carlo run did not "
                        "converge: the rank measures leave them out, so an input that "
                        "decides whether a unit converges can rank low there")
    if study.correlations:
        notes.append("the Sobol design treats the inputs as independent; the study's "
                     "correlations are used only in the rank measures")
    limited = list(dict.fromkeys(c.metric for c in study.criteria))
    blank = sensitivity.undefined_prcc_note(_records(rank), limited or None)
    if blank:
        notes.append(blank.rstrip("."))
    return {
        "study": study.path, "study_hash": study.study_hash, "seed": seed,
        "sampler": res.summary["sampler"],
        "title": study.title, "samples": samples,
        "limited": list(dict.fromkeys(c.metric for c in study.criteria)),
        "units": {m: i.unit for m, i in study.stage.metrics.items()},
        "rank": _records(rank),
        "sobol": {k: v for k, v in sob.items() if k not in ("evaluations", "nan_replaced")},
        "sobol_n": sobol_n, "sobol_evaluations": sob.get("evaluations"),
        "nan_replaced": sob.get("nan_replaced", {}), "notes": notes,
        "not_converged": stuck,
        "evaluations": samples + int(sob.get("evaluations", 0)),
    }


def study_worst_case(study: Study, samples: int | None, seed: int | None,
                     sampler: str | None = None, chunk_size: int | None = None,
                     jobs: int = 1) -> dict:
    """Extreme-value, RSS and optimizer extremes per metric beside the Monte Carlo extremes
    (the Monte Carlo run drawn with ``sampler`` in chunks of ``chunk_size`` on ``jobs``
    workers; ``samples``, ``seed``, ``sampler`` and ``chunk_size`` None: the study's own)."""
    from tolerance.api import as_study, run

    study = as_study(study)
    samples, seed = _samples_and_seed(study, samples, seed)
    res = run(study, samples=samples, seed=seed, sampler=sampler, chunk_size=chunk_size,
              jobs=jobs)
    mc = {m: {k: res.summary["metrics"][m][k] for k in ("min", "max", "p001", "p999")}
          for m in study.stage.metrics}
    bounds = bounds_for(study)
    # the optimizer (the costly part: its searches run in lockstep, but each start's L-BFGS-B
    # steps are sequential) searches the metrics the design is judged on: the stage's and the
    # study's own criteria both ways (a rating whose limit the study's [limits] table changed
    # is the study's criterion too), the ratings on their limited side (found by a review:
    # a junction temperature whose hottest unit has a gain between the corners, the stage
    # at its maximum power transfer, read "within" from the corners alone); a 0/1 flag has
    # no slope to follow, and its corners and units are its worst case
    defaults = {c.metric: (c.minimum, c.maximum) for c in study.stage.criteria}
    limited = list(dict.fromkeys(
        c.metric for c in study.criteria
        if c.source != "rating" or defaults.get(c.metric) != (c.minimum, c.maximum)))
    senses: dict[str, tuple[str, ...]] = {}
    for c in study.criteria:
        if c.metric in limited or c.metric in FLAG_METRICS:
            continue
        senses[c.metric] = tuple(dict.fromkeys(
            senses.get(c.metric, ()) + (("min",) if c.minimum is not None else ())
            + (("max",) if c.maximum is not None else ())))
    searched = limited + list(senses)
    metrics = ranked_metrics(study)
    table = worstcase.worst_case_table(model_for(study), bounds, metrics,
                                       mc_extremes=mc, seed=seed, optimize_metrics=searched,
                                       optimize_senses=senses, starts=3, maxiter=60)
    evaluations = table.pop("evaluations")
    # Monte Carlo units beyond the ranges searched: normal and lognormal spreads are not cut
    # at their tolerance, so 0.27 % of such a parameter's draws lie outside its 3-sigma box
    outside = np.zeros(len(res.samples), dtype=bool)
    for b in bounds:
        if not b.fixed:
            values = res.samples[b.name].to_numpy()
            slack = 1e-12 * max(abs(b.low), abs(b.high))
            outside |= (values < b.low - slack) | (values > b.high + slack)
    # whether each metric's Monte Carlo extreme comes from a unit inside the box searched:
    # one that does and lies beyond the corners is an inner extreme they missed
    for name, row in table.items():
        values = res.samples[name].to_numpy(dtype=float)
        finite = np.isfinite(values)
        if finite.any():
            pick = np.flatnonzero(finite)
            row["mc_min_inside"] = bool(~outside[pick[np.argmin(values[pick])]])
            row["mc_max_inside"] = bool(~outside[pick[np.argmax(values[pick])]])
    for row in table.values():  # JSON has no infinity: an infinite extreme is written "inf"
        for key, value in row.items():
            if isinstance(value, float) and math.isinf(value):
                row[key] = "inf" if value > 0 else "-inf"
    result = {
        "study": study.path, "study_hash": study.study_hash, "seed": seed,
        "sampler": res.summary["sampler"],
        "monte_carlo_samples": samples,
        "monte_carlo_outside": int(outside.sum()),
        "title": study.title,
        "bounds": [{"name": b.name, "nominal": b.nominal, "low": b.low, "high": b.high,
                    "unit": study.parameter(b.name).unit} for b in bounds],
        "units": {m: i.unit for m, i in study.stage.metrics.items()},
        "metrics": table,
        "evaluations": int(evaluations) + samples,
        "optimized_metrics": searched,
        "optimized_senses": {m: list(senses.get(m, ("min", "max"))) for m in searched},
        "notes": _worst_case_notes(study, bounds),
        "criteria": [{"name": c.name, "metric": c.metric, "min": c.minimum, "max": c.maximum}
                     for c in study.criteria],
    }
    from tolerance.report import worstcase_notes

    # every sentence the console and the report give, most of them read off the table (found
    # by a review: worstcase.json held "notes": [] where the report carried four)
    result["report_notes"] = worstcase_notes(result)
    return result
