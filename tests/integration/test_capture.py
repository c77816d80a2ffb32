"""``arxwatch capture`` against a real mosquitto, and live alerts against a replay of the capture.

The capture and the service run as the real commands in their own
processes, each stopped by PID in teardown. The scenario and the service
config are those of ``test_service.py``: three VAV boxes of Larkspur Yard on
a 1 s grid, block-a/vav-1 losing half its valve effect.
"""

from __future__ import annotations

import contextlib
import gzip
import io
import json
import queue
import signal
import subprocess
import sys
import time
import zlib
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from arxwatch.daemon.cli import main
from arxwatch.daemon.history import CaptureWriter, HistoryError, HistoryReader

from .conftest import Broker, Probe, wait_for
from .test_service import SAMPLES, Daemon, baseline_set, events, messages, publish, site

__all__ = ["baseline_set", "site"]  # fixtures of test_service.py used here

CAPTURE_ID = "arxwatch-it-capture"  # the service's client id with the default suffix

NO_BROKER = """
broker: {host: 127.0.0.1, port: 9, client_id: arxwatch-it}
state: {path: /tmp/unused.db}
asset_classes:
  - name: vav
    pattern: "larkspur/{building}/vav/{asset}/{signal}"
    asset_id: "{building}/{asset}"
    sample_period_s: 60
    output: {signal: zone-temp, name: zone temperature, unit: degC, min: -10, max: 40}
    inputs: [{signal: valve, name: reheat valve, unit: "%", min: 0, max: 100}]
    baseline: {learn_for_s: 86400}
"""


class Capture:
    """``arxwatch capture`` in a child process, stopped by PID in teardown."""

    def __init__(self, config: Path, output: Path, log: Path) -> None:
        self.output, self.log_path = output, log
        with log.open("ab") as handle:
            self.process = subprocess.Popen(
                [sys.executable, "-m", "arxwatch.daemon.cli", "capture", "--config", str(config),
                 "--output", str(output)],
                stdin=subprocess.DEVNULL, stdout=handle, stderr=subprocess.STDOUT,
            )  # fmt: skip

    def lines(self) -> int:
        """Complete lines in the capture so far (a gzip capture is read up to its last flush)."""
        if not self.output.exists():
            return 0
        data = self.output.read_bytes()
        if self.output.suffix == ".gz":  # one member, still open: no trailer yet
            data = zlib.decompressobj(wbits=31).decompress(data)
        return data.count(b"\n")

    def terminate(self) -> int:
        """SIGTERM and wait; return the exit status."""
        self.process.send_signal(signal.SIGTERM)
        return self.process.wait(20.0)

    def kill(self) -> None:
        """SIGKILL if still running, and reap."""
        if self.process.poll() is None:
            self.process.kill()
        self.process.wait(10.0)

    def log(self) -> str:
        """Return what the capture wrote to stdout and stderr."""
        return self.log_path.read_text(errors="replace")


@pytest.fixture
def start_capture() -> Iterator[Any]:
    """Start captures (config, output); kill them by PID in teardown."""
    started: list[Capture] = []

    def start(config: Path, output: Path) -> Capture:
        capture = Capture(config, output, output.with_name(output.name + ".log"))
        started.append(capture)
        return capture

    yield start
    for capture in started:
        capture.kill()


def wait_online(watcher: Probe, capture: Capture) -> None:
    """Wait for the capture's retained online status: its subscription is then in place.

    The capture subscribes before it publishes its status on the same
    connection, and the broker handles a connection's packets in order.
    """
    while True:
        try:
            message = watcher.next(20.0)
        except queue.Empty:
            pytest.fail(f"no online status from the capture:\n{capture.log()}")
        if message.topic == f"arxwatch/{CAPTURE_ID}/status":
            assert json.loads(message.payload)["state"] == "online"
            return


def until_offline(watcher: Probe, capture: Capture) -> list[Any]:
    """Return the messages the watcher got up to and including the capture's offline status."""
    received = []
    while True:
        try:
            message = watcher.next(20.0)
        except queue.Empty:
            pytest.fail(f"no offline status from the capture:\n{capture.log()}")
        received.append(message)
        if message.topic == f"arxwatch/{CAPTURE_ID}/status":
            assert json.loads(message.payload)["state"] == "offline"
            return received


@pytest.mark.integration
def test_capture_records_every_message_once_and_publishes_only_its_status(
    site: dict, make_probe: Any, start_capture: Any, tmp_path: Path
) -> None:
    broker: Broker = site["broker"]
    items = messages(1_767_225_600.0)
    watcher = make_probe(broker)
    watcher.subscribe("#")
    output = tmp_path / "larkspur.jsonl"
    capture = start_capture(site["config"], output)
    wait_online(watcher, capture)
    publish(make_probe(broker), items)
    assert wait_for(lambda: capture.lines() >= len(items), 30.0), capture.log()
    assert capture.terminate() == 0, capture.log()
    assert f"captured {len(items):,} messages to {output}" in capture.log()

    recorded = Counter((v.topic, v.payload) for v in HistoryReader(output))
    assert recorded == Counter(items)  # each once, nothing else
    # on the broker: the published points and the capture's own status, nothing else;
    # its offline status left with its last packets, so wait for it before draining
    seen = {message.topic for message in until_offline(watcher, capture)}
    while not watcher.received.empty():
        seen.add(watcher.next(0.1).topic)
    assert seen - {topic for topic, _ in items} == {f"arxwatch/{CAPTURE_ID}/status"}


def alert_key(record: dict) -> tuple:
    return (record["asset"], record["detector"], record["signal"], record["state"],
            record["severity"], record["sample_time"])  # fmt: skip


@pytest.mark.integration
def test_live_alerts_equal_the_replay_of_the_capture(
    site: dict, make_probe: Any, start_capture: Any, tmp_path: Path
) -> None:
    broker: Broker = site["broker"]
    daemon: Daemon = site["daemon"]
    watcher = make_probe(broker)
    watcher.subscribe("#")
    daemon.start()
    output = tmp_path / "larkspur.jsonl.gz"
    capture = start_capture(site["config"], output)
    wait_online(watcher, capture)
    items = messages(float(int(time.time())) - SAMPLES - 60)
    publish(make_probe(broker), items)
    assert wait_for(lambda: daemon.value("arxwatch_rows_total") >= 3 * (SAMPLES - 1), 30.0)
    assert wait_for(lambda: daemon.value("arxwatch_outbox_messages") == 0, 10.0)
    assert wait_for(lambda: capture.lines() >= len(items), 30.0), capture.log()
    assert capture.terminate() == 0, capture.log()
    # the capture never took the service's session
    assert daemon.value("arxwatch_mqtt_session_takeovers_total") == 0
    assert daemon.value("arxwatch_mqtt_connects_total") == 1
    assert daemon.terminate() == 0

    live = events(watcher)
    alerts = tmp_path / "replayed.jsonl"
    with contextlib.redirect_stdout(io.StringIO()):
        code = main(["replay", "--config", str(site["config"]), "--input", str(output),
                     "--alerts", str(alerts)])  # fmt: skip
    assert code == 0
    replayed = [json.loads(line) for line in alerts.read_text().splitlines()]
    # The stale detector is left out: it fires on wall-clock silence (how long since a
    # signal last arrived), which depends on when messages reached each process, not on
    # the samples themselves; everything else is a function of the sample values and times.
    live_keys = sorted(alert_key(r) for r in live if r["detector"] != "stale")
    replay_keys = sorted(alert_key(r) for r in replayed if r["detector"] != "stale")
    assert any(k[0] == "block-a/vav-1" and k[3] == "raised" for k in live_keys)
    assert replay_keys == live_keys


def test_a_gzip_capture_cut_short_is_an_unreadable_line(tmp_path: Path) -> None:
    path = tmp_path / "cut.jsonl.gz"
    with CaptureWriter(path) as writer:
        for k in range(3):
            writer.write(1_767_225_600.0 + k, "larkspur/a/vav/v1/zone-temp", b"21.5")
    with CaptureWriter(path) as writer:  # a second run appends a second gzip member
        writer.write(1_767_225_700.0, "larkspur/a/vav/v1/valve", b"\xff")
    assert [v.payload for v in HistoryReader(path)] == [b"21.5"] * 3 + [b"\xff"]
    assert gzip.decompress(path.read_bytes()).count(b"\n") == 4
    path.write_bytes(path.read_bytes()[:-12])  # killed before the last member was closed
    with pytest.raises(HistoryError, match=r"cut\.jsonl\.gz:5: compressed data ends or breaks"):
        list(HistoryReader(path))
    skipping = HistoryReader(path, on_bad_line="skip")
    assert len(list(skipping)) == 4 and skipping.bad_lines == 1


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--client-id", "arxwatch-it"], "is the service's own: the capture would take over"),
        (["--client-id", "capture/1"], "expected 1 to 64 characters from [A-Za-z0-9_-]"),
        (["--output", "/nonexistent/dir/cap.jsonl"], "cannot write: No such file or directory"),
    ],
)
def test_capture_refuses_bad_options_before_connecting(
    tmp_path: Path, capsys: pytest.CaptureFixture, args: list[str], message: str
) -> None:
    config = tmp_path / "site.yaml"  # port 9: nothing listens; the command must stop sooner
    config.write_text(NO_BROKER)
    output = ["--output", str(tmp_path / "cap.jsonl")]
    assert main(["capture", "--config", str(config), *output, *args]) == 2
    err = capsys.readouterr().err
    assert err.startswith("arxwatch capture: ") and message in err
