"""A corner host: the confined worker, with the layout library imported, forks one child per job."""

from __future__ import annotations

import os
import signal
import sys
import time

# Imported before the identity changes, which may hide the standard library.
try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .keeper import kill_quietly, sweep_leftovers
from .kernel import PR_SET_CHILD_SUBREAPER, PR_SET_PDEATHSIG, Record, prctl, report_sandbox
from .landlock import confine_with_landlock


def serve_jobs(config, record, job_module):
    """Run jobs sent on the host socket, one at a time, each in a child of its own. Never returns.

    A job message is ``job SERIAL`` with five descriptors (output, result, control
    and job pipes, and a status pipe); ``kill SERIAL SIGNAL`` signals that job's
    process group. The child starts its own session, gets a run folder of its own
    beneath the host's and a second Landlock layer confining writes to it, reports its
    sandbox and hands over to the job module. When it ends, everything it left is killed,
    its folder removed, and its exit code written to the status pipe."""
    import socket

    host = socket.socket(fileno=config["host_fd"])
    for key in ("result_fd", "control_fd", "job_fd"):  # the host's own pipes: its report is out
        os.close(config[key])
    in_pid_namespace = bool(config.get("_pid_namespace"))
    if sys.platform.startswith("linux"):
        try:
            prctl(PR_SET_CHILD_SUBREAPER, 1)  # what a job leaves behind is re-parented here
        except OSError:
            pass
    served = 0
    while True:
        words, fds = _receive(host)
        if words is None:
            os._exit(0)  # the runner closed its end, or went away
        if len(words) != 2 or words[0] != "job" or len(fds) != 5:
            for fd in fds:
                os.close(fd)
            continue
        served += 1
        _host_one_job(config, record, job_module, host, words[1], fds, served, in_pid_namespace)


def _receive(host):
    """(words, descriptors) of the next message; (None, []) at end of input."""
    import array
    import socket

    numbers = array.array("i")
    try:
        message, ancillary, _flags, _address = host.recvmsg(256, socket.CMSG_LEN(8 * numbers.itemsize))
    except InterruptedError:
        return [], []
    except OSError:
        return None, []
    for level, kind, data in ancillary:
        if level == socket.SOL_SOCKET and kind == socket.SCM_RIGHTS:
            numbers.frombytes(data[:len(data) - len(data) % numbers.itemsize])
    if not message and not numbers:
        return None, []
    return message.decode("ascii", "replace").split(), list(numbers)


def _host_one_job(config, record, job_module, host, serial, fds, served, in_pid_namespace):
    import shutil

    started = time.perf_counter()
    output_w, result_w, control_w, job_r, status_w = fds
    folder = os.path.join(config["work"], "job-%d" % served)
    os.mkdir(folder, 0o700)
    child = os.fork()
    if child == 0:
        host.close()
        os.close(status_w)
        job_config = dict(config, work=folder, result_fd=result_w, control_fd=control_w, job_fd=job_r,
                          host_fd=None)
        _become_job(job_config, record, output_w, started)
        job_module.serve(job_config)
        os._exit(0)
    for fd in (output_w, result_w, control_w, job_r):
        os.close(fd)
    status = _wait_for_job(host, child, serial)
    sweep_leftovers((lambda: kill_quietly(-1, signal.SIGKILL)) if in_pid_namespace else None)
    shutil.rmtree(folder, ignore_errors=True)
    code = -os.WTERMSIG(status) if os.WIFSIGNALED(status) else os.WEXITSTATUS(status)
    try:
        os.write(status_w, b"%d" % code)
    except OSError:
        pass
    os.close(status_w)


def _become_job(config, record, output_w, started):
    """In the forked child: own session, own output, own folder, a Landlock layer on it."""
    os.setsid()
    if sys.platform.startswith("linux"):
        prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
    os.dup2(output_w, 1)
    os.dup2(output_w, 2)
    os.close(output_w)
    os.chdir(config["work"])
    for name in ("TMPDIR", "TMP", "TEMP"):
        os.environ[name] = config["work"]
    if os.environ.get("HOME") == os.path.dirname(config["work"]):  # root's runs: HOME was the host's folder
        os.environ["HOME"] = config["work"]
    if "tempfile" in sys.modules:
        sys.modules["tempfile"].tempdir = None
    job_record = Record()
    job_record.in_force, job_record.missing = dict(record.in_force), dict(record.missing)
    if "writes" in job_record.in_force:
        del job_record.in_force["writes"]
        confine_with_landlock(config, job_record)
        if "writes" not in job_record.in_force:
            job_record.ok("writes", "Landlock: writes only beneath the host's folder, shared by its jobs "
                                    "(this job's own layer failed: %s)" % job_record.missing.pop("writes"))
    if "leftovers" in job_record.in_force:
        job_record.ok("leftovers", job_record.in_force["leftovers"]
                      + "; the host kills whatever a job leaves when it ends")
    report_sandbox(config, job_record, started)


def _wait_for_job(host, child, serial):
    """The job's wait status; ``kill SERIAL SIGNAL`` messages meanwhile signal its group."""
    import select

    try:
        pidfd = os.pidfd_open(child)
    except (AttributeError, OSError):
        pidfd = None
    try:
        while True:
            pid, status = os.waitpid(child, os.WNOHANG)
            if pid == child:
                return status
            watched = [host] + ([pidfd] if pidfd is not None else [])
            ready, _, _ = select.select(watched, [], [], 1.0 if pidfd is not None else 0.01)
            if host in ready:
                words, fds = _receive(host)
                for fd in fds:
                    os.close(fd)
                if words is None:  # the runner is gone: so is the job (and the keeper ends the rest)
                    kill_quietly(-child, signal.SIGKILL)
                    kill_quietly(child, signal.SIGKILL)
                    os._exit(0)
                if len(words) == 3 and words[0] == "kill" and words[1] == serial and words[2].isdigit():
                    kill_quietly(-child, int(words[2]))
                    kill_quietly(child, int(words[2]))
    finally:
        if pidfd is not None:
            os.close(pidfd)
