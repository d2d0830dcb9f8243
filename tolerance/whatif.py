"""What-if: pin parameters and rerun with common random numbers.

Every parameter keeps its own column of random numbers (see :mod:`tolerance.sampling`), so the
pinned run sees exactly the same values of every other parameter as the baseline: the difference
between the two comes from the pin alone.
"""

from __future__ import annotations

import re

import numpy as np

from tolerance.api import UsageError, run
from tolerance.distributions import Discrete
from tolerance.runner import Override
from tolerance.study import Study, parameter_hint
from tolerance.units import UnitError, format_quantity, parse_quantity

_PERCENTILE = re.compile(r"^p(\d+(?:\.\d+)?)$", re.IGNORECASE)


def pin_value(study: Study, name: str, spec: str) -> float:
    """Value of a pin: ``min``, ``max``, ``nominal``, ``pNN`` (a percentile of the parameter's
    distribution) or a quantity in the parameter's unit, within the values the study file
    accepts for the parameter (a zero load resistance is refused here as it is there)."""
    value = _pin_value(study, name, spec)
    p = study.parameter(name)
    problem = p.out_of_range(value)
    if problem:
        raise UsageError(f"--pin {name}={spec.strip()}: {problem}")
    if isinstance(p.distribution, Discrete):
        # units take the set's members only: a value between them (or beyond) is no unit of
        # the study, and its partners' shift stepped with the stratum it fell in
        member = p.distribution.member(value)
        if member is None:
            shown = ", ".join(format_quantity(v, p.unit) for v in p.distribution.values)
            key = f" ({p.key})" if p.key and p.key != name else ""
            raise UsageError(f"--pin {name}={spec.strip()}: {name}{key} is a discrete set "
                             f"and takes only its members: {shown} (or pin min, max, "
                             f"nominal or pNN)")
        value = member
    return value


def _pin_value(study: Study, name: str, spec: str) -> float:
    try:
        p = study.parameter(name)
    except KeyError:
        raise UsageError(f"--pin {name}: not a parameter of {study.path}"
                         f"{parameter_hint(name, study.parameter_names)}; parameters: "
                         f"{', '.join(study.parameter_names)}") from None
    spec = spec.strip()
    word = spec.lower()  # MIN, Max and p50, P50 alike
    if word == "min":
        return p.low
    if word == "max":
        return p.high
    if word in ("nominal", "nom", "typ"):
        return p.nominal
    m = _PERCENTILE.match(spec)
    if m:
        q = float(m.group(1))
        if not 0 < q < 100:
            raise UsageError(f"--pin {name}={spec}: a percentile lies strictly between p0 and "
                             "p100; for the ends of the spread write min or max")
        return float(p.distribution.ppf(np.array([q / 100.0]))[0])
    if spec[:1] in ("p", "P"):
        raise UsageError(f"--pin {name}={spec}: a percentile is p and a number between 0 and "
                         "100, e.g. p10 or p99.9; or write min, max, nominal or a value")
    try:
        return parse_quantity(spec, p.unit)
    except UnitError as exc:
        raise UsageError(f"--pin {name}={spec}: {exc}; or write min, max, nominal or pNN") from None


def parse_pins(study: Study, pins: list[str]) -> dict[str, Override]:
    out = {}
    for text in pins:
        if "=" not in text:
            raise UsageError(f"--pin {text}: expected NAME=VALUE, NAME=min, NAME=max or NAME=pNN")
        name, spec = text.split("=", 1)
        name = name.strip()
        if name in out:
            raise UsageError(f"--pin {name}: pinned twice")
        out[name] = Override("pin", pin_value(study, name, spec))
    return out


def _score(x: float) -> str:
    return f"{x:+.1f}"


def pin_notes(study: Study, overrides: dict[str, Override]) -> list[str]:
    """Sentences on pins that contradict the study's correlation: pins whose normal scores
    together lie further from the centre than k independent pins at their tolerance ends
    (Mahalanobis distance above 3 sqrt(k), by more than one standard deviation), or a
    correlated partner drawn at a mean score beyond 3 in size
    (:func:`tolerance.sampling.pin_tension`). The run goes ahead: it is a what-if."""
    from tolerance.sampling import PIN_SCORE, pin_tension

    out = _outside_notes(study, overrides)
    if not study.correlations:
        return out
    pins = {n: o.value for n, o in overrides.items()}
    tension = pin_tension(study.parameters, study.correlation_matrix(), pins)
    if tension is None:
        return out
    far = [(n, q) for n, q in tension["partners"].items() if abs(q["mean"]) > PIN_SCORE]
    joint = tension["distance"] > tension["independent"] + 1.0
    if not far and not joint:
        return out
    scores = ", ".join(f"{n} {_score(t)}" for n, t in tension["pins"].items())
    text = (f"The pins contradict the study's correlation: their normal scores ({scores}) "
            f"lie {tension['distance']:.1f} standard deviations from the centre jointly "
            f"(Mahalanobis distance given the [[correlation]] coefficients")
    text += (f"; {len(pins)} independent pins at their tolerance ends lie "
             f"{tension['independent']:.1f})" if len(pins) > 1 else ")")
    for n, q in far:
        text += (f"; the correlated partner {n} is drawn given them at a mean normal score "
                 f"of {_score(q['mean'])} (spread {q['sd']:.2f}): "
                 f"{100 * q['beyond']:.0f} % of its units lie beyond a score of "
                 f"{PIN_SCORE:g}, outside its tolerance")
    text += (". The pins together are rarer than any unit the study describes; read the "
             "pinned run as a stress case, not as units that will be built.")
    return out + [text]


def _outside_notes(study: Study, overrides: dict[str, Override]) -> list[str]:
    """A sentence per pin beyond its parameter's stated limits (a gain of 1,000 on a part
    whose datasheet says 40 .. 250): the what-if runs, but no unit of the study has that
    value, so its results describe another part or another build."""
    out = []
    for name, o in overrides.items():
        p = study.parameter(name)
        lo, hi = (p.low, p.high) if p.varies else (p.nominal, p.nominal)
        value = float(o.value)
        slack = 1e-9 * max(abs(lo), abs(hi))  # a limit given in other units
        if lo - slack <= value <= hi + slack:
            continue
        span = (f"{format_quantity(lo, p.unit)} .. {format_quantity(hi, p.unit)}"
                if p.varies else format_quantity(lo, p.unit))
        # an uncut normal or lognormal spread draws units beyond its stated limits (a
        # review's p0.1 pin of a gain "no unit has", where 5 of 3,000 units lay below it)
        share = 0.0
        if p.varies:
            below = float(p.distribution.cdf(np.asarray(value)))
            share = below if value < lo else 1.0 - below
        if share > 0.0:
            out.append(f"{name} is pinned at {format_quantity(value, p.unit)}, beyond the "
                       f"study's stated limits {span}: its spread is not cut there, and "
                       f"{100 * share:.3g} % of its units lie "
                       f"{'below' if value < lo else 'above'} that value.")
            continue
        out.append(f"{name} is pinned at {format_quantity(value, p.unit)}, outside the "
                   f"study's {span}: no unit of the study has that value, so the pinned "
                   f"run describes another part or build.")
    return out


def compare(base: dict, pinned: dict) -> dict:
    """Side-by-side figures of two summaries."""
    crit = {}
    for name, c in base["criteria"].items():
        p = pinned["criteria"][name]
        crit[name] = {"metric": c["metric"], "limit": c["limit"],
                      "baseline": {k: c[k] for k in ("failures", "rate", "ci_low", "ci_high",
                                                     "verdict")},
                      "pinned": {k: p[k] for k in ("failures", "rate", "ci_low", "ci_high",
                                                   "verdict")}}
    metrics = {}
    for name, m in base["metrics"].items():
        q = pinned["metrics"][name]
        metrics[name] = {"unit": m["unit"],
                         "baseline": {k: m[k] for k in ("p001", "p50", "p999", "min", "max")},
                         "pinned": {k: q[k] for k in ("p001", "p50", "p999", "min", "max")}}
    return {
        "yield": {"baseline": base["yield"], "pinned": pinned["yield"]},
        "verdict": {"baseline": base["verdict"], "pinned": pinned["verdict"]},
        "not_converged": {"baseline": base["not_converged"], "pinned": pinned["not_converged"]},
        "criteria": crit,
        "metrics": metrics,
    }


def whatif(study: Study, pins: list[str], samples: int | None = None, seed: int | None = None,
           sampler: str | None = None, jobs: int = 1, chunk_size: int | None = None):
    """Baseline and pinned runs with common random numbers.

    Returns
    -------
    (dict, RunResult, RunResult)
        The comparison (written as whatif.json), the baseline and the pinned run.
    """
    from tolerance.api import as_study
    from tolerance.stats import paired_difference  # scipy.stats: only where a run compares

    study = as_study(study)
    if isinstance(pins, str):
        pins = [pins]  # one pin given as text, not its characters
    if not pins:
        raise UsageError("whatif needs at least one --pin NAME=VALUE|min|max|pNN")
    overrides = parse_pins(study, pins)
    base = run(study, samples=samples, seed=seed, sampler=sampler, jobs=jobs,
               chunk_size=chunk_size)
    pinned = run(study, samples=samples, seed=seed, sampler=sampler, jobs=jobs,
                 chunk_size=chunk_size, overrides=overrides)
    result = {
        "study": study.path, "study_hash": study.study_hash, "title": study.title,
        "seed": base.summary["seed"], "samples": base.summary["samples"],
        "sampler": base.summary["sampler"],
        "pins": {n: o.value for n, o in overrides.items()},  # SI values (K for temperatures)
        "pinned_values": {n: format_quantity(o.value, study.parameter(n).unit)
                          for n, o in overrides.items()},
        "pin_text": pins,
        # partners of a pinned parameter are drawn given the pin (sampling.condition_on_pins)
        "followers": sorted({n for c in study.correlations if set(c.parameters) & set(overrides)
                             for n in c.parameters if n not in overrides}),
        # pins far from the centre jointly, or partners pushed beyond their tolerance
        "pin_notes": pin_notes(study, overrides),
        **compare(base.summary, pinned.summary),
        # the same units in both runs: their yields compared unit by unit, which resolves
        # differences far inside either run's own interval
        "yield_change": paired_difference(base.column("pass"), pinned.column("pass")),
        "evaluations": 2 * base.summary["samples"],
    }
    return result, base, pinned
