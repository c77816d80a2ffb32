"""Real-broker fixtures: mosquitto on 127.0.0.1, test certificates, MQTT clients.

``make_broker(...)`` starts the Debian ``mosquitto`` binary on a free
loopback port with its own config file, data directory and log under
``tmp_path``; ``broker`` is one started with the defaults. The object it
gives has ``host``, ``port``, ``tls_port``, ``pid`` and ``stop()`` (SIGTERM:
mosquitto saves its persistence file), ``kill()`` (SIGKILL: it saves
nothing), ``start()`` (same port, config and data directory) and ``log()``.
Every broker is killed by PID and reaped in teardown, also when the test
failed.

mosquitto started as root switches to the user named by its ``user`` option
(default ``mosquitto``), which could not read a config under root's 0700
pytest directory nor write its data directory there. The config therefore
names the user running the tests: as root mosquitto stays root, and as an
ordinary user the option has no effect (mosquitto.conf(5), ``user``). It
logs one warning about running as root; nothing else changes.

``tls_files`` makes a throw-away CA, a server certificate for 127.0.0.1 and
a second, unrelated CA with the ``openssl`` command; ``password_file`` runs
``mosquitto_passwd``. ``topic_prefix`` gives each test its own topic tree,
``make_probe`` plain paho clients to publish and watch with, and
``make_link`` :class:`~arxwatch.daemon.ingest.MqttLink` objects that are
stopped in teardown.
"""

from __future__ import annotations

import os
import pwd
import queue
import re
import shutil
import signal
import socket
import subprocess
import time
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from arxwatch.daemon.config import BrokerConfig, TlsConfig
from arxwatch.daemon.ingest import Incoming, MqttLink

MOSQUITTO = shutil.which("mosquitto") or (
    "/usr/sbin/mosquitto" if os.access("/usr/sbin/mosquitto", os.X_OK) else None
)
MOSQUITTO_PASSWD = shutil.which("mosquitto_passwd")
OPENSSL = shutil.which("openssl")
HOST = "127.0.0.1"
START_TIMEOUT_S = 5.0
STOP_TIMEOUT_S = 5.0


def free_port() -> int:
    """Return a TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((HOST, 0))
        port: int = sock.getsockname()[1]
        return port


def port_open(port: int) -> bool:
    """Whether something accepts TCP connections on 127.0.0.1:``port``."""
    try:
        with socket.create_connection((HOST, port), timeout=0.2):
            return True
    except OSError:
        return False


def wait_for(condition: Callable[[], bool], timeout_s: float, interval_s: float = 0.05) -> bool:
    """Poll ``condition`` until it holds or ``timeout_s`` passed; return its last value."""
    deadline = time.monotonic() + timeout_s
    while True:
        if condition():
            return True
        if time.monotonic() >= deadline:
            return False
        time.sleep(interval_s)


@dataclass(frozen=True)
class TlsFiles:
    """Test PKI: ``ca_file`` signs ``cert_file`` (SAN 127.0.0.1); ``other_ca_file`` does not."""

    ca_file: Path
    cert_file: Path
    key_file: Path
    other_ca_file: Path


class Broker:
    """One mosquitto process on 127.0.0.1 with its config, data directory and log.

    Parameters
    ----------
    directory : Path
        Holds ``mosquitto.conf``, ``data/`` and ``mosquitto.log``.
    lines : sequence of str
        Config lines.
    port, tls_port : int, int or None
        Plain and TLS listener ports.
    """

    def __init__(
        self, directory: Path, lines: Sequence[str], port: int, tls_port: int | None
    ) -> None:
        self.host = HOST
        self.port = port
        self.tls_port = tls_port
        self.directory = directory
        self.data_dir = directory / "data"
        self.config_path = directory / "mosquitto.conf"
        self.log_path = directory / "mosquitto.log"
        self.output_path = directory / "mosquitto.out"
        self.data_dir.mkdir(parents=True, exist_ok=True)
        self.config_path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        self._process: subprocess.Popen[bytes] | None = None

    @property
    def pid(self) -> int | None:
        """PID of the running broker, None when it is not running."""
        return None if self._process is None else self._process.pid

    @property
    def running(self) -> bool:
        """Whether the broker process is alive."""
        return self._process is not None and self._process.poll() is None

    def log(self) -> str:
        """Return the broker's output (start-up problems) and log so far."""
        return "".join(
            path.read_text(encoding="utf-8", errors="replace")
            for path in (self.output_path, self.log_path)
            if path.exists()
        )

    def start(self, timeout_s: float = START_TIMEOUT_S) -> None:
        """Start mosquitto and wait until its listeners accept connections.

        Raises
        ------
        RuntimeError
            If it is already running, exits, or does not listen in time;
            the message carries its log.
        """
        assert MOSQUITTO is not None
        if self.running:
            raise RuntimeError(f"mosquitto already runs as PID {self.pid}")
        with self.output_path.open("ab") as log:
            self._process = subprocess.Popen(
                [MOSQUITTO, "-c", str(self.config_path)],
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        ports = [self.port] + ([self.tls_port] if self.tls_port is not None else [])
        deadline = time.monotonic() + timeout_s
        while not all(port_open(port) for port in ports):
            if not self.running or time.monotonic() > deadline:
                self.kill()
                raise RuntimeError(f"mosquitto did not start listening:\n{self.log()}")
            time.sleep(0.05)

    def stop(self, timeout_s: float = STOP_TIMEOUT_S) -> None:
        """SIGTERM (mosquitto saves its persistence file), wait, SIGKILL if it hangs."""
        process = self._process
        if process is None:
            return
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            try:
                process.wait(timeout_s)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout_s)
        self._process = None

    def kill(self) -> None:
        """SIGKILL and reap; nothing is saved."""
        process = self._process
        if process is None:
            return
        if process.poll() is None:
            process.kill()
        process.wait(STOP_TIMEOUT_S)
        self._process = None


def _config_lines(
    port: int,
    data_dir: Path,
    *,
    persistence: bool,
    autosave_interval: int | None,
    max_queued_messages: int | None,
    max_inflight_messages: int | None,
    tls: TlsFiles | None,
    tls_port: int | None,
    password_file: Path | None,
    extra: Sequence[str],
) -> list[str]:
    lines = [
        # Stay the current user (see the module docstring).
        f"user {pwd.getpwuid(os.getuid()).pw_name}",
        "per_listener_settings false",
        f"allow_anonymous {'false' if password_file else 'true'}",
        f"persistence {'true' if persistence else 'false'}",
        f"persistence_location {data_dir}/",
        f"log_dest file {data_dir.parent / 'mosquitto.log'}",
        "log_type all",
        "log_timestamp_format %H:%M:%S",
    ]
    if autosave_interval is not None:
        lines.append(f"autosave_interval {autosave_interval}")
    if max_queued_messages is not None:
        lines.append(f"max_queued_messages {max_queued_messages}")
    if max_inflight_messages is not None:
        lines.append(f"max_inflight_messages {max_inflight_messages}")
    if password_file is not None:
        lines.append(f"password_file {password_file}")
    lines.extend(extra)
    lines.append(f"listener {port} {HOST}")
    if tls is not None and tls_port is not None:
        lines += [
            f"listener {tls_port} {HOST}",
            f"cafile {tls.ca_file}",
            f"certfile {tls.cert_file}",
            f"keyfile {tls.key_file}",
        ]
    return lines


MakeBroker = Callable[..., Broker]


@pytest.fixture
def make_broker(tmp_path: Path) -> Iterator[MakeBroker]:
    """Make mosquitto brokers on 127.0.0.1; kill them all by PID in teardown.

    Keyword arguments: ``persistence`` (False), ``autosave_interval``,
    ``max_queued_messages``, ``max_inflight_messages`` (mosquitto's defaults
    when None), ``tls`` (a :class:`TlsFiles`: adds a TLS listener on
    ``tls_port``), ``password_file`` (anonymous access is then refused),
    ``extra`` (more config lines, global section) and ``start`` (True; False
    returns it stopped, e.g. to test a broker that comes up late).
    """
    if MOSQUITTO is None:
        pytest.skip("mosquitto is not installed (Debian: apt-get install mosquitto)")
    brokers: list[Broker] = []

    def make(
        *,
        persistence: bool = False,
        autosave_interval: int | None = None,
        max_queued_messages: int | None = None,
        max_inflight_messages: int | None = None,
        tls: TlsFiles | None = None,
        password_file: Path | None = None,
        extra: Sequence[str] = (),
        start: bool = True,
    ) -> Broker:
        directory = tmp_path / f"mosquitto-{len(brokers)}"
        port = free_port()
        tls_port = free_port() if tls is not None else None
        lines = _config_lines(
            port,
            directory / "data",
            persistence=persistence,
            autosave_interval=autosave_interval,
            max_queued_messages=max_queued_messages,
            max_inflight_messages=max_inflight_messages,
            tls=tls,
            tls_port=tls_port,
            password_file=password_file,
            extra=extra,
        )
        broker = Broker(directory, lines, port, tls_port)
        brokers.append(broker)
        if start:
            broker.start()
        return broker

    try:
        yield make
    finally:
        for broker in brokers:
            broker.kill()


@pytest.fixture
def broker(make_broker: MakeBroker) -> Broker:
    """Start a mosquitto with the defaults (anonymous, no persistence)."""
    return make_broker()


def _openssl(*args: str, cwd: Path) -> None:
    assert OPENSSL is not None
    subprocess.run([OPENSSL, *args], cwd=cwd, check=True, capture_output=True, timeout=30)


@pytest.fixture(scope="session")
def tls_files(tmp_path_factory: pytest.TempPathFactory) -> TlsFiles:
    """Make a test CA, a server certificate for 127.0.0.1 signed by it, and a second CA."""
    if OPENSSL is None:
        pytest.skip("the openssl command is not installed")
    directory = tmp_path_factory.mktemp("pki")
    curve = ("-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes")
    for name in ("ca", "other-ca"):
        _openssl(
            "req", "-x509", *curve, "-keyout", f"{name}.key", "-out", f"{name}.crt",
            "-days", "2", "-subj", f"/O=Larkspur Yard test/CN={name}",
            cwd=directory,
        )  # fmt: skip
    (directory / "server.ext").write_text(
        "subjectAltName=IP:127.0.0.1\nbasicConstraints=CA:FALSE\n"
        "keyUsage=digitalSignature\nextendedKeyUsage=serverAuth\n",
        encoding="ascii",
    )
    _openssl(
        "req", *curve, "-keyout", "server.key", "-out", "server.csr",
        "-subj", "/O=Larkspur Yard test/CN=127.0.0.1",
        cwd=directory,
    )  # fmt: skip
    _openssl(
        "x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "server.crt", "-days", "2", "-extfile", "server.ext",
        cwd=directory,
    )  # fmt: skip
    return TlsFiles(
        ca_file=directory / "ca.crt",
        cert_file=directory / "server.crt",
        key_file=directory / "server.key",
        other_ca_file=directory / "other-ca.crt",
    )


@pytest.fixture
def password_file(tmp_path: Path) -> Callable[[Mapping[str, str]], Path]:
    """Write a mosquitto password file for ``{user: password}`` with mosquitto_passwd."""
    if MOSQUITTO_PASSWD is None:
        pytest.skip("mosquitto_passwd is not installed")

    def write(users: Mapping[str, str]) -> Path:
        assert MOSQUITTO_PASSWD is not None
        path = tmp_path / f"passwords-{uuid.uuid4().hex[:8]}"
        path.touch(mode=0o600)
        for user, secret in users.items():
            subprocess.run(
                [MOSQUITTO_PASSWD, "-b", str(path), user, secret],
                check=True,
                capture_output=True,
                timeout=30,
            )
        return path

    return write


@pytest.fixture
def topic_prefix(request: pytest.FixtureRequest) -> str:
    """Return a topic tree of this test's own: ``test/<test name>-<random>``."""
    name = re.sub(r"[^A-Za-z0-9_-]+", "-", request.node.name)[:60]
    return f"test/{name}-{uuid.uuid4().hex[:8]}"


def broker_config(broker: Broker | int, client_id: str, **changes: Any) -> BrokerConfig:
    """Return a :class:`BrokerConfig` for ``broker`` (a port: on 127.0.0.1) plus ``changes``."""
    config = BrokerConfig(
        host=HOST,
        port=broker if isinstance(broker, int) else broker.port,
        client_id=client_id,
        keepalive_s=10,
        qos=1,
        session_expiry_s=300,
        protocol="mqtt5",
        tls=None,
        username=None,
        password_file=None,
        password_env=None,
        allow_plaintext_password=True,
    )
    return replace(config, **changes)


def tls_config(files: TlsFiles, *, ca_file: Path | None = None) -> TlsConfig:
    """Return TLS settings trusting ``ca_file`` (default: the CA that signed the server)."""
    return TlsConfig(ca_file=ca_file or files.ca_file, cert_file=None, key_file=None)


MakeLink = Callable[..., tuple[MqttLink, "queue.Queue[Incoming]"]]


@pytest.fixture
def make_link() -> Iterator[MakeLink]:
    """Make :class:`MqttLink` objects with their inbox; stop every one in teardown.

    ``make_link(config, subscriptions, status_topic, maxsize=100, start=True,
    password=None, **kwargs)`` returns ``(link, inbox)``.
    """
    links: list[MqttLink] = []

    def make(
        config: BrokerConfig,
        subscriptions: Sequence[str],
        status_topic: str,
        *,
        maxsize: int = 100,
        start: bool = True,
        password: str | None = None,
        **kwargs: Any,
    ) -> tuple[MqttLink, queue.Queue[Incoming]]:
        inbox: queue.Queue[Incoming] = queue.Queue(maxsize=maxsize)
        link = MqttLink(
            config,
            password=password,
            subscriptions=subscriptions,
            status_topic=status_topic,
            inbox=inbox,
            **kwargs,
        )
        links.append(link)
        if start:
            link.start()
        return link, inbox

    try:
        yield make
    finally:
        for link in links:
            link.stop(timeout_s=1.0)


class Probe:
    """A plain paho client (MQTT 5) for publishing and watching.

    Messages on its subscriptions land in :attr:`received` as paho
    ``MQTTMessage`` objects. With ``persistent=True`` it keeps its session
    (clean_start=0, Session Expiry Interval 300 s), so a broker with
    persistence queues its messages across a broker restart; paho
    reconnects by itself.
    """

    def __init__(self, broker: Broker, client_id: str, *, persistent: bool = False) -> None:
        self.received: queue.Queue[mqtt.MQTTMessage] = queue.Queue()
        self._subscribed: queue.Queue[int] = queue.Queue()
        self.client = mqtt.Client(
            callback_api_version=CallbackAPIVersion.VERSION2,
            client_id=client_id,
            protocol=MQTTProtocolVersion.MQTTv5,
        )
        self.client.on_message = lambda _c, _u, message: self.received.put(message)
        self.client.on_subscribe = lambda _c, _u, mid, _codes, _p: self._subscribed.put(mid)
        if persistent:
            properties = Properties(PacketTypes.CONNECT)
            properties.SessionExpiryInterval = 300
            self.client.connect(
                broker.host, broker.port, keepalive=10, clean_start=False, properties=properties
            )
        else:
            self.client.connect(broker.host, broker.port, keepalive=10)
        self.client.reconnect_delay_set(1, 1)
        self.client.loop_start()

    def subscribe(self, topic_filter: str, qos: int = 1, timeout_s: float = 5.0) -> None:
        """Subscribe and wait for the SUBACK."""
        _, mid = self.client.subscribe(topic_filter, qos)
        assert self._subscribed.get(timeout=timeout_s) == mid

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> None:
        """Publish and wait until it is sent (QoS 0) or acknowledged (QoS 1)."""
        info = self.client.publish(topic, payload, qos=qos, retain=retain)
        info.wait_for_publish(5.0)
        assert info.is_published(), f"publish to {topic!r} not acknowledged within 5 s"

    def next(self, timeout_s: float = 5.0) -> mqtt.MQTTMessage:
        """Return the next received message, waiting at most ``timeout_s``."""
        return self.received.get(timeout=timeout_s)

    def close(self) -> None:
        """Disconnect and stop the network thread."""
        self.client.disconnect()
        self.client.loop_stop()


@pytest.fixture
def make_probe() -> Iterator[Callable[..., Probe]]:
    """Make :class:`Probe` clients on a given broker; close them in teardown.

    ``make_probe(broker, persistent=False)``.
    """
    probes: list[Probe] = []

    def make(on: Broker, *, persistent: bool = False) -> Probe:
        client = Probe(on, f"probe-{uuid.uuid4().hex[:12]}", persistent=persistent)
        probes.append(client)
        return client

    try:
        yield make
    finally:
        for client in probes:
            client.close()
