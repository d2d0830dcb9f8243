"""Value choice: sweep preferred values of one or two parts with common random numbers.

Each candidate moves the part's nominal to a preferred value of an IEC 60063 series while every
sample keeps its relative deviation from nominal (and every other parameter its values), so the
candidates differ only by the choice itself. For each candidate: yield with its exact interval,
each criterion's rate, percentiles of every metric. The best candidate has the highest yield
(ties: the higher lower bound of the interval, then the most room to the limits at their robust
ends in standard deviations, :func:`robust_margin`, then the value nearest the study's own
nominal; :func:`pick_best`);
a trade-off frontier between two metrics lists the candidates no other candidate beats on both.
"""

from __future__ import annotations

import itertools
import math

import numpy as np

from tolerance.api import UsageError, run
from tolerance.runner import Override
from tolerance.study import Study, parameter_hint
from tolerance.units import UnitError, format_quantity, parse_series_range, preferred_values


#: The most candidates of one value choice, one part or two (each is a whole Monte Carlo run;
#: an E24 decade holds 24, two parts over a decade each 576 runs).
MAX_CANDIDATES = 200


def parse_vary(study: Study, text: str) -> tuple[str, np.ndarray]:
    """``NAME=SERIES:LOW..HIGH`` -> (name, candidate values)."""
    if "=" not in text:
        raise UsageError(f"--vary {text}: expected NAME=SERIES:LOW..HIGH, e.g. RBE2=E24:47..1k")
    name, spec = (s.strip() for s in text.split("=", 1))
    try:
        p = study.parameter(name)
    except KeyError:
        raise UsageError(f"--vary {name}: not a parameter of {study.path}"
                         f"{parameter_hint(name, study.parameter_names)}; parameters: "
                         f"{', '.join(study.parameter_names)}") from None
    if p.unit == "temperature":
        # preferred numbers are ratios; a temperature is on an offset scale (degC, K)
        raise UsageError(f"--vary {name}: a temperature has no preferred values; pin one "
                         "with whatif --pin instead")
    if not p.nominal > 0:
        raise UsageError(f"--vary {name}: only parameters with a positive nominal can be swept")
    try:
        series, lo, hi = parse_series_range(spec, p.unit)
        values = preferred_values(series, lo, hi)
    except UnitError as exc:
        raise UsageError(f"--vary {name}={spec}: {exc}") from None
    if values.size == 0:
        raise UsageError(f"--vary {name}={spec}: no {series} value lies in that range")
    # each candidate scales the parameter's spread by value / nominal: its extremes must stay
    # within double precision (about 1.8e308), as a value in the study file must
    with np.errstate(over="ignore"):
        reach = max(abs(p.low), abs(p.high)) * (float(values[-1]) / p.nominal)
    if not math.isfinite(reach):
        raise UsageError(f"--vary {name}={spec}: the candidates scale {name} beyond double "
                         "precision (about 1.8e308); narrow the range")
    # each candidate must be a value the study file accepts for the part, over its whole
    # spread (a tempco of 100 to 220 per kelvin ran as if it were one)
    for v in values:
        scale = float(v) / p.nominal
        for x in (float(v), p.low * scale, p.high * scale):
            problem = p.out_of_range(x)
            if problem:
                where = "" if x == float(v) else ", at an end of its spread"
                raise UsageError(f"--vary {name}={spec}: {problem} (candidate "
                                 f"{format_quantity(float(v), p.unit)}{where})")
    if values.size > MAX_CANDIDATES:
        raise UsageError(f"--vary {name}={spec}: {values.size} candidates; narrow the range "
                         f"(at most {MAX_CANDIDATES})")
    return name, values


#: how a trade-off metric says which end is better: ``power_output:lower``
BETTER = {"higher": 1, "lower": -1}


def _direction(study: Study, metric: str, given: dict[str, int] | None = None) -> int:
    """+1 when larger is better for ``metric`` (it has a lower limit), -1 for an upper limit;
    ``given`` (from ``--tradeoff METRIC:lower``) first."""
    if given and metric in given:
        return given[metric]
    for c in study.criteria:
        if c.metric == metric:
            return 1 if c.minimum is not None else -1
    return 1


def tradeoff_item(study: Study, text: str) -> tuple[str, int | None]:
    """``METRIC`` or ``METRIC:lower`` / ``METRIC:higher`` (which end is better) -> (metric,
    direction or None); a metric no criterion limits must say which end is better."""
    metrics = study.stage.metrics
    name, _, better = (t.strip() for t in text.partition(":"))
    if name not in metrics:
        raise UsageError(f"--tradeoff {name or '(empty)'}: not a metric of this stage; "
                         f"metrics: {', '.join(metrics)}")
    if better:
        if better.lower() not in BETTER:
            raise UsageError(f"--tradeoff {text}: after the colon write lower or higher (the "
                             "end that is better)")
        return name, BETTER[better.lower()]
    if not any(c.metric == name for c in study.criteria):
        raise UsageError(f"--tradeoff {name}: no criterion limits it in this study, so which "
                         f"end is better is not known; write {name}:lower or {name}:higher")
    return name, None


def frontier(points: list[dict], x: str, y: str, dx: int, dy: int) -> list[int]:
    """Indices of the non-dominated points (better = larger after applying the directions)."""
    def finite(v):  # a summary writes a figure without a finite value as None
        return v is not None and math.isfinite(v)

    keep = []
    for i, a in enumerate(points):
        if not (finite(a[x]) and finite(a[y])):
            continue
        ax, ay = dx * a[x], dy * a[y]
        dominated = any(
            (dx * b[x] >= ax and dy * b[y] >= ay) and (dx * b[x] > ax or dy * b[y] > ay)
            for j, b in enumerate(points) if j != i and finite(b[x]) and finite(b[y])
        )
        if not dominated:
            keep.append(i)
    return keep


#: robust margins closer than this [standard deviations] are a tie: the 0.1 % and 99.9 %
#: points of a few thousand units move by a tenth of a deviation from draw to draw
#: (common practice, no source)
ROBUST_TIE = 0.1


def robust_margin(study: Study, summary: dict) -> float:
    """The smallest room to any limit in standard deviations (:func:`robust_room`)."""
    return robust_room(study, summary)[0]


def robust_room(study: Study, summary: dict) -> tuple[float, str | None]:
    """The smallest room a candidate leaves to any limit, in standard deviations of the
    metric: at each criterion's robust end (the 0.1 % point against a minimum, the 99.9 %
    point against a maximum), ``(p001 - min) / std`` or ``(max - p999) / std``, over the
    metrics that spread. Among candidates of equal yield the one with the most room is the
    robust choice (a dimmer's base resistors that all pass: one leaves its turn-off delay
    several deviations from the limit, another a fraction of one). In deviations, not
    relative to the limit: a junction's room to 150 degC is not a share of 423 K, and a
    drive margin's room to 1.5 is not one of 1.5. NaN without a figure to judge; with it, the
    criterion that leaves the least room (the report names it: a review could not see why a
    candidate was called best)."""
    rooms = []
    for c in study.criteria:
        m = summary["metrics"].get(c.metric) or {}
        std = m.get("std")
        if std is None or not math.isfinite(std) or std <= 0:
            continue  # a flag or a fixed figure: no spread to measure room in
        for limit, end, sign in ((c.minimum, "p001", 1.0), (c.maximum, "p999", -1.0)):
            value = m.get(end)
            if limit is None or value is None or not math.isfinite(limit):
                continue
            rooms.append((sign * (value - limit) / std, c.name))
    return min(rooms) if rooms else (math.nan, None)


def pick_best(study: Study, candidates: list[dict], names: list[str]) -> int:
    """Index of the best candidate: the highest yield, then the higher lower bound of its
    interval, then (within :data:`ROBUST_TIE`) the most room to the limits
    (``robust_margin``), then the value nearest the study's own nominal."""
    def distance(row):
        return sum(abs(math.log(row["values"][n] / study.parameter(n).nominal)) for n in names)

    top = max((c["yield"], c["ci_low"]) for c in candidates)
    tied = [i for i, c in enumerate(candidates) if (c["yield"], c["ci_low"]) == top]
    margins = [candidates[i].get("robust_margin", math.nan) for i in tied]
    finite = [m for m in margins if math.isfinite(m)]
    if finite:
        most = max(finite)
        tied = [i for i, m in zip(tied, margins) if math.isfinite(m) and m >= most - ROBUST_TIE]
    return min(tied, key=lambda i: (distance(candidates[i]), i))


def check_request(study: Study, varies: list[str], tradeoff: tuple[str, ...] | None = None
                  ) -> tuple[list[tuple[str, np.ndarray]], tuple[str, ...] | None]:
    """The sweeps and the trade-off metrics of a value choice, or a UsageError naming what is
    wrong (called before anything is written). Without ``tradeoff`` the second element is
    None: the default pair depends on the candidates' results (:func:`default_tradeoff`)."""
    if not 1 <= len(varies) <= 2:
        raise UsageError(f"choose takes one or two --vary NAME=SERIES:LOW..HIGH, got {len(varies)}")
    sweeps = [parse_vary(study, v) for v in varies]
    names = [n for n, _ in sweeps]
    if len(set(names)) != len(names):
        raise UsageError(f"--vary {names[0]}: the same part is varied twice")
    total = math.prod(len(v) for _, v in sweeps)
    if total > MAX_CANDIDATES:
        raise UsageError(f"--vary: {' x '.join(str(len(v)) for _, v in sweeps)} = {total} "
                         f"candidates, each a whole Monte Carlo run; narrow the ranges (at "
                         f"most {MAX_CANDIDATES})")
    metrics = study.stage.metrics
    if tradeoff is None:
        return sweeps, None  # chosen from the candidates' results (default_tradeoff)
    if len(tradeoff) != 2:
        raise UsageError("--tradeoff takes two metrics separated by a comma, e.g. "
                         f"{','.join(list(metrics)[:2])}")
    names = [tradeoff_item(study, m)[0] for m in tradeoff]
    if names[0] == names[1]:
        raise UsageError(f"--tradeoff {names[0]}: a trade-off takes two different metrics")
    return sweeps, tuple(tradeoff)


def _window(study: Study, metric: str, given: dict[str, int] | None = None
            ) -> tuple[float, float] | None:
    """The (lower, upper) limits of a metric the study's criteria hold inside a window, None
    for a one-sided limit or where ``--tradeoff METRIC:lower|higher`` says which end is
    better."""
    if given and metric in given:
        return None
    lows = [c.minimum for c in study.criteria if c.metric == metric and c.minimum is not None]
    highs = [c.maximum for c in study.criteria if c.metric == metric and c.maximum is not None]
    if not lows or not highs:
        return None
    return max(lows), min(highs)


def _window_room(metric: dict, window: tuple[float, float]) -> float | None:
    """The room a candidate leaves inside a window at its robust ends: the smaller of its
    0.1 % point's distance above the lower limit and its 99.9 % point's below the upper, in
    the metric's unit (negative outside). A window judged at its low end alone called the
    string whose current ran over the top best (found by a review: an LED series resistor
    of 100 ohm, 76 of its 86 failures above 30 mA)."""
    low, high = metric.get("p001"), metric.get("p999")
    if low is None or high is None:
        return None
    return min(low - window[0], window[1] - high)


def _robust_end(study: Study, metric: str, given: dict[str, int] | None = None) -> str:
    """The percentile a trade-off reads: the low tail when larger is better, else the high."""
    return "p001" if _direction(study, metric, given) > 0 else "p999"


def default_tradeoff(study: Study, summaries: list[dict]) -> tuple[str, ...]:
    """The trade-off pair when none is asked for, from the candidates' summaries.

    The first limited metric (the saturation check's drive margin on every stage) against the
    limited metric the choice moves most: the one whose criteria fail most often summed over
    the candidates, then the one whose robust end (``p001`` or ``p999``) spans the widest range
    over the candidates relative to its limit; ties keep the criteria's order. A choice of base
    resistor is thus weighed against what it costs (on the beacon study: the resistor's
    stress or the driver's current), not against a check it never moves.
    """
    metrics = study.stage.metrics
    limited = list(dict.fromkeys(c.metric for c in study.criteria))
    if len(limited) < 2:
        return tuple((limited + [m for m in metrics if m not in limited])[:2])

    def score(metric):
        rates = [s["criteria"][c.name]["rate"] for s in summaries for c in study.criteria
                 if c.metric == metric and c.name in s["criteria"]]
        failures = sum(r for r in rates if r is not None and math.isfinite(r))
        ends = np.array([s["metrics"].get(metric, {}).get(_robust_end(study, metric))
                         for s in summaries], dtype=float)
        ends = ends[np.isfinite(ends)]
        span = float(ends.max() - ends.min()) if ends.size else 0.0
        limit = next((c.minimum if _direction(study, metric) > 0 else c.maximum
                      for c in study.criteria if c.metric == metric), None)
        scale = abs(limit) if limit is not None and math.isfinite(limit) and limit != 0 else 1.0
        return failures, span / scale

    rest = limited[1:]
    scores = [score(m) for m in rest]
    best = max(range(len(rest)), key=lambda i: (scores[i], -i))
    return limited[0], rest[best]


def choose(study: Study, varies: list[str], samples: int | None = None, seed: int | None = None,
           sampler: str | None = None, jobs: int = 1, tradeoff: tuple[str, str] | None = None,
           chunk_size: int | None = None) -> dict:
    """Sweep candidate values; see the module docstring."""
    from tolerance.api import as_study, make_spec

    study = as_study(study)
    if isinstance(varies, str):
        varies = [varies]  # one sweep given as text, not its characters
    # the recorded sample count and seed are whole numbers, the study's where None
    spec = make_spec(study, samples, seed)
    samples, seed = spec.samples, spec.seed
    sweeps, tradeoff = check_request(study, varies, tradeoff)
    names = [n for n, _ in sweeps]
    metrics = study.stage.metrics
    from tolerance.stats import paired_difference  # scipy.stats: only where candidates run

    candidates, summaries, passes = [], [], []
    for combo in itertools.product(*[vals for _, vals in sweeps]):
        overrides = {n: Override("scale", float(v) / study.parameter(n).nominal)
                     for n, v in zip(names, combo)}
        res = run(study, samples=samples, seed=seed, sampler=sampler, jobs=jobs,
                  chunk_size=chunk_size, overrides=overrides)
        s = res.summary
        row = {"values": {n: float(v) for n, v in zip(names, combo)},
               "yield": s["yield"]["estimate"], "ci_low": s["yield"]["ci_low"],
               "ci_high": s["yield"]["ci_high"], "verdict": s["verdict"],
               "not_converged": s["not_converged"],
               "criteria": {k: c["rate"] for k, c in s["criteria"].items()}}
        candidates.append(row)
        summaries.append(s)
        passes.append(np.packbits(res.column("pass").astype(bool)))  # 1 bit a unit
    given = {}
    if tradeoff is None:
        tradeoff = default_tradeoff(study, summaries)
    else:
        items = [tradeoff_item(study, t) for t in tradeoff]
        tradeoff = tuple(m for m, _ in items)
        given = {m: d for m, d in items if d is not None}
    # robust end of each trade-off metric: the low tail when larger is better, else the high;
    # a window (limits on both sides) reads the room left inside it at both ends
    windows = {m: _window(study, m, given) for m in tradeoff}
    ends = {m: "room in window" if windows[m] else _robust_end(study, m, given)
            for m in tradeoff}
    for row, s in zip(candidates, summaries):
        for m in tradeoff:
            row[m] = (_window_room(s["metrics"][m], windows[m]) if windows[m]
                      else s["metrics"][m][ends[m]])

    for row, s in zip(candidates, summaries):
        row["robust_margin"], row["robust_criterion"] = robust_room(study, s)

    best = pick_best(study, candidates, names)
    # each candidate against the best on the same units (common random numbers): whether
    # the best is better than the others, or only drawn so
    units = int(summaries[best]["samples"])
    best_pass = np.unpackbits(passes[best], count=units).astype(bool)
    for row, packed in zip(candidates, passes):
        row["vs_best"] = paired_difference(best_pass,
                                           np.unpackbits(packed, count=units).astype(bool))
    front = []
    if len(tradeoff) == 2:
        # more room inside a window is better, whichever limit is nearer
        front = frontier(candidates, tradeoff[0], tradeoff[1],
                         *(1 if windows[m] else _direction(study, m, given)
                           for m in tradeoff[:2]))
    first = candidates[0]
    notes = _unjudged_drive(study, summaries[best]) + _unconverged(candidates, names, study)
    n_samples = run_samples = samples
    used_sampler = sampler or study.settings.sampler
    return {
        "study": study.path, "study_hash": study.study_hash, "title": study.title,
        "seed": seed, "samples": n_samples,
        "sampler": used_sampler, "vary": {n: [float(v) for v in vals] for n, vals in sweeps},
        "units": {n: study.parameter(n).unit for n in names},
        "tradeoff": {m: {"statistic": ends[m], "unit": metrics[m].unit,
                         "better": "higher" if ends[m] != "p999" else "lower",
                         **({"window": list(windows[m])} if windows[m] else {})}
                     for m in tradeoff},
        "candidates": candidates,
        "best": candidates[best],
        "frontier": front,
        "evaluations": len(candidates) * run_samples,
        "criteria": list(first["criteria"]),
        "notes": notes,
    }


def _unconverged(candidates: list[dict], names: list[str], study: Study) -> list[str]:
    """A sentence where units of some candidates did not converge: they count as failures
    in the yield and in no criterion's rate (the console and the report said nothing)."""
    stuck = [c for c in candidates if c["not_converged"] > 0]
    if not stuck:
        return []
    most = max(stuck, key=lambda c: c["not_converged"])
    at = ", ".join(f"{n} = {format_quantity(most['values'][n], study.parameter(n).unit)}"
                   for n in names)
    return [f"{len(stuck)} of {len(candidates)} candidates have units whose solve did not "
            f"converge (at most {most['not_converged']:,}, at {at}): they count as failures "
            "in the yield and in no criterion's rate (the table's \"fails most\" names them "
            "where they are a candidate's largest share)."]


def _unjudged_drive(study: Study, summary: dict) -> list[str]:
    """A sentence where nothing limits the current the drive delivers: a choice that raises
    the yield by a smaller base resistor can draw more than a logic output may give, and
    the best candidate's largest drive current is then judged by nobody."""
    if "drive_current" not in study.stage.metrics or any(
            c.metric == "drive_current" for c in study.criteria):
        return []
    top = (summary.get("metrics", {}).get("drive_current") or {}).get("max")
    if not isinstance(top, (int, float)) or not math.isfinite(top):
        return []
    return [f"No criterion limits drive_current: the best candidate draws up to "
            f"{format_quantity(top, 'A')} from the drive. Give the logic output's rating "
            f"as [limits] drive_current = {{max = ...}} to judge it."]
