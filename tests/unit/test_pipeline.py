"""The pipeline: messages in, records out, as the per-asset reference objects give them."""

import csv
import json
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np
import pytest

from arxwatch.daemon.align import Aligner
from arxwatch.daemon.config import Config, parse_config
from arxwatch.daemon.intake import RowBatch
from arxwatch.daemon.library import read_baselines, write_baselines
from arxwatch.daemon.monitor import AssetMonitor
from arxwatch.daemon.pipeline import Pipeline, pack, unpack
from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault, daily_operation
from arxwatch.estimators.baseline import Baseline, BaselineSet, fit_baseline

PERIOD = 60.0
PER_DAY = 1440
START = 1_767_225_600.0  # 2026-01-01T00:00:00Z
LOOP = REFERENCE_LOOPS["first-order+dead-time"]

SITE = """
broker: {{host: 127.0.0.1, client_id: arxwatch-test}}
state: {{path: /tmp/unused.db}}
asset_classes:
  - name: vav
    pattern: "larkspur/{{building}}/vav/{{asset}}/{{signal}}"
    asset_id: "{{building}}/{{asset}}"
    sample_period_s: 60
    output: {{signal: zone-temp, name: zone temperature, unit: degC, min: -10, max: 40}}
    inputs:
      - {{signal: valve, name: reheat valve, unit: "%", min: 0, max: 100}}
    model: {model}
    baseline: {baseline}
"""


def site(baseline: str, model: str = "auto") -> Config:
    return parse_config(SITE.format(baseline=baseline, model=model), "site.yaml")


def write_library(path: Path, assets: Iterable[str]) -> Path:
    """Write a baseline file with the reference baseline for every asset given."""
    write_baselines(path, {asset: BaselineSet((reference_baseline(),)) for asset in assets}, START)
    return path


@pytest.fixture(scope="module")
def library_file(tmp_path_factory: pytest.TempPathFactory, plant: dict) -> Path:
    """Write the reference baseline of every asset of the plant to a file."""
    return write_library(tmp_path_factory.mktemp("baselines") / "vav.json", plant)


def file_site(path: Path) -> tuple[Config, dict[str, dict[str, BaselineSet]]]:
    return site(f"{{file: {path}}}"), {"vav": read_baselines(path)}


def reference_baseline() -> Baseline:
    u = daily_operation(2 * PER_DAY, PERIOD, seed=1)
    t = START - 3 * 86400.0 + np.arange(len(u)) * PERIOD
    result = fit_baseline(LOOP.simulate(u, seed=2), u[:, None], t, sample_period_s=PERIOD)
    assert result.baseline is not None
    return result.baseline


@pytest.fixture(scope="module")
def plant() -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Three VAV boxes of one loop (see :func:`make_plant`)."""
    return make_plant()


def make_plant() -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Three VAV boxes of one loop; block-a/vav-2 loses 40 % of its valve gain at noon."""
    n = int(1.5 * PER_DAY)
    out = {}
    for k, asset in enumerate(("block-a/vav-1", "block-a/vav-2", "block-b/vav-7")):
        u = daily_operation(n, PERIOD, seed=30 + k)
        faults = (Fault("gain_loss", start_s=0.5 * 86400, magnitude=0.4),) if k == 1 else ()
        y = LOOP.simulate(u, faults, seed=40 + k)
        y[700 + 10 * k : 706 + 10 * k] = 55.0  # a few out-of-range readings each
        out[asset] = (y, u)
    return out


def messages(plant: dict, lo: int, hi: int) -> Iterator[tuple[str, bytes, float, int]]:
    """(topic, payload, arrival, step): each signal a few seconds after its grid point."""
    for k in range(lo, hi):
        t = START + k * PERIOD
        for asset, (y, u) in plant.items():
            building, box = asset.split("/")
            for signal, value, delay in (("zone-temp", y[k], 3.0), ("valve", u[k], 7.0)):
                payload = json.dumps({"value": float(value), "ts": t}).encode()
                yield f"larkspur/{building}/vav/{box}/{signal}", payload, t + delay, k


def write_trend(path: Path, plant: dict, n: int) -> Path:
    """Write the plant's first ``n`` grid points as a wide trend export (a column per topic)."""
    topics = sorted({topic for topic, *_ in messages(plant, 0, 1)})
    with path.open("w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(["time", *topics])
        row: dict[str, str] = {}
        for topic, payload, _, k in messages(plant, 0, n):
            row[topic] = repr(json.loads(payload)["value"])
            if len(row) == len(topics):
                out.writerow([f"{START + k * PERIOD:.0f}", *(row[t] for t in topics)])
                row = {}
    return path


def run(pipe: Pipeline, plant: dict, lo: int, hi: int) -> list[dict]:
    records: list[dict] = []
    for topic, payload, arrival, _ in messages(plant, lo, hi):
        records += pipe.feed(topic, payload, arrival)
        if topic.endswith("valve") and topic.startswith("larkspur/block-b"):
            records += pipe.advance(arrival + 25.0)  # lateness 30 s: closes grid point k
    return records


def test_records_are_the_per_asset_monitors(plant: dict, library_file: Path) -> None:
    # The reference: one AssetMonitor per asset with the class's quality
    # settings, fed every raw sample and every grid row in time order.
    config, libraries = file_site(library_file)
    library = libraries["vav"]
    pipe = Pipeline(config, libraries)
    got = run(pipe, plant, 0, len(next(iter(plant.values()))[0]))
    vav = config.asset_classes[0]
    expected: list[dict] = []
    for asset, (y, u) in plant.items():
        # out-of-range values are checked for quality but kept out of the rows
        aligner = Aligner(vav.align_config())
        mon = AssetMonitor(
            asset, library[asset], vav.signal_names(), vav.monitor_config(), vav.quality_configs()
        )
        for k in range(len(y)):
            t = START + k * PERIOD
            for signal, value, spec in (
                ("zone-temp", y[k], vav.output),
                ("valve", u[k], vav.inputs[0]),
            ):
                expected += mon.signal_sample(signal, t, float(value))
                if spec.minimum <= value <= spec.maximum:
                    aligner.add(signal, t, float(value))
            for row in aligner.advance(t + 30.0):
                if row.restart:
                    mon.restart()
                expected += mon.step(row.time_s, row.y, list(row.u))

    def key(r: dict) -> tuple:
        return (r["asset"], r["sample_time"], r["detector"], r["signal"], r["state"])

    assert sorted(got, key=key) == sorted(expected, key=key)
    faulty = {r["detector"] for r in got if r["asset"] == "block-a/vav-2"}
    assert "innovation_mean" in faulty and "physical_band" in faulty
    assert {r["detector"] for r in got} >= {"out_of_range"}
    counts = pipe.counts
    # grid points close by event time: the last one waits for later samples;
    # a grid point whose output was out of range for too long has no row
    n = len(next(iter(plant.values()))[0])
    assert counts.samples["out_of_range"] == 3 * 6
    assert counts.samples["accepted"] == 2 * 3 * n - 3 * 6
    assert counts.rows_judged == counts.rows == 3 * (n - 1) - counts.grid_points_skipped
    assert counts.grid_points_skipped == 3 * 4
    assert counts.transitions[("innovation_mean", "raised")] >= 1
    assert pipe.asset_states() == {"monitoring": 3, "learning": 0, "no_baseline": 0}


def test_checkpoint_restore_continues_as_if_uninterrupted(plant: dict, library_file: Path) -> None:
    config, libraries = file_site(library_file)
    n = len(next(iter(plant.values()))[0])
    whole = run(Pipeline(config, libraries), plant, 0, n)
    first = Pipeline(config, libraries)
    before = run(first, plant, 0, 900)
    saved = first.checkpoint()
    second = Pipeline(config, libraries)
    second.restore(saved.entries, lambda key: saved.appended.get(key, b""))
    after = run(second, plant, 900, n)
    assert before + after == whole


def test_bad_input_is_counted_not_raised(library_file: Path) -> None:
    config, _ = file_site(library_file)
    pipe = Pipeline(config, {"vav": {}})
    topic = "larkspur/block-a/vav/vav-1/zone-temp"
    assert pipe.feed(topic, b"", START) == []
    assert pipe.last_problem is None  # an empty payload clears a retained message
    for payload in (b"\xff\xfe", b"{", b'{"value": NaN, "ts": 1}', b'{"value": "hot"}', b"7"):
        assert pipe.feed(topic, payload, START) == []
    assert pipe.last_problem is not None and pipe.last_problem[0] == topic
    assert pipe.last_problem[1].startswith("payload rejected (")
    assert pipe.feed("larkspur/block-a/vav/vav-1/setpoint", b"21", START) == []
    assert pipe.feed("elsewhere/x", b"1", START) == []
    ok = json.dumps({"value": 21.0, "ts": START}).encode()
    pipe.feed(topic, ok, START + 1)
    pipe.feed(topic, ok, START + 2)  # redelivered: a duplicate
    counts = pipe.counts
    assert counts.messages == 10
    assert sum(counts.rejected.values()) == 6
    assert counts.refused == {"signal not allowed": 1, "no matching rule": 1}
    assert counts.samples == {"accepted": 1, "duplicate": 1}
    assert pipe.advance(START + 120.0) == []
    # an asset without a baseline in the file is not judged
    assert pipe.asset_states() == {"monitoring": 0, "learning": 0, "no_baseline": 1}


def test_live_learning_survives_a_checkpoint_and_then_judges() -> None:
    # A day and a half of fault-free operation is learned (order fixed),
    # checkpointed half way (the window is a store series): the baselines
    # and what follows must be the uninterrupted run's.
    n = int(2.2 * PER_DAY)
    plant = {}
    for k, asset in enumerate(("block-a/vav-1", "block-b/vav-7")):
        u = daily_operation(n, PERIOD, seed=50 + k)
        plant[asset] = (LOOP.simulate(u, seed=60 + k), u)
    config = site("{learn_for_s: 129600}", model="{na: 2, nb: 2, nk: 2}")
    whole = Pipeline(config)
    expected = run(whole, plant, 0, n)
    first = Pipeline(config)
    before = run(first, plant, 0, 700)
    assert first.asset_states() == {"monitoring": 0, "learning": 2, "no_baseline": 0}
    saved = first.checkpoint()
    assert set(saved.appended) == {f"window/vav/{a}" for a in plant}
    second = Pipeline(config)
    second.restore(saved.entries, lambda key: saved.appended.get(key, b""))
    after = run(second, plant, 700, n)
    assert before + after == expected
    for pipe in (whole, second):
        assert [e.accepted for e in pipe.events] == [True, True], pipe.events
        assert pipe.asset_states() == {"monitoring": 2, "learning": 0, "no_baseline": 0}
        assert pipe.counts.rows_judged > 0 and pipe.counts.rows_not_judged["learning"] > 0
    assert [e.fit_percent for e in second.events] == [e.fit_percent for e in whole.events]
    # once every mode is accepted the window series is dropped
    assert set(second.checkpoint().dropped) == {f"window/vav/{a}" for a in plant}


MODED = SITE.replace(
    "    model: {model}",
    "    mode: {{signal: occupancy, values: [occupied, unoccupied]}}\n    model: {model}",
)


def test_a_restart_keeps_what_the_other_modes_collected() -> None:
    # Occupied and unoccupied take turns every 4 h; each needs 6 h. Occupied
    # is fitted after 10 h, unoccupied after 14 h. A checkpoint at 11 h must
    # keep unoccupied's 4 h collected from 4 h to 8 h: the restored service
    # fits it at 14 h too, not after collecting 6 h afresh.
    n = 20 * 60
    u = daily_operation(n, PERIOD, seed=70)
    y = LOOP.simulate(u, seed=71)
    config = parse_config(
        MODED.format(baseline="{learn_for_s: 21600}", model="{na: 2, nb: 2, nk: 2}"), "site.yaml"
    )

    def feed(pipe: Pipeline, lo: int, hi: int) -> list[dict]:
        records: list[dict] = []
        for k in range(lo, hi):
            t = START + k * PERIOD
            mode = "occupied" if (k // 240) % 2 == 0 else "unoccupied"
            for signal, value, delay in (
                ("occupancy", mode, 1.0),
                ("zone-temp", float(y[k]), 3.0),
                ("valve", float(u[k]), 7.0),
            ):
                payload = json.dumps({"value": value, "ts": t}).encode()
                records += pipe.feed(f"larkspur/block-a/vav/vav-1/{signal}", payload, t + delay)
            records += pipe.advance(t + 40.0)
        return records

    whole = Pipeline(config)
    expected = feed(whole, 0, n)
    first = Pipeline(config)
    before = feed(first, 0, 660)
    assert [(e.mode, e.accepted) for e in first.events] == [("occupied", True)]
    saved = first.checkpoint()
    second = Pipeline(config)
    second.restore(saved.entries, lambda key: saved.appended.get(key, b""))
    after = feed(second, 660, n)
    assert before + after == expected
    events = [(e.mode, e.accepted, e.fit_percent) for e in (*first.events, *second.events)]
    assert events == [(e.mode, e.accepted, e.fit_percent) for e in whole.events]
    assert [e.mode for e in whole.events] == ["occupied", "unoccupied"]
    assert second.asset_states() == {"monitoring": 1, "learning": 0, "no_baseline": 0}


def test_state_blobs_round_trip_and_refuse_garbage() -> None:
    meta, arrays = unpack(pack({"a": [1, None]}, {"x": np.arange(3.0)}))
    assert meta == {"a": [1, None]} and arrays["x"].tolist() == [0.0, 1.0, 2.0]
    with pytest.raises(ValueError, match="not a saved state blob"):
        unpack(b"garbage")


def test_a_backlog_of_older_samples_is_aligned_not_dropped(plant: dict, library_file: Path) -> None:
    # What a persistent session delivers after an outage: old samples, all at
    # once, long after their time. With the wall clock far ahead, grid
    # points still close by the samples' own times, so nothing is late.
    config, libraries = file_site(library_file)
    live = Pipeline(config, libraries)
    expected = run(live, plant, 0, 600)
    later = Pipeline(config, libraries)
    records: list[dict] = []
    wall = START + 10 * 86400.0
    for topic, payload, arrival, _ in messages(plant, 0, 600):
        records += later.feed(topic, payload, arrival)
        if topic.endswith("valve") and topic.startswith("larkspur/block-b"):
            records += later.advance(wall)
    assert later.counts.samples == {"accepted": 3600}
    assert later.counts.rows == live.counts.rows
    assert records == expected


def test_a_backlog_fed_without_advancing_loses_no_grid_point(
    plant: dict, library_file: Path
) -> None:
    # Ten hours of three boxes in one go, nobody calling advance(): each box
    # is advanced on its own whenever its cells fill (IntakeBank.crowded).
    # Same rows, same records as the live run, in another interleaving.
    config, libraries = file_site(library_file)
    live = Pipeline(config, libraries)
    expected = run(live, plant, 0, 600)
    burst = Pipeline(config, libraries)
    records: list[dict] = []
    for topic, payload, arrival, _ in messages(plant, 0, 600):
        records += burst.feed(topic, payload, arrival)
    records += burst.advance(START + 10 * 86400.0)
    assert burst.counts.samples == {"accepted": 3600}
    assert burst.counts.rows == live.counts.rows
    assert burst.counts.grid_points_skipped == live.counts.grid_points_skipped
    as_text = sorted(json.dumps(r, sort_keys=True) for r in records)
    assert as_text == sorted(json.dumps(r, sort_keys=True) for r in expected)


def test_closed_rows_reach_the_row_tap(plant: dict, library_file: Path) -> None:
    config, libraries = file_site(library_file)
    pipe = Pipeline(config, libraries)
    seen: list[tuple[str, str, float, float]] = []

    def tap(asset_class: str, assets: list[str], rows: RowBatch, modes: list) -> None:
        assert modes == [None] * len(assets)  # the class has no mode signal
        for asset, t, y in zip(assets, rows.time_s.tolist(), rows.y.tolist(), strict=True):
            seen.append((asset_class, asset, t, y))

    pipe.on_rows = tap
    run(pipe, plant, 0, 30)
    assert len(seen) == pipe.counts.rows == 3 * 29  # grid point 29 is not closed yet
    y, _ = plant["block-b/vav-7"]
    assert [v[3] for v in seen if v[1] == "block-b/vav-7"] == y[:29].tolist()
    assert {v[0] for v in seen} == {"vav"}
