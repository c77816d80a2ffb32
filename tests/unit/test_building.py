"""Larkspur Yard: the demo's simulated building.

The end-to-end check runs the pure pipeline (the service's processing, no
MQTT) over the building with baselines fitted on its commissioning days,
and expects every scheduled fault to be caught and no alert before it:
the demo's own promise, with its own truth (invented data).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from arxwatch.daemon.building import (
    ASSETS,
    CLASSES,
    FAULT_SCHEDULE,
    HOUR_S,
    SAMPLE_PERIOD_S,
    Building,
    ScheduledFault,
    payload,
)
from arxwatch.daemon.demo import commission, demo_config, unexplained, verdicts
from arxwatch.daemon.library import read_site_baselines, write_baselines
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.simulate import Fault

LIVE_S = 1_796_083_200.0  # midnight UTC, 2026-12-01


def test_every_point_is_published_once_per_step_with_its_topic() -> None:
    points = Building(LIVE_S).step(LIVE_S)
    assert len(points) == 2 * len(ASSETS)
    topics = {spec.topic(signal) for spec, signal, _ in points}
    assert "larkspur/block-c/ahu/ahu-2/chw-valve" in topics
    assert "larkspur/block-d/vav/vav-1-04/zone-temp" in topics
    assert json.loads(payload(21.123456, LIVE_S)) == {"value": 21.1235, "ts": LIVE_S}


def test_a_seed_repeats_a_run_and_another_differs() -> None:
    def run(seed: int) -> list[float]:
        building = Building(LIVE_S, seed=seed)
        return [v for k in range(30) for _, _, v in building.step(LIVE_S + k * SAMPLE_PERIOD_S)]

    assert run(3) == run(3)
    assert run(3) != run(4)


def test_a_silent_point_stops_for_its_time_only() -> None:
    item = next(i for i in FAULT_SCHEDULE if i.silent_signal is not None)
    building = Building(LIVE_S - item.after_s, schedule=(item,))
    start, stop = LIVE_S, LIVE_S + item.silent_for_s
    times = [start - SAMPLE_PERIOD_S + k * SAMPLE_PERIOD_S for k in range(23)]
    heard = {
        t: {s for spec, s, _ in building.step(t) if spec.asset_id == item.asset} for t in times
    }
    assert heard[start - SAMPLE_PERIOD_S] == {"sat", "chw-valve"}
    assert heard[start] == heard[stop - SAMPLE_PERIOD_S] == {"chw-valve"}
    assert heard[stop] == {"sat", "chw-valve"}


def test_steps_must_follow_the_grid() -> None:
    building = Building(LIVE_S)
    building.step(LIVE_S)
    with pytest.raises(ValueError, match="one sample period at a time"):
        building.step(LIVE_S + 2 * SAMPLE_PERIOD_S)


def test_bad_scheduled_faults_are_refused() -> None:
    with pytest.raises(ValueError, match="either a fault or a silent signal"):
        ScheduledFault("block-c/ahu-1", "x", 60.0)
    with pytest.raises(ValueError, match="the fault starts at 120.0 s, but after_s is 60.0 s"):
        ScheduledFault("block-c/ahu-1", "x", 60.0, Fault("offset", 120.0, 1.0))
    with pytest.raises(ValueError, match="silent_for_s must be > 0"):
        ScheduledFault("block-c/ahu-1", "x", 60.0, silent_signal="sat")
    item = ScheduledFault("block-z/ahu-9", "x", 60.0, Fault("offset", 60.0, 1.0))
    with pytest.raises(ValueError, match="unknown asset 'block-z/ahu-9'"):
        Building(LIVE_S, schedule=(item,))


def test_the_pipeline_catches_every_scheduled_fault_and_nothing_before(tmp_path: Path) -> None:
    building = Building(LIVE_S, seed=7)
    commissioned = commission(building, LIVE_S - 2 * 86400.0, LIVE_S)
    assert all(line.endswith("accepted") for line in commissioned.table[1:])
    files = {kind: tmp_path / f"{kind}.json" for kind in CLASSES}
    for kind, baselines in commissioned.baselines.items():
        write_baselines(files[kind], baselines, LIVE_S)
    config = demo_config(1883, "mqtt5", 9108, tmp_path / "state.db", files)
    pipeline = Pipeline(config, read_site_baselines(config))
    records = []
    end = LIVE_S + max(item.after_s for item in FAULT_SCHEDULE) + 1.5 * HOUR_S
    t = LIVE_S
    while t < end:
        for spec, signal, value in building.step(t):
            records += pipeline.feed(spec.topic(signal), payload(value, t), t)
        now = t + 1.0  # the service's clock, a moment after the samples
        records += pipeline.advance(now) + pipeline.check_stale(now)
        t += SAMPLE_PERIOD_S
    lines = verdicts(FAULT_SCHEDULE, records, LIVE_S, t)
    assert all("caught by" in line for line in lines), lines
    # each fault by the family meant for it
    for item, line in zip(FAULT_SCHEDULE, lines, strict=True):
        assert f"({item.family}," in line, line
    assert unexplained(FAULT_SCHEDULE, records, LIVE_S) == []
