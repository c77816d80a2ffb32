"""EWMV innovation-variance detector: recursion, limits, both sides, state, errors."""

import json
import math
from typing import Any

import numpy as np
import pytest
from scipy.stats import chi2

from arxwatch.estimators.detect import VarianceChange, VarianceConfig


def _stream(seed: int, n: int = 2000, change_at: int = 1000, scale: float = 2.0) -> list[float]:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal(n)
    z[change_at:] *= scale
    return [float(v) for v in z]


def test_recursion_and_values() -> None:
    det = VarianceChange(VarianceConfig(lam=0.1))
    ev = det.update(3.0)
    assert ev.statistic == pytest.approx(0.9 + 0.1 * 9.0)
    assert ev.values["sigma_ratio"] == pytest.approx(math.sqrt(1.8))
    assert ev.detector == "innovation_variance" and ev.detail == "high"
    assert det.variance_ratio == ev.statistic


def test_limits_follow_the_scaled_chi_square() -> None:
    config = VarianceConfig(lam=0.1, alpha=0.01)
    nu = (2.0 - 0.1) / 0.1
    assert config.dof == pytest.approx(nu)
    assert config.upper_limit == pytest.approx(chi2.ppf(0.99, nu) / nu, rel=1e-12)
    assert config.lower_limit == pytest.approx(chi2.ppf(0.01, nu) / nu, rel=1e-12)


def test_pinned_alarm_index_for_doubled_sigma_at_1000() -> None:
    det = VarianceChange()
    alarms = [k for k, z in enumerate(_stream(7)) if det.update(z).alarm]
    assert alarms[0] == 1005
    last = det.update(2.0)
    assert 1.6 < last.values["sigma_ratio"] < 2.4


def test_lower_side_reports_inverse_ratio_and_alarms_on_quiet_innovations() -> None:
    det = VarianceChange(VarianceConfig(lower=True))
    evs = [det.update(z) for z in _stream(8, scale=0.2)]
    first = next(k for k, ev in enumerate(evs) if ev.alarm)
    assert 1000 < first < 1100 and evs[first].detail == "low"
    ev = evs[first]
    assert ev.statistic == pytest.approx(1.0 / ev.values["variance_ratio"])
    assert ev.threshold == pytest.approx(1.0 / ev.values["lower_limit"])
    assert not any(ev.alarm for ev in evs[:1000])


def test_json_state_round_trip_continues_identically() -> None:
    z = _stream(9)
    det = VarianceChange(VarianceConfig(lower=True))
    for v in z[:1003]:
        det.update(v)
    twin = det.clone()
    twin.load_state(json.loads(json.dumps(det.to_state())))
    assert [det.update(v) for v in z[1003:]] == [twin.update(v) for v in z[1003:]]


def test_clone_is_untrained_and_reset_forgets() -> None:
    det = VarianceChange()
    det.update(5.0)
    twin = det.clone()
    assert twin.config == det.config and twin.variance_ratio == 1.0
    det.reset()
    assert det.to_state() == twin.to_state()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"lam": 0.0}, r"VarianceConfig\.lam must be a number in \(0, 1\], got 0\.0"),
        ({"lam": 1.5}, r"VarianceConfig\.lam must be a number in \(0, 1\], got 1\.5"),
        ({"alpha": 1.0}, r"VarianceConfig\.alpha must be a number strictly between 0 and 1"),
        ({"lower": 1}, r"VarianceConfig\.lower must be a bool, got 1"),
    ],
)
def test_bad_settings_are_refused(kwargs: dict[str, Any], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        VarianceConfig(**kwargs)


def test_bad_input_and_state_are_refused() -> None:
    det = VarianceChange()
    with pytest.raises(ValueError, match="z must be finite, got inf"):
        det.update(float("inf"))
    with pytest.raises(ValueError, match="s must be a finite number >= 0.0, got -1"):
        det.load_state({"detector": "innovation_variance", "s": -1})
    with pytest.raises(ValueError, match=r"unknown keys \['t'\]"):
        det.load_state({"detector": "innovation_variance", "s": 1.0, "t": 0})
