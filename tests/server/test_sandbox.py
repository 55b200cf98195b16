"""Hostile scripts against the sandbox (docs/sandbox.md, issue 6): each test asserts that the
run was contained, and skips only where `latchwatch doctor` reports the mechanism it
needs as unavailable, with doctor's reason. Network tests connect only to listeners
started here, on the loopback interface. Every test runs twice: in a fresh child, and
in a child forked from a corner host (server/sandbox/hosts.py), as sweep corners run."""

from __future__ import annotations

import functools
import os
import socket
import sys
import threading
import time

import pytest
from sandboxes import needs, write_script

from latchwatch.server.sandbox import runner
from latchwatch.server.sandbox.policy import REQUIRED, SandboxReport, SandboxSettings
from latchwatch.server.sandbox.runner import run_script

from procs import processes_with as _processes_with

linux_only = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")


@pytest.fixture(autouse=True, params=[False, True], ids=["fresh-child", "corner-host"])
def hosted(request, monkeypatch):
    """The tests' run_script, in a fresh child or in a corner host's forked child."""
    monkeypatch.setattr(sys.modules[__name__], "run_script", functools.partial(runner.run_script,
                                                                               hosted=request.param))
    return request.param


def _token() -> str:
    return f"{time.time_ns() % 10**9 + 300}.{os.getpid()}"


# -- network -------------------------------------------------------------------------


@pytest.fixture
def listener():
    server = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    server.bind(("127.0.0.1", 0))
    server.listen(8)
    server.settimeout(0.2)
    yield server
    server.close()


def _accepted(server) -> bool:
    try:
        connection, _ = server.accept()
    except (TimeoutError, OSError):
        return False
    connection.close()
    return True


def test_tcp_connection_to_a_loopback_listener_is_refused(tmp_path, doctor, listener):
    if "network" not in doctor.in_force:
        needs(doctor, "tcp")
    port = listener.getsockname()[1]
    path = write_script(tmp_path, f"""\
        import socket
        try:
            socket.create_connection(("127.0.0.1", {port}), timeout=3)
            print("connected")
        except OSError as error:
            print("refused", error.errno)
        """)
    outcome = run_script(path)
    assert outcome.status == "ok", outcome.failure
    assert outcome.output.startswith("refused")
    assert not _accepted(listener)
    assert outcome.sandbox["network"] in ("blocked", "tcp blocked")


def test_udp_to_a_loopback_listener_arrives_nowhere(tmp_path, doctor):
    needs(doctor, "network")  # Landlock's TCP rules do not cover UDP: the namespace does
    receiver = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    receiver.bind(("127.0.0.1", 0))
    receiver.settimeout(0.3)
    path = write_script(tmp_path, f"""\
        import socket
        sender = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        try:
            sender.sendto(b"secret", ("127.0.0.1", {receiver.getsockname()[1]}))
            print("sent")
        except OSError as error:
            print("not sent", error.errno)
        """)
    try:
        outcome = run_script(path)
        assert outcome.status == "ok"
        with pytest.raises(socket.timeout):
            receiver.recvfrom(64)
    finally:
        receiver.close()
    assert outcome.sandbox["network"] == "blocked"


def test_tcp_is_refused_by_landlock_alone_without_the_namespace(tmp_path, doctor, listener):
    needs(doctor, "tcp")
    path = write_script(tmp_path, f"""\
        import socket
        try:
            socket.create_connection(("127.0.0.1", {listener.getsockname()[1]}), timeout=3)
            print("connected")
        except PermissionError:
            print("denied")
        """)
    outcome = run_script(path, skip_protections=("namespaces",))
    assert outcome.output == "denied\n" and not _accepted(listener)
    assert outcome.sandbox["network"] == "tcp blocked"
    assert "network" in outcome.sandbox["unavailable"]


# -- writes --------------------------------------------------------------------------


@pytest.fixture
def outside(tmp_path):
    """A folder anyone may write to: only the sandbox keeps the script out of it."""
    folder = tmp_path / "outside"
    folder.mkdir()
    folder.chmod(0o777)
    return folder


def test_writes_outside_the_run_folder_are_refused(tmp_path, doctor, outside):
    needs(doctor, "writes")
    path = write_script(tmp_path, f"""\
        import os, tempfile
        for target in ({str(outside / "direct.txt")!r}, {str(tmp_path / "beside-the-script.txt")!r}):
            try:
                open(target, "w").write("x")
                print("wrote", target)
            except PermissionError:
                print("refused")
        try:
            os.mkdir({str(outside / "folder")!r})
        except PermissionError:
            print("refused")
        open("inside.txt", "w").write("ok")  # the run's own folder stays writable
        with tempfile.NamedTemporaryFile() as scratch:
            scratch.write(b"ok")
        with open(os.devnull, "w") as null:
            null.write("ok")
        print("inside ok")
        """)
    outcome = run_script(path)
    assert outcome.status == "ok", outcome.failure
    assert outcome.output.splitlines() == ["refused", "refused", "refused", "inside ok"]
    assert list(outside.iterdir()) == [] and not (tmp_path / "beside-the-script.txt").exists()
    assert outcome.sandbox["writes"] == "confined"


def test_locks_and_shared_memory_work_in_the_runs_own_dev_shm(tmp_path, doctor):
    """Frameworks create multiprocessing locks (POSIX semaphores) at import; they work,
    in a /dev/shm of the run's own that the host never sees."""
    needs(doctor, "writes", "network")
    token = _token()
    path = write_script(tmp_path, f"""\
        import multiprocessing, os
        from multiprocessing import shared_memory
        lock = multiprocessing.Lock()
        with lock:
            block = shared_memory.SharedMemory(create=True, size=4096, name="lw-{token}")
            block.buf[:2] = b"ok"
            open("/dev/shm/left-{token}", "w").write("x")  # would outlive the run on the host's /dev/shm
        print("lock and shared memory ok", sorted(os.listdir("/dev/shm")) == sorted(["lw-{token}", "left-{token}"]))
        block.close()
        """)
    outcome = run_script(path)
    assert outcome.status == "ok", outcome.failure
    assert outcome.output.splitlines() == ["lock and shared memory ok True"]
    if os.path.isdir("/dev/shm"):
        assert not [name for name in os.listdir("/dev/shm") if token in name]


def test_writes_through_a_shell_are_refused(tmp_path, doctor, outside):
    needs(doctor, "writes")
    target = outside / "shell.txt"
    path = write_script(tmp_path, f"""\
        import subprocess
        done = subprocess.run(["sh", "-c", "echo x > {target}; echo status $?"], capture_output=True, text=True)
        print(done.stdout.strip())
        """)
    outcome = run_script(path)
    assert outcome.output.strip() == "status 2"  # sh: cannot create ...: Permission denied
    assert not target.exists()


# -- processes -------------------------------------------------------------------------


@linux_only
@pytest.mark.parametrize("mechanism", ["pid namespace", "subreaper"])
def test_double_forked_and_new_session_processes_do_not_outlive_the_run(tmp_path, doctor, mechanism):
    if mechanism == "pid namespace":
        needs(doctor, "leftovers")
        skip = ()
    else:
        skip = ("namespaces",)  # as on a machine without namespaces: the keeper sweeps as subreaper
    token = _token()
    path = write_script(tmp_path, f"""\
        import os, subprocess, sys
        subprocess.Popen(["setsid", "sleep", "{token}"], stdout=subprocess.DEVNULL)
        if os.fork() == 0:           # a classic daemon: fork, new session, fork again
            os.setsid()
            if os.fork() == 0:
                os.execvp("sleep", ["sleep", "{token}"])
            os._exit(0)
        os.wait()
        print("daemons started", flush=True)
        """)
    outcome = run_script(path, skip_protections=skip)
    assert outcome.status == "ok", outcome.failure
    assert outcome.output == "daemons started\n"
    assert _processes_with(token) == []
    assert outcome.sandbox["leftovers"] == mechanism


def test_a_loop_of_forks_stops_at_the_process_limit(tmp_path, doctor):
    needs(doctor, "processes")
    token = _token()
    path = write_script(tmp_path, f"""\
        import os
        started = 0
        try:
            while started < 10000:
                if os.fork() == 0:
                    os.execvp("sleep", ["sleep", "{token}"])
                started += 1
        except OSError as error:
            print("stopped after", started, "by errno", error.errno)
        """)
    outcome = run_script(path, timeout=20)
    assert outcome.status == "ok", (outcome.failure, outcome.output)
    words = outcome.output.split()
    assert words[:2] == ["stopped", "after"] and int(words[2]) < SandboxSettings().process_limit
    assert words[-1] == "11"  # EAGAIN: the kernel refused the fork
    assert _processes_with(token) == []


def test_a_script_that_ignores_sigterm_is_still_ended(tmp_path):
    token = _token()
    path = write_script(tmp_path, f"""\
        import signal, subprocess
        signal.signal(signal.SIGTERM, signal.SIG_IGN)
        subprocess.Popen(["sh", "-c", "trap '' TERM; exec sleep {token}"])
        while True:
            pass
        """)
    started = time.monotonic()
    outcome = run_script(path, timeout=1.0)
    assert time.monotonic() - started < 1.0 + runner.STARTUP_ALLOWANCE
    assert outcome.status == "timeout"
    if sys.platform.startswith("linux"):
        assert _processes_with(token) == []


def test_cancel_ends_a_script_that_ignores_sigterm(tmp_path):
    path = write_script(tmp_path, "import signal, time\nsignal.signal(signal.SIGTERM, signal.SIG_IGN)\ntime.sleep(60)\n")
    cancel = threading.Event()
    threading.Timer(1.0, cancel.set).start()
    started = time.monotonic()
    outcome = run_script(path, timeout=30, cancel=cancel)
    assert outcome.status == "cancelled" and time.monotonic() - started < 4


# -- resources -----------------------------------------------------------------------------


def test_a_40_gib_allocation_is_a_limit_finding(tmp_path, doctor):
    needs(doctor, "memory")
    path = write_script(tmp_path, "import numpy\nblock = numpy.ones((40 << 30) // 8)\nprint('allocated')\n")
    outcome = run_script(path)
    assert outcome.status == "limit" and outcome.failure.exc_type in ("MemoryError", "_ArrayMemoryError")
    assert "out of memory" in outcome.failure.message and outcome.output == ""
    assert (outcome.failure.frames[-1].file, outcome.failure.frames[-1].line) == (str(path), 2)


def test_an_infinite_loop_times_out_at_its_line(tmp_path):
    path = write_script(tmp_path, "n = 0\nwhile True:\n    n += 1\n")
    started = time.monotonic()
    outcome = run_script(path, timeout=1.0)
    assert outcome.status == "timeout" and time.monotonic() - started < 1.0 + runner.STARTUP_ALLOWANCE
    assert outcome.failure.frames and outcome.failure.frames[0].line in (2, 3)


def test_deep_recursion_past_the_c_stack_is_a_clear_error_at_its_line(tmp_path):
    # Through map() every level costs C stack too: with the recursion limit lifted the
    # interpreter overflows it (Python 3.12+ may stop it first with a RecursionError).
    path = write_script(tmp_path, "import sys\nsys.setrecursionlimit(10**8)\n\ndef down(n):\n"
                             "    return list(map(down, [n + 1]))\n\ndown(0)\n")
    started = time.monotonic()
    outcome = run_script(path, timeout=20)
    assert outcome.status == "error" and time.monotonic() - started < 10
    assert outcome.failure.exc_type == "RecursionError" or "recursion deeper than the C stack" in outcome.failure.message
    # The overflow strikes inside down(): on its call line, or while entering the frame,
    # which faulthandler reports at the def line.
    innermost = outcome.failure.frames[0]
    assert (innermost.file, innermost.function) == (str(path), "down") and innermost.line in (4, 5)


def test_300_mb_of_output_stops_the_run_and_keeps_the_log_small(tmp_path):
    path = write_script(tmp_path, """\
        import sys
        line = "x" * 1023 + "\\n"
        for _ in range(300 * 1024):
            sys.stdout.write(line)
        """)
    started = time.monotonic()
    outcome = run_script(path, timeout=60)
    assert outcome.status == "limit" and "printed more than 64 MiB" in outcome.failure.message
    assert time.monotonic() - started < 30
    assert len(outcome.output) < runner.OUTPUT_HEAD + runner.OUTPUT_TAIL + 200


def test_a_large_file_write_stops_at_the_file_size_limit(tmp_path, doctor):
    needs(doctor, "file-size")
    path = write_script(tmp_path, """\
        block = b"\\0" * (1 << 20)
        with open("big.bin", "wb") as out:
            for _ in range(2048):
                out.write(block)
        """)
    outcome = run_script(path, timeout=30)
    assert outcome.status == "error" and "File too large" in outcome.failure.message


def test_the_limits_cannot_be_lifted_and_root_is_not_regained(tmp_path, doctor):
    needs(doctor, "privileges")
    path = write_script(tmp_path, """\
        import os, resource
        for which in (resource.RLIMIT_AS, resource.RLIMIT_NPROC, resource.RLIMIT_NOFILE, resource.RLIMIT_FSIZE):
            try:
                resource.setrlimit(which, (resource.RLIM_INFINITY, resource.RLIM_INFINITY))
                print("lifted")
            except (ValueError, OSError):
                print("kept")
        try:
            os.setresuid(0, 0, 0)
            print("root again" if os.getuid() == 0 and os.geteuid() == 0 else "not root")
        except OSError:
            print("not root")
        """)
    outcome = run_script(path)
    assert outcome.output.splitlines() == ["kept"] * 4 + ["not root"]


# -- secrets ---------------------------------------------------------------------------------


SECRET = "lw-test-secret-6d1f0a"


def test_secrets_in_the_environment_are_not_passed_on(tmp_path, monkeypatch):
    for name in ("AWS_SECRET_ACCESS_KEY", "GITHUB_TOKEN", "SSH_AUTH_SOCK", "LATCHWATCH_API_KEY"):
        monkeypatch.setenv(name, SECRET)
    path = write_script(tmp_path, "import os\nfor k, v in sorted(os.environ.items()):\n    print(k, v)\n")
    outcome = run_script(path)
    assert outcome.status == "ok" and outcome.output
    assert SECRET not in outcome.output


@linux_only
def test_other_processes_environments_cannot_be_read(tmp_path, doctor):
    needs(doctor, "other-processes")
    # This test process started with a secret in its environment: a fresh interpreter
    # holds it in /proc/PID/environ, which a script might scan for.
    import subprocess

    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(30)"],
                              env={**os.environ, "LW_HELD_SECRET": SECRET})
    try:
        path = write_script(tmp_path, f"""\
            import os
            readable = leaked = 0
            for pid in os.listdir("/proc"):
                if pid.isdigit():
                    try:
                        data = open(f"/proc/{{pid}}/environ", "rb").read()
                    except OSError:
                        continue
                    readable += 1
                    leaked += {SECRET!r}.encode() in data
            print("leaked", leaked)
            """)
        outcome = run_script(path)
    finally:
        holder.kill()
        holder.wait()
    assert outcome.output == "leaked 0\n"


# -- the result and control pipes -------------------------------------------------------------


def test_garbage_written_into_the_result_pipe_is_a_clear_error(tmp_path):
    path = write_script(tmp_path, """\
        import gdstk, os
        cell = gdstk.Cell("TOP")
        cell.add(gdstk.rectangle((0, 0), (1, 1)))
        for fd in range(3, 64):
            try:
                os.write(fd, b"LWGEO01\\n\\xff\\xff\\xff\\xff garbage \\x00" * 10)
            except OSError:
                pass
        """)
    outcome = run_script(path)
    assert outcome.status == "error" and outcome.layout is None
    assert "could not read the script's result" in outcome.failure.message


def test_a_closed_result_pipe_is_a_clear_error(tmp_path):
    path = write_script(tmp_path, """\
        import gdstk, os
        gdstk.Cell("TOP").add(gdstk.rectangle((0, 0), (1, 1)))
        os.closerange(3, 1024)
        """)
    outcome = run_script(path)
    assert outcome.status == "error" and outcome.layout is None
    assert "before it reported a result" in outcome.failure.message


# -- what the report claims, and the required sandbox -------------------------------------------


def test_the_entry_claims_only_what_doctor_reports(tmp_path, doctor):
    outcome = run_script(write_script(tmp_path, "import gdstk\n"))
    entry = outcome.sandbox
    assert (entry["network"] == "blocked") == ("network" in doctor.in_force)
    assert (entry["writes"] == "confined") == ("writes" in doctor.in_force)
    for limit in ("cpu", "memory", "file-size", "open-files", "processes"):
        assert (limit in entry["limits"]) == (limit in doctor.in_force)
    assert set(entry.get("unavailable", {})) == {n for n in REQUIRED if n not in doctor.in_force}


def test_without_namespaces_and_landlock_the_run_still_works_and_says_so(tmp_path):
    path = write_script(tmp_path, "import gdstk\ngdstk.Cell('T').add(gdstk.rectangle((0, 0), (1, 1)))\n")
    outcome = run_script(path, skip_protections=("namespaces", "landlock"))
    assert outcome.status == "ok"
    entry = outcome.sandbox
    assert (entry["network"], entry["writes"]) == ("not blocked", "not confined")
    assert entry["unavailable"]["network"].startswith("namespaces not attempted")
    assert entry["unavailable"]["writes"].startswith("Landlock not attempted")


def test_a_required_sandbox_with_a_protection_missing_runs_nothing(tmp_path):
    marker = tmp_path / "ran.txt"
    path = write_script(tmp_path, f"open({str(marker)!r}, 'w').write('the script ran')\n")
    with pytest.raises(runner.SandboxUnavailable, match=r"network access \(network\): namespaces not attempted"):
        run_script(path, require_sandbox=True, skip_protections=("namespaces",))
    assert not marker.exists()
    assert isinstance(runner.SandboxUnavailable("x"), runner.RunnerError)  # the editor shows it as a setting to fix


def test_a_required_sandbox_runs_where_everything_is_in_force(tmp_path, doctor):
    needs(doctor, *REQUIRED)
    outcome = run_script(write_script(tmp_path, "import gdstk\n"), require_sandbox=True)
    assert outcome.status == "ok" and "unavailable" not in outcome.sandbox, (outcome.failure, outcome.output)


# -- the report, without a child -------------------------------------------------------------


def test_a_garbled_report_claims_nothing_from_the_child():
    report = SandboxReport.from_control_line("sandbox {not json")
    entry = report.entry()
    assert (entry["network"], entry["writes"], entry["privileges"]) == ("not blocked", "not confined", "not dropped")
    assert entry["limits"] == ["time", "output", "geometry"]
    assert set(entry["unavailable"]) == set(REQUIRED)


def test_landlock_tcp_alone_is_not_called_blocked():
    line = 'sandbox {"in_force": {"tcp": "Landlock ABI 4: no TCP"}, "missing": {"network": "no userns"}}'
    entry = SandboxReport.from_control_line(line).entry()
    assert entry["network"] == "tcp blocked" and entry["unavailable"]["network"] == "no userns"


def test_unknown_mechanisms_cannot_be_skipped():
    with pytest.raises(ValueError, match="unknown sandbox mechanisms"):
        SandboxSettings(skip=frozenset({"chroot"}))
