"""The trust store and `latchwatch trust` (docs/sandbox.md)."""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from latchwatch.server.config import trust


@pytest.fixture
def config_home(tmp_path, monkeypatch):
    home = tmp_path / "config"
    monkeypatch.setenv("XDG_CONFIG_HOME", str(home))
    return home


def run_trust(*argv):
    out, err = io.StringIO(), io.StringIO()
    path = argv[0] if argv and not argv[0].startswith("--") else None
    remove = argv[argv.index("--remove") + 1] if "--remove" in argv else None
    status = trust.trust_command(path, "--list" in argv, remove, out, err)
    return status, out.getvalue(), err.getvalue()


def test_store_location_follows_xdg_config_home(tmp_path):
    # XDG Base Directory Specification: $XDG_CONFIG_HOME, default $HOME/.config,
    # and a relative value is invalid and ignored.
    assert trust.store_path({"XDG_CONFIG_HOME": str(tmp_path), "HOME": "/h"}) == tmp_path / "latchwatch" / "trusted.json"
    assert trust.store_path({"HOME": "/h"}) == Path("/h/.config/latchwatch/trusted.json")
    assert trust.store_path({"XDG_CONFIG_HOME": "relative/dir", "HOME": "/h"}) == Path("/h/.config/latchwatch/trusted.json")


def test_trust_list_remove_round_trip(tmp_path, config_home):
    project = tmp_path / "project"
    project.mkdir()
    assert run_trust("--list")[1] == ""
    status, out, _ = run_trust(str(project))
    assert status == 0 and str(project.resolve()) in out
    stored = json.loads((config_home / "latchwatch" / "trusted.json").read_text())
    assert stored == {"schema": "latchwatch-trust/1", "folders": [str(project.resolve())]}
    assert run_trust(str(project))[0] == 0  # trusting twice keeps one entry
    assert run_trust("--list")[1].splitlines() == [str(project.resolve())]
    assert run_trust("--remove", str(project))[0] == 0
    assert run_trust("--list")[1] == ""


def test_trust_covers_subfolders_only(tmp_path, config_home):
    project, sibling = tmp_path / "project", tmp_path / "project-two"
    (project / "cells").mkdir(parents=True)
    sibling.mkdir()
    trust.add_trusted(project)
    assert trust.is_trusted(project / "cells" / "row.py")
    assert trust.is_trusted(project)
    assert not trust.is_trusted(sibling / "row.py")  # a shared name prefix is not containment
    assert not trust.is_trusted(tmp_path / "row.py")


def test_symlink_into_untrusted_folder_is_not_trusted(tmp_path, config_home):
    project, outside = tmp_path / "project", tmp_path / "outside"
    project.mkdir()
    outside.mkdir()
    (project / "link").symlink_to(outside)
    trust.add_trusted(project)
    assert not trust.is_trusted(project / "link" / "evil.py")


def test_editor_setting_grants_trust_but_relative_entries_do_not(tmp_path, config_home, monkeypatch):
    project = tmp_path / "project"
    project.mkdir()
    assert trust.is_trusted(project / "a.py", editor_folders=[str(project)])
    monkeypatch.chdir(tmp_path)
    assert not trust.is_trusted(project / "a.py", editor_folders=["project"])


def test_errors_name_what_is_wrong(tmp_path, config_home):
    status, _, err = run_trust(str(tmp_path / "missing"))
    assert status == 2 and "missing: does not exist" in err
    file = tmp_path / "script.py"
    file.write_text("")
    status, _, err = run_trust(str(file))
    assert status == 2 and "is not a folder" in err
    status, _, err = run_trust("--remove", str(tmp_path))
    assert status == 2 and "not in the trust store" in err
    store = config_home / "latchwatch" / "trusted.json"
    store.parent.mkdir(parents=True)
    store.write_text("{broken")
    status, _, err = run_trust("--list")
    assert status == 2 and str(store) in err and "not valid JSON" in err
    store.write_text(json.dumps({"schema": "latchwatch-trust/1", "folders": ["relative"]}))
    with pytest.raises(trust.TrustStoreError, match="absolute folder paths"):
        trust.load_trusted(store)


def test_remove_works_after_the_folder_is_gone(tmp_path, config_home):
    project = tmp_path / "gone"
    project.mkdir()
    trust.add_trusted(project)
    project.rmdir()
    assert trust.remove_trusted(project) == project.resolve()
    assert trust.load_trusted() == []


def test_console_script(tmp_path, config_home):
    project = tmp_path / "project"
    project.mkdir()
    env = {**os.environ, "XDG_CONFIG_HOME": str(config_home)}
    command = [sys.executable, "-m", "latchwatch", "trust"]
    done = subprocess.run(command + [str(project)], env=env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    listed = subprocess.run(command + ["--list"], env=env, capture_output=True, text=True)
    assert listed.stdout.splitlines() == [str(project.resolve())]
    both = subprocess.run(command + [str(project), "--list"], env=env, capture_output=True, text=True)
    assert both.returncode == 2 and "not both" in both.stderr
