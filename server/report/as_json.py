"""JSON report, schema "latchwatch-report/1" (docs/report-json.md). Keys and their order are
the contract; a value the checker does not know is null."""

from __future__ import annotations

import json
import math
from pathlib import Path

import latchwatch
from latchwatch.analyzers.layout.tops import CheckedTop
from latchwatch.analyzers.model.findings import Device, Finding, Frame, Placement, Related
from latchwatch.server.report.model import Report, RunSummary, for_display

SCHEMA = "latchwatch-report/1"


def number(value) -> float | None:
    """A finite float, or None: JSON has no infinity or NaN (a distance to a tap
    that does not exist is unknown, not infinite)."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def point(values) -> list | None:
    """A coordinate pair as JSON numbers, or None."""
    return None if values is None else [number(v) for v in values]


def plain(value):
    """Corner values and figures as JSON values (numpy scalars become Python ones)."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if hasattr(value, "item") and callable(value.item):  # numpy scalar
        value = value.item()
    if isinstance(value, float):
        return number(value)
    return value


def frame_to_dict(frame: Frame) -> dict:
    """A stack frame as a JSON object."""
    return {"file": frame.file, "line": frame.line, "function": frame.function}


def placement_to_dict(placement: Placement) -> dict:
    """A reference placement as a JSON object."""
    return {
        "file": placement.file,
        "line": placement.line,
        "cell": placement.cell,
        "instance": placement.instance,
    }


def related_to_dict(related: Related) -> dict:
    """A related location as a JSON object."""
    return {
        "file": related.file,
        "line": related.line,
        "message": related.message,
        "location": point(related.location),
    }


def finding_to_dict(finding: Finding) -> dict:
    """A finding as a JSON object, keys in schema order."""
    return {
        "rule": finding.rule,
        "severity": finding.severity.label,
        "message": finding.message,
        "file": finding.file,
        "line": finding.line,
        "end_line": finding.end_line if finding.end_line is not None else finding.line,
        "cell": finding.cell,
        "location": point(finding.location),
        "bbox": point(finding.bbox),
        "value": number(finding.value),
        "limit": number(finding.limit),
        "unit": finding.unit,
        "corner": plain(finding.corner),
        "stack": [frame_to_dict(f) for f in finding.stack],
        "placements": [placement_to_dict(p) for p in finding.placements],
        "related": [related_to_dict(r) for r in finding.related],
    }


def top_to_dict(top: CheckedTop) -> dict:
    """A checked top cell as a JSON object: its name, why it was chosen, the line that named it."""
    return {"cell": top.name, "how": top.how, "reason": top.reason, "file": top.file, "line": top.line}


def run_to_dict(run: RunSummary) -> dict:
    """A run's summary as a JSON object."""
    entry = {
        "script": run.script,
        "corner": plain(run.corner),
        "status": run.status,
        "seconds": number(run.seconds),
        "cells": run.cells,
        "shapes": run.shapes,
        "sandbox": plain(run.sandbox),
    }
    entry["tops"] = [top_to_dict(top) for top in run.tops]  # added compatibly: the cells checked, and why
    if run.function is not None:
        # An added key (docs/report-json.md extended compatibly): which function a corner called.
        entry["function"] = run.function
    return entry


def device_to_dict(device: Device) -> dict:
    """A device row as a JSON object; an injector's row adds ``injection``."""
    row = {
        "kind": device.kind,
        "cell": device.cell,
        "bbox": point(device.bbox),
        "file": device.file,
        "line": device.line,
        "body": device.body,
        "tap_distance_um": number(device.tap_distance_um),
        "shunt_ohm": number(device.shunt_ohm),
        "trigger_current_a": number(device.trigger_current_a),
        "net": device.net,
        "corner": plain(device.corner),  # added compatibly: which corner's run the row is from
    }
    if device.injection is not None:
        row["injection"] = plain(device.injection)
    return row


def report_to_dict(report: Report, *, base: Path | None = None) -> dict:
    """``base``: paths inside it are written relative to it (default: the working
    directory)."""
    shown = for_display(report, base)
    document = {
        "schema": SCHEMA,
        "tool": {"name": "latchwatch", "version": latchwatch.__version__},
        "technology": shown.technology,
        "runs": [run_to_dict(r) for r in shown.runs],
        "findings": [finding_to_dict(f) for f in shown.findings],
    }
    if shown.devices is not None:
        document["devices"] = [device_to_dict(d) for d in shown.devices]
    document["summary"] = shown.summary()
    return document


def render_json(report: Report, *, base: Path | None = None) -> str:
    """The report as JSON text (schema latchwatch-report/1)."""
    return json.dumps(report_to_dict(report, base=base), indent=2, allow_nan=False) + "\n"
