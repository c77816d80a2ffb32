"""``arxwatch demo``: the real service, end to end, on a simulated building.

One command, nothing to set up. It

1. starts an MQTT broker of its own on 127.0.0.1 (mosquitto when it is
   installed, else the embedded pure-Python broker of the ``amqtt`` package),
   with its files in a temporary directory;
2. runs Larkspur Yard (:mod:`arxwatch.daemon.building`, an invented site)
   through two fault-free days of commissioning, fits a baseline per asset
   on them and writes the baseline files (format ``arxwatch.baselines``)
   that the service loads, exactly as on a real site;
3. starts the real service (:class:`arxwatch.daemon.service.Service`) with a
   demo config (state store in the temporary directory, metrics on a free
   port of 127.0.0.1), and publishes the building's points over MQTT with
   time accelerated; scheduled faults come after go-live;
4. watches the alert topics with a separate MQTT client and prints each
   alert as it is raised or cleared, with the simulated time;
5. stops after ``duration`` of simulated time, or on Ctrl-C / SIGTERM, in
   order (publisher, service, alert watcher, broker), removes the temporary
   directory, and says which scheduled faults were caught, by which
   detector, after what delay.

**Time.** Everything runs on one scaled clock, in simulated epoch seconds:
the building stamps each sample with it (``"ts"`` in the payload), and the
service gets it as its clock (grid points, staleness, checkpoints). It
runs ``speed`` times faster than the wall clock, but never more than one
sample period ahead of what the building has published and the service has
taken in, and the building waits for the service: if the machine is busy,
simulated time slows down, so a slow moment is not mistaken for a silent
point.

Everything here is invented demo data; it is not a model of a real plant.
"""

from __future__ import annotations

import asyncio
import json
import logging
import math
import os
import pwd
import queue
import shutil
import socket
import subprocess
import tempfile
import threading
import time
import urllib.request
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Literal

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion
from prometheus_client.parser import text_string_to_metric_families

from arxwatch.daemon.alert import CAUTION
from arxwatch.daemon.building import (
    ASSETS,
    CLASSES,
    FAULT_SCHEDULE,
    SAMPLE_PERIOD_S,
    SITE,
    TOPIC_ROOT,
    AssetKind,
    Building,
    ScheduledFault,
    payload,
)
from arxwatch.daemon.config import Config, ConfigError, parse_config
from arxwatch.daemon.library import write_baselines
from arxwatch.daemon.service import Service, StartError
from arxwatch.estimators.baseline import BaselineSet, fit_baseline

__all__ = [
    "BrokerChoice",
    "DemoError",
    "DemoOptions",
    "ScaledClock",
    "demo_config",
    "parse_duration",
    "run_demo",
]

logger = logging.getLogger(__name__)

BrokerChoice = Literal["auto", "mosquitto", "embedded"]
HOST = "127.0.0.1"
COMMISSIONING_DAYS = 2
#: Most wall seconds the broker may take to listen, and a stopping part to end.
START_TIMEOUT_S = 10.0
STOP_TIMEOUT_S = 10.0
#: Wall seconds given to alerts still on their way when the publishing stops.
SETTLE_S = 1.0
#: Simulated seconds between progress lines.
PROGRESS_EVERY_S = 2 * 3600.0


class DemoError(RuntimeError):
    """The demo cannot run; the message says what is missing."""


@dataclass(frozen=True)
class DemoOptions:
    """Settings of one demo run.

    Parameters
    ----------
    broker : {"auto", "mosquitto", "embedded"}
        Which broker to start: mosquitto, the embedded amqtt broker, or
        mosquitto when it is installed and the embedded one otherwise.
    speed : float
        Simulated seconds per wall second (1200: a simulated minute every
        0.05 s).
    duration_s : float
        Simulated seconds of live operation after go-live.
    seed : int
        Seed of the building's actuator moves and sensor noise.
    """

    broker: BrokerChoice = "auto"
    speed: float = 1200.0
    duration_s: float = 14 * 3600.0
    seed: int = 7

    def __post_init__(self) -> None:
        if not (math.isfinite(self.speed) and self.speed > 0.0):
            raise ValueError(f"speed must be a number > 0, got {self.speed!r}")
        if not (math.isfinite(self.duration_s) and self.duration_s >= SAMPLE_PERIOD_S):
            raise ValueError(f"duration must be at least one sample period, got {self.duration_s}")


def parse_duration(text: str) -> float:
    """Read a simulated duration such as ``14h``, ``90m`` or ``1.5d``; return seconds.

    Raises
    ------
    ValueError
        If the text is not a positive number followed by ``m``, ``h`` or ``d``.

    Examples
    --------
    >>> parse_duration("14h"), parse_duration("90m"), parse_duration("0.5d")
    (50400.0, 5400.0, 43200.0)
    """
    units = {"m": 60.0, "h": 3600.0, "d": 86400.0}
    value = text.strip().lower()
    if not value or value[-1] not in units:
        raise ValueError(f"expected a number with a unit m, h or d (e.g. 14h), got {text!r}")
    try:
        number = float(value[:-1])
    except ValueError:
        raise ValueError(f"expected a number before the unit, got {text!r}") from None
    if not (math.isfinite(number) and number > 0.0):
        raise ValueError(f"expected a duration > 0, got {text!r}")
    return number * units[value[-1]]


class ScaledClock:
    """Simulated epoch seconds, ``speed`` times the wall clock, held to what was published.

    Before :meth:`start` it reads ``start_s``. After it, it reads
    ``start_s + speed * (wall seconds since start)``, but never more than
    the limit last set by :meth:`allow` (the publisher sets one sample
    period past its latest grid point) nor one sample period past the
    newest sample the service has taken in (:meth:`follow`), so a busy
    machine slows simulated time instead of making points look silent.

    Parameters
    ----------
    start_s : float
        Simulated epoch seconds at the start.
    speed : float
        Simulated seconds per wall second.
    monotonic : callable
        Wall clock (seconds, monotonic).
    """

    def __init__(
        self, start_s: float, speed: float, monotonic: Callable[[], float] = time.monotonic
    ) -> None:
        self.start_s = start_s
        self.speed = speed
        self._monotonic = monotonic
        self._wall0: float | None = None
        self._limit_s = start_s
        self._taken_in: Callable[[], float | None] = lambda: None

    def follow(self, taken_in: Callable[[], float | None]) -> None:
        """Hold the clock to one sample period past ``taken_in()`` too (newest sample used)."""
        self._taken_in = taken_in

    def start(self) -> None:
        """Let simulated time run from now."""
        self._wall0 = self._monotonic()

    def paced(self) -> float:
        """Return the simulated time the wall clock alone gives (no limit)."""
        if self._wall0 is None:
            return self.start_s
        return self.start_s + (self._monotonic() - self._wall0) * self.speed

    def allow(self, limit_s: float) -> None:
        """Let the clock run up to ``limit_s``."""
        self._limit_s = max(self._limit_s, limit_s)

    def __call__(self) -> float:
        """Return simulated now, epoch seconds."""
        taken = self._taken_in()
        limit = self._limit_s if taken is None else min(self._limit_s, taken + SAMPLE_PERIOD_S)
        return max(min(self.paced(), limit), self.start_s)

    def wait_for_consumer(self, t_s: float, stop: threading.Event) -> bool:
        """Sleep until the consumer has taken in samples up to two periods before ``t_s``.

        Back-pressure: the building does not run ahead of the service.
        False if ``stop`` was set first.
        """
        while not stop.is_set():
            taken = self._taken_in()
            behind = self.start_s if taken is None else taken
            if behind >= t_s - 2 * SAMPLE_PERIOD_S:
                return True
            stop.wait(0.002)
        return False

    def wait_until(self, t_s: float, stop: threading.Event) -> bool:
        """Sleep until the paced time reaches ``t_s``; False if ``stop`` was set first."""
        while not stop.is_set():
            ahead_s = (t_s - self.paced()) / self.speed
            if ahead_s <= 0.0:
                return True
            stop.wait(min(ahead_s, 0.2))
        return False


# -- brokers ------------------------------------------------------------------
def free_port() -> int:
    """Return a TCP port of 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((HOST, 0))
        port: int = sock.getsockname()[1]
        return port


def _listening(port: int) -> bool:
    try:
        with socket.create_connection((HOST, port), timeout=0.2):
            return True
    except OSError:
        return False


def find_mosquitto() -> str | None:
    """Path of the mosquitto binary: on PATH, else Debian's /usr/sbin/mosquitto, else None."""
    found = shutil.which("mosquitto")
    if found is None and os.access("/usr/sbin/mosquitto", os.X_OK):
        found = "/usr/sbin/mosquitto"
    return found


class MosquittoBroker:
    """A mosquitto process on 127.0.0.1 with its own config and log in ``directory``.

    The queue of a subscriber that is away or slow holds up to 100,000
    messages (mosquitto's default of 1,000 would drop points during a
    burst); there is no persistence file.
    """

    name = "mosquitto"

    def __init__(self, binary: str, directory: Path) -> None:
        self.binary = binary
        self.directory = directory
        self.port = free_port()
        self.protocol: Literal["mqtt5", "mqtt311"] = "mqtt5"
        self._process: subprocess.Popen[bytes] | None = None

    @property
    def pid(self) -> int | None:
        """PID of the broker process, None when not running."""
        return None if self._process is None else self._process.pid

    def start(self) -> None:
        """Start mosquitto and wait until it listens.

        Raises
        ------
        DemoError
            If it exits or does not listen in time; the message carries its log.
        """
        config = self.directory / "mosquitto.conf"
        log = self.directory / "mosquitto.log"
        config.write_text(
            "\n".join(
                [
                    # as root, mosquitto would switch to user "mosquitto", which
                    # cannot read our private directory: stay who we are
                    f"user {pwd.getpwuid(os.getuid()).pw_name}",
                    "allow_anonymous true",
                    "persistence false",
                    "max_queued_messages 100000",
                    f"log_dest file {log}",
                    f"listener {self.port} {HOST}",
                ]
            )
            + "\n",
            encoding="utf-8",
        )
        with (self.directory / "mosquitto.out").open("wb") as out:
            self._process = subprocess.Popen(
                [self.binary, "-c", str(config)],
                stdin=subprocess.DEVNULL,
                stdout=out,
                stderr=subprocess.STDOUT,
            )
        deadline = time.monotonic() + START_TIMEOUT_S
        while not _listening(self.port):
            if self._process.poll() is not None or time.monotonic() > deadline:
                self.stop()
                text = "".join(
                    p.read_text(errors="replace")
                    for p in (self.directory / "mosquitto.out", log)
                    if p.exists()
                )
                raise DemoError(f"mosquitto ({self.binary}) did not start:\n{text.strip()}")
            time.sleep(0.05)

    def stop(self) -> None:
        """SIGTERM, wait, SIGKILL if it hangs; reap the process."""
        process, self._process = self._process, None
        if process is None:
            return
        if process.poll() is None:
            process.terminate()
            try:
                process.wait(STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(STOP_TIMEOUT_S)


class EmbeddedBroker:
    """The ``amqtt`` broker in a thread of this process, on 127.0.0.1.

    It speaks MQTT 3.1.1 only, so the service is configured for it
    (``protocol: mqtt311``); enough for a demo, not meant for a site.
    """

    name = "embedded (amqtt)"
    pid: int | None = None

    def __init__(self) -> None:
        self.port = free_port()
        self.protocol: Literal["mqtt5", "mqtt311"] = "mqtt311"
        self._loop = asyncio.new_event_loop()
        self._thread: threading.Thread | None = None
        self._broker: Any = None

    def start(self) -> None:
        """Start the broker thread and wait until it listens.

        Raises
        ------
        DemoError
            If amqtt is not installed or the broker does not start.
        """
        try:
            from amqtt.broker import Broker  # type: ignore[import-untyped]
        except ImportError:
            raise DemoError(
                "the embedded broker needs the amqtt package (pip install amqtt), "
                "or install mosquitto"
            ) from None
        config = {
            "listeners": {"default": {"type": "tcp", "bind": f"{HOST}:{self.port}"}},
            "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {}},
        }
        started = threading.Event()
        failure: list[BaseException] = []

        def serve() -> None:
            asyncio.set_event_loop(self._loop)

            async def begin() -> None:
                self._broker = Broker(config, loop=self._loop)
                await self._broker.start()

            try:
                self._loop.run_until_complete(begin())
            except Exception as err:  # reported to the caller below
                failure.append(err)
                started.set()
                return
            started.set()
            self._loop.run_forever()

        self._thread = threading.Thread(target=serve, name="demo-broker", daemon=True)
        self._thread.start()
        # no probe connection here: amqtt logs an error for a client that sends nothing
        if not started.wait(START_TIMEOUT_S) or failure:
            self.stop()
            raise DemoError(f"the embedded broker did not start: {failure[0] if failure else ''}")

    def stop(self) -> None:
        """Shut the broker down and end its thread."""
        thread, self._thread = self._thread, None
        if thread is None:
            return
        if self._broker is not None and self._loop.is_running():
            shutdown = asyncio.run_coroutine_threadsafe(self._broker.shutdown(), self._loop)
            try:
                shutdown.result(STOP_TIMEOUT_S)
            except Exception as err:  # a broker that fails to stop is still left behind
                logger.warning("the embedded broker did not shut down cleanly: %s", err)
        if self._loop.is_running():
            self._loop.call_soon_threadsafe(self._loop.stop)
        thread.join(STOP_TIMEOUT_S)
        if not self._loop.is_running():
            self._loop.close()


Broker = MosquittoBroker | EmbeddedBroker


def make_broker(choice: BrokerChoice, directory: Path) -> Broker:
    """Return the broker asked for (``auto``: mosquitto when installed, else embedded).

    Raises
    ------
    DemoError
        If ``mosquitto`` was asked for and is not installed.
    """
    binary = find_mosquitto()
    if choice == "mosquitto" and binary is None:
        raise DemoError(
            "mosquitto is not installed (Debian: apt-get install mosquitto); "
            "use --broker embedded or auto"
        )
    if choice != "embedded" and binary is not None:
        return MosquittoBroker(binary, directory)
    return EmbeddedBroker()


# -- baselines and config -------------------------------------------------------
@dataclass(frozen=True)
class Commissioned:
    """Baselines fitted on the commissioning history, and a table line per asset."""

    baselines: dict[AssetKind, dict[str, BaselineSet]]
    table: list[str]


def commission(building: Building, start_s: float, end_s: float) -> Commissioned:
    """Step ``building`` from ``start_s`` to ``end_s`` (fault-free) and fit a baseline per asset.

    The order is chosen by BIC and the fit judged by the acceptance rule,
    as for any baseline; a refused asset is left out (it is not judged).
    """
    columns: dict[tuple[str, str], list[float]] = {}
    times = np.arange(start_s, end_s, SAMPLE_PERIOD_S)
    for t in times.tolist():
        for spec, signal, value in building.step(t):
            columns.setdefault((spec.asset_id, signal), []).append(value)
    out: dict[AssetKind, dict[str, BaselineSet]] = {kind: {} for kind in CLASSES}
    table = [
        f"  {'asset':18} {'model':14} {'fit':>7}  {'gain':>14}  {'time const.':>12}  "
        f"{'dead time':>9}  verdict"
    ]
    for spec in building.assets:
        names = CLASSES[spec.kind]
        y = np.array(columns[(spec.asset_id, names.output)])
        u = np.array(columns[(spec.asset_id, names.actuator)])
        result = fit_baseline(y, u[:, None], times, sample_period_s=SAMPLE_PERIOD_S)
        baseline = result.baseline
        if baseline is None:
            table.append(f"  {spec.asset_id:18} refused: {'; '.join(result.reasons)}")
            continue
        out[spec.kind][spec.asset_id] = BaselineSet((baseline,))
        order, readout = baseline.order, baseline.readout
        model = f"na={order.na} nb={order.nb[0]} nk={order.nk[0]}"
        table.append(
            f"  {spec.asset_id:18} {model:14} {baseline.fit_percent:5.1f} %  "
            f"{readout.gains[0]:+.3f} K per %  {readout.time_constant_s / 60:8.1f} min  "
            f"{readout.dead_times_s[0] / 60:5.0f} min  accepted"
        )
    return Commissioned(out, table)


def demo_config(
    broker_port: int,
    protocol: str,
    metrics_port: int,
    state_path: Path,
    baseline_files: dict[AssetKind, Path],
) -> Config:
    """Return the service's demo config: one asset class per kind of Larkspur Yard asset.

    Checkpoints every simulated hour; everything else as a site would have it.
    """
    lines = [
        f"broker: {{host: {HOST}, port: {broker_port}, client_id: arxwatch-demo, "
        f"protocol: {protocol}, keepalive_s: 10}}",
        f'metrics: {{listen: "{HOST}:{metrics_port}"}}',
        f"state: {{path: {json.dumps(str(state_path))}, checkpoint_every_s: 3600}}",
        "asset_classes:",
    ]
    for kind, spec in CLASSES.items():
        low, high = spec.output_range
        lines += [
            f"  - name: {kind}",
            f'    pattern: "{TOPIC_ROOT}/{{building}}/{kind}/{{asset}}/{{signal}}"',
            '    asset_id: "{building}/{asset}"',
            f"    sample_period_s: {SAMPLE_PERIOD_S:g}",
            f"    output: {{signal: {spec.output}, name: {spec.output_name}, "
            f"unit: {spec.output_unit}, min: {low:g}, max: {high:g}}}",
            "    inputs:",
            f'      - {{signal: {spec.actuator}, name: {spec.actuator_name}, unit: "%", '
            "min: 0, max: 100}",
            "    payload: {kind: json, value_field: value, time_field: ts, time_format: epoch_s}",
            "    model: auto",
            f"    baseline: {{file: {json.dumps(str(baseline_files[kind]))}}}",
        ]
    return parse_config("\n".join(lines) + "\n", "<demo config>")


# -- watching ---------------------------------------------------------------------
def sim_time(t_s: float) -> str:
    """Format simulated time for the reader: ``Wed 02 Dec 09:05``."""
    return datetime.fromtimestamp(t_s, tz=UTC).strftime("%a %d %b %H:%M")


def _record_time(record: dict[str, Any]) -> float:
    return datetime.fromisoformat(record["sample_time"].replace("Z", "+00:00")).timestamp()


def alert_line(record: dict[str, Any]) -> str:
    """One readable line for an alert record."""
    state = "RAISED " if record["state"] == "raised" else "cleared"
    return (
        f"  {sim_time(_record_time(record))}  {state} {record['severity']:8} "
        f"{record['asset']:17} {record['detector']}/{record['signal']}: {record['reading']}"
    )


class AlertWatcher:
    """A separate MQTT client on the alert event topics; records go to a queue."""

    def __init__(self, config: Config) -> None:
        self.records: queue.Queue[dict[str, Any]] = queue.Queue()
        self.topic = f"{config.topics.alerts_prefix}/#"
        broker = config.broker
        protocol = (
            MQTTProtocolVersion.MQTTv5
            if broker.protocol == "mqtt5"
            else MQTTProtocolVersion.MQTTv311
        )
        self.client = mqtt.Client(
            CallbackAPIVersion.VERSION2, client_id="arxwatch-demo-watcher", protocol=protocol
        )
        self.client.on_connect = self._on_connect
        self.client.on_message = self._on_message
        self.subscribed = threading.Event()
        self.client.on_subscribe = lambda *args: self.subscribed.set()
        self.client.connect(broker.host, broker.port, keepalive=10)
        self.client.loop_start()

    def _on_connect(self, client: mqtt.Client, userdata: Any, *args: Any) -> None:
        client.subscribe(self.topic, qos=1)

    def _on_message(self, client: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        if not message.topic.endswith("/events"):
            return  # the retained per-asset state
        try:
            record = json.loads(message.payload)
        except ValueError:
            return
        if isinstance(record, dict) and "asset" in record:
            self.records.put(record)

    def stop(self) -> None:
        """Disconnect and end the network thread."""
        self.client.disconnect()
        self.client.loop_stop()


def scrape(metrics_port: int) -> dict[str, float]:
    """Sum of each metric's samples on the service's /metrics, {} when unreachable."""
    try:
        url = f"http://{HOST}:{metrics_port}/metrics"
        with urllib.request.urlopen(url, timeout=1.0) as response:
            text = response.read().decode("utf-8")
    except OSError:
        return {}
    out: dict[str, float] = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[sample.name] = out.get(sample.name, 0.0) + sample.value
    return out


# -- the summary -------------------------------------------------------------------
def verdicts(
    schedule: Sequence[ScheduledFault],
    records: Sequence[dict[str, Any]],
    live_s: float,
    reached_s: float,
) -> list[str]:
    """Say, per scheduled fault, whether and how it was caught.

    A fault counts as caught by the first alert raised on its asset at or
    after its start, preferably of the family it belongs to.
    """
    lines = []
    for item in schedule:
        start = live_s + item.after_s
        head = f"  {sim_time(start)}  {item.asset:17} {item.title}"
        if start > reached_s:
            lines.append(f"{head}\n      not reached: the demo stopped before")
            continue
        raised = [
            r
            for r in records
            if r["asset"] == item.asset and r["state"] == "raised" and _record_time(r) >= start
        ]
        raised.sort(key=lambda r: (r["family"] != item.family, _record_time(r)))
        if not raised:
            lines.append(f"{head}\n      NOT caught by the end of the run")
            continue
        first = raised[0]
        delay_min = (_record_time(first) - start) / 60.0
        lines.append(
            f"{head}\n      caught by {first['detector']} ({first['family']}, "
            f"{first['severity']}) after {delay_min:.0f} min"
        )
    return lines


def unexplained(
    schedule: Sequence[ScheduledFault], records: Sequence[dict[str, Any]], live_s: float
) -> list[dict[str, Any]]:
    """Return alerts raised on an asset before its scheduled fault, or on one without."""
    starts = {item.asset: live_s + item.after_s for item in schedule}
    return [
        r
        for r in records
        if r["state"] == "raised" and _record_time(r) < starts.get(r["asset"], math.inf)
    ]


# -- the run --------------------------------------------------------------------------
def _publish(
    building: Building,
    client: mqtt.Client,
    clock: ScaledClock,
    end_s: float,
    stop: threading.Event,
    reached: list[float],
) -> None:
    """Publish the building's points at each grid time, paced by the clock, until ``end_s``."""
    t = clock.start_s
    clock.start()
    while t < end_s and clock.wait_until(t, stop) and clock.wait_for_consumer(t, stop):
        for spec, signal, value in building.step(t):
            client.publish(spec.topic(signal), payload(value, t), qos=1)
        reached.append(t)
        clock.allow(t + SAMPLE_PERIOD_S)
        t += SAMPLE_PERIOD_S


def run_demo(options: DemoOptions, write: Callable[[str], None], stop: threading.Event) -> int:
    """Run the demonstration, writing lines through ``write``; stop early when ``stop`` is set.

    Returns
    -------
    int
        0 when it ran (also when stopped early), 1 when it could not start.
    """
    directory = Path(tempfile.mkdtemp(prefix="arxwatch-demo-"))
    broker: Broker | None = None
    try:
        broker = make_broker(options.broker, directory)
        broker.start()
        return _run(options, write, stop, directory, broker)
    except DemoError as err:
        write(f"arxwatch demo: cannot run: {err}")
        return 1
    finally:
        if broker is not None:
            broker.stop()
        shutil.rmtree(directory, ignore_errors=True)


def _run(
    options: DemoOptions,
    write: Callable[[str], None],
    stop: threading.Event,
    directory: Path,
    broker: Broker,
) -> int:
    # go-live at midnight UTC of today, simulated; commissioning the two days before
    live_s = math.floor(time.time() / 86400.0) * 86400.0
    end_s = live_s + options.duration_s
    minute_wall_s = SAMPLE_PERIOD_S / options.speed
    write(f"arxwatch demo: {SITE}, an invented site; simulated data, real service")
    where = "" if broker.pid is None else f", pid {broker.pid}"
    write(f"broker: {broker.name} on {HOST}:{broker.port}{where}")
    write(f"working files: {directory} (removed at the end)")
    write(
        f"time: one simulated minute every {minute_wall_s:.3g} s of wall time; "
        f"{options.duration_s / 3600:g} simulated hours after go-live "
        f"(about {options.duration_s / options.speed:.0f} s); Ctrl-C stops early"
    )
    write("")

    building = Building(live_s, seed=options.seed)
    start_s = live_s - COMMISSIONING_DAYS * 86400.0
    write(
        f"commissioning: {COMMISSIONING_DAYS} fault-free days, {sim_time(start_s)} to "
        f"{sim_time(live_s)}; a baseline per asset (order by BIC, fit on held-back data):"
    )
    commissioned = commission(building, start_s, live_s)
    for line in commissioned.table:
        write(line)
    files: dict[AssetKind, Path] = {}
    for kind, baselines in commissioned.baselines.items():
        files[kind] = directory / f"baselines-{kind}.json"
        write_baselines(files[kind], baselines, live_s)
    write("")

    metrics_port = free_port()
    try:
        config = demo_config(
            broker.port, broker.protocol, metrics_port, directory / "state.db", files
        )
    except ConfigError as err:  # the demo's own config: a bug, said plainly
        raise DemoError(f"the demo config is invalid: {err}") from None
    clock = ScaledClock(live_s, options.speed)
    # the service is made in its own thread: its SQLite store belongs to that thread
    service_stop = threading.Event()
    started = threading.Event()
    failures: list[BaseException] = []

    def serve() -> None:
        try:
            service = Service(config, {}, clock=clock)
        except (StartError, ConfigError) as err:
            failures.append(DemoError(f"the service cannot start: {err}"))
            started.set()
            return
        clock.follow(lambda: service.pipeline.last_sample_s)
        started.set()
        try:
            service.run(service_stop)
        except Exception as err:  # reported after the run
            failures.append(err)

    server = threading.Thread(target=serve, name="demo-service")
    server.start()
    started.wait()
    if failures:
        server.join()
        raise DemoError(str(failures[0]))
    watcher: AlertWatcher | None = None
    publisher_client: mqtt.Client | None = None
    records: list[dict[str, Any]] = []
    reached: list[float] = []
    publisher_stop = threading.Event()
    publisher: threading.Thread | None = None
    try:
        watcher = AlertWatcher(config)
        watcher.subscribed.wait(START_TIMEOUT_S)
        publisher_client = mqtt.Client(
            CallbackAPIVersion.VERSION2,
            client_id="larkspur-yard-controllers",
            protocol=MQTTProtocolVersion.MQTTv311,
        )
        publisher_client.max_queued_messages_set(0)
        publisher_client.connect(HOST, broker.port, keepalive=10)
        publisher_client.loop_start()
        write(f"the service: metrics on http://{config.metrics.listen}/metrics")
        write(
            f"alerts: MQTT topics {config.topics.events_topic('<asset>')}, shown here as they come"
        )
        write("scheduled faults (unknown to the service):")
        for item in FAULT_SCHEDULE:
            write(f"  {sim_time(live_s + item.after_s)}  {item.asset:17} {item.title}")
        write("")
        write(
            f"{sim_time(live_s)}  go-live: {len(ASSETS)} assets publishing; the first eight "
            "hours set the monitor's reference (how its model errors normally look); the "
            "faults come after"
        )
        publisher = threading.Thread(
            target=_publish,
            args=(building, publisher_client, clock, end_s, publisher_stop, reached),
            name="demo-building",
        )
        wall_start = time.monotonic()
        publisher.start()
        next_progress = live_s + PROGRESS_EVERY_S
        while publisher.is_alive() and not stop.is_set():
            _drain(watcher, records, write)
            if clock() >= next_progress:
                _progress(next_progress, metrics_port, write)
                next_progress += PROGRESS_EVERY_S
            stop.wait(0.05)
        publisher_stop.set()
        publisher.join()
        settle = time.monotonic() + SETTLE_S
        while time.monotonic() < settle and not stop.is_set():
            _drain(watcher, records, write)
            time.sleep(0.05)
    finally:
        publisher_stop.set()
        if publisher is not None:
            publisher.join()
        service_stop.set()
        server.join()
        if publisher_client is not None:
            publisher_client.disconnect()
            publisher_client.loop_stop()
        if watcher is not None:
            _drain(watcher, records, write)
            watcher.stop()
    reached_s = reached[-1] if reached else live_s - SAMPLE_PERIOD_S
    wall_s = time.monotonic() - wall_start
    write("")
    write(
        f"{'stopped' if stop.is_set() else 'done'} at {sim_time(reached_s)} simulated, after "
        f"{wall_s:.0f} s ({(reached_s - live_s) / max(wall_s, 1e-9):.0f} simulated seconds "
        "per second); scheduled faults:"
    )
    for line in verdicts(FAULT_SCHEDULE, records, live_s, reached_s):
        write(line)
    other = unexplained(FAULT_SCHEDULE, records, live_s)
    write(
        f"other alerts raised (assets without a fault, or before it): {len(other)}"
        + "".join(f"\n{alert_line(r)}" for r in other)
    )
    if failures:
        write(f"the service stopped with an error: {failures[0]!r}")
        return 1
    write("")
    write(CAUTION)
    return 0


def _drain(
    watcher: AlertWatcher, records: list[dict[str, Any]], write: Callable[[str], None]
) -> None:
    while True:
        try:
            record = watcher.records.get_nowait()
        except queue.Empty:
            return
        records.append(record)
        write(alert_line(record))


def _progress(t_s: float, metrics_port: int, write: Callable[[str], None]) -> None:
    values = scrape(metrics_port)
    if not values:
        return
    write(
        f"  {sim_time(t_s)}  ... rows judged {values.get('arxwatch_rows_judged_total', 0):.0f}, "
        f"alerts active {values.get('arxwatch_active_alerts', 0):.0f} (from /metrics)"
    )
