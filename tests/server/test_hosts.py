"""Corner hosts (server/sandbox/hosts.py): one pre-imported worker forks a confined child per job.

tests/server/test_sandbox.py runs every hostile script in a host's child too; these tests
cover what is particular to a host: what one job leaves never reaches the next, a job
that fails or times out leaves the host serving, a host that dies is replaced."""

from __future__ import annotations

import os
import signal
import sys
import textwrap
import threading
from pathlib import Path

import pytest

from latchwatch.server.sandbox import hosts
from latchwatch.server.sandbox.policy import SandboxSettings
from latchwatch.server.sandbox.runner import run_script
from latchwatch.server.sandbox.workers import WorkerKey, inspect_sandbox


@pytest.fixture(autouse=True)
def fresh_pool(monkeypatch):
    pool = hosts.HostPool()
    monkeypatch.setattr(hosts, "HOSTS", pool)
    monkeypatch.setattr("latchwatch.server.sandbox.runner.HOSTS", pool)
    yield pool
    pool.close()


CELL = textwrap.dedent("""\
    import os, gdstk

    def cell(width=1.0):
        top = gdstk.Cell("TOP")
        top.add(gdstk.rectangle((0, 0), (width, 1)))
        return top
    """)


def _script(folder: Path, functions: str = "") -> Path:
    """cell.py: CELL's ``cell`` and the given functions."""
    path = folder / "cell.py"
    path.write_text(CELL + textwrap.dedent(functions), encoding="utf-8")
    return path


def _call(path: Path, body_function: str = "cell", timeout: float = 10.0, **kwargs):
    return run_script(path, project_root=path.parent, call=(body_function, kwargs), hosted=True, timeout=timeout)


def _folder(outcome) -> Path:
    return Path(outcome.output.split("folder=", 1)[1].split()[0])


def test_jobs_run_in_fresh_forks_with_folders_of_their_own(tmp_path):
    path = _script(tmp_path, """\
    def marked(width=1.0):
        print("folder=" + os.getcwd(), "mark=%s" % getattr(gdstk, "lw_mark", None))
        gdstk.lw_mark = "left by an earlier job"
        open("scratch.txt", "w").write("x")
        return cell(width)
    """)
    outcomes = [_call(path, "marked", width=w) for w in (1.0, 2.0, 3.0)]
    assert [o.status for o in outcomes] == ["ok"] * 3, [o.failure for o in outcomes]
    assert all("mark=None" in o.output for o in outcomes)  # nothing a previous job did is visible
    folders = [_folder(o) for o in outcomes]
    assert len(set(folders)) == 3 and len({f.parent for f in folders}) == 1  # one host, three job folders
    assert not any(f.exists() for f in folders)  # each removed when its job ended
    assert [o.layout.cells[0].name for o in outcomes] == ["TOP"] * 3


def test_processes_a_job_leaves_are_gone_before_the_next_job(tmp_path):
    path = _script(tmp_path, """\
    import signal, subprocess

    def leave(width=1.0):
        sleeper = subprocess.Popen(["sleep", "60"], start_new_session=True)
        print("sleeper=%d" % sleeper.pid)
        return cell(width)

    def look(pid=0):
        try:
            os.kill(pid, 0)
            print("alive")
        except ProcessLookupError:
            print("gone")
        return cell()
    """)
    first = _call(path, "leave")
    assert first.status == "ok", first.failure
    pid = int(first.output.split("sleeper=")[1].split()[0])
    second = _call(path, "look", pid=pid)
    assert second.status == "ok", second.failure
    assert second.output.strip() == "gone"


def test_a_job_that_times_out_or_crashes_leaves_the_host_serving(tmp_path):
    path = _script(tmp_path, """\
    def spin(width=1.0):
        while True:
            pass

    def crash(width=1.0):
        os.abort()

    def where(width=1.0):
        print("folder=" + os.getcwd())
        return cell(width)
    """)
    before = _call(path, "where")
    spun = _call(path, "spin", timeout=0.5)
    assert spun.status == "timeout" and "time limit" in spun.failure.message
    crashed = _call(path, "crash")
    assert crashed.status == "error" and "SIGABRT" in crashed.failure.message
    after = _call(path, "where")
    assert after.status == "ok", after.failure
    assert _folder(after).parent == _folder(before).parent  # the same host served all four


@pytest.mark.parametrize("skip", [(), ("landlock",)], ids=["scoped-signals", "without-landlock"])
def test_a_job_that_kills_its_host_is_still_reported_and_the_next_job_runs(tmp_path, skip):
    path = _script(tmp_path, """\
    import signal

    def kill_host(width=1.0):
        try:
            os.kill(os.getppid(), signal.SIGKILL)
        except PermissionError:
            print("refused")  # Landlock ABI 6 scopes signals to the job's own domain
        return cell(width)
    """)
    # Without Landlock the host dies and its job with it: the job is run again in a new
    # host, and then in a fresh child, whose parent it cannot kill.
    outcome = run_script(path, call=("kill_host", {}), hosted=True, skip_protections=skip)
    assert outcome.status == "ok", outcome.failure
    assert [c.name for c in outcome.layout.cells] == ["TOP"]
    again = run_script(path, call=("cell", {}), hosted=True, skip_protections=skip)
    assert again.status == "ok", again.failure


def test_a_retired_host_is_replaced(tmp_path, monkeypatch):
    monkeypatch.setattr(hosts, "RETIRE_AFTER", 2)
    path = _script(tmp_path, """\
    def where(width=1.0):
        print("folder=" + os.getcwd())
        return cell(width)
    """)
    parents = [_folder(_call(path, "where")).parent for _ in range(4)]
    assert parents[0] == parents[1] != parents[2] == parents[3]
    assert not parents[0].exists()  # the retired host's folder went with it


def test_parallel_jobs_take_hosts_of_their_own(tmp_path, fresh_pool):
    path = _script(tmp_path, """\
    import time

    def slow(width=1.0):
        time.sleep(0.3)
        print("folder=" + os.getcwd())
        return cell(width)
    """)
    outcomes = []
    threads = [threading.Thread(target=lambda: outcomes.append(_call(path, "slow"))) for _ in range(2)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert [o.status for o in outcomes] == ["ok", "ok"]
    assert _folder(outcomes[0]).parent != _folder(outcomes[1]).parent
    assert sum(len(idle) for idle in fresh_pool._idle.values()) == min(2, fresh_pool.per_key)


def test_a_hosted_job_reports_the_sandbox_a_fresh_child_does(tmp_path):
    report, _ready, _output = inspect_sandbox(project_root=str(tmp_path))
    path = _script(tmp_path)
    hosted = _call(path)
    fresh = run_script(path, project_root=tmp_path, call=("cell", {}))
    assert hosted.status == fresh.status == "ok"
    assert hosted.sandbox == fresh.sandbox
    if "writes" in report.in_force:
        assert hosted.sandbox["writes"] == "confined"


def test_an_interpreter_that_cannot_start_is_the_same_error_hosted(tmp_path):
    path = _script(tmp_path)
    with pytest.raises(hosts.RunnerError, match="cannot start the interpreter"):
        run_script(path, python=str(tmp_path / "no-python"), call=("cell", {}), hosted=True)


def test_a_required_sandbox_is_enforced_for_hosted_jobs(tmp_path):
    path = _script(tmp_path)
    with pytest.raises(hosts.RunnerError, match="the sandbox is required"):
        run_script(path, call=("cell", {}), hosted=True, require_sandbox=True, skip_protections=("namespaces",))
    assert not list(Path(tmp_path).glob("job-*"))


def test_host_settings_are_part_of_its_key(tmp_path, fresh_pool):
    path = _script(tmp_path)
    assert _call(path).status == "ok"
    assert run_script(path, project_root=tmp_path, call=("cell", {}), hosted=True,
                      skip_protections=("landlock",)).status == "ok"
    settings = {slot[0].settings for slot in fresh_pool._idle}
    assert settings == {SandboxSettings(), SandboxSettings(skip=frozenset({"landlock"}))}
    assert os.path.isdir(next(iter(fresh_pool._idle.values()))[0].worker.work)


def test_without_host_sockets_jobs_run_in_fresh_children(tmp_path, monkeypatch):
    def refuse(*args):
        raise OSError(94, "Socket type not supported")

    monkeypatch.setattr(hosts.socket, "socketpair", refuse)
    path = _script(tmp_path)
    outcome = _call(path)
    assert outcome.status == "ok", outcome.failure
    assert [c.name for c in outcome.layout.cells] == ["TOP"]


def test_a_host_that_died_while_idle_is_replaced_and_reaped(tmp_path, fresh_pool, monkeypatch):
    path = _script(tmp_path)
    assert _call(path).status == "ok"
    [dead] = [h for idle in fresh_pool._idle.values() for h in idle]
    dead.worker.signal(signal.SIGKILL)
    dead.worker.process.wait()
    monkeypatch.setattr(hosts.Host, "alive", lambda self: True)  # as if it died just after the check
    outcome = _call(path)
    assert outcome.status == "ok", outcome.failure
    assert not dead.worker.work.exists() and dead.channel.fileno() == -1  # closed, folder gone


def test_unsaved_source_reaches_a_hosted_child(tmp_path):
    path = tmp_path / "cell.py"
    path.write_text("raise SystemExit('the file on disk must not run')\n")
    buffer = "import gdstk\n\ncell = gdstk.Cell('BUF')\ncell.add(gdstk.rectangle((0, 0), (1, 1)))\n"
    run_script(path, project_root=tmp_path, hosted=True)  # starts the host
    outcome = run_script(path, project_root=tmp_path, source=buffer, hosted=True)
    assert outcome.status == "ok" and outcome.layout.cells[0].name == "BUF"


def test_scripts_share_their_projects_hosts_and_others_get_their_own(tmp_path, fresh_pool):
    project, elsewhere = tmp_path / "project", tmp_path / "elsewhere"
    (project / "sub").mkdir(parents=True)
    elsewhere.mkdir()
    for path in (_script(project), _script(project / "sub"), _script(elsewhere)):
        assert run_script(path, project_root=project, call=("cell", {}), hosted=True).status == "ok"
    reading = sorted(slot[1] for slot in fresh_pool._idle)
    assert reading == sorted([(str(project),), (str(elsewhere), str(project))])


def test_the_pool_keeps_two_keys_and_ends_the_oldest(tmp_path):
    pool = hosts.HostPool(per_key=1, keys=2)
    started = [hosts.Host.start(WorkerKey(sys.executable, None, SandboxSettings(memory_limit=(2 + n) << 30),
                                                10.0), []) for n in range(3)]
    try:
        for host in started:
            pool.give_back(host)
        kept = [h for idle in pool._idle.values() for h in idle]
        assert kept == started[1:] and all(h.alive() for h in kept)
        assert started[0].worker.process.poll() is not None  # ended when it was evicted
    finally:
        pool.close()
    assert pool._idle == {} and all(h.worker.process.poll() is not None for h in started)


def test_a_host_idle_past_the_limit_is_ended_at_the_next_take(tmp_path, fresh_pool, monkeypatch):
    path = _script(tmp_path, """\
    def where(width=1.0):
        print("folder=" + os.getcwd())
        return cell(width)
    """)
    first = _folder(_call(path, "where")).parent
    [idle] = [h for hosts_ in fresh_pool._idle.values() for h in hosts_]
    monkeypatch.setattr(hosts, "IDLE_LIMIT", 0.0)
    second = _folder(_call(path, "where")).parent
    assert second != first and not first.exists() and idle.worker.process.poll() is not None
