"""When each open document runs (docs/language-server.md): debounced on change, at once on open and
save, one run per document at a time, a newer version superseding the older one.

Superseding sets the older run's cancel event (the runner then kills the child's
process group) and cancels its task, so its result is never published. Independent
of pygls: the scheduler only calls ``start(uri, version, cancel)``.
"""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Awaitable, Callable
from dataclasses import dataclass, field

Start = Callable[[str, int, threading.Event], Awaitable[None]]


@dataclass
class ScheduledRun:
    """A run scheduled for one document version, with the event that cancels it."""
    version: int
    cancel: threading.Event
    task: asyncio.Task | None = None
    started: bool = False  # the debounce is over and the run has begun
    done: asyncio.Event = field(default_factory=asyncio.Event)


class RunScheduler:
    """Debounces runs per document; a newer version supersedes and cancels the run in flight."""
    def __init__(self, start: Start):
        self._start = start
        self._runs: dict[str, ScheduledRun] = {}

    def request(self, uri: str, version: int, delay: float = 0.0, restart: bool = False) -> None:
        """Run ``uri`` at ``version`` after ``delay`` seconds, superseding anything
        scheduled or running for it, except a run of the same version already going
        (unless ``restart``: the settings changed under it)."""
        current = self._runs.get(uri)
        if (not restart and current is not None and current.version == version and current.started
                and not current.done.is_set()):
            return
        self.supersede(uri)
        run = ScheduledRun(version, threading.Event())
        run.task = asyncio.ensure_future(self._run(uri, run, delay))
        self._runs[uri] = run

    def supersede(self, uri: str) -> None:
        """Stop what is scheduled or running for ``uri`` (a newer version exists, or
        the document closed)."""
        run = self._runs.pop(uri, None)
        if run is not None:
            run.cancel.set()
            if run.task is not None:
                run.task.cancel()
            run.done.set()

    async def _run(self, uri: str, run: ScheduledRun, delay: float) -> None:
        try:
            if delay > 0:
                await asyncio.sleep(delay)
            run.started = True
            await self._start(uri, run.version, run.cancel)
        finally:
            run.done.set()
            if self._runs.get(uri) is run:
                del self._runs[uri]

    def in_flight(self, uri: str) -> ScheduledRun | None:
        return self._runs.get(uri)

    async def settle(self, uri: str) -> None:
        """Wait until nothing is scheduled or running for ``uri`` (a newer request
        started meanwhile is waited for too)."""
        while (run := self._runs.get(uri)) is not None:
            await run.done.wait()

    def shutdown(self) -> None:
        for uri in list(self._runs):
            self.supersede(uri)
