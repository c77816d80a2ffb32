"""Data quality of one signal: stale, stuck, out of range, gaps; state and errors."""

import json
import math
from typing import Any

import numpy as np
import pytest

from arxwatch.estimators.detect import Evidence, QualityConfig, SignalQuality


def _feed(q: SignalQuality, times: list[float], values: list[float]) -> list[list[Evidence]]:
    return [q.update(t, v) for t, v in zip(times, values, strict=True)]


def test_three_evidence_in_fixed_order_with_family() -> None:
    q = SignalQuality("zone_temp")
    evs = q.update(0.0, 21.0)
    assert [ev.detector for ev in evs] == ["out_of_range", "stuck", "gap"]
    assert all(ev.family == "data_quality" and ev.signal == "zone_temp" for ev in evs)
    assert not any(ev.alarm for ev in evs)


def test_out_of_range_sides() -> None:
    q = SignalQuality("rh", QualityConfig(minimum=0.0, maximum=100.0))
    low, high, ok = (q.update(t, v)[0] for t, v in ((0.0, -1.0), (60.0, 101.0), (120.0, 50.0)))
    assert (low.alarm, low.detail, low.threshold) == (True, "low", 0.0)
    assert (high.alarm, high.detail, high.threshold) == (True, "high", 100.0)
    assert not ok.alarm and ok.values == {"value": 50.0, "minimum": 0.0, "maximum": 100.0}


def test_gaps_are_counted_and_summed() -> None:
    q = SignalQuality("flow", QualityConfig(expected_period_s=10.0, gap_factor=3.0))
    gaps = [evs[2] for evs in _feed(q, [0.0, 10.0, 40.0, 41.0, 100.0], [1.0] * 5)]
    assert [g.alarm for g in gaps] == [False, False, False, False, True]
    assert gaps[2].statistic == 3.0  # exactly gap_factor periods: not a gap
    assert gaps[-1].values == {"interval_s": 59.0, "gap_count": 1.0, "gap_total_s": 59.0}


def test_stuck_needs_a_moving_signal_and_a_full_window() -> None:
    config = QualityConfig(stuck_window_s=300.0, stuck_epsilon=0.05)
    constant = SignalQuality("setpoint", config)
    flags = [evs[1].alarm for evs in _feed(constant, [60.0 * k for k in range(20)], [21.0] * 20)]
    assert not any(flags)  # constant by nature: never stuck

    rng = np.random.default_rng(4)
    moving = [float(v) for v in 20.0 + rng.standard_normal(30)] + [20.5] * 10
    moving[30:] = [20.5 + 0.01 * (k % 2) for k in range(10)]  # within epsilon
    q = SignalQuality("supply_temp", config)
    stuck = [evs[1] for evs in _feed(q, [60.0 * k for k in range(40)], moving)]
    first = next(k for k, ev in enumerate(stuck) if ev.alarm)
    assert first == 35 and stuck[first].statistic == 300.0
    assert stuck[first].values["range"] == pytest.approx(0.01)


def test_stale_check_counts_from_last_sample_or_first_check() -> None:
    q = SignalQuality("damper_pos", QualityConfig(stale_after_s=120.0))
    assert not q.check(1000.0).alarm  # no sample yet: age counts from here
    assert q.check(1121.0).alarm and q.check(1121.0).values == {"age_s": 121.0}
    q.update(1200.0, 30.0)
    ev = q.check(1300.0)
    assert (ev.statistic, ev.alarm, ev.detail) == (100.0, False, "stale")
    assert ev.values["last_sample_s"] == 1200.0
    assert q.check(1100.0).statistic == 0.0  # a clock behind the samples: age 0


def test_json_state_round_trip_continues_identically() -> None:
    rng = np.random.default_rng(5)
    times = np.cumsum(rng.exponential(60.0, 200)).tolist()
    values = np.round(rng.standard_normal(200), 1).tolist()
    q = SignalQuality("oat", QualityConfig(stuck_window_s=200.0, stuck_epsilon=0.1, maximum=1.5))
    _feed(q, times[:100], values[:100])
    q.check(times[99] + 30.0)
    twin = q.clone()
    twin.load_state(json.loads(json.dumps(q.to_state())))
    assert twin.to_state() == q.to_state()
    assert _feed(q, times[100:], values[100:]) == _feed(twin, times[100:], values[100:])
    assert q.check(times[-1] + 500.0) == twin.check(times[-1] + 500.0)


def test_clone_is_fresh_and_reset_forgets() -> None:
    q = SignalQuality("x")
    _feed(q, [0.0, 500.0], [1.0, 2.0])
    twin = q.clone()
    assert twin.signal == "x" and twin.config == q.config
    assert twin.to_state()["last_time_s"] is None
    q.reset()
    assert q.to_state() == twin.to_state()


def test_bad_samples_are_refused_without_change() -> None:
    q = SignalQuality("x")
    q.update(100.0, 1.0)
    before = q.to_state()
    with pytest.raises(ValueError, match="lies before the previous sample at 100.0"):
        q.update(99.0, 1.0)
    with pytest.raises(ValueError, match="time_s and value must be finite"):
        q.update(200.0, math.nan)
    with pytest.raises(ValueError, match="now_s must be finite"):
        q.check(math.inf)
    assert q.to_state() == before
    with pytest.raises(ValueError, match="signal must be a non-empty string"):
        SignalQuality("")


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"expected_period_s": 0.0}, r"QualityConfig\.expected_period_s must be a finite number"),
        ({"expected_period_s": math.inf}, r"expected_period_s must be a finite number"),
        ({"stale_after_s": -1.0}, r"stale_after_s must be a number of seconds > 0 or inf"),
        ({"gap_factor": 1.0}, r"gap_factor must be a finite number > 1, got 1\.0"),
        ({"stuck_epsilon": -0.1}, r"stuck_epsilon must be a finite number >= 0"),
        ({"minimum": math.nan}, r"QualityConfig\.minimum must be a number \(may be infinite\)"),
        ({"minimum": 5.0, "maximum": 5.0}, r"maximum must be greater than minimum \(5\.0\)"),
    ],
)
def test_bad_settings_are_refused(kwargs: dict[str, Any], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        QualityConfig(**kwargs)


def test_bad_state_is_refused() -> None:
    q = SignalQuality("x")
    state = q.to_state()
    state["has_moved"] = 1
    with pytest.raises(ValueError, match="has_moved must be a bool, got 1"):
        q.load_state(state)
    state = q.to_state()
    state["run_min"] = 2.0
    with pytest.raises(ValueError, match=r"run_max=0\.0 < run_min=2\.0"):
        q.load_state(state)
    state = q.to_state()
    state["gap_total_s"] = "5"
    with pytest.raises(ValueError, match="gap_total_s must be a finite number >= 0.0"):
        q.load_state(state)
