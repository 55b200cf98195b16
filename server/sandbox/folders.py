"""Run folders: named after the latchwatch process that made them, and removed when a
dead process left them behind (killed before it could clean up, even by SIGKILL).

A folder is ``latchwatch-run-PID.START-XXXXXXXX`` in the temporary folder, START being
the process's start time (field 22 of /proc/PID/stat), so that a reused process id is
not taken for the owner. Only folders that are real folders, owned by this user (or by
nobody, whose runs root's folders are handed to), and whose owner is gone are removed.
"""

from __future__ import annotations

import os
import re
import shutil
import tempfile
import time
from pathlib import Path

PREFIX = "latchwatch-run-"
_NAME = re.compile(re.escape(PREFIX) + r"(?P<pid>\d+)\.(?P<start>\d+)-")
SWEEP_EVERY = 600.0  # s between two sweeps of one process
_last_sweep: float | None = None


def process_start(pid: int) -> int:
    """The start time of process ``pid`` in clock ticks since boot; 0 where unknown."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as handle:
            stat = handle.read()
    except OSError:
        return 0
    return int(stat[stat.rindex(b")") + 2:].split()[19])


def make_run_folder() -> Path:
    """A fresh run folder named after this process; sweeps the leftovers of dead ones first."""
    global _last_sweep
    now = time.monotonic()
    if _last_sweep is None or now - _last_sweep > SWEEP_EVERY:
        _last_sweep = now
        sweep_dead_folders()
    pid = os.getpid()
    return Path(tempfile.mkdtemp(prefix=f"{PREFIX}{pid}.{process_start(pid)}-"))


def _owner_gone(pid: int, start: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False  # alive, another user's
    return start != 0 and process_start(pid) not in (0, start)


def _our_users() -> set[int]:
    users = {os.geteuid()}
    if os.geteuid() == 0:
        import pwd

        try:
            users.add(pwd.getpwnam("nobody").pw_uid)
        except KeyError:
            users.add(65534)
    return users


def sweep_dead_folders(where: str | None = None) -> list[str]:
    """Remove the run folders whose latchwatch process is gone; returns their paths."""
    folder = where or tempfile.gettempdir()
    removed = []
    try:
        names = os.listdir(folder)
    except OSError:
        return removed
    users = _our_users()
    for name in names:
        match = _NAME.match(name)
        if not match:
            continue
        path = os.path.join(folder, name)
        try:
            info = os.lstat(path)
        except OSError:
            continue
        import stat

        if not stat.S_ISDIR(info.st_mode) or info.st_uid not in users:
            continue
        if _owner_gone(int(match["pid"]), int(match["start"])):
            shutil.rmtree(path, ignore_errors=True)  # fd-based on Linux: links inside are not followed
            removed.append(path)
    return removed
