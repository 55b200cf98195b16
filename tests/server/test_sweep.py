"""Parameter corners (server/runs/plan.py and server/runs/batch.py): values, the grid and its sampling, the preview
of a file of generator functions, and sweeps run end to end through real children and
through the ``latchwatch`` command.

The generator draws a P+ diffusion ``fingers * 1.5 + 0.5`` um long with one contacted
n-well tap ending 1 um left of it. The farthest point of the diffusion lies
``fingers * 1.5 + 1.5`` um from the tap (its far end, level with the tap), so against
the demo technology's 20 um limit (invented, docs/technology.md) 1 and 4 fingers pass
(3.0, 7.5 um) and 16 fingers fail (25.5 um). Zero fingers raises.
"""

from __future__ import annotations

import io
import json
import shutil
import subprocess
import sys
import textwrap
from dataclasses import replace
from pathlib import Path

import pytest

from latchwatch.server.config import techfiles
from latchwatch.server.config.project import ProjectConfig, SweepSpec, load_project_config
from latchwatch.server.report.as_json import report_to_dict
from latchwatch.server.runs import batch as sweep
from latchwatch.server.runs import plan
from latchwatch.server.runs.pipeline import CheckSettings

from builders import DIFFUSION_LINE, GENERATOR, RAISE_LINE


@pytest.fixture
def project(tmp_path):
    (tmp_path / "latchwatch.toml").write_text('tech = "demo"\n')
    (tmp_path / "fingers.py").write_text(GENERATOR)
    return tmp_path


@pytest.fixture
def settings(project):
    return CheckSettings(tech=techfiles.load_technology("demo", project), timeout=20, project_root=project)


def latchwatch(*args, cwd, timeout=180):
    exe = Path(sys.executable).with_name("latchwatch")
    cmd = [str(exe) if exe.exists() else shutil.which("latchwatch"), *args]
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout)


def _comparable(report, base):
    """The JSON report without the run times, which differ between any two runs."""
    document = report_to_dict(report, base=base)
    for run in document["runs"]:
        run["seconds"] = None
    return document


# --- values, grid, sampling ---------------------------------------------------------

@pytest.mark.parametrize("text, value", [
    ("16", 16), ("-3", -3), ("+2", 2), ("0.5", 0.5), ("5.", 5.0), (".25", 0.25), ("1e-3", 1e-3),
    ("true", True), ("False", False), ("'16'", "16"), ('"true"', "true"), ("fast", "fast"),
    ("nan", "nan"), (" 4 ", 4), ("0x10", "0x10"),
])
def test_param_values_take_the_documented_types(text, value):
    parsed = plan.parse_value(text)
    assert parsed == value and type(parsed) is type(value)


def test_param_text_and_its_errors():
    assert plan.parse_param("fingers=1,4,16") == ("fingers", [1, 4, 16])
    assert plan.parse_param("w=0.5,5") == ("w", [0.5, 5])
    for bad, words in (("fingers", "NAME=V1,V2"), ("2x=1", "identifier"), ("w=1,,2", "empty value"), ("w=", "empty")):
        with pytest.raises(plan.SweepError, match=words):
            plan.parse_param(bad)
    with pytest.raises(plan.SweepError, match="given twice"):
        plan.ad_hoc_sweep(Path("g.py"), "f", ["w=1", "w=2"])


def test_param_commas_inside_quotes_belong_to_the_value():
    assert plan.parse_param("label='a,b',c") == ("label", ["a,b", "c"])
    assert plan.parse_param('label="x, y", \'1,2\'') == ("label", ["x, y", "1,2"])
    assert plan.parse_param("note=it's,fine") == ("note", ["it's", "fine"])  # a quote opens only a value
    with pytest.raises(plan.SweepError, match="not closed"):
        plan.parse_param("label='a,b")


def test_the_grid_varies_the_last_parameter_fastest():
    assert plan.corner_grid({"fingers": [1, 4], "w": [0.5, 5.0]}) == [
        {"fingers": 1, "w": 0.5}, {"fingers": 1, "w": 5.0}, {"fingers": 4, "w": 0.5}, {"fingers": 4, "w": 5.0}]


def test_sampling_keeps_every_minimum_and_maximum_and_is_repeatable():
    params = {"fingers": [4, 1, 16, 8, 2], "w": [0.5, 5.0, 2.0], "mode": ["slow", "mid", "fast"]}
    for count in range(2, 12):
        sample = plan.sample_corners(params, count)
        assert len(sample) == count and len({json.dumps(c) for c in sample}) == count
        assert {"fingers": 1, "w": 0.5, "mode": "slow"} in sample  # the lowest corner
        assert {"fingers": 16, "w": 5.0, "mode": "fast"} in sample  # the highest: strings by their order
        assert sample == plan.sample_corners(params, count)
        grid = plan.corner_grid(params)
        assert [grid.index(c) for c in sample] == sorted(grid.index(c) for c in sample)
    # After the two ends come the other combinations of extremes (2 x 2 x 2 - 2 = 6 of them).
    extremes = {"fingers": (1, 16), "w": (0.5, 5.0), "mode": ("slow", "fast")}
    eight = plan.sample_corners(params, 8)
    assert all(c[name] in values for c in eight for name, values in extremes.items())
    assert plan.sample_corners(params, 100) == plan.corner_grid(params)
    with pytest.raises(plan.SweepError, match="at least 2"):
        plan.sample_corners(params, 1)


def test_tasks_of_a_sweep_without_params_call_the_defaults():
    tasks = plan.sweep_tasks(plan.Sweep(Path("g.py"), "f", {}))
    assert [(t.function, t.corner) for t in tasks] == [("f", {})]


def test_preview_candidates_are_public_functions_callable_without_arguments():
    names = plan.preview_functions(GENERATOR + textwrap.dedent('''
        def _private(n=1):
            return None

        def needs(cell, n=1):
            return cell

        def number(x=1) -> float:
            return 1.0

        def library(*, unit=1e-6, **more) -> "gdstk.Library":
            return None
        '''))
    assert names == ["finger_array", "pitch_of", "wide_pair", "library"]
    assert plan.preview_functions("def broken(:\n") == []


def test_configured_sweeps_check_their_values_and_script(project):
    config = ProjectConfig(root=project, source=project / "latchwatch.toml",
                           sweeps=(SweepSpec(str(project / "fingers.py"), "finger_array", {"fingers": [1, 4]}),))
    (found,) = plan.configured_sweeps(config)
    assert found.params == {"fingers": [1, 4]} and found.where.endswith("latchwatch.toml: sweep[1]")
    import datetime

    dated = replace(config, sweeps=(SweepSpec(str(project / "fingers.py"), "f", {"when": [datetime.date(2024, 1, 1)]}),))
    with pytest.raises(plan.SweepError, match=r"sweep\[1\]\.params\.when: expected numbers"):
        plan.configured_sweeps(dated)
    missing = replace(config, sweeps=config.sweeps + (SweepSpec(str(project / "nope.py"), "f", {"n": [1]}),))
    with pytest.raises(plan.SweepError, match=r"sweep\[2\]\.script: no such file"):
        plan.configured_sweeps(missing)
    # The editor asks only for the open script's sweeps; another sweep's fault does not stop it.
    assert [s.function for s in plan.configured_sweeps(missing, only=project / "fingers.py")] == ["finger_array"]


def test_progress_bar_only_on_a_terminal():
    class Terminal(io.StringIO):
        def isatty(self):
            return True

    plain, terminal = io.StringIO(), Terminal()
    for stream in (plain, terminal):
        bar = sweep.ProgressBar(stream)
        bar.update(1, 4)
        bar.note("a note")
        bar.update(4, 4)
        bar.close()
    assert plain.getvalue() == "a note\n"
    text = terminal.getvalue()
    assert "] 1/4 runs" in text and "] 4/4 runs" in text and "a note\n" in text
    assert text.endswith("\r")  # the bar line is cleared at the end


# --- end to end, through real children -----------------------------------------------

def test_only_the_high_finger_count_breaks(project, settings):
    chosen = plan.ad_hoc_sweep(project / "fingers.py", "finger_array", ["fingers=1,4,16", "w=0.5,5"])
    report = sweep.check_all([project / "fingers.py"], settings, [chosen], jobs=2)
    document = report_to_dict(report, base=project)
    assert [(r["corner"], r["status"], r["cells"]) for r in document["runs"]] == [
        ({"fingers": f, "w": w}, "ok", 1) for f in (1, 4, 16) for w in (0.5, 5)]
    assert all(r["seconds"] > 0 for r in document["runs"])
    failing = [(f["rule"], f["line"], f["corner"], f["value"]) for f in document["findings"]]
    assert failing == [("tap-distance", DIFFUSION_LINE, {"fingers": 16, "w": w}, pytest.approx(25.5, abs=1e-6))
                       for w in (0.5, 5)]


def test_a_corner_that_raises_is_its_own_script_error(project, settings):
    chosen = plan.ad_hoc_sweep(project / "fingers.py", "finger_array", ["fingers=0,4,16"])
    report = report_to_dict(sweep.check_all([project / "fingers.py"], settings, [chosen], jobs=2), base=project)
    assert [(r["corner"], r["status"]) for r in report["runs"]] == [
        ({"fingers": 0}, "error"), ({"fingers": 4}, "ok"), ({"fingers": 16}, "ok")]
    assert [(f["rule"], f["line"], f["corner"]) for f in report["findings"]] == [
        ("script-error", RAISE_LINE, {"fingers": 0}), ("tap-distance", DIFFUSION_LINE, {"fingers": 16})]
    assert "fingers must be at least 1, got 0" in report["findings"][0]["message"]


def test_parallel_runs_give_the_serial_report(project, settings):
    chosen = plan.ad_hoc_sweep(project / "fingers.py", "finger_array", ["fingers=0,1,8,14,16", "w=0.5,5"])
    paths = [project / "fingers.py"]
    serial = sweep.check_all(paths, settings, [chosen], jobs=1)
    parallel = sweep.check_all(paths, settings, [chosen], jobs=4)
    assert _comparable(serial, project) == _comparable(parallel, project)
    assert len(serial.runs) == 10 and {f.corner["fingers"] for f in serial.findings} == {0, 14, 16}


def test_a_file_of_generator_functions_is_previewed(project, settings):
    report = sweep.check_all([project / "fingers.py"], settings, [], jobs=2)
    # finger_array() (4 fingers) is clean, wide_pair() draws 16 fingers; pitch_of returns a float.
    assert [(r.corner, r.cells) for r in report.runs] == [({}, 1), ({}, 1)]
    assert [r.function for r in report.runs] == ["finger_array", "wide_pair"]  # told apart in JSON runs
    (finding,) = report.findings
    assert (finding.rule, finding.line, finding.cell) == ("tap-distance", DIFFUSION_LINE, "FINGERS_16")
    # A script that builds something itself is not previewed.
    (project / "built.py").write_text(GENERATOR + "\nfinger_array(16)\n")
    built = sweep.check_all([project / "built.py"], settings, [], jobs=2)
    assert [r.corner for r in built.runs] == [None] and [f.line for f in built.findings] == [DIFFUSION_LINE]


def test_cancelled_sweep_returns_nothing(project, settings):
    import threading

    cancel = threading.Event()
    cancel.set()
    chosen = plan.ad_hoc_sweep(project / "fingers.py", "finger_array", ["fingers=1,4"])
    assert sweep.check_script(project / "fingers.py", settings, [chosen], cancel=cancel) is None


# --- the command line ----------------------------------------------------------------

def test_command_line_sweep_corners_and_jobs(project):
    run = latchwatch("check", "fingers.py", "--sweep", "finger_array", "--param", "fingers=1,4,8,16",
                     "--param", "w=0.5,2,5", "--corners", "3", "--jobs", "2", "--format", "json", cwd=project)
    assert run.returncode == 1, run.stderr
    report = json.loads(run.stdout)
    corners = [r["corner"] for r in report["runs"]]
    assert len(corners) == 3
    assert {"fingers": 1, "w": 0.5} in corners and {"fingers": 16, "w": 5} in corners
    assert {f["corner"]["fingers"] for f in report["findings"]} == {16}
    assert "checking fingers.py: finger_array at 3 corners" in run.stderr
    assert "\r" not in run.stderr  # no progress bar: stderr is not a terminal
    text = latchwatch("check", "fingers.py", "--sweep", "finger_array", "--param", "fingers=16", cwd=project)
    assert f"fingers.py:{DIFFUSION_LINE}:5: error: " in text.stdout and "(corner fingers=16)" in text.stdout


def test_command_line_sweep_devices_carry_their_corner_and_top_selects_a_cell(project):
    run = latchwatch("check", "fingers.py", "--sweep", "finger_array", "--param", "fingers=1,16", "--devices",
                     "--format", "json", cwd=project)
    report = json.loads(run.stdout)
    rows = {d["corner"]["fingers"]: d for d in report["devices"] if d["kind"] == "pdiff"}
    # The module docstring's analytic distances: fingers * 1.5 + 1.5 um.
    assert rows[1]["tap_distance_um"] == pytest.approx(3.0) and rows[16]["tap_distance_um"] == pytest.approx(25.5)
    assert rows[16]["cell"] == "FINGERS_16"
    chosen = latchwatch("check", "fingers.py", "--sweep", "finger_array", "--param", "fingers=16", "--top",
                        "FINGERS_16", "--format", "json", cwd=project)
    assert chosen.returncode == 1 and json.loads(chosen.stdout)["findings"][0]["cell"] == "FINGERS_16"
    missing = latchwatch("check", "fingers.py", "--sweep", "finger_array", "--param", "fingers=16", "--top", "NOPE",
                         cwd=project)
    assert missing.returncode == 2 and "no cell named 'NOPE'" in missing.stderr and "FINGERS_16" in missing.stderr


def test_command_line_runs_the_configured_sweep(project):
    (project / "latchwatch.toml").write_text(textwrap.dedent('''\
        tech = "demo"
        include = ["*.py"]

        [[sweep]]
        script = "fingers.py"
        function = "finger_array"
        params = { fingers = [1, 16], w = [2.0] }
        '''))
    assert load_project_config(project / "latchwatch.toml").sweeps  # the file parses
    for args in (["fingers.py"], []):
        run = latchwatch("check", *args, "--format", "json", cwd=project)
        report = json.loads(run.stdout)
        assert [r["corner"] for r in report["runs"]] == [{"fingers": 1, "w": 2.0}, {"fingers": 16, "w": 2.0}]
        assert [f["corner"] for f in report["findings"]] == [{"fingers": 16, "w": 2.0}]
    # --sweep replaces the configured sweep of its script.
    adhoc = latchwatch("check", "fingers.py", "--sweep", "finger_array", "--param", "fingers=4", "--format", "json",
                       cwd=project)
    assert [r["corner"] for r in json.loads(adhoc.stdout)["runs"]] == [{"fingers": 4}]


def test_command_line_sweep_usage_errors(project):
    (project / "other.py").write_text("x = 1\n")
    cases = [
        (["fingers.py", "--param", "fingers=1"], "--param needs --sweep"),
        (["fingers.py", "other.py", "--sweep", "finger_array"], "exactly one script"),
        (["fingers.py", "--sweep", "finger_array", "--param", "fingers"], "NAME=V1,V2"),
        (["fingers.py", "--sweep", "finger_array", "--corners", "1"], "at least 2"),
        (["fingers.py", "--sweep", "finger_array", "--jobs", "0"], "--jobs"),
    ]
    for args, words in cases:
        run = latchwatch("check", *args, cwd=project)
        assert run.returncode == 2 and words in run.stderr, (args, run.stderr)
        assert "Traceback" not in run.stderr
