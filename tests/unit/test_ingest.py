"""Pure parts of the MQTT link: status payloads, fallback decision, message building."""

import json
import queue
from dataclasses import replace
from datetime import UTC, datetime
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.reasoncodes import ReasonCode

from arxwatch.daemon.config import BrokerConfig, TlsConfig
from arxwatch.daemon.ingest import (
    Incoming,
    MqttLink,
    describe_connect_error,
    incoming_from_message,
    offline_payload,
    online_payload,
    should_fall_back,
)

CONFIG = BrokerConfig(
    host="127.0.0.1",
    port=1,
    client_id="arxwatch-larkspur",
    keepalive_s=30,
    qos=1,
    session_expiry_s=86400,
    protocol="mqtt5",
    tls=None,
    username=None,
    password_file=None,
    password_env=None,
    allow_plaintext_password=False,
)


def bounded(maxsize: int = 10) -> "queue.Queue[Incoming]":
    return queue.Queue(maxsize=maxsize)


# ------------------------------------------------------------------ payloads


def test_online_payload_is_json_with_iso_utc_since() -> None:
    since_s = 1_772_366_400.25  # 2026-03-01T12:00:00.25Z
    body = json.loads(online_payload(since_s, "0.1.0"))
    assert set(body) == {"state", "since", "version"}
    assert (body["state"], body["version"]) == ("online", "0.1.0")
    # datetime.fromisoformat (Python 3.11 reads the Z suffix) as the reference.
    parsed = datetime.fromisoformat(body["since"])
    assert parsed.utcoffset() is not None and parsed.utcoffset().total_seconds() == 0
    assert parsed == datetime.fromtimestamp(since_s, tz=UTC)


@pytest.mark.parametrize("reason", ["connection lost", "stopped"])
def test_offline_payload(reason: str) -> None:
    assert json.loads(offline_payload(reason)) == {"state": "offline", "reason": reason}


# ----------------------------------------------------------- fallback decision


def connack_codes() -> list[ReasonCode]:
    # Every CONNACK reason code in paho's table (MQTT 5.0 section 3.2.2.2).
    codes = []
    for value in range(256):
        try:
            codes.append(ReasonCode(PacketTypes.CONNACK, identifier=value))
        except (KeyError, ValueError):  # no such code, or not one for CONNACK
            continue
    return codes


def test_only_unsupported_protocol_version_triggers_the_fallback() -> None:
    codes = connack_codes()
    assert len(codes) > 10  # the table was read, not an empty loop
    falling = [code.getName() for code in codes if should_fall_back("mqtt5", code.value)]
    # MQTT 5.0 section 3.2.2.2: 0x84 Unsupported Protocol Version.
    assert falling == ["Unsupported protocol version"]


def test_fallback_from_the_311_return_code() -> None:
    # MQTT 3.1.1 section 3.2.2.3: return code 1 = unacceptable protocol version.
    assert should_fall_back("mqtt5", 0x01)
    # paho reports that byte, read as MQTT 5, as 0x84 (paho _packet.decode_connack).
    reported = ReasonCode(PacketTypes.CONNACK, aName="Unsupported protocol version")
    assert should_fall_back("mqtt5", reported.value)


def test_no_fallback_below_mqtt5() -> None:
    assert not should_fall_back("mqtt311", 0x84)
    assert not should_fall_back("mqtt311", 0x01)


# ------------------------------------------------------------ message building


def test_incoming_from_paho_message() -> None:
    message = mqtt.MQTTMessage(mid=7, topic=b"larkspur/block-c/ahu-c2/supply-temp")
    message.payload = b'{"value": 13.9}'
    message.qos = 1
    message.retain = True
    message.dup = True
    incoming = incoming_from_message(message, 1_772_366_401.5, 3)
    assert incoming == Incoming(
        topic="larkspur/block-c/ahu-c2/supply-temp",
        payload=b'{"value": 13.9}',
        arrival_s=1_772_366_401.5,
        mid=7,
        qos=1,
        retain=True,
        dup=True,
        connection=3,
    )
    assert isinstance(incoming.payload, bytes)


def test_incoming_keeps_bytes_and_topics_as_sent() -> None:
    topic = "larkspur/block-d/vav-3-14/\u00e9t\u00e9"
    message = mqtt.MQTTMessage(mid=0, topic=topic.encode("utf-8"))
    message.payload = b"\xff\x00not json"
    incoming = incoming_from_message(message, 0.0, 1)
    assert (incoming.topic, incoming.payload, incoming.qos) == (topic, b"\xff\x00not json", 0)


def test_incoming_refuses_a_topic_that_is_not_utf8() -> None:
    # paho raises from MQTTMessage.topic for invalid UTF-8 (MQTT 5.0 section 1.5.4).
    message = mqtt.MQTTMessage(mid=1, topic=b"larkspur/\xff")
    with pytest.raises(UnicodeDecodeError):
        incoming_from_message(message, 0.0, 1)


# ---------------------------------------------------------------- error words


def test_describe_connect_error() -> None:
    refused = ConnectionRefusedError(111, "Connection refused")
    assert describe_connect_error(refused, "127.0.0.1:1883") == (
        "cannot connect to 127.0.0.1:1883: connection refused"
    )
    assert describe_connect_error(None, "h:1") == "cannot connect to h:1"
    assert describe_connect_error(TimeoutError("timed out"), "h:1") == (
        "cannot connect to h:1: timed out"
    )


# ------------------------------------------------------- link without network


def test_construction_errors_name_the_argument() -> None:
    with pytest.raises(ValueError, match=r"maxsize >= 1\), got maxsize=0"):
        MqttLink(CONFIG, password=None, subscriptions=[], status_topic="s", inbox=queue.Queue())
    with pytest.raises(ValueError, match=r"subscriptions\[1\]: topic filter 'a/#/b'"):
        MqttLink(
            CONFIG,
            password=None,
            subscriptions=["a/#", "a/#/b"],
            status_topic="s",
            inbox=bounded(),
        )
    with pytest.raises(ValueError, match=r"status_topic: topic name 'a/\+'"):
        MqttLink(CONFIG, password=None, subscriptions=[], status_topic="a/+", inbox=bounded())
    with pytest.raises(ValueError, match="password given but broker.username is None"):
        MqttLink(CONFIG, password="x", subscriptions=[], status_topic="s", inbox=bounded())
    with pytest.raises(ValueError, match="max_outgoing must be an integer >= 1, got 0"):
        MqttLink(
            CONFIG, password=None, subscriptions=[], status_topic="s", inbox=bounded(),
            max_outgoing=0,
        )  # fmt: skip
    with pytest.raises(ValueError, match="takeover_backoff_s must be an integer >= 1, got 0"):
        MqttLink(
            CONFIG, password=None, subscriptions=[], status_topic="s", inbox=bounded(),
            takeover_backoff_s=0,
        )  # fmt: skip


def test_missing_tls_file_fails_at_construction(tmp_path: Path) -> None:
    missing = tmp_path / "absent-ca.pem"
    config = replace(CONFIG, tls=TlsConfig(ca_file=missing, cert_file=None, key_file=None))
    with pytest.raises(OSError):
        MqttLink(config, password=None, subscriptions=[], status_topic="s", inbox=bounded())


def test_unstarted_link() -> None:
    link = MqttLink(CONFIG, password=None, subscriptions=["a/#"], status_topic="s",
                    inbox=bounded())  # fmt: skip
    status = link.status()
    assert (status.connected, status.protocol, status.session_present) == (False, "mqtt5", None)
    assert (status.connects, status.last_error, status.last_connect_s) == (0, None, None)
    assert link.publish("larkspur/alerts", b"{}", qos=1, retain=False) is None
    assert (link.take_published(), link.take_refused(), link.take_connected()) == ([], [], 0)
    message = Incoming("a/b", b"1", 0.0, 5, 1, False, False, connection=0)
    link.ack([message])  # not connected: nothing to do, nothing raised
    assert link.wait_connected(0.0) is False
    link.stop()
    link.stop()
    with pytest.raises(RuntimeError, match="already stopped; a link runs once"):
        link.start()


def test_a_link_starts_once() -> None:
    # Port 1 on loopback refuses at once; stop() ends the retrying thread.
    link = MqttLink(CONFIG, password=None, subscriptions=[], status_topic="s", inbox=bounded())
    link.start()
    try:
        with pytest.raises(RuntimeError, match="already started; a link runs once"):
            link.start()
    finally:
        link.stop()


def test_publish_refuses_qos2() -> None:
    link = MqttLink(CONFIG, password=None, subscriptions=[], status_topic="s", inbox=bounded())
    with pytest.raises(ValueError, match="qos must be 0 or 1, got 2"):
        link.publish("t", b"", qos=2, retain=False)
