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

Run = Callable[..., tuple[list[tuple[int, dict]], AssetMonitor]]


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


def fit_reference_baseline(loop: Loop) -> Baseline:
    """Baseline of ``loop`` fitted on two fault-free days of ordinary operation."""
    u = daily_operation(2 * PER_DAY, SAMPLE_PERIOD_S, seed=1)
    y = loop.simulate(u, seed=2)
    t = START_S + np.arange(len(u)) * SAMPLE_PERIOD_S
    result = fit_baseline(y, u[:, None], t, sample_period_s=SAMPLE_PERIOD_S)
    assert result.accepted, result.reasons
    assert result.baseline is not None
    return result.baseline


@pytest.fixture(scope="session")
def baseline() -> Baseline:
    """Baseline of the first-order test loop."""
    return fit_reference_baseline(LOOP)


@pytest.fixture(scope="session")
def run_asset() -> Run:
    """Run a monitor over simulated days of one reference loop.

    Returns the monitor and its records, each with the index of the sample
    that produced it.
    """
    baselines: dict[str, Baseline] = {}

    def run(
        days: float,
        faults: tuple[Fault, ...] = (),
        seed: int = 5,
        config: MonitorConfig | None = None,
        loop: str = "first-order+dead-time",
    ) -> tuple[list[tuple[int, dict]], AssetMonitor]:
        plant = REFERENCE_LOOPS[loop]
        if loop not in baselines:
            baselines[loop] = fit_reference_baseline(plant)
        monitor = AssetMonitor("block-c/ahu-c2", BaselineSet((baselines[loop],)), NAMES, config)
        n = int(days * PER_DAY)
        u = daily_operation(n, SAMPLE_PERIOD_S, seed)
        y = plant.simulate(u, faults, seed=seed + 1)
        records = []
        for k in range(n):
            for record in monitor.step(START_S + k * SAMPLE_PERIOD_S, float(y[k]), [float(u[k])]):
                records.append((k, record))
        return records, monitor

    return run
