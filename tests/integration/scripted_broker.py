"""A scripted MQTT 5 peer on 127.0.0.1 for answers mosquitto 2.0.11 never gives.

mosquitto 2.0.11 closes a taken-over connection without DISCONNECT 0x8E and
grants every subscription an ``acl_file`` denies (reads are checked at
delivery). This peer speaks just enough MQTT 5 (OASIS, "MQTT Version 5.0",
2019, sections 2 and 3) to answer CONNECT, SUBSCRIBE, PUBLISH and PINGREQ the
way a test asks, and counts what it saw. It is no broker: nothing is routed
or stored.
"""

from __future__ import annotations

import socket
import threading
from dataclasses import dataclass, field

HOST = "127.0.0.1"
CONNECT, PUBLISH, SUBSCRIBE, PINGREQ, DISCONNECT = 0x10, 0x30, 0x80, 0xC0, 0xE0


def read_exactly(sock: socket.socket, size: int) -> bytes:
    """Read ``size`` bytes or raise ConnectionError when the peer closes."""
    data = b""
    while len(data) < size:
        chunk = sock.recv(size - len(data))
        if not chunk:
            raise ConnectionError("peer closed the connection")
        data += chunk
    return data


def read_varint(data: bytes, offset: int) -> tuple[int, int]:
    """Decode a variable byte integer (section 1.5.5); return (value, next offset)."""
    value, multiplier = 0, 1
    while True:
        byte = data[offset]
        offset += 1
        value += (byte & 0x7F) * multiplier
        multiplier *= 128
        if not byte & 0x80:
            return value, offset


def read_packet(sock: socket.socket) -> tuple[int, bytes, bytes]:
    """Read one control packet; return (first byte, raw fixed header, body)."""
    first = read_exactly(sock, 1)
    raw = b""
    while True:
        byte = read_exactly(sock, 1)
        raw += byte
        if not byte[0] & 0x80:
            break
    length, _ = read_varint(raw, 0)
    return first[0], first + raw, read_exactly(sock, length)


def packet(first: int, body: bytes) -> bytes:
    """Encode a control packet from its first byte and body."""
    length, encoded = len(body), b""
    while True:
        byte, length = length % 128, length // 128
        encoded += bytes([byte | (0x80 if length else 0)])
        if not length:
            return bytes([first]) + encoded + body


@dataclass
class Seen:
    """What the scripted peer received."""

    connects: int = 0
    subscribe_filters: list[str] = field(default_factory=list)
    publish_topics: list[str] = field(default_factory=list)


class ScriptedBroker:
    """Answer MQTT 5 clients from a script.

    Parameters
    ----------
    suback_codes : dict of str to int
        SUBACK reason code per topic filter (default 0x01, granted QoS 1).
    disconnect_reason : int or None
        If set, send DISCONNECT with this reason code right after the first
        packet that follows CONNACK (the client's SUBSCRIBE), then close.
    """

    def __init__(
        self,
        *,
        suback_codes: dict[str, int] | None = None,
        disconnect_reason: int | None = None,
    ) -> None:
        self.seen = Seen()
        self._suback_codes = suback_codes or {}
        self._disconnect_reason = disconnect_reason
        self._lock = threading.Lock()
        self._server = socket.create_server((HOST, 0))
        self.port: int = self._server.getsockname()[1]
        self._sockets: list[socket.socket] = []
        self._threads = [threading.Thread(target=self._accept, daemon=True)]
        self._threads[0].start()

    def _accept(self) -> None:
        while True:
            try:
                sock, _ = self._server.accept()
            except OSError:
                return
            with self._lock:
                self._sockets.append(sock)
            thread = threading.Thread(target=self._serve, args=(sock,), daemon=True)
            self._threads.append(thread)
            thread.start()

    def _serve(self, sock: socket.socket) -> None:
        try:
            kind, _, _ = read_packet(sock)
            assert kind & 0xF0 == CONNECT
            with self._lock:
                self.seen.connects += 1
            sock.sendall(packet(0x20, bytes([0x00, 0x00, 0x00])))  # CONNACK, success
            while True:
                kind, _, body = read_packet(sock)
                if kind & 0xF0 == SUBSCRIBE:
                    sock.sendall(self._suback(body))
                elif kind & 0xF0 == PUBLISH:
                    answer = self._publish(kind, body)
                    if answer:
                        sock.sendall(answer)
                elif kind & 0xF0 == PINGREQ:
                    sock.sendall(bytes([0xD0, 0x00]))
                elif kind & 0xF0 == DISCONNECT:
                    break
                if self._disconnect_reason is not None:
                    sock.sendall(packet(DISCONNECT, bytes([self._disconnect_reason, 0x00])))
                    break
        except (OSError, ConnectionError):
            pass
        finally:
            sock.close()

    def _suback(self, body: bytes) -> bytes:
        packet_id = body[:2]
        properties, offset = read_varint(body, 2)
        offset += properties
        codes = []
        while offset < len(body):
            size = int.from_bytes(body[offset : offset + 2], "big")
            topic_filter = body[offset + 2 : offset + 2 + size].decode("utf-8")
            offset += 2 + size + 1  # filter, then the options byte
            with self._lock:
                self.seen.subscribe_filters.append(topic_filter)
            codes.append(self._suback_codes.get(topic_filter, 0x01))
        return packet(0x90, packet_id + b"\x00" + bytes(codes))

    def _publish(self, kind: int, body: bytes) -> bytes | None:
        qos = (kind >> 1) & 0x03
        size = int.from_bytes(body[:2], "big")
        with self._lock:
            self.seen.publish_topics.append(body[2 : 2 + size].decode("utf-8"))
        if qos == 0:
            return None
        packet_id = body[2 + size : 4 + size]
        return packet(0x40, packet_id + bytes([0x00, 0x00]))  # PUBACK, success

    def close(self) -> None:
        """Close the listener and every connection; join the threads."""
        self._server.shutdown(socket.SHUT_RDWR)  # wakes the blocked accept() (Linux)
        self._server.close()
        with self._lock:
            sockets = list(self._sockets)
        for sock in sockets:
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            sock.close()
        for thread in self._threads:
            thread.join(5.0)
