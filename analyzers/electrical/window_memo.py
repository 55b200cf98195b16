"""Resistances of solved windows, kept across checks by the content key of each window.

A window's resistance depends only on what the window holds, relative to its device
(shunt.window_keys hashes exactly that), its sheet and the grid step; so a window that
an earlier check solved is not solved again. In the editor an edit usually changes a
few windows, and the others come from here: the sheet solves dominate a re-check.

Keys are bytes: the window's key row followed by the grid step. A check that runs in a
forked analysis process records its new entries there; ``since`` and ``merge`` carry
them back to the process that keeps the memo (server/runs/analysis.py).

>>> memo = WindowMemo(capacity=2)
>>> mark = memo.mark()
>>> memo.record([b"a", b"b", b"c"], [1.0, 2.0, 3.0])
>>> memo.get(b"a"), memo.get(b"c"), len(memo)
(None, 3.0, 2)
>>> sorted(memo.since(mark))
[b'b', b'c']
"""

from __future__ import annotations

import threading
from collections.abc import Iterable

import numpy as np

CAPACITY = 50_000  # entries (about 100 bytes each); the oldest are dropped first


class WindowMemo:
    """A bounded mapping from a window's content key to its resistance, oldest out first."""

    def __init__(self, capacity: int = CAPACITY):
        self.capacity = capacity
        # key -> (ohm, position in the sequence of records): a mark is such a position.
        self._entries: dict[bytes, tuple[float, int]] = {}
        self._added = 0
        self._lock = threading.Lock()  # the command line merges results of several checks from threads

    def __len__(self) -> int:
        return len(self._entries)

    def get(self, key: bytes) -> float | None:
        entry = self._entries.get(key)
        return None if entry is None else entry[0]

    def record(self, keys: Iterable[bytes], values: Iterable[float]) -> None:
        with self._lock:
            for key, value in zip(keys, values, strict=True):
                self._entries.pop(key, None)  # re-recorded: it moves to the newest end
                self._entries[key] = (float(value), self._added)
                self._added += 1
            while len(self._entries) > self.capacity:
                del self._entries[next(iter(self._entries))]

    def mark(self) -> int:
        """A position: ``since(mark)`` gives what was recorded after it."""
        return self._added

    def since(self, mark: int) -> dict[bytes, float]:
        with self._lock:
            return {key: ohm for key, (ohm, added) in self._entries.items() if added >= mark}

    def merge(self, entries: dict[bytes, float]) -> None:
        self.record(entries.keys(), entries.values())

    def clear(self) -> None:
        with self._lock:
            self._entries.clear()


def memo_keys(key_rows: np.ndarray, grid: float | None) -> list[bytes]:
    """One bytes key per window: its content-key row and the grid step it is solved on (None: adaptive)."""
    rows = np.ascontiguousarray(key_rows, dtype=np.uint64)
    step = np.float64(np.nan if grid is None else grid).tobytes()
    return [row.tobytes() + step for row in rows]


SOLVED_WINDOWS = WindowMemo()
