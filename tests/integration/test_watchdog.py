"""The systemd watchdog: pings come from the processing loop, so a hung worker stops them.

The service runs in this process against a real mosquitto, with
``NOTIFY_SOCKET`` pointing at a datagram socket of the test and
``WATCHDOG_USEC`` asking for a ping every 0.1 s (half the interval, as
systemd.service(5) recommends). While the worker is stuck in a batch, no
``WATCHDOG=1`` arrives, so systemd would restart it; once it moves again, the
pings resume.
"""

from __future__ import annotations

import socket
import threading
import time
from pathlib import Path

import pytest

from arxwatch.daemon.config import parse_config
from arxwatch.daemon.service import Service

from .conftest import MakeBroker, free_port, wait_for

pytestmark = pytest.mark.integration

SITE = """
broker: {{host: 127.0.0.1, port: {port}, client_id: arxwatch-watchdog, keepalive_s: 5}}
metrics: {{listen: "127.0.0.1:{metrics}"}}
state: {{path: {state}}}
asset_classes:
  - name: vav
    pattern: "larkspur/{{building}}/vav/{{asset}}/{{signal}}"
    asset_id: "{{building}}/{{asset}}"
    sample_period_s: 60
    output: {{signal: zone-temp, name: zone temperature, unit: degC, min: -10, max: 40}}
    inputs:
      - {{signal: valve, name: reheat valve, unit: "%", min: 0, max: 100}}
    model: auto
    baseline: {{learn_for_s: 86400}}
"""


def test_a_hung_worker_stops_the_watchdog_pings(tmp_path: Path, make_broker: MakeBroker) -> None:
    broker = make_broker()
    config = parse_config(
        SITE.format(port=broker.port, metrics=free_port(), state=tmp_path / "state.db"),
        "site.yaml",
    )
    address = str(tmp_path / "notify.sock")
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    listener.bind(address)
    listener.settimeout(0.05)
    pings: list[float] = []
    listening = threading.Event()
    listening.set()

    def listen() -> None:
        while listening.is_set():
            try:
                data = listener.recv(4096)
            except TimeoutError:
                continue
            if b"WATCHDOG=1" in data.split(b"\n"):
                pings.append(time.monotonic())

    receiver = threading.Thread(target=listen, daemon=True)
    receiver.start()
    stop, hang, release = threading.Event(), threading.Event(), threading.Event()
    failures: list[BaseException] = []

    def serve() -> None:
        try:  # made in its thread: its SQLite store belongs to the thread that made it
            service = Service(config, {"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "200000"})
            advance = service.pipeline.advance

            def stuck_when_asked(now_s: float | None = None) -> list[dict]:
                if hang.is_set():
                    release.wait(10.0)  # a batch that takes far too long
                return advance(now_s)

            service.pipeline.advance = stuck_when_asked  # type: ignore[method-assign]
            service.run(stop)
        except BaseException as err:  # reported by the test thread
            failures.append(err)

    server = threading.Thread(target=serve)
    server.start()
    try:
        assert wait_for(lambda: len(pings) >= 5, 15.0), failures  # about one every 0.1 s
        hang.set()
        time.sleep(0.3)  # the batch in progress ends, the next one hangs
        quiet_from = len(pings)
        time.sleep(1.5)  # 15 intervals
        assert len(pings) - quiet_from <= 1  # at most the ping of the batch that just ended
        hang.clear()
        release.set()
        resumed = len(pings)
        assert wait_for(lambda: len(pings) >= resumed + 5, 5.0)
    finally:
        hang.clear()
        release.set()
        stop.set()
        server.join(30.0)
        listening.clear()
        receiver.join(5.0)
        listener.close()
    assert not server.is_alive()
    assert not failures, failures
