"""Fixtures of the server tests."""

import pytest

from latchwatch.server.sandbox.workers import inspect_sandbox


@pytest.fixture(scope="module")
def doctor():
    """What doctor reports of the sandbox on this machine (the protections in force)."""
    report, ready, output = inspect_sandbox()
    assert ready is not None and "import-error" not in ready, output
    return report
