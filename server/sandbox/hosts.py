"""Corner hosts: a confined worker with gdstk imported that forks one child per job.

A parameter sweep calls the same function of the same script dozens of times; a fresh
interpreter for each call spends most of its time importing numpy and gdstk. A host
is a Worker (server/sandbox/workers.py) started with a socket: it confines itself exactly as
a worker does, imports gdstk once, and then, for every job it receives, forks a child
that starts its own session, gets a run folder of its own with a Landlock layer on it,
reports its sandbox and runs the job (server/child/host.py, serve_jobs). When the
child ends the host kills whatever it left behind, removes its folder and writes its
exit code to the job's status pipe. Nothing a job does reaches the next one: each is
forked from the host, which never runs a script itself.

A HostedJob is what server/sandbox/runner.py supervises, with the same members as a Worker.
HOSTS keeps idle hosts per (worker key, folders to read), at most one per core for at
most two keys, retires a host after RETIRE_AFTER jobs (its own CPU-time limit counts
every fork and wait) and ends one idle for longer than IDLE_LIMIT at the next take.
"""

from __future__ import annotations

import atexit
import os
import signal
import socket
import threading
import time
from collections import OrderedDict

from latchwatch.server.sandbox.workers import RunnerError, Worker, WorkerKey, close_quietly, widen_pipe

RETIRE_AFTER = 500
IDLE_LIMIT = 600.0  # s an idle host is kept: it holds memory, and the gdstk it imported may be replaced meanwhile
_STATUS_WAIT = 2.0  # s to wait for a killed job's status before the host is given up


class Host:
    """One started host and the socket jobs are sent on."""

    def __init__(self, worker: Worker, channel: socket.socket, reading: tuple[str, ...]):
        self.worker = worker
        self.channel = channel
        self.reading = reading
        self.served = 0
        self.idle_since = time.monotonic()

    @classmethod
    def start(cls, key: WorkerKey, needs_reading: list[str]) -> Host:
        """Start a host: a confined worker with the layout library imported, waiting for jobs on a socket."""
        try:
            ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
        except (AttributeError, OSError) as error:  # no such socket here: the runner uses a fresh child
            raise RunnerError(f"no corner host on this system: {error}") from None
        try:
            worker = Worker.start(key, needs_reading, host_fd=theirs.fileno())
        except RunnerError:
            ours.close()
            raise
        finally:
            theirs.close()
        # The host's own pipes carry nothing a job needs: its sandbox is reported per job.
        worker.close_job_pipe()
        close_quietly(worker.result_r, worker.control_r)
        worker.result_r = worker.control_r = -1
        return cls(worker, ours, tuple(needs_reading))

    @property
    def key(self) -> WorkerKey:
        return self.worker.key

    def alive(self) -> bool:
        return self.worker.alive()

    def submit(self) -> HostedJob:
        """Send the next job's pipes; raises RunnerError when the host is gone."""
        self.served += 1
        return HostedJob(self, self.served)

    def say(self, text: str, fds: list[int] = ()) -> None:
        ancillary = [(socket.SOL_SOCKET, socket.SCM_RIGHTS, _int_array(fds))] if fds else []
        self.channel.sendmsg([text.encode("ascii")], ancillary)

    def close(self) -> None:
        """End the host: closing the socket ends it, and the group kill whatever it ran."""
        import subprocess

        try:
            self.channel.close()  # the host ends by itself, so its keeper can sweep what is left
            self.worker.process.wait(timeout=1.0)
        except subprocess.TimeoutExpired:
            pass
        finally:
            self.worker.discard()


class HostedJob:
    """One job in a child of a host; what server/sandbox/runner.py supervises, as it does a Worker."""

    def __init__(self, host: Host, serial: int):
        self.host = host
        self.serial = serial
        self.key = host.key
        pipes = [os.pipe() for _ in range(5)]  # output, result, control, job, status
        (self.output_fd, output_w), (self.result_r, result_w), (self.control_r, control_w), \
            (job_r, self.job_w), (self.status_r, status_w) = pipes
        theirs = [output_w, result_w, control_w, job_r, status_w]
        widen_pipe(self.result_r)
        try:
            host.say(f"job {serial}", theirs)
        except OSError as error:
            close_quietly(self.output_fd, self.result_r, self.control_r, self.job_w, self.status_r)
            raise RunnerError(f"the corner host is gone: {error}") from None
        finally:
            close_quietly(*theirs)
        os.set_blocking(self.status_r, False)
        self._status = bytearray()
        self._ended = False

    @property
    def returncode(self) -> int | None:
        """The job's exit code (negative: the signal); None when the host ended first."""
        text = self._status.decode("ascii", "replace").strip()
        return int(text) if self._ended and text.lstrip("-").isdigit() else None

    def exit_fd(self) -> int:
        return self.status_r

    def exited(self) -> bool:
        while not self._ended:
            try:
                chunk = os.read(self.status_r, 64)
            except BlockingIOError:
                return False
            except OSError:
                chunk = b""
            if not chunk:
                self._ended = True
            self._status += chunk
        return True

    def signal(self, sig: int) -> None:
        """Signal the job's process group (after the job has ended, the host did already)."""
        if self._ended:
            return
        try:
            self.host.say(f"kill {self.serial} {int(sig)}")
        except OSError:
            pass

    def close_job_pipe(self) -> None:
        close_quietly(self.job_w)
        self.job_w = None

    def discard(self) -> None:
        """Free the job's pipes; the host goes back to the pool if it reported the job's end."""
        self.close_job_pipe()
        if not self.exited():
            self.signal(signal.SIGKILL)
            _wait_readable(self.status_r, _STATUS_WAIT)
            self.exited()
        close_quietly(self.output_fd, self.result_r, self.control_r, self.status_r)
        if self.returncode is not None:
            HOSTS.give_back(self.host)
        else:
            self.host.close()

    @property
    def host_failed(self) -> bool:
        """The host ended before it reported this job's end (killed, or its set-up failed)."""
        return self._ended and self.returncode is None


def available_cpus() -> int:
    """The CPUs this process may run on (its affinity), at least 1."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


class HostPool:
    """Idle hosts per (key, folders to read); ``take`` starts one when none is idle."""

    def __init__(self, per_key: int | None = None, keys: int = 2):
        self.per_key = per_key or available_cpus()
        self.keys = keys
        self._idle: OrderedDict[tuple, list[Host]] = OrderedDict()
        self._lock = threading.Lock()

    def take(self, key: WorkerKey, needs_reading: list[str]) -> Host:
        slot = (key, tuple(needs_reading))
        for old in self._expired():
            old.close()
        while True:
            with self._lock:
                idle = self._idle.get(slot)
                host = idle.pop() if idle else None
            if host is None:
                return Host.start(key, needs_reading)
            if host.alive():
                return host
            host.close()

    def _expired(self) -> list[Host]:
        """Idle hosts past IDLE_LIMIT, taken out of the pool (checked whenever a host is taken)."""
        now = time.monotonic()
        with self._lock:
            expired = [h for idle in self._idle.values() for h in idle if now - h.idle_since > IDLE_LIMIT]
            for idle in self._idle.values():
                idle[:] = [h for h in idle if h not in expired]
        return expired

    def give_back(self, host: Host) -> None:
        """Return an idle host to the pool, ending it when it is spent or the pool is full."""
        slot = (host.key, host.reading)
        evicted = []
        with self._lock:
            idle = self._idle.setdefault(slot, [])
            self._idle.move_to_end(slot)
            if host.served >= RETIRE_AFTER or len(idle) >= self.per_key:
                evicted.append(host)
            else:
                host.idle_since = time.monotonic()
                idle.append(host)
            while len(self._idle) > self.keys:
                evicted.extend(self._idle.popitem(last=False)[1])
        for old in evicted:
            old.close()

    def close(self) -> None:
        with self._lock:
            hosts = [h for idle in self._idle.values() for h in idle]
            self._idle.clear()
        for host in hosts:
            host.close()


HOSTS = HostPool()
atexit.register(HOSTS.close)


def _int_array(fds) -> bytes:
    import array

    return array.array("i", fds).tobytes()


def _wait_readable(fd: int, seconds: float) -> None:
    import select

    select.select([fd], [], [], seconds)
