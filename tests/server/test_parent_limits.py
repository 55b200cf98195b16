"""The parent's own limits against hostile input, in process (issue 14, points 5 and 8).

Files that are no regular files or too big, layouts that expand past the budget (from
a file, a script or a forged payload), analyses over their memory or time, and
terminal control sequences in script text. Limits are lowered so that small inputs
reach them: nothing here allocates more than a few megabytes.

Run as root; as an unprivileged user the same holds (nothing here depends on the
user: the file checks look at the file type, not at permissions, and RLIMIT_AS and
the fork work for every user).
"""

from __future__ import annotations

import json
import os
import sys
import threading
import time

import numpy as np
import pytest

from latchwatch.analyzers.check import CheckOptions, TopCellError, check_outcome
from latchwatch.analyzers.electrical import shunt
from latchwatch.analyzers.electrical.window_memo import SOLVED_WINDOWS
from latchwatch.analyzers.layout.budget import LayoutBudget, LayoutTooLarge, check_budget
from latchwatch.analyzers.layout.flatten import flatten
from latchwatch.analyzers.model.run_outcome import RunOutcome
from latchwatch.analyzers.rules import RULES
from latchwatch.server.config.files import InputFileError, file_problem, read_bytes
from latchwatch.server.config.limits import Limits, parse_limits
from latchwatch.server.config.techfiles import load_technology
from latchwatch.server.report.terminal import terminal_safe
from latchwatch.server.runs import analysis
from latchwatch.server.sandbox import wire

from builders import ACTIVE, NPLUS, NWELL, PPLUS, CellBuilder, GdstkAdder, frame, layout
from locations import BENCH

sys.path.insert(0, str(BENCH))
from gen_row import draw_row  # noqa: E402  (the benchmark rows: every device in a sheet window)

TECH = load_technology("demo")


def _outcome(captured, script="hostile.py"):
    return RunOutcome(script, "ok", 0.0, captured, None, "", {})


# -- terminal control sequences (point 8) ---------------------------------------------------------


@pytest.mark.parametrize("raw, shown", [
    ("\x1b]52;c;aGVsbG8=\x07", "\\x1b]52;c;aGVsbG8=\\x07"),  # OSC 52: a clipboard write (ECMA-48 OSC, BEL ends it)
    ("\x1b[2J\x1b[31mred", "\\x1b[2J\\x1b[31mred"),  # CSI: clear screen, colour
    ("\x9b31m\x9d8;;x\x9c", "\\x9b31m\\x9d8;;x\\x9c"),  # C1 CSI, OSC and ST in one character each
    ("ok\rspoofed", "ok\\x0dspoofed"),  # a lone CR would overwrite the line
    ("a\tb\nc\r\nd", "a\tb\nc\nd"),  # tabs and newlines stay; CRLF becomes LF
    ("\x00\x08\x7f", "\\x00\\x08\\x7f"),
    ("plain text, ünïcødé", "plain text, ünïcødé"),
])
def test_terminal_safe_escapes_control_characters_and_keeps_layout(raw, shown):
    assert terminal_safe(raw) == shown


# -- files that are no regular files, or too big (point 5) -----------------------------------------


def test_a_fifo_is_refused_without_blocking(tmp_path):
    fifo = tmp_path / "chip.gds"
    os.mkfifo(fifo)
    started = time.monotonic()
    with pytest.raises(InputFileError, match="is a FIFO"):
        read_bytes(fifo, 1 << 20)
    assert time.monotonic() - started < 5  # an open() without O_NONBLOCK would wait for a writer forever
    assert "FIFO" in file_problem(fifo, 1 << 20)


@pytest.mark.parametrize("target, words", [("/dev/zero", "character device"), ("/dev/urandom", "character device")])
def test_a_symlink_to_a_device_is_refused_and_named(tmp_path, target, words):
    link = tmp_path / "chip.gds"
    link.symlink_to(target)
    with pytest.raises(InputFileError) as raised:
        read_bytes(link, 1 << 20)
    assert words in str(raised.value) and target in str(raised.value) and "chip.gds" in str(raised.value)


def test_a_folder_is_refused(tmp_path):
    (tmp_path / "chip.gds").mkdir()
    assert "is a folder" in file_problem(tmp_path / "chip.gds", 1 << 20)


def test_a_file_over_the_size_limit_names_the_file_the_limit_and_the_key(tmp_path):
    big = tmp_path / "big.py"
    big.write_bytes(b"#" * 5000)
    limits = Limits(file_bytes=4096)
    with pytest.raises(InputFileError) as raised:
        read_bytes(big, limits.file_bytes, limits.file_hint())
    text = str(raised.value)
    assert "big.py is 5000 bytes, above the limit of 4096 bytes" in text and "file-mib" in text
    assert read_bytes(big, 5000) == b"#" * 5000  # at the limit it is read


# -- the layout budget (point 5) --------------------------------------------------------------------


def _unit():
    return CellBuilder("U").rect(NWELL, 0, 0, 1, 1)


def test_an_array_of_32767_by_32767_is_counted_not_allocated():
    top = CellBuilder("T").ref(0, columns=32767, rows=32767, v1=(2, 0), v2=(0, 2), stack=0)
    captured = layout(_unit(), top, frames=[frame(7)], stacks=[(0,)])
    started = time.monotonic()
    with pytest.raises(LayoutTooLarge) as raised:
        flatten(captured, 1)
    assert time.monotonic() - started < 2
    error = raised.value
    # 32767 * 32767 = 1,073,676,289 copies of one rectangle (arithmetic).
    assert (error.what, error.count, error.limit, error.stack) == ("shapes", 1_073_676_289, 10_000_000, 0)


def test_nested_arrays_multiply():
    middle = CellBuilder("M").ref(0, columns=1000, rows=1000, v1=(2, 0), v2=(0, 2), stack=1)
    top = CellBuilder("T").ref(1, columns=1000, rows=1000, v1=(3000, 0), v2=(0, 3000), stack=0)
    captured = layout(_unit(), middle, top, frames=[frame(9), frame(5)], stacks=[(0,), (1,)])
    with pytest.raises(LayoutTooLarge) as raised:
        check_budget(captured, 2, LayoutBudget(), 64)
    # 1000^4 rectangles (arithmetic); each array alone adds all of them, so either is the culprit.
    assert raised.value.count == 10**12 and raised.value.stack in (0, 1)


def test_explicit_offsets_count_as_copies_and_a_cycle_does_not_hang():
    top = CellBuilder("T").ref(0, explicit=[(x, 0) for x in range(30)])
    assert check_budget(layout(_unit(), top), 1, LayoutBudget(shapes=30), 64) is None
    with pytest.raises(LayoutTooLarge, match="31"):
        check_budget(layout(_unit(), top.rect(NWELL, 0, 0, 1, 1)), 1, LayoutBudget(shapes=30), 64)
    a, b = CellBuilder("A").rect(NWELL, 0, 0, 1, 1).ref(1, columns=2), CellBuilder("B").ref(0, columns=2)
    with pytest.raises(LayoutTooLarge, match="more than 10\\^18|expands"):
        check_budget(layout(a, b), 0, LayoutBudget(), 64)


def test_one_polygon_over_the_vertex_budget_is_named_by_its_line():
    t = np.linspace(0, 2 * np.pi, 1000, endpoint=False)
    cell = CellBuilder("TOP").rect(NWELL, 0, 0, 1, 1).polygon(ACTIVE, np.column_stack([np.cos(t), np.sin(t)]), stack=0)
    captured = layout(cell, frames=[frame(4)], stacks=[(0,)])
    budget = LayoutBudget(vertices=500, vertices_hint="raise it with `vertices = 1000`")
    result = check_outcome(_outcome(captured), TECH, CheckOptions(budget=budget), rules=RULES)
    (finding,) = result.findings
    assert result.status == "limit" and finding.rule == "script-limit" and finding.line == 4
    assert finding.message == ("the layout is too large for latchwatch to check: the layout under cell TOP "
                               "expands to 1,004 vertices, above the limit of 500; raise it with `vertices = 1000`")


def test_within_the_budget_nothing_changes():
    top = CellBuilder("T").ref(0, columns=3, rows=3, v1=(2, 0), v2=(0, 2))
    result = check_outcome(_outcome(layout(_unit(), top)), TECH, CheckOptions(budget=LayoutBudget(shapes=9)))
    assert result.status == "ok" and result.shapes == 9


# -- what a sandboxed script sends back (point 5) ---------------------------------------------------


def _payload(cells, header_extra=None):
    from latchwatch.server.child.wire_format import WIRE_VERSION

    arrays = []
    header = {"version": WIRE_VERSION, "status": "ok", "cells": [], "frames": [], "stacks": []}
    for cell in cells:
        fields = {}
        for name in ("poly_layer", "poly_datatype", "poly_offsets", "points", "poly_stack", "ref_cell", "ref_origin",
                     "ref_rotation", "ref_magnification", "ref_x_reflection", "ref_columns", "ref_rows", "ref_v1",
                     "ref_v2", "ref_explicit_offsets", "ref_explicit", "ref_stack"):
            fields[name] = len(arrays)
            arrays.append(getattr(cell, name))
        header["cells"].append({"name": cell.name, "fields": fields, "labels": []})
    header.update(header_extra or {})
    return b"".join(bytes(part) for part in wire.encode_payload(header, arrays))


def test_a_forged_payload_with_a_huge_array_is_a_limit_finding_not_an_allocation():
    unit = _unit().build()
    top = CellBuilder("T").ref(0, columns=2**31 - 1, rows=2**31 - 1).build()
    captured = wire.decode_layout(_payload([unit, top]))
    result = check_outcome(_outcome(captured), TECH, CheckOptions(), rules=RULES)
    assert result.status == "limit" and [f.rule for f in result.findings] == ["script-limit"]
    assert "expands to more than 10^18 shapes" in result.findings[0].message  # (2^31 - 1)^2 = 4.6e18


@pytest.mark.parametrize("damage, words", [
    (lambda c: setattr(c, "ref_rows", c.ref_rows[:0]), "reference arrays disagree"),
    (lambda c: setattr(c, "ref_explicit_offsets", np.array([0, 2, 1], np.int64)), "explicit"),
])
def test_forged_arrays_that_disagree_are_a_wire_error(damage, words):
    unit = _unit().build()
    top = CellBuilder("T").ref(0, columns=2).ref(0, columns=3).build()
    damage(top)
    with pytest.raises(wire.WireError, match=words):
        wire.decode_layout(_payload([unit, top]))


def test_a_deeply_nested_or_overflowing_header_is_a_wire_error():
    from latchwatch.server.child.wire_format import MAGIC

    deep = b"[" * 100000 + b"]" * 100000
    with pytest.raises(wire.WireError, match="nests deeper"):
        wire.decode_payload(MAGIC + len(deep).to_bytes(8, "little") + deep)
    header = json.dumps({"version": 1, "arrays": [["<f8", [2**32, 2**32], 0, 0]]}).encode()
    with pytest.raises(wire.WireError, match="do not hold"):
        wire.decode_payload(MAGIC + len(header).to_bytes(8, "little") + header)


# -- the analysis process (point 5) -----------------------------------------------------------------


def _row(count):
    cell = CellBuilder("ROW").rect(NWELL, -5, -5, 3 * count, 10).rect(NPLUS, -3, 0, -1, 4).rect(ACTIVE, -3, 0, -1, 4)
    for k in range(count):
        cell.rect(PPLUS, 3 * k, 0, 3 * k + 2, 4).rect(ACTIVE, 3 * k, 0, 3 * k + 2, 4)
    return _outcome(layout(cell))


def _analyse(run, limits, cancel=None, options=None):
    return analysis.analyse(run, TECH, options or CheckOptions(), limits, rules=RULES, severity={},
                            want_devices=True, cancel=cancel)


def test_a_forked_analysis_gives_what_the_in_process_one_gives():
    run = _row(analysis.SMALL_SHAPES)  # above the small-layout size: forked
    assert not analysis._small(run, CheckOptions())
    forked, direct = _analyse(run, Limits()), check_outcome(run, TECH, CheckOptions(), want_devices=True)
    assert forked.findings == direct.findings and forked.devices == direct.devices and forked.shapes == direct.shapes


def test_a_forked_analysis_collects_garbage_at_the_layout_pace_and_this_process_keeps_its_own():
    import gc

    from latchwatch.server.child.collector import THRESHOLDS

    ours = gc.get_threshold()
    big, small = _row(analysis.SMALL_SHAPES), _row(3)
    seen = [analysis.analyse(run, TECH, CheckOptions(), Limits(), rules=RULES, severity={}, want_devices=False,
                             on_top=lambda ctx, found: gc.get_threshold()).per_top for run in (big, small)]
    assert seen == [[THRESHOLDS], [ours]] and gc.get_threshold() == ours


def test_windows_a_forked_analysis_solved_come_back_and_the_next_check_reuses_them(monkeypatch):
    # The memo of solved windows lives in this process; a fork's new entries are sent back
    # with its result, so the next fork starts with them and gives the same answer.
    monkeypatch.setattr(shunt, "WHOLE_BODY_DEVICES", 0)  # the fork inherits it: every device in a window
    cell = CellBuilder("ROWS")
    for row in range(3):
        draw_row(GdstkAdder(cell), row, 12)
    run = _outcome(layout(cell))
    assert not analysis._small(run, CheckOptions())
    SOLVED_WINDOWS.clear()
    first = _analyse(run, Limits())
    kept = len(SOLVED_WINDOWS)
    assert kept > 0
    again = _analyse(run, Limits())
    assert len(SOLVED_WINDOWS) == kept  # nothing new was solved
    assert again.findings == first.findings and again.devices == first.devices


MEMORY_CASE = """
import sys
sys.path.insert(0, {tests!r})
from test_parent_limits import Limits, _analyse, _row
result = _analyse(_row(3000), Limits(analysis_memory=1 << 20))
print(result.status, [f.rule for f in result.findings])
print(result.findings[0].message)
print(_analyse(_row(3000), Limits()).status)
"""


def test_an_analysis_over_its_memory_is_a_finding_and_latchwatch_carries_on():
    """In a fresh interpreter: the cap is on new mappings, and a long-lived process (this
    suite's) may have enough free heap mapped already for a small check to fit."""
    import subprocess
    import sys
    from pathlib import Path

    tests = Path(__file__).resolve().parent
    code = MEMORY_CASE.format(tests=str(tests))
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300,
                         cwd=tests, env={**os.environ, "PYTHONPATH": f"{tests.parent}{os.pathsep}{tests}"})
    status, message, after = run.stdout.splitlines()
    assert status == "limit ['script-limit']", run.stderr
    assert "needed more memory than the 0.000976562 GiB" in message and "`analysis-gib = 0.00195312`" in message
    assert after == "ok"  # and the next check works


def test_an_analysis_over_its_time_is_ended():
    started = time.monotonic()
    result = _analyse(_row(3000), Limits(analysis_seconds=0.01))
    assert time.monotonic() - started < 10
    assert result.status == "limit" and "took longer than the 0.01 s" in result.findings[0].message


def test_a_cancelled_analysis_returns_none_and_an_error_is_raised_again():
    cancel = threading.Event()
    cancel.set()
    assert _analyse(_row(3000), Limits(), cancel=cancel) is None
    with pytest.raises(TopCellError, match="NOPE"):
        _analyse(_row(3000), Limits(), options=CheckOptions(top="NOPE"))


# -- the [limits] table -----------------------------------------------------------------------------


def test_limits_parse_with_units_and_refuse_bad_values():
    limits = parse_limits({"file-mib": 2, "shapes": 5, "analysis-gib": 0.5, "analysis-seconds": 3}, _fail)
    assert (limits.file_bytes, limits.shapes, limits.analysis_memory, limits.analysis_seconds) == (
        2 << 20, 5, 1 << 29, 3)
    for bad in ({"shapes": 1.5}, {"shapes": -1}, {"file-mib": True}, {"shape": 3}):
        with pytest.raises(ValueError):
            parse_limits(bad, _fail)


def _fail(key, message):
    raise ValueError(f"{key}: {message}")
