"""Profile one study's stage evaluation: where the time goes and how many Newton iterations
each DC solve takes.

Not part of the pytest run. Figures from a shared machine are noisy; compare runs made one
after the other.

    python tests/benchmarks/hotspots.py STUDY [--samples N] [--full] [--top K]
                                        [--iterations] [--lines MODULE:FUNCTION ...]

``--full`` profiles ``stage.evaluate`` (electro-thermal loop, switching transient, ratings)
instead of ``stage.dc``; ``--iterations`` prints the mean Newton iterations of every DC solve;
``--lines`` prints line timings of the named functions (``models.transient:integrate``,
``models.switching:StageCircuit.evaluate``), which needs the optional ``line_profiler``
package (``python -m pip install line_profiler``).
"""

from __future__ import annotations

import argparse
import cProfile
import importlib
import io
import pstats
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from tolerance.api import load_study  # noqa: E402
from tolerance.sampling import draw  # noqa: E402


def _target(study, samples: int, full: bool):
    _, values = draw(study.parameters, None, "random", 3, samples, 0, samples)
    if full:
        return lambda: study.stage.evaluate(values)
    return lambda: study.stage.dc(values)


def _resolve(spec: str):
    """``models.transient:integrate`` -> the function (classes and methods by dots)."""
    module, _, name = spec.partition(":")
    if not name:
        raise ValueError(f"--lines {spec!r}: expected MODULE:FUNCTION")
    if module.startswith("models"):
        module = "tolerance." + module
    obj = importlib.import_module(module)
    for part in name.split("."):
        obj = getattr(obj, part)
    return obj


def newton_iterations(fn) -> list[dict]:
    """Run ``fn`` with the stages' Newton solver wrapped; one record per solve: the system's
    mode, the samples and the mean and largest iteration count."""
    import tolerance.models.stages as stages

    solve = stages.newton_solve
    records: list[dict] = []

    def counted(system, x0, **options):
        res = solve(system, x0, **options)
        its = res.iterations
        records.append({"mode": getattr(system, "mode", type(system).__name__),
                        "samples": int(x0.shape[0]),
                        "mean": float(its.mean()) if its.size else 0.0,
                        "max": int(its.max()) if its.size else 0,
                        "not_converged": int((~res.converged).sum())})
        return res

    stages.newton_solve = counted
    try:
        fn()
    finally:
        stages.newton_solve = solve
    return records


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("study", help="study file")
    ap.add_argument("--samples", type=int, default=20_000)
    ap.add_argument("--full", action="store_true", help="profile the full evaluation")
    ap.add_argument("--top", type=int, default=20, help="functions listed")
    ap.add_argument("--iterations", action="store_true",
                    help="mean Newton iterations of every DC solve")
    ap.add_argument("--lines", nargs="*", default=[], metavar="MODULE:FUNCTION")
    args = ap.parse_args(argv)

    study = load_study(args.study)
    fn = _target(study, args.samples, args.full)
    fn()  # warm-up: imports, the gain mapping's first fit
    t0 = time.perf_counter()
    fn()
    dt = time.perf_counter() - t0
    kind = "full evaluation" if args.full else "DC evaluation"
    print(f"{Path(args.study).name}: {kind}, {args.samples:,} samples in {dt:.3f} s "
          f"({args.samples / dt:,.0f} samples/s)")

    prof = cProfile.Profile()
    prof.runcall(fn)
    out = io.StringIO()
    pstats.Stats(prof, stream=out).sort_stats("tottime").print_stats(args.top)
    print(out.getvalue())

    if args.iterations:
        for r in newton_iterations(fn):
            print(f"  {r['mode']:<10} {r['samples']:>8,} samples  mean {r['mean']:5.2f}  "
                  f"max {r['max']:3d}  not converged {r['not_converged']}")

    if args.lines:
        try:
            from line_profiler import LineProfiler
        except ImportError:
            print("--lines needs the line_profiler package: python -m pip install "
                  "line_profiler", file=sys.stderr)
            return 2
        try:
            targets = [_resolve(spec) for spec in args.lines]
        except (ImportError, AttributeError, ValueError) as exc:
            print(f"--lines: {exc}", file=sys.stderr)
            return 2
        lp = LineProfiler()
        for t in targets:
            lp.add_function(t)
        lp.runcall(fn)
        lp.print_stats(output_unit=1e-3, stripzeros=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
