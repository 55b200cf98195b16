"""Giving up root: the identity a run takes, and the capabilities it drops."""

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

from .kernel import CLONE_NEWUSER, PR_SET_SECUREBITS, call_libc, libc, prctl, unshare

SECBIT_NOROOT_AND_LOCK = 0x3  # exec never grants root's capabilities, and that cannot change


CAPABILITY_VERSION_3 = 0x20080522


NOBODY = "nobody"


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
    unreadable = _unreadable_as(uid, gid, list(config.get("needs_reading", ())))
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
        prctl(PR_SET_SECUREBITS, SECBIT_NOROOT_AND_LOCK)
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
    wanted = [os.path.dirname(os.__file__), sys.prefix, sys.base_prefix, os.path.dirname(os.path.abspath(__file__))]
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
    call_libc(libc().capset, ctypes.byref(header), ctypes.byref(data))


class MapRequest:
    """For root's init: enter a user namespace and have the keeper map nobody into it."""

    def __init__(self, pipes):
        self.request_w, self.reply_r = pipes

    def __call__(self, uid, gid):
        try:
            unshare(CLONE_NEWUSER)
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
