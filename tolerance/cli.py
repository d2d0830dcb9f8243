"""Command line: ``tolerance run | check | parts | ...``.

Exit status: 0 every limit met, 1 a limit failed (or not enough samples to tell), 2 bad input.
Errors go to stderr as one line naming the file, the key and what was expected.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from tolerance import __version__
from tolerance.api import UsageError, load_study, run
from tolerance.limits import exit_status
from tolerance.study import SAMPLERS, StudyError
from tolerance.units import format_quantity

SAFETY = ("Results are estimates from models and the tolerances you entered: confirm on the bench "
          "before release. Hot transistors and resistors burn; mains-connected loads and "
          "safety-relevant uses follow local codes and licensed practice.")


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own errors: one line, exit 2
        self.exit(2, f"{self.prog}: error: {message}\n")


def _positive_int(text: str) -> int:
    try:
        value = int(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected at least 1, got {value}")
    return value


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
    p.add_argument("--samples", type=_positive_int, help="number of Monte Carlo samples")
    p.add_argument("--seed", type=_seed, help="random seed (same seed, same results)")
    p.add_argument("--sampler", choices=SAMPLERS, help="sampling design")
    p.add_argument("--jobs", type=_positive_int, default=1, help="parallel workers")
    p.add_argument("--chunk-size", type=_positive_int, help="samples per chunk")
    p.add_argument("--out", help=out_help)
    p.add_argument("--force", action="store_true", help="replace an existing result folder")
    p.add_argument("--quiet", action="store_true", help="no progress bar, no summary table")


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

    p = sub.add_parser("check", help="validate a study and print its parameter table")
    p.add_argument("study", nargs="?", help="study file (TOML); none: the built-in demo")

    sub.add_parser("parts", help="list the part library with its figures")
    return parser


def _load(path):
    return load_study(path)


def _default_out(study) -> Path:
    stem = Path(study.path.split()[-1]).stem
    base = Path("results") / stem
    candidate, k = base, 2
    while candidate.exists() and any(candidate.iterdir()):
        candidate = base.with_name(f"{stem}-{k}")
        k += 1
    return candidate


def _fmt(value, unit):
    if value is None:
        return "-"
    return format_quantity(value, unit)


def print_summary(summary: dict, study, out) -> None:
    w = sys.stdout.write
    w(f"\n{summary['title']}  ({summary['stage']} stage, {summary['samples']:,} samples, "
      f"{summary['sampler']}, seed {summary['seed']})\n")
    y = summary["yield"]
    w(f"yield {100 * y['estimate']:.4f} %  (95 % interval {100 * y['ci_low']:.4f} .. "
      f"{100 * y['ci_high']:.4f} %)   not converged: {summary['not_converged']}\n")
    if summary.get("saturation_failure_rate") is not None:
        w(f"saturation-failure rate {1e6 * summary['saturation_failure_rate']:.1f} ppm\n")
    w("\n{:<22} {:<18} {:<26} {:>9} {:>12} {:>22}  {}\n".format(
        "criterion", "metric", "limit", "failures", "rate ppm", "95 % interval ppm", "verdict"))
    for name, c in summary["criteria"].items():
        unit = summary["metrics"][c["metric"]]["unit"]
        lim = " and ".join(
            f"{op} {_fmt(v, unit)}" for op, v in ((">=", c["limit"]["min"]),
                                                  ("<=", c["limit"]["max"])) if v is not None)
        w("{:<22} {:<18} {:<26} {:>9} {:>12.1f} {:>22}  {}\n".format(
            name, c["metric"], lim, c["failures"], 1e6 * c["rate"],
            f"{1e6 * c['ci_low']:.1f} .. {1e6 * c['ci_high']:.1f}", c["verdict"].upper()))
    w("\n{:<20} {:>12} {:>12} {:>12} {:>12} {:>12}\n".format(
        "metric", "min", "p0.1", "median", "p99.9", "max"))
    for name, m in summary["metrics"].items():
        u = m["unit"]
        w("{:<20} {:>12} {:>12} {:>12} {:>12} {:>12}\n".format(
            name, _fmt(m["min"], u), _fmt(m["p001"], u), _fmt(m["p50"], u),
            _fmt(m["p999"], u), _fmt(m["max"], u)))
    w(f"\nverdict: {summary['verdict'].upper()}")
    if out is not None:
        w(f"   results in {out}")
    w(f"\n\nCaution: {SAFETY}\n")


def cmd_run(args) -> int:
    study = _load(args.study)
    out = Path(args.out) if args.out else _default_out(study)
    if args.scheduler and args.backend != "dask":
        raise UsageError("--scheduler needs --backend dask")
    progress = (not args.quiet) and sys.stderr.isatty()
    result = run(study, samples=args.samples, seed=args.seed, sampler=args.sampler,
                 jobs=args.jobs, chunk_size=args.chunk_size, out=out, progress=progress,
                 resume=args.resume, force=args.force, backend=args.backend,
                 scheduler=args.scheduler)
    if not args.quiet:
        print_summary(result.summary, study, out)
    return exit_status(result.summary["verdict"])


def cmd_check(args) -> int:
    study = _load(args.study)
    w = sys.stdout.write
    w(f"{study.path}: valid {study.stage_name} study '{study.title}' "
      f"({len(study.parameters)} parameters, {len(study.criteria)} criteria)\n\n")
    w("{:<26} {:>12} {:>26} {:<40} {}\n".format("parameter", "nominal", "spread (low .. high)",
                                                 "distribution", "unit"))
    for p in study.parameters:
        spread = "-" if not p.varies else f"{_fmt(p.low, p.unit)} .. {_fmt(p.high, p.unit)}"
        w("{:<26} {:>12} {:>26} {:<40} {}\n".format(
            p.name, _fmt(p.nominal, p.unit), spread, p.distribution.describe(),
            "degC" if p.unit == "temperature" else p.unit))
    w("\n{:<22} {:<18} {:<30} {}\n".format("criterion", "metric", "limit", "from"))
    for c in study.criteria:
        unit = study.stage.metrics[c.metric].unit
        w("{:<22} {:<18} {:<30} {}\n".format(c.name, c.metric,
                                              c.limit_text(lambda x: _fmt(x, unit)), c.source))
    return 0


def cmd_parts(args) -> int:
    from tolerance.models import parts

    w = sys.stdout.write
    for kind, entries in parts.library_table().items():
        w(f"{kind}\n")
        for name, figures in entries.items():
            w(f"  {name}: {figures.pop('description', '')}\n")
            for key, value in figures.items():
                w(f"      {key:<24} {value}\n")
        w("\n")
    return 0


COMMANDS = {"run": cmd_run, "check": cmd_check, "parts": cmd_parts}


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    argv = sys.argv[1:] if argv is None else argv
    args = parser.parse_args(argv)
    try:
        return COMMANDS[args.command](args)
    except (StudyError, UsageError) as exc:
        sys.stderr.write(f"tolerance: error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("\ntolerance: interrupted; finished chunks are kept (continue with "
                         "--resume)\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
