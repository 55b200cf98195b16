"""Resource limits of a run (CPU, memory, file size, open files, processes)."""

from __future__ import annotations

import os
import sys

# Imported before the identity changes, which may hide the standard library.
try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .kernel import why

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
            record.no(name, "setrlimit(%s) failed: %s" % (which, why(error)))
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
