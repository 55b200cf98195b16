"""Real editors drive `latchwatch serve` (headless Neovim, Emacs in batch mode with
eglot) with the files in editor-configs/, and every editor configuration parses.

The editor tests skip, saying why, when the editor is not installed (Debian packages
neovim, emacs-nox and elpa-eglot; .ci/run installs them).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from locations import EDITOR_CONFIGS

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from latchwatch.server.lsp.settings import KEYS

CONFIGS = EDITOR_CONFIGS
EDITOR_TIMEOUT = 90

# One contacted n-tap at x -3..-1 in an n-well and a P+ diffusion at x 20..28 drawn on
# line 9: its farthest point is 29 um from the tap, over the demo limit of 20 um (invented).
SCRIPT = '''\
import gdstk

lib = gdstk.Library()
cell = lib.new_cell("TOP")
cell.add(gdstk.rectangle((-5, -2), (45, 8), layer=1))
cell.add(gdstk.rectangle((-3, 0), (-1, 4), layer=2))
cell.add(gdstk.rectangle((-3.2, -0.2), (-0.8, 4.2), layer=4))
cell.add(gdstk.rectangle((-2.5, 1.5), (-1.5, 2.5), layer=6))
cell.add(gdstk.rectangle((20, 0), (28, 4), layer=2))
cell.add(gdstk.rectangle((19.8, -0.2), (28.2, 4.2), layer=5))
'''
FINDING_LINE = 8  # 0-based, as LSP and vim.diagnostic count
MESSAGE = "P+ diffusion is 29.00 um from the nearest n-well tap (limit 20.00 um)"


@pytest.fixture
def trusted_project(tmp_path):
    """A trusted project with the script, and the environment the editor runs in: a
    private XDG_CONFIG_HOME holding the trust, and the latchwatch command on PATH."""
    project = tmp_path / "project"
    project.mkdir()
    (project / "latchwatch.toml").write_text('tech = "demo"\n')
    script = project / "cell.py"
    script.write_text(SCRIPT)
    env = {**os.environ, "XDG_CONFIG_HOME": str(tmp_path / "xdg-config"), "XDG_CACHE_HOME": str(tmp_path / "xdg-cache"),
           "XDG_DATA_HOME": str(tmp_path / "xdg-data"), "XDG_STATE_HOME": str(tmp_path / "xdg-state"),
           "HOME": str(tmp_path / "home"),
           "PATH": os.pathsep.join([str(Path(sys.executable).parent), os.environ.get("PATH", "")])}
    (tmp_path / "home").mkdir()
    latchwatch = shutil.which("latchwatch", path=env["PATH"])
    if latchwatch is None:
        pytest.skip("the latchwatch console script is not installed (pip install -e .)")
    subprocess.run([latchwatch, "trust", str(project)], env=env, check=True, capture_output=True)
    return script, env


def _nvim_version() -> tuple[int, int] | None:
    if shutil.which("nvim") is None:
        return None
    first = subprocess.run(["nvim", "--version"], capture_output=True, text=True).stdout.splitlines()[0]
    match = re.search(r"v(\d+)\.(\d+)", first)
    return (int(match.group(1)), int(match.group(2))) if match else None


NVIM_DRIVER = r'''
vim.cmd("filetype on")
dofile(CONFIG)
vim.api.nvim_create_autocmd("VimEnter", { nested = true, callback = function()
  vim.cmd("edit " .. vim.fn.fnameescape(SCRIPT))
  local buf = vim.api.nvim_get_current_buf()
  local ok = vim.wait(60000, function() return #vim.diagnostic.get(buf) > 0 end, 100)
  local found = {}
  for _, d in ipairs(vim.diagnostic.get(buf)) do
    table.insert(found, { lnum = d.lnum, message = d.message, source = d.source or "", severity = d.severity })
  end
  local handle = io.open(OUT, "w")
  handle:write(vim.fn.json_encode({ waited = ok, diagnostics = found }))
  handle:close()
  vim.cmd("qa!")
end })
'''


def test_neovim_headless_receives_the_diagnostic(trusted_project, tmp_path):
    version = _nvim_version()
    if version is None:
        pytest.skip("nvim is not installed (Debian package neovim)")
    if version < (0, 7):
        pytest.skip(f"Neovim {version[0]}.{version[1]} is older than the 0.7 the configurations support")
    script, env = trusted_project
    config = CONFIGS / "neovim" / ("latchwatch.lua" if version >= (0, 8) else "latchwatch-0.7.lua")
    out = tmp_path / "nvim-diagnostics.json"
    driver = tmp_path / "driver.lua"
    driver.write_text(f"CONFIG = {json.dumps(str(config))}\nSCRIPT = {json.dumps(str(script))}\n"
                      f"OUT = {json.dumps(str(out))}\n" + NVIM_DRIVER)
    subprocess.run(["nvim", "--headless", "-n", "-i", "NONE", "-u", str(driver)], env=env,
                   timeout=EDITOR_TIMEOUT, capture_output=True, cwd=script.parent)
    result = json.loads(out.read_text())
    assert result["waited"], f"Neovim {version} with {config.name} received no diagnostic"
    (diagnostic,) = result["diagnostics"]
    assert diagnostic["lnum"] == FINDING_LINE
    assert diagnostic["source"] == "latchwatch"
    assert diagnostic["message"] == MESSAGE
    assert diagnostic["severity"] == 1  # vim.diagnostic.severity.ERROR


EMACS_DRIVER = r'''
(require 'package)
(package-initialize)
(require 'eglot)
(require 'json)
(load CONFIG nil t)
(find-file SCRIPT)
(call-interactively #'eglot)
(let ((deadline (+ (float-time) 60)))
  (while (and (null (flymake-diagnostics)) (< (float-time) deadline))
    (when (and (eglot-current-server) (not (flymake-running-backends)))
      (flymake-start))
    (accept-process-output nil 0.2)))
;; Collected in the script's buffer: with-temp-file runs its body in another one.
(let ((found (mapcar (lambda (d)
                       (list (cons 'line (line-number-at-pos (flymake-diagnostic-beg d)))
                             (cons 'text (flymake-diagnostic-text d))
                             (cons 'type (symbol-name (flymake-diagnostic-type d)))))
                     (flymake-diagnostics))))
  (with-temp-file OUT
    (insert (json-encode (vconcat found)))))
(kill-emacs 0)
'''


def _emacs_has_eglot(env) -> bool:
    probe = subprocess.run(["emacs", "--batch", "--eval",
                            "(progn (require 'package) (package-initialize) (require 'eglot))"],
                           env=env, capture_output=True, timeout=60)
    return probe.returncode == 0


def test_emacs_eglot_receives_the_diagnostic(trusted_project, tmp_path):
    if shutil.which("emacs") is None:
        pytest.skip("emacs is not installed (Debian package emacs-nox)")
    script, env = trusted_project
    if not _emacs_has_eglot(env):
        pytest.skip("eglot is not available to emacs (Debian package elpa-eglot, or Emacs 29+)")
    out = tmp_path / "emacs-diagnostics.json"
    driver = tmp_path / "driver.el"
    config = CONFIGS / "emacs-eglot" / "latchwatch.el"
    driver.write_text(f"(defconst CONFIG {json.dumps(str(config))})\n(defconst SCRIPT {json.dumps(str(script))})\n"
                      f"(defconst OUT {json.dumps(str(out))})\n" + EMACS_DRIVER)
    done = subprocess.run(["emacs", "--batch", "-l", str(driver)], env=env, timeout=EDITOR_TIMEOUT,
                          capture_output=True, text=True, cwd=script.parent)
    assert out.exists(), f"emacs wrote no result:\n{done.stderr[-3000:]}"
    diagnostics = json.loads(out.read_text() or "[]")
    assert diagnostics, f"eglot received no diagnostic:\n{done.stderr[-3000:]}"
    (diagnostic,) = diagnostics
    assert diagnostic["line"] == FINDING_LINE + 1  # Emacs lines are 1-based
    assert MESSAGE in diagnostic["text"]
    assert diagnostic["type"] == "eglot-error"


# --- every configuration parses, and names only settings the server reads ----------

def _settings_keys(value) -> set[str]:
    section = value.get("latchwatch", {})
    return set(section)


def test_json_and_toml_configurations_parse():
    kate = json.loads((CONFIGS / "kate" / "settings.json").read_text())
    assert kate["servers"]["python"]["command"] == ["latchwatch", "serve"]
    zed = json.loads((CONFIGS / "zed" / "settings.json").read_text())
    assert zed["lsp"]["latchwatch"]["binary"]["arguments"] == ["serve"]
    sublime_text = (CONFIGS / "sublime-lsp" / "LSP.sublime-settings").read_text()
    sublime = json.loads(re.sub(r"^\s*//.*$", "", sublime_text, flags=re.M))
    assert sublime["clients"]["latchwatch"]["command"] == ["latchwatch", "serve"]
    helix = tomllib.loads((CONFIGS / "helix" / "languages.toml").read_text())
    assert helix["language-server"]["latchwatch"]["args"] == ["serve"]
    assert "latchwatch" in helix["language"][0]["language-servers"]
    for options in (kate["servers"]["python"]["initializationOptions"], zed["lsp"]["latchwatch"]["initialization_options"],
                    sublime["clients"]["latchwatch"]["initializationOptions"], helix["language-server"]["latchwatch"]["config"]):
        assert _settings_keys(options) <= set(KEYS)


def test_vscode_extension_declares_the_server_settings():
    package = json.loads((CONFIGS / "vscode" / "package.json").read_text())
    assert package["main"] == "./extension.js"
    assert "vscode-languageclient" in package["dependencies"]
    declared = {key.split(".", 1)[1] for key in package["contributes"]["configuration"]["properties"]}
    assert declared - {"command"} <= set(KEYS)
    # VS Code reads application-scoped settings from user settings only, so a workspace
    # cannot grant itself trust (VS Code API, contributes.configuration "scope").
    assert package["contributes"]["configuration"]["properties"]["latchwatch.trustedFolders"]["scope"] == "application"
    if shutil.which("node"):
        done = subprocess.run(["node", "--check", str(CONFIGS / "vscode" / "extension.js")], capture_output=True, text=True)
        assert done.returncode == 0, done.stderr


def test_every_editor_folder_has_a_readme_and_a_config():
    folders = sorted(p.name for p in CONFIGS.iterdir() if p.is_dir())
    assert folders == ["emacs-eglot", "helix", "kate", "neovim", "sublime-lsp", "vscode", "zed"]
    table = (CONFIGS / "README.md").read_text()
    for name in folders:
        files = [p for p in (CONFIGS / name).iterdir() if p.name != "README.md"]
        assert (CONFIGS / name / "README.md").is_file() and files, name
        assert f"[{name}]" in table, f"{name} is missing from the editor-configs/README.md table"
