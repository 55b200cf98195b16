"""Work-done progress of a long run, reported to a client that supports it."""

from __future__ import annotations

import asyncio
import uuid

from lsprotocol import types

PROGRESS_AFTER_S = 1.0  # runs shorter than this show no progress


class Progress:
    """Work-done progress for a run that takes longer than PROGRESS_AFTER_S, when the
    client advertises support for it; runs of several corners report how many are done."""

    def __init__(self, server, title: str):  # server: the LatchwatchServer
        self.server, self.title, self.token, self.timer = server, title, None, None
        self.loop = None
        self.counts: tuple[int, int] | None = None  # runs done, runs in all

    async def __aenter__(self):
        self.loop = asyncio.get_running_loop()
        if self.server._client_can("window.work_done_progress"):
            self.timer = asyncio.ensure_future(self._begin_later())
        return self

    async def _begin_later(self):
        await asyncio.sleep(PROGRESS_AFTER_S)
        token = f"latchwatch-{uuid.uuid4()}"
        await self.server.work_done_progress.create_async(token)
        self.token = token
        self.server.work_done_progress.begin(token, types.WorkDoneProgressBegin(
            title="latchwatch", message=self.message(), percentage=self.percentage(),
            cancellable=False))

    def message(self) -> str:
        if self.counts is None or self.counts[1] < 2:
            return self.title
        return f"{self.title}: {self.counts[0]} of {self.counts[1]} corners"

    def percentage(self) -> int | None:
        return None if self.counts is None or self.counts[1] < 2 else 100 * self.counts[0] // self.counts[1]

    def runs_done(self, done: int, total: int) -> None:
        """Called from the worker thread as each run finishes."""
        if self.loop is not None:
            self.loop.call_soon_threadsafe(self._report, done, total)

    def _report(self, done: int, total: int) -> None:
        self.counts = (done, total)
        if self.token is not None and total > 1:
            self.server.work_done_progress.report(self.token, types.WorkDoneProgressReport(
                message=self.message(), percentage=self.percentage()))

    async def __aexit__(self, *exc):
        if self.timer is not None:
            self.timer.cancel()
        if self.token is not None:
            self.server.work_done_progress.end(self.token, types.WorkDoneProgressEnd(message="done"))
        return False
