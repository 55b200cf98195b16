"""A dead-code scan of the package comes out clean (names used only by reflection are allow-listed)."""

import subprocess
import sys

import pytest

from locations import DATA, ROOT


def test_no_dead_code():
    pytest.importorskip("vulture")
    result = subprocess.run(
        [sys.executable, "-m", "vulture", "analyzers", "server", "latchwatch", str(DATA / "dead_code_allowlist.py")],
        cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert result.stdout == "", result.stdout
