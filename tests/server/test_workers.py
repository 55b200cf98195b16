"""Workers (server/sandbox/workers.py): a started child waits for one job, is ended with its
group, and leaves no folder behind."""

from __future__ import annotations

from latchwatch.server.sandbox import workers
from latchwatch.server.sandbox.policy import SandboxSettings
from latchwatch.server.sandbox.workers import Worker, WorkerKey, close_quietly


def test_a_discarded_worker_leaves_no_folder(tmp_path):
    worker = Worker.start(WorkerKey(workers.sys.executable, None, SandboxSettings(), 10.0), needs_reading=[])
    assert worker.work.is_dir()
    worker.discard()
    assert not worker.work.exists() and worker.process.returncode is not None


def test_an_unused_worker_ends_when_its_job_pipe_closes():
    worker = Worker.start(WorkerKey(workers.sys.executable, None, SandboxSettings(), 10.0), needs_reading=[])
    worker.close_job_pipe()  # no job will come: the child exits by itself
    assert worker.process.wait(timeout=10) == 0
    assert worker.exited()
    worker.discard()


def test_close_quietly_leaves_none_minus_one_and_closed_descriptors_alone():
    import os

    r, w = os.pipe()
    os.close(w)
    close_quietly(None, -1, r, w)  # w is already closed: no error
    try:
        os.fstat(r)
    except OSError:
        pass
    else:
        raise AssertionError("the read end should be closed")
