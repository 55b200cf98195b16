"""Suite-wide set-up: the ``fast`` subset.

``python -m pytest -m fast`` runs the tests that start no child process, editor or
command: the analyzers, the rules and the server's pure units. It is what a
contributor runs between edits (well under a minute on two cores); the whole suite
runs before a commit and in CI.
"""

from pathlib import Path

import pytest

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
