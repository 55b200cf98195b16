"""``latchwatch serve --tcp``: loopback only, and only for a client that presents the token.

Whoever talks to the server can make it run scripts (a ``python`` setting, trusted
folders), so a TCP client must prove it was given the server's token. The token is
made per start (or taken from LATCHWATCH_TCP_TOKEN, for an editor that starts the
server itself) and, when made here, written to a file only the user can read
(TOKEN_FILE_MODE); the server says where on standard error. The client presents it in
its first message, ``initialize``, as ``initializationOptions.token`` (or
``initializationOptions.latchwatch.token``). Any other first message, a wrong or
missing token, or a header or body beyond the limits below gets an error reply and the
connection is closed; the server goes on listening. The token is taken out of the
message before the server sees it. Each authenticated connection ends the server, as
the end of standard input does.
"""

from __future__ import annotations

import asyncio
import hmac
import ipaddress
import json
import os
import secrets
import sys
from pathlib import Path

TOKEN_ENV = "LATCHWATCH_TCP_TOKEN"
TOKEN_FILE_MODE = 0o600
MIN_TOKEN_LENGTH = 16
_MAX_HEADER = 4096  # bytes of headers of the first message
_MAX_FIRST_BODY = 1 << 20  # bytes of the first message (an initialize request is a few KiB)
UNAUTHORISED = -32600  # JSON-RPC "invalid request": no token, or the wrong one


class TcpSetupError(Exception):
    """--tcp cannot be served as asked; the message says why."""


def loopback_address(host: str) -> str:
    """``host`` when it is a loopback address (or localhost); raises TcpSetupError otherwise."""
    if host == "localhost":
        return "127.0.0.1"
    try:
        address = ipaddress.ip_address(host.strip("[]"))
    except ValueError:
        raise TcpSetupError(f"--tcp: {host!r} is not an IP address; the server listens on loopback only "
                            f"(127.0.0.1, ::1 or localhost)") from None
    if not address.is_loopback:
        raise TcpSetupError(f"--tcp: {host} is not a loopback address: anyone who can reach the port could make "
                            f"the server run programs; use 127.0.0.1, ::1 or localhost")
    return str(address)


def server_token(port: int, folder: Path, env=os.environ) -> tuple[str, Path | None]:
    """(token, file it was written to): the environment's token, else a new one in a file of mode 0600."""
    given = env.get(TOKEN_ENV)
    if given is not None:
        if len(given) < MIN_TOKEN_LENGTH:
            raise TcpSetupError(f"{TOKEN_ENV} is shorter than {MIN_TOKEN_LENGTH} characters; use a random token")
        return given, None
    token = secrets.token_urlsafe(32)
    folder.mkdir(parents=True, exist_ok=True, mode=0o700)
    path = folder / f"serve-{port}.token"
    temporary = folder / f".serve-{port}.{os.getpid()}.token"
    fd = os.open(temporary, os.O_WRONLY | os.O_CREAT | os.O_EXCL, TOKEN_FILE_MODE)
    with os.fdopen(fd, "w") as out:
        out.write(token + "\n")
    os.replace(temporary, path)
    return token, path


def presented_token(message: object) -> object:
    """The token an initialize message presents (None when it presents none)."""
    if not isinstance(message, dict) or message.get("method") != "initialize":
        return None
    options = (message.get("params") or {}).get("initializationOptions")
    if not isinstance(options, dict):
        return None
    nested = options.get("latchwatch")
    return options.get("token", nested.get("token") if isinstance(nested, dict) else None)


def without_token(message: dict) -> dict:
    """The message as the server is to see it: the token removed."""
    options = dict(message["params"]["initializationOptions"])
    options.pop("token", None)
    if isinstance(options.get("latchwatch"), dict):
        options["latchwatch"] = {k: v for k, v in options["latchwatch"].items() if k != "token"}
    return {**message, "params": {**message["params"], "initializationOptions": options}}


def framed(message: dict) -> bytes:
    """``message`` with its Content-Length header, as on the wire."""
    body = json.dumps(message).encode("utf-8")
    return b"Content-Length: %d\r\n\r\n" % len(body) + body


async def read_first_message(reader: asyncio.StreamReader) -> dict:
    """The first message of a connection; ValueError when it is not one within the limits."""
    length, seen = None, 0
    while True:
        line = await reader.readline()
        seen += len(line)
        if not line or seen > _MAX_HEADER:
            raise ValueError("no complete header")
        if line in (b"\r\n", b"\n"):
            break
        name, _, value = line.decode("ascii", "replace").partition(":")
        if name.strip().lower() == "content-length":
            length = int(value.strip()) if value.strip().isdigit() else None
    if length is None or length > _MAX_FIRST_BODY:
        raise ValueError("no usable Content-Length")
    message = json.loads(await reader.readexactly(length))
    if not isinstance(message, dict):
        raise ValueError("not a JSON object")
    return message


class _Replayed:
    """A reader that yields ``first`` before what the connection sends next."""

    def __init__(self, first: bytes, reader: asyncio.StreamReader):
        self._buffer = bytearray(first)
        self._reader = reader

    async def readline(self) -> bytes:
        if self._buffer:
            end = self._buffer.find(b"\n")
            cut = len(self._buffer) if end < 0 else end + 1
            line = bytes(self._buffer[:cut])
            del self._buffer[:cut]
            return line if end >= 0 else line + await self._reader.readline()
        return await self._reader.readline()

    async def readexactly(self, count: int) -> bytes:
        taken = bytes(self._buffer[:count])
        del self._buffer[:count]
        return taken + (await self._reader.readexactly(count - len(taken)) if len(taken) < count else b"")


def serve_tcp(server, host: str, port: int, token_for) -> None:
    """Serve ``server`` (a pygls LanguageServer) to the first client that presents the
    token; ``token_for(port)`` makes it once the port is bound (port 0: any free one)."""
    import threading

    from pygls.io_ import run_async

    server._stop_event = stop_event = threading.Event()
    token = ""

    async def connection(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            message = await read_first_message(reader)
        except (ValueError, asyncio.IncompleteReadError, UnicodeDecodeError, ConnectionError):
            writer.close()
            return
        given = presented_token(message)
        if not token or not isinstance(given, str) or not hmac.compare_digest(given.encode(), token.encode()):
            writer.write(framed({"jsonrpc": "2.0", "id": message.get("id"), "error": {
                "code": UNAUTHORISED, "message": "latchwatch serve --tcp: the first message must be initialize "
                                                "with the server's token in initializationOptions.token"}}))
            await writer.drain()
            writer.close()
            return
        server.protocol.set_writer(writer)
        await run_async(stop_event=stop_event, reader=_Replayed(framed(without_token(message)), reader),
                        protocol=server.protocol, error_handler=server.report_server_error)
        server.shutdown()

    async def listen() -> None:
        nonlocal token
        server._server = await asyncio.start_server(connection, host, port)
        token = token_for(server._server.sockets[0].getsockname()[1])
        async with server._server:
            try:
                await server._server.serve_forever()
            except asyncio.CancelledError:
                pass

    asyncio.run(listen())


def token_folder(env=os.environ) -> Path:
    """Where a made token is written: the user's runtime folder, else the configuration folder."""
    from latchwatch.server.config.trust import config_dir

    runtime = env.get("XDG_RUNTIME_DIR", "")
    return Path(runtime) / "latchwatch" if runtime and os.path.isabs(runtime) else config_dir(env)


def serve_with_token(server, host: str, port: int) -> int:
    """``serve --tcp``: check the address, make the token, serve, remove the token file; the exit status."""
    try:
        address = loopback_address(host)
    except TcpSetupError as error:
        print(f"latchwatch: {error}", file=sys.stderr)
        return 2
    written: list[Path] = []

    def token_for(bound_port: int) -> str:
        token, path = server_token(bound_port, token_folder())
        if path is not None:
            written.append(path)
        where = f"in {path} (mode 0600)" if path is not None else f"from {TOKEN_ENV}"
        print(f"latchwatch serve: listening on {address}:{bound_port}; a client presents the token {where} as "
              f"initializationOptions.token", file=sys.stderr, flush=True)
        return token

    try:
        serve_tcp(server, address, port, token_for)
    except TcpSetupError as error:
        print(f"latchwatch: {error}", file=sys.stderr)
        return 2
    finally:
        for path in written:
            path.unlink(missing_ok=True)
    return 0
