"""MQTT link: paho-mqtt callbacks -> a bounded queue of :class:`Incoming`; acks; status.

:class:`MqttLink` is the only place arxwatch touches paho-mqtt. paho's
network thread (``loop_start``) runs the callbacks; they never block, never
raise and never touch SQLite: ``on_message`` turns each PUBLISH into a frozen
:class:`Incoming` and puts it on the inbox queue the caller owns. One worker
thread takes messages from that queue, journals them, and only then calls
:meth:`MqttLink.ack`, so a message still waiting in memory when the process
dies was never acknowledged and the broker delivers it again.

What the link does, and why:

* **Persistent session.** MQTT 5 with ``clean_start=False`` on every connect
  and a Session Expiry Interval from the config (absent means 0: the session
  would end at the disconnect); MQTT 3.1.1 with ``clean_session=False``.
  paho's default, ``MQTT_CLEAN_START_FIRST_ONLY``, would discard the session
  at every process start. When CONNACK reports no session although one
  should exist, ``sessions_lost`` counts it (a data gap).
* **Manual acknowledgement** (``manual_ack=True``): paho would otherwise send
  PUBACK as soon as ``on_message`` returns. The Receive Maximum sent in
  CONNECT is the inbox's ``maxsize`` (at most 65,535), so the broker should
  never have more unacknowledged QoS 1 messages out to us than the queue can
  hold. It can all the same: MQTT 3.1.1 has no Receive Maximum (mosquitto then
  sends up to its ``max_inflight_messages``, 20), and mosquitto 2.0.11 (the
  Debian 12 package) was seen to stop honouring it once PUBACKs flow: with a
  Receive Maximum of 100 and 1,000 messages queued, acknowledging 50 brought
  all the other 900. Dropping such a message without an ack would keep its
  in-flight slot taken until the next reconnect, and lose it until then. So
  a QoS 1 message that finds the inbox full waits in the link
  (``held_back``) and moves to the inbox, in arrival order, when
  :meth:`MqttLink.ack` makes room. When :data:`MAX_HELD_BACK` messages wait
  already, the callback itself waits for room (at most half the keepalive,
  so that paho's pings are not held up longer): paho's network thread then
  reads nothing more, and TCP flow control holds the broker back. Only if
  the worker makes no room in that time is a QoS 1 message dropped without
  an ack (``overflows``); the broker sends it again when the session resumes.
  A QoS 0 message that finds the inbox full is dropped at once
  (``overflows``): QoS 0 is not flow-controlled and has nothing to
  acknowledge.
* **Acks by connection.** Every :class:`Incoming` carries the number of the
  connection it arrived on; :meth:`MqttLink.ack` skips messages of an earlier
  connection. The broker sends those again on the new connection with the
  same packet identifier, and acknowledging both copies could acknowledge a
  later message that reused the identifier before it was journalled.
* **Subscriptions** are sent after every CONNACK (the broker may have lost
  the session), with Retain Handling 1 (retained messages only for a new
  subscription) and No Local under MQTT 5. A refused subscription is an
  error in :attr:`LinkStatus.last_error` and the log.
* **Status with a last will.** The will is the retained ``offline`` status
  (QoS 1); after each CONNACK the link publishes the retained ``online``
  status; :meth:`MqttLink.stop` publishes ``offline`` itself, since a normal
  DISCONNECT discards the will.
* **Reconnects** back off from 1 s to 60 s (paho doubles the delay). paho
  resets the delay at every CONNACK, so a connection the broker closes right
  after accepting it would be retried every second: a connection lost within
  :data:`STABLE_CONNECTION_S` of its CONNACK counts as a flap and doubles
  the wait instead (2 s, 4 s ... 60 s). When the broker says why (DISCONNECT
  0x8E: another connection with our client id took the session over), the
  link also counts a takeover, logs an error naming the client id and waits
  at least ``takeover_backoff_s``. Either way twins sharing a client id swap
  the session at most about once a minute instead of every second.
* **Protocol fallback.** If the config asks for MQTT 5 and the broker
  refuses the protocol version (CONNACK 0x84, or the MQTT 3.1.1 return code 1
  that paho reports as 0x84), the link uses MQTT 3.1.1 for the rest of the
  process and says so once at warning level.
* **TLS and credentials.** ``tls_set`` with certificate and host name
  verification; never ``tls_insecure_set(True)``. The password is passed in
  and never logged. Refusals and TLS failures are reported in plain words in
  :attr:`LinkStatus.last_error` and logged once per change.
* ``max_queued_messages_set(max_outgoing)`` bounds the messages paho holds in
  memory for sending.

References
----------
.. [1] OASIS, "MQTT Version 5.0", 2019, sections 3.1.2.4 (Clean Start),
   3.1.2.5 (Will Flag), 3.1.2.11.2 (Session Expiry Interval), 3.1.2.11.3
   (Receive Maximum), 3.1.4 (session takeover), 3.2.2.2 (CONNACK reason
   codes), 3.8.3.1 (subscription options), 4.4 (message delivery retry),
   4.9 (flow control).
.. [2] OASIS, "MQTT Version 3.1.1", 2014, section 3.2.2.3 (CONNACK return
   codes).
.. [3] Eclipse paho.mqtt.python 2.x, ``src/paho/mqtt/client.py``
   (``connect``, ``manual_ack``, ``reconnect_delay_set``,
   ``max_queued_messages_set``).
"""

from __future__ import annotations

import json
import logging
import queue
import ssl
import sys
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any, Final, cast

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode, MQTTProtocolVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from paho.mqtt.subscribeoptions import SubscribeOptions

from arxwatch.daemon.alert import iso_utc
from arxwatch.daemon.config import BrokerConfig
from arxwatch.daemon.route import validate_filter, validate_topic

__all__ = [
    "Incoming",
    "LinkStatus",
    "MqttLink",
    "describe_connect_error",
    "incoming_from_message",
    "offline_payload",
    "online_payload",
    "should_fall_back",
]

logger = logging.getLogger(__name__)

#: Reconnect delays, seconds: paho doubles from the first to the second.
RECONNECT_MIN_DELAY_S: Final = 1
RECONNECT_MAX_DELAY_S: Final = 60
#: A connection lost sooner than this after its CONNACK counts as a flap.
STABLE_CONNECTION_S: Final = 2 * RECONNECT_MAX_DELAY_S
#: CONNACK reason code "Unsupported Protocol Version" (MQTT 5.0 section 3.2.2.2).
UNSUPPORTED_PROTOCOL_VERSION: Final = 0x84
#: CONNACK return code "unacceptable protocol version" (MQTT 3.1.1 section 3.2.2.3).
REFUSED_PROTOCOL_VERSION_311: Final = 0x01
#: DISCONNECT reason code "Session taken over" (MQTT 5.0 section 3.14.2.1).
SESSION_TAKEN_OVER: Final = 0x8E
#: Largest Receive Maximum (two-byte integer, MQTT 5.0 section 3.1.2.11.3).
MAX_RECEIVE_MAXIMUM: Final = 65_535
#: Most QoS 1 messages held in the link while the inbox is full; beyond it
#: the network thread waits for room (see the module notes).
MAX_HELD_BACK: Final = 1_000
#: Rate limit of repeated warnings from the callbacks, seconds.
WARNING_INTERVAL_S: Final = 60.0


@dataclass(frozen=True, slots=True)
class Incoming:
    """One PUBLISH received from the broker, as the worker sees it.

    Parameters
    ----------
    topic : str
        Topic name.
    payload : bytes
        Payload, undecoded.
    arrival_s : float
        The link's clock when the callback ran, Unix epoch seconds.
    mid : int
        Packet identifier (0 for QoS 0), the argument of :meth:`MqttLink.ack`.
    qos : int
        Delivery QoS: the lower of the publisher's and the subscription's.
    retain : bool
        Whether the broker sent it as a retained message.
    dup : bool
        Whether the broker marked it as a redelivery (no basis for
        de-duplication: a first delivery may also be a repeat).
    connection : int
        Number of the connection it arrived on (see
        :meth:`MqttLink.take_connected`); 0 for messages that did not come
        from a link, which :meth:`MqttLink.ack` never acknowledges.
    """

    topic: str
    payload: bytes
    arrival_s: float
    mid: int
    qos: int
    retain: bool
    dup: bool
    connection: int = 0


@dataclass(frozen=True)
class LinkStatus:
    """Snapshot of an :class:`MqttLink`, cheap and safe to take from any thread.

    Parameters
    ----------
    connected : bool
        Whether a CONNACK accepted the current connection.
    protocol : {"mqtt5", "mqtt311"}
        Protocol in use; ``"mqtt311"`` after a fallback.
    session_present : bool or None
        Session Present flag of the last accepted CONNACK; None before one.
    subscribed : bool
        Whether the broker granted every subscription on this connection.
    connects, disconnects : int
        Accepted connections, and losses of an accepted connection.
    takeovers : int
        Disconnects because another client took our session over (0x8E).
    flaps : int
        Connections lost less than :data:`STABLE_CONNECTION_S` after their
        CONNACK (takeovers included). A twin with our client id shows up
        here on brokers that close the old connection without saying 0x8E,
        such as mosquitto 2.0.11.
    sessions_lost : int
        Accepted connections without the session that should have existed.
    held_back : int
        QoS 1 messages that found the inbox full and waited in the link for
        room (none is lost; many mean the worker is too slow).
    overflows : int
        Messages dropped because the inbox was full: QoS 0 ones, and QoS 1
        ones beyond :data:`MAX_HELD_BACK` (not acknowledged: they come again
        when the session resumes).
    connect_failures : int
        Connection attempts that failed: TCP, TLS, refusal by CONNACK.
    callback_errors : int
        Unexpected exceptions caught in paho callbacks.
    refused_publishes : int
        Outgoing messages the broker answered with a failure reason code.
    last_connect_s : float or None
        Clock time of the last accepted CONNACK.
    last_error : str or None
        Latest problem in plain words, e.g. ``"connection refused: not
        authorized"``, ``"TLS: certificate verify failed (...)"``; cleared by
        an accepted connection.
    """

    connected: bool
    protocol: str
    session_present: bool | None
    subscribed: bool
    connects: int
    disconnects: int
    takeovers: int
    flaps: int
    sessions_lost: int
    held_back: int
    overflows: int
    connect_failures: int
    callback_errors: int
    refused_publishes: int
    last_connect_s: float | None
    last_error: str | None


# ------------------------------------------------------------------ pure parts


def online_payload(since_s: float, version: str) -> bytes:
    """Return the retained ``online`` status message.

    Parameters
    ----------
    since_s : float
        Time of the CONNACK, Unix epoch seconds.
    version : str
        arxwatch version.

    Returns
    -------
    bytes
        UTF-8 JSON object ``{"state": "online", "since": ..., "version": ...}``
        with ``since`` in ISO 8601 UTC.

    Examples
    --------
    >>> online_payload(1772366400.0, "0.1.0")
    b'{"state": "online", "since": "2026-03-01T12:00:00.000Z", "version": "0.1.0"}'
    """
    body = {"state": "online", "since": iso_utc(since_s), "version": version}
    return json.dumps(body).encode("utf-8")


def offline_payload(reason: str) -> bytes:
    """Return the retained ``offline`` status message (also the last will).

    Parameters
    ----------
    reason : str
        ``"connection lost"`` for the will, ``"stopped"`` for a clean stop.

    Returns
    -------
    bytes
        UTF-8 JSON object ``{"state": "offline", "reason": ...}``.

    Examples
    --------
    >>> offline_payload("stopped")
    b'{"state": "offline", "reason": "stopped"}'
    """
    return json.dumps({"state": "offline", "reason": reason}).encode("utf-8")


def should_fall_back(protocol: str, reason_code: int) -> bool:
    """Decide whether a refused CONNECT calls for MQTT 3.1.1.

    Parameters
    ----------
    protocol : {"mqtt5", "mqtt311"}
        Protocol of the refused attempt.
    reason_code : int
        CONNACK reason code (MQTT 5) or return code (MQTT 3.1.1).

    Returns
    -------
    bool
        True when an MQTT 5 attempt was refused with 0x84 "Unsupported
        Protocol Version" [1]_, or with the MQTT 3.1.1 return code 1
        "unacceptable protocol version" that a 3.1.1-only broker sends [2]_.

    References
    ----------
    .. [1] OASIS, "MQTT Version 5.0", 2019, section 3.2.2.2.
    .. [2] OASIS, "MQTT Version 3.1.1", 2014, section 3.2.2.3.

    Examples
    --------
    >>> should_fall_back("mqtt5", 0x84), should_fall_back("mqtt5", 0x87)
    (True, False)
    """
    return protocol == "mqtt5" and reason_code in (
        UNSUPPORTED_PROTOCOL_VERSION,
        REFUSED_PROTOCOL_VERSION_311,
    )


def incoming_from_message(message: mqtt.MQTTMessage, arrival_s: float, connection: int) -> Incoming:
    """Build an :class:`Incoming` from paho's message object.

    Parameters
    ----------
    message : paho.mqtt.client.MQTTMessage
        Message as passed to ``on_message``.
    arrival_s : float
        Clock time of the callback, Unix epoch seconds.
    connection : int
        Number of the connection it arrived on.

    Returns
    -------
    Incoming
        Topic, payload bytes, mid, qos, retain and dup flags.

    Raises
    ------
    UnicodeDecodeError
        If the topic is not UTF-8 (paho raises it from ``message.topic``).
    """
    return Incoming(
        topic=message.topic,
        payload=bytes(message.payload),
        arrival_s=arrival_s,
        mid=message.mid,
        qos=message.qos,
        retain=bool(message.retain),
        dup=bool(message.dup),
        connection=connection,
    )


def describe_connect_error(error: BaseException | None, endpoint: str) -> str:
    """Say in plain words why a connection attempt failed before CONNACK.

    Parameters
    ----------
    error : BaseException or None
        The exception paho caught, if known.
    endpoint : str
        ``host:port`` for the message.

    Returns
    -------
    str
        ``"TLS: certificate verify failed (...)"``, ``"TLS: ..."``, or
        ``"cannot connect to {endpoint}: ..."``.

    Examples
    --------
    >>> describe_connect_error(ConnectionRefusedError(111, "Connection refused"), "[::1]:1883")
    'cannot connect to [::1]:1883: connection refused'
    """
    if isinstance(error, ssl.SSLCertVerificationError):
        return f"TLS: certificate verify failed ({error.verify_message})"
    if isinstance(error, ssl.SSLError):
        return f"TLS: {(error.reason or str(error)).lower().replace('_', ' ')}"
    if isinstance(error, OSError) and error.strerror:
        return f"cannot connect to {endpoint}: {error.strerror.lower()}"
    if error is not None:
        return f"cannot connect to {endpoint}: {error}"
    return f"cannot connect to {endpoint}"


# ------------------------------------------------------------------- the link


class _PahoDebugLog(logging.LoggerAdapter[logging.Logger]):
    """Pass paho's own log lines on at debug level, whatever level paho gave.

    paho logs from its point of view (an ERROR for a socket already closed by
    a normal stop); the link reports connections, refusals and losses itself,
    so paho's lines are detail for debugging.
    """

    def log(self, level: int, msg: object, *args: object, **kwargs: Any) -> None:
        """Log ``msg % args`` at debug level."""
        self.logger.debug(msg, *args, **kwargs)


class _Throttle:
    """Allow one warning per key and interval; callers log the rest at debug."""

    def __init__(self, interval_s: float) -> None:
        self._interval_s = interval_s
        self._last: dict[str, float] = {}

    def ready(self, key: str) -> bool:
        now = time.monotonic()
        last = self._last.get(key)
        if last is not None and now - last < self._interval_s:
            return False
        self._last[key] = now
        return True


class MqttLink:
    """Subscribe, queue, acknowledge and publish over one MQTT connection.

    Parameters
    ----------
    broker : BrokerConfig
        Broker endpoint, client id, keep-alive, QoS, session expiry,
        protocol, TLS, user name.
    password : str or None
        Broker password (from :func:`arxwatch.daemon.config.read_secret`);
        never logged.
    subscriptions : sequence of str
        Topic filters to subscribe to at QoS ``broker.qos``.
    status_topic : str
        Topic of the retained online/offline status and the last will.
    inbox : queue.Queue of Incoming
        Bounded queue (``maxsize`` >= 1) the callbacks put messages on; the
        caller's worker takes them.
    clock : callable, optional
        Returns Unix epoch seconds; stamps arrivals and the status.
    version : str, optional
        Version reported in the ``online`` status.
    max_outgoing : int, optional
        Most outgoing QoS 1 messages paho may hold in memory; further
        :meth:`publish` calls return None.
    expect_session : bool, optional
        Whether the broker should hold a session from an earlier run, so that
        a first CONNACK without one counts in ``sessions_lost``.
    takeover_backoff_s : int, optional
        Wait before reconnecting after a session takeover, seconds.

    Raises
    ------
    ValueError
        If the inbox is unbounded, a subscription or the status topic is not
        a valid MQTT filter/topic name, ``max_outgoing`` or
        ``takeover_backoff_s`` is below 1, or a password is given without a
        user name. The message names the argument and the value.
    OSError, ssl.SSLError
        If a configured TLS file cannot be loaded.

    Notes
    -----
    Thread use: :meth:`ack`, :meth:`publish`, :meth:`take_published`,
    :meth:`take_refused` and :meth:`take_connected` belong to the one worker
    thread; :meth:`status` and :meth:`wait_connected` may be called from any
    thread.
    """

    def __init__(
        self,
        broker: BrokerConfig,
        *,
        password: str | None,
        subscriptions: Sequence[str],
        status_topic: str,
        inbox: queue.Queue[Incoming],
        clock: Callable[[], float] = time.time,
        version: str = "unknown",
        max_outgoing: int = 10000,
        expect_session: bool = False,
        takeover_backoff_s: int = RECONNECT_MAX_DELAY_S,
    ) -> None:
        if inbox.maxsize < 1:
            raise ValueError(
                f"inbox must be a bounded queue (maxsize >= 1), got maxsize={inbox.maxsize}"
            )
        for index, topic_filter in enumerate(subscriptions):
            try:
                validate_filter(topic_filter)
            except ValueError as err:
                raise ValueError(f"subscriptions[{index}]: {err}") from None
        try:
            validate_topic(status_topic)
        except ValueError as err:
            raise ValueError(f"status_topic: {err}") from None
        if isinstance(max_outgoing, bool) or max_outgoing < 1:
            raise ValueError(f"max_outgoing must be an integer >= 1, got {max_outgoing!r}")
        if isinstance(takeover_backoff_s, bool) or takeover_backoff_s < 1:
            raise ValueError(
                f"takeover_backoff_s must be an integer >= 1, got {takeover_backoff_s!r}"
            )
        if password is not None and broker.username is None:
            raise ValueError("password given but broker.username is None; a password needs a user")
        self._broker = broker
        self._password = password
        self._subscriptions = tuple(subscriptions)
        self._status_topic = status_topic
        self._inbox = inbox
        self._clock = clock
        self._version = version
        self._max_outgoing = max_outgoing
        self._takeover_backoff_s = takeover_backoff_s
        self._receive_maximum = min(inbox.maxsize, MAX_RECEIVE_MAXIMUM)
        self._hold_wait_s = broker.keepalive_s / 2.0
        self._endpoint = f"{broker.host}:{broker.port}"
        self._throttle = _Throttle(WARNING_INTERVAL_S)

        self._lock = threading.Lock()
        self._connected_changed = threading.Condition(self._lock)
        self._room = threading.Condition(self._lock)  # held-back messages moved on
        # Everything below is guarded by self._lock.
        self._protocol: str = broker.protocol
        self._client = self._make_client(self._protocol)
        self._started = False
        self._stopping = False
        self._stopped = False
        self._connected = False
        self._generation = 0
        self._session_present: bool | None = None
        self._session_expected = expect_session
        self._subscribed = False
        self._pending_suback: dict[int, tuple[str, ...]] = {}
        self._connected_at = 0.0  # time.monotonic() of the last accepted CONNACK
        self._flap_delay_s = 0  # current wait after short-lived connections; 0: none
        self._attempt_reported = False
        self._counts = dict.fromkeys(
            (
                "connects",
                "disconnects",
                "takeovers",
                "flaps",
                "sessions_lost",
                "held_back",
                "overflows",
                "connect_failures",
                "callback_errors",
                "refused_publishes",
            ),
            0,
        )
        self._last_connect_s: float | None = None
        self._last_error: str | None = None
        self._held: deque[Incoming] = deque()  # QoS 1 messages waiting for inbox room
        self._status_mids: set[int] = set()
        self._published: list[int] = []
        self._refused_mids: list[int] = []

    # -------------------------------------------------------------- set-up

    def _make_client(self, protocol: str) -> mqtt.Client:
        broker = self._broker
        if protocol == "mqtt5":
            client = mqtt.Client(
                callback_api_version=CallbackAPIVersion.VERSION2,
                client_id=broker.client_id,
                protocol=MQTTProtocolVersion.MQTTv5,
                manual_ack=True,
            )
        else:
            client = mqtt.Client(
                callback_api_version=CallbackAPIVersion.VERSION2,
                client_id=broker.client_id,
                clean_session=False,
                protocol=MQTTProtocolVersion.MQTTv311,
                manual_ack=True,
            )
        # The callbacks catch everything themselves; this keeps paho's thread
        # alive should one ever slip through (paho re-raises by default).
        client.suppress_exceptions = True
        # paho's duck-typed logger: only .log() is called (paho client.py _easy_log).
        client.enable_logger(cast(logging.Logger, _PahoDebugLog(logger.getChild("paho"))))
        client.max_queued_messages_set(self._max_outgoing)
        client.reconnect_delay_set(RECONNECT_MIN_DELAY_S, RECONNECT_MAX_DELAY_S)
        client.will_set(self._status_topic, offline_payload("connection lost"), qos=1, retain=True)
        if broker.username is not None:
            client.username_pw_set(broker.username, self._password)
        if broker.tls is not None:
            tls = broker.tls
            client.tls_set(
                ca_certs=None if tls.ca_file is None else str(tls.ca_file),
                certfile=None if tls.cert_file is None else str(tls.cert_file),
                keyfile=None if tls.key_file is None else str(tls.key_file),
                cert_reqs=ssl.CERT_REQUIRED,
                tls_version=ssl.PROTOCOL_TLS_CLIENT,
            )
        client.on_pre_connect = self._on_pre_connect
        client.on_connect = self._on_connect
        client.on_connect_fail = self._on_connect_fail
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        client.on_publish = self._on_publish
        return client

    def _connect(self, client: mqtt.Client, protocol: str) -> None:
        broker = self._broker
        if protocol == "mqtt5":
            properties = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]  # paho
            properties.SessionExpiryInterval = broker.session_expiry_s
            properties.ReceiveMaximum = self._receive_maximum
            client.connect_async(
                broker.host,
                broker.port,
                broker.keepalive_s,
                clean_start=False,
                properties=properties,
            )
        else:
            client.connect_async(broker.host, broker.port, broker.keepalive_s)
        client.loop_start()

    # ---------------------------------------------------------- public API

    def start(self) -> None:
        """Start connecting in paho's network thread; return at once.

        A broker that is down is retried with back-off, so the service can
        start before its broker.

        Raises
        ------
        RuntimeError
            If the link was started or stopped before: a link runs once.
        """
        with self._lock:
            if self._started or self._stopped:
                state = "started" if self._started else "stopped"
                raise RuntimeError(
                    f"MqttLink.start() on a link already {state}; a link runs once, make a new one"
                )
            self._started = True
            client, protocol = self._client, self._protocol
        logger.info(
            "connecting to %s as %r (%s)", self._broker.endpoint, self._broker.client_id, protocol
        )
        self._connect(client, protocol)

    def ack(self, messages: Iterable[Incoming]) -> None:
        """Acknowledge messages the worker has made durable, in the order given.

        Then moves messages held back while the inbox was full into the
        inbox, as far as there is room.

        Parameters
        ----------
        messages : iterable of Incoming
            Messages to acknowledge. QoS 0 messages need no ack and are
            skipped; so are messages of an earlier connection, or any while
            disconnected: the broker sends those again when the session
            resumes.
        """
        with self._lock:
            client = self._client
            for message in messages:
                if (
                    message.qos == 0
                    or not self._connected
                    or message.connection != self._generation
                ):
                    continue
                # paho's ack() only appends to its packet deque: no paho lock is
                # taken, so holding ours (which on_connect also takes) is safe.
                client.ack(message.mid, message.qos)
            self._release_held()

    def _release_held(self) -> None:
        """Move held-back messages into the inbox while it has room (lock held)."""
        while self._held:
            try:
                self._inbox.put_nowait(self._held[0])
            except queue.Full:
                return
            self._held.popleft()
            self._room.notify_all()

    def publish(self, topic: str, payload: bytes, *, qos: int, retain: bool) -> int | None:
        """Hand a message to paho for sending.

        Parameters
        ----------
        topic : str
            Topic name.
        payload : bytes
            Payload.
        qos : {0, 1}
            QoS of the publication.
        retain : bool
            Retain flag.

        Returns
        -------
        int or None
            The message id, whose completion :meth:`take_published` reports
            later; None when not connected or paho refused the message (its
            outgoing queue is full), in which case the caller keeps it.
            A QoS 1 message accepted by paho is sent again by paho itself
            after a reconnect, until the broker acknowledges it.

        Raises
        ------
        ValueError
            If ``qos`` is not 0 or 1, or paho refuses the topic or payload.
        """
        if qos not in (0, 1):
            raise ValueError(f"qos must be 0 or 1, got {qos!r}")
        with self._lock:
            if not self._connected:
                return None
            client = self._client
        # Not under our lock: paho calls on_publish holding its own mutex, and
        # on_publish takes ours.
        info = client.publish(topic, payload, qos=qos, retain=retain)
        if info.rc == MQTTErrorCode.MQTT_ERR_SUCCESS or (
            info.rc == MQTTErrorCode.MQTT_ERR_NO_CONN and qos > 0
        ):
            return info.mid
        logger.debug("paho did not take a message for %r: %s", topic, mqtt.error_string(info.rc))
        return None

    def take_published(self) -> list[int]:
        """Return the ids of messages sent since the last call.

        Returns
        -------
        list of int
            Ids from :meth:`publish` whose PUBACK arrived with a success code
            (QoS 1) or that were written to the socket (QoS 0), in completion
            order.
        """
        with self._lock:
            done, self._published = self._published, []
        return done

    def take_refused(self) -> list[int]:
        """Return the ids of messages the broker refused since the last call.

        Returns
        -------
        list of int
            Ids from :meth:`publish` whose PUBACK carried a failure reason
            code (e.g. 0x87 not authorized); the broker did not take them.
        """
        with self._lock:
            refused, self._refused_mids = self._refused_mids, []
        return refused

    def take_connected(self) -> int:
        """Return the connection number: it changes after every accepted CONNACK.

        Returns
        -------
        int
            Count of accepted connections; 0 before the first.
        """
        with self._lock:
            return self._generation

    def wait_connected(self, timeout_s: float) -> bool:
        """Wait until a CONNACK accepted the connection.

        Parameters
        ----------
        timeout_s : float
            Longest wait, seconds.

        Returns
        -------
        bool
            Whether the link is connected.
        """
        with self._connected_changed:
            return self._connected_changed.wait_for(lambda: self._connected, timeout_s)

    def status(self) -> LinkStatus:
        """Return a snapshot of the connection state and counters."""
        with self._lock:
            return LinkStatus(
                connected=self._connected,
                protocol=self._protocol,
                session_present=self._session_present,
                subscribed=self._subscribed,
                last_connect_s=self._last_connect_s,
                last_error=self._last_error,
                **self._counts,
            )

    def stop(self, timeout_s: float = 5.0) -> None:
        """Publish the retained ``offline`` status, disconnect, stop the thread.

        A normal DISCONNECT makes the broker discard the will, so the link
        publishes ``{"state": "offline", "reason": "stopped"}`` itself and
        waits for its PUBACK. Calling it again does nothing.

        Parameters
        ----------
        timeout_s : float, optional
            Longest wait for the status PUBACK, seconds.
        """
        with self._lock:
            if self._stopped:
                return
            self._stopped = True
            self._stopping = True
            self._room.notify_all()  # a callback waiting for inbox room gives up
            client, connected, started = self._client, self._connected, self._started
        if not started:
            return
        if connected:
            info = client.publish(
                self._status_topic, offline_payload("stopped"), qos=1, retain=True
            )
            with self._lock:
                self._status_mids.add(info.mid)
            try:
                info.wait_for_publish(timeout_s)
            except (ValueError, RuntimeError) as err:
                logger.warning("offline status not sent before stopping: %s", err)
            if not info.is_published():
                logger.warning("offline status not acknowledged within %.1f s", timeout_s)
        client.disconnect()
        client.loop_stop()
        with self._connected_changed:
            self._connected = False
            self._connected_changed.notify_all()
        logger.info("disconnected from %s", self._endpoint)

    # ----------------------------------------------------------- callbacks
    # paho's network thread runs these. Each catches every exception: one
    # escaping would end the thread (or, with suppress_exceptions, be lost).

    def _callback_failed(self, name: str) -> None:
        with self._lock:
            self._counts["callback_errors"] += 1
        if self._throttle.ready(f"callback:{name}"):
            logger.warning("unexpected error in the MQTT %s callback", name, exc_info=True)
        else:
            logger.debug("unexpected error in the MQTT %s callback", name, exc_info=True)

    def _report_error(self, text: str, *, level: int = logging.WARNING) -> None:
        """Record ``last_error``; log it when it differs from the previous one."""
        with self._lock:
            changed = text != self._last_error
            self._last_error = text
        logger.log(level if changed else logging.DEBUG, "MQTT %s: %s", self._endpoint, text)

    def _attempt_failed(self, text: str) -> None:
        """Count a failed connection attempt once, whichever callback reports it."""
        with self._lock:
            if self._attempt_reported:
                return
            self._attempt_reported = True
            self._counts["connect_failures"] += 1
        self._report_error(text)

    def _is_current(self, client: mqtt.Client) -> bool:
        """Whether ``client`` is the link's client (not one replaced by a fallback)."""
        with self._lock:
            return client is self._client

    def _on_pre_connect(self, client: mqtt.Client, userdata: Any) -> None:
        try:
            with self._lock:
                if client is self._client:
                    self._attempt_reported = False
        except Exception:
            self._callback_failed("pre-connect")

    def _on_connect_fail(self, client: mqtt.Client, userdata: Any) -> None:
        try:
            if not self._is_current(client):
                return
            # paho calls this inside its `except OSError:` block without the
            # error; sys.exception() recovers it for a useful message.
            self._attempt_failed(describe_connect_error(sys.exception(), self._endpoint))
        except Exception:
            self._callback_failed("connect-fail")

    def _on_connect(
        self,
        client: mqtt.Client,
        userdata: Any,
        flags: mqtt.ConnectFlags,
        reason_code: ReasonCode,
        properties: Properties | None,
    ) -> None:
        try:
            if reason_code.is_failure:
                self._connect_refused(client, reason_code)
            else:
                self._accepted(client, flags.session_present)
        except Exception:
            self._callback_failed("connect")

    def _connect_refused(self, client: mqtt.Client, reason_code: ReasonCode) -> None:
        with self._lock:
            protocol = self._protocol
        if should_fall_back(protocol, reason_code.value):
            self._fall_back(client)
            return
        self._attempt_failed(f"connection refused: {reason_code.getName().lower()}")

    def _fall_back(self, old: mqtt.Client) -> None:
        """Replace the MQTT 5 client by an MQTT 3.1.1 one for the rest of the process."""
        logger.warning(
            "broker %s refused MQTT 5 (unsupported protocol version); using MQTT 3.1.1 "
            "from now on: no Receive Maximum, no session takeover reason, retained "
            "messages again at each subscribe",
            self._endpoint,
        )
        # loop_stop() from paho's own thread only asks it to end; the refused
        # attempt returns an error and the old loop exits.
        old.loop_stop()
        with self._lock:
            self._protocol = "mqtt311"
            if self._stopping:
                return
            self._client = self._make_client("mqtt311")
            # Started under the lock so that stop() sees either the old client
            # (and this code sees _stopping) or the new one, already running.
            self._connect(self._client, "mqtt311")

    def _accepted(self, client: mqtt.Client, session_present: bool) -> None:
        now = self._clock()
        with self._connected_changed:
            self._connected = True
            self._generation += 1
            self._counts["connects"] += 1
            self._session_present = session_present
            self._last_connect_s = now
            self._last_error = None
            self._subscribed = False
            lost = self._session_expected and not session_present
            if lost:
                self._counts["sessions_lost"] += 1
            # A session outlives the connection only with an expiry (MQTT 5)
            # or clean_session=False (3.1.1, always here).
            self._session_expected = self._protocol == "mqtt311" or (
                self._broker.session_expiry_s > 0
            )
            self._connected_at = time.monotonic()
            protocol = self._protocol
            self._connected_changed.notify_all()
        if lost:
            logger.warning(
                "MQTT %s: the broker holds no session for %r: messages published while "
                "disconnected are lost (data gap)",
                self._endpoint,
                self._broker.client_id,
            )
        logger.info(
            "connected to %s (%s, session present: %s)", self._endpoint, protocol, session_present
        )
        self._subscribe(client, protocol)
        info = client.publish(
            self._status_topic, online_payload(now, self._version), qos=1, retain=True
        )
        with self._lock:
            self._status_mids.add(info.mid)

    def _subscribe(self, client: mqtt.Client, protocol: str) -> None:
        if not self._subscriptions:
            with self._lock:
                self._subscribed = True
            return
        qos = self._broker.qos
        if protocol == "mqtt5":
            options = SubscribeOptions(
                qos=qos,
                noLocal=True,
                retainHandling=SubscribeOptions.RETAIN_SEND_IF_NEW_SUB,
            )
            result, mid = client.subscribe([(f, options) for f in self._subscriptions])
        else:
            plain: list[tuple[str, int]] = [(f, qos) for f in self._subscriptions]
            result, mid = client.subscribe(plain)
        if result != MQTTErrorCode.MQTT_ERR_SUCCESS or mid is None:
            self._report_error(f"subscribe not sent: {mqtt.error_string(result)}")
            return
        with self._lock:
            self._pending_suback[mid] = self._subscriptions

    def _on_subscribe(
        self,
        client: mqtt.Client,
        userdata: Any,
        mid: int,
        reason_codes: list[ReasonCode],
        properties: Properties | None,
    ) -> None:
        try:
            with self._lock:
                filters = self._pending_suback.pop(mid, ())
            refused = [
                f"{topic_filter!r} ({code.getName().lower()})"
                for topic_filter, code in zip(filters, reason_codes, strict=False)
                if code.is_failure
            ]
            if refused:
                self._report_error(
                    f"subscription refused: {', '.join(refused)}", level=logging.ERROR
                )
                return
            with self._lock:
                self._subscribed = True
        except Exception:
            self._callback_failed("subscribe")

    def _on_disconnect(
        self,
        client: mqtt.Client,
        userdata: Any,
        flags: mqtt.DisconnectFlags,
        reason_code: ReasonCode,
        properties: Properties | None,
    ) -> None:
        try:
            if not self._is_current(client):
                return  # the MQTT 5 client ending after a fallback
            with self._connected_changed:
                was_connected, self._connected = self._connected, False
                self._subscribed = False
                stopping = self._stopping
                if was_connected:
                    self._counts["disconnects"] += 1
                self._connected_changed.notify_all()
            if not was_connected:
                if not stopping:
                    self._attempt_failed(
                        f"connection closed before the broker accepted it ({reason_code})"
                    )
            elif not stopping:
                self._lost(client, reason_code)
        except Exception:
            self._callback_failed("disconnect")

    def _lost(self, client: mqtt.Client, reason_code: ReasonCode) -> None:
        """Count a lost connection and choose the wait before the next attempt.

        paho resets its delay to the minimum at every CONNACK, so a connection
        that the broker keeps closing right after accepting it (a twin with our
        client id, whether or not the broker says 0x8E) would be retried every
        second. Short-lived connections double the wait instead, up to the
        maximum; a takeover waits at least ``takeover_backoff_s``.
        """
        lived_s = time.monotonic() - self._connected_at
        takeover = reason_code.value == SESSION_TAKEN_OVER
        short = lived_s < STABLE_CONNECTION_S
        client_id = self._broker.client_id
        with self._lock:
            if takeover:
                self._counts["takeovers"] += 1
            if short:
                self._counts["flaps"] += 1
                self._flap_delay_s = min(
                    RECONNECT_MAX_DELAY_S, max(2 * RECONNECT_MIN_DELAY_S, 2 * self._flap_delay_s)
                )
                delay_s = self._flap_delay_s
            else:
                delay_s = self._flap_delay_s = 0
            if takeover:
                delay_s = max(delay_s, self._takeover_backoff_s)
        if delay_s:
            client.reconnect_delay_set(delay_s, max(delay_s, RECONNECT_MAX_DELAY_S))
        else:
            client.reconnect_delay_set(RECONNECT_MIN_DELAY_S, RECONNECT_MAX_DELAY_S)
        if takeover:
            self._report_error(
                f"session taken over: another client connected with client id {client_id!r}; "
                f"next attempt in {delay_s} s",
                level=logging.ERROR,
            )
        elif short:
            self._report_error(
                f"connection lost {lived_s:.1f} s after the broker accepted it ({reason_code}); "
                f"next attempt in {delay_s} s; if this repeats, another client may be using "
                f"client id {client_id!r}"
            )
        else:
            text = f"connection lost ({reason_code})"
            with self._lock:
                self._last_error = text
            level = logging.WARNING if self._throttle.ready("lost") else logging.DEBUG
            logger.log(level, "MQTT %s: %s; reconnecting", self._endpoint, text)

    def _on_message(self, client: mqtt.Client, userdata: Any, message: mqtt.MQTTMessage) -> None:
        try:
            incoming = incoming_from_message(message, self._clock(), self._generation)
        except Exception:
            # It would fail the same way at every redelivery: drop it for good.
            self._callback_failed("message")
            if message.qos > 0:
                client.ack(message.mid, message.qos)
            return
        try:
            self._enqueue(incoming)
        except Exception:
            self._callback_failed("message")

    def _enqueue(self, incoming: Incoming) -> None:
        """Put a message on the inbox, hold it back, or drop it (see the module notes)."""
        with self._lock:
            self._release_held()
            if not self._held:
                try:
                    self._inbox.put_nowait(incoming)
                    return
                except queue.Full:
                    pass
            if incoming.qos > 0 and len(self._held) >= MAX_HELD_BACK:
                paused = True
                self._room.wait_for(
                    lambda: len(self._held) < MAX_HELD_BACK or self._stopping,
                    self._hold_wait_s,
                )
            else:
                paused = False
            if incoming.qos > 0 and len(self._held) < MAX_HELD_BACK and not self._stopping:
                self._held.append(incoming)
                self._counts["held_back"] += 1
                # while this callback waited, the worker may have emptied the
                # list and the inbox: then nothing would move it until the
                # next ack or message
                self._release_held()
                held, dropped = len(self._held), None
            else:
                self._counts["overflows"] += 1
                held, dropped = len(self._held), self._counts["overflows"]
        if paused and dropped is None:
            level = logging.WARNING if self._throttle.ready("paused") else logging.DEBUG
            logger.log(
                level,
                "the broker sends more unacknowledged QoS 1 messages than the Receive "
                "Maximum (%d) allows; reading from it paused until the worker caught up",
                self._receive_maximum,
            )
            return
        if dropped is None:
            level = logging.WARNING if self._throttle.ready("held") else logging.DEBUG
            logger.log(
                level,
                "inbox full (%d messages): holding %d QoS 1 messages until the worker "
                "acknowledges earlier ones",
                self._inbox.maxsize,
                held,
            )
            return
        level = logging.WARNING if self._throttle.ready("overflow") else logging.DEBUG
        logger.log(
            level,
            "inbox full (%d messages): dropped a QoS %d message on %r without acking it "
            "(%d dropped so far); QoS 1 messages come again when the session resumes",
            self._inbox.maxsize,
            incoming.qos,
            incoming.topic[:80],
            dropped,
        )

    def _on_publish(
        self,
        client: mqtt.Client,
        userdata: Any,
        mid: int,
        reason_code: ReasonCode,
        properties: Properties,
    ) -> None:
        try:
            with self._lock:
                if mid in self._status_mids:
                    self._status_mids.discard(mid)
                    own = True
                else:
                    own = False
                    if reason_code.is_failure:
                        self._counts["refused_publishes"] += 1
                        self._refused_mids.append(mid)
                    else:
                        self._published.append(mid)
            if reason_code.is_failure:
                what = "status message" if own else f"message {mid}"
                self._report_error(
                    f"broker refused {what}: {reason_code.getName().lower()}",
                    level=logging.ERROR,
                )
        except Exception:
            self._callback_failed("publish")
