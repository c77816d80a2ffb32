"""Decoder fuzzing: garbage never raises; every sample is finite and inside the time window."""

import json
import math
from datetime import UTC, datetime

from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.daemon.decode import REJECT_REASONS, PayloadFormat, Rejected, Sample, decode

ARRIVAL_S = 1_772_366_400.0  # 2026-03-01T12:00:00Z

FORMATS = (
    PayloadFormat(),
    PayloadFormat(time_field=None),
    PayloadFormat(time_format="epoch_ms", max_future_s=0.0, max_age_s=60.0),
    PayloadFormat(time_format="iso8601", quality_field="q", good_quality=frozenset({"good", 0})),
    PayloadFormat(value_field="v.x", time_field="t.s", scale=1e300, offset=-5.0),
    PayloadFormat(kind="number"),
    PayloadFormat(kind="number", scale=-1e-300, max_payload_bytes=6000),
)
formats = st.sampled_from(FORMATS)
arrivals = st.floats(min_value=-1e12, max_value=1e12) | st.just(ARRIVAL_S)

json_leaves = (
    st.none()
    | st.booleans()
    | st.integers()
    | st.integers(min_value=-(10**400), max_value=10**400)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=20)
)
json_values = st.recursive(
    json_leaves,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=5), inner),
    max_leaves=10,
)
window_stamps = st.floats(min_value=ARRIVAL_S - 604_800, max_value=ARRIVAL_S + 300)
stamps = (
    window_stamps
    | st.floats(min_value=ARRIVAL_S - 1e6, max_value=ARRIVAL_S + 1e3)
    | st.floats(min_value=(ARRIVAL_S - 1e6) * 1e3, max_value=(ARRIVAL_S + 1e3) * 1e3)
    | st.datetimes().map(lambda moment: moment.isoformat())
    | window_stamps.map(lambda stamp: datetime.fromtimestamp(stamp, UTC).isoformat())
    | json_values
)
plain_numbers = st.floats(min_value=-1e6, max_value=1e6) | st.integers(-(10**6), 10**6)
numbers = (
    plain_numbers | st.floats(allow_nan=True) | st.integers(min_value=-(10**400), max_value=10**400)
)
qualities = st.sampled_from(["good", "bad", 0, 1, True, None, 0.0])
# Objects shaped like real payloads, so that samples as well as rejections are exercised.
well_formed = st.fixed_dictionaries(
    {
        "value": numbers,
        "ts": stamps,
        "v": st.fixed_dictionaries({"x": numbers}),
        "t": st.fixed_dictionaries({"s": stamps}),
    },
    optional={"q": qualities},
)
ragged = st.fixed_dictionaries(
    {},
    optional={
        "value": json_values,
        "ts": json_values,
        "q": qualities | json_values,
        "v": json_values,
        "t": json_values,
    },
)
shaped = well_formed | ragged


def check(raw: bytes, arrival_s: float, fmt: PayloadFormat) -> None:
    result = decode(raw, arrival_s, fmt)
    if isinstance(result, Rejected):
        assert result.reason in REJECT_REASONS
        assert isinstance(result.detail, str) and result.detail
        return
    assert isinstance(result, Sample)
    assert type(result.value) is float and math.isfinite(result.value)
    assert type(result.time_s) is float and math.isfinite(result.time_s)
    assert arrival_s - fmt.max_age_s <= result.time_s <= arrival_s + fmt.max_future_s
    assert result.arrival_s == arrival_s
    assert isinstance(result.quality_ok, bool)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=5000), arrivals, formats)
def test_arbitrary_bytes(raw: bytes, arrival_s: float, fmt: PayloadFormat) -> None:
    check(raw, arrival_s, fmt)


@settings(max_examples=200, deadline=None)
@given(json_values, arrivals, formats)
def test_arbitrary_json(doc: object, arrival_s: float, fmt: PayloadFormat) -> None:
    check(json.dumps(doc, allow_nan=True).encode(), arrival_s, fmt)


@settings(max_examples=200, deadline=None)
@given(shaped, formats)
def test_payload_shaped_json(doc: dict[str, object], fmt: PayloadFormat) -> None:
    check(json.dumps(doc, allow_nan=True).encode(), ARRIVAL_S, fmt)


@settings(max_examples=200, deadline=None)
@given(st.text(max_size=200), arrivals, formats)
def test_arbitrary_text(text: str, arrival_s: float, fmt: PayloadFormat) -> None:
    check(text.encode(), arrival_s, fmt)


@settings(max_examples=200, deadline=None)
@given(st.floats(allow_nan=True) | st.integers(min_value=-(10**300), max_value=10**300), formats)
def test_number_text_round_trips_when_finite(number: float, fmt: PayloadFormat) -> None:
    result = decode(repr(number).encode(), ARRIVAL_S, PayloadFormat(kind="number"))
    if isinstance(number, float) and not math.isfinite(number):
        assert isinstance(result, Rejected) and result.reason == "not_a_number"
    else:
        assert isinstance(result, Sample) and result.value == float(number)
    check(repr(number).encode(), ARRIVAL_S, fmt)


@settings(max_examples=200, deadline=None)
@given(
    st.floats(allow_nan=False, allow_infinity=False) | st.integers(-(10**300), 10**300),
    window_stamps,
)
def test_valid_payloads_are_accepted_unchanged(value: float, stamp: float) -> None:
    result = decode(json.dumps({"value": value, "ts": stamp}).encode(), ARRIVAL_S, FORMATS[0])
    assert result == Sample(stamp, float(value), ARRIVAL_S, True)
