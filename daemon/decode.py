"""MQTT payload bytes -> :class:`Sample`, or a :class:`Rejected` with a reason.

Pure: payload, arrival time and a frozen :class:`PayloadFormat` in; a sample
or a rejection out. No MQTT client, no I/O, no clock. :func:`decode` never
raises for bad input: every malformed, oversized or implausible message comes
back as ``Rejected(reason, detail)``, where ``reason`` is one of the closed,
stable set :data:`REJECT_REASONS` (for counting by reason) and ``detail`` is a
short human-readable explanation (for debug logs; it quotes at most a short
prefix of the offending text).

Checks, in order (the first failure decides the reason):

``too_large``
    More than ``max_payload_bytes`` bytes; checked before any decoding.
``empty``
    Zero-length payload (MQTT uses these to clear retained messages).
``not_utf8``
    Not valid UTF-8.
``not_json``
    Not one JSON document, including nesting too deep for the parser.
``non_finite``
    A ``NaN``/``Infinity``/``-Infinity`` literal anywhere in a JSON document
    (not JSON, but some devices send them), or a value that is not finite
    after parsing and scaling (``1e400``, an integer beyond float range).
``not_object``
    JSON top level is not an object.
``missing_value``
    ``value_field`` absent (or a step of its path is not an object).
``bad_value``
    The value is not a JSON number: booleans, ``null`` and numeric strings
    such as ``"21.5"`` are refused, so a device that quotes numbers is
    noticed instead of silently parsed.
``not_a_number``
    Bare-number payload that is not a decimal number: only ASCII digits,
    sign, decimal point and exponent are accepted, with surrounding
    whitespace; ``nan``, ``inf``, hex and ``1_000`` are refused.
``missing_time``
    ``time_field`` configured but absent.
``bad_time``
    Timestamp of the wrong type for ``time_format`` (a number for the epoch
    formats, a string for ISO 8601), not finite, or not parseable.
``time_in_future``
    More than ``max_future_s`` ahead of the arrival time.
``time_too_old``
    More than ``max_age_s`` behind the arrival time (stale retained
    messages, replayed buffers, clocks reset to 1970).
``bad_quality``
    ``quality_field`` configured but absent, or not a string, integer or
    boolean. A well-formed quality outside ``good_quality`` is not a
    rejection: the sample is kept with ``quality_ok=False``.
``bad_label``
    A format for labels (an operating-mode signal, ``labels=True``) got an
    empty label, one longer than :data:`MAX_LABEL_CHARS` characters, or one
    with control characters.

With ``labels=True`` the value may be text (a JSON string, or for bare
payloads any text that is not a decimal number): the sample's value is then
the stripped label, unscaled. Numbers are still numbers.

Examples
--------
>>> fmt = PayloadFormat(time_field="ts")
>>> decode(b'{"value": 21.5, "ts": 1772366400}', 1772366401.0, fmt)
Sample(time_s=1772366400.0, value=21.5, arrival_s=1772366401.0, quality_ok=True)
>>> decode(b'{"value": NaN, "ts": 1772366400}', 1772366401.0, fmt).reason
'non_finite'
>>> decode(b" 42 ", 1772366401.0, PayloadFormat(kind="number")).value
42.0
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any, Final, Literal

__all__ = [
    "DECIMAL_CHARS",
    "MAX_LABEL_CHARS",
    "REJECT_REASONS",
    "PayloadFormat",
    "Rejected",
    "Sample",
    "decode",
]

#: Every reason :func:`decode` can return, in check order (for pre-created metric labels).
REJECT_REASONS: Final[tuple[str, ...]] = (
    "too_large",
    "empty",
    "not_utf8",
    "not_json",
    "non_finite",
    "not_object",
    "missing_value",
    "bad_value",
    "not_a_number",
    "missing_time",
    "bad_time",
    "time_in_future",
    "time_too_old",
    "bad_quality",
    "bad_label",
)

#: Longest operating-mode label accepted, in characters.
MAX_LABEL_CHARS: Final = 64

PayloadKind = Literal["json", "number"]
TimeFormat = Literal["epoch_s", "epoch_ms", "iso8601"]
Quality = str | int | bool

_KINDS: Final = ("json", "number")
_TIME_FORMATS: Final = ("epoch_s", "epoch_ms", "iso8601")
#: Largest payload MQTT can carry (MQTT 5.0 section 1.5.5, variable byte integer).
_MQTT_MAX_PAYLOAD_BYTES: Final = 268_435_455
#: What a bare decimal number may be made of (before float() reads it).
DECIMAL_CHARS: Final = "0123456789+-.eE"
_PREVIEW_CHARS: Final = 32
_MISSING: Final = object()


@dataclass(frozen=True, slots=True)
class Sample:
    """One decoded measurement.

    Parameters
    ----------
    time_s : float
        Measurement time, Unix epoch seconds (the payload's timestamp, or the
        arrival time when the format has no time field).
    value : float or str
        Measurement after ``value * scale + offset``; always finite. A label
        (str, unscaled) for a format with ``labels=True``.
    arrival_s : float
        Arrival time passed to :func:`decode`, Unix epoch seconds.
    quality_ok : bool
        Whether the payload's quality is one of ``good_quality``; ``True``
        when the format has no quality field.
    """

    time_s: float
    value: float | str
    arrival_s: float
    quality_ok: bool


@dataclass(frozen=True, slots=True)
class Rejected:
    """A payload that could not become a :class:`Sample`.

    Parameters
    ----------
    reason : str
        One of :data:`REJECT_REASONS`; stable, for metric labels.
    detail : str
        Short explanation for debug logs; not stable.
    """

    reason: str
    detail: str


@dataclass(frozen=True)
class PayloadFormat:
    """How to read one signal's payloads (immutable, validated on construction).

    Parameters
    ----------
    kind : {"json", "number"}
        ``"json"``: a JSON object holding the value and optionally a time and
        a quality. ``"number"``: the payload is the decimal text of the value
        and its time is the arrival time; ``value_field``, ``time_field`` and
        ``time_format`` are then not consulted.
    value_field : str
        Dotted path of the value inside the object, e.g. ``"data.temp"``.
        Keys that themselves contain dots cannot be addressed.
    time_field : str or None
        Dotted path of the timestamp; ``None`` uses the arrival time. When
        set, a payload without it is rejected (``missing_time``).
    time_format : {"epoch_s", "epoch_ms", "iso8601"}
        Epoch seconds or milliseconds (a JSON number), or an ISO 8601 string
        as read by :meth:`datetime.datetime.fromisoformat`, e.g.
        ``"2026-03-01T12:00:00Z"``, ``"2026-03-01T13:00:00.25+01:00"``. An
        ISO time without a zone is taken as UTC.
    quality_field : str or None
        Dotted path of a quality flag; ``None`` means every sample is good.
        Only for ``kind="json"``.
    good_quality : frozenset of str, int or bool
        Quality values that mean good, e.g. ``frozenset({"good", 192})``.
        Matching is exact and type-strict: ``"Good"`` does not match
        ``"good"``, and ``True`` does not match ``1`` (nor ``0`` ``False``).
        Python sets treat ``1`` and ``True`` as one element, so list only the
        form the device sends.
    scale, offset : float
        The sample value is ``raw * scale + offset`` (unit conversion);
        ``scale`` must be non-zero.
    max_payload_bytes : int
        Larger payloads are rejected before decoding (``too_large``).
    max_future_s : float
        Accept timestamps at most this far ahead of arrival (clock skew);
        ``math.inf`` disables the check.
    max_age_s : float
        Accept timestamps at most this far behind arrival; ``math.inf``
        disables the check (default 7 days).
    labels : bool
        Accept text values as labels (an operating-mode signal).

    Raises
    ------
    ValueError
        If a setting is invalid; the message names it, the value found and
        what was expected.
    """

    kind: PayloadKind = "json"
    value_field: str = "value"
    time_field: str | None = "ts"
    time_format: TimeFormat = "epoch_s"
    quality_field: str | None = None
    good_quality: frozenset[Quality] = frozenset({"good"})
    scale: float = 1.0
    offset: float = 0.0
    max_payload_bytes: int = 4096
    max_future_s: float = 300.0
    max_age_s: float = 7 * 86400.0
    labels: bool = False
    _value_path: tuple[str, ...] = field(init=False, repr=False, compare=False)
    _time_path: tuple[str, ...] | None = field(init=False, repr=False, compare=False)
    _quality_path: tuple[str, ...] | None = field(init=False, repr=False, compare=False)
    _good_keys: frozenset[tuple[type, Quality]] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise ValueError(f"PayloadFormat.kind must be one of {_KINDS}, got {self.kind!r}")
        if self.time_format not in _TIME_FORMATS:
            raise ValueError(
                f"PayloadFormat.time_format must be one of {_TIME_FORMATS}, "
                f"got {self.time_format!r}"
            )
        if self.kind == "number" and self.quality_field is not None:
            raise ValueError(
                f"PayloadFormat.quality_field must be None for kind='number' "
                f"(a bare number carries no quality), got {self.quality_field!r}"
            )
        object.__setattr__(self, "_value_path", _split_path("value_field", self.value_field))
        object.__setattr__(self, "_time_path", _split_optional("time_field", self.time_field))
        object.__setattr__(
            self, "_quality_path", _split_optional("quality_field", self.quality_field)
        )
        named = (
            ("value_field", self.value_field),
            ("time_field", self.time_field),
            ("quality_field", self.quality_field),
        )
        for i, (name_a, path_a) in enumerate(named):
            for name_b, path_b in named[i + 1 :]:
                if path_a is not None and path_a == path_b:
                    raise ValueError(
                        f"PayloadFormat.{name_a} and {name_b} must differ, both are {path_a!r}"
                    )
        object.__setattr__(self, "_good_keys", _good_keys(self.good_quality))
        if self.quality_field is not None and not self.good_quality:
            raise ValueError(
                "PayloadFormat.good_quality must list at least one value when "
                "quality_field is set, got an empty set"
            )
        for name in ("scale", "offset"):
            number = getattr(self, name)
            if not _is_real(number) or not math.isfinite(number):
                raise ValueError(f"PayloadFormat.{name} must be a finite number, got {number!r}")
        if self.scale == 0:
            raise ValueError(f"PayloadFormat.scale must be non-zero, got {self.scale!r}")
        size = self.max_payload_bytes
        if (
            isinstance(size, bool)
            or not isinstance(size, int)
            or not 1 <= size <= _MQTT_MAX_PAYLOAD_BYTES
        ):
            raise ValueError(
                f"PayloadFormat.max_payload_bytes must be an integer in "
                f"[1, {_MQTT_MAX_PAYLOAD_BYTES}], got {size!r}"
            )
        if not _is_real(self.max_future_s) or not self.max_future_s >= 0:
            raise ValueError(
                f"PayloadFormat.max_future_s must be a number >= 0 (math.inf to disable), "
                f"got {self.max_future_s!r}"
            )
        if not _is_real(self.max_age_s) or not self.max_age_s > 0:
            raise ValueError(
                f"PayloadFormat.max_age_s must be a number > 0 (math.inf to disable), "
                f"got {self.max_age_s!r}"
            )


def decode(payload: bytes | bytearray, arrival_s: float, fmt: PayloadFormat) -> Sample | Rejected:
    """Decode one MQTT payload into a sample, or say why not.

    Parameters
    ----------
    payload : bytes or bytearray
        Raw message payload; untrusted.
    arrival_s : float
        When the message arrived, Unix epoch seconds (finite); the reference
        for the time window and the sample time when the format has none.
    fmt : PayloadFormat
        How to read the payload.

    Returns
    -------
    Sample or Rejected
        A sample with a finite value and a time inside
        ``[arrival_s - max_age_s, arrival_s + max_future_s]``, or a rejection
        whose ``reason`` is in :data:`REJECT_REASONS`.

    Raises
    ------
    TypeError
        If ``payload`` is not bytes or ``arrival_s`` not a real number
        (caller errors, not bad messages).
    ValueError
        If ``arrival_s`` is not finite.
    """
    if not isinstance(payload, bytes | bytearray):
        raise TypeError(f"payload must be bytes, got {type(payload).__name__}")
    if not math.isfinite(arrival_s):
        raise ValueError(f"arrival_s must be finite, got {arrival_s!r}")
    size = len(payload)
    if size > fmt.max_payload_bytes:
        return Rejected("too_large", f"{size} bytes > max_payload_bytes {fmt.max_payload_bytes}")
    if size == 0:
        return Rejected("empty", "zero-length payload")
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        return Rejected("not_utf8", f"invalid UTF-8 at byte {exc.start}")
    arrival = float(arrival_s)
    if fmt.kind == "number":
        return _decode_number(text, arrival, fmt)
    return _decode_json(text, arrival, fmt)


class _NonFiniteLiteral(ValueError):
    """A NaN/Infinity literal met while parsing JSON."""


def _refuse_constant(literal: str) -> float:
    raise _NonFiniteLiteral(f"JSON literal {literal} is not allowed")


#: One decoder for all messages (``json.loads`` with keywords builds one per call).
_JSON_DECODER: Final = json.JSONDecoder(parse_constant=_refuse_constant)


def _decode_json(text: str, arrival_s: float, fmt: PayloadFormat) -> Sample | Rejected:
    try:
        doc = _JSON_DECODER.decode(text)
    except _NonFiniteLiteral as exc:
        return Rejected("non_finite", str(exc))
    except RecursionError:
        return Rejected("not_json", "nesting too deep")
    except ValueError as exc:  # JSONDecodeError, or an integer over the digit limit
        return Rejected("not_json", str(exc)[:80])
    if type(doc) is not dict:
        return Rejected("not_object", f"top level is {_json_type(doc)}, expected an object")

    raw = _lookup(doc, fmt._value_path)
    if raw is _MISSING:
        return Rejected("missing_value", f"no {fmt.value_field!r} in payload")
    value: float | str
    if fmt.labels and type(raw) is str:
        label = _label(raw)
        if isinstance(label, Rejected):
            return label
        value = label
    else:
        number = _as_float(raw)
        if number is None:
            expected = "a number or a label" if fmt.labels else "a number"
            return Rejected(
                "bad_value", f"{fmt.value_field}: expected {expected}, got {_json_type(raw)}"
            )
        value = number * fmt.scale + fmt.offset
        if not math.isfinite(value):
            return Rejected("non_finite", f"{fmt.value_field}: {value!r} after scaling")

    if fmt._time_path is None:
        time_s = arrival_s
    else:
        stamp = _lookup(doc, fmt._time_path)
        if stamp is _MISSING:
            return Rejected("missing_time", f"no {fmt.time_field!r} in payload")
        parsed = _parse_time(stamp, fmt.time_format)
        if isinstance(parsed, str):
            return Rejected("bad_time", f"{fmt.time_field}: {parsed}")
        time_s = parsed
        if time_s - arrival_s > fmt.max_future_s:
            return Rejected(
                "time_in_future",
                f"{time_s - arrival_s:.3f} s ahead of arrival > max_future_s {fmt.max_future_s}",
            )
        if arrival_s - time_s > fmt.max_age_s:
            return Rejected(
                "time_too_old",
                f"{arrival_s - time_s:.3f} s before arrival > max_age_s {fmt.max_age_s}",
            )

    quality_ok = True
    if fmt._quality_path is not None:
        quality = _lookup(doc, fmt._quality_path)
        if quality is _MISSING:
            return Rejected("bad_quality", f"no {fmt.quality_field!r} in payload")
        kind = type(quality)
        if kind is not str and kind is not int and kind is not bool:
            return Rejected(
                "bad_quality",
                f"{fmt.quality_field}: expected a string, integer or boolean, "
                f"got {_json_type(quality)}",
            )
        quality_ok = (kind, quality) in fmt._good_keys
    return Sample(time_s, value, arrival_s, quality_ok)


def _decode_number(text: str, arrival_s: float, fmt: PayloadFormat) -> Sample | Rejected:
    stripped = text.strip()
    # Stripping the allowed characters leaves nothing only if every character
    # is one of them; this keeps float() away from "nan", "inf", "1_0", "١".
    if not stripped or stripped.strip(DECIMAL_CHARS):
        if fmt.labels:
            label = _label(stripped)
            if isinstance(label, Rejected):
                return label
            return Sample(arrival_s, label, arrival_s, True)
        return Rejected("not_a_number", f"not a decimal number: {_preview(stripped)}")
    try:
        number = float(stripped)
    except ValueError:
        return Rejected("not_a_number", f"not a decimal number: {_preview(stripped)}")
    value = number * fmt.scale + fmt.offset
    if not math.isfinite(value):
        return Rejected("non_finite", f"{value!r} after scaling")
    return Sample(arrival_s, value, arrival_s, True)


def _label(text: str) -> str | Rejected:
    """Check a mode label: stripped, non-empty, short, printable."""
    label = text.strip()
    if not label:
        return Rejected("bad_label", "empty label")
    if len(label) > MAX_LABEL_CHARS:
        return Rejected("bad_label", f"label longer than {MAX_LABEL_CHARS} characters")
    if not label.isprintable():
        return Rejected("bad_label", f"label with control characters: {_preview(label)}")
    return label


def _lookup(doc: dict[str, Any], path: tuple[str, ...]) -> Any:
    node: Any = doc
    for key in path:
        if type(node) is not dict or key not in node:
            return _MISSING
        node = node[key]
    return node


def _as_float(raw: Any) -> float | None:
    """JSON number -> float (``inf`` past float range); ``None`` for other types, bool too."""
    kind = type(raw)
    if kind is float:
        return float(raw)
    if kind is int:
        try:
            return float(raw)
        except OverflowError:
            return math.inf
    return None


def _parse_time(stamp: Any, time_format: TimeFormat) -> float | str:
    """Timestamp -> finite epoch seconds, or a string saying what is wrong."""
    if time_format == "iso8601":
        if type(stamp) is not str:
            return f"expected an ISO 8601 string, got {_json_type(stamp)}"
        try:
            moment = datetime.fromisoformat(stamp)
        except ValueError:
            return f"not an ISO 8601 time: {_preview(stamp)}"
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=UTC)
        return moment.timestamp()
    seconds = _as_float(stamp)
    if seconds is None:
        return f"expected a number ({time_format}), got {_json_type(stamp)}"
    if time_format == "epoch_ms":
        seconds /= 1000.0
    if not math.isfinite(seconds):
        return f"{seconds!r} is not a finite time"
    return seconds


def _json_type(obj: Any) -> str:
    if obj is None:
        return "null"
    if isinstance(obj, bool):
        return "boolean"
    if isinstance(obj, str):
        return f"string {_preview(obj)}"
    if isinstance(obj, dict):
        return "object"
    if isinstance(obj, list):
        return "array"
    return "number"


def _preview(text: str) -> str:
    if len(text) <= _PREVIEW_CHARS:
        return repr(text)
    return repr(text[:_PREVIEW_CHARS]) + "..."


def _split_optional(name: str, path: str | None) -> tuple[str, ...] | None:
    return None if path is None else _split_path(name, path)


def _split_path(name: str, path: object) -> tuple[str, ...]:
    if not isinstance(path, str) or not all(path.split(".")):
        raise ValueError(
            f"PayloadFormat.{name} must be a dotted path of non-empty keys "
            f"(e.g. 'data.temp'), got {path!r}"
        )
    return tuple(path.split("."))


def _good_keys(values: object) -> frozenset[tuple[type, Quality]]:
    if not isinstance(values, frozenset):
        raise ValueError(
            f"PayloadFormat.good_quality must be a frozenset of str, int or bool, got {values!r}"
        )
    for item in values:
        if not isinstance(item, str | int):  # bool is an int
            raise ValueError(
                f"PayloadFormat.good_quality entries must be str, int or bool, got {item!r}"
            )
    # Key on the JSON type, so an IntEnum or str subclass still matches a decoded value.
    return frozenset((_quality_type(item), item) for item in values)


def _quality_type(item: Quality) -> type:
    if isinstance(item, bool):
        return bool
    return int if isinstance(item, int) else str


def _is_real(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)
