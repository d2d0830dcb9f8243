"""The run summary: counted rates with exact intervals, percentiles, verdicts.

Every figure is computed from whole columns in sample order (never from per-chunk partial sums),
so the same seed gives the same summary whatever the number of workers or the chunk size.
"""

from __future__ import annotations

import datetime as _dt
from typing import Callable

import numpy as np

from tolerance import __version__, limits, stats
from tolerance.runner import RunSpec, criterion_column
from tolerance.threads import thread_map

CONFIDENCE = 0.95
#: the exact intervals' level in a run whose length the counts decide (``--target-ci`` with
#: at least one check): a stop rule on the interval's half-width stops more often where the
#: count happens to be low, and a Clopper-Pearson 95 % interval then covers as little as
#: 94.0 % (its upper end below the true rate 4.2 % of the time, against at most 2.5 % at a
#: fixed sample count). At 97.5 % the simulated coverage was at least 96.6 % and the upper
#: end below the rate at most 2.50 % (binomial simulation of the rule, 137 cases of rates
#: 1e-6 .. 0.5 and 1 to 1,000 checks, 50,000 to 100,000 runs each; tests/test_stats.py
#: repeats the worst); the level raised until the stopped procedure covers, after Frey, The
#: American Statistician 64 (2010) 242-249 (from memory)
STOPPED_RUN_CONFIDENCE = 0.975
#: what the figures of a summary (and the samples beside it) are in
UNITS_NOTE = ("SI: ohm, V, A, W, s, J, K/W; unit 'temperature' is an absolute temperature in "
              "kelvin (subtract 273.15 for degC), unit 'K' a temperature difference, unit '1' "
              "a ratio")


def _spread(values, converged) -> dict:
    """The spread figures of a metric, how many of its samples are infinite (outside the
    model's range, e.g. a stress above its rating's maximum temperature) and how many
    converged samples have no value at all (``undefined``: the junction temperature of a
    unit in thermal runaway), both of which the figures leave out."""
    values = np.asarray(values, dtype=float)
    return {**stats.percentile_summary(values),
            "infinite": int(np.count_nonzero(np.isinf(values))),
            "undefined": int(np.count_nonzero(np.isnan(values) & converged))}


def summarize(spec: RunSpec, column: Callable[[str], np.ndarray], *, study_path: str,
              title: str, stage_name: str, allowed_rate: float,
              extra: dict | None = None, threads: int = 1,
              interval_confidence: float = CONFIDENCE) -> dict:
    """Build the summary dict of a finished run.

    Parameters
    ----------
    spec : RunSpec
        What was run.
    column : callable
        ``column(name) -> ndarray`` returns one column of the samples, in sample order.
    interval_confidence : float
        Level of the exact intervals: :data:`CONFIDENCE`, or :data:`STOPPED_RUN_CONFIDENCE`
        where the counts decided the run's length, so that the intervals still cover at
        least 95 %. The zero-failure bounds stay one-sided at :data:`CONFIDENCE`.
    threads : int
        Threads for the metrics' percentiles (:func:`tolerance.threads.thread_map`); the
        summary does not depend on it. ``column`` is only ever called from this thread.
    """
    converged = column("converged").astype(bool)
    n = len(converged)
    n_conv = int(converged.sum())
    not_converged = n - n_conv
    all_pass = column("pass").astype(bool)
    passes = int(all_pass.sum())
    level = interval_confidence
    y_low, y_high = stats.clopper_pearson(n - passes, n, level)
    fail_rate_low, fail_rate_high = y_low, y_high

    criteria = {}
    verdicts = []
    for c in spec.criteria:
        ok = column(criterion_column(c.name)).astype(bool)
        failures = int(np.count_nonzero(converged & ~ok))
        denom = max(n_conv, 1)
        if n_conv:
            lo, hi = stats.clopper_pearson(failures, denom, level)
            v = limits.verdict(failures, float(lo), float(hi), allowed_rate)
        else:
            # no sample converged: nothing is known of the rate, so no pass either
            lo, hi, v = 0.0, 1.0, limits.UNDECIDED
        verdicts.append(v)
        criteria[c.name] = {
            "metric": c.metric,
            "limit": {"min": c.minimum, "max": c.maximum},
            "source": c.source,
            "description": c.description,
            "failures": failures,
            "evaluated": n_conv,
            "rate": failures / denom if n_conv else float("nan"),
            "ci_low": float(lo),
            "ci_high": float(hi),
            # a stop on the counts leaves the zero-failure bound as it is: a run that
            # stops at n with no failure had none at every earlier check, so the event
            # is within "no failure in n" (from memory; no adjustment needed)
            "zero_failure_upper": (float(stats.zero_failure_upper(n_conv, CONFIDENCE))
                                   if n_conv else 1.0) if failures == 0 else None,
            "verdict": v,
        }

    metrics = {}
    spreads = thread_map(lambda values: _spread(values, converged),
                         (column(name) for name in spec.stage.metrics), threads)
    for (name, info), spread in zip(spec.stage.metrics.items(), spreads):
        metrics[name] = {"unit": info.unit, "description": info.description, **spread}

    overall = limits.overall(verdicts, not_converged)
    saturation = criteria.get("saturation")
    summary = {
        "tool_version": __version__,
        "title": title,
        "study": study_path,
        "study_hash": spec.study_hash,
        "stage": stage_name,
        "seed": spec.seed,
        "samples": n,
        "planned_samples": spec.samples,
        "sampler": spec.sampler,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        # the exact intervals' level; the zero-failure bounds stay one-sided 95 %
        "confidence": level,
        "interval_level": level,
        "units": UNITS_NOTE,
        "max_failure_rate": allowed_rate,
        "verdict": overall,
        "yield": {
            "estimate": passes / n,
            "ci_low": float(1 - fail_rate_high),
            "ci_high": float(1 - fail_rate_low),
            "confidence": level,
            "passes": passes,
        },
        "saturation_failure_rate": saturation["rate"] if saturation else None,
        # the overall bound with no failing unit (one-sided 95 %, whatever the intervals'
        # level: a review read it beside 15,252 failing units and a confidence of 0.975)
        "zero_failure_upper": (float(stats.zero_failure_upper(n, CONFIDENCE))
                               if passes == n else None),
        "zero_failure_confidence": CONFIDENCE,
        "not_converged": not_converged,
        "criteria": criteria,
        "metrics": metrics,
        "overrides": {name: {"kind": o.kind, "value": o.value} for name, o in spec.overrides},
        "correlations": correlation_pairs(spec.parameters, spec.correlation),
        "discrete_sets": discrete_sets(spec.parameters),
    }
    if extra:
        summary.update(extra)
    return clean(summary)


def correlation_pairs(parameters, correlation) -> list[dict]:
    """Every correlated pair of parameters, in the parameters' order: ``parameters`` (two
    names) and ``coefficient``, the correlation of their normal scores (the Gaussian copula
    of :func:`tolerance.sampling.apply_copula`, not of their values)."""
    if correlation is None:
        return []
    names = [p.name for p in parameters]
    c = np.asarray(correlation, dtype=float)
    return [{"parameters": [names[i], names[j]], "coefficient": float(c[i, j])}
            for i in range(len(names)) for j in range(i + 1, len(names)) if c[i, j] != 0.0]


def discrete_sets(parameters) -> dict:
    """Members (in ascending order, SI) and their probabilities of every discrete set."""
    return {p.name: {"values": [float(v) for v in p.distribution.values],
                     "shares": list(p.distribution.shares)}
            for p in parameters if p.distribution.kind == "discrete"}


def clean(obj):
    """JSON-ready copy: numpy scalars to Python, NaN and infinities to None (null)."""
    if isinstance(obj, dict):
        return {str(k): clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [clean(v) for v in obj.tolist()]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not np.isfinite(obj):
        return None
    return obj


def comparable(summary: dict) -> dict:
    """The summary without its creation date (for reproducibility comparisons)."""
    return {k: v for k, v in summary.items() if k != "created"}
