"""The sandbox of a script run, parent side: what is asked for, and what was applied.

The child (server/child/boot.py) applies each protection it can and reports one
record: the protections in force with a detail, the missing ones with the reason.
This module turns that record into the run's ``sandbox`` entry (docs/report-json.md), which
claims nothing the child did not report, and into the lines of ``latchwatch doctor``.
With ``require`` set, a missing protection of REQUIRED is an error instead of a
fallback (the runner raises SandboxUnavailable before the script runs).
"""

from __future__ import annotations

import json
import re
import sys
from dataclasses import dataclass, field

# (name, what it protects against), in the order doctor lists them.
# What the parent enforces on every run's pipes (server/sandbox/runner.py).
OUTPUT_HEAD = 56 << 10  # bytes of output kept from the start ...
OUTPUT_TAIL = 8 << 10  # ... and from the end
OUTPUT_KILL = 64 << 20  # printing more than this stops the run ("limit")
GEOMETRY_KILL = 2 << 30  # a result payload larger than this stops the run ("limit")

PROTECTIONS = (
    ("network", "network access"),
    ("writes", "writes outside the run's temporary folder"),
    ("privileges", "the tool's own privileges"),
    ("leftovers", "processes outliving the run"),
    ("cpu", "CPU-time limit"),
    ("memory", "address-space limit"),
    ("file-size", "file-size limit"),
    ("open-files", "open-files limit"),
    ("processes", "process limit"),
    ("core", "core dumps"),
    ("syscalls", "changing modes, owners, times and attributes of files outside; Unix sockets"),
    ("tcp", "TCP connections (second line of defence)"),
    ("signals", "signals to processes outside the run"),
    ("other-processes", "reading other processes' environment and memory"),
    ("stdin", "standard input"),
    ("environment", "secrets in the environment"),
    ("process-group", "the run's process group"),
    ("time", "wall-time limit"),
    ("output", "printed output"),
    ("geometry", "captured geometry"),
)
TITLES = dict(PROTECTIONS)
REQUIRED = ("network", "writes", "privileges", "leftovers", "cpu", "memory", "file-size", "open-files",
            "processes", "core", "syscalls")
CHILD_LIMITS = ("cpu", "memory", "file-size", "open-files", "processes")
SKIPPABLE = ("namespaces", "landlock", "identity", "seccomp")  # mechanisms a run can be told not to try


@dataclass(frozen=True)
class SandboxSettings:
    """What a run's child is confined by; part of the key of a corner host."""

    require: bool = False  # a missing REQUIRED protection is an error, not a fallback
    memory_limit: int | None = 4 << 30  # bytes of address space
    file_size_limit: int = 1 << 30  # bytes in any one file the script writes
    open_files_limit: int = 1024
    process_limit: int = 128  # processes and threads of the run
    skip: frozenset[str] = field(default_factory=frozenset)  # SKIPPABLE names: tests and benchmarks
    pass_env: tuple[str, ...] = ()  # environment variables the user lets through (PDK_ROOT), by name

    def __post_init__(self):
        unknown = set(self.skip) - set(SKIPPABLE)
        if unknown:
            raise ValueError(f"unknown sandbox mechanisms {sorted(unknown)}; known: {', '.join(SKIPPABLE)}")
        for name in self.pass_env:
            problem = pass_env_problem(name)
            if problem:
                raise ValueError(problem)


_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
# Variables that change how the interpreter or the dynamic linker starts: they would run
# code before the child confines itself, so no setting lets them through.
REFUSED_ENV_PREFIXES = ("LD_", "PYTHON", "DYLD_")


def pass_env_problem(name: object) -> str | None:
    """Why ``name`` cannot be passed into a run, or None when it can."""
    if not isinstance(name, str) or not _ENV_NAME.fullmatch(name):
        return f"an environment variable name (letters, digits, underscores), got {name!r}"
    if name.upper().startswith(REFUSED_ENV_PREFIXES):
        return (f"{name} is not passed into a run: variables starting with "
                f"{', '.join(REFUSED_ENV_PREFIXES)} change how the interpreter starts, before its sandbox")
    return None


def child_config(settings: SandboxSettings, *, work: str, result_fd: int, control_fd: int,
                 job_fd: int, cpu_seconds: int, needs_reading: list[str], python: str | None,
                 lifeline_fd: int | None) -> dict:
    """The JSON object server/child/start.py is started with. ``python`` is the
    interpreter the confined worker execs (None: latchwatch's own runs the job);
    ``lifeline_fd`` ends when latchwatch does."""
    return {
        "work": work, "result_fd": result_fd, "control_fd": control_fd, "job_fd": job_fd,
        "python": python, "lifeline_fd": lifeline_fd,
        "memory": settings.memory_limit, "cpu": cpu_seconds, "file_size": settings.file_size_limit,
        "open_files": settings.open_files_limit, "processes": settings.process_limit,
        "needs_reading": needs_reading, "skip": sorted(settings.skip),
    }


def parent_protections() -> dict[str, str]:
    """What the parent itself enforces on every run (server/sandbox/runner.py)."""

    protections = {
        "environment": "allow-listed: locale, PATH, HOME, TZ and the run's TMPDIR; no tokens, keys or credentials",
        "time": "the run is stopped at its timeout",
        "output": f"{OUTPUT_HEAD >> 10} KiB kept from the start and {OUTPUT_TAIL >> 10} KiB from the end; "
                  f"the run is stopped beyond {OUTPUT_KILL >> 20} MiB",
        "geometry": f"the run is stopped beyond {GEOMETRY_KILL >> 20} MiB of captured layout",
    }
    if sys.platform != "win32":
        protections["process-group"] = "killed as a group on timeout, cancel and after every run"
    return protections


@dataclass(frozen=True)
class SandboxReport:
    """What the child reported, plus what the parent enforces."""

    in_force: dict[str, str]
    missing: dict[str, str]
    setup_ms: float | None = None

    @classmethod
    def from_control_line(cls, line: str) -> SandboxReport:
        """Parse ``sandbox {json}``; a garbled line reports nothing in force."""
        try:
            record = json.loads(line.partition(" ")[2])
            in_force = {str(k): str(v) for k, v in record["in_force"].items()}
            missing = {str(k): str(v) for k, v in record["missing"].items()}
            setup_ms = record.get("setup_ms")
        except (ValueError, KeyError, AttributeError, TypeError):
            return cls.nothing("the child's sandbox report could not be read")
        return cls({**in_force, **parent_protections()}, missing, setup_ms)

    @classmethod
    def nothing(cls, reason: str) -> SandboxReport:
        """Only the parent's protections: the child never reported (it did not start)."""
        return cls(parent_protections(), {name: reason for name in REQUIRED})

    def missing_required(self) -> dict[str, str]:
        return {name: self.missing.get(name, "not reported") for name in REQUIRED if name not in self.in_force}

    def entry(self) -> dict:
        """The run's ``sandbox`` entry of the JSON report: only what was applied."""
        if "network" in self.in_force:
            network = "blocked"
        elif "tcp" in self.in_force:
            network = "tcp blocked"
        else:
            network = "not blocked"
        limits = ["time"] + [name for name in CHILD_LIMITS if name in self.in_force] + ["output", "geometry"]
        leftovers = self.in_force.get("leftovers", "")
        entry = {
            "network": network,
            "writes": "confined" if "writes" in self.in_force else "not confined",
            "limits": limits,
            "privileges": _privileges(self.in_force.get("privileges")),
            "leftovers": ("pid namespace" if leftovers.startswith("PID") else "subreaper" if leftovers
                          else "process group"),
            "core_dumps": "off" if "core" in self.in_force else "not prevented",
            "syscalls": "filtered" if "syscalls" in self.in_force else "not filtered",
        }
        missing = self.missing_required()
        if missing:
            entry["unavailable"] = missing
        return entry

    def doctor_lines(self) -> list[str]:
        """The lines `latchwatch doctor` prints: each protection in force or missing, with why."""
        width = max(len(name) for name, _title in PROTECTIONS)
        lines = []
        for name, title in PROTECTIONS:
            if name in self.in_force:
                lines.append(f"  in force     {name:<{width}}  {self.in_force[name]}")
            else:
                reason = self.missing.get(name, "not reported")
                lines.append(f"  unavailable  {name:<{width}}  {title}: {reason}")
        return lines


def _privileges(detail: str | None) -> str:
    if not detail:
        return "not dropped"
    if detail.startswith("runs as nobody"):
        return "nobody"
    return "unprivileged user"


def unavailable_message(missing: dict[str, str]) -> str:
    """The error a required sandbox gives when protections are missing."""
    parts = "; ".join(f"{TITLES.get(name, name)} ({name}): {reason}" for name, reason in missing.items())
    return (f"the sandbox is required (--require-sandbox, `require-sandbox` in the project file or the "
            f"editor setting requireSandbox), but these protections are unavailable: {parts}. "
            f"`latchwatch doctor` lists what this machine provides")
