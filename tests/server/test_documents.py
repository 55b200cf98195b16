"""The run scheduler of the language server (server/lsp/documents.py)."""

from __future__ import annotations

import asyncio
import threading

from latchwatch.server.lsp.documents import RunScheduler


class Recorder:
    """A start function that records its calls and blocks until released."""

    def __init__(self):
        self.started: list[tuple[str, int, threading.Event]] = []
        self.finished: list[tuple[str, int]] = []
        self.release = asyncio.Event()

    async def __call__(self, uri: str, version: int, cancel: threading.Event) -> None:
        self.started.append((uri, version, cancel))
        await self.release.wait()
        self.finished.append((uri, version))


async def test_debounce_coalesces_quick_changes():
    record = Recorder()
    scheduler = RunScheduler(record)
    for version in (1, 2, 3):
        scheduler.request("a", version, delay=0.05)
        await asyncio.sleep(0.01)
    record.release.set()
    await scheduler.settle("a")
    assert [(u, v) for u, v, _ in record.started] == [("a", 3)]
    assert record.finished == [("a", 3)]


async def test_newer_version_cancels_the_run_in_flight():
    record = Recorder()
    scheduler = RunScheduler(record)
    scheduler.request("a", 1)
    await asyncio.sleep(0.01)
    (_, _, first_cancel), = record.started
    scheduler.request("a", 2)
    await asyncio.sleep(0.01)
    assert first_cancel.is_set()  # the runner kills the child on this event
    record.release.set()
    await scheduler.settle("a")
    assert record.finished == [("a", 2)]  # version 1 never got to publish


async def test_same_version_keeps_running_unless_restarted():
    record = Recorder()
    scheduler = RunScheduler(record)
    scheduler.request("a", 1)
    await asyncio.sleep(0.01)
    scheduler.request("a", 1)  # a save right after the change
    await asyncio.sleep(0.01)
    assert len(record.started) == 1 and not record.started[0][2].is_set()
    scheduler.request("a", 1, restart=True)  # the settings changed
    await asyncio.sleep(0.01)
    assert len(record.started) == 2 and record.started[0][2].is_set()
    record.release.set()
    await scheduler.settle("a")


async def test_documents_are_independent_and_close_cancels():
    record = Recorder()
    scheduler = RunScheduler(record)
    scheduler.request("a", 1)
    scheduler.request("b", 1)
    await asyncio.sleep(0.01)
    scheduler.supersede("a")
    assert record.started[0][2].is_set() and not record.started[1][2].is_set()
    assert scheduler.in_flight("a") is None and scheduler.in_flight("b") is not None
    record.release.set()
    await scheduler.settle("b")
    assert record.finished == [("b", 1)]
