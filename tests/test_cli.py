"""Command line: the demo, exit statuses, --jobs invariance, and malformed studies refused
clearly (exit 2, the key path in the message, no traceback, nothing written)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from fresh_process import run_fresh
from tolerance.api import demo_text
from tolerance.cli import main
from tolerance.summary import comparable

ROOT = Path(__file__).resolve().parent.parent
DEMO = demo_text()


def _study(tmp_path, text, name="bad.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _replace(old: str, new: str) -> str:
    assert old in DEMO, old
    return DEMO.replace(old, new, 1)


# (description, study text, key path expected in the message, extra text expected)
MALFORMED = [
    ("unknown top-level key", "stagee = 1\n" + DEMO, "stagee", "unknown key"),
    ("misspelt stage", _replace('stage = "single"', 'stage = "singel"'), "stage",
     "did you mean 'single'"),
    ("resistance in volts", _replace('value = "150R"', 'value = "150 V"'), "parts.RB.value",
     "resistance"),
    ("negative resistance", _replace('value = "150R"', 'value = "-150R"'), "parts.RB.value",
     ""),
    ("double percent tolerance", _replace('tolerance = "5%"\ntempco', 'tolerance = "5 %%"\ntempco'),
     "parts.RB.tolerance", "not a tolerance"),
    ("tolerance of 100 %", _replace('tolerance = "5%"\ntempco', 'tolerance = "100%"\ntempco'),
     "parts.RB.tolerance", "100 %"),
    # a temperature in the study's own degC, not in kelvin ("353.15 lies outside min..max
    # (253.15..328.15)" was printed)
    ("typ outside the range", _replace('{min = "-20 degC", max = "55 degC"}',
                                       '{min = "-20 degC", max = "55 degC", typ = "80 degC"}'),
     "ambient.temperature.typ", "80 degC lies outside min..max (-20 degC .. 55 degC)"),
    ("min above max", _replace('{min = "-20 degC", max = "55 degC"}',
                               '{min = "85 degC", max = "-20 degC"}'),
     "ambient.temperature.min", "above max"),
    ("NaN value", _replace('value = "150R"', "value = nan"), "parts.RB.value", ""),
    ("infinite supply", _replace('voltage = {nominal = "12 V", tolerance = "10%", '
                                 'distribution = "uniform"}', "voltage = inf"),
     "supply.voltage", ""),
    ("zero samples", _replace("samples = 20000", "samples = 0"), "run.samples", "at least 1"),
    ("misspelt sampler", _replace('sampler = "lhs"', 'sampler = "sobel"'), "run.sampler",
     "did you mean 'sobol'"),
    ("misspelt limit metric", _replace("drive_margin = {min = 1.2", "drive_margn = {min = 1.2"),
     "limits.drive_margn", "did you mean 'drive_margin'"),
    ("limit in wrong unit", _replace('vce_on = {max = "0.4 V"}', 'vce_on = {max = "0.4 ohm"}'),
     "limits.vce_on.max", "voltage"),
    ("misspelt load kind", _replace('kind = "resistor"', 'kind = "resistr"'), "load.kind",
     "did you mean 'resistor'"),
    # common practice, no source: plausible slips answered with what to write
    ("a tolerance without its percent sign", _replace('value = "150R"\ntolerance = "5%"',
                                                       'value = "150R"\ntolerance = "5"'),
     "parts.RB.tolerance", 'write "5%" or 0.05'),
    ("a temperature range written upside down",
     _replace('temperature = {min = "-20 degC", max = "55 degC"}',
              'temperature = {min = "55 degC", max = "-20 degC"}'),
     "ambient.temperature.min", "min (55 degC) is above max (-20 degC)"),
    ("a second transistor on the single stage", DEMO + '\n[parts.Q2]\ndevice = "power_npn"\n',
     "parts.Q2", "the single stage's transistor is 'Q1'"),
    ("a class's high-current gain below a raised minimum",
     _replace('device = "medium_power_npn"', 'device = "medium_power_npn"\nhfe_min = 60'),
     "parts.Q1.hfe_min", "give hfe_high_min for this part as well"),
    ("drift on a discrete set", _replace('value = "150R"\ntolerance = "5%"',
                                          'value = {values = ["150R", "180R"], drift = "1%"}'),
     "parts.RB.value.drift", "put aged values in the set itself"),
    ("a supply in millivolts", _replace('voltage = {nominal = "12 V"', 'voltage = {nominal = "12 mV"'),
     "parts.Q1", "check the supply's value and unit"),
    ("unknown key in a part", _replace('device = "medium_power_npn"',
                                       'device = "medium_power_npn"\nhfe_mn = 30'),
     "parts.Q1.hfe_mn", "unknown key"),
    ("unknown device class", _replace('device = "medium_power_npn"', 'device = "mega_npn"'),
     "parts.Q1.device", "mega_npn"),
    ("gain minimum above maximum", _replace('device = "medium_power_npn"',
                                            'device = "medium_power_npn"\nhfe_min = 300\n'
                                            'hfe_max = 100'), "parts.Q1", "hfe"),
    ("missing load", DEMO[:DEMO.index("[load]")] + DEMO[DEMO.index("[limits]"):], "load",
     "required"),
    ("correlation coefficient out of range", DEMO + '\n[[correlation]]\nparameters = ["RB", '
     '"RPD"]\ncoefficient = 1.2\n', "correlation[0].coefficient", "between -1 and 1"),
    ("string where a table is needed", 'ambient = "hot"\n' + _replace(
        '[ambient]\ntemperature = {min = "-20 degC", max = "55 degC"}', ""), "ambient", "table"),
    ("invalid TOML", DEMO + "\nthis is not toml\n", "", "not valid TOML"),
    ("negative leakage", _replace('device = "medium_power_npn"',
                                  'device = "medium_power_npn"\nicbo_max = "-1 nA"'),
     "parts.Q1", "icbo"),
    # a pair stage's name for the base-emitter resistor suggested 'RB', the closest spelling
    # a study's hfe_max below its class's hfe_min was blamed on the device and hfe_min
    ("hfe_max below the class's hfe_min", _replace('device = "medium_power_npn"',
                                                   'device = "medium_power_npn"\nhfe_max = 30'),
     "parts.Q1.hfe_max", "below the device class's hfe_min"),
    # "100 K" for 100 degC: a limit no unit could meet, accepted without a word
    ("temperature limit in kelvin", _replace('off_current = {max = "10 uA"}',
                                             'off_current = {max = "10 uA"}\n'
                                             'tj_output = {max = "100 K"}'),
     "limits.tj_output.max", "-173 degC (100 K) is below any operating temperature"),
    ("PNP where an NPN belongs", _replace('device = "medium_power_npn"',
                                          'device = "small_signal_pnp"'),
     "parts.Q1.device", "this position needs an NPN transistor"),
    ("pair stage's resistor name", _replace("[parts.RPD]", "[parts.RBE1]"), "parts.RBE1",
     "the single stage's base-emitter resistor is 'RPD'"),
    # a misspelt key was offered only the keys the file holds, so a key it lacks (the run's
    # seed, a part's hfe_min) was never suggested
    ("misspelt run key the file lacks", _replace("seed = 2026", "sed = 2026"), "run.sed",
     "did you mean 'seed'"),
    ("misspelt table", _replace("[ambient]", "[ambiant]"), "ambiant", "did you mean 'ambient'"),
    ("misspelt part key", _replace('device = "medium_power_npn"',
                                   'device = "medium_power_npn"\nhfe_mim = 30'),
     "parts.Q1.hfe_mim", "did you mean 'hfe_min'"),
    ("misspelt toleranced key", _replace('tempco = "200 ppm/K"', 'tempcoo = "200 ppm/K"'),
     "parts.RB.tempcoo", "did you mean 'tempco'"),
]


@pytest.mark.parametrize("name,text,key,extra", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_malformed_study_is_refused(tmp_path, capsys, name, text, key, extra):
    path = _study(tmp_path, text)
    out = tmp_path / "out"
    code = main(["run", str(path), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert str(path) in err
    assert key in err
    assert extra.lower() in err.lower()
    assert "Traceback" not in err
    assert not out.exists()


def test_malformed_study_through_a_real_process(tmp_path):
    path = _study(tmp_path, _replace('value = "150R"', 'value = "150 V"'))
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-m", "tolerance", "run", str(path), "--out",
                           str(tmp_path / "o")], capture_output=True, text=True, env=env,
                          timeout=120)
    assert proc.returncode == 2
    assert "parts.RB.value" in proc.stderr and "Traceback" not in proc.stderr
    assert not (tmp_path / "o").exists()


def test_checking_or_refusing_a_study_loads_no_statistics_stack(tmp_path):
    bad = _study(tmp_path, _replace('value = "150R"', 'value = "150 V"'))
    code = ("from tolerance.cli import main; "
            "print([main(['check']), main(['check', sys.argv[1]]), "
            "main(['run', sys.argv[1], '--out', sys.argv[2]])])")
    proc = run_fresh(code, bad, tmp_path / "o", modules=("pandas", "scipy.stats",
                                                         "matplotlib"), timeout=120)
    assert proc.returncode == 0, proc.stderr
    # common practice, no source: pandas and scipy.stats took 1.4 s of the command's 2 s
    # start here; checking a study, or refusing it, needs neither
    lines = proc.stdout.splitlines()
    assert lines[-2] == "[0, 2, 2]" and lines[-1] == ""
    assert "parts.RB.value" in proc.stderr
    assert not (tmp_path / "o").exists()


def test_bad_option_values_exit_2(tmp_path, capsys, write_study):
    fixed = write_study(FIXED_DEMO)
    for argv in (["run", "--samples", "0"], ["run", "--sampler", "grid"],
                 ["run", "--jobs", "-1"], ["whatif", "--pin", "Q9.hfe=min"],
                 ["choose", "--vary", "RB=E25:100..1k"], ["report", str(tmp_path)],
                 # found by probing the analysis commands: each was refused only after the
                 # output folder was made (left empty), or ended in a traceback
                 ["whatif", "--pin", "load.resistance=0"], ["whatif", "--pin", "Q1.hfe=0"],
                 ["choose", "--vary", "RB=E12:100..220", "--tradeoff", "foo,bar"],
                 ["choose", "--vary", "RB=E12:100..220", "--vary", "RB=E6:100..220"],
                 ["choose", "--vary", "RB=E12:100..220", "--tradeoff", ","],
                 ["choose", "--vary", "ambient.temperature=E3:-60..300"],
                 ["sensitivity", "--sobol-samples", "1"],
                 ["sensitivity", "--sobol-samples", "32"],
                 ["sensitivity", str(fixed), "--sobol-samples", "64"],
                 # found by probing: 2^40 rows asked for 208 TiB and ended in a traceback
                 # (after making the folder); the command line took any sample count the
                 # study file refuses (a run of 10^9 + 1 wrote 3.4 GB in 8 minutes)
                 ["sensitivity", "--sobol-samples", str(2**40)],
                 ["sensitivity", "--sobol-samples", str(2**19)],
                 ["run", "--samples", str(10**9 + 1)], ["whatif", "--samples", "2e9"],
                 ["run", "--chunk-size", str(10**7 + 1)],
                 ["run", ""], ["report", ""], ["report", str(tmp_path / "none")],
                 ["report", str(fixed)]):
        with pytest.raises(SystemExit) as exc:
            code = main(argv + ["--out", str(tmp_path / "o")] if argv[0] != "report" else argv)
            raise SystemExit(code)
        assert exc.value.code == 2, argv
        err = capsys.readouterr().err
        assert "Traceback" not in err and err.count("\n") == 1, argv
        assert not (tmp_path / "o").exists(), argv
    # the two that are not there or not a folder say so, not "holds no saved results"
    for argv, told in ((["report", str(tmp_path / "none")], "does not exist"),
                       (["report", str(fixed)], "is not a folder"),
                       (["run", ""], "the study argument is empty")):
        assert main(argv) == 2 and told in capsys.readouterr().err
    # the range's ends and a number with underscores are taken
    from tolerance.cli import _sobol_rows
    assert _sobol_rows("262144") == 262144 and _sobol_rows("64") == 64
    assert _sobol_rows("1_024") == 1024
    # found by a review: 0 and -64 were told "expected at least 1", not the range that holds
    for argv, told in ((["sensitivity", "--sobol-samples", "0"],
                        "--sobol-samples: expected a power of two from 64 to 262,144 (e.g. "
                        "1024), got 0"),
                       (["sensitivity", "--sobol-samples=-64"], "power of two from 64"),
                       (["sensitivity", "--sobol-samples", "x"], "got 'x'")):
        with pytest.raises(SystemExit) as exc:
            main(argv)
        assert exc.value.code == 2 and told in capsys.readouterr().err


# the demo with nothing that varies (every part and condition fixed)
FIXED_DEMO = """
stage = "single"
[supply]
voltage = "12 V"
[drive]
high = "3.3 V"
[parts.RB]
value = "150R"
[parts.Q1]
device = "medium_power_npn"
hfe = "100"
icbo = "10 nA"
[load]
kind = "resistor"
resistance = "68 ohm"
"""


def test_demo_runs_and_jobs_do_not_change_the_summary(tmp_path, capsys):
    a, b = tmp_path / "a", tmp_path / "b"
    assert main(["run", "--samples", "3000", "--out", str(a), "--jobs", "1"]) == 0
    assert "verdict: PASS" in capsys.readouterr().out
    assert main(["run", "--samples", "3000", "--out", str(b), "--jobs", "2",
                 "--chunk-size", "700", "--quiet"]) == 0
    out = capsys.readouterr().out
    sa = json.loads((a / "summary.json").read_text())
    sb = json.loads((b / "summary.json").read_text())
    assert comparable(sa) == comparable(sb)
    for key in ("tool_version", "study", "study_hash", "seed", "samples", "sampler", "yield",
                "criteria", "metrics", "not_converged", "saturation_failure_rate"):
        assert key in sa
    assert {"estimate", "ci_low", "ci_high", "confidence"} <= set(sa["yield"])
    assert {"unit", "mean", "std", "min", "max", "p001", "p50", "p999"} <= set(
        sa["metrics"]["drive_margin"])
    # the file says what its figures are in: a junction of the demo (-20 to 55 degC ambient)
    # sits between 250 and 400 K, as the unit note says kelvin
    assert "kelvin" in sa["units"] and sa["metrics"]["tj_output"]["unit"] == "temperature"
    assert 250.0 < sa["metrics"]["tj_output"]["min"] < sa["metrics"]["tj_output"]["max"] < 400.0
    assert (a / "samples.parquet").is_dir() and (a / "report.html").is_file()
    assert out == ""  # --quiet printed nothing


def test_failing_limit_exits_1(tmp_path, capsys):
    path = _study(tmp_path, _replace("drive_margin = {min = 1.2", "drive_margin = {min = 4"))
    assert main(["run", str(path), "--samples", "500", "--out", str(tmp_path / "o"),
                 "--quiet"]) == 1


def test_check_prints_parameter_table(capsys):
    assert main(["check"]) == 0
    out = capsys.readouterr().out
    for name in ("RB", "Q1.hfe", "supply.voltage", "ambient.temperature", "saturation"):
        assert name in out
    # the metrics with their units and meaning, as the README says (the hot-spot codes)
    metrics = _block(out, "metric ")
    assert len(metrics) == 1 + 22
    assert any(r.startswith("hot_spot ") and "0=Q1, 1=RB, 2=RPD" in r for r in metrics)
    assert any(r.split()[:2] == ["tj_output", "degC"] for r in metrics)


def test_check_says_which_defaults_take_the_studys_limit(capsys):
    # the valve study's [limits] replace the saturation and pull-in defaults' limits, which
    # keep their names and places; the listing said "stage" beside the study's own figure
    # (a new user's walk)
    root = Path(__file__).resolve().parents[1]
    assert main(["check", str(root / "studies" / "irrigation_valve_single.toml")]) == 0
    rows = {r.split()[0]: r for r in _block(capsys.readouterr().out, "criterion ")[1:]}
    assert rows["saturation"].endswith(">= 1.5       stage, limit from [limits]")
    assert rows["coil_operates"].endswith("stage, limit from [limits]")
    assert rows["stays_off"].endswith(" stage")
    assert rows["off_current"].endswith(" study")
    assert rows["tj_max_output"].endswith(" rating")


def _block(out: str, header_start: str) -> list[str]:
    """The header line that starts with ``header_start`` and the rows under it."""
    lines = out.splitlines()
    i = next(k for k, line in enumerate(lines) if line.startswith(header_start))
    block = [lines[i]]
    for line in lines[i + 1:]:
        if not line.strip():
            break
        block.append(line)
    return block


def _assert_left_columns(block: list[str], names: tuple[str, ...]) -> None:
    # common practice, no source: a left-aligned column's cells start where its heading
    # does, after the two spaces that end the column before it
    for name in names:
        at = block[0].index(name)
        for row in block[1:]:
            assert row[at - 2:at] == "  " and row[at] != " ", (name, row)


def test_tables_are_as_wide_as_their_longest_cell(tmp_path, capsys):
    from tolerance.cli import _table

    text = _table(("name", "value"), [("a", "1.5 V"), ("a_much_longer_name", "12 mV")], "<>")
    # right-aligned cells end together, left-aligned ones start together
    assert text.splitlines() == ["name                value",
                                 "a                   1.5 V",
                                 "a_much_longer_name  12 mV"]
    assert main(["run", "--samples", "300", "--out", str(tmp_path / "o")]) == 0
    out = capsys.readouterr().out
    # the demo's longest metric (power_stress_output) used to run into the limit column
    _assert_left_columns(_block(out, "criterion"), ("metric", "limit"))
    for study in ("beacon_lamp_darlington.toml", "shelf_led_sziklai.toml"):
        assert main(["check", str(ROOT / "studies" / study)]) == 0
        out = capsys.readouterr().out
        _assert_left_columns(_block(out, "parameter"), ("distribution", "unit"))
        _assert_left_columns(_block(out, "criterion"), ("metric", "limit", "from"))


def test_a_closed_pipe_ends_the_command_quietly():
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-m", "tolerance", "parts"], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()  # the reader is gone before the command writes (``| head -0``)
    with proc.stderr:
        err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 141
    assert "Traceback" not in err and "Broken pipe" not in err, err


def test_a_broken_pipe_of_something_else_is_not_taken_for_the_reader(monkeypatch, capsys):
    import tolerance.cli as cli

    def broken(args):
        raise BrokenPipeError("a worker's pipe")

    # common practice, no source: only our own output's reader going away ends quietly;
    # any other broken pipe is an error that must surface
    monkeypatch.setitem(cli.COMMANDS, "parts", broken)
    with pytest.raises(BrokenPipeError, match="worker"):
        main(["parts"])


def test_parts_lists_the_library(capsys):
    assert main(["parts"]) == 0
    out = capsys.readouterr().out
    for name in ("small_signal_npn", "small_signal_pnp", "medium_power_npn", "power_npn",
                 "monolithic_darlington"):
        assert name in out
    # each class's charge storage, which sets the switching times, is listed with it; the
    # monolithic pair's tau_s at its output die's gain
    blocks = out.split("\n\n")
    medium = next(b for b in blocks if b.startswith("medium_power_npn"))
    assert "transit_times          1.5 ns / 300 ns" in medium
    assert "storage_time_constant  871 ns" in medium
    assert sum("charge storage" in b for b in blocks) == 5


def test_default_output_folder_is_never_overwritten(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["run", "--samples", "200", "--quiet"]) == 0
    assert main(["run", "--samples", "200", "--quiet"]) == 0
    assert (tmp_path / "results" / "demo" / "summary.json").is_file()
    assert (tmp_path / "results" / "demo-2" / "summary.json").is_file()
    # common practice, no source: --resume without --out continues the last of them (the
    # folder an interrupt left), where it started a third run afresh in demo-3
    stamp = (tmp_path / "results" / "demo-2" / "summary.json").stat().st_mtime_ns
    assert main(["run", "--samples", "200", "--quiet", "--resume"]) == 0
    assert not (tmp_path / "results" / "demo-3").exists()
    assert (tmp_path / "results" / "demo-2" / "summary.json").stat().st_mtime_ns != stamp
    # an interrupt keeps even an empty folder: that one is the run to continue, not the
    # finished run before it; and --force never empties a default folder
    (tmp_path / "results" / "demo-3").mkdir()
    assert main(["run", "--samples", "200", "--quiet", "--resume", "--force"]) == 2
    assert "--resume --force needs --out" in capsys.readouterr().err
    assert main(["run", "--samples", "300", "--quiet", "--resume"]) == 0
    assert (tmp_path / "results" / "demo-3" / "summary.json").is_file()
    assert (tmp_path / "results" / "demo-2" / "summary.json").stat().st_mtime_ns != stamp



def test_default_output_folder_keeps_a_study_name_with_spaces(tmp_path, monkeypatch):
    # "my heater.toml" ran into results/heater: the name was split at its space
    monkeypatch.chdir(tmp_path)
    study = tmp_path / "my heater.toml"
    study.write_text((ROOT / "tolerance" / "demo" / "demo.toml").read_text(encoding="utf-8"),
                     encoding="utf-8")
    assert main(["check", str(study)]) == 0
    assert main(["run", str(study), "--samples", "100", "--quiet"]) == 0
    assert sorted(p.name for p in (tmp_path / "results").iterdir()) == ["my heater"]


def test_whatif_pin_that_leaves_a_metric_without_a_finite_value(tmp_path, capsys):
    # at 200 degC every stress metric of the demo is infinite in the pinned run: the overlay
    # plot raised, and the command ended in a traceback with no report
    out = tmp_path / "w"
    code = main(["whatif", "--samples", "40", "--pin", "ambient.temperature=200 degC",
                 "--out", str(out), "--quiet"])
    assert code == 1 and "Traceback" not in capsys.readouterr().err
    assert (out / "report.md").is_file() and (out / "plots" / "whatif-tj_output.png").is_file()


def test_sobol_run_off_a_power_of_two_notes_it_in_console_and_report(tmp_path, capsys):
    # scipy.stats.qmc.Sobol documentation: the balance needs a power of two samples
    out = tmp_path / "o"
    assert main(["run", "--samples", "300", "--sampler", "sobol", "--out", str(out)]) == 0
    assert "--samples 512 (or 256) gives the balanced design" in capsys.readouterr().out
    assert "--samples 512 (or 256)" in (out / "report.md").read_text(encoding="utf-8")


def test_ambient_above_a_transistor_tj_max_is_noted_by_check_and_run(tmp_path, capsys):
    # a transistor above its T_j max fails the rating whatever the circuit does (the
    # datasheet's absolute maximum; common practice, no source): the study is valid, so
    # check and run accept it, and both say so before any result
    hot = _replace('temperature = {min = "-20 degC", max = "55 degC"}',
                   'temperature = {min = "140 degC", max = "160 degC"}')
    path = _study(tmp_path, hot)
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "note: The ambient reaches 160 degC, above the T_j max of Q1 (150 degC)" in out
    assert main(["run", str(path), "--samples", "50", "--out", str(tmp_path / "o")]) == 1
    assert "above the T_j max of Q1" in capsys.readouterr().err
    # the shipped demo says nothing of it
    assert main(["check"]) == 0 and "note:" not in capsys.readouterr().out


def test_messages_point_to_what_the_command_can_do(tmp_path, capsys):
    # an analysis has no --resume, so its messages do not suggest it; a monolithic pair
    # named without monolithic = true was answered "parts.Q1: is required but missing"
    out = tmp_path / "w"
    assert main(["whatif", "--pin", "Q1.hfe=min", "--samples", "20", "--out", str(out),
                 "--quiet"]) in (0, 1)
    capsys.readouterr()
    assert main(["whatif", "--pin", "Q1.hfe=max", "--samples", "20", "--out", str(out),
                 "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "already holds results" in err and "--force" in err and "--resume" not in err
    text = (ROOT / "studies" / "engine_bay_heater_darlington.toml").read_text(encoding="utf-8")
    path = _study(tmp_path, text.replace("monolithic = true\n", ""), "mono.toml")
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert "parts.Q2.device" in err and "add monolithic = true" in err


def test_an_interrupted_analysis_leaves_no_empty_folder(tmp_path, capsys, monkeypatch,
                                                        write_study):
    # found by probing: a what-if, worst case, sensitivity or choice stopped before its first
    # file left an empty --out folder, which the next command took for a result folder
    import tolerance.whatif

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(tolerance.whatif, "whatif", interrupted)
    out = tmp_path / "w"
    study = str(write_study(FIXED_DEMO.replace('hfe = "100"', 'hfe = {min = 50, max = 200}')))
    assert main(["whatif", study, "--pin", "Q1.hfe=min", "--out", str(out)]) == 130
    assert "nothing is kept" in capsys.readouterr().err
    assert not out.exists()
    # a folder that was there before stays
    out.mkdir()
    assert main(["whatif", study, "--pin", "Q1.hfe=min", "--out", str(out)]) == 130
    assert out.is_dir()


CORRELATED = """
stage = "single"
[ambient]
temperature = {values = ["-20 degC", "25 degC", "55 degC"], weights = [1, 2, 1]}
[supply]
voltage = "12 V"
[drive]
high = "3.3 V"
[parts.RB]
value = "150R"
tolerance = "5%"
[parts.RPD]
value = "1k0"
tolerance = "5%"
[parts.Q1]
device = "medium_power_npn"
[load]
kind = "resistor"
resistance = {nominal = "68 ohm", tolerance = "5%"}
[[correlation]]
parameters = ["RB", "RPD"]
coefficient = 0.9
[[correlation]]
parameters = ["RB", "load.resistance"]
coefficient = 0.9
[[correlation]]
parameters = ["RPD", "load.resistance"]
coefficient = 0.7
"""


def test_check_lists_the_correlations_and_a_sets_members(tmp_path, capsys):
    # the coefficients a reviewer signs off were nowhere in the listing, and a set read
    # "discrete set of 3"
    path = _study(tmp_path, CORRELATED, "corr.toml")
    assert main(["check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "discrete: -20 degC (25 %), 25 degC (50 %), 55 degC (25 %)" in out
    rows = _block(out, "parameters ")
    assert [r.split() for r in rows[1:]] == [["RB,", "RPD", "+0.9"],
                                            ["RB,", "load.resistance", "+0.9"],
                                            ["RPD,", "load.resistance", "+0.7"]]
    assert "normal scores" in out


def test_whatif_notes_contradicting_pins_and_keeps_the_inputs_it_moved(tmp_path, capsys):
    # pins RB = max and RPD = min against r = 0.9: the partner load.resistance is drawn at a
    # mean normal score of 3 (0.27 + 0.11) / 0.19 = +6.0 (conditional normal, worked by
    # hand), every unit beyond its tolerance; the run goes ahead and says so
    import pandas as pd

    path = _study(tmp_path, CORRELATED, "corr.toml")
    out = tmp_path / "w"
    assert main(["whatif", str(path), "--pin", "RB=max", "--pin", "RPD=min", "--samples",
                 "200", "--out", str(out)]) == 0
    console = capsys.readouterr().out
    assert "note: The pins contradict the study's correlation" in console
    assert "load.resistance is drawn given them at a mean normal score of +6.0" in console
    data = json.loads((out / "whatif.json").read_text(encoding="utf-8"))
    assert data["pin_notes"] and "+6.0" in data["pin_notes"][0]
    assert "rarer than any unit the study describes" in (out / "report.md").read_text(
        encoding="utf-8")
    frame = pd.read_parquet(out / "whatif_samples.parquet")
    for name in ("RB", "RPD", "load.resistance"):
        assert f"baseline.{name}" in frame and f"pinned.{name}" in frame
    assert "pinned.ambient.temperature" not in frame  # not moved by the pins
    assert (frame["pinned.RB"] == 157.5).all()  # 150 ohm + 5 %
    # the partner from the file: 68 ohm + 6.0 sigma of 68 * 5 % / 3
    score = (frame["pinned.load.resistance"] - 68) / (68 * 0.05 / 3)
    assert score.mean() == pytest.approx(6.0, abs=0.1)


def test_whatif_pin_between_a_sets_members_is_refused(tmp_path, capsys):
    path = _study(tmp_path, CORRELATED, "corr.toml")
    out = tmp_path / "w"
    assert main(["whatif", str(path), "--pin", "ambient.temperature=40 degC", "--out",
                 str(out)]) == 2
    err = capsys.readouterr().err
    assert "ambient.temperature=40 degC" in err and "-20 degC, 25 degC, 55 degC" in err
    assert "Traceback" not in err and not out.exists()


def test_units_that_did_not_converge_are_shown_by_every_analysis(tmp_path, capsys):
    # found by probing: a quarter of the units did not converge and choose printed every
    # candidate at 75 % with "fails most: -" and no word of why, whatif's console said
    # nothing, and sensitivity printed a Sobol total index of 6.7 from outputs replaced by
    # their mean (definition of the yield: a unit that did not converge is a failure)
    text = _replace('device = "medium_power_npn"\n',
                    'device = "medium_power_npn"\n'
                    'icbo = {values = ["10 nA", "300 mA"], weights = [3, 1]}\n')
    study = _study(tmp_path, text, "stuck.toml")
    assert main(["choose", str(study), "--vary", "RB=E6:100..220", "--samples", "200",
                 "--out", str(tmp_path / "c")]) in (0, 1)
    out = capsys.readouterr().out
    assert out.count("not converged 2") == 3  # "fails most" of each candidate, 2x %
    assert "3 of 3 candidates have units whose solve did not converge" in out
    assert "not converged" in (tmp_path / "c" / "report.md").read_text()
    assert main(["whatif", str(study), "--pin", "RB=min", "--samples", "200",
                 "--out", str(tmp_path / "w")]) in (0, 1)
    stuck = json.loads((tmp_path / "w" / "whatif.json").read_text())["not_converged"]
    assert stuck["baseline"] > 0
    assert f"not converged  baseline {stuck['baseline']:,}" in capsys.readouterr().out
    assert main(["sensitivity", str(study), "--samples", "200", "--sobol-samples", "64",
                 "--out", str(tmp_path / "s")]) == 0
    out = capsys.readouterr().out
    saved = json.loads((tmp_path / "s" / "sensitivity.json").read_text())
    assert saved["not_converged"] > 0
    assert "units of the Monte Carlo run did not converge" in out
    assert "Sobol indices withheld for" in out and "drive_margin" in out
    assert all(v["total"] is None for v in saved["sobol"]["drive_margin"].values())


@pytest.mark.parametrize("argv, told", [
    (["whatif", "--pin", "supply.voltage=0.3 V"], "the saturation voltage of Q1"),
    (["whatif", "--pin", "Q1.hfe=0.5"], "current gain I_C / I_B is above 1"),
    (["whatif", "--pin", "Q1.hfe=1"], "must be above 1 "),
    (["choose", "--vary", "Q1.hfe=E12:0.1..10"], "current gain I_C / I_B is above 1"),
    (["choose", "--vary", "supply.voltage=E12:0.1..1"], "the saturation voltage of Q1"),
    # found by a review: a V_BE(sat) below the model's floor was read as the floor
    (["whatif", "--pin", "Q1.vbe_sat=0.6 V"], "the model's V_BE with no base resistance"),
    # a junction's own V_BE(on) (vbe_on_min, vbe_on_max) is a forward voltage
    (["whatif", "--pin", "Q1.vbe_on=-0.1 V"], "Q1.vbe_on=-0.1 V: must be positive"),
])
def test_pins_and_value_choices_meet_the_study_files_checks_of_the_parts(tmp_path, capsys,
                                                                          argv, told):
    # found by probing: a supply at or below V_CE(sat) and a gain of 1 or less, both refused
    # in the study file ("could never saturate", "not a transistor's current gain"), ran
    # as pins and value choices and passed every criterion (definition of a transistor's
    # gain I_C / I_B above 1; a stage whose supply is its saturation voltage carries nothing)
    demo = tmp_path / "demo.toml"
    demo.write_text((ROOT / "tolerance" / "demo" / "demo.toml").read_text().replace(
        'device = "medium_power_npn"', 'device = "medium_power_npn"\nvbe_sat_typ = "0.95 V"\n'
                                       'vbe_on_min = "0.68 V"\nvbe_on_max = "0.76 V"'))
    code = main([argv[0], str(demo), *argv[1:], "--samples", "50", "--out",
                 str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err and told in err
    assert not (tmp_path / "x").exists()


def test_an_extreme_limit_draws_its_figures_without_library_warnings(tmp_path):
    # found by probing: a limit of 1e308 overflowed matplotlib's tick arithmetic and its
    # RuntimeWarning, with a file path of the installation, reached the console; the
    # figure itself is drawn (common practice, no source: a console shows the tool's words)
    study = _study(tmp_path, _replace("drive_margin = {min = 1.2",
                                      "drive_margin = {min = 1e308"), "extreme.toml")
    code = ("import sys; from tolerance.cli import main; "
            "sys.exit(main(['run', sys.argv[1], '--samples', '100', '--quiet', '--out', "
            "sys.argv[2]]))")
    proc = run_fresh(code, study, tmp_path / "o")
    assert proc.returncode == 1, proc.stderr  # the limit cannot be met: FAIL, exit 1
    assert "Warning" not in proc.stderr and "Traceback" not in proc.stderr
    assert (tmp_path / "o" / "plots" / "hist-drive_margin.png").is_file()
