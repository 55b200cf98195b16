"""The runner: the child's environment, how runs end, limits, output and process cleanup."""

import ast
import os
import shutil
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path

import pytest

from latchwatch.server.child import stacks
from latchwatch.server.sandbox import runner
from latchwatch.server.sandbox.runner import RunnerError, run_script

from procs import processes_with as _processes_with

linux_only = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")


def _script(tmp_path, body, name="gen.py"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return path




def _token():
    return f"{time.time_ns() % 10**9 + 60}.{os.getpid()}"  # a sleep length no other process uses


def test_ok_run_reports_layout_output_and_sandbox(tmp_path):
    path = _script(tmp_path, """\
        import gdstk
        print("drawing")
        cell = gdstk.Cell("TOP")
        cell.add(gdstk.rectangle((0, 0), (2, 1), layer=3))
        """)
    outcome = run_script(path)
    assert outcome.status == "ok" and outcome.failure is None
    assert outcome.script == str(path)
    assert outcome.output == "drawing\n"
    assert outcome.layout.cells[0].poly_layer.tolist() == [3]
    assert outcome.layout.source == str(path)
    assert outcome.seconds > 0
    # What the entry claims is what the child reported; tests/server/test_sandbox.py checks that
    # each claim holds. The parent's own limits are always there.
    assert set(outcome.sandbox) >= {"network", "writes", "limits", "privileges", "leftovers", "core_dumps"}
    assert outcome.sandbox["limits"][0] == "time" and outcome.sandbox["limits"][-2:] == ["output", "geometry"]
    assert {"cpu", "memory"} <= set(outcome.sandbox["limits"])


def test_a_script_runs_with_the_collector_at_the_layout_pace_and_still_collects_cycles(tmp_path):
    from latchwatch.server.child.collector import THRESHOLDS

    path = _script(tmp_path, """\
        import gc, weakref
        import gdstk
        print(gc.get_threshold())

        class Node:
            pass

        node = Node()
        node.itself = node  # a cycle: only the collector frees it
        gone = weakref.ref(node)
        del node
        gc.collect()
        print(gone() is None)
        gdstk.Cell("TOP").add(gdstk.rectangle((0, 0), (1, 1)))
        """)
    outcome = run_script(path)
    assert outcome.status == "ok" and outcome.output.splitlines() == [str(THRESHOLDS), "True"]


def test_unsaved_source_runs_under_the_files_name(tmp_path):
    path = _script(tmp_path, "raise SystemExit('the file on disk must not run')\n")
    buffer = "import gdstk\n\ncell = gdstk.Cell('BUF')\ncell.add(gdstk.rectangle((0, 0), (1, 1)))\n"
    outcome = run_script(path, source=buffer)
    assert outcome.status == "ok", outcome.failure
    frame = outcome.layout.stack_frames(int(outcome.layout.cells[0].poly_stack[0]))[0]
    assert (frame.file, frame.line) == (str(path), 4)


def test_script_folder_and_project_root_are_importable(tmp_path):
    project = tmp_path / "project"
    cells = project / "cells"
    cells.mkdir(parents=True)
    (cells / "shapes.py").write_text("import gdstk\n\ndef box(cell, layer):\n"
                                     "    cell.add(gdstk.rectangle((0, 0), (1, 1), layer=layer))\n")
    (project / "techlayers.py").write_text("DIFF = 2\n")
    path = _script(cells, "import gdstk\nfrom shapes import box\nfrom techlayers import DIFF\n"
                          "top = gdstk.Cell('T')\nbox(top, DIFF)\n")
    outcome = run_script(path, project_root=project)
    assert outcome.status == "ok", (outcome.failure, outcome.output)
    frames = outcome.layout.stack_frames(int(outcome.layout.cells[0].poly_stack[0]))
    assert [(Path(f.file).name, f.line) for f in frames] == [("shapes.py", 4), ("gen.py", 5)]
    assert run_script(path).status == "error"  # without the project root techlayers is not found


def test_runs_as_main_in_a_fresh_folder_with_a_clean_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("LATCHWATCH_TEST_API_TOKEN", "secret-value")
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", "secret-value")
    path = _script(tmp_path, """\
        import os, sys, tempfile
        print(__name__, __file__)
        print(os.getcwd())
        print(os.environ.get("TMPDIR"), tempfile.gettempdir())
        print(sorted(k for k in os.environ if "SECRET" in k or "TOKEN" in k))
        print(repr(sys.stdin.read()))
        print(sys.argv)
        open("written.txt", "w").write("x")
        """)
    outcome = run_script(path)
    assert outcome.status == "ok", outcome.failure
    main, cwd, tmp, secrets, stdin, argv = outcome.output.splitlines()
    assert main == f"__main__ {path}"
    assert cwd != str(tmp_path) and "latchwatch-run-" in cwd
    assert tmp.split() == [cwd, cwd]
    assert secrets == "[]"
    assert stdin == "''"
    assert argv == repr([str(path)])
    assert not Path(cwd).exists()  # the run folder is deleted afterwards


def test_child_environment_is_an_allow_list(tmp_path, monkeypatch):
    monkeypatch.setenv("GITHUB_TOKEN", "x")
    monkeypatch.setenv("LC_ALL", "C.UTF-8")
    env = runner.child_environment(tmp_path)
    assert "GITHUB_TOKEN" not in env and env["LC_ALL"] == "C.UTF-8"
    assert set(env) <= {"PATH", "HOME", "LANG", "LANGUAGE", "TZ", "TMPDIR", "TMP", "TEMP",
                        "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS"} | {
        k for k in env if k.startswith("LC_")}


def test_raised_exception_gives_type_message_and_innermost_user_frame(tmp_path):
    path = _script(tmp_path, """\
        import gdstk

        def finger(width):
            return 1 / width

        finger(0)
        """)
    outcome = run_script(path)
    assert outcome.status == "error" and outcome.layout is None
    failure = outcome.failure
    assert (failure.kind, failure.exc_type, failure.message) == ("error", "ZeroDivisionError", "division by zero")
    assert [(f.function, f.line) for f in failure.frames] == [("finger", 4), ("<module>", 6)]
    assert failure.frames[0].file == str(path) and failure.frames[0].column == 12


def test_exception_inside_a_library_keeps_all_frames(tmp_path):
    path = _script(tmp_path, "import json\njson.loads('{')\n")
    failure = run_script(path).failure
    assert failure.exc_type == "JSONDecodeError"
    assert failure.frames[-1].file == str(path) and failure.frames[-1].line == 2
    assert any("json" in f.file for f in failure.frames[:-1])  # the checker filters these, not the runner


def test_syntax_error_points_at_its_line(tmp_path):
    path = _script(tmp_path, "import gdstk\nx = (1,\ny = 2 +\n")
    failure = run_script(path).failure
    assert failure.exc_type == "SyntaxError"
    assert failure.frames[0].file == str(path) and failure.frames[0].line in (2, 3)


@pytest.mark.parametrize("body,status", [("raise SystemExit(0)", "ok"), ("import sys; sys.exit()", "ok"),
                                          ("raise SystemExit(3)", "error")])
def test_system_exit(tmp_path, body, status):
    outcome = run_script(_script(tmp_path, "import gdstk\n" + body + "\n"))
    assert outcome.status == status
    if status == "error":
        assert outcome.failure.exc_type == "SystemExit" and "status 3" in outcome.failure.message
        assert outcome.failure.frames[0].line == 2


def test_timeout_reports_the_line_being_run(tmp_path):
    path = _script(tmp_path, "import gdstk\nx = 0\nwhile True: x += 1\n")
    started = time.monotonic()
    outcome = run_script(path, timeout=1.0)
    assert time.monotonic() - started < 5
    assert outcome.status == "timeout" and outcome.failure.kind == "timeout"
    assert "1 s" in outcome.failure.message
    assert [(f.file, f.line) for f in outcome.failure.frames] == [(str(path), 3)]


def test_timeout_inside_c_code_still_names_the_line(tmp_path):
    path = _script(tmp_path, "import time\n\ndef wait():\n    time.sleep(60)\n\nwait()\n")
    outcome = run_script(path, timeout=1.0)
    assert outcome.status == "timeout"
    assert [(f.function, f.line) for f in outcome.failure.frames] == [("wait", 4), ("<module>", 6)]


@linux_only
def test_cancel_kills_the_child_and_its_process_group(tmp_path):
    token = _token()
    path = _script(tmp_path, f"""\
        import subprocess, time
        subprocess.Popen(["sleep", "{token}"])
        print("started", flush=True)
        while True:
            time.sleep(0.05)
        """)
    cancel = threading.Event()
    timer = threading.Timer(1.5, cancel.set)
    timer.start()
    started = time.monotonic()
    outcome = run_script(path, timeout=30, cancel=cancel)
    timer.join()
    assert time.monotonic() - started < 5
    assert outcome.status == "cancelled" and outcome.failure.kind == "cancelled"
    assert outcome.output == "started\n"
    assert _processes_with(token) == []


@linux_only
def test_processes_left_by_a_finished_script_are_ended(tmp_path):
    token = _token()
    path = _script(tmp_path, f"""\
        import subprocess
        subprocess.Popen(["sleep", "{token}"], stdout=subprocess.DEVNULL)
        print("started", flush=True)
        """)
    outcome = run_script(path)
    assert outcome.status == "ok" and outcome.output == "started\n"
    assert _processes_with(token) == []


def test_memory_limit_gives_limit_status(tmp_path):
    path = _script(tmp_path, "import gdstk\nblock = bytearray(3 << 30)\n")
    outcome = run_script(path, memory_limit=1 << 30)
    assert outcome.status == "limit"
    assert outcome.failure.exc_type == "MemoryError" and "1.0 GiB" in outcome.failure.message
    assert outcome.failure.frames[0].line == 2


def test_output_is_capped_keeping_head_and_tail(tmp_path):
    path = _script(tmp_path, """\
        print("first line")
        for i in range(20000):
            print("x" * 20)
        print("last line")
        """)
    outcome = run_script(path)
    assert outcome.status == "ok"
    assert outcome.output.startswith("first line\n") and outcome.output.endswith("last line\n")
    assert len(outcome.output.encode()) < runner.OUTPUT_HEAD + runner.OUTPUT_TAIL + 200
    printed = len("first line\n") + 20000 * 21 + len("last line\n")
    dropped = printed - runner.OUTPUT_HEAD - runner.OUTPUT_TAIL
    assert f"{dropped} bytes of output dropped here, {printed} printed in all" in outcome.output


def test_printing_does_not_disturb_the_geometry(tmp_path):
    path = _script(tmp_path, """\
        import os, sys, gdstk
        cell = gdstk.Cell("TOP")
        for i in range(100):
            print("LWGEO01", i, "\\x00\\xff" * 50)
            sys.stderr.write("{not json}\\n")
            os.write(1, bytes(range(256)))
            cell.add(gdstk.rectangle((i, 0), (i + 0.5, 1), layer=i % 4))
        """)
    outcome = run_script(path)
    assert outcome.status == "ok", outcome.failure
    cell = outcome.layout.cells[0]
    assert cell.poly_layer.tolist() == [i % 4 for i in range(100)]
    assert cell.points[:, 0].max() == 99.5


def test_death_by_signal_is_a_clear_failure(tmp_path):
    outcome = run_script(_script(tmp_path, "import os, signal\nos.kill(os.getpid(), signal.SIGSEGV)\n"))
    assert outcome.status == "error"
    assert "SIGSEGV" in outcome.failure.message and "before it reported a result" in outcome.failure.message


def test_exit_without_result_is_a_clear_failure(tmp_path):
    outcome = run_script(_script(tmp_path, "import os\nos._exit(0)\n"))
    assert outcome.status == "error"
    assert "exit status 0 before it reported a result" in outcome.failure.message


def test_missing_script_is_a_script_error(tmp_path):
    outcome = run_script(tmp_path / "absent.py")
    assert outcome.status == "error" and outcome.failure.exc_type == "FileNotFoundError"
    assert "absent.py" in outcome.failure.message


def test_bad_interpreter_raises_runner_error(tmp_path):
    with pytest.raises(RunnerError, match="no-such-python"):
        run_script(_script(tmp_path, "pass\n"), python=str(tmp_path / "no-such-python"))


def test_bad_timeout_is_rejected(tmp_path):
    with pytest.raises(ValueError, match="timeout"):
        run_script(_script(tmp_path, "pass\n"), timeout=0)


def _python_without_gdstk():
    for candidate in ("/usr/bin/python3", shutil.which("python3")):
        if candidate and os.path.exists(candidate) and Path(candidate).resolve() != Path(sys.executable).resolve():
            probe = subprocess.run([candidate, "-I", "-c", "import gdstk"], capture_output=True)
            if probe.returncode != 0:
                return candidate
    return None


@pytest.mark.skipif(_python_without_gdstk() is None, reason="no interpreter without gdstk on this machine")
def test_interpreter_without_gdstk_is_explained(tmp_path):
    python = _python_without_gdstk()
    outcome = run_script(_script(tmp_path, "import gdstk\n"), python=python)
    assert outcome.status == "error"
    assert "cannot import numpy" in outcome.failure.message and python in outcome.failure.message


def test_output_printed_before_a_timeout_is_kept(tmp_path):
    path = _script(tmp_path, "print('step 1 done')\nwhile True: pass\n")
    outcome = run_script(path, timeout=1.0)
    assert outcome.status == "timeout"
    assert outcome.output == "step 1 done\n"


def test_runaway_recursion_keeps_both_ends_of_the_traceback(tmp_path):
    path = _script(tmp_path, "def down(n):\n    return down(n + 1)\n\ndown(0)\n")
    failure = run_script(path).failure
    assert failure.exc_type == "RecursionError"
    assert len(failure.frames) == sum(stacks.TRACEBACK_KEEP)
    assert (failure.frames[0].line, failure.frames[-1].line) == (2, 4)


def test_limits_are_in_force_in_the_child_and_cannot_be_lifted(tmp_path):
    path = _script(tmp_path, """\
        import resource
        print(resource.getrlimit(resource.RLIMIT_CORE))
        print(resource.getrlimit(resource.RLIMIT_AS))
        print(resource.getrlimit(resource.RLIMIT_CPU))
        try:
            resource.setrlimit(resource.RLIMIT_AS, (resource.RLIM_INFINITY, resource.RLIM_INFINITY))
        except ValueError:
            print("cannot lift")
        """)
    outcome = run_script(path, timeout=3, memory_limit=2 << 30)
    core, address_space, cpu, lifted = outcome.output.splitlines()
    assert core == "(0, 0)"
    assert address_space == f"({2 << 30}, {2 << 30})"
    soft, hard = ast.literal_eval(cpu)
    assert soft == int(3 + runner.STARTUP_ALLOWANCE + runner.COLLECT_ALLOWANCE) and hard == soft + 1
    assert lifted == "cannot lift"
