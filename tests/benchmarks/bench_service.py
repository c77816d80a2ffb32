"""End-to-end figures of ``arxwatch run`` on loopback, against a bare paho subscriber.

Prints figures; asserts nothing. Needs the Debian ``mosquitto`` binary. Run
from the repository root:

    python tests/benchmarks/bench_service.py [--assets 5000] [--points 20] [--qos 1]

Every process is started here and stopped by PID at the end:

1. mosquitto on 127.0.0.1 with its per-client queue and in-flight window
   sized (``max_queued_messages``, ``max_inflight_messages``: see the
   install guide), so that nothing is dropped for a slow subscriber;
2. a warm state for ``--assets`` VAV boxes (zone temperature and reheat
   valve, 1 s grid): the baseline file, and 1,000 grid points of simulated
   operation run through the fleet monitor in this process and saved as the
   daemon's checkpoint, so that the measured samples are judged by every
   detector (prewhitening fitted, live estimate settled);
3. the reference: a bare paho subscriber (subprocess) that only parses the
   JSON, fed ``--assets`` x ``--points`` x 2 messages by a publisher
   subprocess; its rate is messages / (last - first arrival), and its loss
   the messages it never saw;
4. the daemon (``arxwatch run`` subprocess) on the warm state, fed the next
   points: samples / s fully processed (aligned, estimated, judged), timed
   from the first publish until ``arxwatch_rows_total`` shows every row, and
   the samples lost (published but not accepted);
5. latency at half that load: the publisher paced at half the daemon's rate,
   with ``--alerts`` boxes sending three out-of-range readings in a row; the
   third one raises a data-quality alert: publish -> alert on the broker,
   median and 99th percentile;
6. memory: the daemon's resident memory with the full fleet and with a
   fifth of it, after the same work, 1 s after a start on the saved state;
   the median of ``--memory-runs`` starts each (one start's figure moves by
   a few hundred kB); the slope is the cost per asset, the intercept the
   fixed base.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections import deque
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion
from prometheus_client.parser import text_string_to_metric_families

from arxwatch.daemon.config import load_config
from arxwatch.daemon.library import read_baselines, write_baselines
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.daemon.store import StateStore
from arxwatch.estimators.baseline import BaselineSet, fit_baseline

MOSQUITTO = "/usr/sbin/mosquitto"
LOOP = REFERENCE_LOOPS["first-order+dead-time"]
SERIES = 16  # distinct simulated boxes, tiled over the assets
WARM = 1000  # grid points of the warm state

SITE = """
broker:
  {{host: 127.0.0.1, port: {port}, client_id: arxwatch-bench-{name}, qos: {qos}, keepalive_s: 30}}
topics: {{status: bench/arxwatch/status, alerts_prefix: bench/arxwatch/alerts}}
metrics: {{listen: "127.0.0.1:{metrics}"}}
state: {{path: {state}, checkpoint_every_s: 300}}
logging: {{level: warning, format: text}}
limits: {{max_assets: {max_assets}, queue_size: 20000}}
asset_classes:
  - name: vav
    pattern: "bench/{{building}}/vav/{{asset}}/{{signal}}"
    asset_id: "{{building}}/{{asset}}"
    sample_period_s: 1
    align: {{lateness_s: 0.2}}
    output: {{signal: zone-temp, name: zone temperature, unit: degC, min: -10, max: 40}}
    inputs:
      - {{signal: valve, name: reheat valve, unit: "%", min: 0, max: 100}}
    model: auto
    baseline: {{file: {baselines}}}
"""


def free_port() -> int:
    """Return a free TCP port on 127.0.0.1."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait(condition: Any, timeout_s: float, interval_s: float = 0.1) -> bool:
    """Poll ``condition`` until it is true or ``timeout_s`` passes."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(interval_s)
    return bool(condition())


def asset_name(a: int) -> str:
    """Asset id of box ``a``: one building per 500 boxes."""
    return f"block-{a // 500}/vav-{a % 500}"


def topic_of(a: int) -> str:
    """Topic prefix of box ``a`` (the class pattern bench/{building}/vav/{asset}/{signal})."""
    return f"bench/block-{a // 500}/vav/vav-{a % 500}"


def simulated(points: int, offset: int) -> tuple[np.ndarray, np.ndarray]:
    """Return outputs and valves, (points, SERIES), from grid point ``offset`` of each series."""
    u = np.stack([daily_operation(offset + points, 60.0, seed=100 + j) for j in range(SERIES)], 1)
    y = np.stack([LOOP.simulate(u[:, j], seed=200 + j) for j in range(SERIES)], 1)
    return y[offset:], u[offset:]


def payloads(assets: int, points: int, offset: int, start_s: float) -> list[tuple[str, bytes]]:
    """Every message of ``points`` grid points from ``offset``, grid point by grid point."""
    y, u = simulated(points, offset)
    out = []
    for i in range(points):
        t = start_s + offset + i
        for a in range(assets):
            topic = topic_of(a)
            j = a % SERIES
            out.append((f"{topic}/zone-temp", b'{"value": %.6f, "ts": %.1f}' % (y[i, j], t)))
            out.append((f"{topic}/valve", b'{"value": %.6f, "ts": %.1f}' % (u[i, j], t)))
    return out


def publisher(port: int, qos: int, items: list[tuple[str, bytes]], rate: float, marks: Any) -> None:
    """Publish ``items`` (paced at ``rate`` messages/s when > 0); report marked publish times."""
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=f"bench-pub-{os.getpid()}")
    client.max_inflight_messages_set(1000)
    client.max_queued_messages_set(0)
    client.connect("127.0.0.1", port, keepalive=60)
    client.loop_start()
    started = time.monotonic()
    sent: dict[str, float] = {}
    pending: deque[mqtt.MQTTMessageInfo] = deque()
    for n, (topic, payload) in enumerate(items):
        if rate > 0:
            due = started + n / rate
            pause = due - time.monotonic()
            if pause > 0:
                time.sleep(pause)
        pending.append(client.publish(topic, payload, qos=qos))
        if len(pending) > 20000:  # message ids are 16 bits: keep fewer unacknowledged
            pending.popleft().wait_for_publish(120)
        if payload.startswith(b'{"value": 99'):
            sent[topic] = time.time()  # the latest out-of-range reading of this box
    for info in pending:
        info.wait_for_publish(120)
    client.disconnect()
    client.loop_stop()
    marks.put(sent)


def bare_subscriber(port: int, qos: int, expected: int, result: Any) -> None:
    """Subscribe, parse every payload, report the count and first/last arrival."""
    times: list[float] = []

    def on_message(_c: Any, _u: Any, message: mqtt.MQTTMessage) -> None:
        json.loads(message.payload)
        times.append(time.monotonic())

    client = mqtt.Client(
        CallbackAPIVersion.VERSION2, client_id="bench-bare", protocol=MQTTProtocolVersion.MQTTv5
    )
    client.on_message = on_message
    client.connect("127.0.0.1", port, keepalive=60)
    client.subscribe("bench/+/vav/#", qos=qos)
    client.loop_start()
    result.put("subscribed")
    wait(lambda: len(times) >= expected, 300.0, 0.05)
    time.sleep(1.0)  # stragglers
    client.disconnect()
    client.loop_stop()
    result.put(
        {
            "count": len(times),
            "first": times[0] if times else 0.0,
            "last": times[-1] if times else 0.0,
        }
    )


class Daemon:
    """``arxwatch run`` in a subprocess."""

    def __init__(self, config: Path, metrics: int, log: Path) -> None:
        self.config, self.port, self.log = config, metrics, log
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        """Start it and wait until /readyz answers 200."""
        with self.log.open("ab") as out:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "arxwatch.daemon.cli", "run", "--config", str(self.config)],
                stdout=out,
                stderr=subprocess.STDOUT,
            )
        if not wait(self.ready, 120.0):
            raise RuntimeError("daemon not ready:\n" + self.log.read_text())

    def ready(self) -> bool:
        """Whether /readyz answers 200."""
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{self.port}/readyz", timeout=2) as r:
                return bool(r.status == 200)
        except OSError:
            return False

    def metric(self, name: str, **labels: str) -> float:
        """Scrape /metrics; return one sample's value (0 when absent)."""
        with urllib.request.urlopen(f"http://127.0.0.1:{self.port}/metrics", timeout=5) as r:
            text = r.read().decode()
        for family in text_string_to_metric_families(text):
            for sample in family.samples:
                if sample.name == name and sample.labels == labels:
                    return float(sample.value)
        return 0.0

    def rss_bytes(self) -> int:
        """Return its resident memory (VmRSS) in bytes."""
        assert self.process is not None
        for line in Path(f"/proc/{self.process.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
        return 0

    def stop(self) -> None:
        """SIGTERM and wait (SIGKILL after 60 s)."""
        if self.process is not None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(60)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
            self.process = None


def warm_state(config_path: Path, assets: int, start_s: float) -> None:
    """Write the checkpoint of ``assets`` boxes after WARM grid points of operation."""
    config = load_config(config_path)
    file = config.asset_classes[0].baseline.file
    assert file is not None
    libraries = {"vav": read_baselines(file)}
    pipeline = Pipeline(config, libraries)
    for a in range(assets):  # discovery: an empty payload registers the box, holds nothing
        pipeline.feed(f"{topic_of(a)}/zone-temp", b"", time.time())
    fleet = pipeline.fleet_of("vav")
    slots = np.array([fleet.slot(asset_name(a)) for a in range(assets)], dtype=np.intp)
    y, u = simulated(WARM, 0)
    pick = np.arange(assets) % SERIES
    modes: list[str | None] = [None] * assets
    quiet = np.zeros(assets, dtype=bool)
    for i in range(WARM):
        times = np.full(assets, start_s + i)
        fleet.step(slots, times, y[i, pick], u[i, pick][:, None], modes, quiet)
    saved = pipeline.checkpoint()
    with StateStore(config.state.path) as store:
        store.save_checkpoint(
            saved.entries, now_s=time.time(), appended=saved.appended, dropped=saved.dropped
        )


def site(work: Path, name: str, port: int, qos: int, assets: int, base: Any) -> Path:
    """Write a baseline file and a config for ``assets`` boxes; return the config path."""
    baselines = work / f"{name}-baselines.json"
    write_baselines(
        baselines, {asset_name(a): BaselineSet((base,)) for a in range(assets)}, time.time()
    )
    config = work / f"{name}.yaml"
    config.write_text(
        SITE.format(
            name=name,
            port=port,
            qos=qos,
            metrics=free_port(),
            state=work / name / "state.db",
            baselines=baselines,
            max_assets=assets + 10,
        )
    )
    return config


def metrics_port_of(config: Path) -> int:
    """Return the metrics port a config written by :func:`site` listens on."""
    return int(config.read_text().split('listen: "127.0.0.1:')[1].split('"')[0])


def daemon_run(
    ctx: Any,
    work: Path,
    config: Path,
    port: int,
    qos: int,
    assets: int,
    points: int,
    start_s: float,
) -> tuple[Daemon, dict[str, float]]:
    """Warm the state, start the daemon, publish ``points`` grid points; return both."""
    built = time.monotonic()
    warm_state(config, assets, start_s)
    warm_s = time.monotonic() - built
    metrics_port = metrics_port_of(config)
    daemon = Daemon(config, metrics_port, work / "daemon.log")
    daemon.start()
    time.sleep(1.0)
    rss_state = daemon.rss_bytes()
    items = payloads(assets, points, WARM, start_s)
    marks: Any = ctx.Queue()
    rows_wanted = assets * (points - 1)
    began = time.monotonic()
    pub = ctx.Process(target=publisher, args=(port, qos, items, 0.0, marks))
    pub.start()
    done = wait(lambda: daemon.metric("arxwatch_rows_total") >= rows_wanted, 600.0, 0.1)
    elapsed = time.monotonic() - began
    pub.join()
    marks.get(timeout=30)
    accepted = daemon.metric("arxwatch_samples_total", outcome="accepted")
    return daemon, {
        "rate": accepted / elapsed,
        "lost": len(items) - accepted,
        "judged": daemon.metric("arxwatch_rows_judged_total"),
        "overflows": daemon.metric("arxwatch_queue_overflows_total"),
        "rows_wanted": rows_wanted,
        "done": float(done),
        "rss_state": float(rss_state),
        "rss_burst": float(daemon.rss_bytes()),
        "warm_s": warm_s,
    }


def main() -> None:
    """Run every phase and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=5000, help="VAV boxes")
    parser.add_argument("--points", type=int, default=20, help="grid points published per box")
    parser.add_argument("--qos", type=int, default=1, choices=(0, 1), help="MQTT QoS")
    parser.add_argument("--alerts", type=int, default=200, help="boxes sent out of range")
    parser.add_argument(
        "--memory-runs",
        type=int,
        default=3,
        help="starts on each restored state whose resident memory is measured (median kept)",
    )
    args = parser.parse_args()
    ctx = mp.get_context("spawn")
    work = Path(tempfile.mkdtemp(prefix="arxwatch-bench-"))
    port = free_port()
    (work / "broker").mkdir()
    (work / "broker" / "mosquitto.conf").write_text(
        f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n"
        "max_queued_messages 1000000\nmax_inflight_messages 1000\n"
        f"user {os.environ.get('USER', 'root')}\n"
    )
    broker = subprocess.Popen(
        [MOSQUITTO, "-c", str(work / "broker" / "mosquitto.conf")],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    daemon: Daemon | None = None
    try:
        wait(lambda: _open(port), 10.0)
        start_s = float(int(time.time()) - 4 * 3600)
        u0 = daily_operation(2880, 60.0, seed=1)
        base = fit_baseline(
            LOOP.simulate(u0, seed=2),
            u0[:, None],
            start_s - 3000 + np.arange(2880.0),
            sample_period_s=1.0,
        ).baseline
        assert base is not None
        n_messages = args.assets * args.points * 2

        # the reference: a bare subscriber
        items = payloads(args.assets, args.points, WARM, start_s)
        result: Any = ctx.Queue()
        marks: Any = ctx.Queue()
        bare = ctx.Process(target=bare_subscriber, args=(port, args.qos, n_messages, result))
        bare.start()
        result.get(timeout=30)
        pub = ctx.Process(target=publisher, args=(port, args.qos, items, 0.0, marks))
        pub.start()
        pub.join()
        marks.get(timeout=30)
        got = result.get(timeout=400)
        bare.join()
        bare_rate = got["count"] / max(got["last"] - got["first"], 1e-9)

        # the daemon on the warm state, then latency at half its rate
        config = site(work, "full", port, args.qos, args.assets, base)
        daemon, full = daemon_run(
            ctx, work, config, port, args.qos, args.assets, args.points, start_s
        )
        latency = _latency(ctx, port, args, start_s, full["rate"] / 2.0)
        daemon.stop()
        daemon = None
        full_rss = [full["rss_state"], *restored_rss(config, work, args.memory_runs - 1)]

        # memory: the same run with a fifth of the boxes; the slope is per asset
        small_assets = max(1, args.assets // 5)
        small_config = site(work, "small", port, args.qos, small_assets, base)
        daemon, small = daemon_run(
            ctx, work, small_config, port, args.qos, small_assets, args.points, start_s
        )
        daemon.stop()
        daemon = None
        small_rss = [small["rss_state"], *restored_rss(small_config, work, args.memory_runs - 1)]

        print(
            f"arxwatch run on loopback: {args.assets:,} VAV boxes x {args.points} grid points "
            f"x 2 signals = {n_messages:,} messages, QoS {args.qos}"
        )
        print(
            f"  bare paho subscriber (parse only)   {bare_rate:10,.0f} msg/s   "
            f"lost {n_messages - got['count']:,}"
        )
        status = "" if full["done"] else "  (not all rows within 600 s)"
        print(
            f"  arxwatch run (aligned, judged)      {full['rate']:10,.0f} samples/s"
            f"   = {full['rate'] / bare_rate:5.2f}x the bare subscriber (target >= 0.70){status}"
        )
        print(
            f"  samples lost                        {full['lost']:10,.0f}"
            f"   rows judged {full['judged']:,.0f} of {full['rows_wanted']:,.0f}"
            f"   dropped at a full inbox {full['overflows']:,.0f}"
        )
        if latency:
            p50, p99 = np.percentile(latency, [50, 99])
            print(
                f"  publish -> alert at half load       p50 {p50 * 1e3:6.0f} ms   "
                f"p99 {p99 * 1e3:6.0f} ms   ({len(latency)} alerts; target p99 < 250 ms)"
            )
        # one start's figure moves by a few hundred kB (the allocator's state
        # after the restore): the median of several starts is steadier
        rss_small, rss_full = float(np.median(small_rss)), float(np.median(full_rss))
        per_asset = (rss_full - rss_small) / (args.assets - small_assets)
        slopes = [
            (f - m) / (args.assets - small_assets) for f, m in zip(full_rss, small_rss, strict=True)
        ]
        base_mib = (rss_small - small_assets * per_asset) / 2**20
        print(
            f"  resident memory, state restored     {rss_small / 2**20:8.1f} MiB with "
            f"{small_assets:,} boxes, {rss_full / 2**20:.1f} MiB with {args.assets:,}"
            f"   (medians of {len(full_rss)} starts)"
        )
        print(
            f"  memory per asset (slope)            {per_asset:10,.0f} bytes (target < 2,048)"
            f"   fixed base {base_mib:.0f} MiB; start by start {min(slopes):,.0f} to "
            f"{max(slopes):,.0f}"
        )
        print(
            f"  after the burst (queued messages)   {full['rss_burst'] / 2**20:8.1f} MiB with "
            f"{args.assets:,} boxes (buffers up to limits.queue_size, not per asset)"
        )
        print(f"  (warm state for {args.assets:,} boxes built in {full['warm_s']:.1f} s)")
    finally:
        if daemon is not None:
            daemon.stop()
        broker.terminate()
        broker.wait(10)


def restored_rss(config: Path, work: Path, times: int) -> list[float]:
    """Start the daemon on its saved state ``times`` times; return its resident memory at each."""
    metrics_port = metrics_port_of(config)
    out = []
    for _ in range(times):
        daemon = Daemon(config, metrics_port, work / "daemon.log")
        daemon.start()
        try:
            time.sleep(1.0)  # as daemon_run measures it
            out.append(float(daemon.rss_bytes()))
        finally:
            daemon.stop()
    return out


def _open(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=0.2):
            return True
    except OSError:
        return False


def _latency(
    ctx: Any, port: int, args: argparse.Namespace, start_s: float, rate: float
) -> list[float]:
    """Publish at ``rate`` with out-of-range triples; return publish -> alert times."""
    offset = WARM + args.points
    points = 6
    items = payloads(args.assets, points, offset, start_s)
    bad = set(range(0, args.assets, max(1, args.assets // args.alerts)))
    marked = []
    for topic, payload in items:
        a = _box(topic)
        if topic.endswith("zone-temp") and a in bad:
            t = payload.split(b'"ts": ')[1]
            payload = b'{"value": 99.0, "ts": ' + t
        marked.append((topic, payload))
    # only the first three points out of range: the third raises the alert
    arrivals: dict[str, float] = {}

    def on_message(_c: Any, _u: Any, message: mqtt.MQTTMessage) -> None:
        record = json.loads(message.payload)
        if record.get("detector") == "out_of_range" and record.get("state") == "raised":
            arrivals.setdefault(record["asset"], time.time())

    watcher = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-watch")
    watcher.on_message = on_message
    watcher.connect("127.0.0.1", port)
    watcher.subscribe("bench/arxwatch/alerts/+/+/events", qos=1)
    watcher.loop_start()
    time.sleep(0.5)
    third: dict[str, float] = {}
    marks: Any = ctx.Queue()
    pub = ctx.Process(
        target=publisher, args=(port, args.qos, marked[: len(marked) // 2], rate, marks)
    )
    pub.start()
    pub.join()
    sent = marks.get(timeout=60)
    third.update(sent)
    time.sleep(3.0)
    watcher.disconnect()
    watcher.loop_stop()
    return [arrivals[_asset_of(t)] - at for t, at in third.items() if _asset_of(t) in arrivals]


def _box(topic: str) -> int:
    building, rest = topic.split("/")[1], topic.split("/")[3]
    return int(building.split("-")[1]) * 500 + int(rest.split("-")[1])


def _asset_of(topic: str) -> str:
    parts = topic.split("/")
    return f"{parts[1]}/{parts[3]}"


if __name__ == "__main__":
    main()
