"""Benchmark of ``arxwatch replay --report``: what the trace costs and how fast the page renders.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_report.py [--assets N] [--days D] [--sections S]

An invented site of N VAV boxes at Larkspur Yard (the loop, baseline and
config of ``tests/unit/test_pipeline.py``; one box in ten loses 40 % of its
valve gain half-way) is written as a wide CSV trend export and replayed
twice in-process: once as plain ``arxwatch replay`` and once with the
report's traces attached (:class:`ReportCollector`). The figures: replay
time with and without the traces, the traces' memory and thinning, the time
to render the report with S asset sections (the default cap) and with every
asset, and the file sizes. Then, apart from the pipeline, a trace is fed
rows for N assets over ``--trace-days`` (a month by default) at the size
the fleet hands over, to show its memory bound and its cost per row.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from arxwatch.daemon.alert import SignalNames  # noqa: E402
from arxwatch.daemon.config import load_config  # noqa: E402
from arxwatch.daemon.fleet import FleetMonitor  # noqa: E402
from arxwatch.daemon.history import HistoryReader  # noqa: E402
from arxwatch.daemon.library import read_site_baselines  # noqa: E402
from arxwatch.daemon.monitor import MonitorConfig  # noqa: E402
from arxwatch.daemon.pipeline import Pipeline  # noqa: E402
from arxwatch.daemon.replay import REPLAY_EXTRA_CELLS, replay  # noqa: E402
from arxwatch.daemon.report import MAX_SECTIONS, ReportCollector, write_report  # noqa: E402
from arxwatch.daemon.trace import FleetTrace  # noqa: E402
from arxwatch.estimators.baseline import BaselineSet  # noqa: E402
from tests.benchmarks.bench_replay import write_site  # noqa: E402
from tests.unit.test_pipeline import PERIOD, START, reference_baseline  # noqa: E402


def fill_trace(assets: int, days: float) -> None:
    """Feed a trace a row per asset and minute for ``days``; print memory, thinning, time."""
    names = SignalNames("zone temperature", "degC", ("reheat valve",), ("%",))
    fleet = FleetMonitor(names, MonitorConfig())
    baselines = BaselineSet((reference_baseline(),))
    slots = np.array([fleet.add_asset(f"vav-{a}", baselines) for a in range(assets)])
    fleet.trace = trace = FleetTrace()
    rng = np.random.default_rng(1)
    values = rng.normal(size=(5, assets))
    n = int(days * 86400 / PERIOD)
    t0 = time.perf_counter()
    for k in range(n):
        now = np.full(assets, START + k * PERIOD)
        trace.add_rows(slots, now, *values)
    seconds = time.perf_counter() - t0
    print(
        f"trace of {assets} assets x {days:g} days ({n * assets:,} rows): "
        f"{trace.memory_bytes() / 2**20:.0f} MiB (budget {trace.max_bytes / 2**20:.0f} MiB), "
        f"one stored row per {trace.every}, {len(trace.rows('vav-0')):,} rows an asset; "
        f"{seconds:.1f} s, {seconds / (n * assets) * 1e9:.0f} ns a row"
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=200)
    parser.add_argument("--days", type=float, default=30.0)
    parser.add_argument("--sections", type=int, default=MAX_SECTIONS)
    parser.add_argument("--trace-days", type=float, default=30.0)
    args = parser.parse_args()
    fill_trace(args.assets, args.trace_days)
    with tempfile.TemporaryDirectory(prefix="arxwatch-bench-report-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        trend, config_path = write_site(folder, args.assets, args.days)
        print(
            f"site: {args.assets} VAV boxes, {args.days:g} days at 60 s; trend export "
            f"{trend.stat().st_size / 2**20:.0f} MiB written in {time.perf_counter() - t0:.1f} s"
        )
        config = load_config(config_path)
        libraries = read_site_baselines(config)
        t0 = time.perf_counter()
        # as `arxwatch replay` runs a trend export
        plain = replay(Pipeline(config, libraries, extra_cells=REPLAY_EXTRA_CELLS),
                       HistoryReader(trend), lambda r: None, capped=False)  # fmt: skip
        bare_s = time.perf_counter() - t0
        pipeline = Pipeline(config, libraries, extra_cells=REPLAY_EXTRA_CELLS)
        collector = ReportCollector(pipeline)
        reader = HistoryReader(trend)
        t0 = time.perf_counter()
        summary = replay(pipeline, reader, collector.add_records, capped=False)
        traced_s = time.perf_counter() - t0
        trace = collector.traces["vav"]
        print(
            f"replay: {bare_s:.1f} s without the trace, {traced_s:.1f} s with it "
            f"({summary.counts.rows_judged:,} judged rows, {plain.counts.rows_judged:,} without)"
        )
        print(
            f"trace: {trace.memory_bytes() / 2**20:.1f} MiB, one stored row per {trace.every} "
            f"judged rows, one stored evaluation per {trace.evaluation_every}"
        )
        for sections in (args.sections, args.assets):
            out = folder / f"report-{sections}.html"
            t0 = time.perf_counter()
            drawn = write_report(out, collector, summary=summary, reader=reader, config=config,
                                 config_path=config_path, max_sections=sections)  # fmt: skip
            seconds = time.perf_counter() - t0
            print(
                f"report with {drawn} sections: {seconds:.1f} s ({seconds / max(drawn, 1):.2f} s "
                f"a section), {out.stat().st_size / 2**20:.1f} MiB"
            )


if __name__ == "__main__":
    main()
