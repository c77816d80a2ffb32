"""Alert records: schema, times, readings in physical terms."""

import jsonschema
import pytest

from arxwatch.daemon.alert import CAUTION, SignalNames, build_record, iso_utc, load_schema, reading
from arxwatch.daemon.decide import Transition
from arxwatch.estimators.detect.evidence import Evidence

NAMES = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))


def band(feature: str, base: float, cur: float) -> Evidence:
    change = (cur - base) / abs(base)
    return Evidence(
        "physical_band",
        "behaviour",
        abs(change),
        0.25,
        abs(change) >= 0.25,
        feature,
        {"baseline": base, "current": cur, "change": change},
        "high" if change >= 0 else "low",
    )


def test_iso_times_are_utc_with_z() -> None:
    # 1,700,000,000 s after the epoch is 2023-11-14T22:13:20Z (date(1) -u -d @1700000000).
    assert iso_utc(1_700_000_000.0) == "2023-11-14T22:13:20.000Z"


def test_gain_loss_reads_as_coil_or_valve_problem() -> None:
    text = reading(band("gain_1", -0.11, -0.068), NAMES, 0.03)
    assert text.startswith("cooling valve gain on supply-air temperature is 38 % below baseline")
    assert "coil fouling" in text and "verify on site" in text


def test_dead_time_reads_as_later_or_sooner_and_undefined_names_the_actuator() -> None:
    later = reading(band("dead_time_1_s", 120.0, 200.0), NAMES, 0.03)
    assert later.startswith(
        "supply-air temperature starts to answer cooling valve 67 % later than at commissioning"
    )
    assert "(200 s vs 120 s dead time)" in later and "verify on site" in later
    assert "sooner" in reading(band("dead_time_1_s", 120.0, 60.0), NAMES, 0.03)
    gone = Evidence(
        "physical_band",
        "behaviour",
        float("inf"),
        0.5,
        True,
        "dead_time_1_s",
        {"baseline": 120.0},
        "undefined",
    )
    text = reading(gone, NAMES, 0.03)
    assert text.startswith("the dead time of cooling valve can no longer be read")
    assert "no longer moves supply-air temperature measurably" in text


def test_readings_per_detector() -> None:
    cusum = Evidence(
        "innovation_mean",
        "behaviour",
        9.5,
        9.0,
        True,
        "innovation",
        {"shift_sigma": 2.0, "c_high": 9.5, "c_low": 0.0},
    )
    assert "above what the commissioning model predicts" in reading(cusum, NAMES, 0.05)
    assert "0.1 degC" in reading(cusum, NAMES, 0.05)
    noise = Evidence(
        "innovation_variance",
        "behaviour",
        4.0,
        2.0,
        True,
        "innovation",
        {"sigma_ratio": 2.0},
        "high",
    )
    assert "2.0 times the commissioning level" in reading(noise, NAMES, 0.05)
    slow = reading(band("time_constant_s", 600.0, 1200.0), NAMES, 0.05)
    assert "100 % slower" in slow
    stale = Evidence(
        "stale", "data_quality", 900.0, 300.0, True, "ahu-1/sat", {"age_s": 900.0}, "stale"
    )
    assert reading(stale, NAMES, 0.05).startswith("ahu-1/sat: no sample for 900 s")
    # with the topics' signal names known, the site name comes first
    named = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",), ("sat", "cv"))
    stale = Evidence("stale", "data_quality", 900.0, 300.0, True, "sat", {"age_s": 900.0}, "stale")
    assert reading(stale, named, 0.05).startswith("supply-air temperature (sat): no sample")
    with pytest.raises(ValueError, match="points need one entry for the output and each input"):
        SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",), ("sat",))
    with pytest.raises(ValueError, match="no reading for detector 'mystery'"):
        reading(Evidence("mystery", "behaviour", 1.0, 1.0, True, "x"), NAMES, 0.05)


def test_record_follows_the_published_schema() -> None:
    transition = Transition(
        "physical_band/gain_1",
        "raised",
        "warning",
        1_700_000_060.0,
        1_700_000_000.0,
        band("gain_1", -0.11, -0.068),
    )
    record = build_record(
        "block-c/ahu-c2",
        transition,
        NAMES,
        0.03,
        {"gain_1": -0.11, "time_constant_s": 600.0, "sigma": 0.03},
        {"gain_1": -0.068, "time_constant_s": float("nan"), "sigma": 0.031},
    )
    schema = load_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.validate(record, schema)
    assert record["caution"] == CAUTION and "not a safety function" in CAUTION
    assert "time_constant_s" not in record["current"]  # NaN is left out of JSON
    assert record["id"] == "block-c/ahu-c2/physical_band/gain_1/1700000000"
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate({**record, "state": "maybe"}, schema)
