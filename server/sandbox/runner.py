"""Runs a layout script in a child process and turns what happens into a RunOutcome.

The child (server/sandbox/workers.py) confines itself (server/child/boot.py), imports gdstk
and waits for its job, which this module sends once the child's sandbox report has
arrived: a required sandbox with a protection missing stops here, before the script
runs. Geometry comes back over a dedicated pipe, the script's prints over another,
drained at the same time and capped. On a timeout, a cancel or an exceeded cap the
whole process group is ended, and again after every run; the child's keeper ends
whatever escaped the group (a PID namespace, or a sweep as child subreaper).

The child is a fresh worker or (``hosted``) a fork of a corner host that has gdstk
imported already (server/sandbox/hosts.py); this module supervises both through the same members.

A job is a JSON object (server/child/job.py, options_from_job): a plain run, or a
function call of a parameter corner; another kind of job needs only a new key there
and a new keyword here.
"""

from __future__ import annotations

import os
import re
import selectors
import signal
import sys
import threading
import time
from pathlib import Path

from latchwatch.analyzers.model.findings import Frame
from latchwatch.analyzers.model.run_outcome import RunOutcome, ScriptFailure
from latchwatch.server.sandbox import wire
from latchwatch.server.sandbox.hosts import HOSTS
from latchwatch.server.sandbox.policy import (
    GEOMETRY_KILL,
    OUTPUT_HEAD,
    OUTPUT_KILL,
    OUTPUT_TAIL,
    SandboxReport,
    SandboxSettings,
    unavailable_message,
)
from latchwatch.server.sandbox.workers import (
    COLLECT_ALLOWANCE,
    HARNESS_FILES,
    STARTUP_ALLOWANCE,
    RunnerError,
    SandboxUnavailable,
    Worker,
    WorkerKey,
    child_environment,
)

__all__ = ["run_script", "RunnerError", "SandboxUnavailable", "child_environment", "OUTPUT_HEAD", "OUTPUT_TAIL",
           "OUTPUT_KILL", "GEOMETRY_KILL", "STARTUP_ALLOWANCE", "COLLECT_ALLOWANCE"]

KILL_GRACE = 0.2  # s between SIGTERM and SIGKILL
_POLL = 0.05  # s between checks of the cancel event, and of child exit without a pidfd
_DRAIN_LIMIT = 1.0  # s to collect the pipes' last bytes after the child is gone
_FRAME_LINE = re.compile(r'^\s*File "(?P<file>.*)", line (?P<line>\d+) in (?P<function>.*)$')


def run_script(path: str | Path, *, source: str | None = None, python: str | None = None, timeout: float = 10.0,
               project_root: Path | None = None, memory_limit: int = 4 << 30,
               cancel: threading.Event | None = None, call: tuple[str, dict] | None = None,
               accept_non_layout: bool = False, require_sandbox: bool = False, hosted: bool = False,
               skip_protections: tuple[str, ...] = (), pass_env: tuple[str, ...] = ()) -> RunOutcome:
    """Run one layout script as ``__main__`` in a sandboxed child; never raises for script faults.

    ``source`` runs instead of the file's content, compiled under the file's name.
    ``call=(function, kwargs)`` imports the script as a module instead and checks what
    ``function(**kwargs)`` returns (kwargs JSON values); a return value that is no
    layout is a script error, or an empty capture with ``accept_non_layout``.
    ``hosted`` runs the job in a child forked from a corner host that has gdstk
    imported (server/sandbox/hosts.py): for runs that repeat with the same settings (a sweep's
    corners, many scripts, an editor's edits). ``require_sandbox``
    makes a missing protection an error; ``skip_protections`` (sandbox.SKIPPABLE)
    leaves mechanisms out, as on a machine without them; ``pass_env`` names the
    environment variables the run also sees (policy.pass_env_problem refuses some).
    Raises RunnerError when the interpreter cannot be started, SandboxUnavailable
    (a RunnerError) when the sandbox is required and incomplete.
    """
    root = os.path.abspath(project_root) if project_root is not None else None
    script = os.path.abspath(path)
    job = {"script": script, "source": source, "paths": [os.path.dirname(script)] + ([root] if root else [])}
    if call is not None:
        function, kwargs = call
        job.update(call=function, kwargs=kwargs, non_layout="ignore" if accept_non_layout else "error")
    settings = SandboxSettings(require=require_sandbox, memory_limit=memory_limit, skip=frozenset(skip_protections),
                               pass_env=tuple(pass_env))
    return _run_job(str(path), job, python, timeout, root, settings, cancel, hosted)


def read_layout_file(path: str | Path, kind: str, *, python: str | None = None, timeout: float = 60.0,
                     memory_limit: int = 4 << 30, cancel: threading.Event | None = None,
                     require_sandbox: bool = False, skip_protections: tuple[str, ...] = ()) -> RunOutcome:
    """Read a GDSII (``kind`` "gds") or OASIS ("oas") file in a sandboxed child.

    gdstk can crash on a corrupt file; in the child that is a failed run (a finding on
    the file), not a crashed command line or language server."""
    job = {"script": os.path.abspath(path), "layout": kind, "paths": []}
    settings = SandboxSettings(require=require_sandbox, memory_limit=memory_limit, skip=frozenset(skip_protections))
    return _run_job(str(path), job, python, timeout, None, settings, cancel, hosted=False)


def _run_job(label: str, job: dict, python: str | None, timeout: float, root: str | None,
             settings: SandboxSettings, cancel, hosted: bool) -> RunOutcome:
    if not timeout or timeout <= 0:
        raise ValueError(f"timeout must be a positive number of seconds, got {timeout!r}")
    job["timeout"] = float(timeout)
    key = WorkerKey(python or sys.executable, root, settings, float(timeout))
    if hosted:
        outcome = _hosted_run(label, job, key, cancel)
        if outcome is not None:
            return outcome
    worker = Worker.start(key, needs_reading=job["paths"] or [os.path.dirname(job["script"])])
    return _ChildRun(label, worker, job, cancel).execute()


def _hosted_run(label: str, job: dict, key: WorkerKey, cancel) -> RunOutcome | None:
    """The job in a corner host's child; None when no host could run it (one that
    cannot start, or ends before it reports the job's end), so a plain worker runs it
    and says what is wrong."""
    root = key.project_root
    # Scripts inside the project share its hosts, whatever their folder.
    needs = [root] if root is not None and _inside(job["script"], root) else (
        job["paths"] or [os.path.dirname(job["script"])])
    for _attempt in range(2):  # an idle host may have died since its last job
        try:
            host = HOSTS.take(key, needs)
        except RunnerError:
            continue
        try:
            hosted = host.submit()
        except RunnerError:
            host.close()
            continue
        run = _ChildRun(label, hosted, job, cancel)
        outcome = run.execute()
        if not hosted.host_failed or run.stop_reason is not None:
            return outcome
    return None


def _inside(path: str, folder: str) -> bool:
    return os.path.commonpath([path, folder]) == folder


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
    """One job on one worker: send it, police the child, read what comes back."""

    def __init__(self, script: str, worker: Worker, job: dict, cancel: threading.Event | None):
        self.script = script
        self.worker = worker
        self.python = worker.key.python
        self.timeout = worker.key.timeout
        self.settings = worker.key.settings
        self.job = job
        self.cancel = cancel
        self.output = _CappedOutput()
        self.result = bytearray()
        self.control = bytearray()
        self.stop_reason: str | None = None
        self.report: SandboxReport | None = None
        self._job_bytes: memoryview | None = None

    def execute(self) -> RunOutcome:
        started = time.monotonic()
        try:
            self._supervise(started)
        finally:
            self.worker.discard()
        if self.stop_reason == "sandbox":
            raise SandboxUnavailable(f"{self.script}: " + unavailable_message(self.report.missing_required()))
        return self._outcome(self.worker.returncode, time.monotonic() - started)

    def _supervise(self, started: float) -> None:
        worker = self.worker
        selector = selectors.DefaultSelector()
        sinks = {worker.output_fd: self.output.feed, worker.result_r: self.result.extend,
                 worker.control_r: self._control}
        for fd in sinks:
            selector.register(fd, selectors.EVENT_READ)
        exit_fd = worker.exit_fd()
        if exit_fd is not None:
            selector.register(exit_fd, selectors.EVENT_READ)
        deadline = started + self.timeout + STARTUP_ALLOWANCE
        finished_seen = terminated = False
        kill_at = None
        try:
            while not worker.exited():
                now = time.monotonic()
                if not finished_seen and b"\nfinished\n" in self.control:
                    finished_seen = True
                    deadline = now + COLLECT_ALLOWANCE
                if self.stop_reason is None:
                    self.stop_reason = self._stop_reason(now, deadline)
                if self.stop_reason is not None and not terminated:
                    terminated = True
                    if self.worker.job_w in _registered(selector):
                        selector.unregister(self.worker.job_w)
                    self.worker.close_job_pipe()
                    worker.signal(signal.SIGTERM)
                    kill_at = now + KILL_GRACE
                elif kill_at is not None and now >= kill_at:
                    worker.signal(signal.SIGKILL)
                    kill_at = None
                if self._job_bytes is not None and self.stop_reason is None and self.worker.job_w is not None \
                        and self.worker.job_w not in _registered(selector):
                    os.set_blocking(self.worker.job_w, False)
                    selector.register(self.worker.job_w, selectors.EVENT_WRITE)
                wait = _POLL if exit_fd is not None else min(_POLL, 0.01)
                if kill_at is not None:
                    wait = max(0.0, min(wait, kill_at - now))
                for key, _events in selector.select(wait):
                    if key.fd == exit_fd:
                        continue
                    if key.fd == self.worker.job_w:
                        self._send_job(selector)
                    else:
                        self._read(selector, key.fd, sinks)
            # The child is gone (not yet reaped, so its group id cannot be reused):
            # end whatever it left running, then collect the pipes' last bytes.
            worker.signal(signal.SIGKILL)
            if exit_fd is not None:
                selector.unregister(exit_fd)
            if self.worker.job_w in _registered(selector):
                selector.unregister(self.worker.job_w)
            drain_until = time.monotonic() + _DRAIN_LIMIT
            while any(fd in sinks for fd in _registered(selector)) and time.monotonic() < drain_until:
                for key, _events in selector.select(0.05):
                    self._read(selector, key.fd, sinks)
        finally:
            selector.close()

    def _control(self, chunk: bytes) -> None:
        """Control-pipe bytes; the sandbox report decides whether the job is sent."""
        self.control.extend(chunk)
        if self.report is None:
            at = self.control.find(b"sandbox ")
            line_end = self.control.find(b"\n", at) if at >= 0 else -1
            if line_end < 0:
                return
            self.report = SandboxReport.from_control_line(self.control[at:line_end].decode("utf-8", "replace"))
            if self.settings.require and self.report.missing_required():
                self.stop_reason = "sandbox"
            else:
                import json

                self._job_bytes = memoryview(json.dumps(self.job).encode("utf-8"))

    def _send_job(self, selector: selectors.BaseSelector) -> None:
        fd = self.worker.job_w
        try:
            written = os.write(fd, self._job_bytes)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:  # the child is gone; its exit tells the rest
            written = len(self._job_bytes)
        self._job_bytes = self._job_bytes[written:]
        if not self._job_bytes:
            selector.unregister(fd)
            self.worker.close_job_pipe()

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
                                            frames=tuple(wire.frame_from_row(r) for r in header.get("frames", [])),
                                            stage="capture" if header.get("stage") == "capture" else "script")
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
            crash = _crash_dump(control)
            frames = _dump_frames(crash) if crash else ()
            hint = (" (a crash: recursion deeper than the C stack, or a library that failed to allocate "
                    "within the memory limit)") if number in (signal.SIGSEGV, signal.SIGABRT,
                                                             getattr(signal, "SIGBUS", -1)) else ""
            return ScriptFailure("error", None, f"the script's process was killed by {name}{hint} "
                                                f"before it reported a result", frames)
        if "\nstarted\n" not in "\n" + control:
            if self.report is not None and "set-up" in self.report.missing:
                return ScriptFailure("error", None, self.report.missing["set-up"])
            if "\nbad job: " in "\n" + control:
                return ScriptFailure("error", None, "the latchwatch probe refused its job: "
                                     + control.split("bad job: ", 1)[1].splitlines()[0])
            return ScriptFailure("error", None, f"the interpreter {self.python} could not start the latchwatch "
                                                f"probe (exit status {returncode}); see the output")
        return ScriptFailure("error", None, f"the script's process ended with exit status {returncode} "
                                            f"before it reported a result")

    def _sandbox(self, control: str) -> dict:
        report = self.report or SandboxReport.nothing("the child ended before it reported its sandbox")
        return report.entry()


def _kind(status) -> str:
    return status if status in ("error", "timeout", "limit") else "error"


def _timeout_dump(control: str) -> str | None:
    """The faulthandler dump the probe's watchdog wrote, if it fired."""
    at = control.find("Timeout (")
    return control[at:] if at >= 0 else None


def _crash_dump(control: str) -> str | None:
    """The stack faulthandler wrote when the child crashed, if it did."""
    at = control.find("Fatal Python error")
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
    chosen = next((b for b in blocks if any(f.file in HARNESS_FILES for f in b)), blocks[0] if blocks else [])
    return tuple(f for f in chosen if f.file not in HARNESS_FILES)


def _signal_name(number: int) -> str:
    try:
        return signal.Signals(number).name
    except ValueError:
        return f"signal {number}"




def _registered(selector: selectors.BaseSelector) -> list[int]:
    return [key.fd for key in selector.get_map().values()]
