"""Editor settings and their precedence over the project file (server/lsp/settings.py)."""

from __future__ import annotations

from pathlib import Path

import pytest

from latchwatch.analyzers.model.findings import Severity
from latchwatch.server.lsp.settings import (
    EditorSettings,
    SettingsError,
    TechnologyCache,
    document_settings,
    merge,
    section_of,
    trust_root,
)


def test_section_wrapped_or_bare():
    assert section_of({"latchwatch": {"tech": "demo"}}) == {"tech": "demo"}
    assert section_of({"tech": "demo", "other": 1}) == {"tech": "demo"}
    assert section_of(None) == {}


def test_merge_overrides_key_by_key_and_reports_bad_values():
    base, problems = merge(EditorSettings(), {"tech": "demo", "debounce": 200, "runOn": "save"}, True)
    assert problems == [] and (base.tech, base.debounce_ms, base.run_on) == ("demo", 200.0, "save")
    later, problems = merge(base, {"debounce": -1, "runOn": "sometimes", "disable": ["no-such-rule"],
                                   "severity": {"tap-distance": "fatal"}, "timeout": "soon"}, True)
    assert later == base  # every bad value is skipped
    assert len(problems) == 5 and all(p.startswith("setting latchwatch.") and p.endswith("ignored") for p in problems)
    assert any("runOn" in p and "'change' or 'save'" in p for p in problems)


def test_trusted_folders_only_where_allowed():
    allowed, _ = merge(EditorSettings(), {"trustedFolders": ["/work/chip"]}, allow_trust=True)
    assert allowed.trusted_folders == ("/work/chip",)
    scoped, _ = merge(allowed, {"trustedFolders": ["/elsewhere"]}, allow_trust=False)
    assert scoped.trusted_folders == ("/work/chip",)


def make_project(folder: Path, text: str) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "latchwatch.toml").write_text(text)
    script = folder / "cells" / "row.py"
    script.parent.mkdir(exist_ok=True)
    script.write_text("")
    return script


def test_editor_settings_override_the_project_file(tmp_path):
    # docs/project.md: editor settings override the file for the language server.
    script = make_project(tmp_path / "chip", 'tech = "demo"\ntimeout = 3\ndisable = ["no-geometry"]\n'
                                             'severity = { tap-distance = "warning", floating-well = "info" }\n')
    techs = TechnologyCache()
    from_file = document_settings(script, EditorSettings(), None, techs)
    assert from_file.check.tech.name == "demo" and from_file.check.timeout == 3.0
    assert from_file.check.disable == ("no-geometry",)
    assert from_file.root == tmp_path / "chip" and from_file.check.project_root == tmp_path / "chip"
    editor, _ = merge(EditorSettings(), {"timeout": 7, "disable": [], "severity": {"tap-distance": "info"}}, True)
    both = document_settings(script, editor, None, techs)
    assert both.check.timeout == 7.0 and both.check.disable == ()
    assert both.check.severity == {"tap-distance": Severity.INFO, "floating-well": Severity.INFO}
    assert both.check.devices  # the hover reads the device table


def test_missing_technology_names_both_places(tmp_path):
    script = make_project(tmp_path / "chip", "timeout = 3\n")
    with pytest.raises(SettingsError, match=r"set `tech` in latchwatch.toml .* latchwatch.tech"):
        document_settings(script, EditorSettings(), None, TechnologyCache())


def test_trust_root_prefers_the_project_folder(tmp_path):
    script = make_project(tmp_path / "chip", 'tech = "demo"\n')
    assert trust_root(script, tmp_path) == tmp_path / "chip"
    loose = tmp_path / "loose" / "a.py"
    loose.parent.mkdir()
    assert trust_root(loose, None) == tmp_path / "loose"
    assert trust_root(loose, tmp_path) == tmp_path


@pytest.mark.parametrize("editor_value, project_line, required", [
    (None, "", False), (True, "", True), (None, "require-sandbox = true\n", True),
    (False, "require-sandbox = true\n", True),  # the editor cannot relax what the project requires
])
def test_require_sandbox_from_either_side(tmp_path, editor_value, project_line, required):
    script = make_project(tmp_path / "chip", 'tech = "demo"\n' + project_line)
    editor, problems = merge(EditorSettings(), {"requireSandbox": editor_value}, True)
    assert problems == []
    check = document_settings(script, editor, None, TechnologyCache()).check
    assert check.require_sandbox is required
    assert check.hosted  # the language server's runs are forks of corner hosts


def test_require_sandbox_must_be_a_boolean():
    kept, problems = merge(EditorSettings(), {"requireSandbox": "yes"}, True)
    assert kept == EditorSettings()
    assert problems == ["setting latchwatch.requireSandbox: expected true or false, got 'yes'; ignored"]


def test_env_from_the_editor_adds_to_the_projects(tmp_path):
    script = make_project(tmp_path / "chip", 'tech = "demo"\nenv = ["PDK_ROOT"]\n')
    editor, problems = merge(EditorSettings(), {"env": ["PDK", "PDK_ROOT"]}, True)
    assert problems == []
    assert document_settings(script, editor, None, TechnologyCache()).check.pass_env == ("PDK_ROOT", "PDK")


def test_env_setting_refuses_loader_variables():
    kept, problems = merge(EditorSettings(), {"env": ["LD_PRELOAD"]}, True)
    assert kept == EditorSettings()
    assert problems and "latchwatch.env" in problems[0] and "LD_PRELOAD is not passed into a run" in problems[0]


def test_a_trusted_subfolder_never_runs_the_python_of_an_untrusted_parent(tmp_path, monkeypatch):
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "config"))  # an empty trust store
    script = make_project(tmp_path / "parent", 'tech = "demo"\npython = "/tmp/evil-python"\n')
    sub_script = script.parent / "sub" / "cell.py"
    sub_script.parent.mkdir()
    sub_script.write_text("import gdstk\n")
    editor, _ = merge(EditorSettings(), {"trustedFolders": [str(sub_script.parent)]}, True)
    with pytest.raises(SettingsError, match=r"its `python` \(/tmp/evil-python\) is not used.*latchwatch trust"):
        document_settings(sub_script, editor, None, TechnologyCache())
    trusted_parent, _ = merge(EditorSettings(), {"trustedFolders": [str(tmp_path / "parent")]}, True)
    assert document_settings(sub_script, trusted_parent, None, TechnologyCache()).check.python == "/tmp/evil-python"
    own_choice, _ = merge(editor, {"python": "/usr/bin/python3"}, True)  # the editor's setting is the user's own
    assert document_settings(sub_script, own_choice, None, TechnologyCache()).check.python == "/usr/bin/python3"
