"""The ``latchwatch`` command line (docs/command-line.md)."""

from __future__ import annotations

import argparse
import difflib
import functools
import importlib
import os
import sys
from dataclasses import replace
from pathlib import Path

from latchwatch import __version__
from latchwatch.analyzers.model.errors import HierarchyError, TopCellError
from latchwatch.analyzers.model.findings import Severity
from latchwatch.analyzers.rules import RULE_IDS
from latchwatch.analyzers.technology.model import TechnologyError
from latchwatch.server.config import techfiles
from latchwatch.server.config.project import ConfigError, expand_includes, find_project_config, is_excluded
from latchwatch.server.report.terminal import terminal_safe
from latchwatch.server.runs import batch as sweep
from latchwatch.server.runs import plan
from latchwatch.server.runs.pipeline import CheckSettings, expand_paths
from latchwatch.server.sandbox.policy import pass_env_problem
from latchwatch.server.sandbox.runner import RunnerError

CAUTION = (
    "latchwatch is an early-warning aid for generator authors, not sign-off. Its resistance and injection "
    "figures are estimates from sheet and diffusion models. Tape-out needs the foundry's qualified rule "
    "deck, its latch-up and ESD guidelines, and qualification of silicon (for example JEDEC JESD78); "
    "defer to them and to the foundry's and your organisation's qualified practice."
)
FAIL_LEVELS = {"error": Severity.ERROR, "warning": Severity.WARNING, "info": Severity.INFO, "never": None}
# The writer of each --format (module, function), imported when the report is written.
RENDERERS = {"text": ("as_text", "render_text"), "json": ("as_json", "render_json"),
             "sarif": ("as_sarif", "render_sarif")}


class UsageError(Exception):
    """Bad flags or configuration: exit status 2, message on stderr."""


def _rule_list(text: str, flag: str) -> tuple[str, ...]:
    ids = tuple(r.strip() for r in text.split(",") if r.strip())
    for rule in ids:
        if rule not in RULE_IDS:
            close = difflib.get_close_matches(rule, list(RULE_IDS), n=1)
            hint = f"; did you mean {close[0]!r}?" if close else f" (known: {', '.join(RULE_IDS)})"
            raise UsageError(f"{flag}: unknown rule {rule!r}{hint}")
    return ids


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="latchwatch", description="Latch-up checks for Python layout generators.")
    p.add_argument("--version", action="version", version=f"latchwatch {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("check", help="run scripts or read layouts and report latch-up findings")
    c.add_argument("paths", nargs="*", type=Path, metavar="PATH", help="scripts (.py), layouts (.gds, .oas) or folders")
    c.add_argument("--tech", metavar="NAME|FILE", help="built-in technology name or a technology TOML file")
    c.add_argument("--format", choices=sorted(RENDERERS), default="text")
    c.add_argument("--output", type=Path, metavar="FILE", help="write the report there instead of stdout")
    c.add_argument("--html", type=Path, metavar="FILE",
                   help="also write the page: the layout, its findings and maps, one self-contained HTML file")
    c.add_argument("--select", metavar="RULE[,RULE]", help="only these rules")
    c.add_argument("--ignore", metavar="RULE[,RULE]", help="all rules but these")
    c.add_argument("--fail-on", choices=list(FAIL_LEVELS), default="warning")
    c.add_argument("--timeout", type=float, metavar="SECONDS", help="per script run (default 10)")
    c.add_argument("--python", metavar="PATH", help="interpreter that runs the scripts")
    c.add_argument("--top", metavar="CELL", help="check this cell as the top")
    c.add_argument("--devices", action="store_true", help="add the per-device table to the report")
    c.add_argument("--require-sandbox", action="store_true",
                   help="fail (exit 2) instead of running with fewer protections than `latchwatch doctor` lists")
    c.add_argument("--env", action="append", default=[], metavar="NAME",
                   help="let the scripts see this environment variable, e.g. PDK_ROOT (repeatable; "
                        "added to the project's `env`)")
    c.add_argument("--sweep", metavar="FUNCTION", help="call this function of the one script at each corner")
    c.add_argument("--param", action="append", default=[], metavar="NAME=V1,V2,...",
                   help="values of one parameter of --sweep (repeatable; the full grid is run)")
    c.add_argument("--corners", type=int, metavar="N", help="run N corners of each sweep, always the lowest and highest")
    c.add_argument("--jobs", type=int, metavar="N", help="runs at a time (default: the number of cores)")

    r = sub.add_parser("rules", help="list rules, or show one rule's documentation")
    r.add_argument("rule", nargs="?")

    t = sub.add_parser("tech", help="built-in technologies and technology files")
    tsub = t.add_subparsers(dest="tech_command", required=True)
    tsub.add_parser("list", help="list built-in technologies")
    show = tsub.add_parser("show", help="show a technology")
    show.add_argument("name")
    tcheck = tsub.add_parser("check", help="validate a technology file")
    tcheck.add_argument("file")

    sv = sub.add_parser("serve", help="the language server (stdio by default)")
    sv.add_argument("--tcp", metavar="HOST:PORT", help="listen on a TCP socket instead of stdio")

    tr = sub.add_parser("trust", help="let the language server run scripts in a folder")
    tr.add_argument("path", nargs="?", metavar="PATH", help="folder to trust (default: the current folder)")
    trust_mode = tr.add_mutually_exclusive_group()
    trust_mode.add_argument("--list", action="store_true", help="list the trusted folders")
    trust_mode.add_argument("--remove", metavar="PATH", help="withdraw trust from a folder")

    dr = sub.add_parser("doctor", help="which sandbox protections this machine provides")
    dr.add_argument("--python", metavar="PATH", help="interpreter that runs the scripts (default: the project's, "
                                                     "else the one running latchwatch)")
    dr.add_argument("--require-sandbox", action="store_true", help="exit with status 2 when a protection is missing")
    dr.add_argument("--env", action="append", default=[], metavar="NAME",
                    help="an environment variable to pass, as `check --env` does (repeatable)")
    return p


def _settings(args, config) -> CheckSettings:
    tech_ref, base = args.tech, Path.cwd()
    if tech_ref is None and config.tech is not None:
        tech_ref, base = config.tech, config.root
    if tech_ref is None:
        raise UsageError("no technology: pass --tech NAME|FILE or set `tech` in [tool.latchwatch] "
                         f"(built-in: {', '.join(techfiles.builtin_names())})")
    timeout = args.timeout if args.timeout is not None else (config.timeout or 10.0)
    if timeout <= 0:
        raise UsageError(f"--timeout: expected a positive number of seconds, got {timeout}")
    return CheckSettings(
        tech=techfiles.load_technology(tech_ref, base),
        python=args.python or config.python, timeout=timeout,
        select=_rule_list(args.select, "--select") if args.select else (),
        ignore=_rule_list(args.ignore, "--ignore") if args.ignore else (),
        disable=tuple(config.disable), severity=dict(config.severity),
        top=args.top, devices=args.devices,
        project_root=config.root or _guess_root(args.paths),
        require_sandbox=args.require_sandbox or config.require_sandbox,
        pass_env=_pass_env(config.env, args.env), limits=config.limits,
    )


def _pass_env(from_project, from_command_line) -> tuple[str, ...]:
    """The project's ``env`` names and the ``--env`` ones, each once, each checked."""
    names = tuple(dict.fromkeys([*from_project, *from_command_line]))
    for name in from_command_line:
        problem = pass_env_problem(name)
        if problem:
            raise UsageError(f"--env: {problem}")
    return names


def _guess_root(paths) -> Path:
    """Without a project file, frames under the working directory count as user code."""
    return Path.cwd()


def _check(args) -> int:
    start = args.paths[0] if args.paths else Path.cwd()
    config = find_project_config(start if start.exists() else Path.cwd(), known_rules=set(RULE_IDS))
    settings = _settings(args, config)
    missing = [p for p in args.paths if not p.exists()]
    if missing:
        raise UsageError(f"{missing[0]}: no such file or folder")
    if args.paths:
        excluded = functools.partial(is_excluded, config)
        paths = expand_paths(args.paths, excluded)
    elif config.include or config.sweeps:
        paths = expand_includes(config)
    else:
        raise UsageError("nothing to check: give PATHs or set `include` (or a sweep) in [tool.latchwatch]")
    # Several scripts: each runs in a fork of a corner host that imported gdstk once
    # (measured in DEVELOPERS.md); one script runs in a fresh child.
    settings = replace(settings, hosted=sum(p.suffix.lower() == ".py" for p in paths) > 1)
    page = args.html or config.html
    if page is not None:
        from latchwatch.server.pictures.scene import capture

        settings = replace(settings, draw=capture)
    report = sweep.check_all(paths, settings, _sweeps(args, config, paths), jobs=args.jobs, corners=args.corners,
                             progress=sweep.ProgressBar(sys.stderr), unlisted=not args.paths)
    text = _render(args.format, report)
    if args.output:
        args.output.write_text(text if text.endswith("\n") else text + "\n", encoding="utf-8")
    else:
        sys.stdout.write(text if text.endswith("\n") else text + "\n")
    if page is not None:
        from latchwatch.server.pictures.page import write_page

        written = write_page(report, page)
        print(f"latchwatch: page written to {written}", file=sys.stderr)
    threshold = FAIL_LEVELS[args.fail_on]
    failed = threshold is not None and any(f.severity >= threshold for f in report.findings)
    return 1 if failed else 0


def _sweeps(args, config, paths) -> list:
    """The configured sweeps; ``--sweep`` replaces those of its one script."""
    if args.jobs is not None and args.jobs < 1:
        raise UsageError(f"--jobs: expected at least 1, got {args.jobs}")
    if args.corners is not None and args.corners < 2:
        raise UsageError(f"--corners: expected at least 2 (the lowest and the highest corner), got {args.corners}")
    sweeps = list(plan.configured_sweeps(config))
    if args.sweep is None:
        if args.param:
            raise UsageError("--param needs --sweep FUNCTION")
        return sweeps
    if len(paths) != 1 or paths[0].suffix.lower() != ".py":
        raise UsageError("--sweep: give exactly one script (.py) to call the function of")
    chosen = plan.ad_hoc_sweep(paths[0], args.sweep, args.param)
    return [s for s in sweeps if s not in plan.sweeps_for(paths[0], sweeps)] + [chosen]


def _render(format_name: str, report) -> str:
    module, function = RENDERERS[format_name]
    return getattr(importlib.import_module(f"latchwatch.server.report.{module}"), function)(report)


def _rules(args) -> int:
    from latchwatch.analyzers.rules import RULES, RULES_BY_ID

    if args.rule:
        rule = RULES_BY_ID.get(args.rule)
        if rule is None:
            _rule_list(args.rule, "rules")
        print(rule.help_text())
        print(CAUTION)
        return 0
    width = max(len(r.id) for r in RULES)
    for rule in RULES:
        print(f"{rule.id:<{width}}  {rule.severity.label:<7}  {rule.summary}")
    print()
    print(CAUTION)
    return 0


def _tech(args) -> int:
    if args.tech_command == "list":
        return techfiles.tech_list_command(sys.stdout)
    if args.tech_command == "show":
        return techfiles.tech_show_command(args.name, sys.stdout, sys.stderr)
    return techfiles.tech_check_command(args.file, sys.stdout, sys.stderr)


def _serve(args) -> int:
    from latchwatch.server.lsp.server import serve

    return serve(args.tcp)


def _trust(args) -> int:
    from latchwatch.server.config.trust import trust_command

    if args.path is not None and (args.list or args.remove):
        raise UsageError("trust: give a PATH, or --list, or --remove PATH, not both")
    return trust_command(args.path, args.list, args.remove)


def _doctor(args) -> int:
    from latchwatch.server.cli.doctor import doctor_command

    config = find_project_config(Path.cwd())
    return doctor_command(args.python or config.python, args.require_sandbox or config.require_sandbox,
                          pass_env=_pass_env(config.env, args.env))


COMMANDS = {"check": _check, "rules": _rules, "tech": _tech, "serve": _serve, "trust": _trust, "doctor": _doctor}


def main(argv: list[str] | None = None) -> int:
    """The `latchwatch` command; returns the exit status."""
    args = _parser().parse_args(argv)
    try:
        return COMMANDS[args.command](args)
    except (UsageError, ConfigError, TechnologyError, TopCellError, HierarchyError, RunnerError, plan.SweepError) as exc:
        print(terminal_safe(f"latchwatch: {exc}"), file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        os._exit(1)


if __name__ == "__main__":
    sys.exit(main())
