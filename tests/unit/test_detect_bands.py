"""Physical bands: relative and absolute tolerances, undefined features, state, errors."""

import json
import math
from typing import Any

import pytest

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.detect import BandsConfig, PhysicalBands
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.readout import read_out

ORDER = ArxOrder(na=1, nb=(1,), nk=(2,))
TS = 60.0
# a = -0.8: gain 0.4 / 0.2 = 2, tau = -60 / ln 0.8 = 268.9 s, offset 0.1 / 0.2 = 0.5
BASE = read_out(ORDER, [-0.8, 0.4, 0.1], TS)


def _by_signal(bands: PhysicalBands, theta: list[float]) -> dict[str, Any]:
    return {ev.signal: ev for ev in bands.update(read_out(ORDER, theta, TS))}


def test_features_and_relative_changes() -> None:
    bands = PhysicalBands(BandsConfig(offset_tolerance=0.2))
    bands.set_baseline(BASE)
    assert bands.features == ("gain_1", "time_constant_s", "dead_time_1_s", "offset")
    evs = _by_signal(bands, [-0.8, 0.3, 0.1])  # gain 1.5: -25 %
    gain = evs["gain_1"]
    assert gain.values["baseline"] == pytest.approx(2.0)
    assert gain.values["current"] == pytest.approx(1.5)
    assert gain.values["change"] == pytest.approx(-0.25)
    assert gain.alarm and gain.detail == "low" and gain.threshold == 0.25
    assert not evs["time_constant_s"].alarm and evs["time_constant_s"].values["change"] == 0.0
    # a first-order lag with nk = 2: the two-point reading of its step response is nk * Ts
    assert evs["dead_time_1_s"].values["current"] == pytest.approx(120.0, rel=1e-12)
    assert gain.detector == "physical_band" and gain.family == "behaviour"


def test_time_constant_band() -> None:
    bands = PhysicalBands(BandsConfig(offset_tolerance=1.0))
    bands.set_baseline(BASE)
    a = math.exp(-TS / (1.6 * BASE.time_constant_s))  # tau +60 %
    tau = _by_signal(bands, [-a, 0.4 * (1 - a) / 0.2, 0.1 * (1 - a) / 0.2])["time_constant_s"]
    assert tau.values["change"] == pytest.approx(0.6) and tau.alarm and tau.detail == "high"


def test_offset_band_is_absolute_and_sigma_based_by_default() -> None:
    bands = PhysicalBands()
    with pytest.raises(ValueError, match="output_sigma is needed"):
        bands.set_baseline(BASE)
    bands.set_baseline(BASE, output_sigma=0.1)  # tolerance 3 * 0.1
    offset = _by_signal(bands, [-0.8, 0.4, 0.17])["offset"]  # offset 0.85
    assert offset.threshold == pytest.approx(0.3)
    assert offset.values["change"] == pytest.approx(0.35) and offset.alarm


def test_undefined_live_feature_alarms_and_undefined_baseline_is_not_monitored() -> None:
    bands = PhysicalBands(BandsConfig(offset_tolerance=1.0))
    bands.set_baseline(BASE)
    evs = _by_signal(bands, [-1.0, 0.4, 0.1])  # integrating
    assert evs["gain_1"].alarm and evs["gain_1"].detail == "undefined"
    assert evs["gain_1"].statistic == math.inf and set(evs["gain_1"].values) == {"baseline"}
    no_tau = PhysicalBands(BandsConfig(offset_tolerance=1.0))
    no_tau.set_baseline(read_out(ORDER, [0.5, 0.4, 0.1], TS))  # pole at -0.5
    assert "time_constant_s" not in no_tau.features


def test_json_state_round_trip_gives_identical_evidence() -> None:
    bands = PhysicalBands()
    bands.set_baseline(read_out(ORDER, [0.5, 0.4, 0.1], TS), output_sigma=0.2)
    state = json.loads(json.dumps(bands.to_state(), allow_nan=False))
    twin = bands.clone()
    assert twin.features == ()
    twin.load_state(state)
    reading = read_out(ORDER, [-0.7, 0.5, 0.0], TS)
    assert twin.update(reading) == bands.update(reading)
    assert twin.to_state() == bands.to_state()


def test_reset_and_errors() -> None:
    bands = PhysicalBands(BandsConfig(offset_tolerance=1.0))
    with pytest.raises(RuntimeError, match="no baseline"):
        bands.update(BASE)
    bands.set_baseline(BASE)
    other = read_out(ArxOrder(na=1, nb=(1,), nk=(1,), constant=False), [-0.8, 0.4], TS)
    with pytest.raises(DimensionError, match="offset=False, the baseline 1 inputs and offset=True"):
        bands.update(other)
    with pytest.raises(ValueError, match="output_sigma must be a finite number > 0"):
        bands.set_baseline(BASE, output_sigma=0.0)
    bad = bands.to_state()
    bad["baseline"]["offset_tolerance"] = -1.0
    with pytest.raises(ValueError, match="offset_tolerance must be a finite number > 0"):
        bands.load_state(bad)
    bad["baseline"] = {"gains": []}
    with pytest.raises(ValueError, match="baseline must be null or a dict with keys"):
        bands.load_state(bad)
    bands.reset()
    assert bands.to_state() == PhysicalBands().to_state()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"gain_tolerance": 0.0}, r"BandsConfig\.gain_tolerance must be a finite number > 0"),
        ({"time_constant_tolerance": math.nan}, r"time_constant_tolerance must be a finite"),
        ({"offset_tolerance": -0.5}, r"offset_tolerance must be None or a finite number > 0"),
        ({"offset_sigmas": True}, r"offset_sigmas must be a finite number > 0, got True"),
    ],
)
def test_bad_settings_are_refused(kwargs: dict[str, Any], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        BandsConfig(**kwargs)
