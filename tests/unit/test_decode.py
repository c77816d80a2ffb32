"""Payload decoding: every reject reason, time formats, paths, scaling, quality, config."""

import json
import math

import pytest

from arxwatch.daemon.decode import REJECT_REASONS, PayloadFormat, Rejected, Sample, decode

ARRIVAL_S = 1_772_366_400.0  # 2026-03-01T12:00:00Z
JSON_FMT = PayloadFormat()  # {"value": ..., "ts": epoch seconds}
NUMBER_FMT = PayloadFormat(kind="number")


def payload(**fields: object) -> bytes:
    return json.dumps(fields).encode()


def reason(raw: bytes, fmt: PayloadFormat = JSON_FMT, arrival_s: float = ARRIVAL_S) -> str:
    result = decode(raw, arrival_s, fmt)
    assert isinstance(result, Rejected), result
    assert result.detail
    return result.reason


def sample(
    raw: bytes | bytearray, fmt: PayloadFormat = JSON_FMT, arrival_s: float = ARRIVAL_S
) -> Sample:
    result = decode(raw, arrival_s, fmt)
    assert isinstance(result, Sample), result
    return result


# --- accepted payloads --------------------------------------------------------------------


def test_json_value_and_epoch_seconds() -> None:
    got = sample(payload(value=21.5, ts=ARRIVAL_S - 2))
    assert got == Sample(ARRIVAL_S - 2, 21.5, ARRIVAL_S, True)


def test_integer_values_and_times_are_accepted() -> None:
    got = sample(payload(value=21, ts=int(ARRIVAL_S)))
    assert (got.value, got.time_s) == (21.0, ARRIVAL_S)
    assert type(got.value) is float and type(got.time_s) is float


def test_epoch_milliseconds() -> None:
    fmt = PayloadFormat(time_format="epoch_ms")
    got = sample(payload(value=1, ts=int(ARRIVAL_S * 1000) - 1500), fmt)
    assert got.time_s == ARRIVAL_S - 1.5


@pytest.mark.parametrize(
    ("stamp", "expected_s"),
    [
        ("2026-03-01T12:00:00Z", ARRIVAL_S),
        ("2026-03-01T12:00:00+00:00", ARRIVAL_S),
        ("2026-03-01T13:00:00+01:00", ARRIVAL_S),
        ("2026-03-01T06:30:00-05:30", ARRIVAL_S),
        ("2026-03-01T12:00:00", ARRIVAL_S),  # naive means UTC
        ("2026-03-01 12:00:00", ARRIVAL_S),
        ("2026-03-01T11:59:59.25Z", ARRIVAL_S - 0.75),
        ("2026-03-01T12:59:58.500+01:00", ARRIVAL_S - 1.5),
        ("2026-03-01T11:59:59.123456", ARRIVAL_S - 1 + 0.123456),
    ],
)
def test_iso8601_forms(stamp: str, expected_s: float) -> None:
    fmt = PayloadFormat(time_format="iso8601")
    assert sample(payload(value=1.0, ts=stamp), fmt).time_s == pytest.approx(expected_s, abs=1e-6)


def test_no_time_field_uses_arrival_time() -> None:
    fmt = PayloadFormat(time_field=None)
    got = sample(payload(value=3.0, ts="ignored"), fmt)
    assert got.time_s == got.arrival_s == ARRIVAL_S


def test_nested_field_paths() -> None:
    fmt = PayloadFormat(value_field="data.temp", time_field="meta.time.epoch")
    raw = payload(data={"temp": 12.5, "rh": 40}, meta={"time": {"epoch": ARRIVAL_S}})
    got = sample(raw, fmt)
    assert (got.value, got.time_s) == (12.5, ARRIVAL_S)


def test_scale_and_offset() -> None:
    fahrenheit = PayloadFormat(scale=5 / 9, offset=-32 * 5 / 9, time_field=None)
    assert sample(payload(value=212), fahrenheit).value == pytest.approx(100.0)
    tenths = PayloadFormat(kind="number", scale=0.1)
    assert sample(b"215", tenths).value == pytest.approx(21.5)


@pytest.mark.parametrize(
    ("quality", "ok"),
    [("good", True), ("Good", False), ("bad", False), (192, True), (0, True), (True, True)],
)
def test_quality_mapping(quality: object, ok: bool) -> None:
    fmt = PayloadFormat(quality_field="q", good_quality=frozenset({"good", 192, 0, True}))
    assert sample(payload(value=1, ts=ARRIVAL_S, q=quality), fmt).quality_ok is ok


def test_quality_is_type_strict() -> None:
    ints = PayloadFormat(quality_field="q", good_quality=frozenset({0, 1}))
    assert sample(payload(value=1, ts=ARRIVAL_S, q=False), ints).quality_ok is False
    assert sample(payload(value=1, ts=ARRIVAL_S, q=True), ints).quality_ok is False
    assert sample(payload(value=1, ts=ARRIVAL_S, q=1), ints).quality_ok is True
    flags = PayloadFormat(quality_field="q", good_quality=frozenset({True}))
    assert sample(payload(value=1, ts=ARRIVAL_S, q=1), flags).quality_ok is False


def test_no_quality_field_means_good() -> None:
    assert sample(payload(value=1, ts=ARRIVAL_S, q="bad")).quality_ok is True


@pytest.mark.parametrize(
    ("raw", "value"),
    [(b"21.5", 21.5), (b" -3 \n", -3.0), (b"1e3", 1000.0), (b"+.5", 0.5), (b"\t7.\r\n", 7.0)],
)
def test_bare_numbers(raw: bytes, value: float) -> None:
    got = sample(raw, NUMBER_FMT)
    assert got == Sample(ARRIVAL_S, value, ARRIVAL_S, True)


def test_window_edges_are_inclusive() -> None:
    fmt = PayloadFormat(max_future_s=10.0, max_age_s=60.0)
    assert sample(payload(value=1, ts=ARRIVAL_S + 10), fmt).time_s == ARRIVAL_S + 10
    assert sample(payload(value=1, ts=ARRIVAL_S - 60), fmt).time_s == ARRIVAL_S - 60


def test_infinite_window_disables_time_checks() -> None:
    fmt = PayloadFormat(max_future_s=math.inf, max_age_s=math.inf)
    assert sample(payload(value=1, ts=0), fmt).time_s == 0.0


def test_bytearray_payload() -> None:
    assert sample(bytearray(b"4"), NUMBER_FMT).value == 4.0


# --- every reject reason ------------------------------------------------------------------


def test_too_large_is_checked_before_decoding() -> None:
    fmt = PayloadFormat(max_payload_bytes=16)
    assert reason(b"\xff" * 17, fmt) == "too_large"  # not not_utf8: size comes first
    at_limit = PayloadFormat(kind="number", max_payload_bytes=16)
    assert sample(b" " * 11 + b"12345", at_limit).value == 12345.0


def test_default_size_limit() -> None:
    raw = json.dumps({"value": 1, "ts": ARRIVAL_S, "pad": "x" * 4096}).encode()
    assert reason(raw) == "too_large"


def test_empty() -> None:
    assert reason(b"") == "empty"
    assert reason(b"", NUMBER_FMT) == "empty"


def test_not_utf8() -> None:
    assert reason(b'{"value": "\xff"}') == "not_utf8"
    assert reason(b"\xc3", NUMBER_FMT) == "not_utf8"
    assert reason('{"value": 1}'.encode("utf-16")) == "not_utf8"


@pytest.mark.parametrize(
    "raw",
    [b"{", b"{'value': 1}", b'{"value": 1} x', b"   ", b'{"value": 01}', b"\xef\xbb\xbf{}"],
)
def test_not_json(raw: bytes) -> None:
    assert reason(raw) == "not_json"


def test_deep_nesting_is_not_json() -> None:
    fmt = PayloadFormat(max_payload_bytes=300_000)
    assert reason(b"[" * 100_000, fmt) == "not_json"
    assert reason(b'{"a":' * 50_000, fmt) == "not_json"


def test_integer_past_digit_limit_is_not_json() -> None:
    fmt = PayloadFormat(max_payload_bytes=10_000)
    assert reason(b'{"value": ' + b"9" * 5000 + b"}", fmt) == "not_json"


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_non_finite_literals_are_refused_anywhere(literal: str) -> None:
    assert reason(f'{{"value": {literal}, "ts": {ARRIVAL_S}}}'.encode()) == "non_finite"
    assert reason(f'{{"value": 1, "ts": {ARRIVAL_S}, "x": [{literal}]}}'.encode()) == "non_finite"


def test_non_finite_after_parsing_or_scaling() -> None:
    assert reason(f'{{"value": 1e400, "ts": {ARRIVAL_S}}}'.encode()) == "non_finite"
    assert reason(payload(value=10**400, ts=ARRIVAL_S)) == "non_finite"
    assert reason(payload(value=1e308, ts=ARRIVAL_S), PayloadFormat(scale=10.0)) == "non_finite"
    assert reason(b"1e400", NUMBER_FMT) == "non_finite"
    assert reason(b"1e308", PayloadFormat(kind="number", scale=-10.0)) == "non_finite"


@pytest.mark.parametrize("raw", [b"[1, 2]", b"21.5", b'"21.5"', b"null", b"true"])
def test_not_object(raw: bytes) -> None:
    assert reason(raw) == "not_object"


def test_missing_value() -> None:
    assert reason(payload(temp=1, ts=ARRIVAL_S)) == "missing_value"
    nested = PayloadFormat(value_field="data.temp")
    assert reason(payload(data={"rh": 1}, ts=ARRIVAL_S), nested) == "missing_value"
    assert reason(payload(data=[1], ts=ARRIVAL_S), nested) == "missing_value"
    assert reason(payload(data=5, ts=ARRIVAL_S), nested) == "missing_value"


@pytest.mark.parametrize("value", [True, False, None, "21.5", "", [1.0], {"v": 1.0}])
def test_bad_value(value: object) -> None:
    assert reason(payload(value=value, ts=ARRIVAL_S)) == "bad_value"


@pytest.mark.parametrize(
    "raw",
    [
        b"nan",
        b"NaN",
        b"inf",
        b"-Infinity",
        b"0x1A",
        b"1_000",
        b"1,5",
        b"12 kPa",
        b"1 2",
        b".",
        b"+-1",
        b"1e",
        b"   ",
        b"\xd9\xa1\xd9\xa2",  # Arabic-Indic digits: float() would accept them
        b'{"value": 1}',
        b"true",
    ],
)
def test_not_a_number(raw: bytes) -> None:
    assert reason(raw, NUMBER_FMT) == "not_a_number"


def test_missing_time() -> None:
    assert reason(payload(value=1)) == "missing_time"
    nested = PayloadFormat(time_field="meta.ts")
    assert reason(payload(value=1, meta={}), nested) == "missing_time"


@pytest.mark.parametrize("stamp", [None, True, "1772366400", [ARRIVAL_S], {"s": ARRIVAL_S}])
def test_bad_epoch_time(stamp: object) -> None:
    assert reason(payload(value=1, ts=stamp)) == "bad_time"
    assert reason(payload(value=1, ts=stamp), PayloadFormat(time_format="epoch_ms")) == "bad_time"


def test_non_finite_epoch_time_is_bad() -> None:
    assert reason(b'{"value": 1, "ts": 1e400}') == "bad_time"
    assert reason(payload(value=1, ts=10**400)) == "bad_time"


@pytest.mark.parametrize(
    "stamp", [ARRIVAL_S, None, "", "yesterday", "2026-13-01T00:00:00Z", "2026-03-01T23:59:60Z"]
)
def test_bad_iso_time(stamp: object) -> None:
    assert reason(payload(value=1, ts=stamp), PayloadFormat(time_format="iso8601")) == "bad_time"


def test_time_in_future() -> None:
    assert reason(payload(value=1, ts=ARRIVAL_S + 301)) == "time_in_future"
    ms = PayloadFormat(time_format="epoch_ms")
    assert reason(payload(value=1, ts=(ARRIVAL_S + 3600) * 1000), ms) == "time_in_future"
    # Epoch milliseconds read as seconds land tens of thousands of years ahead.
    assert reason(payload(value=1, ts=ARRIVAL_S * 1000)) == "time_in_future"
    iso = PayloadFormat(time_format="iso8601", max_future_s=5.0)
    assert reason(payload(value=1, ts="2026-03-01T12:00:06Z"), iso) == "time_in_future"


def test_time_too_old() -> None:
    assert reason(payload(value=1, ts=ARRIVAL_S - 7 * 86400 - 1)) == "time_too_old"
    assert reason(payload(value=1, ts=0)) == "time_too_old"
    assert reason(payload(value=1, ts=-1e300)) == "time_too_old"
    iso = PayloadFormat(time_format="iso8601", max_age_s=3600.0)
    assert reason(payload(value=1, ts="2026-03-01T12:00:00+02:00"), iso) == "time_too_old"


@pytest.mark.parametrize("quality", [None, 192.0, [0], {"code": 0}])
def test_bad_quality(quality: object) -> None:
    fmt = PayloadFormat(quality_field="q", good_quality=frozenset({0}))
    assert reason(payload(value=1, ts=ARRIVAL_S, q=quality), fmt) == "bad_quality"


def test_missing_quality_is_bad_quality() -> None:
    fmt = PayloadFormat(quality_field="status.q")
    assert reason(payload(value=1, ts=ARRIVAL_S, status={}), fmt) == "bad_quality"


def test_every_reason_is_reachable_and_listed() -> None:
    big = PayloadFormat(max_payload_bytes=300_000)
    quality = PayloadFormat(quality_field="q")
    iso = PayloadFormat(time_format="iso8601")
    seen = {
        reason(b"x" * 5000),
        reason(b""),
        reason(b"\xff"),
        reason(b"[" * 100_000, big),
        reason(b'{"value": NaN}'),
        reason(b"[]"),
        reason(b"{}"),
        reason(b'{"value": "1"}'),
        reason(b"nan", NUMBER_FMT),
        reason(b'{"value": 1}'),
        reason(b'{"value": 1, "ts": "now"}', iso),
        reason(payload(value=1, ts=ARRIVAL_S + 1e6)),
        reason(payload(value=1, ts=ARRIVAL_S - 1e7)),
        reason(payload(value=1, ts=ARRIVAL_S), quality),
        reason(payload(value="  ", ts=ARRIVAL_S), PayloadFormat(labels=True)),
    }
    assert seen == set(REJECT_REASONS)
    assert len(REJECT_REASONS) == len(set(REJECT_REASONS))
    assert all(r.isidentifier() and r == r.lower() for r in REJECT_REASONS)


def test_details_are_short_for_huge_inputs() -> None:
    fmt = PayloadFormat(max_payload_bytes=100_000, time_format="iso8601")
    rejected = decode(payload(value=1, ts="9" * 50_000), ARRIVAL_S, fmt)
    assert isinstance(rejected, Rejected) and len(rejected.detail) < 200
    rejected = decode(
        b"z" * 50_000, ARRIVAL_S, PayloadFormat(kind="number", max_payload_bytes=10**5)
    )
    assert isinstance(rejected, Rejected) and len(rejected.detail) < 200


# --- caller errors ------------------------------------------------------------------------


def test_wrong_argument_types_raise() -> None:
    with pytest.raises(TypeError, match="payload must be bytes"):
        decode("21.5", ARRIVAL_S, NUMBER_FMT)  # type: ignore[arg-type]
    with pytest.raises(TypeError):
        decode(b"21.5", "now", NUMBER_FMT)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="arrival_s must be finite"):
        decode(b"21.5", math.nan, NUMBER_FMT)


# --- configuration validation -------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"kind": "xml"}, r"kind must be one of .*got 'xml'"),
        ({"time_format": "epoch_us"}, r"time_format must be one of .*got 'epoch_us'"),
        ({"value_field": ""}, r"value_field must be a dotted path .*got ''"),
        ({"value_field": "data..temp"}, r"value_field must be a dotted path .*'data..temp'"),
        ({"time_field": ".ts"}, r"time_field must be a dotted path .*got '.ts'"),
        ({"quality_field": "q."}, r"quality_field must be a dotted path .*got 'q.'"),
        ({"value_field": 3}, r"value_field must be a dotted path .*got 3"),
        ({"time_field": "value"}, r"value_field and time_field must differ, both are 'value'"),
        ({"quality_field": "ts"}, r"time_field and quality_field must differ"),
        ({"kind": "number", "quality_field": "q"}, r"quality_field must be None for kind='number'"),
        ({"quality_field": "q", "good_quality": frozenset()}, r"good_quality must list at least"),
        ({"good_quality": {"good"}}, r"good_quality must be a frozenset .*got \{'good'\}"),
        ({"good_quality": frozenset({1.5})}, r"good_quality entries must be .*got 1.5"),
        ({"scale": 0.0}, r"scale must be non-zero, got 0.0"),
        ({"scale": math.nan}, r"scale must be a finite number, got nan"),
        ({"offset": math.inf}, r"offset must be a finite number, got inf"),
        ({"offset": "1"}, r"offset must be a finite number, got '1'"),
        ({"scale": True}, r"scale must be a finite number, got True"),
        ({"max_payload_bytes": 0}, r"max_payload_bytes must be an integer in \[1, .*got 0"),
        ({"max_payload_bytes": 2**28}, r"max_payload_bytes must be an integer .*got 268435456"),
        ({"max_payload_bytes": 4096.0}, r"max_payload_bytes must be an integer .*got 4096.0"),
        ({"max_future_s": -1.0}, r"max_future_s must be a number >= 0 .*got -1.0"),
        ({"max_future_s": math.nan}, r"max_future_s must be a number >= 0 .*got nan"),
        ({"max_age_s": 0}, r"max_age_s must be a number > 0 .*got 0"),
        ({"max_age_s": None}, r"max_age_s must be a number > 0 .*got None"),
    ],
)
def test_config_validation(kwargs: dict[str, object], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        PayloadFormat(**kwargs)  # type: ignore[arg-type]


def test_format_is_frozen_and_comparable() -> None:
    fmt = PayloadFormat(value_field="data.temp")
    with pytest.raises(AttributeError):
        fmt.scale = 2.0  # type: ignore[misc]
    assert fmt == PayloadFormat(value_field="data.temp")
    assert "_value_path" not in repr(fmt)


def test_labels_for_a_mode_signal() -> None:
    labels = PayloadFormat(labels=True)
    sample = decode(payload(value=" occupied ", ts=ARRIVAL_S), ARRIVAL_S, labels)
    assert isinstance(sample, Sample) and sample.value == "occupied"
    # numbers stay numbers (the aligner turns 2.0 into the label "2")
    sample = decode(payload(value=2, ts=ARRIVAL_S), ARRIVAL_S, labels)
    assert isinstance(sample, Sample) and sample.value == 2.0
    bare = PayloadFormat(kind="number", labels=True)
    sample = decode(b"economiser\n", ARRIVAL_S, bare)
    assert isinstance(sample, Sample) and sample.value == "economiser"
    assert reason(payload(value="x" * 65, ts=ARRIVAL_S), labels) == "bad_label"
    assert reason(payload(value="a\tb", ts=ARRIVAL_S), labels) == "bad_label"
    assert reason(payload(value=True, ts=ARRIVAL_S), labels) == "bad_value"
    # without labels=True text stays refused
    assert reason(payload(value="occupied", ts=ARRIVAL_S)) == "bad_value"
