"""The pre-commit framework runs `latchwatch check` on changed scripts, through this
repository's .pre-commit-hooks.yaml (pre-commit try-repo builds the hook environment)."""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from locations import ROOT

BAD = '''import gdstk
lib = gdstk.Library()
cell = lib.new_cell("TOP")
cell.add(gdstk.rectangle((0, 0), (30, 10), layer=1))   # n-well
cell.add(gdstk.rectangle((0, 0), (30, 4), layer=5))    # P+ implant
cell.add(gdstk.rectangle((0, 0), (30, 4), layer=2))    # P+ diffusion, no n-tap anywhere
'''


def _pre_commit():
    exe = Path(sys.executable).with_name("pre-commit")
    return str(exe) if exe.exists() else shutil.which("pre-commit")


@pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")
def test_pre_commit_runs_latchwatch_on_changed_scripts(tmp_path):
    if _pre_commit() is None:
        pytest.skip("the pre-commit package is not installed")
    if not (ROOT / ".git").exists():
        pytest.skip("the project is not a git checkout (try-repo needs one)")
    repo = tmp_path / "repo"
    repo.mkdir()
    env = dict(os.environ, PRE_COMMIT_HOME=str(tmp_path / "cache"), GIT_AUTHOR_NAME="t",
               GIT_AUTHOR_EMAIL="t@example.invalid", GIT_COMMITTER_NAME="t",
               GIT_COMMITTER_EMAIL="t@example.invalid")
    subprocess.run(["git", "init", "-q"], cwd=repo, check=True, env=env)
    (repo / "cell.py").write_text(BAD)
    (repo / "notes.txt").write_text("not a script\n")
    (repo / "latchwatch.toml").write_text('tech = "demo"\n')
    subprocess.run(["git", "add", "."], cwd=repo, check=True, env=env)
    run = subprocess.run(
        [_pre_commit(), "try-repo", str(ROOT), "latchwatch", "--files", "cell.py", "notes.txt",
         "--verbose"],
        cwd=repo, env=env, capture_output=True, text=True, timeout=900,
    )
    out = run.stdout + run.stderr
    assert run.returncode == 1, out
    assert "cell.py:4:" in out and "[floating-well]" in out, out  # the n-well line
    assert "notes.txt" not in out.split("latchwatch latch-up check", 1)[-1], out
