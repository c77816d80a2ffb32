"""Detection and false alarms of the whole monitor on simulated loops.

The loops and faults are our own simulations (``arxwatch.daemon.simulate``):
a first-order lag with dead time and a second-order one, output noise on the
sensor, a baseline fitted on two fault-free days of ordinary operation (the
``run_asset`` fixture in ``tests/conftest.py``). The
expected physical reading of each fault follows from the simulated physics
(e.g. a 40 % gain loss must read as a lower actuator gain). Run with ``-s``
to print the detection-delay and false-alarm table.
"""

from dataclasses import dataclass

import pytest

from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault

TS = 60.0
PER_DAY = 1440
FAULT_AT_DAY = 1.5
#: False alerts per asset-day the default settings must stay under (design
#: target of this project: about one per asset per ten days; no source).
FALSE_ALERT_TARGET = 0.1

LOOPS = REFERENCE_LOOPS


@dataclass(frozen=True)
class Case:
    """One fault scenario and the alert keys that name it correctly."""

    fault: Fault
    expected: tuple[str, ...]  # detector/signal keys, any of which names the change
    days: float = 4.0
    word: str = ""  # the naming alert's reading must say this (direction of the change)


DAY = 86400.0
CASES = {
    "abrupt gain loss": Case(
        Fault("gain_loss", FAULT_AT_DAY * DAY, 0.4), ("physical_band/gain_1",)
    ),
    "gradual gain loss": Case(
        Fault("gain_loss", FAULT_AT_DAY * DAY, 0.4, ramp_s=DAY),
        ("physical_band/gain_1",),
        days=5.0,
        word="below",
    ),
    "stuck actuator": Case(
        Fault("stuck_actuator", FAULT_AT_DAY * DAY), ("physical_band/gain_1",), word="below"
    ),
    "offset (leak)": Case(
        Fault("offset", FAULT_AT_DAY * DAY, 0.15),
        ("innovation_mean/innovation", "physical_band/offset"),
    ),
    "sensor bias ramp": Case(
        Fault("sensor_bias", FAULT_AT_DAY * DAY, 0.3, ramp_s=DAY),
        ("innovation_mean/innovation", "physical_band/offset"),
    ),
    "noise increase": Case(
        Fault("noise_increase", FAULT_AT_DAY * DAY, 1.0), ("innovation_variance/innovation",)
    ),
    "time-constant change": Case(
        Fault("slow_response", FAULT_AT_DAY * DAY, 1.0),
        ("physical_band/time_constant_s",),
        word="slower",
    ),
    # the transport delay doubles (two more samples): the dead time read from
    # the live model's step response moves past its band
    "dead-time increase": Case(
        Fault("longer_delay", FAULT_AT_DAY * DAY, 120.0),
        ("physical_band/dead_time_1_s",),
        word="later",
    ),
}
RESULTS: dict[tuple[str, str], str] = {}


@pytest.mark.parametrize("loop_name", sorted(LOOPS))
def test_false_alert_rate_is_under_the_target(run_asset, loop_name: str) -> None:
    days, seeds = 5.0, (11, 12, 13, 14)
    raised = sum(
        1
        for seed in seeds
        for _, r in run_asset(days, (), seed, loop=loop_name)[0]
        if r["state"] == "raised"
    )
    rate = raised / (days * len(seeds))
    RESULTS[(loop_name, "false alerts per asset-day")] = (
        f"{rate:.3f} ({raised} in {days * len(seeds):.0f} days)"
    )
    assert rate <= FALSE_ALERT_TARGET


@pytest.mark.parametrize("case_name", list(CASES))
@pytest.mark.parametrize("loop_name", sorted(LOOPS))
def test_each_fault_is_detected_and_named(run_asset, loop_name: str, case_name: str) -> None:
    case = CASES[case_name]
    records, _ = run_asset(case.days, (case.fault,), 7, loop=loop_name)
    start_k = int(FAULT_AT_DAY * PER_DAY)
    first: dict[str, int] = {}
    readings: dict[str, str] = {}
    for k, r in records:
        if r["state"] == "raised" and k >= start_k:
            key = f"{r['detector']}/{r['signal']}"
            first.setdefault(key, k - start_k)
            readings.setdefault(key, r["reading"])
    assert first, "no alert after the fault"
    named = [first[key] for key in case.expected if key in first]
    assert named, f"expected one of {case.expected}, got {sorted(first)}"
    said = [readings[key] for key in case.expected if key in readings]
    assert any(case.word in text for text in said), said
    RESULTS[(loop_name, case_name)] = (
        f"first alert {min(first.values()) * TS / 60:.0f} min, "
        f"named ({'/'.join(k.split('/')[-1] for k in case.expected if k in first)}) "
        f"{min(named) * TS / 60:.0f} min"
    )


def teardown_module() -> None:
    if RESULTS:
        print("\n\ndetection delay and false alerts (simulated, 60 s sampling)")
        for (loop_name, case_name), text in sorted(RESULTS.items()):
            print(f"  {loop_name:22s} {case_name:26s} {text}")


@pytest.mark.parametrize("loop_name", sorted(LOOPS))
def test_a_lasting_fault_keeps_its_drift_alert_raised(run_asset, loop_name: str) -> None:
    # A 40 % gain loss that is never repaired, followed for five days after
    # it starts. The innovation alerts stay up, so the live estimate's
    # covariance is reset at every evaluation; the Wald distance then swings
    # with the day's excitation. Those evaluations cannot say "back to
    # normal", so the parameter-drift alert is raised once and stays raised
    # (before that rule it cleared and re-raised about once a day).
    fault = Fault("gain_loss", FAULT_AT_DAY * DAY, 0.4)
    records, monitor = run_asset(FAULT_AT_DAY + 5.0, (fault,), 7, loop=loop_name)
    drift = [r["state"] for _, r in records if r["detector"] == "feature_drift"]
    assert drift and "cleared" not in drift, drift
    assert "None:feature_drift/features" in monitor.active()


@pytest.mark.parametrize("increase", [0.3, 1.0])
@pytest.mark.parametrize("loop_name", sorted(LOOPS))
def test_a_noise_increase_is_named_as_noise_and_nothing_else(
    run_asset, loop_name: str, increase: float
) -> None:
    # A sensor 30 % or 100 % noisier: the model has not changed, so the live
    # estimate does not re-learn, and no band alarms on the noise a
    # re-learning estimate would carry (before: an offset band alert on each
    # loop at 30 %). At 100 % the plain CUSUM would also read the noise as
    # runs above and below the model (innovation_mean alerts every few hours,
    # each starting a re-learning); it divides its input by the noise level.
    fault = Fault("noise_increase", FAULT_AT_DAY * DAY, increase)
    records, _ = run_asset(3.0, (fault,), 7, loop=loop_name)
    start_k = int(FAULT_AT_DAY * PER_DAY)
    raised = {
        f"{r['detector']}/{r['signal']}"
        for k, r in records
        if r["state"] == "raised" and k >= start_k
    }
    assert raised == {"innovation_variance/innovation"}
