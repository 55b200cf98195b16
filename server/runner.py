"""Runs a layout script in a child process and turns what happens into a RunOutcome.

The child is ``python -I server/probe.py ...`` in a fresh temporary folder, with
standard input closed, an allow-listed environment, its own process group and
resource limits set by the probe. Geometry comes back over a dedicated pipe; the
script's prints over another, drained at the same time and capped. On a timeout, a
cancel or an exceeded cap the whole process group is killed, and it is killed again
after every run so no process the script started outlives it.
"""

from __future__ import annotations

import json
import math
import os
import re
import selectors
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

from latchwatch.analyzers.findings import Frame
from latchwatch.analyzers.run_outcome import RunOutcome, ScriptFailure

from . import wire

PROBE = Path(__file__).resolve().with_name("probe.py")

OUTPUT_HEAD = 56 << 10  # bytes of output kept from the start ...
OUTPUT_TAIL = 8 << 10  # ... and from the end
OUTPUT_KILL = 64 << 20  # printing more than this stops the run ("limit")
GEOMETRY_KILL = 2 << 30  # a result payload larger than this stops the run ("limit")
STARTUP_ALLOWANCE = 5.0  # s for interpreter start and imports before the script's own clock runs
COLLECT_ALLOWANCE = 30.0  # s for reading the layout once the script has finished
KILL_GRACE = 0.2  # s between SIGTERM and SIGKILL
_POLL = 0.05  # s between checks of the cancel event, and of child exit without a pidfd
_DRAIN_LIMIT = 1.0  # s to collect the pipes' last bytes after the child is gone
_ENV_NAMES = ("PATH", "HOME", "LANG", "LANGUAGE", "TZ")
_THREAD_NAMES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")
_FRAME_LINE = re.compile(r'^\s*File "(?P<file>.*)", line (?P<line>\d+) in (?P<function>.*)$')


class RunnerError(RuntimeError):
    """The child could not be started at all (bad interpreter path, no permission)."""


def child_environment(temp_dir: Path) -> dict[str, str]:
    """The environment the script sees: locale and paths only, never tokens or keys."""
    env = {name: value for name, value in os.environ.items() if name in _ENV_NAMES or name.startswith("LC_")}
    env.setdefault("PATH", os.defpath)
    # numpy's BLAS reserves address space per thread; on a many-core machine that
    # alone could exceed the address-space limit, so the child uses a few threads.
    for name in _THREAD_NAMES:
        env[name] = os.environ.get(name, str(min(4, os.cpu_count() or 1)))
    for name in ("TMPDIR", "TMP", "TEMP"):
        env[name] = str(temp_dir)
    return env


def run_script(path: str | Path, *, source: str | None = None, python: str | None = None, timeout: float = 10.0,
               project_root: Path | None = None, memory_limit: int = 4 << 30,
               cancel: threading.Event | None = None, call: tuple[str, dict] | None = None,
               accept_non_layout: bool = False) -> RunOutcome:
    """Run one layout script as ``__main__`` in a sandboxed child; never raises for script faults.

    ``source`` runs instead of the file's content, compiled under the file's name.
    ``call=(function, kwargs)`` imports the script as a module instead and checks what
    ``function(**kwargs)`` returns (kwargs JSON values); a return value that is no
    layout is a script error, or an empty capture with ``accept_non_layout``.
    Raises RunnerError only when the interpreter cannot be started.
    """
    if not timeout or timeout <= 0:
        raise ValueError(f"timeout must be a positive number of seconds, got {timeout!r}")
    run_dir = Path(tempfile.mkdtemp(prefix="latchwatch-run-"))
    try:
        work = run_dir / "work"
        work.mkdir()
        source_file = None
        if source is not None:
            source_file = run_dir / "source.py"
            source_file.write_text(source, encoding="utf-8")
        run = _ChildRun(str(path), python or sys.executable, float(timeout), project_root, memory_limit, cancel)
        if call is not None:
            function, kwargs = call
            run.call_args = ["--call", function, "--kwargs-json", json.dumps(kwargs)]
            run.call_args += ["--non-layout", "ignore" if accept_non_layout else "error"]
        return run.execute(work, source_file)
    finally:
        shutil.rmtree(run_dir, ignore_errors=True)


class _CappedOutput:
    """Keeps the first and the last bytes of a stream and counts the rest."""

    def __init__(self):
        self.head = bytearray()
        self.tail = bytearray()
        self.total = 0

    def feed(self, chunk: bytes) -> None:
        self.total += len(chunk)
        room = OUTPUT_HEAD - len(self.head)
        if room > 0:
            self.head += chunk[:room]
            chunk = chunk[room:]
        if chunk:
            self.tail += chunk
            if len(self.tail) > OUTPUT_TAIL:
                del self.tail[: len(self.tail) - OUTPUT_TAIL]

    def text(self) -> str:
        dropped = self.total - len(self.head) - len(self.tail)
        text = self.head.decode("utf-8", "replace")
        if dropped > 0:
            text += f"\n[latchwatch: {dropped} bytes of output dropped here, {self.total} printed in all]\n"
        return text + self.tail.decode("utf-8", "replace")


class _ChildRun:
    def __init__(self, script: str, python: str, timeout: float, project_root: Path | None,
                 memory_limit: int | None, cancel: threading.Event | None):
        self.script = script
        self.python = python
        self.timeout = timeout
        self.project_root = project_root
        self.memory_limit = memory_limit
        self.cancel = cancel
        self.output = _CappedOutput()
        self.result = bytearray()
        self.control = bytearray()
        self.stop_reason: str | None = None
        self.call_args: list[str] = []  # probe options of a function call (run_script's ``call``)

    def command(self, result_fd: int, control_fd: int, source_file: Path | None) -> list[str]:
        absolute = os.path.abspath(self.script)
        cpu = math.ceil(self.timeout + STARTUP_ALLOWANCE + COLLECT_ALLOWANCE)
        command = [self.python, "-I", str(PROBE), "--result-fd", str(result_fd), "--control-fd", str(control_fd),
                   "--timeout", repr(self.timeout), "--cpu", str(cpu), "--path", os.path.dirname(absolute)]
        if self.memory_limit:
            command += ["--memory", str(int(self.memory_limit))]
        if self.project_root is not None:
            command += ["--path", os.path.abspath(self.project_root)]
        if source_file is not None:
            command += ["--source-file", str(source_file)]
        return command + self.call_args + ["--", absolute]

    def execute(self, work: Path, source_file: Path | None) -> RunOutcome:
        result_r, result_w = os.pipe()
        control_r, control_w = os.pipe()
        _widen_pipe(result_r)
        started = time.monotonic()
        try:
            process = subprocess.Popen(
                self.command(result_w, control_w, source_file), stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                stderr=subprocess.STDOUT, cwd=work, env=child_environment(work), start_new_session=True,
                pass_fds=(result_w, control_w))
        except OSError as error:
            for fd in (result_r, result_w, control_r, control_w):
                os.close(fd)
            raise RunnerError(f"cannot start the interpreter {self.python!r} for {self.script}: {error}") from None
        os.close(result_w)
        os.close(control_w)
        try:
            self._supervise(process, result_r, control_r, started)
        finally:
            _kill_group(process.pid, signal.SIGKILL)
            process.wait()
            process.stdout.close()
            for fd in (result_r, control_r):
                try:
                    os.close(fd)
                except OSError:
                    pass
        return self._outcome(process.returncode, time.monotonic() - started)

    def _supervise(self, process: subprocess.Popen, result_r: int, control_r: int, started: float) -> None:
        selector = selectors.DefaultSelector()
        sinks = {process.stdout.fileno(): self.output.feed, result_r: self.result.extend,
                 control_r: self.control.extend}
        for fd in sinks:
            selector.register(fd, selectors.EVENT_READ)
        pidfd = _open_pidfd(process.pid)
        if pidfd is not None:
            selector.register(pidfd, selectors.EVENT_READ)
        deadline = started + self.timeout + STARTUP_ALLOWANCE
        finished_seen = False
        kill_at = None
        try:
            while not _exited(process.pid):
                now = time.monotonic()
                if not finished_seen and b"\nfinished\n" in self.control:
                    finished_seen = True
                    deadline = now + COLLECT_ALLOWANCE
                if self.stop_reason is None:
                    self.stop_reason = self._stop_reason(now, deadline)
                    if self.stop_reason is not None:
                        _kill_group(process.pid, signal.SIGTERM)
                        kill_at = now + KILL_GRACE
                elif kill_at is not None and now >= kill_at:
                    _kill_group(process.pid, signal.SIGKILL)
                    kill_at = None
                wait = _POLL if pidfd is not None else min(_POLL, 0.01)
                if kill_at is not None:
                    wait = max(0.0, min(wait, kill_at - now))
                for key, _events in selector.select(wait):
                    if key.fd != pidfd:
                        self._read(selector, key.fd, sinks)
            # The child is gone (not yet reaped, so its group id cannot be reused):
            # end whatever it left running, then collect the pipes' last bytes.
            _kill_group(process.pid, signal.SIGKILL)
            if pidfd is not None:
                selector.unregister(pidfd)
            drain_until = time.monotonic() + _DRAIN_LIMIT
            while any(fd in sinks for fd in _registered(selector)) and time.monotonic() < drain_until:
                for key, _events in selector.select(0.05):
                    if key.fd != pidfd:
                        self._read(selector, key.fd, sinks)
        finally:
            selector.close()
            if pidfd is not None:
                os.close(pidfd)

    def _stop_reason(self, now: float, deadline: float) -> str | None:
        if self.cancel is not None and self.cancel.is_set():
            return "cancelled"
        if now >= deadline:
            return "timeout"
        if self.output.total > OUTPUT_KILL:
            return "output"
        if len(self.result) > GEOMETRY_KILL:
            return "geometry"
        return None

    @staticmethod
    def _read(selector: selectors.BaseSelector, fd: int, sinks: dict) -> None:
        try:
            chunk = os.read(fd, 1 << 20)
        except OSError:
            chunk = b""
        if chunk:
            sinks[fd](chunk)
        else:
            selector.unregister(fd)

    # -- turning what happened into a RunOutcome ---------------------------------------

    def _outcome(self, returncode: int, seconds: float) -> RunOutcome:
        control = self.control.decode("utf-8", "replace")
        layout = None
        failure = self._failure(returncode, control)
        if failure is None:
            try:
                header, arrays = wire.decode_payload(self.result)
                if header.get("status") == "ok":
                    layout = wire.layout_from_parts(header, arrays)
                else:
                    failure = ScriptFailure(kind=_kind(header.get("status")), exc_type=header.get("exc_type"),
                                            message=str(header.get("message", "")),
                                            frames=tuple(wire.frame_from_row(r) for r in header.get("frames", [])))
            except wire.WireError as error:
                failure = ScriptFailure("error", None, f"latchwatch could not read the script's result: {error}")
        status = "ok" if failure is None else failure.kind
        return RunOutcome(script=self.script, status=status, seconds=round(seconds, 3), layout=layout,
                          failure=failure, output=self.output.text(), sandbox=self._sandbox(control))

    def _failure(self, returncode: int, control: str) -> ScriptFailure | None:
        """The failure visible without the payload, or None when the payload decides."""
        dump = _timeout_dump(control)
        if self.stop_reason == "cancelled":
            return ScriptFailure("cancelled", None, "the run was cancelled")
        if dump is not None or self.stop_reason == "timeout":
            frames = _dump_frames(dump) if dump is not None else ()
            if "\nfinished\n" in control and dump is None:
                message = (f"the script finished, but reading its layout took longer than "
                           f"{COLLECT_ALLOWANCE:g} s")
            else:
                message = f"the script ran longer than its time limit of {self.timeout:g} s"
            return ScriptFailure("timeout", None, message, frames)
        if self.stop_reason == "output":
            return ScriptFailure("limit", None, f"the script printed more than {OUTPUT_KILL >> 20} MiB")
        if self.stop_reason == "geometry":
            return ScriptFailure("limit", None, f"the captured layout exceeds {GEOMETRY_KILL >> 20} MiB")
        if self.result:
            return None
        if returncode is not None and returncode < 0:
            number = -returncode
            name = _signal_name(number)
            if number == getattr(signal, "SIGXCPU", None):
                return ScriptFailure("limit", None, "the script exceeded its CPU-time limit")
            hint = " (possibly the memory limit: a library failed to allocate)" if number in (
                signal.SIGSEGV, signal.SIGABRT, getattr(signal, "SIGBUS", -1)) else ""
            return ScriptFailure("error", None, f"the script's process was killed by {name}{hint} "
                                                f"before it reported a result")
        if "started limits=" not in control:
            return ScriptFailure("error", None, f"the interpreter {self.python} could not start the latchwatch "
                                                f"probe (exit status {returncode}); see the output")
        return ScriptFailure("error", None, f"the script's process ended with exit status {returncode} "
                                            f"before it reported a result")

    def _sandbox(self, control: str) -> dict:
        match = re.search(r"^started limits=(.*)$", control, re.MULTILINE)
        in_child = set(filter(None, match.group(1).split(","))) if match else set()
        limits = ["time"] + [name for name in ("cpu", "memory") if name in in_child] + ["output", "geometry"]
        return {"network": "not blocked", "writes": "not confined", "limits": limits}


def _kind(status) -> str:
    return status if status in ("error", "timeout", "limit") else "error"


def _timeout_dump(control: str) -> str | None:
    """The faulthandler dump the probe's watchdog wrote, if it fired."""
    at = control.find("Timeout (")
    return control[at:] if at >= 0 else None


def _dump_frames(dump: str) -> tuple[Frame, ...]:
    """Frames of the main thread in a faulthandler dump, innermost first, probe left out."""
    blocks: list[list[Frame]] = []
    for line in dump.splitlines():
        if line.startswith(("Thread 0x", "Current thread 0x", "Stack (most recent call first)")):
            blocks.append([])
            continue
        match = _FRAME_LINE.match(line)
        if match and blocks:
            blocks[-1].append(Frame(match["file"], int(match["line"]), match["function"].strip()))
    probe_name = str(PROBE)
    chosen = next((b for b in blocks if any(f.file == probe_name for f in b)), blocks[0] if blocks else [])
    return tuple(f for f in chosen if f.file != probe_name)


def _signal_name(number: int) -> str:
    try:
        return signal.Signals(number).name
    except ValueError:
        return f"signal {number}"


def _widen_pipe(fd: int) -> None:
    """Fewer wake-ups for large layouts: a 1 MiB pipe where Linux allows it."""
    try:
        import fcntl

        fcntl.fcntl(fd, getattr(fcntl, "F_SETPIPE_SZ", 1031), 1 << 20)
    except (ImportError, OSError):
        pass


def _open_pidfd(pid: int) -> int | None:
    try:
        return os.pidfd_open(pid)
    except (AttributeError, OSError):
        return None


def _exited(pid: int) -> bool:
    """True once the child has ended, without reaping it."""
    try:
        info = os.waitid(os.P_PID, pid, os.WEXITED | os.WNOHANG | os.WNOWAIT)
    except ChildProcessError:
        return True
    return info is not None


def _kill_group(pgid: int, sig: int) -> None:
    try:
        os.killpg(pgid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def _registered(selector: selectors.BaseSelector) -> list[int]:
    return [key.fd for key in selector.get_map().values()]
