"""Python API for notebooks and scripts; the CLI is a thin layer over these functions.

>>> import tolerance
>>> study = tolerance.load_study("studies/beacon_lamp_darlington.toml")   # doctest: +SKIP
>>> result = study.run(samples=20_000, seed=3, jobs=2)                    # doctest: +SKIP
>>> result.summary["yield"]["estimate"], result.samples.head()            # doctest: +SKIP
"""

from __future__ import annotations

import json
import math
import os
import shutil
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from tolerance import runner
from tolerance.files import (
    PLOT_PREFIXES,
    TMP_SUFFIX,
    FolderBusy,
    FolderLock,
    os_error_text,
    write_atomic,
)
from tolerance.runner import Override, RunSpec, code_digest
from tolerance.study import MAX_CHUNK, SAMPLERS, Study, StudyError, parameter_hint
from tolerance.study import load_study as _load_study_file
from tolerance.threads import parent_threads

if TYPE_CHECKING:  # pandas is imported where a frame is built: the command line's start
    import pandas as pd  # would pay 0.4 s for it (and scipy.stats 1 s with the summary)

SUMMARY_FILE = "summary.json"
SAMPLES_DIR = "samples.parquet"
#: What the commands write into a result folder (a ``.tmp`` of each while it is written):
#: ``--force`` replaces these and nothing else.
RESULT_NAMES = frozenset({SUMMARY_FILE, SAMPLES_DIR, "plots", "report.html", "report.md",
                          "sensitivity.json", "worstcase.json", "whatif.json",
                          "whatif_samples.parquet", "choose.json", "waveforms.json"})
#: What the analysis commands write and a Monte Carlo run does not: a folder holding any of
#: them is not a run that ``--resume`` can continue.
ANALYSIS_NAMES = frozenset({"sensitivity.json", "worstcase.json", "whatif.json",
                            "whatif_samples.parquet", "choose.json"})


#: How the built-in demo's path reads in messages and reports.
BUILT_IN = "(built-in) "


class UsageError(ValueError):
    """A bad command-line or API argument (exit status 2)."""


def demo_text() -> str:
    return resources.files("tolerance").joinpath("demo", "demo.toml").read_text("utf-8")


DEMO_NAME = "demo.toml"


def load_study(path=None) -> Study:
    """Load a study file (a ``str`` or ``os.PathLike`` path); with no path, the built-in
    demo study. Raises :class:`~tolerance.study.StudyError` for a bad file and
    :class:`UsageError` for an argument that is no path."""
    if path is None:
        return _load_study_file(BUILT_IN + DEMO_NAME, text=demo_text())
    if not isinstance(path, (str, os.PathLike)):
        # 42 and b"..." raised os.fspath's own TypeError
        raise UsageError(f"load_study takes the path of a study file (str or pathlib.Path), "
                         f"got {type(path).__name__}")
    if not str(os.fspath(path)).strip():
        raise UsageError("load_study: the path is empty; give a study file's path, or none "
                         "for the built-in demo")
    return _load_study_file(path)


def as_study(study) -> Study:
    """A :class:`~tolerance.study.Study`, loaded first where a path is given (the API's
    functions took a path and failed with an AttributeError on it)."""
    if isinstance(study, Study):
        return study
    if isinstance(study, (str, os.PathLike)):
        return load_study(study)
    raise UsageError(f"expected a Study (tolerance.load_study(path)) or a study file's path, "
                     f"got {type(study).__name__}")


@dataclass
class RunResult:
    """Outcome of a run: the summary dict and the per-sample table.

    Attributes
    ----------
    study : Study
    summary : dict
        What the run found, as written to summary.json: the verdict, the yield, every
        criterion's failures with their interval, every metric's spread (README
        "Commands" and "Statistics").
    folder : Path or None
        Output folder, when the run wrote one.
    """

    study: Study
    summary: dict
    folder: Path | None = None
    _samples: pd.DataFrame | None = field(default=None, repr=False)

    @property
    def samples(self) -> pd.DataFrame:
        """Inputs, metrics and pass flags per sample [SI units]."""
        if self._samples is None and self.folder is not None:
            self._samples = runner.read_samples(self.folder / SAMPLES_DIR)
        return self._samples

    def column(self, name: str) -> np.ndarray:
        """One column of the per-sample table, in sample order, without reading the others
        from the run's folder."""
        if self._samples is None and self.folder is not None:
            names = runner.column_names(self.folder / SAMPLES_DIR)
            if name not in names:
                raise KeyError(f"no column {name!r} in this run; columns: {', '.join(names)}")
            with runner.ChunkColumns(self.folder / SAMPLES_DIR) as columns:
                return columns(name)
        if name not in self.samples:
            raise KeyError(f"no column {name!r} in this run; columns: "
                           f"{', '.join(self.samples.columns)}")
        return self.samples[name].to_numpy()

    @property
    def criteria(self) -> pd.DataFrame:
        """One row per criterion: metric, limits, failures, rate and interval, verdict."""
        rows = []
        for name, c in self.summary["criteria"].items():
            rows.append({"criterion": name, "metric": c["metric"], "min": c["limit"]["min"],
                         "max": c["limit"]["max"], "failures": c["failures"], "rate": c["rate"],
                         "ci_low": c["ci_low"], "ci_high": c["ci_high"], "verdict": c["verdict"]})
        import pandas as pd

        return pd.DataFrame(rows).set_index("criterion")

    @property
    def metrics(self) -> pd.DataFrame:
        """One row per metric: unit, mean, std, extremes and percentiles [SI units]."""
        import pandas as pd

        frame = pd.DataFrame(self.summary["metrics"]).T
        # numbers as numbers (a transposed frame of mixed columns is all object, and
        # describe() counted its values instead of summing them up)
        for column in frame.columns:
            try:
                frame[column] = pd.to_numeric(frame[column])
            except (TypeError, ValueError):
                pass  # the unit and the description stay text
        return frame

    @property
    def plot(self) -> "ResultPlots":
        """Figures of this result: ``result.plot.histogram("drive_margin")`` and friends."""
        return ResultPlots(self)


class ResultPlots:
    """matplotlib figures of a :class:`RunResult` (no pyplot state; display in a notebook)."""

    def __init__(self, result: RunResult):
        self._r = result

    def histogram(self, metric: str):
        """Histogram and ECDF of ``metric`` with its limits and counted failure rate."""
        from tolerance import plots

        self._check(metric)
        return plots.histogram(self._r.samples, metric, self._r.summary)

    def tornado(self, metric: str, measure: str = "srrc", top: int = 10):
        """Rank sensitivities of ``metric`` (``srrc``, ``spearman`` or ``prcc``)."""
        from tolerance import plots

        self._check(metric)
        if "sensitivity" not in self._r.summary:
            raise ValueError("this run has no rank sensitivities: run it with insights=True")
        if measure not in ("srrc", "spearman", "prcc"):
            raise ValueError(f"measure must be srrc, spearman or prcc, got {measure!r}")
        if not isinstance(top, int) or top < 1:
            raise ValueError(f"top must be a positive whole number, got {top!r}")
        return plots.tornado(self._r.summary.get("sensitivity", []), metric, top, measure)

    def driver_scatter(self, criterion: str, input_name: str | None = None):
        """The top failure driver (or ``input_name``) against the criterion's margin."""
        from tolerance import plots

        crit = self._r.summary["criteria"].get(criterion)
        if crit is None:
            raise KeyError(f"no criterion {criterion!r}; criteria: "
                           f"{', '.join(self._r.summary['criteria'])}")
        inputs = [p["name"] for p in self._r.summary.get("parameters", [])]
        if input_name is None:
            ranking = self._r.summary.get("failure_drivers", {}).get(criterion, {}).get(
                "ranking") or []
            if ranking:
                input_name = ranking[0]["input"]
            else:
                if "sensitivity" not in self._r.summary:
                    raise ValueError(f"this run has no failure drivers or rank measures "
                                     f"(insights=False): name the input, "
                                     f"driver_scatter({criterion!r}, input_name)")
                rows = [r for r in self._r.summary["sensitivity"]
                        if r["metric"] == crit["metric"] and r.get("spearman") is not None]
                if not rows:
                    raise ValueError(f"{criterion!r} has no failures and its metric "
                                     f"{crit['metric']!r} does not vary with any input in "
                                     f"this run, so no input drives it; name one, "
                                     f"driver_scatter({criterion!r}, input_name)")
                input_name = max(rows, key=lambda r: abs(r["spearman"]))["input"]
        elif inputs and input_name not in inputs:
            raise KeyError(f"no input {input_name!r}; inputs: {', '.join(inputs)}")
        units = {p["name"]: p["unit"] for p in self._r.summary.get("parameters", [])}
        return plots.driver_scatter(self._r.samples, input_name, crit["metric"],
                                    self._r.summary, units)

    def _check(self, metric: str) -> None:
        if metric not in self._r.summary["metrics"]:
            raise KeyError(f"no metric {metric!r}; metrics: "
                           f"{', '.join(self._r.summary['metrics'])}")


def _is_result(name: str) -> bool:
    return name in RESULT_NAMES or (name.endswith(TMP_SUFFIX)
                                    and name[:-len(TMP_SUFFIX)] in RESULT_NAMES)


def _foreign(out: Path, entries, deep: bool) -> list[str]:
    """What in ``out`` the commands do not write: its other entries, and with ``deep`` (for
    ``--force``, which removes the samples and plots folders whole) anything in those but
    chunk files and the commands' figures (a note kept in ``plots/`` was deleted with
    them; a run continued without ``--force`` leaves such files be)."""
    def chunk(p: Path) -> bool:
        name = p.name[:-len(TMP_SUFFIX)] if p.name.endswith(TMP_SUFFIX) else p.name
        return runner.is_chunk_name(name)

    def figure(p: Path) -> bool:
        return p.name.startswith(PLOT_PREFIXES) and p.name.endswith((".png",
                                                                     ".png" + TMP_SUFFIX))

    found = [name for name in entries if not _is_result(name)]
    for name, ours in ((SAMPLES_DIR, chunk), ("plots", figure)) if deep else ():
        child = out / name
        if name in entries and child.is_dir() and not child.is_symlink():
            found += [f"{name}/{p.name}" for p in sorted(child.iterdir())
                      if not (ours(p) and p.is_file() and not p.is_symlink())]
    return found


def _prepare_folder(out: Path, force: bool, resume: bool, resumable: bool = True) -> None:
    """Make ``out`` ready for results: new or empty; with ``resume`` a run's folder as it is;
    with ``force`` a result folder whose results are removed. A folder that holds anything the
    commands do not write is never used, ``--force``, ``--resume`` or not, and ``resume``
    refuses a folder of another command's results. ``resumable`` False: the command has no
    ``--resume`` to suggest (the analyses)."""
    if out.exists() and not out.is_dir():
        raise UsageError(f"{out}: exists and is not a folder")
    try:
        entries = sorted(p.name for p in out.iterdir()) if out.exists() else []
        foreign = _foreign(out, entries, deep=force)
        if foreign:
            shown = ", ".join(foreign[:5]) + (" ..." if len(foreign) > 5 else "")
            raise UsageError(f"{out}: holds files that are not results of a study ({shown}); "
                             "choose another --out (--force replaces a result folder only)")
        analyses = [name for name in entries if name in ANALYSIS_NAMES]
        if resume and analyses:
            # resuming there wrote a run beside another command's results, and the report
            # then mixed the two (another study's what-if under this study's title)
            raise UsageError(f"{out}: holds the results of another command "
                             f"({', '.join(analyses)}), not a run to continue; choose another "
                             "--out, or --force without --resume to replace them")
        if entries and not (force or resume):
            resume_hint = " add --resume to continue that run," if resumable else ""
            raise UsageError(f"{out}: already holds results; choose another --out,{resume_hint} "
                             "or --force to replace it")
        if force and not resume:
            _empty(out, entries)
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        detail = (exc.strerror if exc.strerror and str(exc.filename) == str(out)
                  else os_error_text(exc))
        raise UsageError(f"{out}: cannot be used as the result folder ({detail}); choose "
                         "another --out") from None


def _empty(out: Path, entries) -> None:
    """Remove the results ``entries`` of ``out`` (the folder itself stays, and its lock)."""
    for name in entries:
        child = out / name
        if child.is_dir() and not child.is_symlink():
            shutil.rmtree(child)
        else:
            child.unlink()


def write_json(path: Path, data: dict) -> None:
    """Write JSON atomically (temporary name, then rename)."""
    from tolerance.summary import clean

    write_atomic(path, json.dumps(clean(data), indent=2, allow_nan=False) + "\n")


#: most samples of one run, as the study file and the command line allow
MAX_SAMPLES = 10**9


#: local workers per core at most: each is a process of some 100 MB, and the results do not
#: depend on their number (common practice, no source)
JOBS_PER_CORE = 4
#: workers at most on a cluster (a dask scheduler)
CLUSTER_JOBS = 4096


def jobs_limit(scheduler: str | None = None) -> int:
    """The most workers a run may start: :data:`JOBS_PER_CORE` per local core, or
    :data:`CLUSTER_JOBS` on a cluster."""
    return CLUSTER_JOBS if scheduler else JOBS_PER_CORE * (os.cpu_count() or 1)


def _whole(value, name: str) -> int:
    """A whole number given to the API, or a UsageError naming it (2.7 samples were cut to 2,
    "abc" raised int()'s own error)."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        if isinstance(value, (float, np.floating)) and float(value).is_integer():
            return int(value)
        raise UsageError(f"{name} must be a whole number, got {value!r}")
    return int(value)


def _check_override(p, name: str, o: Override) -> None:
    """An override the study file would accept for the parameter, or a UsageError: a pin or
    a scaled spread that the study file would refuse (a resistor of -1 ohm ran and passed
    every criterion through the Python API, which whatif and choose refuse)."""
    if o.kind not in ("pin", "scale"):
        raise UsageError(f"overrides[{name!r}]: kind must be 'pin' or 'scale', got {o.kind!r}")
    if isinstance(o.value, bool) or not isinstance(o.value, (int, float, np.integer,
                                                             np.floating)):
        raise UsageError(f"overrides[{name!r}]: the value must be a number, got {o.value!r}")
    value = float(o.value)
    if o.kind == "pin":
        checks = [(value, "")]
    else:
        if not (math.isfinite(value) and value > 0):
            raise UsageError(f"overrides[{name!r}]: a scale must be a positive factor, got "
                             f"{value:g}")
        checks = [(p.nominal * value, ""), (p.low * value, ", at an end of its spread"),
                  (p.high * value, ", at an end of its spread")]
    for x, where in checks:
        problem = p.out_of_range(x)
        if problem:
            raise UsageError(f"overrides[{name!r}] ({o.kind} {value:g}{where}): {problem}")


def make_spec(study: Study, samples: int | None = None, seed: int | None = None,
              sampler: str | None = None, overrides: dict[str, Override] | None = None) -> RunSpec:
    samples = study.settings.samples if samples is None else _whole(samples, "samples")
    seed = study.settings.seed if seed is None else _whole(seed, "seed")
    sampler = study.settings.sampler if sampler is None else sampler
    if not 1 <= samples <= MAX_SAMPLES:
        raise UsageError(f"samples must be from 1 to {MAX_SAMPLES:,}, got {samples}")
    if seed < 0:
        raise UsageError(f"seed must be zero or positive, got {seed}")
    if sampler not in SAMPLERS:
        raise UsageError(f"sampler must be one of {', '.join(SAMPLERS)}, got {sampler!r}")
    overrides = overrides or {}
    for name, o in overrides.items():
        if name not in study.parameter_names:
            raise UsageError(f"'{name}' is not a parameter of {study.path}"
                             f"{parameter_hint(name, study.parameter_names)}; "
                             f"parameters: {', '.join(study.parameter_names)}")
        _check_override(study.parameter(name), name, o)
    corr = study.correlation_matrix() if study.correlations else None
    return RunSpec(study.stage, study.parameters, study.criteria, corr, sampler, seed, samples,
                   study.study_hash, tuple(sorted(overrides.items())), code_digest())


def run(study: Study, samples: int | None = None, seed: int | None = None,
        sampler: str | None = None, jobs: int = 1, chunk_size: int | None = None,
        out=None, progress: bool = False, resume: bool = False, force: bool = False,
        backend: str = "loky", scheduler: str | None = None,
        overrides: dict[str, Override] | None = None, target_ci: float | None = None,
        insights: bool = True, after_samples=None) -> RunResult:
    """Run a study's Monte Carlo analysis.

    Parameters
    ----------
    study : Study
    samples, seed, sampler : optional
        Override the study's ``[run]`` settings.
    jobs : int
        Parallel workers (joblib), and threads of the summary once they are done; results
        do not depend on it.
    chunk_size : int, optional
        Largest number of samples per chunk; with several workers the chunks are made equal
        and a multiple of ``jobs`` in number (:func:`tolerance.runner.balanced_chunk_size`),
        and a resumed run keeps the plan of the run it continues. Results do not depend on
        it.
    out : path, optional
        Output folder for summary.json and samples.parquet; without it the samples stay in
        memory.
    progress : bool
        Show a progress bar on standard error.
    resume : bool
        Continue the run in ``out`` (its finished chunks are kept; the same study, seed,
        samples and sampler only).
    force : bool
        Replace a result folder at ``out`` (never a folder holding other files).
    backend : {"loky", "dask"}
        Where the chunks run: local worker processes, or dask.distributed (a local cluster,
        or ``scheduler``'s); results do not depend on it.
    scheduler : str, optional
        Address of a dask scheduler (``tcp://host:8786``); with ``backend="dask"`` only.
    overrides : dict, optional
        Parameter name -> :class:`~tolerance.runner.Override` (what-if pins, value choice).
    target_ci : float, optional
        Keep sampling (up to ``samples``, the cap) until every criterion's 95 % interval has a
        half-width below this failure rate [1].
    insights : bool
        Add the parameter table, rank sensitivities, failure drivers, capability and tail
        estimates to the summary.
    after_samples : callable, optional
        Called without arguments once every sample is evaluated, before the summary is
        computed (the command line starts its plot workers' imports there).
    """
    if overrides and not all(isinstance(o, Override) for o in overrides.values()):
        raise UsageError("overrides map parameter names to tolerance.runner.Override "
                         "(e.g. Override('pin', 1000.0)); for a plain value use "
                         "study.whatif('RB=1k')")
    study = as_study(study)
    spec = make_spec(study, samples, seed, sampler, overrides)
    chunk = (study.settings.chunk_size if chunk_size is None
             else _whole(chunk_size, "chunk_size"))
    if not 1 <= chunk <= MAX_CHUNK:
        raise UsageError(f"chunk size must be from 1 to {MAX_CHUNK:,}, got {chunk}")
    jobs = _whole(jobs, "jobs")
    if jobs < 1:
        raise UsageError(f"jobs must be at least 1, got {jobs}")
    top = jobs_limit(scheduler)
    if jobs > top:
        # the command line's limit (a review's study.run(jobs=99) started 99 processes)
        raise UsageError(f"jobs must be at most {top:,} "
                         + ("on a cluster" if scheduler else
                            f"on this machine ({JOBS_PER_CORE} per core)") + f", got {jobs}")
    if resume and out is None:
        raise UsageError("resume continues a run in its folder: give out= as well")
    if backend not in ("loky", "dask"):
        raise UsageError(f"backend must be loky or dask, got {backend!r}")
    if scheduler is not None and backend != "dask":
        # it was ignored and the run went to local workers
        raise UsageError("a scheduler needs backend='dask' (--scheduler needs --backend dask)")
    if backend == "dask":
        try:  # before anything is written; the parent needs it to reach the cluster
            import distributed  # noqa: F401
        except ImportError:
            raise UsageError("--backend dask needs dask.distributed, which is not installed: "
                             'python -m pip install "tolerance[dask]" (".[dask]" in a '
                             "checkout)") from None
    stop_rule = None
    if target_ci is not None:
        if isinstance(target_ci, bool) or not isinstance(target_ci, (int, float, np.integer,
                                                                     np.floating)):
            raise UsageError(f"target_ci must be a failure rate (a number, e.g. 0.001), got "
                             f"{target_ci!r}")
        if not 0 < target_ci < 0.5:
            raise UsageError(f"--target-ci: the interval half-width must lie between 0 and "
                             f"0.5 (a failure rate, e.g. 0.001 or 100ppm), got {target_ci:g}")
        stop_rule = _half_width_rule(spec, target_ci)
    # here, not at the top: scipy.stats and pandas are a second of the command line's start
    from tolerance.summary import summarize

    meta = dict(study_path=study.path, title=study.title, stage_name=study.stage_name,
                allowed_rate=study.settings.max_failure_rate,
                interval_confidence=interval_level(spec.samples, target_ci))
    # the workers are idle once the samples are written: the summary's column work uses as
    # many threads as there were workers (tolerance.threads)
    threads = parent_threads(jobs)
    if stop_rule is None:  # a stopping rule has its own rounds (runner.execute)
        chunk = runner.balanced_chunk_size(spec.samples, chunk, jobs)
    if out is None:
        df = runner.execute(spec, chunk, jobs, None, progress, backend=backend,
                            scheduler=scheduler, stop_rule=stop_rule)
        if after_samples is not None:
            after_samples()
        column = lambda name: df[name].to_numpy()  # noqa: E731
        summary = summarize(spec, column, **meta, threads=threads,
                            extra=_extra(study, column, insights, threads,
                                         meta["interval_confidence"]))
        if target_ci is not None:
            summary["target_ci"] = target_status(summary, target_ci)
        return RunResult(study, summary, None, df)
    out = Path(out)
    with FolderLock(out) as lock:
        take_folder(lock)  # before --force removes anything, when the folder exists
        made = not out.exists()
        if scheduler and (force or resume) and not made:
            runner.probe_scheduler(scheduler)  # before --force empties the folder
        _prepare_folder(out, force, resume)
        take_folder(lock)
        return _run_into(study, spec, out, made, chunk, jobs, progress, resume, force,
                         backend, scheduler, stop_rule, after_samples, meta, threads,
                         insights, target_ci)


def take_folder(lock: FolderLock) -> None:
    """Take the lock of a result folder, or refuse the command (another one writes it)."""
    try:
        lock.acquire()
    except FolderBusy as exc:
        raise UsageError(f"{exc.filename}: {exc.strerror} (a run or report of it has not "
                         "ended); wait for it, or choose another --out") from None


def _run_into(study, spec, out, made, chunk, jobs, progress, resume, force, backend,
              scheduler, stop_rule, after_samples, meta, threads, insights, target_ci):
    """The part of :func:`run` that writes into ``out``, which the caller has locked."""
    from tolerance.summary import summarize

    folder = out / SAMPLES_DIR
    if resume:
        differs = runner.other_run(folder, spec)
        if differs is not None and not force:
            raise UsageError(f"{out}: holds the samples of another run ({differs}); --resume "
                             "continues the same run only: choose another --out, or --force "
                             "to replace it")
        if differs is not None:
            # --force replaces another run whole: its summary, reports and chunks went on
            # beside this run's first chunks, and an interrupt left a folder of two studies
            try:
                _empty(out, sorted(p.name for p in out.iterdir()))
            except OSError as exc:
                raise UsageError(f"{out}: cannot be emptied for the new run "
                                 f"({os_error_text(exc)}); choose another --out") from None
    if resume and stop_rule is None:
        chunk = runner.resumable_chunk_size(folder, spec) or chunk
    elif resume:
        # --target-ci cuts its chunks at every CHECK_EVERY samples; a run planned without it
        # whose chunks cross those marks would be computed again on the new plan (its
        # finished chunks rewritten or deleted), not continued
        planned = runner.resumable_chunk_size(folder, spec)
        if planned is not None:
            if not runner.chunks_fit_plan(folder, spec, planned, runner.CHECK_EVERY):
                raise UsageError(
                    f"{out}: holds a run planned in chunks of {planned:,} samples, which "
                    f"--target-ci would cut at every {runner.CHECK_EVERY:,} and compute "
                    "again; continue it with --resume alone, or start it again with --force")
            chunk = planned
    try:
        runner.execute(spec, chunk, jobs, folder, progress, resume, backend, scheduler,
                       stop_rule=stop_rule)
    except Exception:
        if made and not runner.chunk_files(folder):
            shutil.rmtree(out, ignore_errors=True)  # nothing computed (no cluster): no folder
        raise
    if after_samples is not None:
        after_samples()
    with runner.ChunkColumns(folder) as column:
        summary = summarize(spec, column, **meta, threads=threads,
                            extra=_extra(study, column, insights, threads,
                                         meta["interval_confidence"]))
    if target_ci is not None:
        summary["target_ci"] = target_status(summary, target_ci)
    write_json(out / SUMMARY_FILE, summary)
    return RunResult(study, summary, out)


#: the metrics of the criteria a unit fails when it does not stay off
OFF_STATE_METRICS = ("off_fraction", "off_current")


def leakage_notes(study: Study, column) -> list[str]:
    """A sentence where units fail staying off and a transistor's hot leakage rests on a
    doubling figure (every ``leakage_doubling`` kelvin) rather than the datasheet's hot I_CBO
    line: such failures come from the leakage at the junction temperature, so the verdict
    rests on that figure (found by a review: a valve's Darlington failed ``stays_off`` from
    its class's 10 K doubling, and passed with the datasheet's hot figure)."""
    checks = [c for c in study.criteria if c.metric in OFF_STATE_METRICS]
    transistors = getattr(study.stage, "transistors", None)
    if not checks or transistors is None:
        return []
    converged = column("converged").astype(bool)
    failing = np.zeros(converged.size, dtype=bool)
    for c in checks:
        failing |= converged & ~column(runner.criterion_column(c.name)).astype(bool)
    count = int(np.count_nonzero(failing))
    if not count:
        return []
    doubled = {name: part.device.template.leakage_doubling
               for name, part in transistors().items()
               if part.device.datasheet.icbo_hot_max is None}
    if not doubled:
        return []
    monolithic = bool(getattr(getattr(study.stage, "thermal", None), "shared", None))
    names = ", ".join(f"{n} x2 per {d:.3g} K" for n, d in doubled.items())
    where = ("each die's leakage_doubling in [parts.Q2] from the pair's datasheet (its hot "
             "I_CBO is the whole part's)" if monolithic else
             "the datasheet's hot I_CBO as icbo_hot_max and icbo_hot_temperature in "
             f"[parts.{next(iter(doubled))}]" + (" (and the others')" if len(doubled) > 1
                                                  else ""))
    names_failed = ", ".join(dict.fromkeys(c.name for c in checks))
    fail = "unit fails" if count == 1 else "units fail"
    return [f"{count:,} {fail} {names_failed}. Where hot leakage holds a unit on (rather "
            f"than the drive's low level), it rises from I_CBO at 25 degC by a doubling "
            f"figure ({names}), not by a datasheet's hot I_CBO line: give {where} before "
            "signing the verdict off."]


def _extra(study: Study, column, insights: bool, threads: int = 1,
           level: float = 0.95) -> dict:
    from tolerance.analysis import insights as _insights

    extra = _insights(study, column, threads, level) if insights else {}
    extra["study_notes"] = study.notes() + leakage_notes(study, column)
    assumed = getattr(study.stage, "assumptions", None)
    if assumed is not None:
        extra["devices"] = assumed()
    load = getattr(getattr(study.stage, "load", None), "assumed", None)
    if load is not None:
        extra["load"] = load()
    return extra


def interval_level(samples: int, target_ci) -> float:
    """The exact intervals' level of a run of at most ``samples``: 95 %, or
    :data:`tolerance.summary.STOPPED_RUN_CONFIDENCE` where ``--target-ci`` checks the counts
    at least once (a run of at most one check's samples has its length fixed)."""
    from tolerance.runner import CHECK_EVERY
    from tolerance.summary import CONFIDENCE, STOPPED_RUN_CONFIDENCE

    if target_ci is not None and samples > CHECK_EVERY:
        return STOPPED_RUN_CONFIDENCE
    return CONFIDENCE


def target_status(summary: dict, width: float) -> dict:
    """Whether a run with ``--target-ci`` reached its target: the widest 95 % interval
    half-width of any criterion (the stopping rule's own measure) and where it lies."""
    from tolerance import stats

    widest, name = 0.0, None
    for cname, c in summary["criteria"].items():
        h = float(stats.half_width(c["failures"], max(c["evaluated"], 1)))
        if name is None or h > widest:
            widest, name = h, cname
    return {"half_width": width, "reached": bool(widest < width), "widest": widest,
            "widest_criterion": name, "samples": summary["samples"],
            "planned_samples": summary.get("planned_samples", summary["samples"]),
            "interval_level": summary.get("interval_level", summary.get("confidence", 0.95))}


def _half_width_rule(spec: RunSpec, width: float):
    from tolerance import stats
    from tolerance.runner import criterion_column

    def rule(column) -> bool:
        converged = column("converged").astype(bool)
        n = max(int(converged.sum()), 1)
        for c in spec.criteria:
            failures = int(np.count_nonzero(converged & ~column(criterion_column(c.name))))
            if stats.half_width(failures, n) >= width:
                return False
        return True

    return rule
