"""One job in the confined child: wait for it, run the script (or read a layout file), ship the result.

Loaded by child/boot.py once the child is confined, which calls ``serve(config)``: the
job module says ``ready`` on the control pipe and waits for its job on the job pipe (a
JSON object, see options_from_job), so a child can be started before its job is known
(a corner host forks it, server/sandbox/hosts.py, after the imports). The package stays
self-contained (standard library, numpy and the layout libraries only): the interpreter
may be the user's own, which has gdstk or klayout but not latchwatch. The capture
backends are child/backends.py. Written for Python 3.8 and
later. A job with ``call`` imports the script as a module instead (not as
``__main__``) and collects the returned cells (parameter corners, see _call_generator).

Outcome protocol: the result pipe receives one payload (child/wire_format.py). The
control pipe receives text lines: ``ready ...`` (imports done), ``started`` (job read),
``finished``, and on a timeout the faulthandler stack dump. Standard output and error
are the script's own.
"""

from __future__ import annotations

import faulthandler
import json
import os
import sys

from . import backends, naming
from .collector import pace_for_layouts
from .stacks import STACK_DEPTH, StackTables, traceback_frames
from .wire_format import failure_header, write_payload

# Reported by run(); the parent shows it as a script error.
IMPORT_ERROR = backends.unusable_reason()

def _exception_failure(error, memory_limit):
    tables = StackTables()
    frame_ids = traceback_frames(error.__traceback__, tables)
    frames = [tables.frames[i] for i in frame_ids]
    try:
        message = str(error)
    except Exception:
        message = "(the exception's message could not be shown)"
    if isinstance(error, SyntaxError):
        message = error.msg or message
        if error.filename and error.lineno:
            frames.insert(0, [error.filename, error.lineno, "<module>", error.offset,
                              getattr(error, "end_lineno", None), getattr(error, "end_offset", None)])
    kind = "error"
    if isinstance(error, MemoryError):
        kind = "limit"
        limit = " (address-space limit %.1f GiB)" % (memory_limit / 2**30) if memory_limit else ""
        message = "the script ran out of memory%s%s" % (limit, ": " + message if message else "")
    return failure_header(kind, type(error).__name__, message, frames)


class _Options:
    """One job: the keys of the job object, plus the pipes and limits of the child."""

    result_fd = None
    control_fd = None
    source = None  # text that runs instead of the file's content, under the file's name
    timeout = None
    memory = None
    paths = ()
    depth = STACK_DEPTH
    script = None
    call = None  # a function to import the script for and call, instead of running it
    kwargs = {}
    non_layout = "error"
    layout = None  # "gds" or "oas": read the file at ``script`` instead of running anything


JOB_KEYS = ("script", "source", "timeout", "paths", "depth", "call", "kwargs", "non_layout", "layout")


def options_from_job(job, config):
    """Options for a job object; raises ValueError naming a malformed key."""
    if not isinstance(job, dict) or not isinstance(job.get("script"), str):
        raise ValueError("a job is a JSON object with a script path, got %r" % (job,))
    unknown = set(job) - set(JOB_KEYS)
    if unknown:
        raise ValueError("unknown job keys %s" % sorted(unknown))
    options = _Options()
    for key in JOB_KEYS:
        if job.get(key) is not None:
            setattr(options, key, job[key])
    options.script = os.path.abspath(options.script)
    options.paths = list(options.paths)
    if not isinstance(options.kwargs, dict):
        raise ValueError("job kwargs must be an object, got %r" % (options.kwargs,))
    if options.non_layout not in ("error", "ignore"):
        raise ValueError("job non_layout is error or ignore, got %r" % (options.non_layout,))
    if options.layout not in (None, "gds", "oas"):
        raise ValueError("job layout is gds or oas, got %r" % (options.layout,))
    options.result_fd = config.get("result_fd")
    options.control_fd = config.get("control_fd")
    options.memory = config.get("memory")
    return options


class Control:
    """The control pipe: one text line per event (ready, started, finished)."""
    def __init__(self, fd):
        self.fd = fd

    def say(self, text):
        if self.fd is not None:
            try:
                os.write(self.fd, text.encode("utf-8") + b"\n")
            except OSError:
                pass


def _finish_threads():
    """Wait for the script's non-daemon threads, as interpreter exit would."""
    threading = sys.modules.get("threading")
    if threading is None:
        return
    for thread in threading.enumerate():
        if thread is not threading.current_thread() and not thread.daemon:
            thread.join()


def _run_exit_handlers():
    import atexit

    run = getattr(atexit, "_run_exitfuncs", None)
    if run is not None:
        run()


def run(options):
    """Run the script; return (header, arrays) to send."""
    if IMPORT_ERROR is not None:
        return failure_header("error", "ImportError", IMPORT_ERROR), []
    control = Control(options.control_fd)
    pace_for_layouts()
    if options.layout is not None:
        return read_layout_file(options, control)
    script = options.script
    try:
        if options.source is not None:  # lone surrogates from an editor buffer fail to compile, not here
            source = options.source.encode("utf-8", "surrogatepass")
        else:
            source = _read_script(script)
    except OSError as error:
        return failure_header("error", type(error).__name__,
                              "cannot read the script %s: %s" % (script, error.strerror or error)), []
    _remember_source(script, source)
    for path in reversed(options.paths):
        if path not in sys.path:
            sys.path.insert(0, path)
    capture = backends.Capture(options.depth)
    import types

    # A call imports the script as a module named after its file, as `import` would,
    # so its `if __name__ == "__main__":` part stays out; a plain run is __main__.
    name = "__main__" if options.call is None else os.path.splitext(os.path.basename(script))[0]
    module = types.ModuleType(name)
    module.__file__ = script
    sys.modules[name] = module
    sys.argv = [script]
    failure = None
    returned = None
    if options.control_fd is not None:  # a crash (C-stack overflow, say) still names the line
        faulthandler.enable(file=options.control_fd, all_threads=False)
    if options.timeout is not None and options.timeout > 0:
        faulthandler.dump_traceback_later(options.timeout, exit=True,
                                          file=options.control_fd if options.control_fd is not None else sys.stderr)
    try:
        code = _compiled(source, script, module.__dict__)
        exec(code, module.__dict__)
        if options.call is not None:
            returned, failure = _call_generator(module, options)
        _finish_threads()
    except SystemExit as stop:
        if stop.code not in (None, 0):
            failure = _exception_failure(stop, options.memory)
            if isinstance(stop.code, int):
                failure["message"] = "the script exited with status %d" % stop.code
            else:  # like the interpreter: a non-integer exit code is printed
                failure["message"] = str(stop.code)
                print(stop.code, file=sys.stderr)
    except BaseException as error:
        failure = _exception_failure(error, options.memory)
    try:
        _run_exit_handlers()
    except BaseException:
        pass
    faulthandler.cancel_dump_traceback_later()
    control.say("finished")
    if failure is not None:
        return failure, []
    try:
        # A call: the returned cells are the tops, other cells are left out.
        return capture.collect(script, returned, module=module.__dict__,
                               source_text=source.decode("utf-8", "replace"))
    except MemoryError as error:
        return _exception_failure(error, options.memory), []
    except Exception as error:
        return failure_header("error", type(error).__name__, "%s: %s" % (type(error).__name__, error),
                              stage="capture"), []


def _compiled(source, script, namespace):
    """The script's code, its main()-style calls passed through the hook that keeps their returns."""
    import ast

    tree = naming.with_entry_returns(ast.parse(source, script))
    if tree is None:
        return compile(source, script, "exec", dont_inherit=True)
    namespace[naming.RETURN_HOOK] = naming.EntryReturns()
    return compile(tree, script, "exec", dont_inherit=True)


def _read_script(script):
    """The script's bytes; a FIFO or device put in its place after the parent looked
    (server/config/files.py) is refused here too, without blocking on it."""
    import stat

    fd = os.open(script, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise OSError(0, "not a regular file")
        os.set_blocking(fd, True)
        with os.fdopen(os.dup(fd), "rb") as handle:
            return handle.read()
    finally:
        os.close(fd)


def read_layout_file(options, control):
    """A GDSII or OASIS file read here, not in the tool: gdstk may crash on a corrupt one."""
    kind = "GDSII" if options.layout == "gds" else "OASIS"
    layout_file = backends.LayoutFile(options.script, options.layout)
    try:
        layout_file.read()
    except (OSError, RuntimeError, ValueError) as error:
        return failure_header("error", None, "cannot read %s as %s: %s"
                              % (os.path.basename(options.script), kind, error)), []
    except MemoryError as error:
        return _exception_failure(error, options.memory), []
    control.say("finished")  # reading is done; collecting gets the collection allowance
    try:
        return layout_file.collect()
    except MemoryError as error:
        return _exception_failure(error, options.memory), []


NOT_A_LAYOUT = "returned %s, not a gdstk.Cell or Library, a klayout.db.Cell or Layout, or a list of them"


def _call_generator(module, options):
    """Call ``options.call`` of the imported script with ``options.kwargs``.

    Returns ((gdstk cells, unit, klayout cells, function name), None), or (None, failure header). The
    returned cells (a Cell, a Library's or Layout's cells, a kfactory KCell, or the
    cells of a list of them) are what gets collected, with the cells they reference;
    cells created but not returned are not.
    With ``--non-layout ignore`` a value that is no layout collects nothing instead of
    failing (used to try every function of a file that builds nothing itself).
    """
    function = module.__dict__.get(options.call)
    if not callable(function):
        return None, failure_header("error", "AttributeError", "the script %s defines no function named %r"
                                    % (os.path.basename(options.script), options.call))
    value = function(**options.kwargs)
    cells, unit, klayout_cells = [], None, []
    for item in value if isinstance(value, (list, tuple)) else [value]:
        if backends.is_gdstk_cell(item):
            cells.append(item)
        elif backends.is_gdstk_library(item):
            cells.extend(item.cells)
            unit = unit or item.unit
        elif backends.klayout_cells_of(item) is not None:
            klayout_cells.extend(backends.klayout_cells_of(item))
        else:
            cells = None
            break
    if cells is not None:
        return (cells, unit, klayout_cells, options.call), None
    if options.non_layout == "ignore":
        return ([], None, [], options.call), None
    code = getattr(function, "__code__", None)
    frames = [[code.co_filename, code.co_firstlineno, code.co_name, None, None, None]] if code else []
    arguments = ", ".join("%s=%r" % item for item in options.kwargs.items())
    return None, failure_header("error", "TypeError", "%s(%s) %s" % (
        options.call, arguments, NOT_A_LAYOUT % type(value).__name__), frames)


def _remember_source(path, source):
    """Let linecache (tracebacks, column conversion) see the text that really ran."""
    import linecache

    try:
        text = source.decode("utf-8")
    except UnicodeDecodeError:
        return
    lines = text.splitlines(True)
    linecache.cache[path] = (len(text), None, lines, path)


def _read_job(fd):
    """The job object the runner writes to the job pipe, or None at end of input."""
    chunks = []
    while True:
        chunk = os.read(fd, 1 << 20)
        if not chunk:
            break
        chunks.append(chunk)
    os.close(fd)
    return json.loads(b"".join(chunks).decode("utf-8")) if chunks else None


def serve(config):
    """Wait for one job, run it, send the result, exit. Never returns."""
    control = Control(config.get("control_fd"))
    try:  # prints reach the log line by line, and survive a kill on timeout
        sys.stdout.reconfigure(line_buffering=True)
    except (AttributeError, ValueError):
        pass
    if IMPORT_ERROR is None:
        control.say("ready " + " ".join(backends.versions()))
    else:
        control.say("ready import-error=%s" % json.dumps(str(IMPORT_ERROR)))
    try:
        job = _read_job(config["job_fd"])
        if job is None:  # a spare nobody needed: the runner closed the pipe, or went away
            os._exit(0)
        options = options_from_job(job, config)
    except (OSError, ValueError) as error:
        control.say("bad job: %s" % error)
        os._exit(2)
    control.say("started")
    header, arrays = run(options)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except Exception:
            pass
    if options.result_fd is not None:
        try:
            write_payload(options.result_fd, header, arrays)
        except MemoryError:
            write_payload(options.result_fd, failure_header(
                "limit", "MemoryError", "the captured layout did not fit in the memory limit"), [])
        except OSError:
            pass  # the script closed or broke the result pipe: the parent sees no result
    # Skip tearing down the script's objects: the result is out, and freeing hundreds
    # of thousands of shapes one by one only costs time.
    os._exit(0)
