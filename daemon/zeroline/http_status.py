"""The daemon's HTTP listener: status page, /health, /ready, /metrics and /api/channels.

Approach. The standard library's `ThreadingHTTPServer` (one daemon thread per connection)
serves a handful of read-only GET routes. The routing and authorisation live in `_Routes`,
a plain function of (method, target, Authorization header) → `Response` with no sockets,
so they read, and test, like a table. The request handler around it only guards the wire:

- the request line is read with a limit (414 beyond `MAX_REQUEST_LINE`), the header block
  too (431 beyond `MAX_HEADER_BYTES`), before the standard library parses them;
- a socket timeout (`SOCKET_TIMEOUT`) ends slow or half-open clients, and at most
  `MAX_CONNECTIONS` are served at once (503 beyond): a burst of bad clients cannot exhaust
  the daemon's threads;
- one request per connection (HTTP/1.0 semantics): the page polls every few seconds, so
  keep-alive buys nothing and closing keeps every connection's life short and bounded;
- any exception in a route becomes a one-line JSON 500 and is logged, rate-limited; the
  server thread never dies of a request.

Data comes only through the `StatusSource` seam (`zeroline.status`): the HTTP threads never
touch a channel. With a token file, every path except `/health` (liveness probes carry no
credentials) and `/` needs `Authorization: Bearer <token>`, compared in constant time. The
page itself is exempt because a browser cannot send a bearer header when it navigates: the
page is the same static file for everyone and holds no data; it asks for the token, keeps it
in the tab's sessionStorage and sends it with every `/api` request. The token is read once at
start and never logged (the request log has the request line only, never headers).

Every response carries `Cache-Control: no-store`, `X-Content-Type-Options: nosniff` and a
Content-Security-Policy that allows the page's inline script and style and nothing external.
"""

from __future__ import annotations

import hmac
import io
import json
import logging
import math
import socket
import sys
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, unquote, urlsplit

from prometheus_client.exposition import choose_encoder
from prometheus_client.registry import CollectorRegistry

from zeroline.errors import ConfigError
from zeroline.metrics import metrics_registry
from zeroline.status import Metric, StatusSource

log = logging.getLogger(__name__)

DEFAULT_LISTEN = "127.0.0.1:8470"
MAX_REQUEST_LINE = 8 * 1024
MAX_HEADER_BYTES = 16 * 1024
MAX_CONNECTIONS = 32
SOCKET_TIMEOUT = 10.0
DRAIN_LIMIT = 1024 * 1024  # unread request bytes discarded after a 414/431, so the client
DRAIN_TIMEOUT = 1.0  # reads our answer instead of a connection reset
STOP_POLL = 0.05  # seconds: how soon stop() is noticed by the serving loop
LOG_EVERY = 60.0  # seconds between two log lines about the same kind of failure
LOOPBACK = frozenset({"127.0.0.1", "localhost", "::1"})
PAGE_RESOURCE = "status_page.html"
JSON_TYPE = "application/json"

SECURITY_HEADERS = (
    ("Cache-Control", "no-store"),
    (
        "Content-Security-Policy",
        "default-src 'self'; script-src 'self' 'unsafe-inline'; "
        "style-src 'unsafe-inline'; img-src data:",
    ),
    ("X-Content-Type-Options", "nosniff"),
    ("Referrer-Policy", "no-referrer"),
)
READ_METHODS = ("GET", "HEAD")
#: Methods HTTP defines; anything else is answered 501 (not implemented) rather than 405.
KNOWN_METHODS = frozenset({"POST", "PUT", "DELETE", "PATCH", "OPTIONS", "TRACE", "CONNECT"})
#: The status codes this server sends, so the response counter's label set is bounded.
STATUS_CODES = (200, 400, 401, 404, 405, 414, 431, 500, 501, 503, 505)


@dataclass(frozen=True)
class Response:
    """What one request gets: status, body, content type and extra headers."""

    status: int
    body: bytes
    content_type: str = JSON_TYPE
    headers: tuple[tuple[str, str], ...] = ()

    @classmethod
    def json(cls, status: int, data: Any, headers: tuple[tuple[str, str], ...] = ()) -> Response:
        text = json.dumps(_json_safe(data), allow_nan=False, separators=(",", ":"))
        return cls(status, text.encode() + b"\n", JSON_TYPE, headers)

    @classmethod
    def error(cls, status: int, message: str, **headers: str) -> Response:
        return cls.json(status, {"error": message}, tuple(headers.items()))


class StatusServer:
    """A running HTTP listener; `stop()` closes it. Returned by `start_http_server`."""

    def __init__(self, server: _Server, thread: threading.Thread) -> None:
        self._server = server
        self._thread = thread
        self.host: str = str(server.server_address[0])
        self.port: int = int(server.server_address[1])

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"http://{host}:{self.port}"

    def metrics(self) -> list[Metric]:
        """The listener's own counters (responses by status code)."""
        return self._server.counter.metrics()

    def stop(self) -> None:
        """Stop accepting, close the socket and wait for the serving thread (not clients)."""
        self._server.shutdown()
        self._server.server_close()
        self._thread.join(timeout=5.0)


def start_http_server(
    source: StatusSource,
    listen: str = DEFAULT_LISTEN,
    token_file: str | Path | None = None,
) -> StatusServer:
    """Serve `source` on `listen` ("host:port"; port 0 picks a free one) in a daemon thread.

    Raises `ConfigError` for a bad address, an unreadable or empty token file, a port that
    cannot be bound, or a non-loopback address without a token file.
    """
    host, port = parse_listen(listen)
    token = read_token(token_file) if token_file is not None else None
    if token is None and host not in LOOPBACK:
        raise ConfigError(
            f"listening on {host} beyond loopback needs a bearer token file; "
            "set http.token_file or listen on 127.0.0.1",
            "http.listen",
        )
    counter = ResponseCounter()
    routes = _Routes(source, token, metrics_registry(source.metrics, counter.metrics))
    server_class = _Server6 if ":" in host else _Server
    try:
        server = server_class((host, port), _Handler)
    except OSError as error:
        raise ConfigError(
            f"cannot listen on {listen}: {error.strerror or error}; "
            "choose a free port or another address",
            "http.listen",
        ) from None
    server.routes, server.counter = routes, counter
    thread = threading.Thread(
        target=server.serve_forever,
        kwargs={"poll_interval": STOP_POLL},
        name="zeroline-http",
        daemon=True,
    )
    thread.start()
    log.info("status page on http://%s:%d/", host, server.server_address[1])
    return StatusServer(server, thread)


def parse_listen(text: str) -> tuple[str, int]:
    """Split "host:port" (or "[v6]:port") into its parts, with a clear error otherwise.

    >>> parse_listen("127.0.0.1:8470")
    ('127.0.0.1', 8470)
    >>> parse_listen("[::1]:0")
    ('::1', 0)
    """
    host, sep, port_text = text.rpartition(":")
    host = host[1:-1] if host.startswith("[") and host.endswith("]") else host
    if not sep or not host or not port_text.isdigit() or int(port_text) > 65535:
        raise ConfigError(
            f"{text!r} is not an address; write host:port, e.g. 127.0.0.1:8470", "http.listen"
        )
    return host, int(port_text)


def read_token(path: str | Path) -> bytes:
    """The bearer token: the file's content without surrounding whitespace."""
    try:
        token = Path(path).read_bytes().strip()
    except OSError as error:
        raise ConfigError(
            f"cannot read the token file {str(path)!r}: {error.strerror or error}; "
            "give a readable file holding the token",
            "http.token_file",
        ) from None
    if not token:
        raise ConfigError(
            f"the token file {str(path)!r} is empty; put the bearer token in it",
            "http.token_file",
        )
    return token


class ResponseCounter:
    """Responses sent, by status code (thread-safe), exported as a counter."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._counts = dict.fromkeys(STATUS_CODES, 0)

    def count(self, status: int) -> None:
        with self._lock:
            self._counts[status] = self._counts.get(status, 0) + 1

    def metrics(self) -> list[Metric]:
        with self._lock:
            counts = dict(self._counts)
        return [
            Metric(
                "zeroline_http_responses_total",
                "HTTP responses sent by the status listener, by status code.",
                "counter",
                float(n),
                {"code": str(code)},
            )
            for code, n in sorted(counts.items())
        ]


class Throttle:
    """Says whether a log line about `key` may be written now (at most one per interval)."""

    def __init__(self, interval: float = LOG_EVERY) -> None:
        self._interval = interval
        self._lock = threading.Lock()
        self._last: dict[str, float] = {}
        self._suppressed: dict[str, int] = {}

    def allow(self, key: str) -> int | None:
        """None: stay quiet; else the number of lines suppressed since the last one."""
        now = time.monotonic()
        with self._lock:
            last = self._last.get(key)
            if last is not None and now - last < self._interval:
                self._suppressed[key] = self._suppressed.get(key, 0) + 1
                return None
            self._last[key] = now
            return self._suppressed.pop(key, 0)


_throttle = Throttle()


def log_throttled(key: str, message: str, *args: object) -> None:
    """Log `message` at ERROR unless the same `key` was logged within `LOG_EVERY`."""
    suppressed = _throttle.allow(key)
    if suppressed is not None:
        suffix = f" ({suppressed} similar suppressed)" if suppressed else ""
        log.error(message + suffix, *args)


@dataclass(frozen=True)
class _Request:
    """What a route may read of a request: its query parameters and Accept header."""

    query: Mapping[str, list[str]]
    accept: str


Route = Callable[[_Request], Response]


@dataclass
class _Routes:
    """The URL table: which path gives what, and who may ask for it."""

    source: StatusSource
    token: bytes | None
    registry: CollectorRegistry
    page: bytes = field(default_factory=lambda: load_page())

    def respond(self, method: str, target: str, authorization: str, accept: str) -> Response:
        """The response to one parsed request (two of its headers); never raises."""
        try:
            return self._respond(method, target, authorization, accept)
        except Exception as error:  # a route's bug must not end the server
            log_throttled(
                f"route:{type(error).__name__}",
                "status listener: %s %s failed: %s: %s",
                method,
                urlsplit(target).path[:200],
                type(error).__name__,
                error,
            )
            return Response.error(500, f"internal error while answering: {type(error).__name__}")

    def _respond(self, method: str, target: str, authorization: str, accept: str) -> Response:
        parts = urlsplit(target)
        path = parts.path
        if path not in ("/", "/health") and not self._authorised(authorization):
            return self._unauthorised(authorization)
        route, allowed = self._route(path)
        if route is None:
            return Response.error(
                404,
                f"no such path {path[:200]!r}; try /, /health, /ready, /metrics, "
                "/api/channels or /api/channels/<name>",
            )
        if method not in READ_METHODS:
            if method in KNOWN_METHODS:
                return Response.error(
                    405, f"{method} is not allowed here; use GET", Allow=", ".join(READ_METHODS)
                )
            return Response.error(501, f"method {method[:40]!r} is not implemented; use GET")
        query = parse_qs(parts.query, keep_blank_values=True)
        unknown = sorted(set(query) - set(allowed))
        if unknown:
            expected = ", ".join(allowed) if allowed else "no query parameters"
            return Response.error(
                400, f"unknown query parameter {unknown[0][:40]!r}; {path} takes {expected}"
            )
        if any(len(values) > 1 for values in query.values()):
            return Response.error(400, "a query parameter is given twice; give it once")
        return route(_Request(query, accept))

    def _route(self, path: str) -> tuple[Route | None, tuple[str, ...]]:
        fixed: dict[str, tuple[Route, tuple[str, ...]]] = {
            "/": (self._page, ()),
            "/health": (self._health, ()),
            "/ready": (self._ready, ()),
            "/metrics": (self._metrics, ()),
            "/api/channels": (self._channels, ("recent",)),
        }
        if path in fixed:
            return fixed[path]
        prefix = "/api/channels/"
        if path.startswith(prefix) and len(path) > len(prefix):
            name = unquote(path[len(prefix) :])
            return (lambda request: self._channel(name, request)), ("recent",)
        return None, ()

    def _authorised(self, authorization: str) -> bool:
        if self.token is None:
            return True
        scheme, _, given = authorization.strip().partition(" ")
        if scheme.lower() != "bearer":
            return False
        # compare_digest takes the same time wherever the first difference is.
        return hmac.compare_digest(given.strip().encode("latin-1", "replace"), self.token)

    @staticmethod
    def _unauthorised(authorization: str) -> Response:
        if authorization:
            challenge = 'Bearer realm="zeroline", error="invalid_token"'
            message = "the bearer token is wrong; send Authorization: Bearer <token from the file>"
        else:
            challenge = 'Bearer realm="zeroline"'
            message = "a bearer token is needed; send Authorization: Bearer <token>"
        return Response.error(401, message, **{"WWW-Authenticate": challenge})

    def _page(self, request: _Request) -> Response:
        return Response(200, self.page, "text/html; charset=utf-8")

    def _health(self, request: _Request) -> Response:
        return Response.json(200, {"status": "ok", **self.source.health()})

    def _ready(self, request: _Request) -> Response:
        ready, details = self.source.readiness()
        return Response.json(200 if ready else 503, {"ready": bool(ready), **details})

    def _metrics(self, request: _Request) -> Response:
        encoder, content_type = choose_encoder(request.accept)
        return Response(200, encoder(self.registry), content_type)

    def _channels(self, request: _Request) -> Response:
        recent = _flag(request.query, "recent", default=False)
        if isinstance(recent, Response):
            return recent
        statuses = [self.source.channel_status(name) for name in self.source.channel_names()]
        return Response.json(
            200,
            {
                "time": time.time(),
                "channels": [s.to_json(with_recent=recent) for s in statuses if s is not None],
            },
        )

    def _channel(self, name: str, request: _Request) -> Response:
        recent = _flag(request.query, "recent", default=True)
        if isinstance(recent, Response):
            return recent
        status = self.source.channel_status(name)
        if status is None:
            return Response.error(
                404, f"no channel named {name[:200]!r}; /api/channels lists the channels"
            )
        return Response.json(200, status.to_json(with_recent=recent))


def _flag(query: Mapping[str, list[str]], name: str, default: bool) -> bool | Response:
    if name not in query:
        return default
    value = query[name][0].lower()
    if value in ("1", "true", "yes"):
        return True
    if value in ("0", "false", "no"):
        return False
    return Response.error(400, f"{name}={value[:40]!r} is not a flag; write {name}=true or false")


def load_page() -> bytes:
    """The status page, shipped as package data beside this module."""
    return resources.files("zeroline").joinpath(PAGE_RESOURCE).read_bytes()


def _json_safe(data: Any) -> Any:
    """JSON has no NaN or infinity: they become null (a missing value), tuples lists."""
    if isinstance(data, float):
        return data if math.isfinite(data) else None
    if isinstance(data, Mapping):
        return {str(k): _json_safe(v) for k, v in data.items()}
    if isinstance(data, (list, tuple)):
        return [_json_safe(v) for v in data]
    return data


class _Server(ThreadingHTTPServer):
    """One daemon thread per connection, at most MAX_CONNECTIONS at a time."""

    daemon_threads = True
    block_on_close = False  # stop() must not wait for a slow client's timeout
    request_queue_size = 64
    routes: _Routes
    counter: ResponseCounter

    def __init__(self, address: tuple[str, int], handler: type[BaseHTTPRequestHandler]) -> None:
        self._slots = threading.BoundedSemaphore(MAX_CONNECTIONS)
        super().__init__(address, handler)

    def process_request(self, request: Any, client_address: Any) -> None:
        if not self._slots.acquire(blocking=False):
            self.counter.count(503)  # before the answer goes out, as in `_send`
            _refuse_busy(request)
            self.shutdown_request(request)
            return
        try:
            super().process_request(request, client_address)
        except BaseException:
            self._slots.release()
            raise

    def process_request_thread(self, request: Any, client_address: Any) -> None:
        try:
            super().process_request_thread(request, client_address)
        finally:
            self._slots.release()

    def handle_error(self, request: Any, client_address: Any) -> None:
        # The default prints a traceback to stderr; a client that vanished mid-answer is
        # routine, anything else is logged once a minute per kind.
        error = sys.exc_info()[1]
        if isinstance(error, (ConnectionError, TimeoutError)):
            return
        log_throttled(
            f"conn:{type(error).__name__}",
            "status listener: connection failed: %s: %s",
            type(error).__name__,
            error,
        )


class _Server6(_Server):
    address_family = socket.AF_INET6


def _refuse_busy(request: socket.socket) -> None:
    body = b'{"error":"too many connections; retry in a few seconds"}\n'
    head = (
        "HTTP/1.0 503 Service Unavailable\r\nContent-Type: application/json\r\n"
        f"Content-Length: {len(body)}\r\nRetry-After: 5\r\nConnection: close\r\n\r\n"
    )
    try:
        request.settimeout(1.0)
        request.sendall(head.encode() + body)
    except OSError:
        pass


class _Handler(BaseHTTPRequestHandler):
    """Reads one bounded request, asks `_Routes`, writes the answer; one per connection."""

    server: _Server
    timeout = SOCKET_TIMEOUT
    protocol_version = "HTTP/1.0"
    default_request_version = "HTTP/1.0"  # never answer in HTTP/0.9 style (no status line)

    def handle_one_request(self) -> None:
        self.close_connection = True
        self.command, self.request_version = "", self.default_request_version
        self.requestline = ""
        try:
            line = self.rfile.readline(MAX_REQUEST_LINE + 1)
            if not line:
                return
            if len(line) > MAX_REQUEST_LINE:
                self.send_error(414, f"request line longer than {MAX_REQUEST_LINE} bytes")
                self._drain()
                return
            if not _looks_like_request_line(line):
                # Garbage (a TLS hello, a port scanner) is refused at once instead of
                # waiting for a header block that will never come.
                self.send_error(400, "malformed request line; expected e.g. GET / HTTP/1.1")
                self._drain()
                return
            head = _read_head(self.rfile)
            if head is None:
                self.send_error(431, f"request headers longer than {MAX_HEADER_BYTES} bytes")
                self._drain()
                return
            self.raw_requestline = line
            wire, self.rfile = self.rfile, io.BytesIO(head)
            try:
                parsed = self.parse_request()
            finally:
                self.rfile = wire
            if parsed:
                headers = self.headers
                self._send(
                    self.server.routes.respond(
                        self.command,
                        self.path,
                        headers.get("Authorization", ""),
                        headers.get("Accept", ""),
                    )
                )
            self.wfile.flush()
        except TimeoutError:
            log.debug("status listener: client %s timed out", self.client_address[0])

    def send_error(self, code: int, message: str | None = None, explain: str | None = None) -> None:
        """Errors found while parsing (400, 414, 431, 505...) get the same JSON body."""
        self._send(Response.error(int(code), message or HTTPStatus(code).phrase))

    def _send(self, response: Response) -> None:
        # Counted before the first byte goes out: a client that has read this
        # answer and asks /metrics at once must find it counted (the handler
        # thread may not run again before the next request is served).
        self.server.counter.count(response.status)
        self.send_response(response.status)
        for name, value in (*SECURITY_HEADERS, *response.headers):
            self.send_header(name, value)
        self.send_header("Content-Type", response.content_type)
        self.send_header("Content-Length", str(len(response.body)))
        self.send_header("Connection", "close")
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(response.body)

    def _drain(self) -> None:
        """Read and drop what the client is still sending, so it sees our answer."""
        self.wfile.flush()
        try:
            self.connection.shutdown(socket.SHUT_WR)
            self.connection.settimeout(DRAIN_TIMEOUT)
            left = DRAIN_LIMIT
            while left > 0:
                chunk = self.connection.recv(min(65536, left))
                if not chunk:
                    break
                left -= len(chunk)
        except OSError:
            pass

    def version_string(self) -> str:
        return "zeroline"

    def log_message(self, format: str, *args: Any) -> None:
        # The request line only (never headers, so never the token), at DEBUG: a gateway's
        # log must not fill up with every poll of the page.
        log.debug("status listener: %s %s", self.address_string(), format % args)


def _looks_like_request_line(line: bytes) -> bool:
    """METHOD SP target SP HTTP/x.y, in printable ASCII; the details are parse_request's."""
    words = line.rstrip(b"\r\n").split(b" ")
    return (
        len(words) == 3
        and words[0].isalpha()
        and words[1].startswith((b"/", b"*", b"http"))
        and words[2].startswith(b"HTTP/")
        and all(32 < byte < 127 for byte in b"".join(words))
    )


def _read_head(rfile: io.BufferedIOBase) -> bytes | None:
    """The header block up to and including its blank line; None if over the limit."""
    lines: list[bytes] = []
    size = 0
    while True:
        line = rfile.readline(MAX_HEADER_BYTES - size + 1)
        size += len(line)
        if size > MAX_HEADER_BYTES:
            return None
        lines.append(line)
        if line in (b"\r\n", b"\n", b""):
            return b"".join(lines)
