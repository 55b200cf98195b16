"""Warm spares (server/workers.py): each job still gets a fresh child; a spare is
started as soon as one is taken; a dead spare is replaced; closing ends them all."""

from __future__ import annotations

import textwrap
import time

import pytest

from latchwatch.server import workers
from latchwatch.server.runner import run_script
from latchwatch.server.sandbox import SandboxSettings
from latchwatch.server.workers import SparePool, Worker, WorkerKey


@pytest.fixture
def project(tmp_path):
    root = tmp_path / "project"
    root.mkdir()
    return root


@pytest.fixture(autouse=True)
def no_spares_left():
    yield
    workers.SPARES.close()


def _script(folder, body, name="cell.py"):
    path = folder / name
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return path


def _spare_for(root, wait=5.0):
    """The spares kept for ``root``, once the background start has put one (or ``wait`` ran out)."""
    deadline = time.monotonic() + wait
    while True:
        found = [w for k, w in list(workers.SPARES._spares.items()) if k.project_root == str(root)]
        if found or time.monotonic() > deadline:
            return found
        time.sleep(0.01)


def test_every_warm_job_runs_in_a_fresh_child(project):
    path = _script(project, """\
        import os, gdstk
        print(os.getcwd(), getattr(gdstk, "lw_mark", None))
        gdstk.lw_mark = "left by an earlier run"
        gdstk.Cell("TOP").add(gdstk.rectangle((0, 0), (1, 1)))
        """)
    seen = []
    for _ in range(3):
        outcome = run_script(path, project_root=project, warm=True)
        assert outcome.status == "ok", outcome.failure
        folder, mark = outcome.output.split()
        assert mark == "None"  # nothing a previous script did is visible
        seen.append(folder)
    assert len(set(seen)) == 3  # a fresh run folder, so a fresh child, every time


def test_taking_a_spare_starts_the_next_one(project):
    path = _script(project, "import gdstk\n")
    assert _spare_for(project, wait=0) == []
    run_script(path, project_root=project, warm=True)
    spares = _spare_for(project)
    assert len(spares) == 1 and spares[0].alive()
    first = spares[0]
    run_script(path, project_root=project, warm=True)
    assert first.process.poll() is not None  # used once, then gone
    time.sleep(0.2)
    assert _spare_for(project) and _spare_for(project)[0] is not first


def test_a_dead_spare_is_replaced_and_the_run_still_works(project):
    path = _script(project, "import gdstk\ngdstk.Cell('T').add(gdstk.rectangle((0, 0), (1, 1)))\n")
    run_script(path, project_root=project, warm=True)
    spare = _spare_for(project)[0]
    spare.process.kill()
    spare.process.wait()
    outcome = run_script(path, project_root=project, warm=True)
    assert outcome.status == "ok"


def test_unsaved_source_reaches_a_warm_child(project):
    path = _script(project, "raise SystemExit('the file on disk must not run')\n")
    buffer = "import gdstk\n\ncell = gdstk.Cell('BUF')\ncell.add(gdstk.rectangle((0, 0), (1, 1)))\n"
    run_script(path, project_root=project, warm=True)  # starts a spare
    outcome = run_script(path, project_root=project, source=buffer, warm=True)
    assert outcome.status == "ok" and outcome.layout.cells[0].name == "BUF"


def test_a_script_outside_the_project_runs_cold(tmp_path, project):
    path = _script(tmp_path, "import gdstk\n")
    run_script(path, project_root=project, warm=True)
    assert _spare_for(project, wait=0.5) == []


def test_spares_differ_by_settings_and_the_oldest_goes():
    pool = SparePool(capacity=2)
    keys = [WorkerKey(workers.sys.executable, None, SandboxSettings(memory_limit=(2 + n) << 30), 10.0)
            for n in range(3)]
    try:
        for key in keys:
            pool.take(key, needs_reading=[]).discard()  # the job's own worker; the spare stays
            deadline = time.monotonic() + 5
            while key not in pool._spares and time.monotonic() < deadline:
                time.sleep(0.01)
        assert list(pool._spares) == keys[1:]
        oldest_gone = [w for w in pool._spares.values()]
        assert all(w.alive() for w in oldest_gone)
    finally:
        pool.close()
    assert pool._spares == {}
    deadline = time.monotonic() + 5
    while any(w.alive() for w in oldest_gone) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not any(w.alive() for w in oldest_gone)


def test_a_discarded_worker_leaves_no_folder(tmp_path):
    worker = Worker.start(WorkerKey(workers.sys.executable, None, SandboxSettings(), 10.0), needs_reading=[])
    assert worker.work.is_dir()
    worker.discard()
    assert not worker.work.exists() and worker.process.returncode is not None
