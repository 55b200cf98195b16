"""The wire between the editor and the language server: framing, decoding, shutdown, exit.

pygls (2.x, pygls.io_.run_async) reads a header only when it is exactly
``Content-Length: N\\r\\n``, and after one bad frame it takes every later body for
a header line: the server lives on and never answers again. ``run_framed`` replaces
that loop. Headers may end in CRLF or LF; a frame with a missing, negative, non-numeric
or oversized length is logged and skipped to the next ``Content-Length:`` wherever it
appears, and a body that does not parse is searched for one, so that the messages
after a wrong length are read again. A body that nests deeper than Python's parser
goes gets an Invalid Request answer with its id, found without parsing it.

``LatchwatchProtocol`` answers what pygls drops: a message that does not decode, one
that is no JSON-RPC object, and every request after ``shutdown`` (Invalid Request).
"""

from __future__ import annotations

import asyncio
import json
import logging
import re

from lsprotocol import types
from pygls.exceptions import JsonRpcException
from pygls.protocol import LanguageServerProtocol
from pygls.protocol.language_server import lsp_method

logger = logging.getLogger("latchwatch.lsp")
IGNORED = object()  # a message answered with an error while it was being decoded
MAX_BODY = 256 << 20  # bytes: an editor's whole-document message stays far below
MAX_HEADER_LINE = 8192
_MARKER = b"content-length:"
_TOKEN = re.compile(rb"[A-Za-z0-9!#$%&'*+.^_`|~-]+")  # a header name (RFC 9110 section 5.1)
_ID = re.compile(rb'"id"\s*:\s*(-?\d+|"(?:[^"\\]|\\.)*")')
INVALID_REQUEST = -32600
PARSE_ERROR = -32700


class FramingError(ValueError):
    """A header block that does not frame a message; ``line`` is the line that showed it."""

    def __init__(self, message: str, line: bytes = b""):
        super().__init__(message)
        self.line = line


class StdinReader:
    """Blocking reads of the server's stdin, run in an executor (as pygls' own reader)."""

    def __init__(self, stdin, loop, executor=None):
        self.stdin, self.loop, self.executor = stdin, loop, executor

    async def readline(self) -> bytes:
        return await self.loop.run_in_executor(self.executor, self.stdin.readline, MAX_HEADER_LINE)

    async def readexactly(self, n: int) -> bytes:
        return await self.loop.run_in_executor(self.executor, self.stdin.read, n)


class _Stream:
    """A reader with bytes pushed back in front of it (for re-reading a bad body). The
    reader is any of pygls' kind (``readline()``, ``readexactly(n)``): StdinReader, or an
    asyncio StreamReader, whose lines are capped by its own limit."""

    def __init__(self, reader):
        self.reader, self.pending = reader, bytearray()

    def push(self, data: bytes) -> None:
        self.pending[:0] = data

    async def readline(self) -> bytes:
        if self.pending:
            end = self.pending.find(b"\n", 0, MAX_HEADER_LINE)
            cut = end + 1 if end >= 0 else min(len(self.pending), MAX_HEADER_LINE)
            line = bytes(self.pending[:cut])
            del self.pending[:cut]
            if end >= 0 or len(line) >= MAX_HEADER_LINE:
                return line
            return line + await self._line()
        return await self._line()

    async def _line(self) -> bytes:
        try:
            return await self.reader.readline()
        except ValueError:  # an asyncio StreamReader's line over its limit: framing garbage
            return b"\0" * MAX_HEADER_LINE

    async def readexactly(self, n: int) -> bytes:
        head = bytes(self.pending[:n])
        del self.pending[:n]
        while len(head) < n:
            try:
                more = await self.reader.readexactly(n - len(head))
            except asyncio.IncompleteReadError as short:  # an asyncio StreamReader at the end of input
                return head + short.partial
            if not more:
                break
            head += more
        return head


async def _header(stream: _Stream) -> int | None:
    """The Content-Length of the next frame; None at the end of input."""
    length = None
    while True:
        line = await stream.readline()
        if not line:
            return None
        text = line.rstrip(b"\r\n")
        if not text:
            if length is None:
                raise FramingError("a header block without Content-Length", line)
            return length
        name, colon, value = text.partition(b":")
        if not colon or not _TOKEN.fullmatch(name.strip()):
            raise FramingError(f"not a header line: {_show(line)}", line)
        if name.strip().lower() == b"content-length":
            value = value.strip()
            if not value.isdigit():
                raise FramingError(f"Content-Length is not a non-negative whole number: {_show(value)}", line)
            length = int(value)
            if length > MAX_BODY:
                raise FramingError(f"Content-Length {length} is above the {MAX_BODY >> 20} MiB a message may "
                                   "have", line)


async def _resynchronise(stream: _Stream) -> bool:
    """Skip to the next ``Content-Length:`` (at any place in a line); False at the end of input."""
    carried = b""
    while True:
        line = await stream.readline()
        if not line:
            return False
        text = carried + line
        at = text.lower().find(_MARKER)
        if at >= 0:
            stream.push(text[at:])
            return True
        carried = text[-len(_MARKER):]


def _show(data: bytes) -> str:
    return repr(data[:60])[1:] + ("..." if len(data) > 60 else "")


async def run_framed(stop_event, reader, protocol, error_handler=None) -> None:
    """pygls' message loop, framing errors survived (see the module docstring)."""
    stream = _Stream(reader)
    while not stop_event.is_set():
        try:
            length = await _header(stream)
        except FramingError as error:
            logger.warning("framing error: %s; skipping to the next Content-Length header", error)
            stream.push(error.line[1:])  # a header may follow in the same line, not at its start
            if not await _resynchronise(stream):
                return
            continue
        if length is None:
            return
        body = await stream.readexactly(length)
        if len(body) < length:
            logger.warning("input ended inside a message body (%d of %d bytes)", len(body), length)
            return
        try:
            message = json.loads(body, object_hook=protocol.structure_message)
        except RecursionError:
            logger.warning("a message nests deeper than the JSON parser goes; answered as an Invalid Request")
            protocol.send_error(_request_id(body), INVALID_REQUEST, "Invalid Request: the message nests too deeply")
            continue
        except ValueError as error:  # not JSON (or not UTF-8): perhaps a wrong Content-Length
            logger.warning("a message body is not JSON (%s)", error)
            protocol.send_error(None, PARSE_ERROR, f"Parse error: {error}")
            at = body.lower().find(_MARKER, 1)
            if at >= 0:
                stream.push(body[at:])  # the length was too large: read the next messages again
            continue
        try:
            protocol.handle_message(message)
        except Exception as error:  # noqa: BLE001 - a handler's fault is logged, the loop goes on
            logger.exception("unable to handle a message")
            if error_handler:
                error_handler(error, JsonRpcException)


def _request_id(body: bytes):
    """The top-level ``id`` of a body too deep to parse, found by scanning; None if none."""
    for match in _ID.finditer(body):
        if _depth(body, match.start()) == 1:
            try:
                return json.loads(match.group(1))
            except ValueError:
                return None
    return None


def _depth(body: bytes, end: int) -> int:
    """Bracket depth at ``end``, strings skipped."""
    depth, in_string, escaped = 0, False, False
    for byte in body[:end]:
        if in_string:
            if escaped:
                escaped = False
            elif byte == 0x5C:  # backslash
                escaped = True
            elif byte == 0x22:
                in_string = False
        elif byte == 0x22:
            in_string = True
        elif byte in (0x7B, 0x5B):
            depth += 1
        elif byte in (0x7D, 0x5D):
            depth -= 1
    return depth


class LatchwatchProtocol(LanguageServerProtocol):
    """pygls' protocol, answering bad input instead of dropping it (docs/language-server.md)."""

    @lsp_method(types.INITIALIZE)
    def lsp_initialize(self, params: types.InitializeParams):
        result = yield from super().lsp_initialize(params)
        if not supports_pull(params.capabilities):
            result.capabilities.diagnostic_provider = None  # pull is offered only to those who ask for it
        return result

    def send_error(self, msg_id, code: int, message: str) -> None:
        self._send_response(msg_id, error=types.ResponseError(code=code, message=message))

    def structure_message(self, data):
        try:
            return super().structure_message(data)
        except JsonRpcException as error:
            method = data.get("method")
            if "id" in data and method is not None:
                detail = error.__cause__ or error
                self.send_error(data["id"], error.code, f"{error.message} for {method}: {detail}")
            logger.warning("dropped a message that does not decode: %s", error)
            return IGNORED

    def handle_message(self, message):
        if message is IGNORED:
            return
        if not hasattr(message, "jsonrpc"):  # valid JSON, but not a JSON-RPC message object
            msg_id = message.get("id") if isinstance(message, dict) else None
            self.send_error(msg_id, INVALID_REQUEST, "Invalid Request: expected a JSON-RPC 2.0 message object")
            return
        method = getattr(message, "method", None)
        if self._shutdown and method not in (None, types.EXIT) and hasattr(message, "id"):
            self.send_error(message.id, INVALID_REQUEST, f"Invalid Request: {method} after shutdown")
            return
        super().handle_message(message)


def supports_pull(capabilities: types.ClientCapabilities) -> bool:
    """True when the client can pull diagnostics (textDocument/diagnostic)."""
    return bool(capabilities.text_document and capabilities.text_document.diagnostic is not None)
