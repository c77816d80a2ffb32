"""Simulated loops: the step-at-a-time runs reproduce the whole-array ones.

The whole-array :meth:`Loop.simulate` is the zero-order-hold recursion of
K. J. Åström and B. Wittenmark, *Computer-Controlled Systems*, 3rd ed.,
1997, section 2.3 (a = exp(-h / T)); its first-order step response is
checked against that closed form here, and :class:`LoopRun` must give the
same numbers one sample at a time.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from arxwatch.daemon.simulate import (
    REFERENCE_LOOPS,
    DailyLoad,
    Fault,
    Loop,
    LoopRun,
    OperationRun,
    daily_operation,
)

TS = 60.0
FAULT_SETS = {
    "none": (),
    "gain loss, ramped": (Fault("gain_loss", 3000.0, magnitude=0.5, ramp_s=1200.0),),
    "stuck actuator": (Fault("stuck_actuator", 2400.0),),
    "bias and noise": (
        Fault("sensor_bias", 1800.0, magnitude=1.0, ramp_s=600.0),
        Fault("noise_increase", 600.0, magnitude=2.0),
    ),
    "slow response and offset": (
        Fault("slow_response", 1200.0, magnitude=1.0),
        Fault("offset", 4000.0, magnitude=-0.5),
    ),
    "longer delay, abrupt then ramped": (
        Fault("longer_delay", 3000.0, magnitude=60.0),
        Fault("longer_delay", 6000.0, magnitude=180.0, ramp_s=1800.0),
    ),
}


def _stepped(loop: Loop, u: np.ndarray, faults: tuple[Fault, ...], seed: int) -> np.ndarray:
    run = LoopRun(loop, faults, seed=seed)
    return np.array([run.step(k * loop.sample_period_s, float(v)) for k, v in enumerate(u)])


@pytest.mark.parametrize("name", sorted(REFERENCE_LOOPS))
@pytest.mark.parametrize("faults", sorted(FAULT_SETS))
def test_loop_run_equals_the_whole_array_simulation(name: str, faults: str) -> None:
    loop = REFERENCE_LOOPS[name]
    u = daily_operation(200, TS, seed=3)
    # One generator draw per step gives the same sequence as one draw of N.
    got = _stepped(loop, u, FAULT_SETS[faults], seed=5)
    want = loop.simulate(u, FAULT_SETS[faults], seed=5)
    np.testing.assert_array_equal(got, want)


def test_loop_run_without_noise_equals_the_simulation_too() -> None:
    loop = Loop(-0.1, 300.0, 120.0, TS, offset=24.0, noise_std=0.0, second_time_constant_s=90.0)
    u = daily_operation(150, TS, seed=8)
    faults = FAULT_SETS["gain loss, ramped"]
    np.testing.assert_array_equal(_stepped(loop, u, faults, 0), loop.simulate(u, faults))


def test_first_order_step_follows_the_zero_order_hold_closed_form() -> None:
    # Åström & Wittenmark 1997, section 2.3: after a step of size s at k = 0
    # (dead time d samples), y(k) = y0 + K s (1 - a^(k - d + 1)) for k >= d,
    # with a = exp(-h / T) (the recursion here uses the input of the same step).
    loop = Loop(2.0, 300.0, 120.0, TS, offset=1.0, noise_std=0.0)
    run = LoopRun(loop)
    y0 = run.step(-TS, 0.0)
    ys = [run.step(k * TS, 10.0) for k in range(12)]
    a = math.exp(-TS / 300.0)
    d = loop.delay_samples
    for k, y in enumerate(ys):
        want = y0 if k < d else y0 + 2.0 * 10.0 * (1.0 - a ** (k - d + 1))
        assert y == pytest.approx(want, abs=1e-12)


def test_stuck_actuator_freezes_the_command_of_its_first_step() -> None:
    loop = Loop(1.0, 60.0, 0.0, TS, noise_std=0.0)
    run = LoopRun(loop, (Fault("stuck_actuator", 120.0),))
    outputs = [run.step(k * TS, float(10 * k)) for k in range(8)]
    # From t = 120 s the plant sees 20 % whatever the command: it settles there.
    assert outputs[-1] == pytest.approx(20.0, abs=0.5)
    assert outputs[1] < outputs[2]


def test_longer_delay_shifts_the_response_by_whole_samples() -> None:
    # The same step as the closed-form test above, answered one sample later
    # once a 60 s longer_delay fault is in from the start.
    loop = Loop(2.0, 300.0, 120.0, TS, offset=1.0, noise_std=0.0)
    plain, late = LoopRun(loop), LoopRun(loop, (Fault("longer_delay", 0.0, magnitude=60.0),))
    for run in (plain, late):
        run.step(-TS, 0.0)
    ys = [plain.step(k * TS, 10.0) for k in range(10)]
    later = [late.step(k * TS, 10.0) for k in range(10)]
    assert later[1:] == ys[:-1]
    assert later[2] == later[0]  # d + 1 = 3 samples without an answer


def test_longer_delay_refuses_a_negative_magnitude() -> None:
    with pytest.raises(ValueError, match="longer_delay magnitude is seconds >= 0"):
        Fault("longer_delay", 0.0, magnitude=-60.0)


def test_operation_run_equals_daily_operation_on_the_first_day() -> None:
    n = 1440
    want = daily_operation(n, TS, seed=4)
    run = OperationRun(DailyLoad(), seed=4)
    got = np.array([run.step(k * TS) for k in range(n)])
    np.testing.assert_allclose(got, want, rtol=0.0, atol=1e-9)


def test_operation_run_follows_the_hour_of_absolute_time() -> None:
    load = DailyLoad(mean=50.0, swing=30.0, peak_hour=7.0, step_std=0.0)
    run = OperationRun(load, seed=0)
    day = 1_796_083_200.0  # midnight UTC, 2026-12-01
    assert run.step(day + 7 * 3600.0) == pytest.approx(80.0)
    assert run.step(day + 19 * 3600.0) == pytest.approx(20.0)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [({"memory": 1.0}, "memory must be in"), ({"step_std": -1.0}, "step_std must be >= 0")],
)
def test_daily_load_refuses_bad_settings(kwargs: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        DailyLoad(**kwargs)


def test_fault_level_matches_its_profile() -> None:
    fault = Fault("sensor_bias", 100.0, magnitude=1.0, ramp_s=50.0)
    times = np.array([0.0, 100.0, 110.0, 150.0, 400.0])
    assert [fault.level(float(t)) for t in times] == fault.profile(times).tolist()
