"""The keeper and the init: namespaces, fork, wait, and the sweep of what a run leaves."""

from __future__ import annotations

import os
import select
import signal
import sys
import time

# Imported before the identity changes, which may hide the standard library.
try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .identity import MapRequest, plan_identity
from .kernel import (
    CLONE_NEWNET,
    CLONE_NEWPID,
    CLONE_NEWUSER,
    MS_NODEV,
    MS_NOEXEC,
    MS_NOSUID,
    PR_SET_CHILD_SUBREAPER,
    PR_SET_PDEATHSIG,
    SHARED_MEMORY,
    mount,
    prctl,
    report_sandbox,
    unshare,
    why,
    write_text,
)
from .opening import enter_mount_namespace


def enter_namespaces(config, record):
    """Network and PID namespaces for the run; returns (pid_namespace, user_namespace_in_keeper)."""
    skip = set(config.get("skip", ()))
    if not sys.platform.startswith("linux"):
        reason = "needs Linux namespaces (this is %s)" % sys.platform
        record.no("network", reason)
        record.no("leftovers", "no PID namespace or child subreaper on %s; the process group is ended" % sys.platform)
        return False, False
    if "namespaces" in skip:
        record.no("network", "namespaces not attempted (switched off for this run)")
        return False, False
    user_namespace = False
    try:
        if os.geteuid() == 0:
            unshare(CLONE_NEWNET | CLONE_NEWPID)
        else:
            uid, gid = os.geteuid(), os.getegid()
            unshare(CLONE_NEWUSER | CLONE_NEWNET | CLONE_NEWPID)
            write_text("/proc/self/setgroups", "deny")
            write_text("/proc/self/uid_map", "%d %d 1" % (uid, uid))
            write_text("/proc/self/gid_map", "%d %d 1" % (gid, gid))
            user_namespace = True
    except OSError as error:
        who = "as root" if os.geteuid() == 0 else "through a user namespace"
        reason = "cannot create namespaces %s: %s" % (who, why(error))
        record.no("network", reason)
        return False, False
    record.ok("network", "fresh network namespace: no interface but a loopback that is down")
    config["_private_shared_memory"] = _private_shared_memory(config)
    return True, user_namespace


def _private_shared_memory(config):
    """A mount namespace with a fresh tmpfs on /dev/shm, so that the run's POSIX
    semaphores and shared memory (multiprocessing's locks) work and vanish with it,
    and the write confinement can allow them without opening the host's /dev/shm.
    False where the kernel refuses; the run then has no shared memory to write."""
    if not os.path.isdir(SHARED_MEMORY) or not enter_mount_namespace(config):
        return False
    try:
        mount("latchwatch-shm", SHARED_MEMORY, "tmpfs", MS_NOSUID | MS_NODEV | MS_NOEXEC, "size=64m,mode=1777")
    except OSError:
        return False
    return True


def become_subreaper(record):
    """Make this process the subreaper of what the run leaves; False where the system has none."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        prctl(PR_SET_CHILD_SUBREAPER, 1)
    except (OSError, AttributeError) as error:
        record.no("leftovers", "no PID namespace, and cannot become a child subreaper: %s" % why(error))
        return False
    record.ok("leftovers", "child subreaper: every process the run leaves behind is found and killed")
    return True


def keep(child, pid_namespace, map_request, status_r, lifeline_fd=None):
    """Wait for the child (the namespace's init, or the worker itself), end what the run
    left, exit with the worker's status. Never returns.

    ``lifeline_fd`` is the read end of a pipe whose write end only latchwatch holds:
    at its end of file latchwatch is gone (killed, even by SIGKILL), and so is the run."""

    def stop(signum, frame):
        kill_quietly(child, signal.SIGKILL)  # in a PID namespace, the kernel then ends every process in it
        if not pid_namespace:
            _kill_descendants()

    for signum in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
        signal.signal(signum, stop)
    if map_request is not None:
        _serve_map_request(child, *map_request)
    try:
        _pid, status = _wait_watching(child, lifeline_fd, lambda: stop(None, None))
    except ChildProcessError:
        status = 0
    if status_r is not None:  # the init passes on how the worker ended
        reported = os.read(status_r, 32)
        if reported.strip().isdigit():
            status = int(reported)
    if not pid_namespace:
        sweep_leftovers()
    exit_like(status)


def _wait_watching(child, lifeline_fd, orphaned):
    """waitpid(child), calling ``orphaned`` once if the lifeline ends first."""
    pidfd = None
    if lifeline_fd is not None and hasattr(os, "pidfd_open"):
        try:
            pidfd = os.pidfd_open(child)
        except OSError:
            pidfd = None
    if pidfd is None:
        if lifeline_fd is not None:
            prctl(PR_SET_PDEATHSIG, signal.SIGTERM)  # second best: latchwatch's thread that started us
        return os.waitpid(child, 0)
    watched = [pidfd, lifeline_fd]
    while lifeline_fd in watched:
        try:
            ready, _, _ = select.select(watched, [], [])
        except InterruptedError:
            continue
        if pidfd in ready:
            break
        if lifeline_fd in ready and not os.read(lifeline_fd, 1):
            watched.remove(lifeline_fd)
            orphaned()
    os.close(pidfd)
    return os.waitpid(child, 0)


def _serve_map_request(child, request_r, reply_w, uid, gid):
    """Root's init asks for its new user namespace's maps: only a writer outside can map nobody."""
    try:
        if os.read(request_r, 1) == b"m":
            try:
                write_text("/proc/%d/uid_map" % child, "%d %d 1" % (uid, uid))
                write_text("/proc/%d/gid_map" % child, "%d %d 1" % (gid, gid))
                os.write(reply_w, b"y")
            except OSError as error:
                os.write(reply_w, ("n" + why(error)).encode())
    finally:
        os.close(request_r)
        os.close(reply_w)


def be_init(config, record, map_pipes, status_w, started, run_worker):
    """PID 1 of the run's namespace: reap orphans, and end the namespace when the worker ends.

    Being init, it ignores signals it has no handler for, which a script would find odd;
    so the script runs in a child of it, not in it."""
    ask = MapRequest(map_pipes) if map_pipes else None
    try:
        plan = plan_identity(config, record, ask)
    except OSError as error:
        record.no("set-up", "the sandbox could not be set up: %s" % why(error))
        report_sandbox(config, record, started)
        os._exit(70)
    finally:
        if ask is not None:
            ask.close()  # the keeper stops waiting for a request
    prctl(PR_SET_PDEATHSIG, signal.SIGKILL)  # after the credential change, which clears it
    worker = os.fork()
    if worker == 0:
        os.close(status_w)
        run_worker(config, record, plan, started, forked=True)
        os._exit(0)
    for fd in (config.get("job_fd"), config.get("result_fd"), config.get("control_fd")):
        if fd is not None:
            os.close(fd)
    while True:
        try:
            pid, status = os.waitpid(-1, 0)
        except ChildProcessError:
            os._exit(0)
        if pid == worker:
            os.write(status_w, b"%d" % status)
            os._exit(0)


def kill_quietly(pid, signum):
    """Send ``signum`` to ``pid``, ignoring a process that is already gone."""
    try:
        os.kill(pid, signum)
    except (ProcessLookupError, PermissionError):
        pass


def _children_table():
    """parent pid -> child pids, from /proc (children files are often not compiled in)."""
    table = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open("/proc/%s/stat" % name, "rb") as handle:
                stat = handle.read()
        except OSError:
            continue
        parent = int(stat[stat.rindex(b")") + 2:].split()[1])
        table.setdefault(parent, []).append(int(name))
    return table


def _kill_descendants():
    table = _children_table()
    pending = list(table.get(os.getpid(), ()))
    while pending:
        pid = pending.pop()
        kill_quietly(pid, signal.SIGKILL)
        pending.extend(table.get(pid, ()))


def sweep_leftovers(kill_all=None):
    """Kill and reap every descendant; orphans of the run are re-parented here (subreaper).

    ``kill_all`` replaces the /proc walk (inside a PID namespace, /proc shows the
    outer namespace's numbers)."""
    while True:
        (kill_all or _kill_descendants)()
        reaped = False
        while True:
            try:
                pid, _status = os.waitpid(-1, os.WNOHANG)
            except ChildProcessError:
                return
            if pid == 0:
                break
            reaped = True
        if not reaped:
            time.sleep(0.002)


def exit_like(status):
    """Exit as the worker did, so the parent sees its signal or exit code."""
    code = os.waitstatus_to_exitcode(status) if hasattr(os, "waitstatus_to_exitcode") else status >> 8
    if code < 0:
        if -code not in (signal.SIGKILL, signal.SIGSTOP):
            signal.signal(-code, signal.SIG_DFL)
        os.kill(os.getpid(), -code)
        code = 128 - code
    os._exit(code)
