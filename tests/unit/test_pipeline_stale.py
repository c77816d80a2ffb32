"""A stale alert raised by the pipeline clears once its point is back, as in AssetMonitor."""

import json
from pathlib import Path

from arxwatch.daemon.library import read_baselines
from arxwatch.daemon.monitor import AssetMonitor
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.simulate import daily_operation
from tests.unit.test_pipeline import LOOP, PERIOD, START, site, write_library


def test_a_stale_alert_clears_after_the_point_comes_back(tmp_path: Path) -> None:
    path = write_library(tmp_path / "vav.json", ["block-a/vav-1"])
    config = site(f"{{file: {path}}}")
    pipeline = Pipeline(config, {"vav": read_baselines(path)})
    asset_class = config.asset_classes[0]
    reference = AssetMonitor(
        "block-a/vav-1",
        read_baselines(path)["block-a/vav-1"],
        asset_class.signal_names(),
        quality=asset_class.quality_configs(),
    )
    n = 120
    u = daily_operation(n, PERIOD, seed=5)
    y = LOOP.simulate(u, seed=6)
    silent = range(30, 50)  # the zone temperature stops publishing for 20 periods
    got, expected = [], []
    for k in range(n):
        time_s = START + k * PERIOD
        points = [("valve", float(u[k]))] + ([] if k in silent else [("zone-temp", float(y[k]))])
        for signal, value in points:
            payload = json.dumps({"value": value, "ts": time_s}).encode()
            pipeline.feed(f"larkspur/block-a/vav/vav-1/{signal}", payload, time_s)
            reference.signal_sample(signal, time_s, value)
        pipeline.advance(time_s)
        for check_s in (time_s + 10.0, time_s + 40.0):  # a stale check twice a period
            got += [(r["detector"], r["state"]) for r in pipeline.check_stale(check_s)]
            expected += [(r["detector"], r["state"]) for r in reference.check_stale(check_s)]
    # the zone temperature's return after 21 periods is one gap in its samples
    assert pipeline.counts.sample_gaps == 1
    stale = [state for detector, state in got if detector == "stale"]
    assert stale[0] == "raised" and stale[-1] == "cleared", got
    assert [g for g in got if g[0] == "stale"] == [e for e in expected if e[0] == "stale"]
