"""Shared fixtures: a simulated air-handler loop and its accepted baseline."""

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pytest

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.monitor import AssetMonitor, MonitorConfig
from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault, Loop, daily_operation
from arxwatch.estimators.baseline import Baseline, BaselineSet, fit_baseline

SAMPLE_PERIOD_S = 60.0
PER_DAY = int(86400 / SAMPLE_PERIOD_S)
START_S = 1_767_225_600.0  # 2026-01-01T00:00:00Z
LOOP = REFERENCE_LOOPS["first-order+dead-time"]
NAMES = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))

Run = Callable[..., tuple[list[dict], AssetMonitor]]


@dataclass(frozen=True)
class Plant:
    """The simulated loop and its constants, for tests that need the raw data."""

    loop: Loop = LOOP
    names: SignalNames = NAMES
    sample_period_s: float = SAMPLE_PERIOD_S
    per_day: int = PER_DAY
    start_s: float = START_S


@pytest.fixture(scope="session")
def plant() -> Plant:
    """Constants of the simulated test loop."""
    return Plant()


@pytest.fixture(scope="session")
def baseline() -> Baseline:
    """Baseline fitted on two fault-free days of ordinary operation."""
    u = daily_operation(2 * PER_DAY, SAMPLE_PERIOD_S, seed=1)
    y = LOOP.simulate(u, seed=2)
    t = START_S + np.arange(len(u)) * SAMPLE_PERIOD_S
    result = fit_baseline(y, u[:, None], t, sample_period_s=SAMPLE_PERIOD_S)
    assert result.accepted, result.reasons
    assert result.baseline is not None
    return result.baseline


@pytest.fixture(scope="session")
def run_asset(baseline: Baseline) -> Run:
    """Run a monitor over simulated days; return its records and itself."""

    def run(
        days: float,
        faults: tuple[Fault, ...] = (),
        seed: int = 5,
        config: MonitorConfig | None = None,
    ) -> tuple[list[dict], AssetMonitor]:
        monitor = AssetMonitor("block-c/ahu-c2", BaselineSet((baseline,)), NAMES, config)
        n = int(days * PER_DAY)
        u = daily_operation(n, SAMPLE_PERIOD_S, seed)
        y = LOOP.simulate(u, faults, seed=seed + 1)
        records = []
        for k in range(n):
            records.extend(monitor.step(START_S + k * SAMPLE_PERIOD_S, float(y[k]), [float(u[k])]))
        return records, monitor

    return run
