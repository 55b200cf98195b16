"""The check of a run, in a forked analysis process under a memory and a time limit.

The layout budget (analyzers/layout/budget.py) refuses what is too big to flatten,
but a layout within it can still cost without bound: a self-intersecting outline of
10^5 vertices sends GEOS's repair into minutes and gigabytes, thousands of shapes
stacked on one spot make a spatial join quadratic. So every check of a layout runs
in a fork of latchwatch (the command line or the language server): its address
space is capped (RLIMIT_AS, beyond what the fork already maps), it is ended when
it runs past its time or the run is cancelled, and a check over a limit is the run's
script-limit finding, while the process that asked carries on.

A fork costs no imports, but some 10-30 ms a check (tests/bench/bench_limits.py):
more than the whole check of a small cell. A small layout (at most SMALL_SHAPES
shapes once expanded, none with more than SMALL_POLYGON vertices) cannot cost much
whatever it draws, and is checked in process. A fork is safe in a process with
threads because no other thread runs analysis code while it forks (``_GATE``: the
in-process checks hold it, so no lock of theirs is held in the child), and the child
touches no inherited descriptor: every one but its result pipe is closed first.
Where there is no fork, every check runs in process.
"""

from __future__ import annotations

import gc
import os
import pickle
import resource
import select
import signal
import threading
import time
from dataclasses import replace

import numpy as np

from latchwatch.analyzers.check import CheckOptions, CheckResult, check_outcome, checked_tops
from latchwatch.analyzers.electrical.window_memo import SOLVED_WINDOWS
from latchwatch.analyzers.layout.budget import placements
from latchwatch.analyzers.layout.flatten import MAX_DEPTH, HierarchyError
from latchwatch.analyzers.model.run_outcome import RunOutcome, ScriptFailure
from latchwatch.analyzers.technology.model import Technology
from latchwatch.server.child.collector import pace_for_layouts
from latchwatch.server.config.limits import Limits

_POLL = 0.05  # s between checks of the cancel event and the deadline
_RESULT_FD = 3
SMALL_SHAPES = 2000  # pairs of them, and their repairs, stay in the megabytes
SMALL_POLYGON = 64  # vertices: a self-intersecting outline's repair grows with their square
_GATE = threading.Lock()
MEMORY = "analysing the layout needed more memory than the {limit:g} GiB the analysis may use ({detail}); {hint}"
TIME = "analysing the layout took longer than the {limit:g} s the analysis may take; {hint}"
ENDED = ("the analysis of the layout ended with {detail} before it reported a result (it may use "
         "{limit:g} GiB of memory); {hint}")


def analyse(outcome: RunOutcome, tech: Technology, options: CheckOptions, limits: Limits, *, rules, severity,
            want_devices: bool, cancel=None, on_top=None) -> CheckResult | None:
    """``check_outcome`` under ``limits``; a check over them is the run's script-limit
    finding. None when ``cancel`` was set while it ran. ``on_top`` runs where the check
    runs (in the fork too); what it returns comes back in the result's ``per_top``."""
    keywords = dict(rules=rules, severity=severity, want_devices=want_devices, on_top=on_top)
    if not hasattr(os, "fork") or outcome.layout is None or _small(outcome, options):
        with _GATE:
            return check_outcome(outcome, tech, options, **keywords)
    read_fd, write_fd = os.pipe()
    mark = SOLVED_WINDOWS.mark()
    with _GATE:
        pid = os.fork()
    if pid == 0:  # pragma: no cover - the child; coverage does not follow it
        _child(write_fd, limits.analysis_memory,
               lambda: (check_outcome(outcome, tech, options, **keywords), SOLVED_WINDOWS.since(mark)))
    os.close(write_fd)
    try:
        kind, value = _collect(read_fd, pid, time.monotonic() + limits.analysis_seconds, cancel)
    finally:
        os.close(read_fd)
    if kind == "ok":
        result, solved = value
        SOLVED_WINDOWS.merge(solved)  # the next check, forked from here, starts with them
        return result
    if kind == "raise":
        raise value
    if kind == "cancelled":
        return None
    gib = limits.analysis_memory / (1 << 30)
    if kind == "memory":
        text = MEMORY.format(limit=gib, detail=value, hint=limits.memory_hint())
    elif kind == "time":
        text = TIME.format(limit=limits.analysis_seconds, hint=limits.time_hint())
    else:
        text = ENDED.format(detail=value, limit=gib, hint=limits.memory_hint())
    limited = replace(outcome, status="limit", layout=None, failure=ScriptFailure("limit", None, text, stage="check"))
    with _GATE:
        return check_outcome(limited, tech, options, **keywords)


def _small(outcome: RunOutcome, options: CheckOptions) -> bool:
    """True for a layout that expands to at most SMALL_SHAPES shapes of at most SMALL_POLYGON vertices."""
    captured = outcome.layout
    try:
        tops = [top.cell for top in checked_tops(outcome, options.top, options.project_root)]
    except (HierarchyError, ValueError):
        return True  # check_outcome reports it at once
    if len(tops) > SMALL_SHAPES:
        return False
    polygons = np.array([cell.polygon_count for cell in captured.cells], dtype=np.float64)
    largest = np.array([np.diff(cell.poly_offsets).max(initial=0) for cell in captured.cells])
    shapes = 0.0
    for top in tops:
        placed = placements(captured, top, MAX_DEPTH)
        if largest[placed > 0].max(initial=0) > SMALL_POLYGON:
            return False
        with np.errstate(over="ignore", invalid="ignore"):
            shapes += float(placed @ polygons)
        if not shapes <= SMALL_SHAPES:
            return False
    return True


def _collect(read_fd: int, pid: int, deadline: float, cancel) -> tuple[str, object]:
    """Read the child's pickled answer until it closes the pipe; end it on the deadline
    or a cancel. Always reaps the child."""
    chunks, stopped = [], None
    try:
        while True:
            if cancel is not None and cancel.is_set():
                stopped = ("cancelled", None)
                break
            if time.monotonic() >= deadline:
                stopped = ("time", None)
                break
            ready, _, _ = select.select([read_fd], [], [], _POLL)
            if ready:
                chunk = os.read(read_fd, 1 << 20)
                if not chunk:
                    break
                chunks.append(chunk)
    finally:
        if stopped is not None:
            os.kill(pid, signal.SIGKILL)
        _, status = os.waitpid(pid, 0)
    if stopped is not None:
        return stopped
    try:
        return pickle.loads(b"".join(chunks))
    except Exception:  # noqa: BLE001 - no complete answer: say how the child ended
        return "ended", _ending(status)


def _ending(status: int) -> str:
    if os.WIFSIGNALED(status):
        number = os.WTERMSIG(status)
        try:
            return signal.Signals(number).name
        except ValueError:
            return f"signal {number}"
    return f"exit status {os.waitstatus_to_exitcode(status)}"


def _child(write_fd: int, memory: int, check) -> None:  # pragma: no cover - runs in the fork
    """Close every inherited descriptor but the result pipe, cap the address space,
    check, send the pickled answer, and leave without running the parent's exit code."""
    code = 1
    try:
        os.dup2(write_fd, _RESULT_FD)
        os.closerange(_RESULT_FD + 1, os.sysconf("SC_OPEN_MAX") if hasattr(os, "sysconf") else 4096)
        quiet = os.open(os.devnull, os.O_RDWR)
        for fd in (0, 1):  # the language server's channel to the editor is stdin and stdout
            os.dup2(quiet, fd)
        _, hard = resource.getrlimit(resource.RLIMIT_AS)
        cap = _mapped() + memory
        if hard != resource.RLIM_INFINITY:
            cap = min(cap, hard)  # an unprivileged process cannot raise its hard limit
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
        # What the parent holds is never garbage here: left out of every collection (and
        # so never written to, which keeps its pages shared); new objects at a layout's pace.
        gc.freeze()
        pace_for_layouts()
        try:
            answer = ("ok", check())
        except MemoryError as error:
            answer = ("memory", f"MemoryError {error}".strip())
        except Exception as error:  # noqa: BLE001 - raised again in the parent, as an in-process check would
            # GEOS reports a failed allocation as its own exception.
            answer = ("memory", f"GEOS: {error}") if "bad_alloc" in str(error) else ("raise", error)
        try:
            data = pickle.dumps(answer)
        except Exception as error:  # noqa: BLE001 - an exception that does not pickle
            data = pickle.dumps(("raise", RuntimeError(f"{type(answer[1]).__name__}: {answer[1]}"
                                                       if answer[0] == "raise" else str(error))))
        view = memoryview(data)
        while view:
            view = view[os.write(_RESULT_FD, view):]
        code = 0
    finally:
        os._exit(code)


def _mapped() -> int:
    """Bytes of address space the process maps now (the parent's share of the fork)."""
    try:
        with open("/proc/self/statm", "rb") as statm:
            return int(statm.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        return 0
