"""The trust store (docs/sandbox.md): the folders whose scripts the language server may run.

The store lives in the user's configuration directory, never in a project:
``$XDG_CONFIG_HOME/latchwatch/trusted.json`` when XDG_CONFIG_HOME is set to an absolute
path (the XDG base-directory rule ignores relative values), else
``~/.config/latchwatch/trusted.json`` (``%APPDATA%\\latchwatch`` on Windows). A trusted
folder covers everything below it. Paths are stored resolved, so a symbolic link
inside a project cannot point trust somewhere else.
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import TextIO

SCHEMA = "latchwatch-trust/1"
STORE_NAME = "trusted.json"


class TrustStoreError(Exception):
    """The store cannot be read or written; the message names the file and the problem."""


def config_dir(env: Mapping[str, str] | None = None) -> Path:
    """The user's latchwatch configuration folder ($XDG_CONFIG_HOME/latchwatch, else ~/.config/latchwatch)."""
    env = os.environ if env is None else env
    xdg = env.get("XDG_CONFIG_HOME", "")
    if xdg and os.path.isabs(xdg):
        return Path(xdg) / "latchwatch"
    if os.name == "nt" and env.get("APPDATA"):
        return Path(env["APPDATA"]) / "latchwatch"
    home = env.get("HOME") or str(Path.home())
    return Path(home) / ".config" / "latchwatch"


def store_path(env: Mapping[str, str] | None = None) -> Path:
    """The file that lists the trusted folders."""
    return config_dir(env) / STORE_NAME


def _canonical(path: Path | str) -> Path:
    return Path(os.path.realpath(os.path.expanduser(str(path))))


def load_trusted(store: Path | None = None) -> list[Path]:
    """The trusted folders, in the order they were added; none when the store is absent."""
    store = store or store_path()
    try:
        text = store.read_text(encoding="utf-8")
    except FileNotFoundError:
        return []
    except OSError as error:
        raise TrustStoreError(f"{store}: cannot be read: {error.strerror}") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as error:
        raise TrustStoreError(f"{store}: not valid JSON: {error}") from None
    if not isinstance(data, dict) or data.get("schema") != SCHEMA:
        raise TrustStoreError(f"{store}: expected an object with \"schema\": \"{SCHEMA}\"")
    folders = data.get("folders")
    if not isinstance(folders, list) or not all(isinstance(f, str) and os.path.isabs(f) for f in folders):
        raise TrustStoreError(f"{store}: folders: expected a list of absolute folder paths, got {folders!r}")
    return [Path(f) for f in folders]


def _save(folders: list[Path], store: Path) -> None:
    store.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
    body = json.dumps({"schema": SCHEMA, "folders": [str(f) for f in folders]}, indent=2) + "\n"
    # Write beside the store and rename, so a concurrent reader never sees half a file.
    handle, temporary = tempfile.mkstemp(prefix=".trusted-", suffix=".json", dir=store.parent)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(body)
        os.replace(temporary, store)
    except OSError as error:
        Path(temporary).unlink(missing_ok=True)
        raise TrustStoreError(f"{store}: cannot be written: {error.strerror}") from None


def add_trusted(folder: Path | str, store: Path | None = None) -> Path:
    """Trust ``folder`` (it must exist and be a folder); returns the stored path."""
    store = store or store_path()
    resolved = _canonical(folder)
    if not resolved.is_dir():
        what = "does not exist" if not resolved.exists() else "is not a folder"
        raise TrustStoreError(f"{folder}: {what}; trust is granted to folders")
    folders = load_trusted(store)
    if resolved not in folders:
        _save(folders + [resolved], store)
    return resolved


def remove_trusted(folder: Path | str, store: Path | None = None) -> Path:
    """Withdraw trust from ``folder`` as it was stored (the folder may be gone by now)."""
    store = store or store_path()
    folders = load_trusted(store)
    wanted = {Path(os.path.abspath(os.path.expanduser(str(folder)))), _canonical(folder)}
    kept = [f for f in folders if f not in wanted]
    if len(kept) == len(folders):
        raise TrustStoreError(f"{folder}: not in the trust store {store}")
    _save(kept, store)
    return next(f for f in folders if f in wanted)


def is_inside(path: Path | str, folders: Iterable[Path | str]) -> bool:
    """True when ``path`` lies in one of ``folders`` (symlinks resolved; a shared prefix is not containment)."""
    resolved = _canonical(path)
    for folder in folders:
        root = _canonical(folder)
        if resolved == root or root in resolved.parents:
            return True
    return False


def is_trusted(path: Path | str, editor_folders: Iterable[str] = (), store: Path | None = None) -> bool:
    """Whether ``path`` lies in a folder trusted by the store or by the editor setting
    ``trustedFolders`` (relative entries in that setting are ignored: they would be
    relative to whatever folder the server happens to run in)."""
    folders = [f for f in editor_folders if isinstance(f, str) and os.path.isabs(os.path.expanduser(f))]
    return is_inside(path, folders) or is_inside(path, load_trusted(store))


def trust_command(path: str | None, list_: bool, remove: str | None,
                  out: TextIO = sys.stdout, err: TextIO = sys.stderr) -> int:
    """``latchwatch trust [PATH] | --list | --remove PATH``; exit status as docs/command-line.md."""
    store = store_path()
    try:
        if list_:
            folders = load_trusted(store)
            for folder in folders:
                print(folder, file=out)
            if not folders:
                print(f"latchwatch: no trusted folders (store: {store})", file=err)
            return 0
        if remove is not None:
            removed = remove_trusted(remove, store)
            print(f"no longer trusted: {removed}", file=out)
            return 0
        added = add_trusted(path or os.getcwd(), store)
        print(f"trusted: {added} (scripts under it run in the language server; store: {store})", file=out)
        return 0
    except TrustStoreError as error:
        print(f"latchwatch: {error}", file=err)
        return 2
