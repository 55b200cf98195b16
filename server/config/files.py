"""Reading the files latchwatch is pointed at, so that no file can stall or exhaust it.

Scripts, layouts, project and technology files come from a checkout that may be
hostile. A FIFO blocks whoever opens it; /dev/zero and /dev/urandom never end; a
folder or a device named ``chip.gds`` is no file at all. Only regular files are read,
and only up to a size limit (``[limits] file-mib``, server/config/limits.py). The
file is opened without blocking and checked on the open descriptor, so a swap
between the check and the read changes nothing.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a FIFO (named pipe)"), (stat.S_ISCHR, "a character device"),
          (stat.S_ISBLK, "a block device"), (stat.S_ISSOCK, "a socket"))


class InputFileError(OSError):
    """A file latchwatch refuses to read: not a regular file, or over the size limit."""


def _kind(mode: int) -> str:
    return next((name for test, name in _KINDS if test(mode)), "not a regular file")


def _problem(path: Path, status: os.stat_result, limit: int, hint: str) -> str | None:
    if not stat.S_ISREG(status.st_mode):
        shown = f"{path} (which leads to {os.path.realpath(path)})" if os.path.islink(path) else str(path)
        return f"{shown} is {_kind(status.st_mode)}, not a regular file; latchwatch reads only regular files"
    if status.st_size > limit:
        return (f"{path} is {_mib(status.st_size)}, above the limit of {_mib(limit)} for an input file"
                + (f"; {hint}" if hint else ""))
    return None


def _mib(size: int) -> str:
    return f"{size / (1 << 20):.1f} MiB" if size >= 1 << 20 else f"{size} bytes"


def file_problem(path: str | Path, limit: int, hint: str = "") -> str | None:
    """Why ``path`` would not be read (without opening it), or None; OSError when it
    cannot be looked at. ``hint`` says how to raise the limit."""
    return _problem(Path(path), os.stat(path), limit, hint)


def read_bytes(path: str | Path, limit: int, hint: str = "") -> bytes:
    """The content of a regular file of at most ``limit`` bytes; InputFileError otherwise
    (or OSError when it cannot be opened)."""
    path = Path(path)
    # O_NONBLOCK: opening a FIFO returns at once instead of waiting for a writer.
    fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    try:
        problem = _problem(path, os.fstat(fd), limit, hint)
        if problem:
            raise InputFileError(problem)
        chunks, size = [], 0
        while True:  # the file may grow while it is read
            chunk = os.read(fd, min(1 << 20, limit + 1 - size))
            if not chunk:
                break
            chunks.append(chunk)
            size += len(chunk)
            if size > limit:
                raise InputFileError(f"{path} grew past the limit of {_mib(limit)} while it was read"
                                     + (f"; {hint}" if hint else ""))
        return b"".join(chunks)
    finally:
        os.close(fd)


def read_text(path: str | Path, limit: int, hint: str = "") -> str:
    """``read_bytes`` decoded as UTF-8, undecodable bytes replaced."""
    return read_bytes(path, limit, hint).decode("utf-8", "replace")
