"""The metrics port's HTTP server: a trio task beside the daemon's loops, no thread.

Why a trio task: the collectors read the cores' plain dicts and counters, which only the trio
thread changes; answered from that same thread, a scrape can never see a dict in the middle of a
change ("dictionary changed size during iteration" under flow churn), and nothing is locked.  The
cost is that rendering a scrape (a few milliseconds) runs between two batches of datagrams rather
than beside them, which under the GIL it never really did.

Why bounded: every connection costs a file descriptor from the budget the receiver's per-flow
sockets also draw on (:mod:`fecproxy.shell.fdlimit`).  So at most :data:`MAX_CONNECTIONS` are
open at once, each gets :data:`CONNECTION_TIMEOUT_S` for its whole exchange, a request head is at
most :data:`MAX_HEAD_BYTES`, and when the cap is reached a new connection pushes out the oldest
one still waiting for its request (an idle connection never locks Prometheus out).  One request
per connection, answered with ``Connection: close``: no idle keep-alive connection stays open.

The application is a WSGI callable (prometheus-client's /metrics app wrapped by the status
page's, :func:`fecproxy.shell.status.status_app`), called synchronously: it never blocks on I/O.
"""

from __future__ import annotations

import errno
import io
import logging
import socket
import sys
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from urllib.parse import unquote

import trio

from fecproxy.shell.logs import log_event, log_exception

log = logging.getLogger("fecproxy.shell.metrics")

#: Connections served at once.  Prometheus keeps one per target, a status page one per poll, so a
#: handful suffices; 32 leaves room for several scrapers and browsers and stays well inside the
#: descriptors reserved beside the flow sockets (fdlimit.FD_RESERVE = 64) (common practice, no
#: source).
MAX_CONNECTIONS = 32
#: From accept to the last byte of the answer.  Prometheus' default scrape_timeout is 10 s (from
#: memory); a client slower than that has given up already.
CONNECTION_TIMEOUT_S = 10.0
#: A request line and headers larger than this are refused (431): a scraper sends a few hundred
#: bytes; browsers with cookies for the host a few KiB (common practice, no source).
MAX_HEAD_BYTES = 16 * 1024
#: accept() errors that mean "out of descriptors or memory right now": wait this long and retry
#: (socket accept(2): EMFILE, ENFILE, ENOBUFS, ENOMEM) instead of spinning or ending the server.
ACCEPT_RETRY_S = 0.1
_RESOURCE_ERRORS = frozenset({errno.EMFILE, errno.ENFILE, errno.ENOBUFS, errno.ENOMEM})
#: Listen backlog: connections the kernel queues before we accept them (not our descriptors).
BACKLOG = 64
_READ_BYTES = 4096

WsgiApp = Callable[[dict, Callable], Iterable[bytes]]


@dataclass
class ServerStats:
    """What the server did, for tests and the ``stopped`` story; plain ints, trio thread only."""

    accepted: int = 0
    answered: int = 0
    evicted: int = 0  # pushed out by a newer connection while waiting for their request
    timed_out: int = 0
    malformed: int = 0
    accept_errors: int = 0


class _Connection:
    __slots__ = ("scope", "waiting")

    def __init__(self) -> None:
        self.scope = trio.CancelScope()
        self.waiting = True  # still reading its request


def open_listener(host: str, port: int) -> socket.socket:
    """A bound, listening, non-blocking TCP socket (synchronous, so the caller can name the config
    key when it fails).  Raises OSError when the address cannot be resolved or bound."""
    family, _, _, _, address = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)[0]
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind(address)
        sock.listen(BACKLOG)
        sock.setblocking(False)
    except OSError:
        sock.close()
        raise
    return sock


class HttpServer:
    """Serves ``app`` on a listening socket from :meth:`run` (a task in the owner's nursery) until
    that task is cancelled or :meth:`stop` is called."""

    def __init__(self, sock: socket.socket, app: WsgiApp):
        self._sock = trio.socket.from_stdlib_socket(sock)
        self.app = app
        self.address: tuple[str, int] = sock.getsockname()[:2]
        self.port: int = self.address[1]
        self.stats = ServerStats()
        self._connections: dict[_Connection, None] = {}  # insertion order = age
        self._scope = trio.CancelScope()

    def stop(self) -> None:
        """End the server task (if running) and close the listening socket."""
        self._scope.cancel()
        self._sock.close()

    @property
    def open_connections(self) -> int:
        return len(self._connections)

    async def run(self, *, task_status: trio.TaskStatus[None] = trio.TASK_STATUS_IGNORED) -> None:
        with self._scope:
            try:
                async with trio.open_nursery() as nursery:
                    task_status.started()
                    while True:
                        client = await self._accept()
                        if client is None:
                            continue
                        self.stats.accepted += 1
                        if len(self._connections) >= MAX_CONNECTIONS and not self._evict_oldest_waiting():
                            client.close()  # every slot is answering: this one must retry
                            continue
                        connection = _Connection()
                        self._connections[connection] = None
                        nursery.start_soon(self._serve, client, connection)
            finally:
                self._sock.close()

    async def _accept(self) -> trio.socket.SocketType | None:
        try:
            client, _ = await self._sock.accept()
        except OSError as error:
            if error.errno not in _RESOURCE_ERRORS:
                if error.errno in (errno.ECONNABORTED, errno.EPROTO, errno.EPERM):
                    return None  # the client gave up between SYN and accept
                raise
            self.stats.accept_errors += 1
            if self.stats.accept_errors == 1 or self.stats.accept_errors % 100 == 0:
                log_event(
                    log, logging.WARNING, "metrics_accept_failed", error=str(error), count=self.stats.accept_errors
                )
            await trio.sleep(ACCEPT_RETRY_S)
            return None
        return client

    def _evict_oldest_waiting(self) -> bool:
        for connection in self._connections:
            if connection.waiting:
                connection.waiting = False
                connection.scope.cancel()
                del self._connections[connection]
                self.stats.evicted += 1
                return True
        return False

    async def _serve(self, client: trio.socket.SocketType, connection: _Connection) -> None:
        try:
            with connection.scope:
                connection.scope.deadline = trio.current_time() + CONNECTION_TIMEOUT_S
                head = await _read_head(client)
                connection.waiting = False
                if head is None:
                    self.stats.malformed += 1
                    await _send_all(client, _simple_response("431 Request Header Fields Too Large"))
                    return
                reply = self._answer(head)
                await _send_all(client, reply)
                self.stats.answered += 1
            if connection.scope.cancelled_caught and connection in self._connections:
                self.stats.timed_out += 1
        except OSError:
            pass  # the client went away; nothing to tell anyone
        finally:
            self._connections.pop(connection, None)
            client.close()

    def _answer(self, head: bytes) -> bytes:
        try:
            request_line, *header_lines = head.decode("latin-1").split("\r\n")
            method, target, version = request_line.split(" ")
            if not version.startswith("HTTP/"):
                raise ValueError(version)
        except ValueError:
            self.stats.malformed += 1
            return _simple_response("400 Bad Request")
        path, _, query = target.partition("?")
        environ: dict = {
            "REQUEST_METHOD": method,
            "PATH_INFO": unquote(path),
            "QUERY_STRING": query,
            "SERVER_NAME": str(self.address[0]),
            "SERVER_PORT": str(self.port),
            "SERVER_PROTOCOL": version,
            "SCRIPT_NAME": "",
            "wsgi.version": (1, 0),
            "wsgi.url_scheme": "http",
            "wsgi.input": io.BytesIO(b""),
            "wsgi.errors": sys.stderr,
            "wsgi.multithread": False,
            "wsgi.multiprocess": False,
            "wsgi.run_once": False,
        }
        for line in header_lines:
            name, sep, value = line.partition(":")
            if sep:
                environ["HTTP_" + name.strip().upper().replace("-", "_")] = value.strip()
        return _call_wsgi(self.app, environ, head_only=method == "HEAD")


async def _read_head(client: trio.socket.SocketType) -> bytes | None:
    """The request line and headers (without the blank line); None when they are too large."""
    data = b""
    while b"\r\n\r\n" not in data:
        if len(data) > MAX_HEAD_BYTES:
            return None
        chunk = await client.recv(_READ_BYTES)
        if not chunk:
            raise ConnectionResetError("closed before the end of the request head")
        data += chunk
    head = data.split(b"\r\n\r\n", 1)[0]
    return head if len(head) <= MAX_HEAD_BYTES else None


async def _send_all(client: trio.socket.SocketType, data: bytes) -> None:
    view = memoryview(data)
    while view:
        sent = await client.send(view)
        view = view[sent:]


def _simple_response(status: str) -> bytes:
    body = status.encode() + b"\n"
    return _format(status, [("Content-Type", "text/plain")], body)


def _format(status: str, headers: list[tuple[str, str]], body: bytes) -> bytes:
    names = {name.lower() for name, _ in headers}
    if "content-length" not in names:
        headers = [*headers, ("Content-Length", str(len(body)))]
    lines = [f"HTTP/1.1 {status}", *(f"{name}: {value}" for name, value in headers), "Connection: close", "", ""]
    return "\r\n".join(lines).encode("latin-1") + body


def _call_wsgi(app: WsgiApp, environ: dict, *, head_only: bool) -> bytes:
    started: list = []

    def start_response(status: str, headers: list[tuple[str, str]], exc_info=None) -> Callable:
        started[:] = [status, headers]
        return lambda data: None  # the write() callable of PEP 3333; our apps never use it

    try:
        result = app(environ, start_response)
        try:
            body = b"".join(result)
        finally:
            close = getattr(result, "close", None)
            if close is not None:
                close()
    except Exception:  # a collector bug costs this answer, never the server or the daemon
        log_exception(log, "metrics_request_failed", path=environ["PATH_INFO"])
        return _simple_response("500 Internal Server Error")
    status, headers = started
    reply = _format(status, list(headers), body)
    return reply[: len(reply) - len(body)] if head_only else reply
