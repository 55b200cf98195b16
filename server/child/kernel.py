"""What the child asks of the kernel through libc, and the record of what it obtained.

Standard library only, Python 3.8 and later (the interpreter may be the user's own).
"""

from __future__ import annotations

# Imported before the identity changes, which may hide the standard library.
import ctypes
import json
import os
import time

try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None


CLONE_NEWUSER = 0x10000000


CLONE_NEWPID = 0x20000000


CLONE_NEWNET = 0x40000000
CLONE_NEWNS = 0x00020000
MS_NOSUID, MS_NODEV, MS_NOEXEC, MS_REC, MS_PRIVATE = 0x2, 0x4, 0x8, 0x4000, 0x40000
SHARED_MEMORY = "/dev/shm"  # where POSIX semaphores and shared memory live (glibc)


PR_SET_PDEATHSIG = 1


PR_SET_NO_NEW_PRIVS = 38


PR_SET_CHILD_SUBREAPER = 36


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


def libc():
    """The C library, loaded once, with errno kept for call_libc."""
    global _libc_handle
    if _libc_handle is None:
        _libc_handle = ctypes.CDLL(None, use_errno=True)
    return _libc_handle


def call_libc(function, *args):
    """Call a libc function; raise OSError with errno on a -1 result."""
    result = function(*args)
    if result == -1:
        number = ctypes.get_errno()
        raise OSError(number, os.strerror(number))
    return result


def prctl(option, value=0):
    """prctl(2) with one argument; raises OSError on failure."""
    return call_libc(libc().prctl, ctypes.c_int(option), ctypes.c_ulong(value), ctypes.c_ulong(0),
                 ctypes.c_ulong(0), ctypes.c_ulong(0))


def unshare(flags):
    """unshare(2): os.unshare where Python has it (3.12+), else through libc."""
    if hasattr(os, "unshare"):  # Python 3.12+
        os.unshare(flags)
    else:
        call_libc(libc().unshare, ctypes.c_int(flags))


def mount(source, target, fstype, flags, data):
    """mount(2) through libc; raises OSError."""
    def c_string(text):
        return None if text is None else text.encode()

    call_libc(libc().mount, c_string(source), c_string(target), c_string(fstype), ctypes.c_ulong(flags),
              c_string(data))


OPEN_TREE_CLONE, AT_RECURSIVE, MOVE_MOUNT_F_EMPTY_PATH, AT_FDCWD = 1, 0x8000, 0x4, -100
_OPEN_TREE, _MOVE_MOUNT = 428, 429  # one number on every architecture (Linux 5.2)


def clone_tree(path):
    """A detached copy of the mounts at and beneath ``path`` (open_tree(2)), as a descriptor."""
    syscall = libc().syscall
    syscall.restype = ctypes.c_long
    return call_libc(syscall, ctypes.c_long(_OPEN_TREE), ctypes.c_int(AT_FDCWD), path.encode(),
                     ctypes.c_uint(OPEN_TREE_CLONE | os.O_CLOEXEC | AT_RECURSIVE))


def attach_tree(fd, target):
    """Mount a tree from clone_tree at ``target`` (move_mount(2))."""
    syscall = libc().syscall
    syscall.restype = ctypes.c_long
    call_libc(syscall, ctypes.c_long(_MOVE_MOUNT), ctypes.c_int(fd), b"", ctypes.c_int(AT_FDCWD), target.encode(),
              ctypes.c_uint(MOVE_MOUNT_F_EMPTY_PATH))


def why(error):
    """A short reason for an error, for the sandbox record."""
    if isinstance(error, OSError):
        return os.strerror(error.errno) if error.errno else (error.strerror or str(error))
    return str(error)


def write_text(path, text):
    """Write ``text`` to ``path`` (a /proc map file, say) in one call."""
    with open(path, "w") as handle:
        handle.write(text)


def report_sandbox(config, record, started):
    """Send the sandbox record, with its set-up time, as one ``sandbox {json}`` line on the control pipe."""
    line = "sandbox " + json.dumps(dict(record.as_dict(), setup_ms=round((time.perf_counter() - started) * 1e3, 2)))
    try:
        os.write(config["control_fd"], line.encode("utf-8") + b"\n")
    except OSError:
        pass
