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
- the worker becomes nobody when the keeper was root (child/identity.py; the keeper
  opened the folders the run reads for nobody, child/opening.py, or the run is
  refused), sets the resource limits (child/limits.py), confines writes (and TCP)
  with Landlock (child/landlock.py), filters system calls (child/syscalls.py), and
  only then execs the user's interpreter when one is named; in it (or in this one)
  child/job.py imports the layout library and waits for its job; in a corner host it
  forks one child per job instead (child/host.py).

The keeper, the init and the worker up to the exec run in latchwatch's own
interpreter: no program a user or a project named runs before it is confined.

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
from .identity import Refused, drop_privileges, open_identity
from .keeper import be_init, become_subreaper, enter_namespaces, keep
from .kernel import PR_SET_PDEATHSIG, Record, prctl, report_sandbox, why
from .landlock import confine_with_landlock
from .limits import apply_limits
from .syscalls import filter_syscalls


def run_worker(config, record, plan, started, forked):
    """Confine this process, report the sandbox, then serve the job (or a host's jobs),
    in the named interpreter when there is one (exec'd once everything is in force). Never returns."""
    try:
        own_user_namespace = drop_privileges(config, record, plan)
        if forked and sys.platform.startswith("linux"):
            # The worker never outlives its parent (set after the uid change, which clears it).
            prctl(PR_SET_PDEATHSIG, signal.SIGKILL)
        apply_limits(config, record, own_user_namespace)
        confine_with_landlock(config, record)
        filter_syscalls(config, record)
    except (Refused, OSError, AttributeError, ValueError) as error:  # an unexpected refusal: run nothing, say why
        record.no("set-up", str(error) if isinstance(error, Refused) else
                  "the sandbox could not be set up: %s" % why(error))
        report_sandbox(config, record, started)
        os._exit(70)
    report_sandbox(config, record, started)
    _hand_over(config, record)
    _serve(config, record)


def _hand_over(config, record):
    """Exec the named interpreter (``--python``, the project's ``python``) on this
    package, confined as it is: namespaces, ids, limits, Landlock and the seccomp filter
    are inherited across exec, so that program never runs outside the sandbox."""
    python = config.get("python")
    if not python or python == sys.executable:
        return
    resumed = dict(config, _resume=record.as_dict())
    start = os.path.join(os.path.dirname(os.path.abspath(__file__)), "start.py")
    try:
        os.execv(python, [python, "-I", start, json.dumps(resumed)])
    except OSError as error:
        os.write(2, ("latchwatch: cannot start the interpreter %s in the sandbox: %s\n"
                     % (python, why(error))).encode("utf-8", "replace"))
        os._exit(127)


def _serve(config, record):
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
    if "_resume" in config:  # the named interpreter, exec'd by a confined worker (_hand_over)
        record.in_force, record.missing = config["_resume"]["in_force"], config["_resume"]["missing"]
        _serve(config, record)
        return
    record.ok("stdin", "empty (/dev/null)")
    pid_namespace, config["_keeper_user_namespace"] = enter_namespaces(config, record)
    config["_pid_namespace"] = pid_namespace
    open_identity(config, record)  # as root, before anything a user named has run
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
        for fd in (keeper_pipes or ()) + tuple(fd for fd in (status_r, config.pop("lifeline_fd", None))
                                               if fd is not None):
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
        identity = config["_identity"]
        map_request = keeper_pipes + (identity["uid"], identity["gid"])
    keep(child, pid_namespace, map_request, status_r, config.get("lifeline_fd"))
