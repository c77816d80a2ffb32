"""Block Ljung–Box whiteness test: schedule, running sums, state, errors."""

import json
from typing import Any

import numpy as np
import pytest
from scipy.stats import chi2

from arxwatch.estimators.detect import Whiteness, WhitenessConfig, ljung_box
from arxwatch.estimators.errors import DimensionError


def _stream(seed: int, n: int = 3000, change_at: int = 1500) -> list[float]:
    rng = np.random.default_rng(seed)
    e = rng.standard_normal(n)
    z = e.copy()
    for k in range(change_at, n):  # an unmodelled AR(1) mode appears
        z[k] = 0.6 * z[k - 1] + 0.8 * e[k]
    return [float(v) for v in z]


def test_one_evaluation_at_the_end_of_each_block() -> None:
    det = Whiteness(WhitenessConfig(window=50, lags=5))
    done = [k for k in range(160) if det.update(float(np.sin(k))) is not None]
    assert done == [49, 99, 149]


def test_each_block_equals_the_batch_statistic_of_that_block() -> None:
    # The running sums must give the batch Ljung-Box Q of each block (rounding only).
    z = _stream(1, n=400)
    det = Whiteness(WhitenessConfig(window=100, lags=4))
    evs = {k: ev for k, v in enumerate(z) if (ev := det.update(v)) is not None}
    assert sorted(evs) == [99, 199, 299, 399]
    for k, ev in evs.items():
        q = ljung_box(np.array(z[k - 99 : k + 1]), 4)
        assert ev.statistic == pytest.approx(q, rel=1e-9)
        assert ev.values["p_value"] == pytest.approx(chi2.sf(q, 4), rel=1e-6)
        assert ev.threshold == pytest.approx(chi2.ppf(0.999, 4), rel=1e-12)


def test_pinned_first_alarm_after_ar_mode_appears_at_1500() -> None:
    det = Whiteness()
    evs = [(k, ev) for k, v in enumerate(_stream(11)) if (ev := det.update(v)) is not None]
    alarms = [k for k, ev in evs if ev.alarm]
    # Blocks of 240 end at 239, 479, ...: the first one wholly after the
    # change ends at 1679; the one straddling it (1440..1679) may already alarm.
    assert alarms[0] == 1679
    assert not any(ev.alarm for k, ev in evs if k < 1500)
    assert evs[-1][1].values["max_abs_autocorrelation"] > 0.4


def test_constant_block_has_zero_q() -> None:
    det = Whiteness(WhitenessConfig(window=20, lags=3))
    ev = None
    for _ in range(20):
        ev = det.update(0.5)
    assert ev is not None and ev.statistic == 0.0 and not ev.alarm


def test_json_state_round_trip_continues_identically() -> None:
    z = _stream(3, n=900)
    config = WhitenessConfig(window=120, lags=6)
    det = Whiteness(config)
    for v in z[:333]:
        det.update(v)
    twin = det.clone()
    twin.load_state(json.loads(json.dumps(det.to_state())))
    assert [det.update(v) for v in z[333:]] == [twin.update(v) for v in z[333:]]


def test_clone_is_untrained_and_reset_forgets() -> None:
    det = Whiteness(WhitenessConfig(window=30, lags=2))
    for v in _stream(4, n=40):
        det.update(v)
    twin = det.clone()
    assert twin.config == det.config and twin.to_state()["count"] == 0
    det.reset()
    assert det.to_state() == twin.to_state()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"lags": 0}, r"WhitenessConfig\.lags must be an integer >= 1, got 0"),
        ({"window": 10, "lags": 10}, r"WhitenessConfig\.window must be an integer > lags \(10\)"),
        ({"window": 2.0}, r"WhitenessConfig\.window must be an integer > lags \(10\), got 2\.0"),
        ({"alpha": 0.0}, r"WhitenessConfig\.alpha must be a number strictly between 0 and 1"),
    ],
)
def test_bad_settings_are_refused(kwargs: dict[str, Any], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        WhitenessConfig(**kwargs)


def test_bad_input_and_state_are_refused() -> None:
    det = Whiteness(WhitenessConfig(window=20, lags=2))
    with pytest.raises(ValueError, match="z must be finite"):
        det.update(float("nan"))
    good = det.to_state()
    with pytest.raises(ValueError, match="sums has 3 entries, this configuration needs 4"):
        det.load_state({**good, "sums": [0.0] * 3})
    with pytest.raises(ValueError, match="count must be an integer >= 0, got -1"):
        det.load_state({**good, "count": -1})
    with pytest.raises(ValueError, match="count must be below window=20, got 20"):
        det.load_state({**good, "count": 20})
    with pytest.raises(DimensionError, match="more than lags=3 entries"):
        ljung_box([1.0, 2.0, 3.0], 3)
    with pytest.raises(ValueError, match="lags must be an integer >= 1, got 0"):
        ljung_box([1.0, 2.0, 3.0], 0)


def test_a_block_cut_short_by_its_period_is_tested_with_its_own_n() -> None:
    # Periods of 50 samples; samples 10..29 of the first period are missing.
    config = WhitenessConfig(window=50, lags=3)
    det = Whiteness(config)
    z = _stream(5, n=120)
    kept = [k for k in range(120) if not 10 <= k < 30]
    ended = {}
    for k in kept:
        ev = det.enter_period(k // 50)
        if ev is not None:
            ended[k] = ev
        ev = det.update(z[k])
        if ev is not None:
            ended[k] = ev
    # the first block (30 samples) ends at the first sample of the next
    # period; the second, complete, at its 50th sample, as without a clock
    assert sorted(ended) == [50, 99]
    first = ended[50]
    block = np.array([z[k] for k in kept if k < 50])
    assert first.values["samples"] == 30.0 and first.values["window"] == 50.0
    assert first.statistic == pytest.approx(ljung_box(block, 3), rel=1e-9)
    assert ended[99].values["samples"] == 50.0
    assert ended[99].statistic == pytest.approx(ljung_box(np.array(z[50:100]), 3), rel=1e-9)


def test_a_block_shorter_than_half_the_window_is_dropped() -> None:
    config = WhitenessConfig(window=50, lags=3)
    assert config.shortest_block == 25
    assert WhitenessConfig(window=12, lags=10).shortest_block == 11  # Q needs n > L
    det = Whiteness(config)
    assert det.enter_period(7) is None
    for v in _stream(6, n=24):
        assert det.update(v) is None
    assert det.enter_period(7) is None  # same period: nothing ends
    assert det.to_state()["count"] == 24
    assert det.enter_period(8) is None  # 24 < 25: dropped, untested
    assert det.to_state()["count"] == 0 and det.to_state()["period"] == 8
    for v in _stream(7, n=25):
        det.update(v)
    ev = det.enter_period(9)
    assert ev is not None and ev.values["samples"] == 25.0


def test_the_period_survives_a_state_round_trip_and_bad_periods_are_refused() -> None:
    det = Whiteness(WhitenessConfig(window=20, lags=2))
    det.enter_period(3)
    for v in _stream(8, n=15):
        det.update(v)
    twin = det.clone()
    twin.load_state(json.loads(json.dumps(det.to_state())))
    assert twin.enter_period(3) is None and twin.to_state() == det.to_state()
    tested = det.enter_period(4)
    assert tested is not None and twin.enter_period(4) == tested
    with pytest.raises(ValueError, match="period must be null or an integer, got 'x'"):
        det.load_state({**det.to_state(), "period": "x"})
