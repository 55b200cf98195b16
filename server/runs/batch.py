"""The batch runner behind every check: tasks (server/runs/plan.py) run several at a time,
each in its own sandboxed child, each checked by the one pipeline (server/runs/pipeline.py).
Shared by ``latchwatch check`` and the language server.

Runs finish in any order; reports list them in the order planned, so a report does
not depend on ``jobs``. Function calls run in children forked from corner hosts
(server/sandbox/hosts.py, run_script's ``hosted``), which have gdstk imported already.
"""

from __future__ import annotations

import sys
import threading
from collections.abc import Callable, Iterable
from concurrent.futures import FIRST_COMPLETED, ThreadPoolExecutor, wait
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TextIO

from latchwatch.analyzers.model.findings import Device, Finding
from latchwatch.server.report.model import Report, RunSummary, corner_label
from latchwatch.server.report.terminal import terminal_safe
from latchwatch.server.runs.pipeline import CheckSettings, check_run, import_analysis, read_text_or_none, run_path
from latchwatch.server.runs.plan import Sweep, Task, plan_script, preview_functions
from latchwatch.server.sandbox.hosts import available_cpus
from latchwatch.server.sandbox.runner import run_script


@dataclass
class RunResult:
    """One task's run and check: status, findings, devices and output."""
    task: Task
    status: str
    cells: int
    summary: RunSummary
    findings: list[Finding]
    devices: list[Device]
    output: str
    drawings: list = field(default_factory=list)  # with settings.draw: one per checked top


class _Either:
    """Set when either event is (the runner only asks ``is_set``)."""

    def __init__(self, own: threading.Event, outer):
        self.own, self.outer = own, outer

    def is_set(self) -> bool:
        return self.own.is_set() or (self.outer is not None and self.outer.is_set())


def run_task(task: Task, settings: CheckSettings, source: str | None = None, cancel=None,
             read_source=None) -> RunResult | None:
    """Run and check one task; None when cancelled."""
    if cancel is not None and cancel.is_set():
        return None
    if task.function is None:
        outcome = run_path(task.path, settings, source=source, cancel=cancel)
    else:
        if task.preview:
            settings = replace(settings, top=None)  # each previewed function's cells are its own tops
        outcome = run_script(task.path, source=source, python=settings.python, timeout=settings.timeout,
                             project_root=settings.project_root, cancel=cancel,
                             require_sandbox=settings.require_sandbox, hosted=True, pass_env=settings.pass_env,
                             call=(task.function, task.corner or {}), accept_non_layout=task.preview)
        outcome = replace(outcome, corner=dict(task.corner or {}))
    if outcome.status == "cancelled" or (cancel is not None and cancel.is_set()):
        return None
    checked = check_run(outcome, settings, read_source=read_source, cancel=cancel)
    if checked is None:
        return None
    findings, devices, summary, drawings = checked
    if task.function is not None:
        summary = replace(summary, function=task.function)
    cells = len(outcome.layout.cells) if outcome.layout is not None else 0
    return RunResult(task, summary.status, cells, summary, findings, devices, outcome.output, drawings)


def _wants_preview(result: RunResult, text: str | None) -> list[str]:
    if result.task.function is not None or result.status != "ok" or result.cells:
        return []
    if result.task.path.suffix.lower() != ".py" or text is None:
        return []
    return preview_functions(text)


def _kept(result: RunResult) -> bool:
    """A previewed function stays when it failed or returned cells."""
    return result.status != "ok" or result.cells > 0


@dataclass
class _Plan:
    """Tasks per checked script, in report order."""

    tasks: list[list[Task]] = field(default_factory=list)
    sources: list[str | None] = field(default_factory=list)


def execute(plan: _Plan, settings: CheckSettings, *, jobs: int | None = None, cancel=None,
            read_source=None, on_result: Callable[[RunResult | None, int, int], None] = lambda r, d, t: None
            ) -> list[list[RunResult]] | None:
    """Run every task of the plan, ``jobs`` at a time; per script its results in plan
    order (for a previewed file, its kept functions). None when cancelled."""
    stop = threading.Event()
    either = _Either(stop, cancel)
    results: dict[tuple, RunResult | None] = {}
    previews: dict[int, int] = {}  # script index -> number of preview tasks started
    total = sum(len(t) for t in plan.tasks)
    done = 0
    with ThreadPoolExecutor(max_workers=max(1, jobs or available_cpus()), thread_name_prefix="latchwatch-corner") as pool:
        def submit(key: tuple, task: Task):
            source = plan.sources[key[0]]
            return pool.submit(run_task, task, settings, source, either, read_source)

        pending = {submit((i, j), task): (i, j) for i, tasks in enumerate(plan.tasks) for j, task in enumerate(tasks)}
        import_analysis()  # here, while the first scripts run, not after them
        try:
            while pending:
                finished, _ = wait(pending, return_when=FIRST_COMPLETED)
                for future in finished:
                    key = pending.pop(future)
                    result = results[key] = future.result()
                    done += 1
                    names = _wants_preview(result, plan.sources[key[0]] or read_text_or_none(result.task.path)) \
                        if result is not None else []
                    previews[key[0]] = len(names) if names else previews.get(key[0], 0)
                    total += len(names)
                    for k, name in enumerate(names):
                        task = Task(result.task.path, name, {}, preview=True)
                        pending[submit((key[0], 1, k), task)] = (key[0], 1, k)
                    on_result(result, done, total)
        except BaseException:
            stop.set()
            for future in pending:
                future.cancel()
            raise
    if either.is_set():
        return None
    out = []
    for i, tasks in enumerate(plan.tasks):
        mine = [results[(i, j)] for j in range(len(tasks))]
        tried = [results[(i, 1, k)] for k in range(previews.get(i, 0))]
        kept = [r for r in tried if r is not None and _kept(r)]
        out.append(kept or mine)
    return out


def check_script(path: Path, settings: CheckSettings, sweeps: Iterable[Sweep] = (), *, source: str | None = None,
                 cancel=None, jobs: int | None = None, corners: int | None = None, read_source=None,
                 on_result: Callable[[RunResult | None, int, int], None] = lambda r, d, t: None
                 ) -> list[RunResult] | None:
    """Every run of one script (the editor's document): its corners, its previewed
    functions, or its one plain run. None when cancelled."""
    tasks = plan_script(path, sweeps, corners)
    results = execute(_Plan([tasks], [source]), settings, jobs=jobs, cancel=cancel, read_source=read_source,
                      on_result=on_result)
    return None if results is None else results[0]


def check_all(paths: list[Path], settings: CheckSettings, sweeps: Iterable[Sweep] = (), *, jobs: int | None = None,
              corners: int | None = None, progress: ProgressBar | None = None, unlisted: bool = False) -> Report:
    """The command line's report: every path (a sweep's script as its corners), and
    with ``unlisted`` also the sweeps of scripts not among the paths."""
    sweeps = list(sweeps)
    progress = progress or ProgressBar(None)
    listed = {Path(p).resolve() for p in paths}
    extra = [s.script for s in sweeps if s.script.resolve() not in listed] if unlisted else []
    plan = _Plan()
    for path in list(paths) + list(dict.fromkeys(extra)):
        tasks = plan_script(path, sweeps, corners)
        plan.tasks.append(tasks)
        plan.sources.append(None)
        functions = sorted({t.function for t in tasks if t.function})
        progress.note(f"checking {path}" + (f": {', '.join(functions)} at {len(tasks)} corners" if functions else ""))

    def on_result(result: RunResult | None, done: int, total: int) -> None:
        if result is not None and result.output:
            where = f" [{result.task.function}: {corner_label(result.task.corner)}]" if result.task.function else ""
            progress.note(f"{result.task.path}{where}: script output:\n{result.output.rstrip()}")
        progress.update(done, total)

    progress.update(0, sum(len(t) for t in plan.tasks))
    try:
        results = execute(plan, settings, jobs=jobs, on_result=on_result)
    finally:
        progress.close()
    return report_of([r for per_script in results for r in per_script if r is not None], settings)


def report_of(runs: list[RunResult], settings: CheckSettings) -> Report:
    """The report of finished runs, in their order (with their drawings when settings.draw was set)."""
    from latchwatch.analyzers.rules import RULES

    devices = [d for r in runs for d in r.devices]
    return Report(technology=settings.tech.name, runs=tuple(r.summary for r in runs),
                  findings=tuple(f for r in runs for f in r.findings),
                  devices=tuple(devices) if settings.devices else None, rules=RULES,
                  drawings=tuple(tuple(r.drawings) for r in runs))


class ProgressBar:
    """Notes on a stream, and a bar of finished runs on it when it is a terminal
    (drawn only once there is more than one run)."""

    WIDTH = 30

    def __init__(self, stream: TextIO | None = sys.stderr):
        self.stream = stream
        self.drawn = False
        self.bar = stream is not None and _is_terminal(stream)

    def note(self, text: str) -> None:
        if self.stream is None:
            return
        self._clear()
        print(terminal_safe(text), file=self.stream, flush=True)  # script output among the notes

    def update(self, done: int, total: int) -> None:
        """Redraw the bar for ``done`` of ``total`` runs (only on a terminal, only for several runs)."""
        if not self.bar or total < 2:
            return
        filled = self.WIDTH * done // total
        self.stream.write(f"\r[{'#' * filled}{'-' * (self.WIDTH - filled)}] {done}/{total} runs")
        self.stream.flush()
        self.drawn = True

    def close(self) -> None:
        self._clear()

    def _clear(self) -> None:
        if self.drawn:
            self.stream.write("\r" + " " * (self.WIDTH + 24) + "\r")
            self.stream.flush()
            self.drawn = False


def _is_terminal(stream) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False
