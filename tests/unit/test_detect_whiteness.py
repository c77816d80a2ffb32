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
