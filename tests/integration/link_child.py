"""Run one MqttLink in a child process, for tests that SIGKILL it.

Prints one JSON object per line on stdout: ``{"event": "connected",
"session_present": ...}`` after each accepted CONNACK and ``{"event":
"message", "topic": ..., "payload": <hex>, "qos": ..., "dup": ...,
"retain": ...}`` per message; with ``--ack`` it acknowledges each message
after printing it (the printed line stands for "journalled"). SIGTERM stops
the link cleanly (offline status "stopped") and exits 0.

Usage: ``python link_child.py --port P --client-id ID --status-topic T
--subscribe FILTER [--ack]``.
"""

from __future__ import annotations

import argparse
import json
import queue
import signal
import sys
import threading
from types import FrameType

from arxwatch.daemon.config import BrokerConfig
from arxwatch.daemon.ingest import Incoming, MqttLink


def emit(**fields: object) -> None:
    """Print one JSON line and flush it at once."""
    sys.stdout.write(json.dumps(fields) + "\n")
    sys.stdout.flush()


def main(argv: list[str] | None = None) -> int:
    """Run the link until SIGTERM."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, required=True)
    parser.add_argument("--client-id", required=True)
    parser.add_argument("--status-topic", required=True)
    parser.add_argument("--subscribe", action="append", default=[])
    parser.add_argument("--keepalive", type=int, default=10)
    parser.add_argument("--ack", action="store_true")
    args = parser.parse_args(argv)

    config = BrokerConfig(
        host=args.host,
        port=args.port,
        client_id=args.client_id,
        keepalive_s=args.keepalive,
        qos=1,
        session_expiry_s=300,
        protocol="mqtt5",
        tls=None,
        username=None,
        password_file=None,
        password_env=None,
        allow_plaintext_password=False,
    )
    inbox: queue.Queue[Incoming] = queue.Queue(maxsize=100)
    link = MqttLink(
        config,
        password=None,
        subscriptions=args.subscribe,
        status_topic=args.status_topic,
        inbox=inbox,
        version="child",
    )
    stop = threading.Event()

    def on_term(signum: int, frame: FrameType | None) -> None:
        stop.set()

    signal.signal(signal.SIGTERM, on_term)
    link.start()
    connection = 0
    while not stop.is_set():
        try:
            message: Incoming | None = inbox.get(timeout=0.05)
        except queue.Empty:
            message = None
        # Checked after the wait, so the CONNACK line precedes its messages.
        current = link.take_connected()
        if current != connection:
            connection = current
            emit(event="connected", session_present=link.status().session_present)
        if message is None:
            continue
        emit(
            event="message",
            topic=message.topic,
            payload=message.payload.hex(),
            qos=message.qos,
            dup=message.dup,
            retain=message.retain,
        )
        if args.ack:
            link.ack([message])
    link.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
