"""Asset monitor: modes, checkpoints, records."""

import json

import jsonschema
import numpy as np
import pytest

from arxwatch.daemon.alert import SignalNames, load_schema
from arxwatch.daemon.monitor import AssetMonitor, MonitorConfig
from arxwatch.daemon.simulate import Fault, daily_operation
from arxwatch.estimators.baseline import Baseline, BaselineSet


def test_fault_raises_records_that_follow_the_schema(run_asset) -> None:
    indexed, monitor = run_asset(3.0, (Fault("offset", start_s=1.5 * 86400, magnitude=0.3),))
    records = [record for _, record in indexed]
    assert records and monitor.active()
    schema = load_schema()
    for record in records:
        jsonschema.validate(record, schema)
    first = records[0]
    assert first["state"] == "raised" and first["sample_time"] >= "2026-01-02T12:00"


def test_checkpoint_mid_run_continues_identically(plant, baseline: Baseline) -> None:
    n = plant.per_day
    u = daily_operation(n, plant.sample_period_s, 9)
    y = plant.loop.simulate(u, (Fault("gain_loss", start_s=0.5 * 86400, magnitude=0.5),), seed=10)
    a = AssetMonitor("a", BaselineSet((baseline,)), plant.names)
    half = n // 2
    for k in range(half):
        a.step(plant.start_s + k * 60.0, float(y[k]), [float(u[k])])
    b = AssetMonitor("a", BaselineSet((baseline,)), plant.names)
    b.load_state(json.loads(json.dumps(a.to_state())))
    tail_a, tail_b = [], []
    for k in range(half, n):
        tail_a += a.step(plant.start_s + k * 60.0, float(y[k]), [float(u[k])])
        tail_b += b.step(plant.start_s + k * 60.0, float(y[k]), [float(u[k])])
    assert tail_a == tail_b and tail_a


def test_samples_of_a_mode_without_baseline_are_skipped(plant, baseline: Baseline) -> None:
    data = baseline.to_dict()
    data["mode"] = "occupied"
    occupied = Baseline.from_dict(data)
    monitor = AssetMonitor("a", BaselineSet((occupied,)), plant.names)
    rng = np.random.default_rng(0)
    before = json.dumps(monitor.to_state()["modes"])
    for k in range(100):
        assert monitor.step(float(k), float(rng.normal()), [50.0], mode="unoccupied") == []
    assert monitor.skipped == 100
    assert json.dumps(monitor.to_state()["modes"]) == before  # nothing learned or judged


def test_bad_construction_is_refused(baseline: Baseline) -> None:
    two = SignalNames("t", "degC", ("valve", "damper"), ("%", "%"))
    with pytest.raises(ValueError, match="names give 2 input"):
        AssetMonitor("a", BaselineSet((baseline,)), two)
    with pytest.raises(ValueError, match="evaluate_every must be >= 1"):
        MonitorConfig(evaluate_every=0)


def test_data_quality_alerts_form_their_own_family(baseline: Baseline, plant) -> None:
    from arxwatch.estimators.detect.quality import QualityConfig

    quality = {
        "block-c/ahu-c2/sat": QualityConfig(
            expected_period_s=60.0, stale_after_s=300.0, minimum=-10.0, maximum=60.0
        )
    }
    monitor = AssetMonitor("a", BaselineSet((baseline,)), plant.names, quality=quality)
    records = []
    for k in range(10):
        records += monitor.signal_sample("block-c/ahu-c2/sat", 60.0 * k, 85.0)  # sensor fault
    assert [r["detector"] for r in records] == ["out_of_range"]
    assert (
        records[0]["family"] == "data_quality"
        and "outside its valid range" in records[0]["reading"]
    )
    stale = []
    for k in range(10):
        stale += monitor.check_stale(600.0 + 60.0 * k)
    assert [r["detector"] for r in stale] == ["stale"]
    assert set(monitor.active()) == {
        "quality:out_of_range/block-c/ahu-c2/sat",
        "quality:stale/block-c/ahu-c2/sat",
    }
    again = AssetMonitor("a", BaselineSet((baseline,)), plant.names, quality=quality)
    again.load_state(json.loads(json.dumps(monitor.to_state())))
    assert again.active() == monitor.active()
    with pytest.raises(KeyError):
        monitor.signal_sample("unknown", 0.0, 1.0)


def test_parameter_covariances_equal_the_estimators_own() -> None:
    # Reference: ArxEstimator.parameter_covariance, sigma2 * U D U' by numpy matmul.
    import numpy as np

    from arxwatch.daemon.monitor import parameter_covariances
    from arxwatch.estimators.arx import ArxOrder
    from arxwatch.estimators.estimator import ArxEstimator

    rng = np.random.default_rng(7)
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 0))
    states, expected = [], []
    for _ in range(4):
        est = ArxEstimator(order)
        for _ in range(300):
            est.update(float(rng.normal()), rng.normal(size=2).tolist())
        states.append(est.to_state()["rls"])
        expected.append(est.parameter_covariance)
    got = parameter_covariances(est.layout, np.array(states).T)
    np.testing.assert_allclose(got, np.array(expected), rtol=1e-12, atol=1e-300)
    np.testing.assert_array_equal(got, got.transpose(0, 2, 1))
