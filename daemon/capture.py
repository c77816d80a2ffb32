"""``arxwatch capture``: live MQTT traffic recorded to a JSON Lines capture.

The capture subscribes to the topics of every asset class of the site
config through :class:`~arxwatch.daemon.ingest.MqttLink` and appends each
message to the capture file with :class:`~arxwatch.daemon.history.CaptureWriter`
(``{"ts": arrival, "topic": ..., "payload": ...}``, the format ``arxwatch
replay`` and ``arxwatch baselines`` read). A QoS 1 message is acknowledged
only after its line is written and flushed to the operating system, so a
capture that dies loses nothing the broker still holds.

It connects with its own client id (default: the config's with
``-capture`` appended) and a session that ends with the connection
(Session Expiry Interval 0), so a running ``arxwatch run`` keeps its
persistent session and its messages: the broker gives each subscriber its
own copy. It publishes nothing but its own retained online/offline status,
on ``arxwatch/<client id>/status``, never the service's.
"""

from __future__ import annotations

import logging
import os
import queue
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import replace
from importlib.metadata import PackageNotFoundError, version
from typing import IO

from arxwatch.daemon.config import ConfigError, load_config, read_secret
from arxwatch.daemon.history import CaptureWriter
from arxwatch.daemon.ingest import Incoming, MqttLink
from arxwatch.daemon.route import matches

__all__ = ["CAPTURE_SUFFIX", "capture_client_id", "record", "run_capture"]

logger = logging.getLogger(__name__)

#: Appended to the config's client id for the capture's own.
CAPTURE_SUFFIX = "-capture"
#: Messages waiting between the network thread and the writer (also the
#: Receive Maximum the broker is asked to honour).
INBOX_SIZE = 1000
#: Longest wait for the first connection before giving up, seconds.
CONNECT_TIMEOUT_S = 30.0
#: Interval of the count shown on a terminal, seconds.
SHOW_EVERY_S = 2.0
_MAX_CLIENT_ID = 64


def capture_client_id(client_id: str) -> str:
    """Return the capture's client id for a service client id (at most 64 characters).

    Examples
    --------
    >>> capture_client_id("arxwatch-larkspur-1")
    'arxwatch-larkspur-1-capture'
    """
    return client_id[: _MAX_CLIENT_ID - len(CAPTURE_SUFFIX)] + CAPTURE_SUFFIX


def record(
    inbox: queue.Queue[Incoming],
    writer: CaptureWriter,
    acknowledge: Callable[[list[Incoming]], None],
    stop: threading.Event,
    *,
    deadline_s: float | None = None,
    show: Callable[[int], None] | None = None,
) -> int:
    """Write messages from ``inbox`` until ``stop`` is set or ``deadline_s`` passes.

    Each batch taken from the inbox is written, flushed, and only then
    acknowledged.

    Parameters
    ----------
    inbox : queue.Queue of Incoming
        Filled by the MQTT link.
    writer : CaptureWriter
        The capture file.
    acknowledge : callable
        Acknowledges a written batch (:meth:`MqttLink.ack`).
    stop : threading.Event
        Set to stop (a signal handler sets it).
    deadline_s : float, optional
        ``time.monotonic()`` value to stop at.
    show : callable, optional
        Called with the count written so far, every :data:`SHOW_EVERY_S`.

    Returns
    -------
    int
        Messages written.
    """
    written = 0
    shown_at = time.monotonic()
    while not stop.is_set():
        now = time.monotonic()
        if deadline_s is not None and now >= deadline_s:
            break
        if show is not None and now - shown_at >= SHOW_EVERY_S:
            show(written)
            shown_at = now
        written += _write_batch(inbox, writer, acknowledge, wait_s=0.2)
    # what already arrived is written too: the session ends with the connection
    while batch := _write_batch(inbox, writer, acknowledge, wait_s=0.0):
        written += batch
    return written


def _write_batch(
    inbox: queue.Queue[Incoming],
    writer: CaptureWriter,
    acknowledge: Callable[[list[Incoming]], None],
    *,
    wait_s: float,
) -> int:
    """Write what waits in the inbox (up to its size), flush, acknowledge; return the count."""
    try:
        batch = [inbox.get(timeout=wait_s) if wait_s > 0 else inbox.get_nowait()]
    except queue.Empty:
        return 0
    while len(batch) < INBOX_SIZE:
        try:
            batch.append(inbox.get_nowait())
        except queue.Empty:
            break
    for message in batch:
        writer.write(message.arrival_s, message.topic, message.payload, flush=False)
    writer.flush()
    acknowledge(batch)
    return len(batch)


def _version() -> str:
    try:
        return version("arxwatch")
    except PackageNotFoundError:
        return "unknown"


def run_capture(
    config_path: str,
    output_path: str,
    *,
    duration_s: float | None,
    client_id: str | None,
    out: IO[str],
    err: IO[str],
    stop: threading.Event | None = None,
) -> int:
    """``arxwatch capture``: return the exit status (0 done, 2 bad config or output, 1 no broker).

    Without ``stop`` it sets up its own, set by SIGTERM and SIGINT.
    """
    name = "arxwatch capture"
    try:
        config = load_config(config_path)
        password = read_secret(config, os.environ)
    except ConfigError as error:
        print(f"{name}: {error}", file=err)
        return 2
    own_id = client_id or capture_client_id(config.broker.client_id)
    if not (0 < len(own_id) <= _MAX_CLIENT_ID) or not all(
        c.isascii() and (c.isalnum() or c in "-_") for c in own_id
    ):
        print(
            f"{name}: --client-id {own_id!r}: expected 1 to 64 characters from [A-Za-z0-9_-]",
            file=err,
        )
        return 2
    if own_id == config.broker.client_id:
        print(
            f"{name}: --client-id {own_id!r} is the service's own: the capture would take over "
            "its session; choose another",
            file=err,
        )
        return 2
    status_topic = f"arxwatch/{own_id}/status"
    subscriptions = config.subscriptions()
    if any(matches(f, status_topic) for f in subscriptions):
        print(f"{name}: its status topic {status_topic!r} is under a subscription", file=err)
        return 2
    try:
        writer = CaptureWriter(output_path)
    except (OSError, ValueError) as error:
        why = error.strerror if isinstance(error, OSError) else str(error)
        print(f"{name}: {output_path}: cannot write: {why}", file=err)
        return 2
    if stop is None:
        stop = threading.Event()

        def request_stop(signum: int, frame: object) -> None:
            logger.info("signal %d: stopping", signum)
            stop.set()

        signal.signal(signal.SIGTERM, request_stop)
        signal.signal(signal.SIGINT, request_stop)
    inbox: queue.Queue[Incoming] = queue.Queue(maxsize=INBOX_SIZE)
    broker = replace(config.broker, client_id=own_id, session_expiry_s=0)
    started = time.monotonic()
    written = 0
    try:
        link = MqttLink(
            broker, password=password, subscriptions=subscriptions, status_topic=status_topic,
            inbox=inbox, version=_version(),
        )  # fmt: skip
    except (OSError, ValueError) as error:
        writer.close()
        print(f"{name}: {error}", file=err)
        return 2
    try:
        link.start()
        if not link.wait_connected(CONNECT_TIMEOUT_S):
            problem = link.status().last_error or "no answer"
            print(f"{name}: cannot connect to {broker.endpoint}: {problem}", file=err)
            return 1
        print(
            f"capturing {', '.join(subscriptions)} from {broker.endpoint} as {own_id!r} "
            f"to {output_path}",
            file=err,
        )
        show = None
        if err.isatty():

            def show(count: int) -> None:
                err.write(f"\rcaptured {count:,} messages")
                err.flush()

        deadline = None if duration_s is None else started + duration_s
        written = record(inbox, writer, link.ack, stop, deadline_s=deadline, show=show)
        if show is not None:
            err.write("\n")
    finally:
        link.stop()
        writer.close()
    elapsed = time.monotonic() - started
    print(f"captured {written:,} messages to {output_path} in {elapsed:.1f} s", file=out)
    return 0
