"""Suite-wide set-up: the ``fast`` subset.

``python -m pytest -m fast`` runs the tests that start no child process, editor or
command: the analyzers, the rules and the server's pure units. It is what a
contributor runs between edits (well under a minute on two cores); the whole suite
runs before a commit and in CI.
"""

import os
import shutil
import tempfile
from pathlib import Path

import pytest
from _pytest.tmpdir import TempPathFactory

TESTS = Path(__file__).resolve().parent
FAST_FOLDERS = ("analyzers", "rules")
RUNS_THE_COMMAND = {"test_rule_fixtures.py"}  # in a fast folder, but it starts `latchwatch check`
# Server units that run in process only (no child, no command, no editor).
FAST_SERVER_FILES = {
    "test_documents.py", "test_lsp_convert.py", "test_lsp_settings.py", "test_project_config.py",
    "test_report_json.py", "test_report_sarif.py", "test_report_text.py", "test_suppression.py",
    "test_techfiles.py", "test_wire.py", "test_layering.py", "test_report_model.py", "test_docstrings.py",
    "test_pictures.py",
}


def pytest_collection_modifyitems(config, items):
    for item in items:
        path = Path(str(item.fspath)).resolve()
        try:
            parts = path.relative_to(TESTS).parts
        except ValueError:
            continue
        if parts[-1] in RUNS_THE_COMMAND:
            continue
        if parts[0] in FAST_FOLDERS or (parts[0] == "server" and parts[-1] in FAST_SERVER_FILES):
            item.add_marker(pytest.mark.fast)


def pytest_configure(config):
    """As root, the tests' temporary folders are made readable to other users: a run takes
    the identity of nobody and is refused where nobody cannot read the script's folder
    (docs/sandbox.md), and pytest makes its folders for the owner alone. They live in a
    folder of this session's own, since other sessions tighten a shared /tmp/pytest-of-root."""
    if not hasattr(os, "geteuid") or os.geteuid() != 0:
        return
    if config.option.basetemp is None:
        session_folder = Path(tempfile.mkdtemp(prefix="latchwatch-tests-"))
        session_folder.chmod(0o755)
        config.option.basetemp = str(session_folder / "tmp")
        config.add_cleanup(lambda: shutil.rmtree(session_folder, ignore_errors=True))
    original = TempPathFactory.mktemp

    def readable_mktemp(self, basename, numbered=True):
        path = original(self, basename, numbered)
        for folder in (path, *path.parents):
            if folder == self.getbasetemp().parent:
                break
            folder.chmod(0o755)
        return path

    TempPathFactory.mktemp = readable_mktemp
