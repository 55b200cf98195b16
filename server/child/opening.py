"""Root's runs take the identity of nobody, never root's file access: the folders a run
reads are opened for nobody in the run's own mount namespace, or the run is refused.

An interpreter under /root (pyenv, a venv there) is unreadable to nobody because /root
is not searchable. Instead of keeping root's file identity, the keeper (still root, in
the run's mount namespace, before any user-named program runs) covers each such
blocking folder with a small tmpfs that holds only the paths the run needs, each a
bind of the real tree (open_tree and move_mount). Everything else beneath the blocking
folder is hidden from the run; what the needed trees themselves forbid stays forbidden.
"""

from __future__ import annotations

# Imported before the identity changes, which may hide the standard library.
import glob
import os
import sys

try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .kernel import CLONE_NEWNS, MS_NODEV, MS_NOSUID, MS_PRIVATE, MS_REC, attach_tree, clone_tree, mount, unshare

NOBODY = "nobody"
NOBODY_ID = 65534  # the conventional id of nobody (the kernel's overflow id), where no such user exists
_ROUNDS = 8  # a blocking folder inside an opened tree is opened in the next round


def nobody_ids():
    """(uid, gid) of nobody."""
    try:
        entry = pwd.getpwnam(NOBODY)
    except (AttributeError, KeyError):
        return NOBODY_ID, NOBODY_ID
    return entry.pw_uid, entry.pw_gid


def enter_mount_namespace(config):
    """A private mount namespace for the run (idempotent); False where the kernel refuses."""
    if config.get("_mount_namespace"):
        return True
    try:
        unshare(CLONE_NEWNS)
        mount(None, "/", None, MS_REC | MS_PRIVATE, None)  # nothing mounted here reaches the host
    except OSError:
        return False
    config["_mount_namespace"] = True
    return True


def interpreter_folders(python):
    """The trees a Python interpreter reads, judged from its path without running it:
    its prefix (the folder above bin/, for the link and for its target), a venv's base
    (``home`` in pyvenv.cfg), and the folders its site-packages' .pth files add."""
    folders = []
    for path in (os.path.abspath(python), os.path.realpath(python)):
        binary_folder = os.path.dirname(path)
        prefix = os.path.dirname(binary_folder) if os.path.basename(binary_folder) == "bin" else binary_folder
        folders.append(prefix)
        home = _venv_home(os.path.join(prefix, "pyvenv.cfg"))
        if home:
            folders.append(os.path.dirname(home) if os.path.basename(home) == "bin" else home)
        for pth in sorted(glob.glob(os.path.join(prefix, "lib", "python*", "site-packages", "*.pth")))[:200]:
            folders += _pth_folders(pth)
    return folders


def _venv_home(cfg):
    try:
        with open(cfg, encoding="utf-8", errors="replace") as handle:
            for line in handle:
                key, _, value = line.partition("=")
                if key.strip() == "home":
                    return os.path.realpath(value.strip())
    except OSError:
        pass
    return None


def _pth_folders(pth):
    """The folders a .pth file puts on sys.path (its ``import`` lines are not followed)."""
    folders = []
    try:
        with open(pth, encoding="utf-8", errors="replace") as handle:
            lines = handle.read(1 << 16).splitlines()
    except OSError:
        return folders
    for line in lines:
        line = line.strip()
        if line and not line.startswith(("#", "import ", "import\t")):
            folders.append(os.path.realpath(os.path.join(os.path.dirname(pth), line)))
    return folders


def wanted_folders(config):
    """Every folder the run reads or writes: this interpreter, the named one, the child
    package, the project and the script's folder, and the run's own folder."""
    here = os.path.dirname(os.path.abspath(__file__))
    wanted = [sys.prefix, sys.base_prefix, os.path.dirname(os.__file__), here]
    wanted += [entry for entry in sys.path if entry and os.path.isdir(entry)]
    if config.get("python"):
        wanted += interpreter_folders(config["python"])
    wanted += list(config.get("needs_reading", ())) + [config["work"]]
    folders = []
    for path in wanted:  # resolved: a blocking folder is never a link, whose target a mount would cover
        form = os.path.realpath(path)
        if os.path.exists(form) and not os.path.isdir(form):
            form = os.path.dirname(form)
        if os.path.isdir(form) and form not in folders:
            folders.append(form)
    return folders


def open_for(config, uid, gid):
    """Open what the run needs for ``uid`` where a folder above it blocks the way.

    Returns (opened, unreadable): the folders covered, and the first needed folder
    ``uid`` still cannot read (None when it can read them all)."""
    folders = wanted_folders(config)
    opened = []
    for _round in range(_ROUNDS):
        blocked = {}
        for folder in folders:
            blocker = _as_user(uid, gid, _first_blocking_folder, folder)
            if blocker is not None and blocker != folder:
                blocked.setdefault(blocker, []).append(folder)
        if not blocked or not enter_mount_namespace(config):
            break
        for blocker, needed in sorted(blocked.items()):
            _cover(blocker, needed)
            opened.append(blocker)
    return opened, _as_user(uid, gid, _first_unreadable, folders)


def _cover(blocker, needed):
    """A tmpfs on ``blocker`` holding only binds of the ``needed`` trees beneath it."""
    outermost = [path for path in sorted(set(needed))
                 if not any(other != path and path.startswith(other.rstrip("/") + "/") for other in needed)]
    trees = [(path, clone_tree(path)) for path in outermost]
    try:
        mount("latchwatch-opened", blocker, "tmpfs", MS_NOSUID | MS_NODEV, "size=1m,mode=0755")
        for path, fd in trees:
            folder = blocker
            for part in os.path.relpath(path, blocker).split(os.sep):
                folder = os.path.join(folder, part)
                if not os.path.isdir(folder):
                    os.mkdir(folder)
                    os.chmod(folder, 0o755)
            attach_tree(fd, path)
    finally:
        for _path, fd in trees:
            os.close(fd)


def _as_user(uid, gid, check, *args):
    """``check(*args)`` with the effective ids of ``uid`` and ``gid`` (root only)."""
    os.setegid(gid)
    os.seteuid(uid)
    try:
        return check(*args)
    finally:
        os.seteuid(0)
        os.setegid(0)


def _first_blocking_folder(path):
    """The outermost folder on the way to ``path`` (``path`` included) that cannot be searched."""
    parts = path.strip("/").split("/")
    for count in range(1, len(parts) + 1):
        folder = "/" + "/".join(parts[:count])
        if not os.access(folder, os.X_OK, effective_ids=True):
            return folder
    return None


def _first_unreadable(folders):
    for folder in folders:
        if not os.access(folder, os.R_OK | os.X_OK, effective_ids=True):
            return folder
    return None
