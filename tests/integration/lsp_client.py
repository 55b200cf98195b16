"""The language-server test client: a real `latchwatch serve` over stdio, and the scripts it checks."""

from __future__ import annotations

import asyncio
import sys
import time
from pathlib import Path

from lsprotocol import types
from pygls.protocol import default_converter
from pygls.uris import from_fs_path
from pytest_lsp import LanguageClient
from pytest_lsp.client import DEFAULT_CLIENT_FEATURES, register_lsp_features

SERVER = [sys.executable, "-m", "latchwatch", "serve"]

# An n-well with one contacted n-tap at its left end (x -3..-1) and a loop drawing three
# 8 um P+ diffusions at x = 0, 14, 28. The farthest points lie 9, 23 and 37 um from the
# tap, so against the 20 um limit two of the three fail, both on the loop's line 10.
CELL = '''\
import gdstk

lib = gdstk.Library()
cell = lib.new_cell("TOP")
cell.add(gdstk.rectangle((-5, -2), (45, 8), layer=1))
cell.add(gdstk.rectangle((-3, 0), (-1, 4), layer=2))
cell.add(gdstk.rectangle((-3.2, -0.2), (-0.8, 4.2), layer=4))
cell.add(gdstk.rectangle((-2.5, 1.5), (-1.5, 2.5), layer=6))
for x in XS:
    cell.add(gdstk.rectangle((x, 0), (x + 8, 4), layer=2))
    cell.add(gdstk.rectangle((x - 0.2, -0.2), (x + 8.2, 4.2), layer=5))
'''
FAILING = CELL.replace("XS", "(0, 14, 28)")
CLEAN = CELL.replace("XS", "(0, 4, 8)")
LOOP_LINE = 9  # 0-based: the line drawing the active rectangles
TAP_LINE = 5


def make_project(folder: Path, script: str = FAILING, name: str = "cell.py", extra_config: str = "") -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "latchwatch.toml").write_text(f'tech = "demo"\n{extra_config}')
    path = folder / name
    path.write_text(script)
    return path




async def wait_until(predicate, timeout: float = 20.0, what: str = "condition"):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        await asyncio.sleep(0.02)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def capabilities(pull: bool = False, progress: bool = False, configuration: bool = False,
                 encodings: list[str] | None = None) -> types.ClientCapabilities:
    return types.ClientCapabilities(
        general=types.GeneralClientCapabilities(position_encodings=encodings) if encodings else None,
        text_document=types.TextDocumentClientCapabilities(
            diagnostic=types.DiagnosticClientCapabilities(related_document_support=True) if pull else None,
            publish_diagnostics=types.PublishDiagnosticsClientCapabilities(related_information=True,
                                                                          version_support=True),
            hover=types.HoverClientCapabilities(content_format=[types.MarkupKind.Markdown]),
        ),
        window=types.WindowClientCapabilities(work_done_progress=progress),
        workspace=types.WorkspaceClientCapabilities(configuration=configuration, workspace_folders=True),
    )


class Session:
    """One server process and its client; every publishDiagnostics is kept in order."""

    def __init__(self, env: dict[str, str]):
        self.env = env
        self.client = LanguageClient(converter_factory=default_converter)
        self.published: list[types.PublishDiagnosticsParams] = []

        def record(client: LanguageClient, params: types.PublishDiagnosticsParams):
            params.diagnostics = list(params.diagnostics)
            self.published.append(params)
            client.diagnostics[params.uri] = params.diagnostics

        register_lsp_features(self.client, {**DEFAULT_CLIENT_FEATURES,
                                            types.TEXT_DOCUMENT_PUBLISH_DIAGNOSTICS: record})

    async def start(self, root: Path, *, caps=None, options=None, folders=None, configuration=None):
        if configuration:
            for scope, value in configuration.items():
                self.client.set_configuration(value, section="latchwatch", scope_uri=scope)
        await self.client.start_io(*SERVER, env=self.env)
        return await self.client.initialize_session(types.InitializeParams(
            capabilities=caps or capabilities(), root_uri=from_fs_path(str(root)),
            workspace_folders=folders, initialization_options=options))

    def open(self, path: Path, text: str | None = None, version: int = 1) -> str:
        uri = from_fs_path(str(path))
        self.client.text_document_did_open(types.DidOpenTextDocumentParams(types.TextDocumentItem(
            uri=uri, language_id="python", version=version, text=path.read_text() if text is None else text)))
        return uri

    def replace_all(self, uri: str, version: int, old: str, new: str) -> None:
        """An incremental change replacing the whole of ``old`` by ``new``."""
        lines = old.split("\n")
        end = types.Position(len(lines) - 1, len(lines[-1]))
        self.client.text_document_did_change(types.DidChangeTextDocumentParams(
            text_document=types.VersionedTextDocumentIdentifier(uri=uri, version=version),
            content_changes=[types.TextDocumentContentChangePartial(
                range=types.Range(types.Position(0, 0), end), text=new)]))

    def edit_line(self, uri: str, version: int, line: int, start: int, end: int, text: str) -> None:
        self.client.text_document_did_change(types.DidChangeTextDocumentParams(
            text_document=types.VersionedTextDocumentIdentifier(uri=uri, version=version),
            content_changes=[types.TextDocumentContentChangePartial(
                range=types.Range(types.Position(line, start), types.Position(line, end)), text=text)]))

    def last(self, uri: str) -> types.PublishDiagnosticsParams | None:
        for params in reversed(self.published):
            if params.uri == uri:
                return params
        return None

    async def published_for(self, uri: str, version: int | None = None, timeout: float = 30.0,
                            where=lambda p: True) -> types.PublishDiagnosticsParams:
        def ready():
            p = self.last(uri)
            return p if p is not None and (version is None or p.version == version) and where(p) else None
        return await wait_until(ready, timeout, f"diagnostics for {uri} at version {version}")

    async def stop(self):
        try:
            await asyncio.wait_for(self.client.shutdown_session(), 10)
        finally:
            await self.client.stop()


def trusted(folder: Path, **more) -> dict:
    return {"latchwatch": {"trustedFolders": [str(folder)], "debounce": 50, **more}}


