"""A trend export row fed at once (Pipeline.feed_row) equals its cells fed one by one (feed)."""

import csv
import json
from collections import Counter
from dataclasses import asdict
from pathlib import Path

import numpy as np
import pytest

from arxwatch.daemon.config import parse_config
from arxwatch.daemon.history import HistoryReader
from arxwatch.daemon.pipeline import Pipeline, TrendColumns
from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault, daily_operation

PERIOD = 60.0
START = 1_767_225_600.0  # 2026-01-01T00:00:00Z
LOOP = REFERENCE_LOOPS["first-order+dead-time"]
SITE = """
broker: {host: 127.0.0.1, client_id: arxwatch-test}
state: {path: /tmp/unused.db}
asset_classes:
  - name: vav
    pattern: "larkspur/{building}/vav/{asset}/{signal}"
    asset_id: "{building}/{asset}"
    sample_period_s: 60
    output: {signal: zone-temp, name: zone temperature, unit: degC, min: -10, max: 40}
    inputs:
      - {signal: valve, name: reheat valve, unit: "%", min: 0, max: 100, scale: 100}
    mode: {signal: occupancy, values: [occupied]}
    model: auto
    baseline: {learn_for_s: 21600}
"""


def write_trend(path: Path) -> None:
    """Two boxes over 16 h (learning 6 h, then judged), with the untidy cells of real exports.

    Valve cells in 0..1 (scaled by 100); an occupancy label column; a column
    no rule claims; empty cells; a word, "nan", an out-of-range reading; a
    repeated row and one out of order; the second box's valve gain halves.
    """
    n = 24 * 60
    rng = np.random.default_rng(3)
    header = ["time"]
    columns = []
    for k, box in enumerate(("vav-1", "vav-2")):
        u = daily_operation(n, PERIOD, seed=10 + k)
        faults = (Fault("gain_loss", start_s=9 * 3600.0, magnitude=0.6),) if k else ()
        y = LOOP.simulate(u, faults, seed=20 + k)
        header += [f"larkspur/a/vav/{box}/zone-temp", f"larkspur/a/vav/{box}/valve"]
        columns += [[f"{v:.3f}" for v in y], [f"{v / 100:.4f}" for v in u]]
    header += [f"larkspur/a/vav/{box}/occupancy" for box in ("vav-1", "vav-2")]
    header += ["larkspur/a/meter/m-1/kwh"]
    occupancy = ["standby" if 700 <= k < 720 else "occupied" for k in range(n)]  # standby: no model
    columns += [occupancy, occupancy]
    columns += [[f"{k * 0.5:.1f}" for k in range(n)]]
    rows = [[f"{START + k * PERIOD:.0f}", *(c[k] for c in columns)] for k in range(n)]
    for k in rng.choice(n, 40, replace=False):
        rows[k][1 + rng.integers(len(columns))] = ""
    rows[100][1], rows[200][2], rows[300][3] = "warm", "nan", "55"
    rows.insert(400, list(rows[399]))  # a repeated row: duplicates
    rows.insert(500, list(rows[450]))  # a row out of order: late samples
    with path.open("w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(header)
        out.writerows(rows)


def fed(path: Path, by_row: bool) -> tuple[Pipeline, list[dict]]:
    config = parse_config(SITE, "site.yaml")
    pipeline = Pipeline(config, extra_cells=5 if by_row else 0)
    reader = HistoryReader(path)
    records: list[dict] = []
    if by_row:
        rows = reader.rows()
        first = next(rows)
        columns = TrendColumns(reader.topics)
        for row in [first, *rows]:
            records += pipeline.feed_row(columns, row.time_s, row.cells)
            records += pipeline.advance()
    else:
        last = None
        for value in reader:
            if last is not None and value.line != last:
                records += pipeline.advance()
            records += pipeline.feed(value.topic, value.payload, value.time_s, bare=True)
            last = value.line
    records += pipeline.advance()
    return pipeline, records


def key(record: dict) -> str:
    return json.dumps(record, sort_keys=True)


def test_rows_give_the_counts_and_alerts_of_cells_fed_one_by_one(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    trend = tmp_path / "trend.csv"
    write_trend(trend)
    one, by_cell = fed(trend, by_row=False)
    cell_by_cell = Counter[str]()
    feed = Pipeline.feed

    def counted(self: Pipeline, topic: str, *args: object, **kwargs: object) -> list[dict]:
        cell_by_cell[topic.rsplit("/", 1)[1]] += 1
        return feed(self, topic, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(Pipeline, "feed", counted)
    many, by_row = fed(trend, by_row=True)
    # only the mode labels and the few untidy rows went cell by cell
    assert cell_by_cell["zone-temp"] + cell_by_cell["valve"] < 20 < cell_by_cell["occupancy"]
    assert asdict(many.counts) == asdict(one.counts)
    counts = one.counts
    # the untidy cells were all seen: each of these outcomes happened
    assert counts.rejected["not_a_number"] >= 2 and counts.refused["no matching rule"] > 0
    assert counts.samples["duplicate"] > 0 and counts.samples["late"] > 0
    assert counts.samples["out_of_range"] == 1 and counts.baselines["accepted"] > 0
    assert Counter(map(key, by_row)) == Counter(map(key, by_cell))
    assert any(r["asset"] == "a/vav-2" and r["family"] == "behaviour" for r in by_cell)
