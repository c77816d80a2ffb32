"""systemd notifications over real AF_UNIX datagram sockets (path and abstract)."""

import logging
import os
import socket
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from arxwatch.daemon.sdnotify import Notifier

# sd_notify(3): NOTIFY_SOCKET is an AF_UNIX datagram socket, a path or "@" + abstract name.


class Receiver:
    """The systemd side: a bound datagram socket that collects what arrives."""

    def __init__(self, address: str) -> None:
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(address)
        self.sock.settimeout(5.0)  # a bound on a failing test, not a timing assertion

    def receive(self) -> str:
        """Return the next datagram as text."""
        return self.sock.recv(4096).decode()


@pytest.fixture
def path_socket(tmp_path: Path) -> Iterator[tuple[Receiver, str]]:
    path = str(tmp_path / "notify")
    assert len(path.encode()) < 108, "AF_UNIX path too long for sockaddr_un"
    receiver = Receiver(path)
    try:
        yield receiver, path
    finally:
        receiver.sock.close()


@pytest.fixture
def abstract_socket() -> Iterator[tuple[Receiver, str]]:
    name = f"arxwatch-test-{uuid.uuid4().hex}"
    receiver = Receiver("\0" + name)
    try:
        yield receiver, "@" + name
    finally:
        receiver.sock.close()


@pytest.mark.parametrize("which", ["path_socket", "abstract_socket"])
def test_messages_arrive(request, which) -> None:
    receiver, notify_socket = request.getfixturevalue(which)
    notifier = Notifier.from_environ({"NOTIFY_SOCKET": notify_socket})
    notifier.ready()
    notifier.status("monitoring 42 assets at Larkspur Yard")
    notifier.watchdog()
    notifier.stopping()
    received = [receiver.receive() for _ in range(4)]
    assert received == [
        "READY=1",
        "STATUS=monitoring 42 assets at Larkspur Yard",
        "WATCHDOG=1",
        "STOPPING=1",
    ]


def test_status_is_kept_on_one_line(path_socket) -> None:
    receiver, notify_socket = path_socket
    Notifier.from_environ({"NOTIFY_SOCKET": notify_socket}).status("restoring\nstate")
    # sd_notify(3): assignments are newline-separated, so a newline would end STATUS=.
    assert receiver.receive() == "STATUS=restoring state"


def test_abstract_address_form() -> None:
    assert Notifier.from_environ({"NOTIFY_SOCKET": "@sd-test"}).address == "\0sd-test"
    assert Notifier.from_environ({"NOTIFY_SOCKET": "/run/systemd/notify"}).address == (
        "/run/systemd/notify"
    )


@pytest.mark.parametrize(
    ("value", "warns"),
    [(None, False), ("", False), ("@", True), ("relative/notify", True), ("vsock:2:1234", True)],
)
def test_unset_or_unsupported_socket_is_a_no_op(value, warns, caplog) -> None:
    environ = {} if value is None else {"NOTIFY_SOCKET": value}
    caplog.set_level(logging.DEBUG, logger="arxwatch.daemon.sdnotify")
    notifier = Notifier.from_environ(environ)
    assert notifier.address is None
    notifier.ready()
    notifier.watchdog()
    notifier.status("x")
    notifier.stopping()
    mine = [r for r in caplog.records if r.name == "arxwatch.daemon.sdnotify"]
    assert [r.levelno for r in mine] == ([logging.WARNING] if warns else [])


def test_send_errors_are_logged_at_debug_and_not_raised(tmp_path, caplog) -> None:
    caplog.set_level(logging.DEBUG, logger="arxwatch.daemon.sdnotify")
    gone = Notifier.from_environ({"NOTIFY_SOCKET": str(tmp_path / "no-such-socket")})
    gone.ready()
    gone.stopping()
    records = [r for r in caplog.records if r.name == "arxwatch.daemon.sdnotify"]
    assert len(records) == 2
    assert all(r.levelno == logging.DEBUG for r in records)
    assert "READY=1" in records[0].getMessage()


def test_receiver_closed_after_start(tmp_path) -> None:
    path = str(tmp_path / "notify")
    receiver = Receiver(path)
    notifier = Notifier.from_environ({"NOTIFY_SOCKET": path})
    notifier.ready()
    assert receiver.receive() == "READY=1"
    receiver.sock.close()
    os.unlink(path)
    notifier.stopping()  # systemd gone during shutdown: nothing raised


# --- watchdog interval --------------------------------------------------------------------


@pytest.mark.parametrize(
    ("environ", "interval_s"),
    [
        ({}, None),
        ({"WATCHDOG_USEC": "30000000"}, 15.0),  # WatchdogSec=30: ping every 15 s
        ({"WATCHDOG_USEC": "1"}, 0.0000005),
        ({"WATCHDOG_USEC": "20000000", "WATCHDOG_PID": "4242"}, 10.0),
        ({"WATCHDOG_USEC": "20000000", "WATCHDOG_PID": "4243"}, None),  # another process's
        ({"WATCHDOG_USEC": "0"}, None),
        ({"WATCHDOG_USEC": "-5"}, None),
        ({"WATCHDOG_USEC": "3e7"}, None),
        ({"WATCHDOG_USEC": "²"}, None),  # a Unicode digit, not a decimal number
        ({"WATCHDOG_USEC": "20000000", "WATCHDOG_PID": "x"}, None),
    ],
)
def test_watchdog_interval(environ, interval_s) -> None:
    # sd_watchdog_enabled(3): WATCHDOG_USEC in microseconds, honoured only when WATCHDOG_PID
    # is unset or ours; systemd.service(5) recommends pinging at half the interval.
    notifier = Notifier.from_environ(environ, pid=4242)
    assert notifier.watchdog_interval_s == interval_s


def test_watchdog_pid_defaults_to_this_process() -> None:
    environ = {"WATCHDOG_USEC": "8000000", "WATCHDOG_PID": str(os.getpid())}
    assert Notifier.from_environ(environ).watchdog_interval_s == 4.0
    environ["WATCHDOG_PID"] = str(os.getpid() + 1)
    assert Notifier.from_environ(environ).watchdog_interval_s is None


def test_watchdog_without_socket_still_reports_interval() -> None:
    notifier = Notifier.from_environ({"WATCHDOG_USEC": "6000000"})
    assert notifier.address is None
    assert notifier.watchdog_interval_s == 3.0
