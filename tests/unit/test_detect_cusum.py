"""Tabular CUSUM on normalised innovations: recursion, restart/hold, state, errors."""

import json
import math
from typing import Any

import numpy as np
import pytest

from arxwatch.estimators.detect import Cusum, CusumConfig


def _stream(seed: int, n: int = 1000, shift_at: int = 500, shift: float = 1.0) -> list[float]:
    rng = np.random.default_rng(seed)
    z = rng.standard_normal(n)
    z[shift_at:] += shift
    return [float(v) for v in z]


def test_recursion_by_hand() -> None:
    det = Cusum(CusumConfig(k=0.5, h=5.0))
    ev = det.update(1.5)  # C+ = 1, C- = 0
    assert (ev.statistic, ev.detail, ev.alarm) == (1.0, "high", False)
    assert ev.values["shift_sigma"] == 1.5 and ev.values["samples_since_zero"] == 1.0
    ev = det.update(-3.0)  # C+ = max(0, 1 - 3.5) = 0, C- = 2.5
    assert (ev.statistic, ev.detail) == (2.5, "low")
    assert ev.values["c_high"] == 0.0 and ev.values["shift_sigma"] == -3.0
    assert ev.detector == "innovation_mean" and ev.family == "behaviour"
    assert ev.signal == "innovation" and ev.threshold == 5.0


def test_pinned_alarm_index_for_one_sigma_shift_at_500() -> None:
    det = Cusum()
    alarms = [k for k, z in enumerate(_stream(1)) if det.update(z).alarm]
    assert alarms[:3] == [512, 521, 526]


def test_shift_estimate_at_signal_is_near_the_true_shift() -> None:
    det = Cusum()
    estimates = [
        ev.values["shift_sigma"]
        for z in _stream(3, n=20000, shift_at=0)
        if (ev := det.update(z)).alarm
    ]
    assert len(estimates) > 1000
    # Montgomery's k + C/N is biased upwards at a signal; it still lands near 1 sigma.
    assert 0.9 < float(np.mean(estimates)) < 1.6


def test_restart_clears_both_sides_after_alarm() -> None:
    det = Cusum(CusumConfig(h=2.0))
    assert not det.update(2.0).alarm
    assert det.update(2.0).alarm  # C+ = 3
    assert det.to_state()["c_high"] == 0.0
    assert det.update(0.0).statistic == 0.0


def test_hold_keeps_accumulating_and_alarms_until_the_side_drains() -> None:
    det = Cusum(CusumConfig(h=2.0, after_alarm="hold"))
    flags = [det.update(z).alarm for z in (2.0, 2.0, 2.0, -1.0, -1.0, -1.0)]
    # C+ = 1.5, 3, 4.5, 3, 1.5, 0
    assert flags == [False, True, True, True, False, False]


def test_json_state_round_trip_continues_identically() -> None:
    z = _stream(5)
    det = Cusum()
    for v in z[:520]:
        det.update(v)
    twin = Cusum(det.config)
    twin.load_state(json.loads(json.dumps(det.to_state())))
    assert twin.to_state() == det.to_state()
    assert [det.update(v) for v in z[520:]] == [twin.update(v) for v in z[520:]]


def test_clone_is_untrained_and_reset_forgets() -> None:
    det = Cusum(CusumConfig(k=0.25, h=4.0))
    for v in (1.0, 1.0, 1.0):
        det.update(v)
    twin = det.clone()
    assert twin.config == det.config
    assert twin.to_state() == Cusum().to_state() != det.to_state()
    det.reset()
    assert det.to_state() == twin.to_state()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"k": -0.1}, r"CusumConfig\.k must be a finite number >= 0, got -0\.1"),
        ({"h": 0.0}, r"CusumConfig\.h must be a finite number > 0, got 0\.0"),
        ({"h": float("inf")}, r"CusumConfig\.h must be a finite number > 0"),
        ({"after_alarm": "latch"}, r"after_alarm must be 'restart' or 'hold', got 'latch'"),
        ({"noise_lam": 1.0}, r"noise_lam must be a finite number in \[0, 1\), got 1\.0"),
        ({"noise_lam": -0.01}, r"noise_lam must be a finite number in \[0, 1\)"),
    ],
)
def test_bad_settings_are_refused(kwargs: dict[str, Any], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        CusumConfig(**kwargs)


def test_non_finite_innovation_is_refused_without_change() -> None:
    det = Cusum()
    det.update(1.0)
    before = det.to_state()
    with pytest.raises(ValueError, match="z must be finite, got nan"):
        det.update(float("nan"))
    assert det.to_state() == before


@pytest.mark.parametrize(
    ("state", "match"),
    [
        ([], "state must be a dict"),
        ({"detector": "innovation_variance", "s": 1.0}, "saved by detector 'innovation_variance'"),
        ({"detector": "innovation_mean", "c_high": 0.0}, r"missing keys \['c_low', 'n_high'"),
        (
            {"detector": "innovation_mean", "c_high": -1.0, "c_low": 0.0, "n_high": 0, "n_low": 0},
            "c_high must be a finite number >= 0.0, got -1.0",
        ),
        (
            {"detector": "innovation_mean", "c_high": 1.0, "c_low": 0.0, "n_high": 0, "n_low": 0},
            "c_high=1.0 and n_high=0 disagree",
        ),
        (
            {"detector": "innovation_mean", "c_high": 0.0, "c_low": 0.0, "n_high": 1.5, "n_low": 0},
            "n_high must be an integer >= 0, got 1.5",
        ),
    ],
)
def test_bad_state_is_refused(state: object, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        Cusum().load_state(state)  # type: ignore[arg-type]


def test_noise_scaling_by_hand() -> None:
    det = Cusum(CusumConfig(k=0.5, h=5.0, noise_lam=0.5))
    ev = det.update(1.0)  # no last input: the level stays 1, z is taken as it is
    assert ev.values["noise_scale"] == 1.0 and ev.values["c_high"] == 0.5
    ev = det.update(-3.0)  # v = 0.5 * 1 + 0.5 * (16 / 2) = 4.5: z / sqrt(4.5)
    assert det.to_state()["noise"] == 4.5
    assert ev.values["noise_scale"] == math.sqrt(4.5)
    assert ev.values["c_low"] == pytest.approx(3.0 / math.sqrt(4.5) - 0.5, abs=1e-15)
    ev = det.update(-3.0)  # no difference: v = 2.25, still above 1
    assert det.to_state()["noise"] == 2.25 and ev.values["noise_scale"] == 1.5


def test_noise_scaling_never_narrows_the_scheme() -> None:
    # a level below 1 (a quieter stretch) leaves z as it is
    plain, scaled = Cusum(), Cusum(CusumConfig(noise_lam=0.3))
    for z in (0.1, 0.2, 0.1, 0.15, 0.1):
        assert plain.update(z) == (ev := scaled.update(z)) or ev.values["noise_scale"] == 1.0
    assert scaled.to_state()["noise"] < 1.0
    assert [plain.update(z).statistic for z in (0.9, 1.2)] == [
        scaled.update(z).statistic for z in (0.9, 1.2)
    ]


def test_off_by_default_and_zero_lambda_is_the_plain_scheme() -> None:
    z = _stream(11)
    plain, zero = Cusum(), Cusum(CusumConfig(noise_lam=0.0))
    assert [plain.update(v) for v in z] == [zero.update(v) for v in z]
    assert plain.to_state()["noise"] == 1.0


def test_a_noisier_stream_does_not_signal_a_mean_shift_once_scaled() -> None:
    rng = np.random.default_rng(12)
    z = [float(v) for v in 2.0 * rng.standard_normal(5000)]  # twice the calibrated sigma
    plain, scaled = Cusum(), Cusum(CusumConfig(noise_lam=0.02))
    assert sum(plain.update(v).alarm for v in z) > 300  # one every 14 samples or so
    # a calibrated stream signals about 5000 / 465 = 11 times (Montgomery's
    # in-control ARL for h = 5, see tests/reference); allow 2.5x: no source
    assert sum(scaled.update(v).alarm for v in z) < 28


def test_restart_after_an_alarm_keeps_the_noise_level() -> None:
    det = Cusum(CusumConfig(h=2.0, noise_lam=0.1))
    for z in (0.0, 3.0, 3.0):
        det.update(z)
    state = det.to_state()
    assert state["c_high"] == 0.0 and state["noise"] > 1.0 and state["previous"] == 3.0
    det.reset()
    assert det.to_state() == Cusum(det.config).to_state()


def test_a_state_saved_before_the_noise_scaling_still_loads() -> None:
    old = {"detector": "innovation_mean", "c_high": 1.5, "c_low": 0.0, "n_high": 2, "n_low": 0}
    det = Cusum(CusumConfig(noise_lam=0.02))
    det.load_state(old)
    assert det.to_state() == {**old, "previous": None, "noise": 1.0}
    with pytest.raises(ValueError, match="noise must be a finite number >= 0.0"):
        det.load_state({**old, "previous": None, "noise": -1.0})
