"""``latchwatch serve``: the language server (docs/language-server.md) on pygls.

A thin front end: a run is ``pipeline.run_path`` + ``pipeline.check_run``, the same
two calls ``latchwatch check`` makes, done in a worker thread so the server keeps
answering; documents.py decides when runs happen, lsp_settings.py what they run
with, convert.py what the editor is sent.
"""

from __future__ import annotations

import asyncio
import itertools
import logging
import os
import sys
import threading
import traceback
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

from lsprotocol import types
from pygls.exceptions import JsonRpcException, JsonRpcMethodNotFound
from pygls.io_ import StdoutWriter
from pygls.lsp.server import LanguageServer
from pygls.uris import from_fs_path, to_fs_path

from latchwatch import __version__
from latchwatch.analyzers.rules import RULES_BY_ID
from latchwatch.analyzers.technology.model import TechnologyError
from latchwatch.server.config.project import ConfigError
from latchwatch.server.config.trust import TrustStoreError, is_trusted
from latchwatch.server.lsp import actions
from latchwatch.server.lsp import convert as convert
from latchwatch.server.lsp.documents import RunScheduler
from latchwatch.server.lsp.progress import Progress
from latchwatch.server.lsp.settings import (
    SECTION,
    DocumentSettings,
    EditorSettings,
    SettingsError,
    TechnologyCache,
    document_settings,
    merge,
    section_of,
    trust_root,
)
from latchwatch.server.lsp.transport import LatchwatchProtocol, StdinReader, run_framed
from latchwatch.server.report.as_text import checked_lines
from latchwatch.server.report.terminal import terminal_safe
from latchwatch.server.runs import batch as sweep
from latchwatch.server.runs import plan
from latchwatch.server.runs.pipeline import read_text_or_none
from latchwatch.server.sandbox.runner import RunnerError

logger = logging.getLogger("latchwatch.lsp")
CONFIGURATION_TIMEOUT_S = 2.0


@dataclass
class DocumentResult:
    """The latest run of one document that was published."""

    version: int
    result_id: str
    path: str
    settings: DocumentSettings | None = None
    findings: list = field(default_factory=list)
    devices: list = field(default_factory=list)
    runs: list = field(default_factory=list)  # convert.RunFindings per corner (one for a plain run)


class LatchwatchServer(LanguageServer):
    """The language server: documents, their latest results, settings and the run scheduler."""
    def __init__(self):
        super().__init__("latchwatch", __version__, protocol_cls=LatchwatchProtocol,
                         text_document_sync_kind=types.TextDocumentSyncKind.Incremental)
        self.editor = EditorSettings()
        self.scoped: dict[str, EditorSettings] = {}  # workspace/configuration answers per document
        self.versions: dict[str, int] = {}
        self.results: dict[str, DocumentResult] = {}
        # target uri -> source uri -> diagnostics: a run publishes for other files too.
        self.contributions: dict[str, dict[str, list[types.Diagnostic]]] = {}
        self.scheduler = RunScheduler(self.run_document)
        self.runs = ThreadPoolExecutor(max_workers=2, thread_name_prefix="latchwatch-run")
        self.techs = TechnologyCache()
        self.result_ids = itertools.count(1)
        self.exit_code = 0

    def _start_io_async(self, stdin=None, stdout=None):
        """pygls' stdio server, framed by transport.run_framed, keeping the exit status that
        ``exit`` sets (pygls swallows it): 0 after shutdown, else 1, and so at the end of input."""
        self._stop_event = threading.Event()
        self.protocol.set_writer(StdoutWriter(stdout or sys.stdout.buffer))

        async def loop():
            reader = StdinReader(stdin or sys.stdin.buffer, asyncio.get_running_loop(), self.thread_pool)
            await run_framed(self._stop_event, reader, self.protocol, self.report_server_error)

        try:
            asyncio.run(loop())
            self.exit_code = 0 if self.protocol._shutdown else 1
            if self.exit_code:
                logger.warning("the client closed the connection without shutdown and exit")
        except SystemExit as stop:
            self.exit_code = stop.code if isinstance(stop.code, int) else 1
        except BrokenPipeError:
            logger.error("the connection to the client is lost; shutting down")
            self.exit_code = 1
        except KeyboardInterrupt:
            self.exit_code = 130
        finally:
            self.shutdown()

    # --- what the client can do --------------------------------------------------

    @property
    def encoding(self) -> str:
        return self.workspace.position_encoding or types.PositionEncodingKind.Utf16

    def _client_can(self, dotted: str) -> bool:
        value = self.client_capabilities
        for name in dotted.split("."):
            value = getattr(value, name, None)
            if value is None:
                return False
        return bool(value)

    def log(self, message: str, kind=types.MessageType.Log) -> None:
        self.window_log_message(types.LogMessageParams(type=kind, message=terminal_safe(message)))

    def report_server_error(self, error: Exception, source) -> None:
        if source is JsonRpcException and isinstance(error, ValueError):  # a body that is not JSON
            self.protocol._send_response(None, error=types.ResponseError(code=-32700, message=f"Parse error: {error}"))
        if isinstance(error, JsonRpcMethodNotFound):
            return  # answered already; an unknown method is the client's business
        self.log(f"latchwatch internal error: {type(error).__name__}: {error}", types.MessageType.Error)

    # --- settings ----------------------------------------------------------------

    def apply_settings(self, raw, allow_trust: bool = True) -> None:
        self.editor, problems = merge(self.editor, section_of(raw), allow_trust)
        self.scoped.clear()
        for problem in problems:
            self.log(problem, types.MessageType.Warning)

    async def settings_for(self, uri: str) -> EditorSettings:
        """Editor settings for one document: initializationOptions and
        didChangeConfiguration, then workspace/configuration (user level, then scoped)."""
        if uri in self.scoped or not self._client_can("workspace.configuration"):
            return self.scoped.get(uri, self.editor)
        items = [types.ConfigurationItem(section=SECTION), types.ConfigurationItem(scope_uri=uri, section=SECTION)]
        try:
            answer = await asyncio.wait_for(
                self.workspace_configuration_async(types.ConfigurationParams(items=items)), CONFIGURATION_TIMEOUT_S)
        except Exception as error:  # a client that does not answer keeps the settings it sent
            self.log(f"workspace/configuration failed: {error}", types.MessageType.Warning)
            answer = [None, None]
        settings, problems = merge(self.editor, section_of(answer[0]), allow_trust=True)
        settings, more = merge(settings, section_of(answer[1] if len(answer) > 1 else None), allow_trust=False)
        for problem in problems + more:
            self.log(problem, types.MessageType.Warning)
        self.scoped[uri] = settings
        return settings

    def workspace_folder_of(self, path: Path) -> Path | None:
        """The innermost workspace folder that holds ``path``, if any."""
        folders = [Path(to_fs_path(f.uri)) for f in self.workspace.folders.values()]
        if self.workspace.root_path:
            folders.append(Path(self.workspace.root_path))
        inside = [f for f in folders if f == path or f in path.parents]
        return max(inside, key=lambda f: len(f.parts)) if inside else None

    # --- runs ----------------------------------------------------------------------

    def request_run(self, uri: str, delay: float = 0.0, restart: bool = False) -> None:
        if uri in self.versions:
            self.scheduler.request(uri, self.versions[uri], delay, restart)

    async def run_document(self, uri: str, version: int, cancel: threading.Event) -> None:
        """One run of one document; an internal error goes to the log and to a notice,
        and never takes the server down."""
        try:
            await self._run_document(uri, version, cancel)
        except RunnerError as error:  # the interpreter cannot start: a setting to fix, not a bug
            self.publish_notice(uri, version, str(error), types.DiagnosticSeverity.Error, "configuration")
        except Exception as error:  # asyncio.CancelledError is not an Exception: supersede still works
            self.log(f"latchwatch internal error while checking {uri}:\n{traceback.format_exc()}", types.MessageType.Error)
            self.publish_notice(uri, version, f"latchwatch could not check this file: {type(error).__name__}: "
                                f"{error} (details in the language server log)", types.DiagnosticSeverity.Error,
                                "internal-error")

    async def _run_document(self, uri: str, version: int, cancel: threading.Event) -> None:
        path = Path(to_fs_path(uri))
        editor = await self.settings_for(uri)
        text = self.workspace.get_text_document(uri).source
        folder = self.workspace_folder_of(path)
        try:
            if not is_trusted(path, editor.trusted_folders):
                return self.publish_notice(uri, version, untrusted_message(trust_root(path, folder)), code="trust")
            settings = document_settings(path, editor, folder, self.techs)
            sweeps = plan.configured_sweeps(settings.project, only=path)
        except (ConfigError, TechnologyError, SettingsError, TrustStoreError, plan.SweepError) as error:
            return self.publish_notice(uri, version, str(error), types.DiagnosticSeverity.Error, "configuration")
        buffers = {to_fs_path(d.uri): d.source for d in self.workspace.text_documents.values()}
        async with Progress(self, f"running {path.name}") as progress:
            planned = len(plan.plan_script(path, sweeps))
            progress.counts = (0, planned) if planned > 1 else None
            done = await asyncio.get_running_loop().run_in_executor(
                self.runs, check_document, path, text, settings, cancel, buffers, sweeps, progress.runs_done)
        if done is None or cancel.is_set() or self.versions.get(uri) != version:
            return  # superseded: a newer version runs, or the document closed
        runs, output, checked = done
        if output:
            self.log(f"{path}: script output:\n{output.rstrip()}")
        for line in checked:  # which cells were checked as tops, and why
            self.log(line)
        findings = [f for r in runs for f in r.findings]
        devices = [d for r in runs for d in r.devices]
        self.publish_run(uri, version, DocumentResult(version, "", str(path), settings, findings, devices, runs),
                         buffers)

    # --- publishing ----------------------------------------------------------------

    def publish_notice(self, uri: str, version: int, message: str,
                       severity=types.DiagnosticSeverity.Information, code: str | None = None) -> None:
        """Publish one diagnostic that is not a finding (untrusted folder, bad configuration)."""
        if self.versions.get(uri) != version:
            return
        first = (self.workspace.get_text_document(uri).lines or [""])[0]
        diagnostic = convert.notice(message, severity, code, first, self.encoding)
        self.store(uri, DocumentResult(version, "", to_fs_path(uri)), {uri: [diagnostic]})

    def publish_run(self, uri: str, version: int, result: DocumentResult, buffers: dict[str, str]) -> None:
        by_file = convert.diagnostics_for_runs(
            result.runs or [convert.RunFindings(None, None, tuple(result.findings), tuple(result.devices))],
            result.path, LineReader(buffers), self.encoding, self.rule_href(uri))
        self.store(uri, result, {from_fs_path(file): diagnostics for file, diagnostics in by_file.items()})

    def store(self, uri: str, result: DocumentResult, by_target: dict[str, list[types.Diagnostic]]) -> None:
        """Replace what the run of ``uri`` contributed, and publish every file it touched."""
        result.result_id = f"{result.version}.{next(self.result_ids)}"
        self.results[uri] = result
        touched = set(by_target) | {t for t, sources in self.contributions.items() if uri in sources}
        for target in touched:
            sources = self.contributions.setdefault(target, {})
            sources.pop(uri, None)
            if by_target.get(target):
                sources[uri] = by_target[target]
            self.publish(target)

    def diagnostics_of(self, target: str) -> list[types.Diagnostic]:
        return [d for diagnostics in self.contributions.get(target, {}).values() for d in diagnostics]

    def publish(self, target: str) -> None:
        own = self.results.get(target)
        version = own.version if own is not None and self.versions.get(target) == own.version else None
        self.text_document_publish_diagnostics(types.PublishDiagnosticsParams(
            uri=target, diagnostics=self.diagnostics_of(target), version=version))

    def forget(self, uri: str) -> None:
        """Drop a closed document: cancel its run and clear its diagnostics."""
        self.scheduler.supersede(uri)
        self.versions.pop(uri, None)
        self.results.pop(uri, None)
        self.scoped.pop(uri, None)
        self.contributions.pop(uri, None)
        for target, sources in list(self.contributions.items()):
            if sources.pop(uri, None) is not None:
                self.publish(target)
        self.text_document_publish_diagnostics(types.PublishDiagnosticsParams(uri=uri, diagnostics=[]))

    def rule_href(self, uri: str):
        template = self.scoped.get(uri, self.editor).rule_docs_url
        return lambda rule: template.replace("{rule}", rule) if template else rule_doc_file(rule)


def check_document(path: Path, text: str, settings: DocumentSettings, cancel: threading.Event,
                   buffers: dict[str, str], sweeps=(), on_run=lambda done, total: None):
    """The runs of one document in a worker thread (its configured corners, its
    previewed functions, or the plain run), through the shared pipeline, with unsaved
    buffers as the source of the document and of the suppression comments. Returns
    (RunFindings per run, the script output, the ``checked ...`` lines naming each run's
    top cells and why), or None when cancelled."""
    if cancel.is_set():
        return None
    results = sweep.check_script(path, settings.check, sweeps, source=text, cancel=cancel,
                                 read_source=lambda f: buffers.get(f) or read_text_or_none(f),
                                 on_result=lambda result, done, total: on_run(done, total))
    if results is None or cancel.is_set():
        return None
    runs = [convert.RunFindings(r.task.function, r.task.corner, tuple(r.findings), tuple(r.devices)) for r in results]
    output = "\n".join(_labelled_output(r) for r in results if r.output)
    return runs, output, checked_lines(r.summary for r in results)


def _labelled_output(result) -> str:
    if result.task.function is None:
        return result.output.rstrip()
    return f"[{result.task.function}: {convert.corner_label(result.task.corner)}]\n{result.output.rstrip()}"


class LineReader:
    """Source lines for ranges: open buffers first, then the files on disk."""

    def __init__(self, buffers: dict[str, str]):
        self.buffers, self.lines = buffers, {}

    def __call__(self, file: str, line: int) -> str | None:
        if file not in self.lines:
            text = self.buffers.get(file)
            self.lines[file] = (text if text is not None else read_text_or_none(file) or "").splitlines()
        lines = self.lines[file]
        return lines[line - 1] if 0 < line <= len(lines) else None


def untrusted_message(root: Path) -> str:
    """The notice shown in a folder that is not trusted, with the command that trusts it."""
    return (f"latchwatch runs no script here: {root} is not a trusted folder. To trust it, run "
            f"`latchwatch trust {root}` in a terminal, or add it to the editor setting "
            f"{SECTION}.trustedFolders; then save the file.")


def rule_doc_file(rule: str) -> str | None:
    """A file URI of the rule's documentation, written once into the user's cache folder,
    so that clicking the diagnostic's code opens it."""
    found = RULES_BY_ID.get(rule)
    if found is None:
        return None
    base = os.environ.get("XDG_CACHE_HOME", "")
    folder = (Path(base) if os.path.isabs(base) else Path.home() / ".cache") / "latchwatch" / __version__ / "rules"
    target = folder / f"{rule}.md"
    try:
        if not target.is_file():
            folder.mkdir(parents=True, exist_ok=True)
            target.write_text(found.help_text(), encoding="utf-8")
    except OSError:
        return None
    return from_fs_path(str(target))


def create_server() -> LatchwatchServer:
    """The language server with its handlers registered."""
    server = LatchwatchServer()

    @server.feature(types.INITIALIZE)
    def initialize(ls: LatchwatchServer, params: types.InitializeParams):
        ls.apply_settings(params.initialization_options)

    @server.feature(types.TEXT_DOCUMENT_DID_OPEN)
    def did_open(ls: LatchwatchServer, params: types.DidOpenTextDocumentParams):
        if not params.text_document.uri.startswith("file:"):
            return  # untitled:, git:, notebook cells: nothing on disk to run or to trust
        ls.versions[params.text_document.uri] = params.text_document.version
        ls.request_run(params.text_document.uri)

    @server.feature(types.TEXT_DOCUMENT_DID_CHANGE)
    def did_change(ls: LatchwatchServer, params: types.DidChangeTextDocumentParams):
        uri = params.text_document.uri
        if uri not in ls.versions:
            return  # never opened: nothing to run
        ls.versions[uri] = params.text_document.version
        if ls.scoped.get(uri, ls.editor).run_on == "change":
            ls.request_run(uri, ls.scoped.get(uri, ls.editor).debounce_ms / 1000.0)
        else:
            ls.scheduler.supersede(uri)  # its result would describe an older text

    @server.feature(types.TEXT_DOCUMENT_DID_SAVE)
    def did_save(ls: LatchwatchServer, params: types.DidSaveTextDocumentParams):
        ls.request_run(params.text_document.uri)

    @server.feature(types.TEXT_DOCUMENT_DID_CLOSE)
    def did_close(ls: LatchwatchServer, params: types.DidCloseTextDocumentParams):
        ls.forget(params.text_document.uri)

    @server.feature(types.WORKSPACE_DID_CHANGE_CONFIGURATION)
    def did_change_configuration(ls: LatchwatchServer, params: types.DidChangeConfigurationParams):
        ls.apply_settings(params.settings)
        for uri in list(ls.versions):
            ls.request_run(uri, restart=True)

    @server.feature(types.TEXT_DOCUMENT_DIAGNOSTIC, types.DiagnosticOptions(
        identifier="latchwatch", inter_file_dependencies=True, workspace_diagnostics=False))
    async def pull_diagnostics(ls: LatchwatchServer, params: types.DocumentDiagnosticParams):
        await ls.scheduler.settle(params.text_document.uri)
        return document_report(ls, params.text_document.uri, params.previous_result_id)

    @server.feature(types.TEXT_DOCUMENT_HOVER)
    def hover(ls: LatchwatchServer, params: types.HoverParams):
        return hover_at(ls, params.text_document.uri, params.position.line)

    @server.feature(types.TEXT_DOCUMENT_CODE_ACTION,
                    types.CodeActionOptions(code_action_kinds=[types.CodeActionKind.QuickFix]))
    def code_action(ls: LatchwatchServer, params: types.CodeActionParams):
        return actions.suppression_actions(ls, params) + actions.page_actions(ls, params)

    @server.command(actions.SHOW_PAGE)
    async def show_page(ls: LatchwatchServer, args):
        return await actions.show_page(ls, args)

    @server.feature(types.SHUTDOWN)
    @server.feature(types.EXIT)  # without a shutdown first: the runs end all the same
    def shutdown(ls: LatchwatchServer, *args):
        ls.scheduler.shutdown()
        ls.runs.shutdown(wait=False, cancel_futures=True)

    return server


def document_report(ls: LatchwatchServer, uri: str, previous: str | None):
    """The pull-diagnostics report of a document, unchanged when its result id is ``previous``."""
    result = ls.results.get(uri)
    if result is None:
        return types.RelatedFullDocumentDiagnosticReport(items=[], result_id="none")
    if previous == result.result_id:
        return types.RelatedUnchangedDocumentDiagnosticReport(result_id=result.result_id)
    related = {target: types.FullDocumentDiagnosticReport(items=sources[uri])
               for target, sources in ls.contributions.items() if target != uri and uri in sources}
    return types.RelatedFullDocumentDiagnosticReport(
        items=ls.diagnostics_of(uri), result_id=result.result_id, related_documents=related or None)


def hover_at(ls: LatchwatchServer, uri: str, line: int):
    """The hover text of a line that drew device diffusions, or None."""
    result = ls.results.get(uri)
    if result is None or result.settings is None:
        return None
    tech = result.settings.check.tech
    limit = (lambda kind: None) if tech.has_spacing_table() else (
        lambda kind: tech.tap_distance_limit("p" if kind == "pdiff" else "n"))
    if len(result.runs) > 1:
        text = convert.hover_for_runs(result.path, line + 1, result.runs, limit)
    else:
        text = convert.hover_markdown(result.path, line + 1, result.devices, result.findings, limit)
    if text is None:
        return None
    text = terminal_safe(text)  # cell and net names a script chose
    formats = ls.client_capabilities.text_document and ls.client_capabilities.text_document.hover
    formats = formats.content_format if formats else None
    if formats and types.MarkupKind.Markdown not in formats:
        return types.Hover(contents=types.MarkupContent(kind=types.MarkupKind.PlainText, value=text.replace("**", "")))
    return types.Hover(contents=types.MarkupContent(kind=types.MarkupKind.Markdown, value=text))


def serve(tcp: str | None = None) -> int:
    """Run the server on stdio, or on ``HOST:PORT``; returns when the client disconnects."""
    logging.basicConfig(level=logging.WARNING, stream=sys.stderr, format="latchwatch serve: %(message)s")
    server = create_server()
    if tcp is None:
        server.start_io()
        return server.exit_code
    host, _, port = tcp.rpartition(":")
    if not host or not port.isdigit():
        print(f"latchwatch: --tcp: expected HOST:PORT, got {tcp!r}", file=sys.stderr)
        return 2
    from latchwatch.server.lsp.tcp import serve_with_token

    return serve_with_token(server, host, int(port))
