"""Site configuration: one YAML file -> frozen, validated dataclasses.

The file is parsed once, at start, by :func:`load_config` (or
:func:`parse_config` for text already in memory) and the resulting
:class:`Config` is passed down; no module reads the file or the environment
on its own. The YAML is read with ``yaml.safe_load`` semantics (no Python
object tags) by a loader that also refuses duplicate mapping keys, which
PyYAML would otherwise collapse silently into the last one.

Every problem raises :class:`ConfigError`, whose message names the file, the
key path (``site.yaml: asset_classes[1].inputs[0].max``), the value found and
what was expected. Unknown keys are errors, with a suggestion when a known key
is close; types are strict (``true`` is not an integer, ``"60"`` is not a
number).

Secrets never sit in the YAML: the broker password comes from a file
(``broker.password_file``, e.g. a systemd credential or a mounted Kubernetes
secret) or from an environment variable named by ``broker.password_env``, and
is read only by :func:`read_secret`, which is given the environment as an
argument.

Sections: ``broker``, ``topics``, ``metrics``, ``state``, ``logging``,
``limits`` and ``asset_classes``; ``config/site-example.yaml`` documents
every key.
"""

from __future__ import annotations

import difflib
import ipaddress
import math
import re
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass, replace
from functools import partial
from pathlib import Path
from typing import Any, Literal, TypeVar, cast

import yaml

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.align import AlignConfig
from arxwatch.daemon.decode import PayloadFormat
from arxwatch.daemon.monitor import MonitorConfig
from arxwatch.daemon.route import (
    Router,
    RouteRule,
    TopicPattern,
    matches,
    validate_topic,
)
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.baseline import LearnerConfig
from arxwatch.estimators.detect.quality import QualityConfig
from arxwatch.estimators.errors import OrderError

__all__ = [
    "AlignTiming",
    "AssetClassConfig",
    "BaselineConfig",
    "BrokerConfig",
    "Config",
    "ConfigError",
    "DetectorsConfig",
    "LimitsConfig",
    "LoggingConfig",
    "MetricsConfig",
    "ModeConfig",
    "ModelConfig",
    "PayloadConfig",
    "SignalConfig",
    "StateConfig",
    "TlsConfig",
    "TopicsConfig",
    "load_config",
    "parse_config",
    "read_secret",
]

T = TypeVar("T")

_CLIENT_ID = re.compile(r"[A-Za-z0-9_-]{1,64}")
_CLASS_NAME = re.compile(r"[a-z][a-z0-9_-]*")
_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_HOST_LABEL = re.compile(r"(?!-)[A-Za-z0-9-]{1,63}(?<!-)")
_MQTT_MAX_PAYLOAD_BYTES = 268_435_455
_MAX_SESSION_EXPIRY_S = 4_294_967_295  # MQTT 5.0 section 3.1.2.11.2: four-byte integer
_SHOW_CHARS = 60


class ConfigError(ValueError):
    """The configuration file is unreadable, malformed or invalid.

    Parameters
    ----------
    source : str
        File name (or another name of the text) the problem is in.
    path : str
        Key path such as ``"asset_classes[0].inputs[1].max"``, or
        ``"line 12"`` for a YAML syntax problem; empty for the whole file.
    problem : str
        What is wrong: the value found and what was expected.

    Attributes
    ----------
    source, path, problem
        As given.
    """

    def __init__(self, source: str, path: str, problem: str) -> None:
        self.source = source
        self.path = path
        self.problem = problem
        where = f"{source}: {path}" if path else source
        super().__init__(f"{where}: {problem}")


# --------------------------------------------------------------------------- YAML


class _UniqueKeyLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses a key repeated in one mapping."""

    def construct_mapping(self, node: yaml.MappingNode, deep: bool = False) -> dict[object, object]:
        """Construct a mapping after checking its keys are unique.

        Parameters
        ----------
        node : yaml.MappingNode
            Mapping node to construct.
        deep : bool
            Construct nested values at once (PyYAML's flag).

        Returns
        -------
        dict
            The mapping.

        Raises
        ------
        yaml.constructor.ConstructorError
            If a key appears twice; the mark points at the second one.
        """
        first_line: dict[object, int] = {}
        for key_node, _ in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                continue  # '<<' merges are overridden by explicit keys, by design
            key = self.construct_object(key_node, deep=True)
            try:
                earlier = first_line.get(key)
            except TypeError:
                continue  # unhashable key: the base class reports it
            if earlier is not None:
                raise yaml.constructor.ConstructorError(
                    None,
                    None,
                    f"duplicate key {key!r} (first at line {earlier}); "
                    "each key may appear once in a mapping",
                    key_node.start_mark,
                )
            first_line[key] = key_node.start_mark.line + 1
        return super().construct_mapping(node, deep=deep)


def _load_yaml(text: str, source: str) -> object:
    try:
        return yaml.load(text, Loader=_UniqueKeyLoader)  # safe: a SafeLoader subclass
    except yaml.MarkedYAMLError as err:
        mark = err.problem_mark or err.context_mark
        where = f"line {mark.line + 1}" if mark is not None else ""
        problem = err.problem or err.context or "invalid YAML"
        raise ConfigError(source, where, problem) from None
    except yaml.YAMLError as err:
        raise ConfigError(source, "", f"invalid YAML: {err}") from None


# ------------------------------------------------------------------------ reading


def _show(value: object) -> str:
    """Quote a found value for a message, with its YAML-ish type."""
    text = repr(value)
    if len(text) > _SHOW_CHARS:
        text = text[:_SHOW_CHARS] + "..."
    kind = {
        bool: "a boolean",
        int: "an integer",
        float: "a number",
        str: "a string",
        list: "a list",
        dict: "a mapping",
        type(None): "null",
    }.get(type(value))
    return f"{text} ({kind})" if kind else f"{text} ({type(value).__name__})"


def _key(path: str, key: str) -> str:
    return f"{path}.{key}" if path else key


_REQUIRED = object()


class _Reader:
    """Typed access to the parsed YAML, raising :class:`ConfigError` with paths."""

    def __init__(self, source: str, *, baseline_files_exist: bool = True) -> None:
        self.source = source
        self.baseline_files_exist = baseline_files_exist

    def fail(self, path: str, problem: str) -> ConfigError:
        return ConfigError(self.source, path, problem)

    def expected(self, path: str, value: object, what: str) -> ConfigError:
        return self.fail(path, f"expected {what}, found {_show(value)}")

    def mapping(self, value: object, path: str, keys: Collection[str]) -> dict[str, object]:
        """Check ``value`` is a mapping with string keys, each one of ``keys``."""
        if not isinstance(value, dict):
            raise self.expected(path, value, "a mapping")
        for key in value:
            if not isinstance(key, str):
                raise self.expected(path, key, "string keys")
            if key not in keys:
                close = difflib.get_close_matches(key, list(keys), n=1)
                hint = f"; did you mean {close[0]!r}?" if close else ""
                raise self.fail(
                    _key(path, key),
                    f"unknown key{hint} (expected one of: {', '.join(sorted(keys))})",
                )
        return cast(dict[str, object], value)

    def section(
        self, parent: Mapping[str, object], path: str, key: str, keys: Collection[str]
    ) -> dict[str, object]:
        """Read an optional sub-mapping; absent or null gives an empty one."""
        value = parent.get(key)
        return {} if value is None else self.mapping(value, _key(path, key), keys)

    def raw(self, parent: Mapping[str, object], path: str, key: str, default: object) -> object:
        if key in parent and parent[key] is not None:
            return parent[key]
        if default is _REQUIRED:
            raise self.fail(_key(path, key), "required key is missing")
        return default

    def string(
        self,
        parent: Mapping[str, object],
        path: str,
        key: str,
        default: object = _REQUIRED,
        pattern: re.Pattern[str] | None = None,
        what: str = "a non-empty string",
    ) -> str:
        value = self.raw(parent, path, key, default)
        if (
            not isinstance(value, str)
            or not value
            or (pattern is not None and not pattern.fullmatch(value))
        ):
            raise self.expected(_key(path, key), value, what)
        return value

    def optional_string(self, parent: Mapping[str, object], path: str, key: str) -> str | None:
        if parent.get(key) is None:
            return None
        return self.string(parent, path, key)

    def choice(
        self,
        parent: Mapping[str, object],
        path: str,
        key: str,
        options: Sequence[T],
        default: object = _REQUIRED,
    ) -> T:
        value = self.raw(parent, path, key, default)
        if isinstance(value, bool) or value not in options:
            listed = " or ".join(repr(option) for option in options)
            raise self.expected(_key(path, key), value, listed)
        return cast(T, value)

    def integer(
        self,
        parent: Mapping[str, object],
        path: str,
        key: str,
        default: object = _REQUIRED,
        low: int = 0,
        high: int | None = None,
    ) -> int:
        value = self.raw(parent, path, key, default)
        what = f"an integer >= {low}" if high is None else f"an integer in {low}..{high}"
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.expected(_key(path, key), value, what)
        if value < low or (high is not None and value > high):
            raise self.expected(_key(path, key), value, what)
        return value

    def number(
        self,
        parent: Mapping[str, object],
        path: str,
        key: str,
        default: object = _REQUIRED,
        positive: bool = False,
    ) -> float:
        value = self.raw(parent, path, key, default)
        what = "a finite number > 0" if positive else "a finite number"
        if (
            isinstance(value, bool)
            or not isinstance(value, int | float)
            or not math.isfinite(value)
            or (positive and value <= 0)
        ):
            raise self.expected(_key(path, key), value, what)
        return float(value)

    def optional_number(
        self, parent: Mapping[str, object], path: str, key: str, positive: bool = False
    ) -> float | None:
        if parent.get(key) is None:
            return None
        return self.number(parent, path, key, positive=positive)

    def boolean(
        self, parent: Mapping[str, object], path: str, key: str, default: object = _REQUIRED
    ) -> bool:
        value = self.raw(parent, path, key, default)
        if not isinstance(value, bool):
            raise self.expected(_key(path, key), value, "true or false")
        return value

    def existing_file(self, parent: Mapping[str, object], path: str, key: str) -> Path | None:
        if parent.get(key) is None:
            return None
        file = Path(self.string(parent, path, key, what="a file path"))
        if not file.is_file():
            problem = "is not a regular file" if file.exists() else "does not exist"
            raise self.fail(_key(path, key), f"file {str(file)!r} {problem}")
        return file

    def items(
        self, parent: Mapping[str, object], path: str, key: str, minimum: int = 0
    ) -> list[tuple[str, object]]:
        """Read a list; return (path of the item, item) pairs."""
        value = self.raw(parent, path, key, _REQUIRED if minimum else [])
        where = _key(path, key)
        if not isinstance(value, list):
            raise self.expected(where, value, "a list")
        if len(value) < minimum:
            raise self.expected(
                where,
                value,
                f"a list of at least {minimum} entr" + ("y" if minimum == 1 else "ies"),
            )
        return [(f"{where}[{index}]", item) for index, item in enumerate(value)]

    def build(self, path: str, make: Callable[[], T]) -> T:
        """Call a constructor, reporting its ValueError at ``path``."""
        try:
            return make()
        except ValueError as err:  # TopicError, OrderError and the settings' own checks
            raise self.fail(path, str(err)) from None


# ------------------------------------------------------------------------- broker


@dataclass(frozen=True)
class TlsConfig:
    """TLS towards the broker.

    Parameters
    ----------
    ca_file : Path or None
        CA bundle that signs the broker's certificate; None uses the system
        trust store.
    cert_file, key_file : Path or None
        Client certificate and its key, for brokers that authenticate
        clients by certificate; both or neither.
    """

    ca_file: Path | None
    cert_file: Path | None
    key_file: Path | None


@dataclass(frozen=True)
class BrokerConfig:
    """Connection to the MQTT broker (no secret: see :func:`read_secret`).

    Parameters
    ----------
    host : str
        Broker host name or address.
    port : int
        TCP port, 1..65535.
    client_id : str
        MQTT client identifier, stable per replica so that the persistent
        session survives restarts; ``[A-Za-z0-9_-]``, at most 64 characters.
    keepalive_s : int
        MQTT keep-alive, seconds.
    qos : {0, 1}
        Subscription QoS.
    session_expiry_s : int
        How long the broker keeps the session after a disconnect (MQTT 5).
    protocol : {"mqtt5", "mqtt311"}
        Protocol version.
    tls : TlsConfig or None
        TLS settings; None for plain TCP.
    username : str or None
        User name, if the broker wants one.
    password_file : Path or None
        File holding the password.
    password_env : str or None
        Name of the environment variable holding the password.
    allow_plaintext_password : bool
        Accept sending a password without TLS.
    """

    host: str
    port: int
    client_id: str
    keepalive_s: int
    qos: Literal[0, 1]
    session_expiry_s: int
    protocol: Literal["mqtt5", "mqtt311"]
    tls: TlsConfig | None
    username: str | None
    password_file: Path | None
    password_env: str | None
    allow_plaintext_password: bool

    @property
    def endpoint(self) -> str:
        """``host:port`` with protocol and transport, for logs and summaries."""
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"{host}:{self.port} ({self.protocol}, {'tls' if self.tls else 'plain tcp'})"

    @property
    def has_password(self) -> bool:
        """Whether a password source is configured."""
        return self.password_file is not None or self.password_env is not None


_BROKER_KEYS = (
    "host",
    "port",
    "client_id",
    "keepalive_s",
    "qos",
    "session_expiry_s",
    "protocol",
    "tls",
    "username",
    "password",
    "password_file",
    "password_env",
    "allow_plaintext_password",
)


def _broker(r: _Reader, data: Mapping[str, object]) -> BrokerConfig:
    path = "broker"
    if "broker" not in data or data["broker"] is None:
        raise r.fail(path, "required section is missing")
    raw = r.mapping(data["broker"], path, _BROKER_KEYS)
    if "password" in raw:
        raise r.fail(
            "broker.password",
            "a password must not be written in the config file; put it in a file readable "
            "only by the service and set broker.password_file, or name an environment "
            "variable with broker.password_env",
        )
    tls: TlsConfig | None = None
    if "tls" in raw:
        tls_raw = r.section(raw, path, "tls", ("ca_file", "cert_file", "key_file"))
        tls = TlsConfig(
            ca_file=r.existing_file(tls_raw, "broker.tls", "ca_file"),
            cert_file=r.existing_file(tls_raw, "broker.tls", "cert_file"),
            key_file=r.existing_file(tls_raw, "broker.tls", "key_file"),
        )
        if (tls.cert_file is None) != (tls.key_file is None):
            missing = "key_file" if tls.key_file is None else "cert_file"
            raise r.fail(
                f"broker.tls.{missing}",
                "required when a client certificate "
                "is configured: give cert_file and key_file together",
            )
    password_file = r.existing_file(raw, path, "password_file")
    password_env = None
    if raw.get("password_env") is not None:
        password_env = r.string(
            raw,
            path,
            "password_env",
            pattern=_ENV_NAME,
            what="an environment variable name such as MQTT_PASSWORD",
        )
    if password_file is not None and password_env is not None:
        raise r.fail("broker.password_env", "give either password_file or password_env, not both")
    username = r.optional_string(raw, path, "username")
    if (password_file or password_env) and username is None:
        raise r.fail("broker.username", "required key is missing: a password needs a username")
    allow_plain = r.boolean(raw, path, "allow_plaintext_password", False)
    if (password_file or password_env) and tls is None and not allow_plain:
        raise r.fail(
            "broker.password_file" if password_file else "broker.password_env",
            "a password without TLS crosses the network readable by anyone on the path; "
            "configure broker.tls, or set broker.allow_plaintext_password: true if the "
            "broker is reached over loopback or an otherwise protected link",
        )
    return BrokerConfig(
        host=_host(r, r.string(raw, path, "host"), "broker.host"),
        port=r.integer(raw, path, "port", 8883 if tls else 1883, low=1, high=65535),
        client_id=r.string(
            raw, path, "client_id", pattern=_CLIENT_ID, what="1 to 64 characters from [A-Za-z0-9_-]"
        ),
        keepalive_s=r.integer(raw, path, "keepalive_s", 30, low=1, high=65535),
        qos=cast(Literal[0, 1], r.choice(raw, path, "qos", (0, 1), 1)),
        session_expiry_s=r.integer(
            raw, path, "session_expiry_s", 86400, low=0, high=_MAX_SESSION_EXPIRY_S
        ),
        protocol=cast(
            Literal["mqtt5", "mqtt311"],
            r.choice(raw, path, "protocol", ("mqtt5", "mqtt311"), "mqtt5"),
        ),
        tls=tls,
        username=username,
        password_file=password_file,
        password_env=password_env,
        allow_plaintext_password=allow_plain,
    )


def _host(r: _Reader, text: str, path: str) -> str:
    """Check a host name (RFC 1123 labels) or an IP address."""
    try:
        return str(ipaddress.ip_address(text))
    except ValueError:
        pass
    labels = text.rstrip(".").split(".")
    if len(text) > 253 or not all(_HOST_LABEL.fullmatch(label) for label in labels):
        raise r.expected(path, text, "a host name or an IP address")
    return text


# ------------------------------------------------------------ the small sections


@dataclass(frozen=True)
class TopicsConfig:
    """Topics arxwatch publishes to.

    Parameters
    ----------
    status : str
        Retained ``online``/``offline`` status topic (also the last will).
    alerts_prefix : str
        Alert events go to ``{prefix}/{asset}/events``, the retained current
        state to ``{prefix}/{asset}/state``.
    """

    status: str
    alerts_prefix: str

    def events_topic(self, asset_id: str) -> str:
        """Return the topic of an asset's alert events."""
        return f"{self.alerts_prefix}/{asset_id}/events"

    def state_topic(self, asset_id: str) -> str:
        """Return the retained topic of an asset's current alert state."""
        return f"{self.alerts_prefix}/{asset_id}/state"


def _topics(r: _Reader, data: Mapping[str, object], client_id: str) -> TopicsConfig:
    raw = r.section(data, "", "topics", ("status", "alerts_prefix"))
    found: dict[str, str] = {}
    for key, default in (
        ("status", f"arxwatch/{client_id}/status"),
        ("alerts_prefix", "arxwatch/alerts"),
    ):
        text = r.string(raw, "topics", key, default)
        r.build(f"topics.{key}", partial(validate_topic, text))
        if text.startswith("$"):
            raise r.expected(
                f"topics.{key}", text, "a topic not starting with '$' (reserved for the broker)"
            )
        if key == "alerts_prefix" and text.endswith("/"):
            raise r.expected("topics.alerts_prefix", text, "a prefix without a trailing '/'")
        found[key] = text
    return TopicsConfig(**found)


@dataclass(frozen=True)
class MetricsConfig:
    """Prometheus metrics and health endpoint.

    Parameters
    ----------
    host : str
        Address to listen on.
    port : int
        TCP port, 1..65535.
    """

    host: str
    port: int

    @property
    def listen(self) -> str:
        """``host:port`` as written in the config (IPv6 in brackets)."""
        return f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"


def _metrics(r: _Reader, data: Mapping[str, object]) -> MetricsConfig:
    raw = r.section(data, "", "metrics", ("listen",))
    path = "metrics.listen"
    text = r.string(raw, "metrics", "listen", "127.0.0.1:9108")
    bracketed = re.fullmatch(r"\[([^\]]+)\]:([0-9]+)", text)
    plain = re.fullmatch(r"([^:\[\]]+):([0-9]+)", text)
    found = bracketed or plain
    if found is None:
        raise r.expected(path, text, "host:port, e.g. '127.0.0.1:9108' or '[::1]:9108'")
    host, port = found.group(1), int(found.group(2))
    if bracketed:
        try:
            ipaddress.IPv6Address(host)
        except ValueError:
            raise r.expected(path, text, "an IPv6 address inside the brackets") from None
    else:
        _host(r, host, path)
    if not 1 <= port <= 65535:
        raise r.expected(path, text, "a port in 1..65535 after the colon")
    return MetricsConfig(host=host, port=port)


@dataclass(frozen=True)
class StateConfig:
    """Checkpoint storage.

    Parameters
    ----------
    path : Path
        SQLite database file.
    checkpoint_every_s : float
        Seconds between checkpoints.
    """

    path: Path
    checkpoint_every_s: float


def _state(r: _Reader, data: Mapping[str, object]) -> StateConfig:
    raw = r.section(data, "", "state", ("path", "checkpoint_every_s"))
    return StateConfig(
        path=Path(r.string(raw, "state", "path", "/var/lib/arxwatch/state.db", what="a file path")),
        checkpoint_every_s=r.number(raw, "state", "checkpoint_every_s", 60.0, positive=True),
    )


@dataclass(frozen=True)
class LoggingConfig:
    """Log threshold and format.

    Parameters
    ----------
    level : {"debug", "info", "warning", "error"}
        Threshold.
    format : {"text", "json"}
        Plain lines or one JSON object per line.
    """

    level: Literal["debug", "info", "warning", "error"]
    format: Literal["text", "json"]


def _logging(r: _Reader, data: Mapping[str, object]) -> LoggingConfig:
    raw = r.section(data, "", "logging", ("level", "format"))
    return LoggingConfig(
        level=r.choice(raw, "logging", "level", ("debug", "info", "warning", "error"), "info"),
        format=r.choice(raw, "logging", "format", ("text", "json"), "text"),
    )


@dataclass(frozen=True)
class LimitsConfig:
    """Bounds that keep one process within its memory.

    Parameters
    ----------
    max_assets : int
        Most assets discovered (cardinality cap of the router and metrics).
    max_payload_bytes : int
        Larger MQTT payloads are rejected before decoding.
    queue_size : int
        Messages buffered between the network thread and the workers.
    """

    max_assets: int
    max_payload_bytes: int
    queue_size: int


def _limits(r: _Reader, data: Mapping[str, object]) -> LimitsConfig:
    raw = r.section(data, "", "limits", ("max_assets", "max_payload_bytes", "queue_size"))
    return LimitsConfig(
        max_assets=r.integer(raw, "limits", "max_assets", 10000, low=1),
        max_payload_bytes=r.integer(
            raw, "limits", "max_payload_bytes", 4096, low=1, high=_MQTT_MAX_PAYLOAD_BYTES
        ),
        queue_size=r.integer(raw, "limits", "queue_size", 10000, low=1),
    )


# -------------------------------------------------------------------- asset classes


@dataclass(frozen=True)
class SignalConfig:
    """One signal of an asset class.

    Parameters
    ----------
    signal : str
        Value of the ``{signal}`` topic level, e.g. ``"zone-temp"``.
    name : str
        What people on site call it, e.g. ``"zone temperature"``.
    unit : str
        Unit after scaling, e.g. ``"degC"``.
    minimum, maximum : float
        Plausible range; values outside raise a data-quality alert.
    scale, offset : float or None
        Override of the class's payload scale and offset for this signal.
    """

    signal: str
    name: str
    unit: str
    minimum: float
    maximum: float
    scale: float | None
    offset: float | None


_SIGNAL_KEYS = ("signal", "name", "unit", "min", "max", "scale", "offset")


def _signal(r: _Reader, value: object, path: str) -> SignalConfig:
    raw = r.mapping(value, path, _SIGNAL_KEYS)
    signal = r.string(raw, path, "signal")
    if "/" in signal or "+" in signal or "#" in signal:
        raise r.expected(_key(path, "signal"), signal, "one topic level without '/', '+' or '#'")
    minimum = r.number(raw, path, "min")
    maximum = r.number(raw, path, "max")
    if maximum <= minimum:
        raise r.expected(_key(path, "max"), raw["max"], f"a number greater than min ({minimum})")
    return SignalConfig(
        signal=signal,
        name=r.string(raw, path, "name"),
        unit=r.string(raw, path, "unit"),
        minimum=minimum,
        maximum=maximum,
        scale=r.optional_number(raw, path, "scale"),
        offset=r.optional_number(raw, path, "offset"),
    )


@dataclass(frozen=True)
class ModeConfig:
    """Operating-mode signal of an asset class.

    Parameters
    ----------
    signal : str
        Value of the ``{signal}`` topic level carrying the mode label.
    values : tuple of str or None
        Known mode labels; None accepts any.
    """

    signal: str
    values: tuple[str, ...] | None


def _mode(r: _Reader, value: object, path: str) -> ModeConfig:
    raw = r.mapping(value, path, ("signal", "values"))
    values: tuple[str, ...] | None = None
    if raw.get("values") is not None:
        items = r.items(raw, path, "values", minimum=1)
        for where, item in items:
            if not isinstance(item, str) or not item:
                raise r.expected(where, item, "a non-empty string")
        values = tuple(cast(str, item) for _, item in items)
        if len(set(values)) != len(values):
            raise r.expected(_key(path, "values"), list(values), "distinct labels")
    return ModeConfig(signal=r.string(raw, path, "signal"), values=values)


@dataclass(frozen=True)
class PayloadConfig:
    """How payloads of an asset class are written (see :class:`PayloadFormat`).

    Parameters
    ----------
    kind : {"json", "number"}
        JSON object or bare decimal number.
    value_field, time_field, quality_field : str or None
        Dotted paths inside the JSON object.
    time_format : {"epoch_s", "epoch_ms", "iso8601"}
        Timestamp encoding.
    good_quality : frozenset
        Quality values meaning good.
    scale, offset : float
        ``value * scale + offset``, unless a signal overrides them.
    """

    kind: Literal["json", "number"]
    value_field: str
    time_field: str | None
    time_format: Literal["epoch_s", "epoch_ms", "iso8601"]
    quality_field: str | None
    good_quality: frozenset[str | int | bool]
    scale: float
    offset: float


_PAYLOAD_KEYS = (
    "kind",
    "value_field",
    "time_field",
    "time_format",
    "quality_field",
    "good_quality",
    "scale",
    "offset",
)


def _payload(r: _Reader, parent: Mapping[str, object], path: str) -> PayloadConfig:
    raw = r.section(parent, path, "payload", _PAYLOAD_KEYS)
    path = _key(path, "payload")
    good: list[str | int | bool] = []
    for where, item in r.items(raw, path, "good_quality"):
        if not isinstance(item, str | int) or (isinstance(item, str) and not item):
            raise r.expected(where, item, "a string, integer or boolean")
        good.append(item)
    arrival_time = "time_field" in raw and raw["time_field"] is None  # null: arrival time
    return PayloadConfig(
        kind=r.choice(raw, path, "kind", ("json", "number"), "json"),
        value_field=r.string(raw, path, "value_field", "value"),
        time_field=None if arrival_time else r.string(raw, path, "time_field", "ts"),
        time_format=r.choice(
            raw, path, "time_format", ("epoch_s", "epoch_ms", "iso8601"), "epoch_s"
        ),
        quality_field=r.optional_string(raw, path, "quality_field"),
        good_quality=frozenset(good) if "good_quality" in raw else frozenset({"good"}),
        scale=r.number(raw, path, "scale", 1.0),
        offset=r.number(raw, path, "offset", 0.0),
    )


@dataclass(frozen=True)
class ModelConfig:
    """Model structure: fixed orders, or chosen from the baseline data.

    Parameters
    ----------
    order : ArxOrder or None
        Fixed structure; None when ``auto``.
    auto : bool
        Select the orders by information criterion on the baseline.
    """

    order: ArxOrder | None
    auto: bool


def _per_input(r: _Reader, value: object, path: str, n_inputs: int) -> tuple[int, ...]:
    """Read an int meaning every input, or a list with one int per input."""
    what = f"an integer or a list of {n_inputs} integers (one per input)"
    items = value if isinstance(value, list) else [value] * n_inputs
    if len(items) != n_inputs:
        raise r.expected(path, value, what)
    for item in items:
        if isinstance(item, bool) or not isinstance(item, int):
            raise r.expected(path, value, what)
    return tuple(cast(list[int], items))


def _model(r: _Reader, parent: Mapping[str, object], path: str, n_inputs: int) -> ModelConfig:
    path = _key(path, "model")
    value = parent.get("model", "auto")
    if value == "auto":
        return ModelConfig(order=None, auto=True)
    if not isinstance(value, dict):
        raise r.expected(path, value, "'auto' or a mapping with na, nb, nk")
    raw = r.mapping(value, path, ("na", "nb", "nk", "constant"))
    na = r.integer(raw, path, "na")
    nb = _per_input(r, r.raw(raw, path, "nb", _REQUIRED), _key(path, "nb"), n_inputs)
    nk = _per_input(r, r.raw(raw, path, "nk", _REQUIRED), _key(path, "nk"), n_inputs)
    constant = r.boolean(raw, path, "constant", True)
    try:
        order = ArxOrder(na=na, nb=nb, nk=nk, constant=constant)
    except OrderError as err:
        raise r.fail(path, f"impossible model order: {err}") from None
    return ModelConfig(order=order, auto=False)


@dataclass(frozen=True)
class BaselineConfig:
    """Where the commissioning baseline comes from.

    Parameters
    ----------
    learn_for_s : float or None
        Learn it from the first this many seconds of data in each mode,
        over as many gap-free stretches as it takes.
    file : Path or None
        Load an accepted baseline from this file.
    """

    learn_for_s: float | None
    file: Path | None


def _baseline(r: _Reader, parent: Mapping[str, object], path: str) -> BaselineConfig:
    path = _key(path, "baseline")
    if parent.get("baseline") is None:
        raise r.fail(path, "required key is missing: give {learn_for_s: N} or {file: PATH}")
    raw = r.mapping(parent["baseline"], path, ("learn_for_s", "file"))
    if ("learn_for_s" in raw) == ("file" in raw):
        raise r.expected(path, raw, "exactly one of learn_for_s and file")
    if raw.get("file") is None:
        file = None
    else:
        file = Path(r.string(raw, path, "file", what="a file path"))
        if r.baseline_files_exist and not file.is_file():
            problem = "is not a regular file" if file.exists() else "does not exist"
            raise r.fail(
                _key(path, "file"),
                f"file {str(file)!r} {problem}; 'arxwatch baselines --config FILE --input "
                "HISTORY --write' fits and writes it from recorded data",
            )
    return BaselineConfig(
        learn_for_s=r.optional_number(raw, path, "learn_for_s", positive=True),
        file=file,
    )


@dataclass(frozen=True)
class DetectorsConfig:
    """Overrides of detector settings; None keeps the monitor's default.

    Parameters
    ----------
    cusum_h : float or None
        CUSUM decision interval, in standard deviations.
    variance_alpha, whiteness_alpha, drift_alpha : float or None
        False-alarm probabilities of the variance, whiteness and parameter tests.
    gain_tolerance, time_constant_tolerance, dead_time_tolerance : float or None
        Relative bands of the gain, the time constant and the dead time.
    evaluate_every : int or None
        Sample periods between parameter-based evaluations (at the first
        sample of each such period of sample time).
    reference_samples : int or None
        Samples at the start of monitoring (and after a restart of the
        histories) from which the normal correlation of the innovations is
        learned; the innovation detectors judge nothing before.
    raise_m, raise_n, clear_n : int or None
        Alert lifecycle (:class:`~arxwatch.daemon.decide.AlertPolicy`): raise
        when ``raise_m`` of the last ``raise_n`` evaluations alarm, clear
        after ``clear_n`` quiet evaluations in a row.
    clear_after_s : float or None
        Seconds that quiet run must also span before a behaviour alert clears.
    """

    cusum_h: float | None = None
    variance_alpha: float | None = None
    whiteness_alpha: float | None = None
    drift_alpha: float | None = None
    gain_tolerance: float | None = None
    time_constant_tolerance: float | None = None
    dead_time_tolerance: float | None = None
    evaluate_every: int | None = None
    reference_samples: int | None = None
    raise_m: int | None = None
    raise_n: int | None = None
    clear_n: int | None = None
    clear_after_s: float | None = None


_DETECTOR_NUMBERS = (
    "cusum_h",
    "variance_alpha",
    "whiteness_alpha",
    "drift_alpha",
    "gain_tolerance",
    "time_constant_tolerance",
    "dead_time_tolerance",
    "clear_after_s",
)
_POLICY_COUNTS = ("raise_m", "raise_n", "clear_n")
_DETECTOR_COUNTS = ("evaluate_every", "reference_samples", *_POLICY_COUNTS)
_POLICY_KEYS = (*_POLICY_COUNTS, "clear_after_s")


def _detectors(r: _Reader, parent: Mapping[str, object], path: str) -> DetectorsConfig:
    raw = r.section(parent, path, "detectors", (*_DETECTOR_NUMBERS, *_DETECTOR_COUNTS))
    path = _key(path, "detectors")
    settings: dict[str, Any] = {key: r.optional_number(raw, path, key) for key in _DETECTOR_NUMBERS}
    settings.update(
        {key: r.integer(raw, path, key, low=1) if key in raw else None for key in _DETECTOR_COUNTS}
    )
    return DetectorsConfig(**settings)


@dataclass(frozen=True)
class AssetClassConfig:
    """Many identical assets (e.g. every VAV box of a site) under one topic pattern.

    Parameters
    ----------
    name : str
        Class name, ``[a-z][a-z0-9_-]*``.
    pattern : TopicPattern
        Topics of the class; must have a ``{signal}`` level.
    asset_id : str
        Asset id template over the pattern's named levels.
    sample_period_s : float
        Model sample period.
    output : SignalConfig
        Modelled output.
    inputs : tuple of SignalConfig
        Model inputs, in model order.
    mode : ModeConfig or None
        Operating-mode signal.
    payload : PayloadConfig
        Payload format shared by the signals.
    model : ModelConfig
        Model structure.
    forgetting : float
        Forgetting factor of the live estimator.
    baseline : BaselineConfig
        Source of the commissioning baseline.
    detectors : DetectorsConfig
        Detector overrides.
    max_payload_bytes : int
        From ``limits``; larger payloads are rejected.
    timing : AlignTiming
        Overrides of the alignment windows; None keeps the defaults.
    """

    name: str
    pattern: TopicPattern
    asset_id: str
    sample_period_s: float
    output: SignalConfig
    inputs: tuple[SignalConfig, ...]
    mode: ModeConfig | None
    payload: PayloadConfig
    model: ModelConfig
    forgetting: float
    baseline: BaselineConfig
    detectors: DetectorsConfig
    max_payload_bytes: int
    timing: AlignTiming

    @property
    def signals(self) -> tuple[str, ...]:
        """Topic signal levels of the class: output, inputs, then mode."""
        mode = (self.mode.signal,) if self.mode else ()
        return (self.output.signal, *(s.signal for s in self.inputs), *mode)

    def route_rule(self) -> RouteRule:
        """Return the routing rule of the class."""
        return RouteRule(
            self.name,
            self.pattern,
            asset_id=self.asset_id,
            signal="{signal}",
            allowed_signals=frozenset(self.signals),
        )

    def payload_format(self, signal: str | None = None) -> PayloadFormat:
        """Return the payload format of one signal of the class.

        Parameters
        ----------
        signal : str or None
            Topic signal level (output, input or mode); None gives the
            class's own format.

        Returns
        -------
        PayloadFormat
            The class's format, with the signal's scale and offset if set.

        Raises
        ------
        KeyError
            If ``signal`` is not a signal of the class.
        """
        if signal is not None and signal not in self.signals:
            raise KeyError(f"asset class {self.name!r} has no signal {signal!r}")
        own = next((s for s in (self.output, *self.inputs) if s.signal == signal), None)
        p = self.payload
        return PayloadFormat(
            kind=p.kind,
            value_field=p.value_field,
            time_field=p.time_field,
            time_format=p.time_format,
            quality_field=p.quality_field,
            good_quality=p.good_quality,
            scale=own.scale if own and own.scale is not None else p.scale,
            offset=own.offset if own and own.offset is not None else p.offset,
            max_payload_bytes=self.max_payload_bytes,
            labels=self.mode is not None and signal == self.mode.signal,
        )

    def align_config(self) -> AlignConfig:
        """Return the alignment settings of one asset of the class."""
        return AlignConfig(
            sample_period_s=self.sample_period_s,
            output=self.output.signal,
            inputs=[s.signal for s in self.inputs],
            mode=self.mode.signal if self.mode else None,
            staleness_s=self.timing.staleness_s,
            lateness_s=self.timing.lateness_s,
            gap_restart_s=self.timing.gap_restart_s,
        )

    def monitor_config(self) -> MonitorConfig:
        """Return the monitor settings, defaults overridden by ``detectors``."""
        d = self.detectors
        base = MonitorConfig()
        return replace(
            base,
            rls=replace(base.rls, forgetting=self.forgetting),
            cusum=base.cusum if d.cusum_h is None else replace(base.cusum, h=d.cusum_h),
            variance=(
                base.variance
                if d.variance_alpha is None
                else replace(base.variance, alpha=d.variance_alpha)
            ),
            whiteness=(
                base.whiteness
                if d.whiteness_alpha is None
                else replace(base.whiteness, alpha=d.whiteness_alpha)
            ),
            drift_alpha=base.drift_alpha if d.drift_alpha is None else d.drift_alpha,
            bands=replace(
                base.bands,
                gain_tolerance=(
                    base.bands.gain_tolerance if d.gain_tolerance is None else d.gain_tolerance
                ),
                time_constant_tolerance=(
                    base.bands.time_constant_tolerance
                    if d.time_constant_tolerance is None
                    else d.time_constant_tolerance
                ),
                dead_time_tolerance=(
                    base.bands.dead_time_tolerance
                    if d.dead_time_tolerance is None
                    else d.dead_time_tolerance
                ),
            ),
            evaluate_every=base.evaluate_every if d.evaluate_every is None else d.evaluate_every,
            policy=replace(
                base.policy,
                **{k: getattr(d, k) for k in _POLICY_KEYS if getattr(d, k) is not None},
            ),
            prewhiten=(
                base.prewhiten
                if d.reference_samples is None
                else replace(base.prewhiten, reference_samples=d.reference_samples)
            ),
        )

    def learner_config(self) -> LearnerConfig:
        """Return the settings of a live baseline learner for one asset of the class.

        Raises
        ------
        ValueError
            If the class does not learn live, or its span is too short for
            the model orders and the acceptance rule.
        """
        span = self.baseline.learn_for_s
        if span is None:
            raise ValueError(f"asset class {self.name!r} loads its baselines from a file")
        modes: tuple[str | None, ...] = (None,)
        if self.mode is not None:
            if self.mode.values is None:
                raise ValueError(
                    "learning a baseline per operating mode needs the mode labels: "
                    "list them under mode.values"
                )
            modes = self.mode.values
        return LearnerConfig(
            sample_period_s=self.sample_period_s,
            span_s=span,
            max_samples=int(span // self.sample_period_s) + 1,
            modes=modes,
            n_inputs=len(self.inputs),
            order=self.model.order,
        )

    def signal_names(self) -> SignalNames:
        """Return the site names and units used in alert readings."""
        return SignalNames(
            self.output.name,
            self.output.unit,
            tuple(s.name for s in self.inputs),
            tuple(s.unit for s in self.inputs),
            points=(self.output.signal, *(s.signal for s in self.inputs)),
        )

    def quality_configs(self) -> dict[str, QualityConfig]:
        """Return data-quality settings per output and input signal.

        Ranges come from ``min``/``max``; a signal is stale after five sample
        periods.
        """
        return {
            s.signal: QualityConfig(
                expected_period_s=self.sample_period_s,
                stale_after_s=5.0 * self.sample_period_s,
                minimum=s.minimum,
                maximum=s.maximum,
            )
            for s in (self.output, *self.inputs)
        }


_CLASS_KEYS = (
    "name",
    "pattern",
    "asset_id",
    "sample_period_s",
    "output",
    "inputs",
    "mode",
    "payload",
    "model",
    "forgetting",
    "baseline",
    "detectors",
    "align",
)


@dataclass(frozen=True)
class AlignTiming:
    """Overrides of the alignment windows of an asset class (None: the default).

    Parameters
    ----------
    staleness_s : float or None
        Oldest a sample may be and still fill a grid point (default two
        sample periods).
    lateness_s : float or None
        How long after a grid point it is closed (default half a period):
        shorter means alerts sooner, longer tolerates later samples.
    gap_restart_s : float or None
        A row this long after the previous one restarts the model history
        (default five periods).
    """

    staleness_s: float | None = None
    lateness_s: float | None = None
    gap_restart_s: float | None = None


def _timing(r: _Reader, parent: Mapping[str, object], path: str) -> AlignTiming:
    keys = ("staleness_s", "lateness_s", "gap_restart_s")
    raw = r.section(parent, path, "align", keys)
    path = _key(path, "align")
    return AlignTiming(**{key: r.optional_number(raw, path, key, positive=True) for key in keys})


def _asset_class(r: _Reader, value: object, path: str, limits: LimitsConfig) -> AssetClassConfig:
    raw = r.mapping(value, path, _CLASS_KEYS)
    pattern_text = r.string(raw, path, "pattern")
    pattern = r.build(_key(path, "pattern"), lambda: TopicPattern.parse(pattern_text))
    if "signal" not in pattern.names:
        raise r.expected(
            _key(path, "pattern"), pattern_text, "a topic pattern with a {signal} level"
        )
    inputs = tuple(_signal(r, item, where) for where, item in r.items(raw, path, "inputs", 1))
    config = AssetClassConfig(
        name=r.string(
            raw, path, "name", pattern=_CLASS_NAME, what="a name matching [a-z][a-z0-9_-]*"
        ),
        pattern=pattern,
        asset_id=r.string(raw, path, "asset_id"),
        sample_period_s=r.number(raw, path, "sample_period_s", positive=True),
        output=_signal(r, r.raw(raw, path, "output", _REQUIRED), _key(path, "output")),
        inputs=inputs,
        mode=None if raw.get("mode") is None else _mode(r, raw["mode"], _key(path, "mode")),
        payload=_payload(r, raw, path),
        model=_model(r, raw, path, len(inputs)),
        forgetting=r.number(raw, path, "forgetting", 0.998),
        baseline=_baseline(r, raw, path),
        detectors=_detectors(r, raw, path),
        max_payload_bytes=limits.max_payload_bytes,
        timing=_timing(r, raw, path),
    )
    # Build every derived object once now, so that a bad setting is reported
    # here with its key path instead of at the first message.
    r.build(_key(path, "asset_id"), config.route_rule)
    r.build(_key(path, "inputs"), replace(config, timing=AlignTiming()).align_config)
    r.build(_key(path, "align"), config.align_config)
    r.build(_key(path, "payload"), config.payload_format)
    for where, item in (
        (_key(path, "output"), config.output),
        *((f"{path}.inputs[{i}]", s) for i, s in enumerate(inputs)),
    ):
        r.build(where, partial(config.payload_format, item.signal))
    r.build(_key(path, "forgetting"), replace(config, detectors=DetectorsConfig()).monitor_config)
    if config.baseline.learn_for_s is not None:
        needs_labels = config.mode is not None and config.mode.values is None
        where = "mode.values" if needs_labels else "baseline.learn_for_s"
        r.build(_key(path, where), config.learner_config)
    for key in (*_DETECTOR_NUMBERS, *_DETECTOR_COUNTS):
        if getattr(config.detectors, key) is not None and key not in _POLICY_KEYS:
            alone = DetectorsConfig(**{key: getattr(config.detectors, key)})
            r.build(f"{path}.detectors.{key}", replace(config, detectors=alone).monitor_config)
    # the lifecycle settings are checked together: raise_m must not exceed raise_n
    policy = {k: getattr(config.detectors, k) for k in _POLICY_KEYS}
    if any(v is not None for v in policy.values()):
        together = DetectorsConfig(**policy)
        r.build(f"{path}.detectors", replace(config, detectors=together).monitor_config)
    return config


# ------------------------------------------------------------------------- config


@dataclass(frozen=True)
class Config:
    """The whole, validated configuration.

    Parameters
    ----------
    source : str
        Name of the file it was read from, for later messages.
    broker, topics, metrics, state, logging, limits
        The sections.
    asset_classes : tuple of AssetClassConfig
        In routing priority order (first match wins).
    """

    source: str
    broker: BrokerConfig
    topics: TopicsConfig
    metrics: MetricsConfig
    state: StateConfig
    logging: LoggingConfig
    limits: LimitsConfig
    asset_classes: tuple[AssetClassConfig, ...]

    def router(self) -> Router:
        """Return a fresh router over the asset classes (it is stateful)."""
        return Router(
            [c.route_rule() for c in self.asset_classes], max_assets=self.limits.max_assets
        )

    def subscriptions(self) -> tuple[str, ...]:
        """Return the topic filters to subscribe to."""
        return self.router().subscriptions()


_TOP_KEYS = ("broker", "topics", "metrics", "state", "logging", "limits", "asset_classes")


def parse_config(text: str, source_name: str, *, baseline_files_exist: bool = True) -> Config:
    """Parse and validate configuration text.

    Parameters
    ----------
    text : str
        YAML document.
    source_name : str
        Name used in error messages, normally the file name.
    baseline_files_exist : bool, optional
        Whether every ``baseline.file`` must exist (True, for every command
        but ``arxwatch baselines``, which may write them for the first time).

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        On any YAML, type or value problem; the message names
        ``source_name``, the key path, the value found and what was expected.
    """
    r = _Reader(source_name, baseline_files_exist=baseline_files_exist)
    document = _load_yaml(text, source_name)
    if document is None:
        raise r.fail("", "the file is empty; expected a mapping with a broker section")
    data = r.mapping(document, "", _TOP_KEYS)
    broker = _broker(r, data)
    limits = _limits(r, data)
    classes = tuple(
        _asset_class(r, item, where, limits)
        for where, item in r.items(data, "", "asset_classes", minimum=1)
    )
    seen: dict[str, int] = {}
    for index, asset_class in enumerate(classes):
        for attribute, value in (("name", asset_class.name), ("pattern", asset_class.pattern.text)):
            earlier = seen.setdefault(f"{attribute}:{value}", index)
            if earlier != index:
                raise r.fail(
                    f"asset_classes[{index}].{attribute}",
                    f"{value!r} is already used by asset_classes[{earlier}]",
                )
    topics = _topics(r, data, broker.client_id)
    config = Config(
        source=source_name,
        broker=broker,
        topics=topics,
        metrics=_metrics(r, data),
        state=_state(r, data),
        logging=_logging(r, data),
        limits=limits,
        asset_classes=classes,
    )
    for subscription in config.subscriptions():
        if matches(subscription, topics.status):
            raise r.fail(
                "topics.status",
                f"{topics.status!r} matches the subscription "
                f"{subscription!r}; arxwatch would read its own status",
            )
    return config


def load_config(path: str | Path, *, baseline_files_exist: bool = True) -> Config:
    """Read and validate a configuration file.

    Parameters
    ----------
    path : str or Path
        YAML file (UTF-8).
    baseline_files_exist : bool, optional
        As :func:`parse_config`.

    Returns
    -------
    Config

    Raises
    ------
    ConfigError
        If the file cannot be read or is invalid (see :func:`parse_config`).
    """
    source = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise ConfigError(source, "", "is not UTF-8 text") from None
    except OSError as err:
        raise ConfigError(source, "", f"cannot read the file: {err.strerror}") from None
    return parse_config(text, source, baseline_files_exist=baseline_files_exist)


def read_secret(config: Config, environ: Mapping[str, str]) -> str | None:
    """Read the broker password from its file or environment variable.

    Parameters
    ----------
    config : Config
        Validated configuration.
    environ : mapping of str to str
        Environment to look the variable up in (``os.environ`` in the
        service, a dict in tests).

    Returns
    -------
    str or None
        The password, or None when none is configured. A file's trailing
        newline is removed.

    Raises
    ------
    ConfigError
        If the file cannot be read or is empty, or the variable is unset or
        empty. The message never contains the secret.
    """
    broker = config.broker
    if broker.password_file is not None:
        where = "broker.password_file"
        try:
            secret = broker.password_file.read_text(encoding="utf-8").rstrip("\r\n")
        except UnicodeDecodeError:
            raise ConfigError(config.source, where, "the password file is not UTF-8 text") from None
        except OSError as err:
            problem = f"cannot read {str(broker.password_file)!r}: {err.strerror}"
            raise ConfigError(config.source, where, problem) from None
        if not secret:
            raise ConfigError(
                config.source, where, f"the password file {str(broker.password_file)!r} is empty"
            )
        return secret
    if broker.password_env is not None:
        secret = environ.get(broker.password_env, "")
        if not secret:
            state = "is empty" if broker.password_env in environ else "is not set"
            raise ConfigError(
                config.source,
                "broker.password_env",
                f"environment variable {broker.password_env!r} {state}",
            )
        return secret
    return None
