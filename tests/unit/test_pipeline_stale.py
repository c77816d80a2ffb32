"""A stale alert raised by the pipeline clears once its point is back, as in AssetMonitor."""

import json
from pathlib import Path

import numpy as np

from arxwatch.daemon.config import parse_config
from arxwatch.daemon.library import read_baselines, write_baselines
from arxwatch.daemon.monitor import AssetMonitor
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.estimators.baseline import BaselineSet, fit_baseline

PERIOD = 60.0
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
    model: auto
    baseline: {{file: {path}}}
"""


def test_a_stale_alert_clears_after_the_point_comes_back(tmp_path: Path) -> None:
    u = daily_operation(2 * 1440, PERIOD, seed=1)
    t = START - 3 * 86400.0 + np.arange(len(u)) * PERIOD
    fit = fit_baseline(LOOP.simulate(u, seed=2), u[:, None], t, sample_period_s=PERIOD)
    assert fit.baseline is not None
    path = tmp_path / "vav.json"
    write_baselines(path, {"block-a/vav-1": BaselineSet((fit.baseline,))}, START)
    config = parse_config(SITE.format(path=path), "site.yaml")
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
