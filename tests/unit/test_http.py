"""HTTP endpoints: routing, status codes, JSON bodies, HEAD, bind errors, server lifecycle."""

import errno
import json
import logging
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator

import pytest
from prometheus_client import CollectorRegistry, Counter
from prometheus_client.exposition import choose_encoder
from prometheus_client.parser import text_string_to_metric_families

from arxwatch.daemon.http import Health, MetricsServer, judge_health, make_app

Response = tuple[int, dict[str, str], bytes]
Request = Callable[..., Response]

HEALTHY = Health(live=True, ready=True, detail={"connected": True, "restored": True})


@pytest.fixture
def registry() -> CollectorRegistry:
    registry = CollectorRegistry()
    counter = Counter(
        "larkspur_probe_total", "A counter for the endpoint tests.", registry=registry
    )
    counter.inc(3)
    return registry


@pytest.fixture
def serve(registry: CollectorRegistry) -> Iterator[Callable[[Callable[[], Health]], Request]]:
    """Start a server on 127.0.0.1, port 0, for a health callable; stop it afterwards."""
    servers: list[MetricsServer] = []

    def start(health: Callable[[], Health]) -> Request:
        server = MetricsServer(make_app(registry, health), "127.0.0.1", 0)
        servers.append(server)
        server.start()
        return lambda path, method="GET": request(server.port, path, method)

    try:
        yield start
    finally:
        for server in servers:
            server.stop()


def request(port: int, path: str, method: str = "GET") -> Response:
    req = urllib.request.Request(f"http://127.0.0.1:{port}{path}", method=method)
    try:
        with urllib.request.urlopen(req, timeout=10) as resp:
            return resp.status, dict(resp.headers.items()), resp.read()
    except urllib.error.HTTPError as err:
        with err:
            return err.code, dict(err.headers.items()), err.read()


# --- /metrics -----------------------------------------------------------------------------


def test_metrics_served_in_the_prometheus_text_format(serve) -> None:
    get = serve(lambda: HEALTHY)
    status, headers, body = get("/metrics")
    assert status == 200
    # The content type prometheus_client itself picks for a request without Accept.
    assert headers["Content-Type"] == choose_encoder("")[1]
    families = {f.name: f for f in text_string_to_metric_families(body.decode())}
    assert families["larkspur_probe"].type == "counter"
    assert families["larkspur_probe"].samples[0].value == 3.0


def test_metrics_content_length_matches_body(serve) -> None:
    status, headers, body = serve(lambda: HEALTHY)("/metrics")
    assert status == 200
    assert int(headers["Content-Length"]) == len(body)


def test_head_returns_headers_without_body(serve) -> None:
    get = serve(lambda: HEALTHY)
    for path in ("/metrics", "/healthz", "/readyz"):
        status, headers, body = get(path, "HEAD")
        assert status == 200, path
        assert body == b"", path
    # RFC 9110 section 9.3.2: HEAD carries the header fields GET would send.
    _, get_headers, get_body = get("/healthz")
    _, head_headers, _ = get("/healthz", "HEAD")
    assert head_headers["Content-Length"] == get_headers["Content-Length"] == str(len(get_body))
    assert head_headers["Content-Type"] == get_headers["Content-Type"]


def test_failing_collector_gives_500_and_a_logged_error(serve, registry, caplog) -> None:
    class Broken:
        def collect(self):
            raise RuntimeError("collector of vav-3-14 failed")

    registry.register(Broken())
    caplog.set_level(logging.ERROR, logger="arxwatch.daemon.http")
    status, _, body = serve(lambda: HEALTHY)("/metrics")
    assert status == 500
    assert b"vav-3-14" not in body  # no internals to the client
    assert any("vav-3-14" in (r.exc_text or "") or r.exc_info for r in caplog.records)


# --- /healthz and /readyz -----------------------------------------------------------------


@pytest.mark.parametrize(
    ("live", "ready", "path", "key", "expected"),
    [
        (True, True, "/healthz", "live", 200),
        (False, True, "/healthz", "live", 503),
        (True, True, "/readyz", "ready", 200),
        (True, False, "/readyz", "ready", 503),
        (False, True, "/readyz", "ready", 200),  # readiness is restored and connected only
        (True, False, "/healthz", "live", 200),
    ],
)
def test_probe_status_and_json_body(serve, live, ready, path, key, expected) -> None:
    detail = {"connected": ready, "restored": True, "last_tick_age_s": 0.4}
    get = serve(lambda: Health(live=live, ready=ready, detail=detail))
    status, headers, body = get(path)
    assert status == expected
    assert headers["Content-Type"] == "application/json"
    assert headers["Cache-Control"] == "no-store"
    assert json.loads(body) == {key: expected == 200, "detail": detail}


def test_probe_reads_health_at_each_request(serve) -> None:
    state = {"ready": False}
    get = serve(lambda: Health(live=True, ready=state["ready"]))
    assert get("/readyz")[0] == 503
    state["ready"] = True
    assert get("/readyz")[0] == 200


def test_failing_health_callable_gives_503(serve, caplog) -> None:
    def broken() -> Health:
        raise RuntimeError("worker state unreadable")

    caplog.set_level(logging.ERROR, logger="arxwatch.daemon.http")
    get = serve(broken)
    for path, key in (("/healthz", "live"), ("/readyz", "ready")):
        status, _, body = get(path)
        assert status == 503
        assert json.loads(body) == {key: False, "error": "health check failed"}
    assert any(r.exc_info for r in caplog.records)


def test_detail_values_json_cannot_hold_are_written_as_text(serve) -> None:
    get = serve(lambda: Health(live=True, ready=True, detail={"state_file": object}))
    status, _, body = get("/healthz")
    assert status == 200
    assert json.loads(body)["detail"] == {"state_file": str(object)}


# --- routing ------------------------------------------------------------------------------


@pytest.mark.parametrize("path", ["/", "/metrics/", "/favicon.ico", "/healthz/x", "/METRICS"])
def test_unknown_paths_are_404(serve, path) -> None:
    status, _, _ = serve(lambda: HEALTHY)(path)
    assert status == 404


@pytest.mark.parametrize("method", ["POST", "PUT", "DELETE", "OPTIONS", "PATCH"])
@pytest.mark.parametrize("path", ["/metrics", "/healthz", "/readyz"])
def test_other_methods_are_405_with_allow(serve, path, method) -> None:
    status, headers, _ = serve(lambda: HEALTHY)(path, method)
    assert status == 405
    # RFC 9110 section 15.5.6: a 405 response carries Allow with the methods supported.
    assert {m.strip() for m in headers["Allow"].split(",")} == {"GET", "HEAD"}


def test_query_string_does_not_change_routing(serve) -> None:
    status, _, body = serve(lambda: HEALTHY)("/metrics?name[]=larkspur_probe_total")
    assert status == 200
    # prometheus_client's own name[] filter still applies.
    names = {f.name for f in text_string_to_metric_families(body.decode())}
    assert names == {"larkspur_probe"}


def test_request_lines_are_logged_at_debug_only(serve, caplog) -> None:
    caplog.set_level(logging.DEBUG, logger="arxwatch.daemon.http")
    get = serve(lambda: HEALTHY)
    caplog.clear()
    get("/healthz")
    get("/nowhere")

    def mine() -> list[logging.LogRecord]:
        return [r for r in caplog.records if r.name == "arxwatch.daemon.http"]

    # the server thread logs after it has answered: wait for the line, bounded
    deadline = time.monotonic() + 2.0
    while not any("GET /nowhere" in r.getMessage() for r in mine()):
        assert time.monotonic() < deadline, [r.getMessage() for r in mine()]
        time.sleep(0.01)
    assert any("GET /healthz" in r.getMessage() for r in mine())
    assert all(r.levelno == logging.DEBUG for r in mine())


# --- server lifecycle ---------------------------------------------------------------------


def test_port_zero_picks_a_free_port_and_stop_is_idempotent(registry) -> None:
    server = MetricsServer(make_app(registry, lambda: HEALTHY), "127.0.0.1", 0)
    try:
        assert 0 < server.port < 65536
        assert server.host == "127.0.0.1"
        server.start()
        assert request(server.port, "/healthz")[0] == 200
    finally:
        server.stop()
        server.stop()
    assert not any(t.name == f"arxwatch-http-{server.port}" for t in threading.enumerate())
    with pytest.raises(urllib.error.URLError):
        request(server.port, "/healthz")


def test_stop_before_start_closes_the_socket(registry) -> None:
    server = MetricsServer(make_app(registry, lambda: HEALTHY), "127.0.0.1", 0)
    server.stop()
    again = MetricsServer(make_app(registry, lambda: HEALTHY), "127.0.0.1", server.port)
    again.stop()


def test_start_twice_or_after_stop_is_refused(registry) -> None:
    server = MetricsServer(make_app(registry, lambda: HEALTHY), "127.0.0.1", 0)
    try:
        server.start()
        with pytest.raises(RuntimeError, match="already started"):
            server.start()
    finally:
        server.stop()
    with pytest.raises(RuntimeError, match="already stopped"):
        server.start()


def test_bind_failure_names_address_and_reason(registry) -> None:
    app = make_app(registry, lambda: HEALTHY)
    first = MetricsServer(app, "127.0.0.1", 0)
    try:
        with pytest.raises(OSError, match=rf"127\.0\.0\.1:{first.port}: address already in use"):
            MetricsServer(app, "127.0.0.1", first.port)
        try:
            MetricsServer(app, "127.0.0.1", first.port)
        except OSError as err:
            assert err.errno == errno.EADDRINUSE
    finally:
        first.stop()


def test_bind_to_an_address_this_host_lacks(registry) -> None:
    # 192.0.2.0/24 is TEST-NET-1 (RFC 5737): never assigned to a real interface.
    with pytest.raises(OSError, match=r"192\.0\.2\.1:9108: address not available") as caught:
        MetricsServer(make_app(registry, lambda: HEALTHY), "192.0.2.1", 9108)
    assert caught.value.errno == errno.EADDRNOTAVAIL


# --- judge_health -------------------------------------------------------------------------


def test_judge_health_liveness_by_tick_age() -> None:
    def live(last_tick_s: float | None) -> bool:
        return judge_health(
            now_s=100.0, last_tick_s=last_tick_s, max_tick_age_s=30.0, restored=True, connected=True
        ).live

    assert live(99.0)
    assert live(70.0)  # exactly the configured age still counts
    assert not live(69.9)
    assert not live(None)  # the worker never went round


@pytest.mark.parametrize(
    ("restored", "connected", "ready"),
    [(True, True, True), (True, False, False), (False, True, False), (False, False, False)],
)
def test_judge_health_readiness(restored, connected, ready) -> None:
    health = judge_health(
        now_s=5.0, last_tick_s=4.5, max_tick_age_s=1.0, restored=restored, connected=connected
    )
    assert health.ready is ready
    assert health.detail == {
        "last_tick_age_s": 0.5,
        "max_tick_age_s": 1.0,
        "restored": restored,
        "connected": connected,
    }


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan")])
def test_judge_health_refuses_bad_age(bad) -> None:
    with pytest.raises(ValueError, match="max_tick_age_s must be > 0"):
        judge_health(now_s=0.0, last_tick_s=0.0, max_tick_age_s=bad, restored=True, connected=True)


def test_health_detail_is_a_frozen_copy() -> None:
    detail = {"connected": True}
    health = Health(live=True, ready=True, detail=detail)
    detail["connected"] = False
    assert health.detail == {"connected": True}
    with pytest.raises(TypeError):
        health.detail["connected"] = False  # type: ignore[index]
