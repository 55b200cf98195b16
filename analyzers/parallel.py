"""Two independent computations side by side on a large layout.

Most of a large check is spent in GEOS, numpy and SuperLU, which release the
interpreter lock, so two threads use two cores for work that shares nothing it
writes. Small layouts stay serial: a thread costs more than it saves there.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

A = TypeVar("A")
B = TypeVar("B")


def usable_cpus() -> int:
    """The CPUs this process may run on (its affinity mask where the system has one)."""
    if hasattr(os, "sched_getaffinity"):
        return len(os.sched_getaffinity(0))
    return os.cpu_count() or 1


def side_by_side(first: Callable[[], A], second: Callable[[], B], *, large: bool,
                 name: str = "latchwatch") -> tuple[A, B]:
    """(first(), second()): in two threads when ``large`` and two CPUs are free, else in turn.
    The two must not write anything the other reads."""
    if not large or usable_cpus() < 2:
        return first(), second()
    with ThreadPoolExecutor(2, thread_name_prefix=name) as pool:
        a, b = pool.submit(first), pool.submit(second)
        return a.result(), b.result()
