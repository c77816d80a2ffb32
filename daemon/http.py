"""HTTP endpoints: ``/metrics``, ``/healthz`` and ``/readyz`` on one small server.

prometheus_client's ``start_http_server`` binds ``0.0.0.0`` unless told
otherwise and answers every path with metrics, so a health probe pointed at
it would always see 200. Here one WSGI application routes the three paths
and answers 404 for any other, and :class:`MetricsServer` binds exactly the
configured address (the config's default is ``127.0.0.1:9108``).

``/metrics``
    prometheus_client's exposition (text format, or OpenMetrics when the
    scraper asks for it; gzip when accepted).
``/healthz``
    Liveness: 200 while the worker loop has ticked recently, else 503.
``/readyz``
    Readiness: 200 once state is restored and the broker connection is up,
    else 503.

Both health bodies are small JSON objects, ``{"live": true, "detail": {...}}``
and ``{"ready": false, "detail": {...}}``, whose detail says why. Only GET and
HEAD are allowed (405 otherwise, with an ``Allow`` header). The application
never raises: a failing health callable or collector gives a 500 or 503 and
a logged traceback. Request lines are logged at debug level only.

References
----------
PEP 3333, *Python Web Server Gateway Interface v1.0.1*.
RFC 9110, *HTTP Semantics*, sections 9.3.2 (HEAD), 15.5.5 (404), 15.5.6
(405 and the Allow header).
"""

from __future__ import annotations

import errno
import json
import logging
import socket
import threading
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from socketserver import TCPServer, ThreadingMixIn
from types import MappingProxyType
from typing import Any, Final
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer
from wsgiref.types import StartResponse, WSGIApplication, WSGIEnvironment

from prometheus_client import CollectorRegistry, make_wsgi_app

__all__ = ["Health", "MetricsServer", "judge_health", "make_app"]

_log = logging.getLogger(__name__)

_ALLOWED: Final = ("GET", "HEAD")
_REQUEST_TIMEOUT_S: Final = 10.0  # an idle or slow client gives up its thread after this
_POLL_INTERVAL_S: Final = 0.1  # how long stop() may wait for the serving loop to notice
_BIND_HINTS: Final = {
    errno.EADDRINUSE: "address already in use (another process listens on that port)",
    errno.EACCES: "permission denied (ports below 1024 need privileges)",
    errno.EADDRNOTAVAIL: "address not available (no interface of this host has it)",
}


@dataclass(frozen=True)
class Health:
    """Liveness and readiness of the daemon, with the facts behind them.

    Parameters
    ----------
    live : bool
        Whether the worker loop is running (answers ``/healthz``).
    ready : bool
        Whether the daemon does its job: state restored and broker connected
        (answers ``/readyz``).
    detail : Mapping[str, object]
        JSON-compatible facts, e.g. ``{"connected": False, "restored": True,
        "last_tick_age_s": 0.4}``; other values are rendered with ``str``.
    """

    live: bool
    ready: bool
    detail: Mapping[str, object] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "detail", MappingProxyType(dict(self.detail)))


def judge_health(
    *,
    now_s: float,
    last_tick_s: float | None,
    max_tick_age_s: float,
    restored: bool,
    connected: bool,
) -> Health:
    """Judge liveness from the worker's last tick, and readiness from state and connection.

    Parameters
    ----------
    now_s : float
        Current time, on the same clock as ``last_tick_s`` (monotonic).
    last_tick_s : float or None
        When the worker loop last went round; ``None`` before its first round.
    max_tick_age_s : float
        Oldest tick that still counts as live, > 0.
    restored : bool
        Whether state has been restored from the checkpoint (or started cold).
    connected : bool
        Whether the broker connection is up.

    Returns
    -------
    Health
        ``live`` when the last tick is at most ``max_tick_age_s`` old,
        ``ready`` when restored and connected; ``detail`` holds the inputs and
        the tick age in seconds (``None`` before the first tick).

    Raises
    ------
    ValueError
        If ``max_tick_age_s`` is not a positive number.

    Examples
    --------
    >>> judge_health(now_s=100.0, last_tick_s=99.5, max_tick_age_s=30.0,
    ...              restored=True, connected=False).ready
    False
    """
    if not max_tick_age_s > 0.0:
        raise ValueError(f"max_tick_age_s must be > 0, got {max_tick_age_s!r}")
    age = None if last_tick_s is None else now_s - last_tick_s
    return Health(
        live=age is not None and age <= max_tick_age_s,
        ready=restored and connected,
        detail={
            "last_tick_age_s": None if age is None else round(age, 3),
            "max_tick_age_s": max_tick_age_s,
            "restored": restored,
            "connected": connected,
        },
    )


_Response = tuple[str, list[tuple[str, str]], bytes]


def make_app(registry: CollectorRegistry, health: Callable[[], Health]) -> WSGIApplication:
    """Build the WSGI application serving metrics, liveness and readiness.

    Parameters
    ----------
    registry : CollectorRegistry
        Registry exposed at ``/metrics``.
    health : callable
        Called on each ``/healthz`` or ``/readyz`` request, from the HTTP
        thread; returns the current :class:`Health`. It must not block.

    Returns
    -------
    WSGIApplication
        The application; it never raises.
    """
    metrics_app: WSGIApplication = make_wsgi_app(registry)

    def metrics(environ: WSGIEnvironment) -> _Response:
        # prometheus_client's app answers HEAD with 405, so ask it for GET and
        # let the caller drop the body.
        return _call(metrics_app, {**environ, "REQUEST_METHOD": "GET"})

    def probe(key: str) -> Callable[[WSGIEnvironment], _Response]:
        def answer(environ: WSGIEnvironment) -> _Response:
            try:
                state = health()
            except Exception:
                _log.exception("health check failed while answering %s", environ["PATH_INFO"])
                return _json(
                    "503 Service Unavailable", {key: False, "error": "health check failed"}
                )
            ok = state.live if key == "live" else state.ready
            status = "200 OK" if ok else "503 Service Unavailable"
            return _json(status, {key: ok, "detail": dict(state.detail)})

        return answer

    routes: Mapping[str, Callable[[WSGIEnvironment], _Response]] = {
        "/metrics": metrics,
        "/healthz": probe("live"),
        "/readyz": probe("ready"),
    }

    def app(environ: WSGIEnvironment, start_response: StartResponse) -> Iterable[bytes]:
        method = environ.get("REQUEST_METHOD", "GET")
        path = environ.get("PATH_INFO", "")
        route = routes.get(path)
        if route is None:
            status, headers, body = _text(
                "404 Not Found", "not found; paths: /metrics /healthz /readyz\n"
            )
        elif method not in _ALLOWED:
            status, headers, body = _text(
                "405 Method Not Allowed", f"method {method} not allowed\n"
            )
            headers.append(("Allow", ", ".join(_ALLOWED)))
        else:
            try:
                status, headers, body = route(environ)
            except Exception:
                _log.exception("error while answering %s", path)
                status, headers, body = _text("500 Internal Server Error", "internal error\n")
        headers = [(k, v) for k, v in headers if k.lower() != "content-length"]
        headers.append(("Content-Length", str(len(body))))
        start_response(status, headers)
        return [b"" if method == "HEAD" else body]

    return app


def _call(app: WSGIApplication, environ: WSGIEnvironment) -> _Response:
    """Run a WSGI app to completion and return its status, headers and body."""
    response: list[tuple[str, list[tuple[str, str]]]] = []

    def start_response(
        status: str, headers: list[tuple[str, str]], exc_info: Any = None
    ) -> Callable[[bytes], object]:
        response.append((status, list(headers)))
        return lambda _data: None

    body = b"".join(app(environ, start_response))
    status, headers = response[-1]
    return status, headers, body


def _json(status: str, content: Mapping[str, object]) -> _Response:
    body = (json.dumps(content, default=str, sort_keys=True) + "\n").encode()
    headers = [("Content-Type", "application/json"), ("Cache-Control", "no-store")]
    return status, headers, body


def _text(status: str, text: str) -> _Response:
    return status, [("Content-Type", "text/plain; charset=utf-8")], text.encode()


class _Handler(WSGIRequestHandler):
    """Request handler that logs at debug level and drops idle clients."""

    timeout = _REQUEST_TIMEOUT_S

    def log_message(self, format: str, *args: Any) -> None:
        """Log a request line or error at debug level, never to stderr."""
        _log.debug("%s " + format, self.address_string(), *args)


class _Server(ThreadingMixIn, WSGIServer):
    """Thread per request; request threads never hold up shutdown."""

    daemon_threads = True

    def handle_error(self, request: Any, client_address: Any) -> None:
        """Log an error of a request thread at debug level (not a traceback on stderr)."""
        _log.debug("error while serving %s", client_address, exc_info=True)

    def server_bind(self) -> None:
        """Bind without the reverse DNS lookup ``HTTPServer`` does (``getfqdn``).

        Plant networks often have no working DNS, and a lookup that hangs
        would hold up start-up.
        """
        TCPServer.server_bind(self)
        host, port = self.server_address[:2]
        self.server_name = str(host)
        self.server_port = int(port)
        self.setup_environ()


class _Server6(_Server):
    address_family = socket.AF_INET6


class MetricsServer:
    """The HTTP server for :func:`make_app`, on its own daemon thread.

    Parameters
    ----------
    app : WSGIApplication
        Application to serve, normally from :func:`make_app`.
    host : str
        IPv4 or IPv6 address (or a host name) to listen on.
    port : int
        TCP port; 0 picks a free one (see :attr:`port`).

    Raises
    ------
    OSError
        If the address cannot be bound or resolved; the message names
        ``host:port`` and the reason, and ``errno`` is kept.

    Attributes
    ----------
    host : str
        Address as given.
    port : int
        Port actually bound.

    Notes
    -----
    The socket is bound on construction, so a configuration error shows
    before anything else starts; requests are served after :meth:`start`.
    Each request runs on its own short-lived daemon thread.
    """

    def __init__(self, app: WSGIApplication, host: str, port: int) -> None:
        where = f"[{host}]:{port}" if ":" in host else f"{host}:{port}"
        try:
            infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
            family, address = infos[0][0], infos[0][4]
            server_class = _Server6 if family == socket.AF_INET6 else _Server
            self._server = server_class((str(address[0]), port), _Handler)
        except OSError as err:
            reason = _BIND_HINTS.get(err.errno or 0) or err.strerror or str(err)
            raise OSError(err.errno, f"cannot listen on {where}: {reason}") from err
        self._server.set_app(app)
        self.host = host
        self.port = int(self._server.server_address[1])
        self._thread: threading.Thread | None = None
        self._stopped = False
        self._lock = threading.Lock()

    def start(self) -> None:
        """Serve requests on a daemon thread.

        Raises
        ------
        RuntimeError
            If already started or stopped.
        """
        with self._lock:
            if self._thread is not None or self._stopped:
                raise RuntimeError(
                    f"metrics server on {self.host}:{self.port} was already "
                    f"{'stopped' if self._stopped else 'started'}"
                )
            self._thread = threading.Thread(
                target=self._server.serve_forever,
                kwargs={"poll_interval": _POLL_INTERVAL_S},
                name=f"arxwatch-http-{self.port}",
                daemon=True,
            )
            self._thread.start()
        _log.info("serving /metrics, /healthz and /readyz on %s port %s", self.host, self.port)

    def stop(self) -> None:
        """Stop serving, wait for the server thread and close the socket; idempotent."""
        with self._lock:
            if self._stopped:
                return
            self._stopped = True
            thread = self._thread
        if thread is not None:  # shutdown() waits for serve_forever: only call it once started
            self._server.shutdown()
            thread.join()
        self._server.server_close()
