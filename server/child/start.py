"""Confines a layout-script child, then hands over to the probe: the entry point of every child.

Started by server/workers.py as ``python -I sandbox_child.py CONFIG_JSON``. Standard
library only, Python 3.8 and later (the interpreter may be the user's own). It runs
before numpy or gdstk are imported, because only a single-threaded process may enter
a user namespace.

Three processes result on Linux:

- the keeper (the process the runner started) enters fresh network and PID
  namespaces (through a user namespace when it is not root), forks, waits, and exits
  with the worker's status. Without a PID namespace it is a child subreaper instead,
  forks the worker directly and kills whatever the run left behind.
- the init, PID 1 of the new namespace: for root it enters a user namespace of the
  run's own (the keeper maps nobody into it), then forks the worker and reaps orphans.
  When the worker ends the init ends, and the kernel ends every process left in the
  namespace.
- the worker gives up root's privileges, sets the resource limits, confines writes
  (and TCP) with Landlock and loads the probe, which imports gdstk and waits for its job.

Elsewhere (macOS, Windows) the one process applies what exists and runs the probe.

Every step either works or is recorded with the reason it did not. The worker reports
the record as one control-pipe line, ``sandbox {json}``, before anything else runs;
the parent decides whether a missing protection is acceptable.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time

# Imported before the identity changes, which may hide the standard library.
import ctypes

try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

CLONE_NEWUSER = 0x10000000
CLONE_NEWPID = 0x20000000
CLONE_NEWNET = 0x40000000
PR_SET_PDEATHSIG = 1
PR_SET_SECUREBITS = 28
PR_SET_NO_NEW_PRIVS = 38
PR_SET_CHILD_SUBREAPER = 36
SECBIT_NOROOT_AND_LOCK = 0x3  # exec never grants root's capabilities, and that cannot change
CAPABILITY_VERSION_3 = 0x20080522
LANDLOCK_CREATE_RULESET, LANDLOCK_ADD_RULE, LANDLOCK_RESTRICT_SELF = 444, 445, 446
LANDLOCK_RULE_PATH_BENEATH = 1
# Landlock filesystem rights that change something; reads and execution stay open.
_WRITE_RIGHTS_BY_ABI = (
    (1, (1 << 1) | (1 << 4) | (1 << 5) | sum(1 << bit for bit in range(6, 13))),  # write, remove, make
    (2, 1 << 13),  # refer: link and rename into another folder
    (3, 1 << 14),  # truncate
)
_FILE_WRITE = (1 << 1) | (1 << 14)  # the rights a single file (not a folder) can carry
_NET_TCP = (1 << 0) | (1 << 1)  # bind and connect, ABI 4
_SCOPE_ABSTRACT_UNIX_AND_SIGNAL = (1 << 0) | (1 << 1)  # ABI 6
_WRITABLE_DEVICES = ("/dev/null", "/dev/zero", "/dev/full")
NOBODY = "nobody"


class Record:
    """What is in force, with a detail, and what is not, with the reason."""

    def __init__(self):
        self.in_force = {}
        self.missing = {}

    def ok(self, name, detail):
        self.in_force[name] = detail
        self.missing.pop(name, None)

    def no(self, name, reason):
        if name not in self.in_force:
            self.missing[name] = reason

    def as_dict(self):
        return {"in_force": self.in_force, "missing": self.missing}


_libc_handle = None


def _libc():
    global _libc_handle
    if _libc_handle is None:
        _libc_handle = ctypes.CDLL(None, use_errno=True)
    return _libc_handle


def _call(function, *args):
    """Call a libc function; raise OSError with errno on a -1 result."""
    result = function(*args)
    if result == -1:
        number = ctypes.get_errno()
        raise OSError(number, os.strerror(number))
    return result


def _prctl(option, value=0):
    return _call(_libc().prctl, ctypes.c_int(option), ctypes.c_ulong(value), ctypes.c_ulong(0),
                 ctypes.c_ulong(0), ctypes.c_ulong(0))


def _unshare(flags):
    if hasattr(os, "unshare"):  # Python 3.12+
        os.unshare(flags)
    else:
        _call(_libc().unshare, ctypes.c_int(flags))


def _why(error):
    if isinstance(error, OSError):
        return os.strerror(error.errno) if error.errno else (error.strerror or str(error))
    return str(error)


# ---------------------------------------------------------------------------
# The keeper: namespaces, fork, wait, sweep.


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
            _unshare(CLONE_NEWNET | CLONE_NEWPID)
        else:
            uid, gid = os.geteuid(), os.getegid()
            _unshare(CLONE_NEWUSER | CLONE_NEWNET | CLONE_NEWPID)
            _write("/proc/self/setgroups", "deny")
            _write("/proc/self/uid_map", "%d %d 1" % (uid, uid))
            _write("/proc/self/gid_map", "%d %d 1" % (gid, gid))
            user_namespace = True
    except OSError as error:
        who = "as root" if os.geteuid() == 0 else "through a user namespace"
        reason = "cannot create namespaces %s: %s" % (who, _why(error))
        record.no("network", reason)
        return False, False
    record.ok("network", "fresh network namespace: no interface but a loopback that is down")
    return True, user_namespace


def _write(path, text):
    with open(path, "w") as handle:
        handle.write(text)


def become_subreaper(record):
    if not sys.platform.startswith("linux"):
        return False
    try:
        _prctl(PR_SET_CHILD_SUBREAPER, 1)
    except (OSError, AttributeError) as error:
        record.no("leftovers", "no PID namespace, and cannot become a child subreaper: %s" % _why(error))
        return False
    record.ok("leftovers", "child subreaper: every process the run leaves behind is found and killed")
    return True


def keep(child, pid_namespace, map_request, status_r):
    """Wait for the child (the namespace's init, or the worker itself), end what the run
    left, exit with the worker's status. Never returns."""

    def stop(signum, frame):
        _kill(child, signal.SIGKILL)  # in a PID namespace, the kernel then ends every process in it
        if not pid_namespace:
            _kill_descendants()

    for signum in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
        signal.signal(signum, stop)
    if map_request is not None:
        _serve_map_request(child, *map_request)
    try:
        _pid, status = os.waitpid(child, 0)
    except ChildProcessError:
        status = 0
    if status_r is not None:  # the init passes on how the worker ended
        reported = os.read(status_r, 32)
        if reported.strip().isdigit():
            status = int(reported)
    if not pid_namespace:
        _sweep()
    _exit_like(status)


def _serve_map_request(child, request_r, reply_w, uid, gid):
    """Root's init asks for its new user namespace's maps: only a writer outside can map nobody."""
    try:
        if os.read(request_r, 1) == b"m":
            try:
                _write("/proc/%d/uid_map" % child, "%d %d 1" % (uid, uid))
                _write("/proc/%d/gid_map" % child, "%d %d 1" % (gid, gid))
                os.write(reply_w, b"y")
            except OSError as error:
                os.write(reply_w, ("n" + _why(error)).encode())
    finally:
        os.close(request_r)
        os.close(reply_w)


def be_init(config, record, map_pipes, status_w, started):
    """PID 1 of the run's namespace: reap orphans, and end the namespace when the worker ends.

    Being init, it ignores signals it has no handler for, which a script would find odd;
    so the script runs in a child of it, not in it."""
    ask = MapRequest(map_pipes) if map_pipes else None
    try:
        plan = plan_identity(config, record, ask)
    except OSError as error:
        record.no("set-up", "the sandbox could not be set up: %s" % _why(error))
        _report(config, record, started)
        os._exit(70)
    finally:
        if ask is not None:
            ask.close()  # the keeper stops waiting for a request
    _prctl(PR_SET_PDEATHSIG, signal.SIGKILL)  # after the credential change, which clears it
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


def _kill(pid, signum):
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
        _kill(pid, signal.SIGKILL)
        pending.extend(table.get(pid, ()))


def _sweep(kill_all=None):
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


def _exit_like(status):
    """Exit as the worker did, so the parent sees its signal or exit code."""
    code = os.waitstatus_to_exitcode(status) if hasattr(os, "waitstatus_to_exitcode") else status >> 8
    if code < 0:
        if -code not in (signal.SIGKILL, signal.SIGSTOP):
            signal.signal(-code, signal.SIG_DFL)
        os.kill(os.getpid(), -code)
        code = 128 - code
    os._exit(code)


# ---------------------------------------------------------------------------
# The worker: privileges, limits, Landlock.


def plan_identity(config, record, ask_for_maps):
    """Root only, while still root: who the worker becomes, and a user namespace of the
    run's own when the keeper can map nobody into it. None when not root."""
    if not hasattr(os, "geteuid") or os.geteuid() != 0 or "identity" in set(config.get("skip", ())):
        return None
    try:
        entry = pwd.getpwnam(NOBODY)
    except (AttributeError, KeyError):
        return {"no_user": True}
    uid, gid = entry.pw_uid, entry.pw_gid
    unreadable = _unreadable_as(uid, gid, list(config.get("needs_reading", ())) + [config["probe"]])
    if unreadable is None:
        os.chown(config["work"], uid, gid)  # the run's folder is the one place it may write
    os.setgroups([])
    in_user_namespace = ask_for_maps is not None and ask_for_maps(uid, gid)
    return {"uid": uid, "gid": gid, "unreadable": unreadable, "user_namespace": in_user_namespace}


def drop_privileges(config, record, plan):
    """Root gives up its privileges; anyone gives up the capabilities a user namespace granted.

    Returns True when the run's processes are counted in a user namespace of their own
    (so the process limit counts this run alone)."""
    own_namespace = config.get("_keeper_user_namespace", False)
    if not hasattr(os, "geteuid"):
        record.no("privileges", "no user ids on %s" % sys.platform)
        return False
    if "identity" in set(config.get("skip", ())):
        record.no("privileges", "privileges not dropped (switched off for this run)")
        record.no("other-processes", "privileges not dropped (switched off for this run)")
        return own_namespace
    if plan is None:  # inside root's user namespace geteuid() no longer says 0: the plan tells
        if os.geteuid() != 0:
            _drop_capabilities()
            record.ok("privileges", "runs as the unprivileged user %d, without capabilities" % os.geteuid())
            record.no("other-processes", "the user's other processes (the editor's, say) are readable by the same "
                                         "user unless Landlock stops it")
            return own_namespace
        plan = plan_identity(config, record, None)
    if plan.get("no_user"):
        _drop_capabilities()
        record.ok("other-processes", "no capabilities: root's processes (the tool's own) cannot be read")
        record.no("privileges", "running as root and there is no user %r to drop to; capabilities dropped" % NOBODY)
        return False
    uid, gid, unreadable = plan["uid"], plan["gid"], plan["unreadable"]
    if unreadable is None:
        if hasattr(os, "setresuid"):
            os.setresgid(gid, gid, gid)
            os.setresuid(uid, uid, uid)
        else:  # macOS: as root, setuid sets the real, effective and saved ids alike
            os.setgid(gid)
            os.setuid(uid)
        _drop_capabilities()
        record.ok("privileges", "runs as %s (uid %d, gid %d), without capabilities" % (NOBODY, uid, gid))
        record.ok("other-processes", "as %s without capabilities: the tool's own processes cannot be read" % NOBODY)
        return plan["user_namespace"]
    if plan["user_namespace"]:
        # The tool's files are not readable by nobody (an interpreter under /root, say):
        # keep root's file ownership but no capability, with the real uid of nobody so
        # the process limit applies; execs never regain root's capabilities.
        _prctl(PR_SET_SECUREBITS, SECBIT_NOROOT_AND_LOCK)
        os.setresuid(uid, -1, -1)
        _drop_capabilities()
        record.ok("privileges", "root's file access without capabilities, real user %s, in a user namespace "
                                "(%s cannot read %s)" % (NOBODY, NOBODY, unreadable))
        record.ok("other-processes", "no capabilities: root's processes (the tool's own) cannot be read")
        return True
    _drop_capabilities()
    record.ok("other-processes", "no capabilities: root's processes (the tool's own) cannot be read")
    record.no("privileges", "running as root: %s cannot read %s and there is no user namespace; capabilities "
                            "dropped, but root's process limit cannot be enforced" % (NOBODY, unreadable))
    return False


def _unreadable_as(uid, gid, paths):
    """The first path the given user cannot read (and enter, for folders), or None."""
    wanted = [os.path.dirname(os.__file__), sys.prefix, sys.base_prefix, os.path.abspath(__file__)]
    wanted += _library_folders() + list(paths)
    # Existence is judged as root: as the other user a path under /root does not exist.
    checks = [(path, os.R_OK | (os.X_OK if os.path.isdir(path) else 0)) for path in wanted
              if path and os.path.exists(path)]
    os.setegid(gid)
    os.seteuid(uid)
    try:
        for path, mode in checks:
            if not os.access(path, mode, effective_ids=True):
                return path
        return None
    finally:
        os.seteuid(0)
        os.setegid(0)


def _library_folders():
    import importlib.util

    folders = []
    for name in ("numpy", "gdstk"):
        try:
            spec = importlib.util.find_spec(name)
        except (ImportError, ValueError):
            spec = None
        if spec is not None and spec.origin:
            folders.append(os.path.dirname(spec.origin))
    return folders


def _drop_capabilities():
    if not sys.platform.startswith("linux"):
        return
    class Header(ctypes.Structure):
        _fields_ = [("version", ctypes.c_uint32), ("pid", ctypes.c_int)]

    header = Header(CAPABILITY_VERSION_3, 0)
    data = (ctypes.c_uint32 * 6)()
    _call(_libc().capset, ctypes.byref(header), ctypes.byref(data))


class MapRequest:
    """For root's init: enter a user namespace and have the keeper map nobody into it."""

    def __init__(self, pipes):
        self.request_w, self.reply_r = pipes

    def __call__(self, uid, gid):
        try:
            _unshare(CLONE_NEWUSER)
        except OSError:
            return False
        os.write(self.request_w, b"m")
        reply = os.read(self.reply_r, 256)
        if reply != b"y":
            raise OSError(0, "the keeper could not map %s into the run's user namespace: %s"
                          % (NOBODY, reply[1:].decode("utf-8", "replace") or "no answer"))
        return True

    def close(self):
        for fd in (self.request_w, self.reply_r):
            os.close(fd)


LIMITS = (
    # name, resource, config key
    ("core", "RLIMIT_CORE", None),
    ("memory", "RLIMIT_AS", "memory"),
    ("cpu", "RLIMIT_CPU", "cpu"),
    ("file-size", "RLIMIT_FSIZE", "file_size"),
    ("open-files", "RLIMIT_NOFILE", "open_files"),
    ("processes", "RLIMIT_NPROC", "processes"),
)


def apply_limits(config, record, own_user_namespace):
    """Lower soft and hard limits, so the script cannot lift them again."""
    if resource is None:
        for name, _which, _key in LIMITS:
            record.no(name, "no resource limits on %s" % sys.platform)
        return
    for name, which, key in LIMITS:
        value = 0 if key is None else config.get(key)
        detail = ""
        if value is None:
            record.no(name, "not asked for")
            continue
        if not hasattr(resource, which):
            record.no(name, "%s does not exist on %s" % (which, sys.platform))
            continue
        if name == "processes":
            value, detail = _process_allowance(value, own_user_namespace, record)
            if value is None:
                continue
        limit = getattr(resource, which)
        _soft, hard = resource.getrlimit(limit)
        soft_value = value if hard == resource.RLIM_INFINITY else min(value, hard)
        # For CPU time the soft limit sends SIGXCPU and the hard one, a second later, SIGKILL.
        hard_value = soft_value + 1 if name == "cpu" else soft_value
        if hard != resource.RLIM_INFINITY:
            hard_value = min(hard_value, hard)
        try:
            resource.setrlimit(limit, (soft_value, hard_value))
        except (ValueError, OSError) as error:
            record.no(name, "setrlimit(%s) failed: %s" % (which, _why(error)))
            continue
        if name == "processes" and not _process_limit_holds(resource, soft_value, hard_value):
            record.no(name, "set, but a fork beyond it still succeeds (the kernel exempts a real user that is "
                            "root outside the user namespaces)")
            continue
        record.ok(name, _limit_text(name, soft_value) + detail)
    if _can_raise_hard_limits(resource):
        for name, _which, _key in LIMITS:
            if name in record.in_force:
                del record.in_force[name]
                record.no(name, "set, but the script keeps root's privileges and could lift it")


def _process_limit_holds(resource, soft, hard):
    """Whether a fork fails beyond the limit: with the soft limit at 1 it must."""
    if not hasattr(os, "fork"):
        return True
    resource.setrlimit(resource.RLIMIT_NPROC, (1, hard))
    try:
        child = os.fork()
    except OSError:
        return True
    finally:
        resource.setrlimit(resource.RLIMIT_NPROC, (soft, hard))
    if child == 0:
        os._exit(0)
    os.waitpid(child, 0)
    return False


def _can_raise_hard_limits(resource):
    """True when this process could undo its limits (root with its capabilities)."""
    try:
        resource.setrlimit(resource.RLIMIT_CORE, (0, 1))
    except (ValueError, OSError):
        return False
    resource.setrlimit(resource.RLIMIT_CORE, (0, 0))
    return True


def _process_allowance(value, own_user_namespace, record):
    """(limit, detail): the kernel counts every process and thread of the real user,
    in its user namespace; root (real uid 0) is never limited."""
    if own_user_namespace:
        return value, " processes and threads, counted in the run's own user namespace"
    if not hasattr(os, "getuid") or os.getuid() == 0:
        record.no("processes", "the real user is root, to whom the process limit does not apply")
        return None, ""
    others = _processes_of(os.getuid())
    if others is None:
        record.no("processes", "the limit counts the user's other processes, and they cannot be counted here")
        return None, ""
    return value + others, " (%d more processes and threads than the user's %d)" % (value, others)


def _processes_of(uid):
    try:
        names = os.listdir("/proc")
    except OSError:
        return None
    count = 0
    for name in names:
        if name.isdigit():
            try:
                if os.stat("/proc/" + name).st_uid == uid:
                    with open("/proc/%s/stat" % name, "rb") as handle:
                        count += int(handle.read().rsplit(b")", 1)[1].split()[17])
            except (OSError, ValueError, IndexError):
                continue
    return count


def _limit_text(name, value):
    if name == "core":
        return "no core dumps"
    if name in ("memory", "file-size"):
        return "%.3g GiB" % (value / 2 ** 30)
    if name == "cpu":
        return "%d s of CPU time" % value
    return str(value)


def confine_with_landlock(config, record):
    """Writes only beneath the run's folder (and to /dev/null); no TCP; no signals out."""
    skip = set(config.get("skip", ()))
    if not sys.platform.startswith("linux"):
        record.no("writes", "Landlock needs Linux (this is %s)" % sys.platform)
        return
    if "landlock" in skip:
        record.no("writes", "Landlock not attempted (switched off for this run)")
        return
    syscall = _libc().syscall
    syscall.restype = ctypes.c_long
    abi = syscall(ctypes.c_long(LANDLOCK_CREATE_RULESET), None, ctypes.c_size_t(0), ctypes.c_uint32(1))
    if abi < 0:
        number = ctypes.get_errno()
        hint = {38: "the kernel has no Landlock", 95: "Landlock is not enabled at boot (lsm=)"}.get(number, "")
        record.no("writes", "Landlock unavailable: %s%s" % (os.strerror(number), "; " + hint if hint else ""))
        return
    write_rights = sum(rights for version, rights in _WRITE_RIGHTS_BY_ABI if abi >= version)
    fields = [write_rights, _NET_TCP if abi >= 4 else 0, _SCOPE_ABSTRACT_UNIX_AND_SIGNAL if abi >= 6 else 0]
    size = 8 if abi < 4 else 16 if abi < 6 else 24
    attr = (ctypes.c_uint64 * 3)(*fields)

    class PathBeneath(ctypes.Structure):
        _pack_ = 1
        _fields_ = [("allowed_access", ctypes.c_uint64), ("parent_fd", ctypes.c_int32)]

    ruleset = syscall(ctypes.c_long(LANDLOCK_CREATE_RULESET), ctypes.byref(attr), ctypes.c_size_t(size),
                      ctypes.c_uint32(0))
    if ruleset < 0:
        record.no("writes", "Landlock ABI %d: cannot create a ruleset: %s" % (abi, os.strerror(ctypes.get_errno())))
        return
    try:
        allowed = [(config["work"], write_rights)]
        allowed += [(device, write_rights & _FILE_WRITE) for device in _WRITABLE_DEVICES if os.path.exists(device)]
        for path, rights in allowed:
            fd = os.open(path, getattr(os, "O_PATH", 0o10000000) | os.O_CLOEXEC)
            try:
                rule = PathBeneath(rights, fd)
                if syscall(ctypes.c_long(LANDLOCK_ADD_RULE), ctypes.c_int(ruleset),
                           ctypes.c_int(LANDLOCK_RULE_PATH_BENEATH), ctypes.byref(rule), ctypes.c_uint32(0)) < 0:
                    raise OSError(ctypes.get_errno(), "landlock_add_rule(%s)" % path)
            finally:
                os.close(fd)
        _prctl(PR_SET_NO_NEW_PRIVS, 1)
        if syscall(ctypes.c_long(LANDLOCK_RESTRICT_SELF), ctypes.c_int(ruleset), ctypes.c_uint32(0)) < 0:
            raise OSError(ctypes.get_errno(), "landlock_restrict_self")
    except OSError as error:
        record.no("writes", "Landlock ABI %d: %s: %s" % (abi, error.strerror, os.strerror(error.errno)))
        return
    finally:
        os.close(ruleset)
    record.ok("writes", "Landlock ABI %d: writes only beneath the run's folder and to %s"
              % (abi, ", ".join(_WRITABLE_DEVICES)))
    record.ok("other-processes", "Landlock: no ptrace, so no /proc/PID/environ or memory of processes outside the run")
    if abi >= 4:
        record.ok("tcp", "Landlock ABI %d: no TCP connect or bind" % abi)
    else:
        record.no("tcp", "Landlock ABI %d predates TCP rules (ABI 4)" % abi)
    if abi >= 6:
        record.ok("signals", "Landlock ABI %d: no signals or abstract unix sockets outside the run" % abi)
    else:
        record.no("signals", "Landlock ABI %d predates scoping (ABI 6)" % abi)


# ---------------------------------------------------------------------------


def run_worker(config, record, plan, started, forked):
    try:
        own_user_namespace = drop_privileges(config, record, plan)
        if forked and sys.platform.startswith("linux"):
            # The worker never outlives its parent (set after the uid change, which clears it).
            _prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
        apply_limits(config, record, own_user_namespace)
        confine_with_landlock(config, record)
    except (OSError, AttributeError, ValueError) as error:  # an unexpected refusal: run nothing, say why
        record.no("set-up", "the sandbox could not be set up: %s" % _why(error))
        _report(config, record, started)
        os._exit(70)
    _report(config, record, started)
    sys.dont_write_bytecode = True  # nothing is written outside the run's folder, with or without Landlock
    import importlib.util

    spec = importlib.util.spec_from_file_location("latchwatch_probe", config["probe"])
    probe = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(probe)
    if config.get("host_fd") is not None:
        serve_jobs(config, record, probe)
    probe.serve(config)


# ---------------------------------------------------------------------------
# A corner host: the confined worker, with gdstk imported, forks one child per job.


def serve_jobs(config, record, probe):
    """Run jobs sent on the host socket, one at a time, each in a child of its own. Never returns.

    A job message is ``job SERIAL`` with five descriptors (output, result, control
    and job pipes, and a status pipe); ``kill SERIAL SIGNAL`` signals that job's
    process group. The child starts its own session, gets a run folder of its own
    beneath the host's and a second Landlock layer confining writes to it, reports its
    sandbox and hands over to the probe. When it ends, everything it left is killed,
    its folder removed, and its exit code written to the status pipe."""
    import socket

    host = socket.socket(fileno=config["host_fd"])
    for key in ("result_fd", "control_fd", "job_fd"):  # the host's own pipes: its report is out
        os.close(config[key])
    in_pid_namespace = bool(config.get("_pid_namespace"))
    if sys.platform.startswith("linux"):
        try:
            _prctl(PR_SET_CHILD_SUBREAPER, 1)  # what a job leaves behind is re-parented here
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
        _host_one_job(config, record, probe, host, words[1], fds, served, in_pid_namespace)


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


def _host_one_job(config, record, probe, host, serial, fds, served, in_pid_namespace):
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
        probe.serve(job_config)
        os._exit(0)
    for fd in (output_w, result_w, control_w, job_r):
        os.close(fd)
    status = _wait_for_job(host, child, serial)
    _sweep((lambda: _kill(-1, signal.SIGKILL)) if in_pid_namespace else None)
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
        _prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
    os.dup2(output_w, 1)
    os.dup2(output_w, 2)
    os.close(output_w)
    os.chdir(config["work"])
    for name in ("TMPDIR", "TMP", "TEMP"):
        os.environ[name] = config["work"]
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
    _report(config, job_record, started)


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
                    _kill(-child, signal.SIGKILL)
                    _kill(child, signal.SIGKILL)
                    os._exit(0)
                if len(words) == 3 and words[0] == "kill" and words[1] == serial and words[2].isdigit():
                    _kill(-child, int(words[2]))
                    _kill(child, int(words[2]))
    finally:
        if pidfd is not None:
            os.close(pidfd)


def _report(config, record, started):
    line = "sandbox " + json.dumps(dict(record.as_dict(), setup_ms=round((time.perf_counter() - started) * 1e3, 2)))
    try:
        os.write(config["control_fd"], line.encode("utf-8") + b"\n")
    except OSError:
        pass


def main(argv=None):
    started = time.perf_counter()
    argv = sys.argv if argv is None else argv
    config = json.loads(argv[1])
    record = Record()
    record.ok("stdin", "empty (/dev/null)")
    pid_namespace, config["_keeper_user_namespace"] = enter_namespaces(config, record)
    config["_pid_namespace"] = pid_namespace
    if pid_namespace:
        record.ok("leftovers", "PID namespace: every process of the run ends with it")
    elif not (hasattr(os, "fork") and become_subreaper(record)):
        run_worker(config, record, None, started, forked=False)
        return
    status_r = status_w = keeper_pipes = init_pipes = None
    if pid_namespace:
        status_r, status_w = os.pipe()
        skip = set(config.get("skip", ()))
        if os.geteuid() == 0 and "identity" not in skip:
            request_r, request_w = os.pipe()
            reply_r, reply_w = os.pipe()
            keeper_pipes, init_pipes = (request_r, reply_w), (request_w, reply_r)
    child = os.fork()
    if child == 0:
        for fd in (keeper_pipes or ()) + ((status_r,) if status_r is not None else ()):
            os.close(fd)
        if pid_namespace:
            be_init(config, record, init_pipes, status_w, started)
        run_worker(config, record, None, started, forked=True)
        os._exit(0)
    for fd in (init_pipes or ()) + tuple(fd for fd in (status_w, config.get("job_fd"), config.get("result_fd"))
                                         if fd is not None):
        os.close(fd)
    map_request = None
    if keeper_pipes:
        try:
            entry = pwd.getpwnam(NOBODY)
            map_request = keeper_pipes + (entry.pw_uid, entry.pw_gid)
        except KeyError:
            for fd in keeper_pipes:
                os.close(fd)
    keep(child, pid_namespace, map_request, status_r)


if __name__ == "__main__":
    main()
