"""Command line: ``tolerance run | check | parts | ...``.

Exit status: 0 every limit met, 1 a limit failed (or not enough samples to tell), 2 bad input.
Errors go to stderr as one line naming the file, the key and what was expected.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
from concurrent.futures import BrokenExecutor
from pathlib import Path

from tolerance import __version__
from tolerance.api import (CLUSTER_JOBS, JOBS_PER_CORE, UsageError, jobs_limit, load_study,
                           run)
from tolerance.files import DamagedFile, atomic_path, os_error_text
from tolerance.limits import exit_status
from tolerance.runner import Terminated, UnreadableChunk
from tolerance.study import MAX_CHUNK, SAMPLERS, StudyError
from tolerance.units import format_ppm, format_quantity, format_yield

SAFETY = ("Results are estimates from models and the tolerances you entered: confirm on the bench "
          "before release. Hot transistors and resistors burn; mains-connected loads and "
          "safety-relevant uses follow local codes and licensed practice.")


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own errors: one line, exit 2
        self.exit(2, f"{self.prog}: error: {message}\n")


def _positive_int(text: str, most: int | None = None) -> int:
    try:
        value = int(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected at least 1, got {value}")
    if most is not None and value > most:
        raise argparse.ArgumentTypeError(f"expected at most {most:,}, got {value:,}")
    return value


def _sample_count(text: str) -> int:
    """``--samples``: as ``[run] samples`` of a study, at most 10^9 (a run beyond that
    writes terabytes of chunks; the option took any number the file refuses)."""
    return _positive_int(text, 10**9)


def _chunk_count(text: str) -> int:
    """``--chunk-size``: as ``[run] chunk_size``, at most 10^7."""
    return _positive_int(text, MAX_CHUNK)


def _seed(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected zero or more, got {value}")
    return value


def _add_run_options(p: argparse.ArgumentParser, out_help: str) -> None:
    p.add_argument("study", nargs="?", help="study file (TOML); none: the built-in demo")
    p.add_argument("--samples", type=_sample_count, help="number of Monte Carlo samples")
    p.add_argument("--seed", type=_seed, help="random seed (same seed, same results)")
    p.add_argument("--sampler", choices=SAMPLERS, help="sampling design")
    p.add_argument("--jobs", type=_positive_int, default=1, help="parallel workers")
    p.add_argument("--chunk-size", type=_chunk_count,
                   help="the most samples per chunk (several workers get equal chunks)")
    p.add_argument("--out", help=out_help)
    p.add_argument("--force", action="store_true", help="replace an existing result folder")
    p.add_argument("--quiet", action="store_true", help="no progress bar, no summary table")


def _fraction(text: str) -> float:
    from tolerance.units import UnitError, parse_quantity

    try:
        return parse_quantity(text, "1")
    except UnitError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _sobol_rows(text: str) -> int:
    from tolerance.sensitivity import MAX_SOBOL_N, MIN_SOBOL_N

    try:
        n = int(text.replace("_", ""))
    except ValueError:
        n = None
    # found by a review: 0 and -64 were told "at least 1", not the range that holds
    if n is None or n & (n - 1) or not MIN_SOBOL_N <= n <= MAX_SOBOL_N:
        got = f"{n:,}" if n is not None else repr(text)
        raise argparse.ArgumentTypeError(
            f"expected a power of two from {MIN_SOBOL_N} to {MAX_SOBOL_N:,} (e.g. 1024), "
            f"got {got}")
    return n




def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="tolerance", description="Monte Carlo and worst-case tolerance "
                     "analysis of transistor switching stages.")
    parser.add_argument("--version", action="version", version=f"tolerance {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("run", help="run a Monte Carlo study (no study: the built-in demo)")
    _add_run_options(p, "output folder (default: results/<study name>, never overwritten)")
    p.add_argument("--resume", action="store_true",
                   help="continue an interrupted run in --out, keeping its finished chunks")
    p.add_argument("--backend", choices=("loky", "dask"), default="loky",
                   help="parallel backend: loky (this machine) or dask (a dask.distributed "
                        "cluster)")
    p.add_argument("--scheduler", help="dask scheduler address (with --backend dask); none: a "
                   "local cluster")
    p.add_argument("--target-ci", type=_fraction, metavar="W",
                   help="keep sampling (up to --samples) until every criterion's 95 %% interval "
                        "half-width is below W (e.g. 0.001 or 100ppm)")
    p.add_argument("--waveforms", type=_positive_int, metavar="K",
                   help="store K switching waveforms in waveforms.json for the report (the "
                        "nominal point, the worst turn-off sample and K-2 random samples, "
                        "chosen with the run's seed); needs the switching transient")

    p = sub.add_parser("whatif", help="pin parameters and compare with the baseline (common "
                       "random numbers)")
    _add_run_options(p, "output folder (default: results/<study>-whatif)")
    p.add_argument("--pin", action="append", default=[], metavar="NAME=VALUE",
                   help="NAME=VALUE|min|max|nominal|pNN; repeat for several parameters")

    p = sub.add_parser("worstcase", help="extreme-value, RSS and optimizer worst case beside "
                       "the Monte Carlo extremes")
    _add_run_options(p, "output folder (default: results/<study>-worstcase)")

    p = sub.add_parser("sensitivity", help="rank sensitivities and Sobol indices")
    _add_run_options(p, "output folder (default: results/<study>-sensitivity)")
    p.add_argument("--sobol-samples", type=_sobol_rows, default=1024, metavar="N",
                   help="base size of the Sobol design (a power of two; costs N*(d+2) "
                        "evaluations)")

    p = sub.add_parser("choose", help="sweep preferred values of one or two parts")
    _add_run_options(p, "output folder (default: results/<study>-choose)")
    p.add_argument("--vary", action="append", default=[], metavar="NAME=SERIES:LOW..HIGH",
                   help="e.g. RBE2=E24:47..1k; once or twice")
    p.add_argument("--tradeoff", metavar="METRIC,METRIC",
                   help="two metrics for the trade-off frontier (default: the first limited "
                        "metric against the limited metric the choice moves most); a metric "
                        "without a limit says which end is better, e.g. power_output:lower")

    p = sub.add_parser("report", help="rebuild the reports of a result folder from its saved "
                       "results")
    p.add_argument("folder", help="a result folder written by run, whatif, worstcase, "
                   "sensitivity or choose")
    p.add_argument("--jobs", type=_positive_int, default=1,
                   help="parallel workers drawing the plots (the files do not depend on it)")

    p = sub.add_parser("check", help="validate a study and print its parameter table")
    p.add_argument("study", nargs="?", help="study file (TOML); none: the built-in demo")

    sub.add_parser("parts", help="list the part library with its figures")
    return parser


def _load(path):
    if path is not None and not str(path).strip():
        # an empty argument (a shell variable that was not set) read as the current folder
        raise UsageError("the study argument is empty; give a study file, or leave it out "
                         "for the built-in demo")
    return load_study(path)


def _default_out(study, suffix: str = "", resume: bool = False) -> Path:
    """``results/<study><suffix>``, or the first of ``-2``, ``-3``, ... that is new or empty;
    with ``resume`` the newest of them: that first free one where it exists (an interrupt
    keeps even an empty folder), else the last that holds something (a resumed run without
    ``--out`` started afresh in the next free folder)."""
    from tolerance.api import BUILT_IN

    # the study file's own name, spaces and all ("my heater.toml" -> results/my heater)
    stem = Path(study.path.removeprefix(BUILT_IN)).stem + suffix
    base = Path("results") / stem
    candidate, k, last = base, 2, None
    while candidate.exists() and any(candidate.iterdir()):
        last = candidate
        candidate = base.with_name(f"{stem}-{k}")
        k += 1
    if resume and not candidate.exists() and last is not None:
        return last
    return candidate


def _fmt(value, unit):
    if value is None:
        return "-"
    return format_quantity(value, unit)


def _table(header, rows, align: str, indent: str = "") -> str:
    """Text table whose columns are as wide as their widest cell; ``align`` holds one ``<``
    or ``>`` per column; two spaces between columns."""
    cells = [[str(c) for c in header]] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    last = len(header) - 1
    lines = []
    for r in cells:
        parts = [f"{c:{a}{wd}}" if i < last or a == ">" else c
                 for i, (c, a, wd) in enumerate(zip(r, align, widths))]
        lines.append(indent + "  ".join(parts).rstrip() + "\n")
    return "".join(lines)


def _text_table(table, indent: str = "") -> str:
    """A report table (:class:`tolerance.report.Table`) as console text: the first column
    left-aligned, the others right-aligned."""
    return _table(table.header, table.rows, "<" + ">" * (len(table.header) - 1), indent)


def print_summary(summary: dict, study, out) -> None:
    w = sys.stdout.write
    w(f"\n{summary['title']}  ({summary['stage']} stage, {summary['samples']:,} samples, "
      f"{summary['sampler']}, seed {summary['seed']})\n")
    y = summary["yield"]
    from tolerance.report import interval_label

    label = interval_label(summary)
    w(f"yield {format_yield(y['estimate'])} %  ({label} interval {format_yield(y['ci_low'])} .. "
      f"{format_yield(y['ci_high'])} %)   not converged: {summary['not_converged']}\n")
    if summary.get("saturation_failure_rate") is not None:
        w(f"saturation-failure rate {format_ppm(summary['saturation_failure_rate'])} ppm\n")
    if isinstance(summary.get("target_ci"), dict):
        from tolerance.report import target_sentence

        w(target_sentence(summary["target_ci"], lambda r: f"{format_ppm(r)} ppm") + "\n")
    rows = []
    for name, c in summary["criteria"].items():
        unit = summary["metrics"][c["metric"]]["unit"]
        lim = " and ".join(
            f"{op} {_fmt(v, unit)}" for op, v in ((">=", c["limit"]["min"]),
                                                  ("<=", c["limit"]["max"])) if v is not None)
        interval = f"{format_ppm(c['ci_low'])} .. {format_ppm(c['ci_high'])}"
        rows.append((name, c["metric"], lim, c["failures"], format_ppm(c["rate"]), interval,
                     c["verdict"].upper()))
    w("\n" + _table(("criterion", "metric", "limit", "failures", "rate ppm",
                     f"{label} interval ppm", "verdict"), rows, "<<<>>><"))
    rows = [(name, *(_fmt(m[k], m["unit"]) for k in ("min", "p001", "p50", "p999", "max")))
            for name, m in summary["metrics"].items()]
    w("\n" + _table(("metric", "min", "p0.1", "median", "p99.9", "max"), rows, "<>>>>>"))
    from tolerance.report import infinite_note, sampler_note, undefined_note, verdict_basis

    for note in (infinite_note(summary), undefined_note(summary), sampler_note(summary)):
        if note:
            w(note + "\n")
    w(f"\nverdict: {summary['verdict'].upper()}")
    if out is not None:
        w(f"   results in {out}")
    basis = verdict_basis(summary)
    if basis:
        w(f"\n{basis}")
    w(f"\n\nCaution: {SAFETY}\n")


def cmd_run(args) -> int:
    study = _load(args.study)
    if args.resume and args.force and not args.out:
        # a default folder is never replaced: --force names the folder it may empty
        raise UsageError("--resume --force needs --out (the default folders are never "
                         "replaced)")
    out = Path(args.out) if args.out else _default_out(study, resume=args.resume)
    if args.scheduler and args.backend != "dask":
        raise UsageError("--scheduler needs --backend dask")
    if args.waveforms is not None:
        from tolerance.models.waveforms import check_recordable

        try:  # before the run: a refused request writes nothing
            check_recordable(study, args.waveforms)
        except ValueError as exc:
            raise UsageError(f"--waveforms: {exc}") from None
    progress = (not args.quiet) and sys.stderr.isatty()
    for note in study.notes():
        sys.stderr.write(f"tolerance: note: {note}\n")

    def warm_plot_workers() -> None:
        from tolerance import report

        report.warm_plot_workers(args.jobs)

    from tolerance.files import FolderLock

    args.written = out  # an interrupt clears its temporary files
    with FolderLock(out):  # the run takes it; held here through the reports
        result = run(study, samples=args.samples, seed=args.seed, sampler=args.sampler,
                     jobs=args.jobs, chunk_size=args.chunk_size, out=out, progress=progress,
                     resume=args.resume, force=args.force, backend=args.backend,
                     scheduler=args.scheduler, target_ci=args.target_ci,
                     after_samples=warm_plot_workers)
        if args.waveforms is not None:
            _write_waveforms(study, out, args.waveforms, result.summary["seed"])
        _write_report(out, args.jobs)
    if not args.quiet:
        print_summary(result.summary, study, out)
    return exit_status(result.summary["verdict"])


def _write_waveforms(study, out: Path, k: int, seed: int) -> None:
    """waveforms.json of a finished run, from the parameter and turn-off delay columns only."""
    import pandas as pd

    from tolerance import runner
    from tolerance.api import SAMPLES_DIR, write_json
    from tolerance.models.waveforms import record_waveforms

    folder = out / SAMPLES_DIR
    columns = ["sample", *study.parameter_names, "turn_off_delay"]
    with runner.ChunkColumns(folder) as read:
        frame = pd.DataFrame({c: read(c) for c in columns})
    data = record_waveforms(study, frame, k, seed)
    write_json(out / "waveforms.json", data)
    if len(data["samples"]) < k:  # the run had fewer units (or converged ones) than asked for
        sys.stderr.write(f"tolerance: note: {out / 'waveforms.json'} holds "
                         f"{len(data['samples'])} of the {k} waveforms asked for: the run has "
                         f"{len(frame)} samples besides the nominal point\n")


def _analysis_out(args, study, suffix: str) -> Path:
    from tolerance.api import _prepare_folder

    out = Path(args.out) if args.out else _default_out(study, suffix)
    for note in study.notes():
        sys.stderr.write(f"tolerance: note: {note}\n")
    args.made = not out.exists()
    _prepare_folder(out, args.force, False, resumable=False)
    args.written = out  # an interrupt clears its temporary files
    return out


def _stamped(result: dict, study) -> dict:
    """An analysis result with the version that wrote it and when, for the report's
    reproducibility stamp (as summary.json carries them), and the study's notes, which the
    report shows beside the caution."""
    import datetime

    created = datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds")
    return {"tool_version": __version__, **result, "study_notes": study.notes(),
            "created": created}


def _write_report(out: Path, jobs: int = 1) -> None:
    from tolerance import report

    report.write_reports(out, jobs)


def _samples(args, study) -> int:
    return args.samples if args.samples is not None else study.settings.samples


def cmd_whatif(args) -> int:
    from tolerance.api import write_json
    from tolerance.whatif import whatif

    study = _load(args.study)
    if not args.pin:
        raise UsageError("whatif needs at least one --pin NAME=VALUE|min|max|nominal|pNN")
    from tolerance.whatif import parse_pins

    parse_pins(study, args.pin)  # validate before creating the output folder
    out = _analysis_out(args, study, "-whatif")
    result, base, pinned = whatif(study, args.pin, args.samples, args.seed, args.sampler,
                                  args.jobs, args.chunk_size)
    write_json(out / "whatif.json", _stamped(result, study))
    _save_pair(out, study, base.samples, pinned.samples,
               [*result["pins"], *result.get("followers", [])])
    _write_report(out, args.jobs)
    if not args.quiet:
        w = sys.stdout.write
        w(f"\nwhat if {', '.join(args.pin)}  ({result['samples']:,} samples, common random "
          "numbers)\n")
        from tolerance.report import whatif_tables

        if result.get("followers"):
            w(f"correlated with a pin, drawn given it: {', '.join(result['followers'])}\n")
        for note in result.get("pin_notes") or []:
            w(f"note: {note}\n")
        yb, yp = result["yield"]["baseline"], result["yield"]["pinned"]
        w(f"yield  baseline {format_yield(yb['estimate'])} %   pinned "
          f"{format_yield(yp['estimate'])} %\n")
        stuck = result.get("not_converged") or {}
        if any(stuck.get(k) for k in ("baseline", "pinned")):
            w(f"not converged  baseline {stuck.get('baseline', 0):,}   pinned "
              f"{stuck.get('pinned', 0):,} (each a failure in the yield)\n")
        from tolerance.report import paired_sentence

        change = paired_sentence(result.get("yield_change"), "the pin", "in the baseline",
                                 "pinned")
        w((change + "\n" if change else "") + "\n")
        _, _, criteria, spread = whatif_tables(result)
        w(_text_table(criteria) + "\n" + _text_table(spread))
        w(f"\nresults in {out}\n\nCaution: {SAFETY}\n")
    return exit_status(result["verdict"]["pinned"])


def _save_pair(out: Path, study, base, pinned, moved=()) -> None:
    """whatif_samples.parquet: both runs' metrics, and the inputs the pins changed (the
    pinned parameters and their correlated partners) as both runs drew them."""
    import pandas as pd

    cols = list(dict.fromkeys([*moved, *study.stage.metrics]))
    frame = pd.concat([base[cols].add_prefix("baseline."), pinned[cols].add_prefix("pinned.")],
                      axis=1)
    with atomic_path(out / "whatif_samples.parquet") as tmp:
        frame.to_parquet(tmp, index=False)


def cmd_worstcase(args) -> int:
    from tolerance.analysis import study_worst_case
    from tolerance.api import write_json

    study = _load(args.study)
    out = _analysis_out(args, study, "-worstcase")
    result = study_worst_case(study, _samples(args, study), args.seed if args.seed is not None
                              else study.settings.seed, args.sampler, args.chunk_size,
                              jobs=args.jobs)
    write_json(out / "worstcase.json", _stamped(result, study))
    _write_report(out, args.jobs)
    if not args.quiet:
        w = sys.stdout.write
        w(f"\nworst case of {study.title}  ({result['evaluations']:,} evaluations)\n\n")
        from tolerance.report import worstcase_notes, worstcase_tables

        w(_text_table(worstcase_tables(result)[0]))
        for note in worstcase_notes(result):
            w(f"\n{note}\n")
        w(f"\nresults in {out}\n\nCaution: {SAFETY}\n")
    return 0


def cmd_sensitivity(args) -> int:
    from tolerance.analysis import check_varies, study_sensitivity
    from tolerance.api import write_json

    study = _load(args.study)
    check_varies(study)  # before creating the output folder
    out = _analysis_out(args, study, "-sensitivity")
    result = study_sensitivity(study, _samples(args, study), args.seed if args.seed is not None
                               else study.settings.seed, args.sobol_samples,
                               sampler=args.sampler, chunk_size=args.chunk_size,
                               jobs=args.jobs)
    write_json(out / "sensitivity.json", _stamped(result, study))
    _write_report(out, args.jobs)
    if not args.quiet:
        w = sys.stdout.write
        w(f"\nsensitivity of {study.title}  ({result['evaluations']:,} evaluations)\n")
        from tolerance.report import sensitivity_tables

        for table in sensitivity_tables(result):
            w(f"\n{table.caption}\n" + _text_table(table, indent="  "))
        w("".join(f"\nnote: {n}" for n in result.get("notes") or []))
        w(f"\nresults in {out}\n")
    return 0


def cmd_choose(args) -> int:
    from tolerance.api import write_json
    from tolerance.choose import check_request, choose

    study = _load(args.study)
    if not args.vary:
        raise UsageError("choose needs --vary NAME=SERIES:LOW..HIGH (once or twice)")
    tradeoff = None
    if args.tradeoff is not None:
        tradeoff = tuple(t.strip() for t in args.tradeoff.split(","))
    check_request(study, args.vary, tradeoff)  # before creating the output folder
    out = _analysis_out(args, study, "-choose")
    result = choose(study, args.vary, args.samples, args.seed, args.sampler, args.jobs, tradeoff,
                    args.chunk_size)
    write_json(out / "choose.json", _stamped(result, study))
    _write_report(out, args.jobs)
    if not args.quiet:
        w = sys.stdout.write
        names = list(result["vary"])
        w(f"\nvalue choice for {', '.join(names)}  ({result['samples']:,} samples per "
          "candidate, common random numbers)\n\n")
        from tolerance.report import choose_table

        w(_text_table(choose_table(result)))
        best = result["best"]
        w("\nbest: " + ", ".join(f"{n} = {_fmt(best['values'][n], result['units'][n])}"
                                  for n in names)
          + f" (yield {format_yield(best['yield'], 3)} %)\n")
        from tolerance.report import choose_separation

        separation = choose_separation(result)
        w((separation + "\n" if separation else "")
          + "".join(f"note: {n}\n" for n in result["notes"]) + f"results in {out}\n")
    return 0


def cmd_report(args) -> int:
    from tolerance import report

    if not args.folder.strip():
        raise UsageError("the folder argument is empty; give a result folder")
    folder = Path(args.folder)
    if not folder.is_dir():
        raise UsageError(f"{folder}: {'is not a folder' if folder.exists() else 'does not exist'}"
                         "; give a result folder written by run, whatif, worstcase, "
                         "sensitivity or choose")
    if not (folder / "summary.json").is_file() and not any(
        (folder / f).is_file() for f in ("whatif.json", "worstcase.json", "sensitivity.json",
                                         "choose.json")
    ):
        raise UsageError(f"{folder}: holds no saved results (summary.json or an analysis file)")
    from tolerance.api import take_folder
    from tolerance.files import FolderLock

    with FolderLock(folder) as lock:
        take_folder(lock)  # not while a run still writes the folder
        paths = report.write_reports(folder, args.jobs)
    sys.stdout.write(f"wrote {paths['html']} and {paths['md']}\n")
    return 0


def cmd_check(args) -> int:
    study = _load(args.study)
    w = sys.stdout.write
    w(f"{study.path}: valid {study.stage_name} study '{study.title}' "
      f"({len(study.parameters)} parameters, {len(study.criteria)} criteria)\n\n")
    rows = []
    for p in study.parameters:
        spread = "-" if not p.varies else f"{_fmt(p.low, p.unit)} .. {_fmt(p.high, p.unit)}"
        shown = p.distribution.describe()
        if p.distribution.kind == "discrete":  # its members and their shares
            shown = "discrete: " + ", ".join(
                f"{_fmt(v, p.unit)} ({100 * s:.3g} %)"
                for v, s in zip(p.distribution.values, p.distribution.shares))
        rows.append((p.name, _fmt(p.nominal, p.unit), spread, shown,
                     "degC" if p.unit == "temperature" else p.unit))
    w(_table(("parameter", "nominal", "spread (low .. high)", "distribution", "unit"), rows,
             "<>><<"))
    if study.correlations:
        rows = [(", ".join(c.parameters), f"{c.coefficient:+.3g}")
                for c in study.correlations]
        w("\ncorrelations (Gaussian copula: the coefficient is the correlation of the "
          "parameters' normal scores,\neach pair of a group at that coefficient)\n"
          + _table(("parameters", "coefficient"), rows, "<>"))
    rows = []
    # a study window that replaced a default keeps the default's name, place and source;
    # "from" says the limit is the study's
    defaults = {c.name: c for c in study.stage.criteria}
    for c in study.criteria:
        unit = study.stage.metrics[c.metric].unit
        d = defaults.get(c.name)
        source = c.source
        if c.source != "study" and d is not None and (d.minimum, d.maximum) != (c.minimum,
                                                                                c.maximum):
            source = f"{c.source}, limit from [limits]"
        rows.append((c.name, c.metric, c.limit_text(lambda x, u=unit: _fmt(x, u)), source))
    w("\n" + _table(("criterion", "metric", "limit", "from"), rows, "<<<<"))
    load = study.stage.load.assumed()
    if load["figures"]:
        rows = [(f["figure"], f["value"], f["from"]) for f in load["figures"]]
        w(f"\n{load['kind']} load" + (f" (part {load['part']})" if load["part"] else "")
          + ": fixed figures\n" + _table(("figure", "value", "from"), rows, "<><"))
    rows = [(name, "degC" if m.unit == "temperature" else m.unit, m.description)
            for name, m in study.stage.metrics.items()]
    w("\n" + _table(("metric", "unit", "what it is"), rows, "<<<"))
    for note in study.notes():
        w(f"\nnote: {note}\n")
    return 0


def cmd_parts(args) -> int:
    from tolerance.models import parts
    from tolerance.models.charges import CHARGE_CLASS_DEFAULTS
    from tolerance.models.datasheet import CLASS_DEFAULTS
    from tolerance.models.stages.evaluation import charge_assumptions

    w = sys.stdout.write
    w("Part library (typical class values, from memory: enter your part's own datasheet "
      "figures before relying on a result)\n")
    for name, entry in parts.library().items():
        w(f"\n{name}  [{entry.kind}, {entry.package}]  {entry.description}\n")
        for key, value in entry.text.items():
            if key in ("kind", "description", "package"):
                continue
            if isinstance(value, dict):
                w(f"    {key}:\n")
                for k2, v2 in value.items():
                    w(f"        {k2:<22} {v2}\n")
            else:
                w(f"    {key:<26} {value}\n")
        charge = CHARGE_CLASS_DEFAULTS.get(name) if entry.kind == "transistor" else None
        if entry.kind == "darlington":
            charge = CHARGE_CLASS_DEFAULTS.get("monolithic_darlington")
        if charge is not None:
            # a monolithic pair's dice share its class's figures; tau_s at the output's gain
            fig = entry.dies.get("output", entry.figures)
            beta = fig.get("hfe_typ") or (fig["hfe_min"] * fig["hfe_max"]) ** 0.5
            w("    charge storage (switching; transition_frequency, storage_time and "
              "output_capacitance in [parts.Qn] replace it):\n")
            for key, value in charge_assumptions(
                    charge, beta, fig.get("reverse_beta", CLASS_DEFAULTS["reverse_beta"])
            ).items():
                w(f"        {key:<22} {value}\n")
    from tolerance.models.loads import load_library

    w("\nLoads (use as [load] part = \"NAME\"; any key can be overridden)\n")
    for name, entry in load_library().items():
        w(f"\n{name}  [{entry['kind']}]  {entry.get('description', '')}\n")
        for key, value in entry.items():
            if key not in ("kind", "description"):
                w(f"    {key:<26} {value}\n")
    return 0


COMMANDS = {"run": cmd_run, "check": cmd_check, "parts": cmd_parts, "whatif": cmd_whatif,
            "worstcase": cmd_worstcase, "sensitivity": cmd_sensitivity, "choose": cmd_choose,
            "report": cmd_report}


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else argv
    args = parser.parse_args(argv)
    _check_args(parser, args)
    # SIGTERM (a batch system's time limit, `timeout`) ends the command as Ctrl-C does, in
    # every phase: with its default the process ended at once and left the --jobs workers
    # behind, idle, holding the command's output open until their idle timeout
    previous = None
    if (threading.current_thread() is threading.main_thread()
            and signal.getsignal(signal.SIGTERM) is signal.SIG_DFL):
        previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        return _command(args)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)




def _check_args(parser, args) -> None:
    """Refusals argparse cannot make alone (exit 2): a --jobs that would start more
    processes than the machine can hold, an empty --out."""
    jobs = getattr(args, "jobs", None)
    scheduler = getattr(args, "scheduler", None)
    if jobs is not None and jobs > jobs_limit(scheduler):
        if scheduler:
            parser.error(f"argument --jobs: at most {CLUSTER_JOBS} on a cluster, got {jobs}")
        parser.error(f"argument --jobs: at most {jobs_limit()} on this machine "
                     f"({JOBS_PER_CORE} per core, {os.cpu_count() or 1} cores), got {jobs}; "
                     "each worker is a process, and the results do not depend on their number")
    if getattr(args, "out", None) == "":
        parser.error("argument --out: expected a folder, got an empty name")


def _drop_temporaries(folder) -> None:
    """Remove the temporary files an interrupted command left in its result folder: a plot
    worker stopped by the interrupt cannot remove its own (the parent's writes remove
    theirs), and what is left must be whole results only."""
    from tolerance.files import TMP_SUFFIX

    if folder is None:
        return
    for path in Path(folder).rglob("*" + TMP_SUFFIX):
        try:
            path.unlink()
        except OSError:
            pass


def _drop_if_empty(folder, made: bool) -> None:
    """Remove a result folder this command made and an interrupt left empty (an analysis
    stopped before its first file), so that no empty folder is taken for a result."""
    if folder is None or not made:
        return
    try:
        Path(folder).rmdir()  # only an empty folder goes
    except OSError:
        pass


def _terminate(signum, frame):
    raise Terminated


def _command(args) -> int:
    """Run one command; its failures become a line on standard error and an exit status."""
    try:
        return COMMANDS[args.command](args)
    except (StudyError, UsageError) as exc:
        sys.stderr.write(f"tolerance: error: {exc}\n")
        return 2
    except KeyboardInterrupt as exc:
        terminated = isinstance(exc, Terminated)
        _drop_temporaries(getattr(args, "written", None))
        if args.command != "run":  # a run's folder is kept for --resume, even empty
            _drop_if_empty(getattr(args, "written", None), getattr(args, "made", False))
        # only a run keeps its chunks to continue from; an analysis starts again
        kept = ("finished chunks are kept (continue with --resume)" if args.command == "run"
                else "nothing is kept to continue from; run the command again")
        sys.stderr.write(f"\ntolerance: {'stopped (SIGTERM)' if terminated else 'interrupted'}; "
                         f"{kept}\n")
        # common practice, no source: 128 + the signal's number, as a shell reports it
        return 143 if terminated else 130
    except BrokenPipeError:
        if not _stdout_is_closed():
            raise  # another pipe broke: not the reader of our output going away
        # the reader went away (``tolerance parts | head -1``): what is left to print goes to
        # the null device, so the interpreter's last flush raises nothing either (the
        # Python documentation's recipe, "Note on SIGPIPE" of the signal module)
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        # common practice, no source: 128 + SIGPIPE, as a shell reports a process that
        # SIGPIPE ended
        return 141
    except BrokenExecutor as exc:
        # a worker process ended without a word: killed for memory, or a crash in a library
        kept = ("the finished chunks are kept: continue with --resume" if args.command == "run"
                else "run the command again")
        sys.stderr.write(f"tolerance: error: a worker process died ({_first_line(exc)}); "
                         f"{kept} (a smaller --chunk-size or fewer --jobs needs less memory)\n")
        return 2
    except OSError as exc:
        # a file that cannot be read or written (disk full, a folder removed or read-only):
        # every output file is written whole or not at all, so what exists is complete
        # (not for a damaged file, which the message says how to mend, nor for a scheduler
        # that could not be reached before anything was written)
        done = ("" if isinstance(exc, (UnreadableChunk, DamagedFile, ConnectionError)) else
                "; the files already written are complete" + (
                    " (a run continues with --resume)" if args.command == "run" else ""))
        sys.stderr.write(f"tolerance: error: {os_error_text(exc)}{done}\n")
        return 2


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]


def _stdout_is_closed() -> bool:
    """True when standard output is a pipe whose reader has gone: polling its descriptor
    reports an error condition (POSIX poll(), POLLERR on a pipe without a reader)."""
    import select

    try:
        fd = sys.stdout.fileno()
        poller = select.poll()
    except (OSError, ValueError, AttributeError):  # captured output, or no poll()
        return False
    poller.register(fd, select.POLLOUT)
    return any(ev & select.POLLERR for _, ev in poller.poll(0))


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
