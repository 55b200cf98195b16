"""Landlock: writes confined to the run's folder, TCP and signals scoped, where the kernel has it."""

from __future__ import annotations

# Imported before the identity changes, which may hide the standard library.
import ctypes
import os
import sys

try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .kernel import PR_SET_NO_NEW_PRIVS, SHARED_MEMORY, libc, prctl

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


def confine_with_landlock(config, record):
    """Writes only beneath the run's folder (and to /dev/null); no TCP; no signals out."""
    skip = set(config.get("skip", ()))
    if not sys.platform.startswith("linux"):
        record.no("writes", "Landlock needs Linux (this is %s)" % sys.platform)
        return
    if "landlock" in skip:
        record.no("writes", "Landlock not attempted (switched off for this run)")
        return
    syscall = libc().syscall
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
        if config.get("_private_shared_memory"):  # the run's own tmpfs (keeper.py), not the host's
            allowed.append((SHARED_MEMORY, write_rights))
        for path, rights in allowed:
            fd = os.open(path, getattr(os, "O_PATH", 0o10000000) | os.O_CLOEXEC)
            try:
                rule = PathBeneath(rights, fd)
                if syscall(ctypes.c_long(LANDLOCK_ADD_RULE), ctypes.c_int(ruleset),
                           ctypes.c_int(LANDLOCK_RULE_PATH_BENEATH), ctypes.byref(rule), ctypes.c_uint32(0)) < 0:
                    raise OSError(ctypes.get_errno(), "landlock_add_rule(%s)" % path)
            finally:
                os.close(fd)
        prctl(PR_SET_NO_NEW_PRIVS, 1)
        if syscall(ctypes.c_long(LANDLOCK_RESTRICT_SELF), ctypes.c_int(ruleset), ctypes.c_uint32(0)) < 0:
            raise OSError(ctypes.get_errno(), "landlock_restrict_self")
    except OSError as error:
        record.no("writes", "Landlock ABI %d: %s: %s" % (abi, error.strerror, os.strerror(error.errno)))
        return
    finally:
        os.close(ruleset)
    shared = ", and its own %s" % SHARED_MEMORY if config.get("_private_shared_memory") else ""
    record.ok("writes", "Landlock ABI %d: writes only beneath the run's folder and to %s%s"
              % (abi, ", ".join(_WRITABLE_DEVICES), shared))
    record.ok("other-processes", "Landlock: no ptrace, so no /proc/PID/environ or memory of processes outside the run")
    if abi >= 4:
        record.ok("tcp", "Landlock ABI %d: no TCP connect or bind" % abi)
    else:
        record.no("tcp", "Landlock ABI %d predates TCP rules (ABI 4)" % abi)
    if abi >= 6:
        record.ok("signals", "Landlock ABI %d: no signals or abstract unix sockets outside the run" % abi)
    else:
        record.no("signals", "Landlock ABI %d predates scoping (ABI 6)" % abi)
