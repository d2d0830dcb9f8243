"""Robustness: interrupted runs resume to the identical result, the dask backend matches the
local one, output folders are never overwritten without --force, malformed studies never crash."""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from tolerance.api import UsageError, load_study, run
from tolerance.study import StudyError
from tolerance.study import load_study as load_text
from tolerance.summary import comparable

TESTS = Path(__file__).parent
ROOT = TESTS.parent

LINEAR = """
stage = "linear_test"
[run]
samples = {samples}
seed = 21
sampler = "random"
chunk_size = {chunk}
[inputs]
x1 = {{min = "-1 V", max = "3 V"}}
x2 = {{nominal = "1 V", tolerance = "30%", distribution = "normal"}}
"""

# runs the CLI with the linear test stage registered
CLI = ("import sys; sys.path.insert(0, sys.argv.pop(1)); import linear_stage; "
       "from tolerance.cli import main; sys.exit(main(sys.argv[1:]))")


def _cli(*args, **kw):
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen([sys.executable, "-c", CLI, str(TESTS), *map(str, args)], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, **kw)


def _wait_for_chunks(folder: Path, count: int, proc, timeout=60.0):
    t0 = time.time()
    while time.time() - t0 < timeout:
        if len(list(folder.glob("part-*.parquet"))) >= count:
            return
        if proc.poll() is not None:
            pytest.fail("the run finished before it could be interrupted; make it longer")
        time.sleep(0.01)
    pytest.fail("no chunk appeared")


@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGINT])
def test_interrupted_run_resumes_to_identical_result(write_study, tmp_path, sig):
    # a million-sample run, killed part way
    study = write_study(LINEAR.format(samples=1_000_000, chunk=8_000))
    whole = tmp_path / "whole"
    ref = _cli("run", study, "--out", whole, "--quiet")
    ref.communicate(timeout=300)
    assert ref.returncode in (0, 1)

    cut = tmp_path / "cut"
    proc = _cli("run", study, "--out", cut, "--quiet")
    _wait_for_chunks(cut / "samples.parquet", 3, proc)
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=60)
    if sig == signal.SIGINT:
        assert proc.returncode == 130 and "--resume" in err and "Traceback" not in err
    kept = sorted((cut / "samples.parquet").glob("part-*.parquet"))
    assert kept and not (cut / "summary.json").exists()
    first_mtime = kept[0].stat().st_mtime_ns

    again = _cli("run", study, "--out", cut, "--resume", "--quiet")
    again.communicate(timeout=300)
    assert again.returncode in (0, 1)
    # finished chunks were kept, not recomputed
    assert kept[0].stat().st_mtime_ns == first_mtime
    a = json.loads((whole / "summary.json").read_text())
    b = json.loads((cut / "summary.json").read_text())
    assert comparable(a) == comparable(b)


def test_sigterm_stops_the_workers_with_the_run(write_study, tmp_path):
    # a batch system's time limit or `timeout` sends SIGTERM: with its default the command
    # ended at once and left its two idle workers behind, holding the output open
    study = write_study(LINEAR.format(samples=400_000, chunk=4_000))
    cut = tmp_path / "cut"
    proc = _cli("run", study, "--out", cut, "--quiet", "--jobs", "2")
    _wait_for_chunks(cut / "samples.parquet", 4, proc)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)  # returns only once no worker holds the output
    assert proc.returncode == 143 and "--resume" in err and "Traceback" not in err
    assert not (cut / "summary.json").exists()
    again = _cli("run", study, "--out", cut, "--resume", "--quiet", "--jobs", "2")
    again.communicate(timeout=300)
    assert again.returncode in (0, 1)
    whole = run(load_study(study), insights=True)
    assert comparable(json.loads((cut / "summary.json").read_text())) == comparable(
        whole.summary)


def test_sigterm_while_the_plots_are_drawn_stops_the_plot_workers(tmp_path):
    out = tmp_path / "r"
    proc = _cli("run", ROOT / "tolerance" / "demo" / "demo.toml", "--samples", "3000",
                "--out", out, "--quiet", "--jobs", "2")
    t0 = time.time()
    while not list((out / "plots").glob("*.png")):
        if proc.poll() is not None:
            pytest.fail("the run finished before its plots could be interrupted")
        if time.time() - t0 > 240:
            pytest.fail("no plot appeared")
        time.sleep(0.01)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)  # returns only once no worker holds the output
    assert proc.returncode == 143 and "Traceback" not in err
    assert (out / "summary.json").is_file()
    # every plot there is whole (PNG's last chunk is IEND); a stopped one is at most a .tmp
    pngs = list((out / "plots").glob("*.png"))
    assert pngs and all(p.read_bytes()[-12:-4] == b"\x00\x00\x00\x00IEND" for p in pngs)


def test_the_interrupt_guard_takes_sigterm_and_remembers_it():
    from fresh_process import run_fresh

    # in a fresh process: were SIGTERM not taken, it would end that process, not the tests
    code = ("import os, signal\n"
            "from tolerance.runner import InterruptGuard, Terminated\n"
            "with InterruptGuard() as guard:\n"
            "    try:\n"
            "        os.kill(os.getpid(), signal.SIGTERM)\n"
            "        [None for _ in range(3)]\n"
            "    except Terminated:\n"
            "        print('raised')\n"
            "    try:\n"
            "        guard.check()\n"
            "    except Terminated:\n"
            "        print('remembered')\n"
            "print(signal.getsignal(signal.SIGTERM) is signal.SIG_DFL)\n")
    proc = run_fresh(code, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == ["raised", "remembered", "True"]


class _InterruptInFinalizer:
    """Sends the process SIGINT from its finalizer: Python's handler then raises
    KeyboardInterrupt inside ``__del__``, where the interpreter ignores it (it only reports it
    to ``sys.unraisablehook``), as it would for a Ctrl-C that arrives while any finalizer runs
    (Python documentation, signal module: "Handlers and exceptions")."""

    def __del__(self):
        os.kill(os.getpid(), signal.SIGINT)
        for _ in range(3):  # a backward jump: the pending handler runs here at the latest
            pass


class _StageInterruptedAtCall:
    """Wraps a stage: its ``call``-th evaluation drops an object whose finalizer is hit by
    the interrupt."""

    def __init__(self, stage, call: int):
        self._stage, self._call, self.calls = stage, call, 0

    def __getattr__(self, name):
        return getattr(self._stage, name)

    def evaluate(self, samples):
        self.calls += 1
        if self.calls == self._call:
            _InterruptInFinalizer()  # dropped at once: its finalizer runs here
        return self._stage.evaluate(samples)


@pytest.mark.skipif(not hasattr(signal, "pthread_kill"), reason="POSIX signals")
def test_an_interrupt_swallowed_by_a_finalizer_still_stops_the_run(write_study, tmp_path,
                                                                      monkeypatch):
    import dataclasses

    swallowed = []
    monkeypatch.setattr(sys, "unraisablehook", lambda u: swallowed.append(u.exc_type))
    study = load_study(write_study(LINEAR.format(samples=6000, chunk=1000)))
    stage = _StageInterruptedAtCall(study.stage, call=2)
    cut = tmp_path / "cut"
    with pytest.raises(KeyboardInterrupt):
        run(dataclasses.replace(study, stage=stage), out=cut, insights=False)
    # the interrupt did reach the finalizer, and was ignored there by the interpreter ...
    assert swallowed == [KeyboardInterrupt]
    # ... yet the run stopped after that chunk: no further chunk, no summary
    assert stage.calls == 2
    assert len(list((cut / "samples.parquet").glob("part-*.parquet"))) == 2
    assert not (cut / "summary.json").exists()
    # and SIGINT and SIGTERM have their handlers of before again
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler
    assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL
    resumed = run(study, out=cut, resume=True, insights=False)
    assert comparable(resumed.summary) == comparable(run(study, insights=False).summary)


def test_existing_result_folder_needs_force(write_study, tmp_path):
    study = load_study(write_study(LINEAR.format(samples=1000, chunk=500)))
    run(study, out=tmp_path / "r")
    with pytest.raises(UsageError, match="already holds results"):
        run(study, out=tmp_path / "r")
    again = run(study, out=tmp_path / "r", force=True)
    assert comparable(again.summary) == comparable(json.loads(
        (tmp_path / "r" / "summary.json").read_text()))


def test_force_never_empties_a_folder_that_holds_other_files(write_study, tmp_path, capsys):
    # --out pointed at a working folder by mistake: its files must survive, --force or not
    study = write_study(LINEAR.format(samples=500, chunk=500))
    work = study.parent
    (work / "notes").mkdir()
    (work / "notes" / "bench.txt").write_text("measured 12 mA")
    before = sorted(p.relative_to(work) for p in work.rglob("*"))
    # --resume too: it wrote a whole run beside the files of a folder with no run to continue
    for extra in ([], ["--force"], ["--resume"], ["--resume", "--force"]):
        code, err = _cli_in_process(["run", study, "--out", work, "--quiet", *extra], capsys)
        assert code == 2 and "Traceback" not in err
        assert "not results of a study" in err and "notes" in err and study.name in err
    assert sorted(p.relative_to(work) for p in work.rglob("*")) == before


@pytest.mark.parametrize("inside", ["plots/notes.txt", "samples.parquet/keep.txt",
                                    "plots/mine/a.png"])
def test_force_never_removes_a_file_of_the_users_inside_a_results_subfolder(
        write_study, tmp_path, capsys, inside):
    # --force removes plots/ and samples.parquet/ whole; a note kept in them went with them
    study = write_study(LINEAR.format(samples=200, chunk=200))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    (out / inside).parent.mkdir(exist_ok=True)
    (out / inside).write_text("mine")
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    code, err = _cli_in_process(["run", study, "--out", out, "--quiet", "--force"], capsys)
    assert code == 2 and "Traceback" not in err
    assert "not results of a study" in err and inside.split("/")[0] in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before


def test_resume_refuses_the_folder_of_another_command(tmp_path, capsys):
    # resuming a run into a what-if folder added a run beside it, and the rebuilt report put
    # another study's what-if under this study's title
    demo = ROOT / "tolerance" / "demo" / "demo.toml"
    out = tmp_path / "w"
    assert _cli_in_process(["whatif", demo, "--pin", "RB=min", "--samples", "100", "--out",
                            out, "--quiet"], capsys)[0] in (0, 1)
    files = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    for extra in ([], ["--force"]):
        code, err = _cli_in_process(["run", ROOT / "studies" / "beacon_lamp_darlington.toml",
                                     "--samples", "100", "--out", out, "--resume", "--quiet",
                                     *extra], capsys)
        assert code == 2 and "Traceback" not in err
        assert "results of another command (whatif.json, whatif_samples.parquet)" in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == files


def test_force_replaces_every_result_a_command_writes(tmp_path, capsys):
    from tolerance.api import RESULT_NAMES

    demo = ROOT / "tolerance" / "demo" / "demo.toml"
    out = tmp_path / "r"
    assert _cli_in_process(["run", demo, "--samples", "200", "--out", out, "--quiet"],
                           capsys)[0] == 0
    pinned = tmp_path / "w"
    assert _cli_in_process(["whatif", demo, "--pin", "RB=min", "--samples", "200", "--out",
                            pinned, "--quiet"], capsys)[0] in (0, 1)
    # what the commands wrote is what --force may replace
    written = {p.name for p in [*out.iterdir(), *pinned.iterdir()]}
    assert written <= RESULT_NAMES and {"summary.json", "whatif.json"} <= written
    old = (out / "summary.json").stat().st_mtime_ns
    assert _cli_in_process(["run", demo, "--samples", "300", "--out", out, "--quiet",
                            "--force"], capsys)[0] == 0
    assert json.loads((out / "summary.json").read_text())["samples"] == 300
    assert (out / "summary.json").stat().st_mtime_ns != old


@pytest.mark.parametrize("change, told", [
    (("seed = 21", "seed = 22"), "seed 21, not 22"),
    (("samples = 3000", "samples = 4000"), "samples 3000, not 4000"),
    (('"-1 V"', '"-2 V"'), "another version of the study")])
def test_resume_never_replaces_another_run(write_study, tmp_path, change, told):
    text = LINEAR.format(samples=3000, chunk=500)
    first = run(load_study(write_study(text)), out=tmp_path / "r")
    other = load_study(write_study(text.replace(*change)))
    files = {p: p.read_bytes() for p in (tmp_path / "r").rglob("*") if p.is_file()}
    with pytest.raises(UsageError, match=f"another run \\({told}\\).*--force"):
        run(other, out=tmp_path / "r", resume=True)
    # the other run's results are untouched
    assert {p: p.read_bytes() for p in (tmp_path / "r").rglob("*") if p.is_file()} == files
    # --force replaces them: every chunk recomputed for this run
    replaced = run(other, out=tmp_path / "r", resume=True, force=True)
    assert comparable(replaced.summary) == comparable(run(other).summary)
    assert comparable(replaced.summary) != comparable(first.summary)


def test_resume_never_mixes_chunks_of_another_version_of_the_tool(write_study, tmp_path,
                                                                 monkeypatch):
    from tolerance import api, runner

    study = load_study(write_study(LINEAR.format(samples=3000, chunk=500)))
    run(study, out=tmp_path / "r")
    (tmp_path / "r" / "summary.json").unlink()  # as if killed before the summary
    # the same study and seed with changed code (an upgrade between the kill and the resume)
    monkeypatch.setattr(api, "code_digest", lambda: "0" * 16)
    with pytest.raises(UsageError, match=r"another run \(another version of the tool"):
        run(study, out=tmp_path / "r", resume=True)
    # the digest covers every source file: a changed byte anywhere changes it
    assert runner.code_digest() != "0" * 16 and len(runner.code_digest()) == 16


def test_only_chunk_files_are_read_as_chunks(write_study, tmp_path):
    from tolerance import runner

    study = load_study(write_study(LINEAR.format(samples=3000, chunk=500)))
    whole = run(study, out=tmp_path / "r")
    folder = tmp_path / "r" / "samples.parquet"
    chunks = runner.chunk_files(folder)
    # a copy a file manager made beside the chunks is no chunk: not read, not deleted
    stray = folder / "part-000003 (copy).parquet"
    stray.write_bytes(chunks[3].read_bytes())
    assert runner.chunk_files(folder) == chunks
    chunks[5].unlink()
    (tmp_path / "r" / "summary.json").unlink()
    resumed = run(study, out=tmp_path / "r", resume=True)
    assert comparable(resumed.summary) == comparable(whole.summary) and stray.exists()


@pytest.mark.parametrize("force", [False, True])
def test_resume_keeps_the_plan_of_the_run_it_continues(write_study, tmp_path, monkeypatch,
                                                       force):
    from tolerance import runner

    study = load_study(write_study(LINEAR.format(samples=9000, chunk=4000)))
    whole = run(study, jobs=2, out=tmp_path / "r")
    folder = tmp_path / "r" / "samples.parquet"
    # two workers: the fewest chunks that is a multiple of two, all of one size
    assert [len(runner._chunk_column(p, "sample")) for p in runner.chunk_files(folder)] == [
        2250] * 4
    runner.chunk_files(folder)[2].unlink()  # as if the run had been killed there
    (tmp_path / "r" / "summary.json").unlink()
    done = []
    plain = runner.run_chunk_to_file
    monkeypatch.setattr(runner, "run_chunk_to_file",
                        lambda spec, i, s, e, f: done.append((i, s, e)) or plain(spec, i, s, e, f))
    # resumed on one worker, whose own plan would be chunks of 4,000: the folder's plan is
    # kept and only the missing chunk is computed
    # (--force beside --resume replaces only another run's chunks)
    resumed = run(study, jobs=1, out=tmp_path / "r", resume=True, force=force)
    assert done == [(2, 4500, 6750)]
    assert comparable(resumed.summary) == comparable(whole.summary)


@pytest.mark.parametrize("samples,chunk,jobs,size", [
    (20_000, 16_384, 2, 10_000), (50_000, 16_384, 2, 12_500), (400_000, 16_384, 2, 15_385),
    (20_000, 16_384, 1, 16_384), (5_000, 16_384, 4, 1_250), (7, 16_384, 4, 2),
    (3, 16_384, 8, 1), (30_000, 10_000, 2, 7_500)])
def test_balanced_chunks_give_every_worker_the_same_work(samples, chunk, jobs, size):
    from tolerance.runner import balanced_chunk_size, chunk_ranges

    got = balanced_chunk_size(samples, chunk, jobs)
    assert got == size
    ranges = chunk_ranges(samples, got)
    # common practice, no source: the chunks stay within the limit and cover the run; with
    # several workers they come in a multiple of the workers, of one size but for a shorter
    # last one (one worker keeps the study's chunk size)
    lengths = [e - s for _, s, e in ranges]
    assert max(lengths) <= chunk and sum(lengths) == samples
    if jobs > 1:
        assert len(ranges) % jobs == 0 or samples < jobs
        assert max(lengths) - min(lengths) < len(ranges)


def test_dask_backend_matches_local(write_study, tmp_path):
    pytest.importorskip("distributed")
    study = load_study(write_study(LINEAR.format(samples=20_000, chunk=3_000)))
    local = run(study, jobs=1, out=tmp_path / "local")
    # the local cluster takes no fixed port: with the usual dashboard port taken it warned
    # (an error in this test run, which turns warnings into errors)
    import socket

    with socket.socket() as taken:
        try:
            taken.bind(("127.0.0.1", 8787))
            taken.listen()
        except OSError:
            pass  # taken already: the case itself
        on_dask = run(study, jobs=2, backend="dask", out=tmp_path / "dask")
    assert comparable(local.summary) == comparable(on_dask.summary)
    a = (tmp_path / "local" / "summary.json").read_text()
    b = (tmp_path / "dask" / "summary.json").read_text()
    strip = lambda t: [ln for ln in t.splitlines() if '"created"' not in ln]  # noqa: E731
    assert strip(a) == strip(b)


def test_single_sample_and_zero_tolerance(write_study):
    text = LINEAR.format(samples=1, chunk=10).replace(
        'x2 = {nominal = "1 V", tolerance = "30%", distribution = "normal"}',
        'x2 = {nominal = "1 V", tolerance = "0%"}')
    res = run(load_study(write_study(text)))
    assert res.summary["samples"] == 1
    assert res.samples["x2"].iloc[0] == 1.0


def test_a_limit_window_of_one_value_runs_and_reports(write_study, tmp_path):
    # found by fuzzing the shipped studies: min = max is a legal criterion (a metric that
    # must take one value), every sample fails it here, and the insights, capability and
    # report must not stumble over its zero width (common practice, no source)
    from tolerance import report

    text = LINEAR.format(samples=200, chunk=100) + '[limits]\ny = {min = "1 V", max = "1 V"}\n'
    res = run(load_study(write_study(text)), out=tmp_path / "r")
    c = res.summary["criteria"]["y_positive"]  # the stage default on y, replaced
    assert c["failures"] == c["evaluated"] == 200
    assert res.summary["capability"]["y_positive"]["cp"] == 0.0
    report.write_reports(res.folder)
    assert (res.folder / "report.md").exists()


# --- fuzzing ----------------------------------------------------------------------------------

VALUES = st.one_of(
    st.integers(-10**12, 10**12), st.floats(allow_nan=True, allow_infinity=True), st.booleans(),
    st.text(max_size=12), st.sampled_from(["4k7", "5%", "-40 degC", "3.3 V", "1e400", "nan",
                                           "5 %%", "100%", "lhs", "sobol", ""]),
    st.lists(st.integers(0, 5), max_size=3), st.dictionaries(st.sampled_from(
        ["min", "max", "nominal", "tolerance", "distribution", "values", "typ"]),
        st.one_of(st.floats(allow_nan=True), st.text(max_size=6), st.integers(-5, 5)),
        max_size=4),
)
KEYS = ["stage", "run", "samples", "seed", "sampler", "inputs", "x1", "x2", "limits", "y",
        "min", "max", "correlation", "chunk_size", "title", "solver", "diverge_above"]


def _toml_value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        if v != v:
            return "nan"
        if v in (float("inf"), float("-inf")):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, int):
        return str(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return "{" + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + "}"


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(table=st.sampled_from(["", "run", "inputs", "limits", "solver"]),
       key=st.sampled_from(KEYS), value=VALUES)
def test_mutated_studies_never_crash(table, key, value):
    # common practice, no source: a malformed input must give a clean error, never a crash
    base = LINEAR.format(samples=100, chunk=50)
    line = f"{key} = {_toml_value(value)}\n"
    if table:
        text = base.replace(f"[{table}]\n", f"[{table}]\n{line}") if f"[{table}]" in base \
            else base + f"\n[{table}]\n{line}"
    else:
        text = line + base
    try:
        study = load_text("fuzz.toml", text=text)
    except StudyError as exc:
        assert str(exc).startswith("fuzz.toml")
        return
    res = run(study, samples=20)
    assert res.summary["samples"] == 20


# what an engineer's typo or a script could put in an analysis command's options (common
# practice, no source); an earlier hand probe of these found tracebacks and folders made
# before a refusal
PIN_SPECS = ["min", "max", "nominal", "typ", "p0", "p50", "p99.9", "p100", "p-1", "pnan", "",
             "1 V", "-5 V", "0", "0 V", "1e400", "1e-300", "abc", "3.3 mV", "25 degC", "5%"]
VARY_SPECS = ["E12:0.47..2.2", "E6:1..1.5", "E6:1..1.5", "E3:0.5..2", "E24:2.2..1", "E3:1..1", "E7:1..2", "E12:0..1",
              "E12:-1..1", "E192:0.1..10", "E12:1e300..1e308", "E12:1", "", "E12:1V..2V"]


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(command=st.sampled_from(["whatif", "choose", "sensitivity"]),
       names=st.lists(st.sampled_from(["x1", "x2", "x2", "x1", "x9", "", "X1"]), min_size=1,
                      max_size=3),
       pins=st.lists(st.sampled_from(PIN_SPECS), min_size=3, max_size=3),
       varies=st.lists(st.sampled_from(VARY_SPECS), min_size=3, max_size=3),
       tradeoff=st.sampled_from([None, "y,z", "y", "y,y", "q,z", ",", "", "z, y"]),
       sobol=st.sampled_from(["0", "1", "32", "64", "64", "128", "100", "-64"]))
def test_fuzzed_analysis_options_never_crash(write_study, capsys, command, names, pins, varies,
                                             tradeoff, sobol):
    # common practice, no source: whatever the options, a command ends with 0 or 1 and a
    # report, or with 2, one line naming what is wrong, and no output folder
    import tempfile

    from tolerance.cli import main

    study = write_study(LINEAR.format(samples=30, chunk=30))
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "o"
        argv = [command, str(study), "--out", str(out), "--quiet"]
        if command == "whatif":
            argv += [a for n, p in zip(names, pins) for a in ("--pin", f"{n}={p}")]
        elif command == "choose":
            argv += [a for n, v in zip(names, varies) for a in ("--vary", f"{n}={v}")]
            argv += [] if tradeoff is None else ["--tradeoff", tradeoff]
        else:
            argv += ["--sobol-samples", sobol]
        try:
            code = main(argv)
        except SystemExit as exc:  # argparse's own refusals
            code = exc.code
        err = capsys.readouterr().err
        event(f"{command} exit {code}")  # the share that ran (--hypothesis-show-statistics)
        assert code in (0, 1, 2), (argv, err)
        if code == 2:
            assert err.startswith("tolerance") and err.count("\n") == 1, (argv, err)
            assert not out.exists(), argv
        else:
            assert (out / "report.md").is_file() and not err, (argv, err)


SHIPPED = sorted((ROOT / "studies").glob("*.toml"))
# values an engineer's typo or a generator could put anywhere in a study (common practice,
# no source): zero, negative, non-finite, huge, empty, the wrong type or unit, inverted ranges
JUNK = ["0", "-1", "1e308", "nan", "inf", '"nan V"', '"0 ohm"', '"-5 V"', '"1e-30 V"',
        '"1e30 V"', '"abc"', '""', "[]", "{}", "true", '"-5%"', '"200%"', '"0 Hz"', '"1e9 Hz"',
        '"-300 degC"', '"0 A"', '{min = "5 V", max = "1 V"}', '{min = "0 V", max = "0 V"}',
        '{nominal = "1 V", tolerance = "150%"}', "{values = []}", '{values = ["1 V"]}',
        '{nominal = "0 ohm", tolerance = "5%"}', '"1e12 ohm"', "-0.5", '"small_signal_pnp"',
        '"nonexistent"', '"coil"']


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(path=st.sampled_from(SHIPPED), picks=st.lists(
    st.tuples(st.integers(0, 10**6), st.sampled_from(["replace", "delete", "rename"]),
              st.sampled_from(JUNK)), min_size=1, max_size=3))
def test_mutated_shipped_studies_never_crash(path, picks):
    # common practice, no source: whatever a line of a real stage's study is changed to, the
    # study is refused with the file and key named, or it runs and accounts for every sample
    _refused_or_accounted(path, picks)


# found by longer campaigns of the test above (warnings as errors, as in the test run): a
# value of 1e-300 or 1e308 gave metrics whose squares overflowed in the spread, a capability
# index whose square overflowed in its interval, or a margin beyond double precision
@pytest.mark.parametrize("name, section, line", [
    ("unclamped_valve_single.toml", "[load]", 'must_operate_voltage = "18 V"'),
    ("unclamped_valve_single.toml", "[parts.RB]", 'value = "68R"'),
    ("irrigation_valve_single.toml", "[parts.RB]", 'value = "68R"'),
    ("irrigation_valve_single.toml", "[parts.RPD]", 'value = "1k0"'),
])
@pytest.mark.parametrize("value", ["1e-300", '"1e-300 ohm"', "1e308"])
def test_extreme_values_found_by_the_fuzzer_run_cleanly(name, section, line, value):
    text = (ROOT / "studies" / name).read_text(encoding="utf-8")
    head, tail = text.split(section + "\n", 1)
    assert line in tail
    key = line.split("=", 1)[0].rstrip()
    lines = (head + section + "\n" + tail.replace(line, f"{key} = {value}", 1)).splitlines()
    _refused_or_accounted(lines, [])


def _refused_or_accounted(source, picks):
    """Apply ``picks`` to the lines of a study (a path or its lines); the result is refused
    with the file and key named, or it runs and accounts for every sample."""
    lines = (source.read_text(encoding="utf-8").splitlines() if isinstance(source, Path)
             else list(source))
    keyed = [i for i, ln in enumerate(lines) if "=" in ln and not ln.lstrip().startswith("#")]
    for pick, how, value in picks:
        i = keyed[pick % len(keyed)]
        key = lines[i].split("=", 1)[0].rstrip()
        lines[i] = {"replace": f"{key} = {value}", "delete": "",
                    "rename": f"{key.strip()}_x = 1"}[how]
    try:
        study = load_text("fuzz.toml", text="\n".join(lines) + "\n")
    except StudyError as exc:
        # the key, or for text that is no longer TOML the line and column
        assert str(exc).startswith("fuzz.toml")
        assert exc.key or "at line" in exc.message, str(exc)
        return
    res = run(study, samples=12, chunk_size=12)
    s = res.summary
    assert s["samples"] == 12
    assert all(s["not_converged"] + c["evaluated"] == 12 for c in s["criteria"].values())


# --- edge cases on the real stages ------------------------------------------------------------

def _demo(replace_from: str, replace_to: str) -> str:
    from tolerance.api import demo_text

    text = demo_text()
    assert replace_from in text
    return text.replace(replace_from, replace_to)


def test_supply_below_turn_on_is_counted_not_crashed():
    # a 1 V supply leaves the heater almost unpowered: the stage still solves (or counts its
    # failures), nothing crashes
    text = _demo('voltage = {nominal = "12 V", tolerance = "10%", distribution = "uniform"}',
                 'voltage = "1 V"')
    res = run(load_text("low.toml", text=text), samples=200)
    s = res.summary
    assert s["samples"] == 200
    assert s["not_converged"] + s["criteria"]["saturation"]["evaluated"] == 200
    # a supply at or below the transistor's V_CE(sat) is refused as bad input, naming the key
    with pytest.raises(StudyError, match=r"parts\.Q1\.(device|vce_sat_max).*lowest supply"):
        load_text("lower.toml", text=text.replace('voltage = "1 V"', 'voltage = "0.4 V"'))
    # a monolithic pair's own saturation voltage: the message names the supply too (a review
    # read only "parts.Q2.device" and looked at the part, not at its 1.5 V supply)
    pair = (ROOT / "studies" / "engine_bay_heater_darlington.toml").read_text(encoding="utf-8")
    low = re.sub(r'(\[supply\]\s*\nvoltage = )[^\n]*', r'\g<1>"1.5 V"', pair)
    assert low != pair
    with pytest.raises(StudyError, match=r"parts\.Q2\.device: the pair's saturation voltage "
                                         r".* lowest supply 1\.5 V \(\[supply\] voltage\): "
                                         r"the stage could never saturate"):
        load_text("pair.toml", text=low)


def test_temperatures_outside_a_device_range():
    # -100 degC and 200 degC lie outside any silicon datasheet: the run completes, every sample
    # is either solved or counted as not converged, and the hot ones fail T_j max
    text = _demo('temperature = {min = "-20 degC", max = "55 degC"}',
                 'temperature = {values = ["-100 degC", "200 degC"]}')
    res = run(load_text("cold_hot.toml", text=text), samples=100)
    df = res.samples
    hot = df["ambient.temperature"] > 400
    assert hot.any() and (~hot).any()
    solved = df["converged"]
    assert not df.loc[hot & solved, "pass"].any()
    assert res.summary["not_converged"] == int((~solved).sum())


def test_tolerance_at_its_limit():
    # 99.9 % (uniform) takes the base resistor to a fraction of an ohm: accepted and run;
    # 100 % would reach zero and is refused with the key
    study = load_text("t.toml", text=_demo('tolerance = "5%"\ntempco = "200 ppm/K"',
                                           'tolerance = "99.9%"\ndistribution = "uniform"\n'
                                           'tempco = "200 ppm/K"'))
    res = run(study, samples=300)
    assert res.summary["samples"] == 300
    assert res.samples["RB"].min() < 15.0
    with pytest.raises(StudyError, match=r"parts\.RB\.tolerance") as err:
        load_text("t2.toml", text=_demo('tolerance = "5%"\ntempco = "200 ppm/K"',
                                        'tolerance = "100%"\ntempco = "200 ppm/K"'))
    # the value as written (a review's "150%" was read back as "got 1.5")
    assert str(err.value).endswith("below 100 %, got '100%'")
    with pytest.raises(StudyError, match=r"got 1\.5 \(a plain number is a fraction"):
        load_text("t3.toml", text=_demo('tolerance = "5%"\ntempco = "200 ppm/K"',
                                        'tolerance = 1.5\ntempco = "200 ppm/K"'))


def _cli_in_process(argv, capsys) -> tuple[int, str]:
    from tolerance.cli import main

    code = main([str(a) for a in argv])
    return code, capsys.readouterr().err


@pytest.mark.parametrize("command", [["run"], ["whatif", "--pin", "RB=min"], ["worstcase"]])
def test_an_output_folder_that_cannot_be_made_is_refused(tmp_path, capsys, command):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    out = blocker / "results"
    code, err = _cli_in_process([*command, ROOT / "tolerance" / "demo" / "demo.toml",
                                 "--samples", "100", "--out", out], capsys)
    assert code == 2
    assert str(out) in err and "--out" in err and "Traceback" not in err
    assert blocker.read_text() == "not a folder"


def _failing_writes(monkeypatch, target, attribute, name_part, calls_before=0, named=True):
    """Make ``target.attribute`` (a writer taking the path first) write half a file and then
    fail as a full disk does, from its ``calls_before + 1``-th call on a path whose name holds
    ``name_part``; returns the list of paths it failed on. ``named=False``: the error names
    no file, as write() and pyarrow's writer report it."""
    import errno

    real = getattr(target, attribute)
    failed, seen = [], [0]

    def writer(*args, **kwargs):
        # the path is self of a bound method (Path.write_text), the second argument of
        # pq.write_table(table, where), the first of Figure.savefig(fname)
        path = next((a for a in args if isinstance(a, (str, Path)) and name_part in str(a)),
                    None)
        seen[0] += path is not None
        if path is None or seen[0] <= calls_before:
            return real(*args, **kwargs)
        Path(path).write_bytes(b"half a file")
        failed.append(Path(path))
        if named:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        raise OSError("Error writing bytes to file. Detail: [errno 28] No space left on "
                      "device")

    monkeypatch.setattr(target, attribute, writer)
    return failed


@pytest.mark.parametrize("named", [True, False])
def test_a_full_disk_during_the_chunks_keeps_what_is_complete(write_study, tmp_path, capsys,
                                                              monkeypatch, named):
    from tolerance import runner

    study = write_study(LINEAR.format(samples=3000, chunk=500))
    out = tmp_path / "r"
    failed = _failing_writes(monkeypatch, runner.pq, "write_table", ".parquet.tmp",
                             calls_before=2, named=named)
    code, err = _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)
    assert code == 2 and "Traceback" not in err
    # the message names the chunk file the write was for, also where the error named none
    # (a full disk as write() or pyarrow reports it)
    chunk = str(failed[0]).removesuffix(".tmp")
    assert "No space left on device" in err and f"{chunk}:" in err and "--resume" in err
    # the chunk being written left nothing; the two before it are whole; no summary
    assert not list(out.rglob("*.tmp"))
    assert len(list((out / "samples.parquet").glob("part-*.parquet"))) == 2
    assert not (out / "summary.json").exists()
    monkeypatch.undo()  # space freed
    assert _cli_in_process(["run", study, "--out", out, "--resume", "--quiet"], capsys)[0] == 0
    fresh = run(load_study(study), insights=True)
    assert comparable(json.loads((out / "summary.json").read_text())) == comparable(
        fresh.summary)


def test_a_full_disk_while_the_report_is_written_leaves_no_half_file(tmp_path, capsys,
                                                                    monkeypatch):
    out = tmp_path / "r"
    failed = _failing_writes(monkeypatch, Path, "write_text", "report.md.tmp")
    code, err = _cli_in_process(["run", "--samples", "300", "--out", out, "--quiet"], capsys)
    assert code == 2 and "Traceback" not in err and failed and os.strerror(28) in err
    # summary.json and the HTML report are whole; the Markdown report is absent, not half
    assert json.loads((out / "summary.json").read_text())["samples"] == 300
    assert (out / "report.html").read_text(encoding="utf-8").rstrip().endswith("</html>")
    assert not (out / "report.md").exists() and not list(out.rglob("*.tmp"))
    monkeypatch.undo()
    assert _cli_in_process(["report", out], capsys)[0] == 0
    assert (out / "report.md").is_file()


def test_a_plot_that_cannot_be_written_leaves_no_half_file(tmp_path, monkeypatch):
    from matplotlib.figure import Figure

    from tolerance import plots

    fig = Figure()
    fig.add_subplot().plot([0, 1], [1, 0])
    failed = _failing_writes(monkeypatch, Figure, "savefig", ".png.tmp")
    with pytest.raises(OSError):
        plots.save(fig, tmp_path / "drive_margin.png")
    assert failed and not list(tmp_path.iterdir())
    monkeypatch.undo()
    assert plots.save(fig, tmp_path / "drive_margin.png").read_bytes()[:4] == b"\x89PNG"


def test_a_damaged_sample_file_is_named_and_mended_by_resume(write_study, tmp_path, capsys):
    study = write_study(LINEAR.format(samples=3000, chunk=1000))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    whole = json.loads((out / "summary.json").read_text())
    damaged = sorted((out / "samples.parquet").glob("part-*.parquet"))[1]
    damaged.write_bytes(damaged.read_bytes()[:200])  # truncated, its footer gone
    code, err = _cli_in_process(["report", out], capsys)
    assert code == 2 and "Traceback" not in err
    assert damaged.name in err and "cannot be read" in err and "--resume" in err
    # --resume computes that chunk again (and only that one) and rebuilds everything
    kept = sorted((out / "samples.parquet").glob("part-*.parquet"))[0].stat().st_mtime_ns
    assert _cli_in_process(["run", study, "--out", out, "--resume", "--quiet"], capsys)[0] == 0
    assert sorted((out / "samples.parquet").glob("part-*.parquet"))[0].stat().st_mtime_ns == kept
    assert comparable(json.loads((out / "summary.json").read_text())) == comparable(whole)
    assert _cli_in_process(["report", out], capsys)[0] == 0


def test_resume_with_force_clears_another_runs_results_before_it_starts(write_study,
                                                                         tmp_path, capsys,
                                                                         monkeypatch):
    # common practice, no source: `run --resume --force` of another run computed its chunks
    # beside the old run's summary, reports and chunks; interrupted, the folder showed the
    # old study's report over a mix of both runs' samples
    from tolerance import runner

    study = write_study(LINEAR.format(samples=3000, chunk=1000))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    assert (out / "summary.json").is_file() and (out / "report.html").is_file()

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(runner, "execute", interrupted)
    code, _ = _cli_in_process(["run", study, "--out", out, "--seed", "9", "--resume",
                               "--force", "--quiet"], capsys)
    assert code == 130
    assert not any(out.iterdir())  # nothing of the old run is left to be taken for this one
    monkeypatch.undo()
    assert _cli_in_process(["run", study, "--out", out, "--seed", "9", "--resume", "--quiet"],
                           capsys)[0] == 0
    assert json.loads((out / "summary.json").read_text())["seed"] == 9


def test_resume_with_target_ci_keeps_or_refuses_the_runs_plan(write_study, tmp_path, capsys):
    # common practice, no source: `--resume --target-ci` of a run planned in chunks that
    # cross the stop rule's 32,768-sample marks rewrote its finished chunks on its own plan
    # and deleted the rest; it is refused, with what to do, and a plan that fits is kept
    study = write_study(LINEAR.format(samples=40000, chunk=7000))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    before = {p.name: p.stat().st_mtime_ns for p in (out / "samples.parquet").iterdir()}
    code, err = _cli_in_process(["run", study, "--out", out, "--resume", "--target-ci",
                                 "0.01", "--quiet"], capsys)
    assert code == 2 and "chunks of 7,000 samples" in err and "--resume alone" in err
    assert {p.name: p.stat().st_mtime_ns for p in (out / "samples.parquet").iterdir()} \
        == before
    fits = tmp_path / "fits"
    assert _cli_in_process(["run", study, "--out", fits, "--chunk-size", "8192", "--quiet"],
                           capsys)[0] in (0, 1)
    kept = (fits / "samples.parquet" / "part-000000.parquet").stat().st_mtime_ns
    assert _cli_in_process(["run", study, "--out", fits, "--resume", "--target-ci", "0.4",
                            "--quiet"], capsys)[0] in (0, 1)
    assert (fits / "samples.parquet" / "part-000000.parquet").stat().st_mtime_ns == kept
    # a target of 0.4 is met at the first check (every half-width at n = 32,768 is below
    # 0.006), so the resumed run stops there: 32,768 samples in 4 chunks of 8,192, the fifth
    # deleted (a mutation round kept one stale chunk unseen)
    assert json.loads((fits / "summary.json").read_text())["samples"] == 32_768
    assert len(list((fits / "samples.parquet").glob("part-*.parquet"))) == 4
    # an interrupted --target-ci run of its own plan (chunks of 7,000 cut at 32,768)
    # continues with the same options: the review found it refused
    cut = tmp_path / "cut"
    assert _cli_in_process(["run", study, "--out", cut, "--target-ci", "1e-9", "--quiet"],
                           capsys)[0] in (0, 1)
    parts = sorted((cut / "samples.parquet").glob("part-*.parquet"))
    assert len(parts) == 7  # 0, 7000, ..., 28000, 32768, 35000
    parts[-1].unlink()
    kept = parts[0].stat().st_mtime_ns
    assert _cli_in_process(["run", study, "--out", cut, "--resume", "--target-ci", "1e-9",
                            "--quiet"], capsys)[0] in (0, 1)
    assert parts[0].stat().st_mtime_ns == kept and parts[-1].is_file()


def test_a_target_ci_run_into_a_folder_stops_where_its_counts_say(write_study, tmp_path):
    # y = x1 + 2 x2 > 0 fails nowhere among these units (x1 >= -1 and x2 would need 5 sigma).
    # With no failure the Clopper-Pearson half-width is B(0.975; 1, n) / 2 (scipy.stats.beta):
    # 5.63e-5 at the first check, n = 32,768, and 6.15e-5 at 30,000; a target between them
    # stops a run at its first check, in memory and written to a folder alike (a mutation
    # round left the round's last chunk out of the folder's stop rule unseen)
    from scipy import stats as sps

    study = load_study(write_study(LINEAR.format(samples=100000, chunk=10000)))
    target = 0.5 * (sps.beta.ppf(0.975, 1, 32_768) + sps.beta.ppf(0.975, 1, 30_000)) / 2
    memory = run(study, target_ci=target)
    folder = run(study, target_ci=target, out=tmp_path / "r")
    assert memory.summary["criteria"]["y_positive"]["failures"] == 0
    assert memory.summary["samples"] == folder.summary["samples"] == 32_768


def test_resume_recomputes_a_chunk_with_a_damaged_dictionary_page(write_study, tmp_path):
    # bits flipped inside a column's dictionary page behind an intact footer decode silently
    # as other values; only the page checksum finds them, and --resume recomputes that chunk
    # (a mutation round read chunks without the checksum unseen: the test of flipped bits
    # damaged a data page, which fails to decode anyway). Common practice, no source
    import pyarrow.parquet as pq

    study = load_study(write_study(LINEAR.format(samples=3000, chunk=1000)))
    out = tmp_path / "r"
    whole = run(study, out=out).summary
    damaged = sorted((out / "samples.parquet").glob("part-*.parquet"))[1]
    meta = pq.read_metadata(damaged)
    col = meta.row_group(0).column(meta.schema.names.index("y"))
    assert col.dictionary_page_offset is not None  # pyarrow's default dictionary encoding
    data = bytearray(damaged.read_bytes())
    for k in range(col.dictionary_page_offset + 100, col.dictionary_page_offset + 108):
        data[k] ^= 0xFF
    damaged.write_bytes(bytes(data))
    again = run(study, out=out, resume=True).summary
    assert again["metrics"]["y"] == whole["metrics"]["y"]
    assert again["yield"] == whole["yield"]


def test_report_reads_an_early_stopped_run_of_a_summary_without_its_plan(write_study,
                                                                        tmp_path, capsys):
    # summaries written before planned_samples existed count the samples a --target-ci run
    # stopped at while its chunks carry the plan's count: the review found report refusing
    # such a complete folder as "another run"
    study = write_study(LINEAR.format(samples=40000, chunk=7000))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--target-ci", "0.4", "--quiet"],
                           capsys)[0] in (0, 1)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["samples"] == 32768 and summary.pop("planned_samples") == 40000
    (out / "summary.json").write_text(json.dumps(summary))
    assert _cli_in_process(["report", out], capsys)[0] == 0


def test_report_refuses_chunks_that_are_not_the_summarys_samples(write_study, tmp_path,
                                                                 capsys):
    # common practice, no source: with a chunk file removed, or a chunk of another seed
    # beside the summary (an interrupted --resume --force of another run), `report` drew its
    # plots from other samples under the summary's figures and exited 0
    import shutil

    study = write_study(LINEAR.format(samples=3000, chunk=1000))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    gone = tmp_path / "gone"
    shutil.copytree(out, gone)
    (gone / "samples.parquet" / "part-000001.parquet").unlink()
    code, err = _cli_in_process(["report", gone], capsys)
    assert code == 2 and "Traceback" not in err
    assert "no chunk holds samples 1000 to 1999" in err and "--resume" in err
    other = tmp_path / "other"
    assert _cli_in_process(["run", study, "--out", other, "--seed", "9", "--quiet"],
                           capsys)[0] == 0
    mixed = tmp_path / "mixed"
    shutil.copytree(out, mixed)
    shutil.copy(other / "samples.parquet" / "part-000000.parquet",
                mixed / "samples.parquet" / "part-000000.parquet")
    code, err = _cli_in_process(["report", mixed], capsys)
    assert code == 2 and "part-000000.parquet holds the samples of another run (seed 9, not" \
        in err
    assert _cli_in_process(["report", out], capsys)[0] == 0


@pytest.mark.parametrize("damage", ["page header", "flipped bits"])
def test_a_chunk_damaged_behind_an_intact_footer_is_found_and_mended(write_study, tmp_path,
                                                                     capsys, damage):
    # common practice, no source: 12 bytes over a column's page header left the footer and
    # its run stamp intact, so --resume kept the file and failed on it every time, as the
    # message told the user to do; 64 flipped bits inside a page read back as other values
    # (a dissipation of -2.42 W in the summary). Every page carries a CRC now: either damage
    # is an error that names the file, and --resume computes that chunk again.
    import pyarrow.parquet as pq

    study = write_study(LINEAR.format(samples=3000, chunk=1000))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    whole = json.loads((out / "summary.json").read_text())
    damaged = sorted((out / "samples.parquet").glob("part-*.parquet"))[1]
    meta = pq.read_metadata(damaged)
    column = meta.schema.names.index("y")
    offset = meta.row_group(0).column(column).data_page_offset
    data = bytearray(damaged.read_bytes())
    if damage == "page header":
        data[offset:offset + 12] = bytes(12)
    else:
        for k in range(offset + 100, offset + 108):
            data[k] ^= 0xFF
    damaged.write_bytes(bytes(data))
    code, err = _cli_in_process(["report", out], capsys)
    assert code == 2 and "Traceback" not in err
    assert damaged.name in err and "--resume" in err and len(err.strip().splitlines()) == 1
    assert _cli_in_process(["run", study, "--out", out, "--resume", "--quiet"], capsys)[0] == 0
    assert comparable(json.loads((out / "summary.json").read_text())) == comparable(whole)
    assert _cli_in_process(["report", out], capsys)[0] == 0


@pytest.mark.parametrize("name, text, told", [
    ("summary.json", "{", "not valid JSON"),
    ("summary.json", "", "not valid JSON"),
    ("summary.json", "[]", "expected a JSON object, found a list"),
    ("summary.json", "{}", "lacks study, seed, samples, criteria, metrics, verdict"),
    # found by probing: a count of another kind was printed as "194048 of many samples"
    ("summary.json", '{"study": "s", "seed": 1, "samples": "many", "criteria": {}, '
                     '"metrics": {}, "verdict": "pass"}', "holds samples (int expected)"),
    ("summary.json", b"\xff\xfe", "not UTF-8 text"),
    ("whatif.json", "{}", "lacks criteria, metrics"),
    ("waveforms.json", "[]", "expected a JSON object"),
])
def test_a_damaged_result_file_is_named_and_the_folder_left_as_it_was(
        write_study, tmp_path, capsys, name, text, told):
    # common practice, no source: a truncated or edited result file gave a JSON traceback, or
    # (an empty object) an empty report with exit 0; the report's plots were removed first
    study = write_study(LINEAR.format(samples=300, chunk=300))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    damaged = out / name
    (damaged.write_bytes if isinstance(text, bytes) else damaged.write_text)(text)
    before[damaged] = damaged.read_bytes()
    code, err = _cli_in_process(["report", out], capsys)
    assert code == 2 and "Traceback" not in err
    assert str(damaged) in err and told in err and "--resume" not in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before


@pytest.mark.parametrize("command, name, key, value, read", [
    (["run"], "summary.json", "yield", "x", "yield"),
    (["whatif", "--pin", "RB=min"], "whatif.json", "pinned_values", 3, "pinned_values"),
    (["choose", "--vary", "RB=E6:100..220"], "choose.json", "tradeoff", {"a": 1}, "tradeoff"),
    # a name of another kind is found where it is looked up
    (["choose", "--vary", "RB=E6:100..220"], "choose.json", "vary", [1], "units.1"),
])
def test_a_saved_value_of_another_kind_is_named_and_the_folder_left_as_it_was(
        tmp_path, capsys, command, name, key, value, read):
    # common practice, no source: found by probing, a saved value of another kind than the
    # command writes ended the report in a traceback, the plots already redrawn
    demo = ROOT / "tolerance" / "demo" / "demo.toml"
    out = tmp_path / "r"
    assert _cli_in_process([command[0], demo, *command[1:], "--samples", "100", "--out", out,
                            "--quiet"], capsys)[0] in (0, 1)
    data = json.loads((out / name).read_text())
    data[key] = value
    (out / name).write_text(json.dumps(data))
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    code, err = _cli_in_process(["report", out], capsys)
    assert code == 2 and "Traceback" not in err
    assert str(out / name) in err and f"found while reading {read}" in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before


def test_dask_backend_without_dask_installed_is_refused(write_study, tmp_path, capsys,
                                                        monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    study = write_study(LINEAR.format(samples=100, chunk=50))
    code, err = _cli_in_process(["run", study, "--backend", "dask", "--out", tmp_path / "r"],
                                capsys)
    assert code == 2 and "Traceback" not in err
    assert "tolerance[dask]" in err and not (tmp_path / "r").exists()


@pytest.mark.parametrize("address", ["tcp://127.0.0.1:9", "no-such-protocol://x"])
def test_an_unreachable_scheduler_is_named_and_leaves_nothing(write_study, tmp_path, capsys,
                                                              address):
    pytest.importorskip("distributed")
    import dask

    study = write_study(LINEAR.format(samples=100, chunk=50))
    # loopback port 9 (discard) has no scheduler; a short connect timeout keeps the test fast
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        code, err = _cli_in_process(["run", study, "--backend", "dask", "--scheduler", address,
                                     "--out", tmp_path / "r"], capsys)
    assert code == 2 and "Traceback" not in err
    assert "cannot reach the dask scheduler" in err and address in err
    assert not (tmp_path / "r").exists()


def test_an_unreachable_scheduler_with_force_keeps_the_old_results(write_study, tmp_path,
                                                                   capsys):
    # the folder was emptied for the new run before the scheduler was found unreachable
    pytest.importorskip("distributed")
    import dask

    study = write_study(LINEAR.format(samples=100, chunk=50))
    out = tmp_path / "r"
    assert _cli_in_process(["run", study, "--out", out, "--quiet"], capsys)[0] == 0
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        for extra in (["--force"], ["--resume"]):
            code, err = _cli_in_process(["run", study, "--backend", "dask", "--scheduler",
                                         "tcp://127.0.0.1:9", "--out", out, "--quiet",
                                         *extra], capsys)
            assert code == 2 and "Traceback" not in err
            assert "cannot reach the dask scheduler" in err
    assert {p: p.read_bytes() for p in out.rglob("*") if p.is_file()} == before


class _StageDyingInWorkers:
    """Wraps a stage: evaluating in any process but the one that made it ends that process
    at once, as the system's out-of-memory killer or a crash would."""

    def __init__(self, stage):
        self._stage, self._parent = stage, os.getpid()

    def __getattr__(self, name):
        if name.startswith("_"):  # while unpickling, before __dict__ is filled
            raise AttributeError(name)
        return getattr(self._stage, name)

    def evaluate(self, samples):
        if os.getpid() != self._parent:
            os._exit(1)
        return self._stage.evaluate(samples)


def test_a_worker_that_dies_ends_the_run_with_a_clear_message(write_study, tmp_path, capsys,
                                                              monkeypatch):
    import dataclasses

    import cloudpickle

    import tolerance.cli as cli

    cloudpickle.register_pickle_by_value(sys.modules[__name__])  # workers cannot import tests
    study = load_study(write_study(LINEAR.format(samples=4000, chunk=1000)))
    dying = dataclasses.replace(study, stage=_StageDyingInWorkers(study.stage))
    monkeypatch.setattr(cli, "_load", lambda path: dying)
    out = tmp_path / "r"
    code, err = _cli_in_process(["run", "any.toml", "--jobs", "2", "--out", out, "--quiet"],
                                capsys)
    assert code == 2 and "Traceback" not in err
    assert "worker process" in err and "--resume" in err
    assert not (out / "summary.json").exists()
    # in this process the stage works: the run resumes to the plain run's result
    resumed = run(dying, out=out, resume=True)
    assert comparable(resumed.summary) == comparable(run(study).summary)


def test_a_study_that_is_no_file_is_refused_before_it_is_read(tmp_path, capsys):
    # /dev/zero never ends and a folder is no file: both refused at once, naming the path
    for path in ("/dev/zero", tmp_path):
        code, err = _cli_in_process(["check", path], capsys)
        assert code == 2 and f"{path}: is not a regular file" in err
    # a file far larger than any study is refused unread (common practice, no source)
    big = tmp_path / "big.toml"
    big.write_bytes(b"#" * (5 * 2**20))
    code, err = _cli_in_process(["check", big], capsys)
    assert code == 2 and "big.toml: is larger than 4 MiB" in err


def test_a_byte_order_mark_is_read_as_nothing(tmp_path, capsys):
    demo = ROOT / "tolerance" / "demo" / "demo.toml"
    bom = tmp_path / "bom.toml"
    bom.write_bytes(b"\xef\xbb\xbf" + demo.read_bytes())
    assert load_study(bom).title == load_study(demo).title
    assert _cli_in_process(["check", bom], capsys)[0] == 0


def test_jobs_and_out_that_cannot_be_meant_are_refused(tmp_path, capsys):
    import os

    from tolerance.cli import JOBS_PER_CORE

    too_many = JOBS_PER_CORE * (os.cpu_count() or 1) + 1
    # refused as argparse refuses any bad argument: exit status 2 and a usage line
    with pytest.raises(SystemExit) as stop:
        _cli_in_process(["run", "--jobs", too_many, "--samples", "8", "--out",
                         tmp_path / "o"], capsys)
    err = capsys.readouterr().err
    assert stop.value.code == 2 and "argument --jobs: at most" in err
    assert not (tmp_path / "o").exists()
    with pytest.raises(SystemExit) as stop:
        _cli_in_process(["run", "--out", "", "--samples", "8"], capsys)
    assert stop.value.code == 2 and "argument --out: expected a folder" in capsys.readouterr().err
    # the Python API keeps the same limit (a review's study.run(jobs=99) started them all)
    with pytest.raises(UsageError, match=r"jobs must be at most .* per core\), got"):
        run(load_study(None), samples=8, jobs=too_many)


@pytest.mark.skipif(sys.platform == "win32", reason="advisory folder locks are POSIX flock")
def test_a_folder_another_command_writes_is_refused(write_study, tmp_path):
    # two resumes of one folder at once deleted each other's temporary files; the second now
    # stops at once, and the lock goes with the process that held it (common practice, no
    # source)
    study = load_study(write_study(LINEAR.format(samples=3000, chunk=500)))
    run(study, out=tmp_path / "r")
    holder = subprocess.Popen(
        [sys.executable, "-c", "import fcntl, os, sys, time\n"
         "fd = os.open(sys.argv[1], os.O_RDONLY); fcntl.flock(fd, fcntl.LOCK_EX)\n"
         "print('held', flush=True); time.sleep(60)", str(tmp_path / "r")],
        stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(UsageError, match=r"r: is being written by another command"):
            run(study, out=tmp_path / "r", resume=True)
    finally:
        holder.kill()
        holder.communicate()
    assert run(study, out=tmp_path / "r", resume=True).summary["samples"] == 3000


def test_an_interrupt_while_plots_are_drawn_leaves_no_temporary_file(tmp_path, monkeypatch,
                                                                      capsys):
    # a plot worker stopped by Ctrl-C cannot remove its own temporary file; the command does
    from tolerance import report

    def interrupted(out, jobs=1):
        (Path(out) / "plots").mkdir(exist_ok=True)
        (Path(out) / "plots" / "hist-vce_on.png.tmp").write_bytes(b"half a picture")
        raise KeyboardInterrupt

    monkeypatch.setattr(report, "write_reports", interrupted)
    code, err = _cli_in_process(["run", "--samples", "50", "--out", tmp_path / "o",
                                 "--quiet"], capsys)
    assert code == 130 and "interrupted" in err
    assert not list((tmp_path / "o").rglob("*.tmp"))
    assert (tmp_path / "o" / "summary.json").is_file()


@pytest.mark.parametrize("title", ["x" * 201, "line\\nbreak", "nul\\u0000here",
                                   "right\\u202eto left"])
def test_a_title_that_is_no_heading_is_refused(write_study, title):
    # a 2 MB title kept the plots drawing for minutes; a NUL went raw into the reports
    text = LINEAR.format(samples=10, chunk=10).replace(
        'stage = "linear_test"', f'stage = "linear_test"\ntitle = "{title}"')
    load_study(write_study(text.replace(title, "x" * 200)))  # the longest one allowed
    load_study(write_study(text.replace(title, "12\u00a0V heater")))  # a no-break space
    with pytest.raises(StudyError, match=r"title: expected one line of at most 200"):
        load_study(write_study(text))
