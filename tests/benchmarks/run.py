"""Benchmark: samples per second per stage and analysis, peak memory, the ratio against the
per-sample scipy reference, and the speed-up from one to two workers.

Not part of the pytest run (timings on shared machines are noisy; no test asserts a speed).

    python tests/benchmarks/run.py [--json FILE] [--quick]

Prints one table with the targets beside the figures and writes the figures as JSON.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from tolerance.api import load_study, run  # noqa: E402
from tolerance.sampling import draw  # noqa: E402

#: one study per stage (the first study in studies/ of that stage is used)
TARGETS = {
    "dc_darlington": 300_000,       # samples/s of the Darlington DC evaluation
    "full": 10_000,                 # samples/s of the full evaluation (DC + transient + thermal)
    "reference_ratio": 500,         # vectorized / per-sample reference, at equal accuracy
    "two_workers": 1.7,             # speed-up from 1 to 2 workers
    "peak_memory_mb": 1500,         # 10-million-sample DC run
}


#: the study that represents each stage in the benchmark
STAGE_STUDIES = {"single": "irrigation_valve_single.toml",
                 "darlington": "pwm_led_dimmer_darlington.toml",
                 "sziklai": "shelf_led_sziklai.toml"}


def studies_by_stage() -> dict[str, Path]:
    return {stage: ROOT / "studies" / name for stage, name in STAGE_STUDIES.items()}


def best_of(fn, repeat: int = 3) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def stage_figures(study, n: int, n_full: int) -> dict:
    """Samples/s of the DC evaluation (stage.dc: on, edge, off and threshold solves at the
    ambient), in the study's chunks as a run evaluates them, and of the full evaluation
    (stage.evaluate: electro-thermal loop, switching transient where the study enables it,
    ratings) of one chunk of ``n_full`` samples."""
    _, values = draw(study.parameters, None, "random", 3, n, 0, n)
    size = study.settings.chunk_size
    pieces = [{k: v[a:a + size] for k, v in values.items()} for a in range(0, n, size)]

    def dc():
        return [study.stage.dc(piece) for piece in pieces]

    dt = best_of(dc)
    conv = float(np.mean(np.concatenate([out["converged"] for out in dc()])))
    figures = {"dc_samples_per_s": n / dt, "converged_fraction": conv, "samples": n,
               "chunk_size": size}
    _, v2 = draw(study.parameters, None, "random", 3, n_full, 0, n_full)
    dt_full = best_of(lambda: study.stage.evaluate(v2), repeat=1)
    sw = getattr(study.stage, "switching", None)
    figures.update(full_samples_per_s=n_full / dt_full, full_samples=n_full,
                   transient=bool(sw is not None and sw.enabled))
    return figures


def reference_figures(study, stage_name: str, k: int = 100) -> dict | None:
    """Per-sample scipy reference on the same samples; rate ratio and agreement."""
    try:
        import test_stages  # the per-sample references live beside the stage tests
    except ImportError:
        return None
    if stage_name == "single":
        ref = test_stages.reference_single
    else:
        def ref(stage, samples, i):
            return test_stages.reference_pair(stage, samples, i, stage_name)
    _, values = draw(study.parameters, None, "random", 5, k, 0, k)
    vec = study.stage.dc(values)
    def one(i):
        try:
            return ref(study.stage, values, i)
        except (TypeError, ValueError):  # the reference's root finder found no solution
            return None

    t0 = time.perf_counter()
    refs = [one(i) for i in range(k)]
    dt_ref = time.perf_counter() - t0
    n = 100_000
    _, big = draw(study.parameters, None, "random", 5, n, 0, n)
    dt_vec = best_of(lambda: study.stage.dc(big))
    worst = 0.0
    for i, r in enumerate(refs):
        if r is None:
            continue
        for key, value in r.items():
            if key in vec and np.isfinite(vec[key][i]) and abs(value) > 1e-12:
                worst = max(worst, abs(vec[key][i] - value) / abs(value))
    return {"reference_samples_per_s": k / dt_ref, "vectorized_samples_per_s": n / dt_vec,
            "ratio": (n / dt_vec) / (k / dt_ref), "max_relative_difference": worst,
            "reference_samples": k, "reference_failures": sum(r is None for r in refs)}


def analysis_figures(path: Path, n: int) -> dict:
    from tolerance.analysis import study_sensitivity, study_worst_case
    from tolerance.choose import choose
    from tolerance.whatif import whatif

    study = load_study(path)
    out = {}
    t0 = time.perf_counter()
    run(study, samples=n)
    out["run_with_insights"] = {"seconds": time.perf_counter() - t0, "evaluations": n}
    hfe = next((p.name for p in study.parameters if p.name.endswith(".hfe")), None)
    if hfe:
        t0 = time.perf_counter()
        res, _, _ = whatif(study, [f"{hfe}=min"], samples=n)
        out["whatif"] = {"seconds": time.perf_counter() - t0, "evaluations": res["evaluations"]}
    t0 = time.perf_counter()
    res = study_worst_case(study, n, 1)
    out["worstcase"] = {"seconds": time.perf_counter() - t0, "evaluations": res["evaluations"]}
    t0 = time.perf_counter()
    res = study_sensitivity(study, n, 1, 1024, bootstrap=100)
    out["sensitivity"] = {"seconds": time.perf_counter() - t0, "evaluations": res["evaluations"]}
    if "RB" in study.parameter_names:
        t0 = time.perf_counter()
        nominal = study.parameter("RB").nominal
        res = choose(study, [f"RB=E12:{nominal / 2:g}..{nominal * 2:g}"], samples=n // 4)
        out["choose"] = {"seconds": time.perf_counter() - t0, "evaluations": res["evaluations"]}
    for v in out.values():
        v["evaluations_per_s"] = v["evaluations"] / v["seconds"]
    return out


def worker_figures(path: Path, n: int, rounds: int = 2) -> dict:
    """Wall time of a whole run (chunks, Parquet, summary) with one and with two workers,
    alternated so that a drift of the shared machine hits both alike. The first two-worker
    run starts the worker processes (a command-line run always pays that); later runs in the
    same process reuse them, as the Python API does."""
    study = load_study(path)
    times: dict[int, list[float]] = {1: [], 2: []}
    with tempfile.TemporaryDirectory() as tmp:
        for _ in range(rounds):
            for jobs in (1, 2):
                t0 = time.perf_counter()
                run(study, samples=n, jobs=jobs, out=Path(tmp) / f"j{jobs}", force=True,
                    insights=False)
                times[jobs].append(time.perf_counter() - t0)
    t1, t2 = min(times[1]), min(times[2])
    return {"one_worker_s": t1, "two_workers_s": t2, "speedup": t1 / t2, "samples": n,
            "two_workers_first_s": times[2][0], "speedup_with_start": t1 / times[2][0],
            "runs_s": {str(k): v for k, v in times.items()}}


def command_figures(path: Path, n: int, jobs: int = 2) -> dict:
    """Wall time of what ``tolerance run STUDY --samples n --jobs 2`` does, phase by phase:
    reading the study with its transistors' datasheet fits (once fitting, once from the fit
    cache), the run (its insights timed inside it and counted apart), and the
    plots (drawn by the run's ``jobs`` workers) and reports; the command itself in a fresh
    process (fits cached); and the command's start, ``tolerance check`` of the study in a
    fresh process (best of 3)."""
    from tolerance import analysis
    from tolerance.models import parts
    from tolerance.report import write_reports

    saved = os.environ.get(parts.CACHE_ENV)
    with tempfile.TemporaryDirectory() as tmp:
        os.environ[parts.CACHE_ENV] = str(Path(tmp) / "cache")
        try:
            parts._fit_cached.cache_clear()
            t0 = time.perf_counter()
            study = load_study(path)
            t_load = time.perf_counter() - t0
            parts._fit_cached.cache_clear()
            t0 = time.perf_counter()
            study = load_study(path)
            t_cached = time.perf_counter() - t0
            out = Path(tmp) / "run"
            # the run's own insights call timed where it happens, so the two shares add up
            # to the run and neither can come out negative from a second call's noise
            insight_times = []
            plain = analysis.insights

            def timed(*args, **kwargs):
                t = time.perf_counter()
                try:
                    return plain(*args, **kwargs)
                finally:
                    insight_times.append(time.perf_counter() - t)

            analysis.insights = timed
            try:
                t0 = time.perf_counter()
                run(study, samples=n, jobs=jobs, out=out, force=True, insights=True)
                t_total = time.perf_counter() - t0
            finally:
                analysis.insights = plain
            t_insights = sum(insight_times)
            t_run = t_total - t_insights
            t0 = time.perf_counter()
            write_reports(out, jobs)
            t_report = time.perf_counter() - t0
            env = dict(os.environ, PYTHONPATH=str(ROOT))
            t0 = time.perf_counter()
            proc = subprocess.run([sys.executable, "-m", "tolerance", "run", str(path),
                                   "--samples", str(n), "--jobs", str(jobs), "--out",
                                   str(Path(tmp) / "cli"), "--quiet"], env=env,
                                  capture_output=True, text=True)
            t_cli = time.perf_counter() - t0
            # the command's own start: a fresh process that checks the study (fits cached)
            starts = []
            for _ in range(3):
                t0 = time.perf_counter()
                check = subprocess.run([sys.executable, "-m", "tolerance", "check", str(path)],
                                       env=env, capture_output=True, text=True)
                starts.append(time.perf_counter() - t0)
                if check.returncode != 0:
                    raise RuntimeError(check.stderr[-2000:])
        finally:
            if saved is None:
                os.environ.pop(parts.CACHE_ENV, None)
            else:
                os.environ[parts.CACHE_ENV] = saved
    if proc.returncode not in (0, 1):
        raise RuntimeError(proc.stderr[-2000:])
    return {"samples": n, "jobs": jobs, "load_s": t_load, "load_cached_s": t_cached,
            "run_s": t_run, "insights_s": t_insights, "report_s": t_report,
            "command_s": t_cli, "check_s": min(starts)}


def memory_figures(path: Path, n: int) -> dict:
    """Peak resident memory of a whole DC run in a child process (one worker)."""
    with tempfile.TemporaryDirectory() as tmp:
        code = ("import sys; from tolerance.cli import main; "
                "sys.exit(main(sys.argv[1:]))")
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, "-c", code, "run", str(path), "--samples",
                               str(n), "--out", str(Path(tmp) / "big"), "--quiet"], env=env,
                              capture_output=True, text=True)
        dt = time.perf_counter() - t0
        peak_kb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    if proc.returncode not in (0, 1):
        raise RuntimeError(proc.stderr[-2000:])
    return {"samples": n, "peak_memory_mb": peak_kb / 1024, "seconds": dt,
            "samples_per_s": n / dt}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", help="write the figures to this file")
    ap.add_argument("--quick", action="store_true", help="smaller runs (a minute or two)")
    args = ap.parse_args()
    quick = args.quick
    n_stage = 50_000 if quick else 200_000
    figures: dict = {"machine": {"processor": platform.processor() or platform.machine(),
                                 "cores": os.cpu_count(), "python": platform.python_version(),
                                 "numpy": np.__version__}, "targets": TARGETS, "stages": {}}
    paths = studies_by_stage()
    for stage_name, path in paths.items():
        study = load_study(path)
        entry = {"study": path.name, **stage_figures(study, n_stage, 5_000 if quick else 20_000)}
        ref = reference_figures(study, stage_name)
        if ref:
            entry["reference"] = ref
        figures["stages"][stage_name] = entry
        print(f"measured {stage_name}", file=sys.stderr)
    first = ROOT / "studies" / "beacon_lamp_darlington.toml"
    figures["analyses"] = analysis_figures(first, 5_000 if quick else 20_000)
    figures["workers"] = worker_figures(first, 100_000 if quick else 400_000)
    figures["command"] = command_figures(first, 50_000 if quick else 400_000)
    figures["memory"] = memory_figures(first, 500_000 if quick else 10_000_000)

    print_table(figures)
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=2) + "\n")
    return 0


def _met(value, target, larger_is_better=True) -> str:
    if value is None:
        return "n/a"
    ok = value >= target if larger_is_better else value <= target
    return "met" if ok else "NOT met"


def print_table(f: dict) -> None:
    w = sys.stdout.write
    m = f["machine"]
    w(f"\nmachine: {m['processor']}, {m['cores']} cores, Python {m['python']}, "
      f"numpy {m['numpy']}\n\n")
    w(f"{'stage':<12} {'DC samples/s':>14} {'full samples/s':>15} {'reference/s':>12} "
      f"{'ratio':>8} {'max rel diff':>13}\n")
    for name, s in f["stages"].items():
        ref = s.get("reference", {})
        w(f"{name:<12} {s['dc_samples_per_s']:>14,.0f} "
          f"{s.get('full_samples_per_s', float('nan')):>15,.0f} "
          f"{ref.get('reference_samples_per_s', float('nan')):>12,.1f} "
          f"{ref.get('ratio', float('nan')):>8,.0f} "
          f"{ref.get('max_relative_difference', float('nan')):>13.2e}\n")
    sizes = sorted({s["chunk_size"] for s in f["stages"].values() if "chunk_size" in s})
    if sizes:
        w(f"(DC in the studies' chunks of {', '.join(f'{c:,}' for c in sizes)} samples, as a "
          f"run evaluates them; full: one chunk)\n")
    w(f"\n{'analysis':<20} {'seconds':>9} {'evaluations':>12} {'evaluations/s':>14}\n")
    for name, a in f["analyses"].items():
        w(f"{name:<20} {a['seconds']:>9.2f} {a['evaluations']:>12,} "
          f"{a['evaluations_per_s']:>14,.0f}\n")
    wk, mem = f["workers"], f["memory"]
    w(f"\nworkers: 1 -> {wk['one_worker_s']:.2f} s, 2 -> {wk['two_workers_s']:.2f} s for "
      f"{wk['samples']:,} samples: speed-up {wk['speedup']:.2f} (best runs; the first "
      f"two-worker run, which starts the workers: {wk['two_workers_first_s']:.2f} s, "
      f"{wk['speedup_with_start']:.2f})\n")
    cmd = f.get("command")
    if cmd:
        w(f"command line, {cmd['samples']:,} samples, {cmd['jobs']} workers: "
          f"{cmd['command_s']:.1f} s in all; in one process: study with its datasheet fits "
          f"{cmd['load_s']:.1f} s ({cmd['load_cached_s']:.1f} s with the fits cached), run "
          f"{cmd['run_s']:.1f} s, insights {cmd['insights_s']:.1f} s, plots and reports "
          f"{cmd['report_s']:.1f} s\n")
        if "check_s" in cmd:
            w(f"command start: `tolerance check` of that study in a fresh process "
              f"{cmd['check_s']:.2f} s (best of 3)\n")
    w(f"memory: {mem['samples']:,}-sample run, peak {mem['peak_memory_mb']:.0f} MB, "
      f"{mem['seconds']:.0f} s\n\n")
    t = f["targets"]
    darl = f["stages"].get("darlington", {})
    fulls = [s.get("full_samples_per_s") for s in f["stages"].values()
             if s.get("full_samples_per_s") is not None]
    ratios = [s["reference"]["ratio"] for s in f["stages"].values() if "reference" in s]
    rows = [
        ("Darlington DC >= 300,000 samples/s", darl.get("dc_samples_per_s"),
         t["dc_darlington"], True),
        ("full evaluation >= 10,000 samples/s", min(fulls) if fulls else None, t["full"], True),
        (">= 500x the per-sample reference", min(ratios) if ratios else None,
         t["reference_ratio"], True),
        ("2 workers >= 1.7x one", wk["speedup"], t["two_workers"], True),
        ("  the same, counting the workers' start", wk["speedup_with_start"],
         t["two_workers"], True),
        ("10M-sample DC run < 1.5 GB", mem["peak_memory_mb"] if mem["samples"] >= 10_000_000
         else None, t["peak_memory_mb"], False),
    ]
    w(f"{'target':<40} {'measured':>14}  verdict\n")
    for label, value, target, larger in rows:
        # ratios with two decimals: a speed-up of 1.66 against 1.7 must not read "1.7"
        shown = ("-" if value is None else f"{value:,.2f}" if abs(value) < 100
                 else f"{value:,.1f}")
        w(f"{label:<40} {shown:>14}  {_met(value, target, larger)}\n")


if __name__ == "__main__":
    sys.exit(main())
