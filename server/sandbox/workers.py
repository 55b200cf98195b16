"""Started children that wait for one job each.

A Worker is ``python -I server/child/start.py CONFIG`` in a fresh temporary folder:
its own session and process group, standard input on /dev/null, an allow-listed
environment, and three pipes (result and control from the child, the job to it).
The child confines itself, imports gdstk and waits; server/sandbox/runner.py sends the job and
supervises the run. A worker runs one job and ends: a child that ran a script is never
used again. A worker started with a socket is a corner host instead (server/sandbox/hosts.py),
which forks a child per job it receives.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from latchwatch.server.sandbox import policy as sandbox
from latchwatch.server.sandbox.folders import make_run_folder
from latchwatch.server.sandbox.policy import SandboxSettings

CHILD = Path(__file__).resolve().parent.parent / "child"  # the package that runs in the sandboxed interpreter
SANDBOX_CHILD = CHILD / "start.py"
HARNESS_FILES = frozenset(str(path) for path in CHILD.glob("*.py"))  # frames of these are never the user's
STARTUP_ALLOWANCE = 5.0  # s for interpreter start and imports before the script's own clock runs
COLLECT_ALLOWANCE = 30.0  # s for reading the layout once the script has finished
_ENV_NAMES = ("PATH", "HOME", "LANG", "LANGUAGE", "TZ")
_THREAD_NAMES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")


class RunnerError(RuntimeError):
    """The child could not be started at all (bad interpreter path, no permission)."""


class SandboxUnavailable(RunnerError):
    """The sandbox is required, and a protection it needs is not available here."""


def child_environment(temp_dir: Path, pass_env: tuple[str, ...] = ()) -> dict[str, str]:
    """The environment the script sees: locale and paths, and the variables the user named
    (``env`` in the project file, ``--env``), never other tokens or keys."""
    env = {name: value for name, value in os.environ.items()
           if name in _ENV_NAMES or name.startswith("LC_") or name in pass_env}
    env.setdefault("PATH", os.defpath)
    # One BLAS thread unless the user asks for more: a layout script does little linear
    # algebra, a thread pool costs each child start-up CPU and address space, and a
    # corner host (server/sandbox/hosts.py) must have no threads when it forks.
    for name in _THREAD_NAMES:
        env[name] = os.environ.get(name, "1")
    for name in ("TMPDIR", "TMP", "TEMP"):
        env[name] = str(temp_dir)
    return env


def cpu_seconds(timeout: float) -> int:
    """The CPU-time limit of a run: its timeout plus the start-up and collection allowances."""
    return math.ceil(timeout + STARTUP_ALLOWANCE + COLLECT_ALLOWANCE)


@dataclass(frozen=True)
class WorkerKey:
    """What a worker is started with; a spare serves only jobs with the same key."""

    python: str
    project_root: str | None
    settings: SandboxSettings
    timeout: float


class Worker:
    """One started child, its pipes and its run folder."""

    def __init__(self, key: WorkerKey, process: subprocess.Popen, work: Path, result_r: int, control_r: int,
                 job_w: int):
        self.key = key
        self.process = process
        self.work = work
        self.result_r = result_r
        self.control_r = control_r
        self.job_w: int | None = job_w
        self._pidfd: int | None = None

    @classmethod
    def start(cls, key: WorkerKey, needs_reading: list[str], host_fd: int | None = None) -> Worker:
        """Start the child; raises RunnerError when the interpreter cannot be started.

        With ``host_fd`` (a socket) the child is a corner host (server/sandbox/hosts.py): it runs
        no job of its own and forks a child per job it receives there."""
        python = named_interpreter(key.python)
        work = make_run_folder()
        result_r, result_w = os.pipe()
        control_r, control_w = os.pipe()
        job_r, job_w = os.pipe()
        widen_pipe(result_r)
        lifeline = lifeline_fd()
        config = sandbox.child_config(
            key.settings, work=str(work), result_fd=result_w, control_fd=control_w,
            job_fd=job_r, cpu_seconds=cpu_seconds(key.timeout), needs_reading=needs_reading,
            python=None if python == sys.executable else python, lifeline_fd=lifeline)
        env = child_environment(work, key.settings.pass_env)
        if host_fd is not None:
            config["host_fd"] = host_fd
            env.update(dict.fromkeys(_THREAD_NAMES, "1"))  # a process with threads must not fork
        try:
            # latchwatch's own interpreter confines the run; the named one is exec'd only then.
            process = subprocess.Popen(
                [sys.executable, "-I", str(SANDBOX_CHILD), json.dumps(config)], stdin=subprocess.DEVNULL,
                stdout=subprocess.PIPE if host_fd is None else subprocess.DEVNULL, stderr=subprocess.STDOUT,
                cwd=work, env=env, start_new_session=True,
                pass_fds=(result_w, control_w, job_r, lifeline) + ((host_fd,) if host_fd is not None else ()))
        except OSError as error:
            for fd in (result_r, result_w, control_r, control_w, job_r, job_w):
                os.close(fd)
            shutil.rmtree(work, ignore_errors=True)
            raise RunnerError(f"cannot start the interpreter {key.python!r}: {error}") from None
        for fd in (result_w, control_w, job_r):
            os.close(fd)
        return cls(key, process, work, result_r, control_r, job_w)

    # What server/sandbox/runner.py supervises; server/sandbox/hosts.py's HostedJob offers the same.

    @property
    def output_fd(self) -> int:
        return self.process.stdout.fileno()

    @property
    def returncode(self) -> int | None:
        return self.process.returncode

    def exit_fd(self) -> int | None:
        """A descriptor readable once the child has ended (a pidfd), or None: poll exited()."""
        if self._pidfd is None:
            try:
                self._pidfd = os.pidfd_open(self.process.pid)
            except (AttributeError, OSError):
                self._pidfd = -1
        return self._pidfd if self._pidfd >= 0 else None

    def exited(self) -> bool:
        """True once the child has ended, without reaping it (its group id stays taken)."""
        try:
            info = os.waitid(os.P_PID, self.process.pid, os.WEXITED | os.WNOHANG | os.WNOWAIT)
        except ChildProcessError:
            return True
        return info is not None

    def signal(self, sig: int) -> None:
        """Signal the child's whole process group."""
        kill_group(self.process.pid, sig)

    def alive(self) -> bool:
        return self.process.poll() is None

    def close_job_pipe(self) -> None:
        close_quietly(self.job_w)
        self.job_w = None

    def discard(self) -> None:
        """End the child and everything in its group, reap it, free its pipes and folder."""
        self.close_job_pipe()
        kill_group(self.process.pid, signal.SIGKILL)
        self.process.wait()
        if self.process.stdout is not None:
            self.process.stdout.close()
        close_quietly(self._pidfd, self.result_r, self.control_r)
        self._pidfd = None
        shutil.rmtree(self.work, ignore_errors=True)


def named_interpreter(python: str) -> str:
    """The interpreter's path, found (a bare name on PATH) but never run: the sandbox
    execs it once confined. Raises RunnerError when there is no such program."""
    found = shutil.which(python) if os.sep not in python else python
    if not found or not os.path.isfile(found) or not os.access(found, os.X_OK):
        raise RunnerError(f"cannot start the interpreter {python!r}: no such program (or not executable)")
    return os.path.abspath(found)


_lifeline: tuple[int, int] | None = None


def lifeline_fd() -> int:
    """The read end of a pipe whose write end this process holds until it ends: every
    run's keeper watches it, and ends the run when latchwatch is gone (server/child/keeper.py)."""
    global _lifeline
    if _lifeline is None:
        _lifeline = os.pipe()  # neither end is inherited, except where passed on purpose
    return _lifeline[0]


def close_quietly(*fds: int | None) -> None:
    """Close each descriptor; None, -1 and ones already closed are left alone."""
    for fd in fds:
        if fd is not None and fd >= 0:
            try:
                os.close(fd)
            except OSError:
                pass


def kill_group(pgid: int, sig: int) -> None:
    """Signal a process group, ignoring one that is already gone."""
    try:
        os.killpg(pgid, sig)
    except (ProcessLookupError, PermissionError):
        pass


def widen_pipe(fd: int) -> None:
    """Fewer wake-ups for large layouts: a 1 MiB pipe where Linux allows it."""
    try:
        import fcntl

        fcntl.fcntl(fd, getattr(fcntl, "F_SETPIPE_SZ", 1031), 1 << 20)
    except (ImportError, OSError):
        pass


def inspect_sandbox(python: str | None = None, project_root: str | None = None,
                    settings: SandboxSettings | None = None, wait: float = 30.0):
    """Start a worker, read its sandbox report and its ``ready`` line, end it unused.

    Returns (SandboxReport, ready line or None, output). What `latchwatch doctor` shows,
    and what tests ask before they expect a protection to hold."""
    import selectors
    import time

    from latchwatch.server.sandbox.policy import SandboxReport

    root = os.path.abspath(project_root or os.getcwd())
    settings = settings if settings is not None else SandboxSettings()
    worker = Worker.start(WorkerKey(python or sys.executable, root, settings, 10.0), needs_reading=[root])
    control, output = bytearray(), bytearray()
    try:
        selector = selectors.DefaultSelector()
        sinks = {worker.control_r: control.extend, worker.process.stdout.fileno(): output.extend}
        for fd in sinks:
            selector.register(fd, selectors.EVENT_READ)
        deadline = time.monotonic() + wait
        while b"\nready" not in b"\n" + control and sinks and time.monotonic() < deadline:
            for key, _events in selector.select(0.1):
                chunk = os.read(key.fd, 1 << 16)
                if chunk:
                    sinks[key.fd](chunk)
                else:
                    selector.unregister(key.fd)
                    del sinks[key.fd]
        selector.close()
    finally:
        worker.discard()
    lines = control.decode("utf-8", "replace").splitlines()
    report_line = next((line for line in lines if line.startswith("sandbox ")), None)
    report = (SandboxReport.from_control_line(report_line) if report_line
              else SandboxReport.nothing("the child ended before it reported its sandbox"))
    ready = next((line for line in lines if line.startswith("ready")), None)
    return report, ready, output.decode("utf-8", "replace")
