"""Shared by the sandbox tests: skip unless a protection is in force, and write a hostile script."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest


def needs(report, *names):
    """Skip unless every named protection is in force, saying why (as doctor does)."""
    for name in names:
        if name not in report.in_force:
            pytest.skip(f"doctor: {name} unavailable: {report.missing.get(name, 'not reported')}")


def write_script(folder: Path, body: str, name: str = "hostile.py") -> Path:
    """``body`` dedented into ``folder/name``."""
    path = folder / name
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return path
