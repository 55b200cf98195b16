"""Plain-text report: one finding a line in the GNU form editors parse (docs/command-line.md).

    path:line:col: severity: message [rule-id]
    path: severity: message (cell CELL at x, y) [rule-id]      no line (GDSII/OASIS input)
    latchwatch: severity: message [rule-id]                    no file at all

Every finding line ends with its rule id in brackets, so one pattern picks the rule
out of all three forms. The report ends with one summary line that matches none of
them, which compilation buffers and quickfix lists skip.
"""

from __future__ import annotations

from pathlib import Path

from latchwatch.analyzers.electrical.shunt import si
from latchwatch.analyzers.electrical.trigger import describe_injection
from latchwatch.analyzers.layout.tops import CheckedTop
from latchwatch.analyzers.model.findings import Device, Finding
from latchwatch.server.report.model import Report, corner_label, for_display
from latchwatch.server.report.terminal import terminal_safe

PROGRAM = "latchwatch"


def _where(finding: Finding) -> str:
    """Cell and coordinates, for findings that have no source line to point at."""
    parts = []
    if finding.cell is not None:
        parts.append(f"cell {finding.cell}")
    if finding.location is not None:
        x, y = finding.location
        parts.append(f"at {x:.2f}, {y:.2f}")
    return f" ({' '.join(parts)})" if parts else ""


def _corner(finding: Finding) -> str:
    if not finding.corner:
        return ""
    values = ", ".join(f"{name}={value!r}" for name, value in finding.corner.items())
    return f" (corner {values})"


def format_finding(finding: Finding) -> str:
    """One finding as one line: path:line:col: severity: message [rule]."""
    message = " ".join(finding.message.split())  # one finding, one line
    head = f"{finding.severity.label}: {message}{_corner(finding)}"
    if finding.file is not None and finding.line is not None:
        column = finding.column if finding.column is not None else 1
        return f"{finding.file}:{finding.line}:{column}: {head} [{finding.rule}]"
    prefix = finding.file if finding.file is not None else PROGRAM
    return f"{prefix}: {head}{_where(finding)} [{finding.rule}]"


def _plural(count: int, word: str) -> str:
    return f"{count} {word}" if count == 1 else f"{count} {word}s"


def summary_line(report: Report) -> str:
    """The closing line: counts by severity and the number of files."""
    counts = report.summary()
    wording = [
        _plural(counts["error"], "error"),
        _plural(counts["warning"], "warning"),
        f"{counts['info']} info",
    ]
    shown = [text for text, n in zip(wording, counts.values(), strict=False) if n] or ["no findings"]
    files = len({run.script for run in report.runs})
    if not report.runs:
        return ", ".join(shown)
    where = f" in {_plural(files, 'file')}"
    if len(report.runs) != files:  # parameter corners: several runs of one script
        where += f" ({_plural(len(report.runs), 'run')})"
    return ", ".join(shown) + where


def device_lines(devices) -> list[str]:
    """The ``--devices`` table: a heading and one indented row per device, its place last.

    Rows start with spaces and carry no ``path:line:`` prefix, so editors that parse the
    finding lines do not take them for findings."""
    lines = [f"devices ({len(devices)}):"]
    for device in devices:
        lines.append("  " + "  ".join(_device_fields(device)))
    return lines


def _device_fields(device: Device) -> list[str]:
    fields = [device.kind, device.body]
    fields.append("tap " + (f"{device.tap_distance_um:.2f} um" if device.tap_distance_um is not None else "none"))
    if device.shunt_ohm is not None:
        fields.append("shunt " + si(device.shunt_ohm, "ohm"))
    if device.trigger_current_a is not None:
        fields.append("trigger " + si(device.trigger_current_a, "A"))
    if device.net:
        fields.append(f"net {device.net}")
    if device.injection is not None:
        fields.append(describe_injection(device.injection))
    where = f"at {device.file} line {device.line}" if device.file and device.line else "at"
    x0, y0, x1, y1 = device.bbox
    where += f" (cell {device.cell}, {x0:.2f}, {y0:.2f} to {x1:.2f}, {y1:.2f})"
    if device.corner:
        where += " corner " + ", ".join(f"{k}={v!r}" for k, v in device.corner.items())
    fields.append(where)
    return fields


def top_phrase(top: CheckedTop) -> str:
    """``top (written by the script to top.gds, line 9)``: a checked cell and why."""
    line = f", line {top.line}" if top.line is not None else ""
    return f"{top.name} ({top.reason}{line})"


TOPS_SHOWN = 10  # cells named on a run's ``checked`` line (a layout file may have hundreds); JSON lists all


def checked_lines(runs) -> list[str]:
    """One ``checked SCRIPT: CELL (why); ...`` line per run that was checked; the line
    starts with a word, not a path, so editors do not take it for a finding."""
    lines = []
    for run in runs:
        if run.tops:
            corner = f" [{run.function}: {corner_label(run.corner)}]" if run.function else ""
            shown = "; ".join(top_phrase(t) for t in run.tops[:TOPS_SHOWN])
            more = f"; and {len(run.tops) - TOPS_SHOWN} more" if len(run.tops) > TOPS_SHOWN else ""
            lines.append(f"checked {run.script}{corner}: {shown}{more}")
    return lines


def render_text(report: Report, *, base: Path | None = None) -> str:
    """``base``: paths inside it print relative to it (default: the working directory)."""
    shown = for_display(report, base)
    lines = [format_finding(finding) for finding in shown.findings]
    if shown.devices is not None:
        lines += device_lines(shown.devices)
    lines += checked_lines(shown.runs)
    lines.append(summary_line(shown))
    return terminal_safe("\n".join(lines) + "\n")  # names and messages a script chose
