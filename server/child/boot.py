"""The child's processes: keeper, init and worker, each confined as far as the system allows.

Started through child/start.py as ``python -I start.py CONFIG_JSON``. Standard library
only, Python 3.8 and later (the interpreter may be the user's own). It runs before numpy
or the layout library is imported, because only a single-threaded process may enter a
user namespace. Every module of this package is imported before the identity changes,
which may hide the standard library.

Three processes result on Linux:

- the keeper (the process the runner started) enters fresh network and PID
  namespaces (through a user namespace when it is not root), forks, waits, and exits
  with the worker's status. Without a PID namespace it is a child subreaper instead,
  forks the worker directly and kills whatever the run left behind (child/keeper.py).
- the init, PID 1 of the new namespace: for root it enters a user namespace of the
  run's own (the keeper maps nobody into it), then forks the worker and reaps orphans.
  When the worker ends the init ends, and the kernel ends every process left in the
  namespace.
- the worker gives up root's privileges (child/identity.py), sets the resource limits
  (child/limits.py), confines writes (and TCP) with Landlock (child/landlock.py) and
  loads child/job.py, which imports the layout library and waits for its job; in a
  corner host it forks one child per job instead (child/host.py).

Elsewhere (macOS, Windows) the one process applies what exists and runs the job.

Every step either works or is recorded with the reason it did not. The worker reports
the record as one control-pipe line, ``sandbox {json}``, before anything else runs;
the parent decides whether a missing protection is acceptable.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import time

try:
    import pwd
    import resource
except ImportError:  # Windows
    pwd = resource = None

from .host import serve_jobs
from .identity import NOBODY, drop_privileges
from .keeper import be_init, become_subreaper, enter_namespaces, keep
from .kernel import PR_SET_PDEATHSIG, Record, prctl, report_sandbox, why
from .landlock import confine_with_landlock
from .limits import apply_limits


def run_worker(config, record, plan, started, forked):
    """Confine this process, report the sandbox, then serve the job (or a host's jobs). Never returns."""
    try:
        own_user_namespace = drop_privileges(config, record, plan)
        if forked and sys.platform.startswith("linux"):
            # The worker never outlives its parent (set after the uid change, which clears it).
            prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
        apply_limits(config, record, own_user_namespace)
        confine_with_landlock(config, record)
    except (OSError, AttributeError, ValueError) as error:  # an unexpected refusal: run nothing, say why
        record.no("set-up", "the sandbox could not be set up: %s" % why(error))
        report_sandbox(config, record, started)
        os._exit(70)
    report_sandbox(config, record, started)
    sys.dont_write_bytecode = True  # nothing is written outside the run's folder, with or without Landlock
    from . import job  # imports numpy and the layout library, now that the worker is confined

    if config.get("host_fd") is not None:
        serve_jobs(config, record, job)
    job.serve(config)


def main(argv=None):
    """Enter the sandbox (keeper, init, worker) and serve the job; the child's entry point."""
    started = time.perf_counter()
    argv = sys.argv if argv is None else argv
    config = json.loads(argv[1])
    record = Record()
    record.ok("stdin", "empty (/dev/null)")
    pid_namespace, config["_keeper_user_namespace"] = enter_namespaces(config, record)
    config["_pid_namespace"] = pid_namespace
    if pid_namespace:
        record.ok("leftovers", "PID namespace: every process of the run ends with it")
    elif not (hasattr(os, "fork") and become_subreaper(record)):
        run_worker(config, record, None, started, forked=False)
        return
    status_r = status_w = keeper_pipes = init_pipes = None
    if pid_namespace:
        status_r, status_w = os.pipe()
        skip = set(config.get("skip", ()))
        if os.geteuid() == 0 and "identity" not in skip:
            request_r, request_w = os.pipe()
            reply_r, reply_w = os.pipe()
            keeper_pipes, init_pipes = (request_r, reply_w), (request_w, reply_r)
    child = os.fork()
    if child == 0:
        for fd in (keeper_pipes or ()) + ((status_r,) if status_r is not None else ()):
            os.close(fd)
        if pid_namespace:
            be_init(config, record, init_pipes, status_w, started, run_worker)
        run_worker(config, record, None, started, forked=True)
        os._exit(0)
    for fd in (init_pipes or ()) + tuple(fd for fd in (status_w, config.get("job_fd"), config.get("result_fd"))
                                         if fd is not None):
        os.close(fd)
    map_request = None
    if keeper_pipes:
        try:
            entry = pwd.getpwnam(NOBODY)
            map_request = keeper_pipes + (entry.pw_uid, entry.pw_gid)
        except KeyError:
            for fd in keeper_pipes:
                os.close(fd)
    keep(child, pid_namespace, map_request, status_r)
