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

from .kernel import CLONE_NEWUSER, call_libc, libc, unshare, why
from .opening import NOBODY, nobody_ids, open_for

CAPABILITY_VERSION_3 = 0x20080522


class Refused(Exception):
    """The run cannot take an unprivileged identity: nothing runs (never root's file access)."""


def open_identity(config, record):
    """Root only, in the keeper, before any user-named program runs: nobody's ids, and the
    folders the run needs opened for nobody (child/opening.py). Stored in the config."""
    if not hasattr(os, "geteuid") or os.geteuid() != 0 or "identity" in set(config.get("skip", ())):
        return
    uid, gid = nobody_ids()
    os.chown(config["work"], uid, gid)  # the run's folder is the one place it may write
    try:
        opened, unreadable = open_for(config, uid, gid)
    except OSError as error:
        opened, unreadable = [], "the folders it needs (opening them for nobody failed: %s)" % why(error)
    config["_identity"] = {"uid": uid, "gid": gid, "opened": opened, "unreadable": unreadable}


def plan_identity(config, record, ask_for_maps):
    """Root only, while still root: who the worker becomes, and a user namespace of the
    run's own when the keeper can map nobody into it. None when not root."""
    if not hasattr(os, "geteuid") or os.geteuid() != 0 or "identity" in set(config.get("skip", ())):
        return None
    if "_identity" not in config:
        open_identity(config, record)
    plan = dict(config["_identity"])
    os.setgroups([])
    plan["user_namespace"] = (plan["unreadable"] is None and ask_for_maps is not None
                              and ask_for_maps(plan["uid"], plan["gid"]))
    return plan


def drop_privileges(config, record, plan):
    """Root becomes nobody (real, effective, saved and file ids) or the run is refused;
    anyone gives up the capabilities a user namespace granted.

    Returns True when the run's processes are counted in a user namespace of their own
    (so the process limit counts this run alone). Raises Refused."""
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
    uid, gid, unreadable = plan["uid"], plan["gid"], plan["unreadable"]
    if unreadable is not None:
        reason = ("%s (uid %d) cannot read %s, and a script never runs with root's file access: make it "
                  "readable to other users (chmod o+rx on its folders), use an interpreter they can read, or run "
                  "latchwatch as an unprivileged user" % (NOBODY, uid, unreadable))
        record.no("privileges", reason)
        raise Refused(reason)
    if hasattr(os, "setresuid"):
        os.setresgid(gid, gid, gid)
        os.setresuid(uid, uid, uid)
    else:  # macOS: as root, setuid sets the real, effective and saved ids alike
        os.setgid(gid)
        os.setuid(uid)
    _drop_capabilities()
    if not os.access(os.environ.get("HOME", "/"), os.W_OK):
        os.environ["HOME"] = config["work"]  # root's home is not nobody's: caches go to the run's folder
    opened = ("; opened for it in the run's mount namespace: %s (nothing else beneath them is visible)"
              % ", ".join(plan["opened"])) if plan["opened"] else ""
    record.ok("privileges", "runs as %s (uid %d, gid %d: real, effective, saved and file ids), without "
                            "capabilities%s" % (NOBODY, uid, gid, opened))
    record.ok("other-processes", "as %s without capabilities: the tool's own processes cannot be read" % NOBODY)
    return plan["user_namespace"]


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
