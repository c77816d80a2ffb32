"""``arxwatch run`` end to end: a real mosquitto, the real command in its own process.

Three VAV boxes of an invented site publish zone temperature and reheat valve
(1 s grid, timestamps a little in the past so a whole commissioning-sized
stretch is sent in seconds); block-a/vav-1's valve loses half its effect.
The tests check what a site engineer would: alerts on the broker, retained
state, metrics that parse, health, a clean stop, a restart that remembers,
and a SIGKILL that loses nothing acknowledged. The expected alerts come from
the pure pipeline fed the same messages in the test process.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from arxwatch.daemon.config import parse_config
from arxwatch.daemon.library import read_baselines, write_baselines
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault, daily_operation
from arxwatch.estimators.baseline import BaselineSet, fit_baseline

from .conftest import Broker, MakeBroker, Probe, free_port, wait_for

pytestmark = pytest.mark.integration

LOOP = REFERENCE_LOOPS["first-order+dead-time"]
ASSETS = ("block-a/vav-0", "block-a/vav-1", "block-a/vav-2")
SAMPLES = 1000
FAULT_AT = 600

SITE = """
broker: {{host: 127.0.0.1, port: {port}, client_id: arxwatch-it, keepalive_s: 5}}
topics: {{status: larkspur/arxwatch/status, alerts_prefix: larkspur/arxwatch/alerts}}
metrics: {{listen: "127.0.0.1:{metrics}"}}
state: {{path: {state}, checkpoint_every_s: 1}}
logging: {{level: info, format: json}}
asset_classes:
  - name: vav
    pattern: "larkspur/{{building}}/vav/{{asset}}/{{signal}}"
    asset_id: "{{building}}/{{asset}}"
    sample_period_s: 1
    align: {{lateness_s: 0.2}}
    output: {{signal: zone-temp, name: zone temperature, unit: degC, min: -10, max: 40}}
    inputs:
      - {{signal: valve, name: reheat valve, unit: "%", min: 0, max: 100}}
    model: auto
    baseline: {{file: {baselines}}}
"""


class Daemon:
    """``arxwatch run`` in a child process, stopped by PID in teardown."""

    def __init__(self, config: Path, metrics_port: int, log: Path) -> None:
        self.config = config
        self.metrics_port = metrics_port
        self.log_path = log
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        """Start the daemon and wait until /readyz answers 200."""
        with self.log_path.open("ab") as log:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "arxwatch.daemon.cli", "run", "--config", str(self.config)],
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        assert wait_for(self.ready, 20.0), f"not ready:\n{self.log()}"

    def get(self, path: str) -> tuple[int, str]:
        """GET a path of the metrics server: (status, body)."""
        url = f"http://127.0.0.1:{self.metrics_port}{path}"
        try:
            with urllib.request.urlopen(url, timeout=2.0) as response:
                return response.status, response.read().decode()
        except urllib.error.HTTPError as err:
            return err.code, err.read().decode()

    def ready(self) -> bool:
        """Whether /readyz says ready (the process must be alive)."""
        assert self.process is not None and self.process.poll() is None, self.log()
        try:
            return self.get("/readyz")[0] == 200
        except OSError:
            return False

    def metrics(self) -> dict[str, Any]:
        """Scrape /metrics: {name: {labels tuple: value}} via prometheus_client's parser."""
        out: dict[str, Any] = {}
        for family in text_string_to_metric_families(self.get("/metrics")[1]):
            for sample in family.samples:
                labels = tuple(sorted(sample.labels.items()))
                out.setdefault(sample.name, {})[labels] = sample.value
        return out

    def value(self, name: str, **labels: str) -> float:
        """One sample's value, 0 when absent."""
        return float(self.metrics().get(name, {}).get(tuple(sorted(labels.items())), 0.0))

    def terminate(self) -> int:
        """SIGTERM and wait; return the exit status."""
        assert self.process is not None
        self.process.send_signal(signal.SIGTERM)
        code = self.process.wait(20.0)
        self.process = None
        return code

    def kill(self) -> None:
        """SIGKILL (if still running) and reap."""
        if self.process is not None:
            if self.process.poll() is None:
                self.process.kill()
            self.process.wait(10.0)
            self.process = None

    def log(self) -> str:
        """Return what the daemon wrote so far."""
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""


@pytest.fixture(scope="module")
def baseline_set() -> BaselineSet:
    u = daily_operation(2880, 60.0, seed=1)
    t = 1.7e9 + np.arange(len(u), dtype=np.float64)
    result = fit_baseline(LOOP.simulate(u, seed=2), u[:, None], t, sample_period_s=1.0)
    assert result.baseline is not None
    return BaselineSet((result.baseline,))


def write_site(folder: Path, broker: Broker, baseline_set: BaselineSet) -> Daemon:
    """Write the site config and its baseline file into ``folder``; return its daemon."""
    baselines = folder / "vav-baselines.json"
    write_baselines(baselines, dict.fromkeys(ASSETS, baseline_set), time.time())
    metrics = free_port()
    config = folder / "site.yaml"
    config.write_text(
        SITE.format(
            port=broker.port,
            metrics=metrics,
            state=folder / "state" / "state.db",
            baselines=baselines,
        )
    )
    return Daemon(config, metrics, folder / "daemon.log")


@pytest.fixture
def site(tmp_path: Path, make_broker: MakeBroker, baseline_set: BaselineSet) -> Iterator[dict]:
    broker = make_broker(persistence=True, max_queued_messages=100_000)
    daemon = write_site(tmp_path, broker, baseline_set)
    config = daemon.config
    try:
        yield {"broker": broker, "daemon": daemon, "config": config}
    finally:
        daemon.kill()


def messages(start_s: float) -> list[tuple[str, bytes]]:
    """Every (topic, payload) of the scenario, in publishing order."""
    series = []
    for k, _ in enumerate(ASSETS):
        u = daily_operation(SAMPLES, 60.0, seed=10 + k)
        faults = (Fault("gain_loss", start_s=FAULT_AT * 60.0, magnitude=0.5),) if k == 1 else ()
        series.append((LOOP.simulate(u, faults, seed=20 + k), u))
    out = []
    for i in range(SAMPLES):
        for asset, (y, u) in zip(ASSETS, series, strict=True):
            building, box = asset.split("/")
            for signal_name, value in (("zone-temp", y[i]), ("valve", u[i])):
                payload = json.dumps({"value": float(value), "ts": start_s + i}).encode()
                out.append((f"larkspur/{building}/vav/{box}/{signal_name}", payload))
    return out


def publish(probe: Probe, items: list[tuple[str, bytes]]) -> None:
    infos = [probe.client.publish(topic, payload, qos=1) for topic, payload in items]
    for info in infos:
        info.wait_for_publish(20.0)
    assert all(info.is_published() for info in infos)


def events(probe: Probe) -> list[dict]:
    out = []
    while not probe.received.empty():
        message = probe.received.get()
        if message.topic.endswith("/events"):
            out.append(json.loads(message.payload))
    return out


def key(record: dict) -> tuple:
    return (record["id"], record["state"], record["severity"], record["sample_time"])


def expected_records(config: Path, items: list[tuple[str, bytes]], arrival_s: float) -> set:
    """Return the records of the pure pipeline fed the same messages (staleness aside)."""
    cfg = parse_config(config.read_text(), str(config))
    pipe = Pipeline(cfg, {"vav": read_baselines(cfg.asset_classes[0].baseline.file)})
    records = []
    for topic, payload in items:
        records += pipe.feed(topic, payload, arrival_s)
    records += pipe.advance(None)
    return {key(r) for r in records if r["detector"] != "stale"}


def test_alerts_metrics_health_stop_and_restart(site: dict, make_probe: Any) -> None:
    broker: Broker = site["broker"]
    daemon: Daemon = site["daemon"]
    start = float(int(time.time())) - SAMPLES - 60
    items = messages(start)
    watcher = make_probe(broker)
    watcher.subscribe("larkspur/arxwatch/#")
    publisher = make_probe(broker)
    daemon.start()
    status = json.loads(watcher.next(5.0).payload)  # the retained status
    assert status["state"] == "online"

    cut = 6 * 700
    publish(publisher, items[:cut])
    publish(publisher, items[: 6 * 50])  # a redelivered stretch: duplicates
    for garbage in (b"", b"\xff", b"{", b'{"value": NaN, "ts": 1}', b'{"value": "warm"}'):
        publisher.publish("larkspur/block-a/vav/vav-0/zone-temp", garbage)
    publisher.publish("larkspur/block-a/vav/vav-0/setpoint", b"21")
    assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * 699, 30.0), daemon.log()
    publish(publisher, items[cut:])
    assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * (SAMPLES - 1), 30.0)
    assert wait_for(lambda: daemon.value("arxwatch_outbox_messages") == 0, 10.0)

    received = events(watcher)
    expected = expected_records(site["config"], items, start + SAMPLES)
    behaviour = {key(r) for r in received if r["detector"] != "stale"}
    assert behaviour == expected
    faulty = {r["detector"] for r in received if r["asset"] == "block-a/vav-1"}
    assert "innovation_mean" in faulty
    assert not {r["detector"] for r in received if r["asset"] != "block-a/vav-1"} - {"stale"}
    for record in received:
        assert "not a safety function" in record["caution"]

    families = daemon.metrics()
    # the redelivered stretch is behind the closed grid: counted, and no row changed
    samples = families["arxwatch_samples_total"]
    assert samples[(("outcome", "duplicate"),)] + samples[(("outcome", "late"),)] == 6 * 50
    assert families["arxwatch_rows_total"][()] == 3 * (SAMPLES - 1)
    rejected = sum(families["arxwatch_payloads_rejected_total"].values())
    assert rejected == 5
    assert families["arxwatch_topics_refused_total"][(("reason", "signal not allowed"),)] == 1
    assert families["arxwatch_assets"][(("state", "monitoring"),)] == 3
    assert families["arxwatch_mqtt_connected"][()] == 1
    assert daemon.get("/healthz")[0] == 200 and daemon.get("/nothing")[0] == 404
    # bad payloads are named in the log (rate-limited), not only counted
    assert "unusable message on 'larkspur/block-a/vav/vav-0/zone-temp'" in daemon.log()

    # the retained state of the faulty box lists its raised alerts
    late = make_probe(broker)
    late.subscribe("larkspur/arxwatch/alerts/block-a/vav-1/state")
    state = json.loads(late.next(5.0).payload)
    assert state["asset"] == "block-a/vav-1" and state["active"]

    # a clean stop: exit 0, retained offline status
    assert daemon.terminate() == 0
    assert wait_for(lambda: not watcher.received.empty(), 5.0)
    offline = json.loads(watcher.next(1.0).payload)
    assert offline == {"state": "offline", "reason": "stopped"}

    # restart: state restored, no alert raised twice for one episode
    raised = {(r["id"], r["severity"]) for r in received if r["state"] == "raised"}
    daemon.start()
    more = messages(start + SAMPLES)[: 6 * 60]
    publish(publisher, more)
    assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * 59, 20.0), daemon.log()
    again = events(watcher)
    assert not {(r["id"], r["severity"]) for r in again if r["state"] == "raised"} & raised
    assert daemon.terminate() == 0


def test_sigkill_loses_nothing_acknowledged(site: dict, make_probe: Any) -> None:
    broker: Broker = site["broker"]
    daemon: Daemon = site["daemon"]
    start = float(int(time.time())) - SAMPLES - 60
    items = messages(start)
    watcher = make_probe(broker, persistent=True)
    watcher.subscribe("larkspur/arxwatch/alerts/#")
    publisher = make_probe(broker)
    daemon.start()
    half = 6 * 650
    publish(publisher, items[:half])
    assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * 300, 30.0), daemon.log()
    daemon.kill()  # SIGKILL: whatever was queued but not journalled stays with the broker
    publish(publisher, items[half:])
    daemon.start()
    expected = expected_records(site["config"], items, start + SAMPLES)
    seen: list[dict] = []

    def all_arrived() -> bool:
        seen.extend(events(watcher))
        return expected <= {key(r) for r in seen}

    assert wait_for(all_arrived, 40.0), daemon.log()
    # at least once: a record replayed from the journal may come twice, never differ
    assert {key(r) for r in seen if r["detector"] != "stale"} == expected
    assert daemon.terminate() == 0
    assert "Traceback" not in daemon.log()


def test_bad_config_and_missing_baselines_fail_clearly(tmp_path: Path) -> None:
    config = tmp_path / "site.yaml"
    config.write_text("broker: {host: 127.0.0.1, client_id: x}\nasset_classes: []\n")
    done = subprocess.run(
        [sys.executable, "-m", "arxwatch.daemon.cli", "run", "--config", str(config)],
        capture_output=True,
        text=True,
        timeout=30,
        env=dict(os.environ),
    )
    assert done.returncode == 2
    assert "asset_classes: expected a list of at least 1 entry" in done.stderr


def test_messages_the_broker_drops_while_down_show_as_gaps(
    tmp_path: Path, make_broker: MakeBroker, make_probe: Any, baseline_set: BaselineSet
) -> None:
    # mosquitto keeps at most max_queued_messages for an offline client and drops the
    # rest silently (its documented default is 1000; 5 here): the daemon cannot know
    # what was lost, but sees the hole in each signal's samples and counts it.
    broker = make_broker(persistence=True, max_queued_messages=5)
    daemon = write_site(tmp_path, broker, baseline_set)
    start = float(int(time.time())) - SAMPLES - 60
    items = messages(start)[: 6 * 200]  # 200 grid points of the three boxes
    publisher = make_probe(broker)
    try:
        daemon.start()
        publish(publisher, items[: 6 * 100])
        assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * 99, 30.0), daemon.log()
        assert daemon.value("arxwatch_sample_gaps_total") == 0
        assert daemon.terminate() == 0
        publish(publisher, items[6 * 100 : 6 * 140])  # 240 messages while down: 5 are kept
        daemon.start()
        publish(publisher, items[6 * 140 :])
        # counters start again with the process: the rows after the restart
        assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * 50, 30.0), daemon.log()
        # every signal of every box has a hole of about 40 samples: six gaps
        assert wait_for(lambda: daemon.value("arxwatch_sample_gaps_total") >= 6, 10.0)
        assert daemon.value("arxwatch_sample_gaps_total") == 6
        assert daemon.value("arxwatch_mqtt_messages_received_total") <= 5 + 6 * 60
        assert daemon.terminate() == 0
        assert "Traceback" not in daemon.log()
    finally:
        daemon.kill()
