"""Durable publishing: outbox messages go to the broker, leave the store on its PUBACK.

paho-mqtt keeps the QoS 1 messages it has not yet seen acknowledged in
memory only, so a crash or a restart loses them. :class:`AlertPublisher`
therefore writes every message to the SQLite outbox of the
:class:`~arxwatch.daemon.store.StateStore` first, hands it to the
:class:`~arxwatch.daemon.ingest.MqttLink` second, and removes it from the
outbox only when the broker's PUBACK has arrived (QoS 1) or the message was
written to the socket (QoS 0). Delivery is at least once: a message sent but
not acknowledged before a restart is sent again at the next start, and alert
ids let consumers recognise the repeat.

Within one process paho itself sends its unacknowledged QoS 1 messages again
after a reconnect, so the publisher re-publishes only what paho does not hold:
after a (re)connect, and at start, every pending message it has not handed to
paho yet (or paho did not take, or the broker refused), oldest first. New
messages are sent straight away only when nothing older is waiting, so the
broker sees them in the order they were submitted. A message the broker
refused (PUBACK with a failure code, e.g. 0x87 not authorized) stays in the
outbox and is tried again after the next reconnect or restart, not at every
call: the link has logged the reason, and retrying at once would only repeat
it. When paho's outgoing queue is full (a burst of alerts, a slow broker),
the backlog is read again once a tenth of a page (``batch``) has been
acknowledged, or after ``retry_s``, not at every call: each pass reads a
page of the outbox, the messages paho holds included.

All methods run on the worker thread, the one that owns the store.

References
----------
.. [1] Eclipse paho.mqtt.python, ``README.rst``, "Known limitations": QoS 1
   and 2 messages in flight are kept in memory only.
.. [2] OASIS, "MQTT Version 5.0", 2019, section 4.3.2 (QoS 1: at least once
   delivery).
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Sequence

from arxwatch.daemon.ingest import MqttLink
from arxwatch.daemon.store import OutboxMessage, StateStore

__all__ = ["AlertPublisher"]

logger = logging.getLogger(__name__)


class AlertPublisher:
    """Publishes outbox messages durably: stored first, removed only after the broker's PUBACK.

    Parameters
    ----------
    store : StateStore
        Holds the outbox; used from the calling thread only.
    link : MqttLink
        Sends the messages and reports their completion.
    batch : int, optional
        Most pending messages read from the store per re-publishing pass.
    retry_s : float, optional
        After paho refused a message of the backlog, the longest wait before
        the next pass when too few messages were acknowledged meanwhile.
    clock : callable, optional
        Monotonic seconds, for ``retry_s``.

    Raises
    ------
    ValueError
        If ``batch`` is below 1.
    """

    def __init__(
        self,
        store: StateStore,
        link: MqttLink,
        *,
        batch: int = 1000,
        retry_s: float = 1.0,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if isinstance(batch, bool) or batch < 1:
            raise ValueError(f"batch must be an integer >= 1, got {batch!r}")
        self._store = store
        self._link = link
        self._batch = batch
        self._retry_s = retry_s
        self._clock = clock
        self._stalled_at: float | None = None  # when paho last refused a backlog message
        self._freed = 0  # messages acknowledged since then
        self._id_of: dict[int, str] = {}  # message id (paho's mid) -> outbox id
        self._mid_of: dict[str, int] = {}  # outbox id -> mid, for messages paho holds
        self._connection: int | None = None  # connection whose backlog was (re)sent
        self._backlog = True  # pending messages not handed to paho may exist
        self._parked: set[str] = set()  # refused by the broker on this connection

    def submit(self, messages: Sequence[OutboxMessage]) -> None:
        """Store messages in the outbox, then publish them if nothing older waits.

        Parameters
        ----------
        messages : sequence of OutboxMessage
            In the order they should reach the broker. Ids already pending
            are ignored by the store (the first message with an id stays).

        Raises
        ------
        arxwatch.daemon.store.StoreError
            If the outbox transaction fails; nothing was stored or sent.
        """
        self._store.add_outbox(messages)
        if not self._backlog and self._connection == self._link.take_connected():
            self._send(messages)

    def pump(self) -> int:
        """Settle completed messages and re-publish the backlog when due.

        Call it regularly from the worker. It removes from the outbox the
        messages the broker acknowledged; after a (re)connect, at the first
        call, or while earlier messages could not be handed over, it publishes
        pending messages that paho does not hold, oldest first.

        Returns
        -------
        int
            Messages still pending in the outbox.

        Raises
        ------
        arxwatch.daemon.store.StoreError
            If reading or updating the outbox fails.
        """
        done = [self._forget(mid) for mid in self._link.take_published()]
        finished = [outbox_id for outbox_id in done if outbox_id is not None]
        if finished:
            self._store.remove_outbox(finished)
        for mid in self._link.take_refused():
            # The broker did not take it (the link has logged why): it stays
            # pending and goes again after the next reconnect or restart.
            outbox_id = self._forget(mid)
            if outbox_id is not None:
                self._parked.add(outbox_id)
        connection = self._link.take_connected()
        if connection != self._connection:
            self._connection = connection
            self._parked.clear()
            self._backlog = True
            self._resend()
        elif self._backlog and self._link.status().connected and self._due(len(finished)):
            self._resend()
        return self._store.outbox_count()

    def _due(self, finished: int) -> bool:
        """Whether to read the backlog again after ``finished`` more acknowledgements.

        Always, unless paho refused a message of the last pass; then once a
        tenth of a page has left its queue, or ``retry_s`` has passed.
        """
        if self._stalled_at is None:
            return True
        self._freed += finished
        return self._freed * 10 >= self._batch or self._clock() - self._stalled_at >= self._retry_s

    def _resend(self) -> None:
        """Publish, oldest first, the pending messages paho does not hold."""
        limit = len(self._mid_of) + len(self._parked) + self._batch
        pending = self._store.pending_outbox(limit=limit)
        waiting = [
            message
            for message in pending
            if message.id not in self._mid_of and message.id not in self._parked
        ]
        if waiting:
            logger.info("publishing %d pending outbox messages", len(waiting))
        complete = self._send(waiting)
        self._stalled_at, self._freed = (None if complete else self._clock()), 0
        # A full page may hide more messages behind it: look again next time.
        self._backlog = not complete or len(pending) == limit

    def _send(self, messages: Sequence[OutboxMessage]) -> bool:
        """Hand messages to the link in order; stop at the first it does not take.

        Returns
        -------
        bool
            Whether every message was taken.
        """
        for message in messages:
            if message.id in self._mid_of or message.id in self._parked:
                continue
            mid = self._link.publish(
                message.topic, message.payload, qos=message.qos, retain=message.retain
            )
            if mid is None:
                self._backlog = True
                return False
            stale = self._id_of.get(mid)
            if stale is not None:
                # paho's 16-bit ids wrapped before the older completion was
                # settled: that message loses its mapping and, if still
                # pending, is sent again with the backlog.
                del self._mid_of[stale]
            self._id_of[mid] = message.id
            self._mid_of[message.id] = mid
        return True

    def _forget(self, mid: int) -> str | None:
        """Drop the mapping of a finished message id; return its outbox id."""
        outbox_id = self._id_of.pop(mid, None)
        if outbox_id is not None:
            del self._mid_of[outbox_id]
        return outbox_id
