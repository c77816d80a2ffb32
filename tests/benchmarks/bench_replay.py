"""Benchmark of ``arxwatch replay`` on a trend export: a month of 60 s data for 200 assets.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_replay.py [--assets N] [--days D] [--repeat R]

An invented site of N VAV boxes (zone temperature and reheat valve, one
column each, 60 s apart: a first-order loop with dead time from
:mod:`arxwatch.daemon.simulate`, one box in ten losing 40 % of its valve
gain half-way) is written as a wide CSV trend export with a baseline file,
then replayed in-process through the same code as ``arxwatch replay``
(config, baseline file, :class:`HistoryReader`, :class:`Pipeline`,
:func:`replay`), alert records written as JSON Lines. As the command does,
a second process reads the file and converts its cells ahead of the
blocks being judged (a file of ``READ_AHEAD_BYTES`` or more, on two cores
or more). In the same run, the reference is the floor a replay in one
process pays: reading the same file with the standard library's ``csv``
module and converting every cell to float. The figures: wall time, the
CPU time of the judging process (the reading process's comes on top, on
the other core), values (cells) per second, rows per second, the ratio to
the reference, and the alerts raised (a sanity check that the faults were
seen). Best of R runs.
"""

from __future__ import annotations

import argparse
import csv
import io
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from arxwatch.daemon.config import parse_config  # noqa: E402
from arxwatch.daemon.history import HistoryReader  # noqa: E402
from arxwatch.daemon.library import read_site_baselines  # noqa: E402
from arxwatch.daemon.pipeline import Pipeline  # noqa: E402
from arxwatch.daemon.replay import REPLAY_EXTRA_CELLS, replay, write_records  # noqa: E402
from arxwatch.daemon.simulate import Fault, daily_operation  # noqa: E402
from tests.unit.test_pipeline import LOOP, PERIOD, SITE, START, write_library  # noqa: E402


def write_site(folder: Path, assets: int, days: float) -> tuple[Path, Path]:
    """Write the trend export, the baseline file and the config; return (trend, config).

    The loop, baseline and config are those of ``tests/unit/test_pipeline.py``.
    """
    n = int(days * 86400 / PERIOD)
    names = [f"block-{'abcd'[a % 4]}/vav-{a}" for a in range(assets)]
    library = write_library(folder / "vav.json", names)
    header, columns = ["time"], []
    for a, name in enumerate(names):
        u = daily_operation(n, PERIOD, seed=100 + a)
        faults = (Fault("gain_loss", start_s=n * PERIOD / 2, magnitude=0.4),) if a % 10 == 0 else ()
        columns += [np.round(LOOP.simulate(u, faults, seed=1000 + a), 3), np.round(u, 2)]
        building, box = name.split("/")
        header += [f"larkspur/{building}/vav/{box}/{s}" for s in ("zone-temp", "valve")]
    trend = folder / "trend.csv"
    with trend.open("w", encoding="utf-8") as out:
        out.write(",".join(header) + "\n")
        table = np.column_stack([START + np.arange(n) * PERIOD, *columns])
        np.savetxt(out, table, delimiter=",", fmt="%.10g")
    config = folder / "site.yaml"
    config.write_text(SITE.format(baseline=f"{{file: {library}}}", model="auto"))
    return trend, config


def run_replay_once(
    trend: Path, config_path: Path, backend: str = "auto"
) -> tuple[float, float, int, int, int]:
    """Replay as ``arxwatch replay`` does; return (seconds, CPU seconds, values, rows, records).

    The CPU seconds are this process's (the judging), not the reading process's.
    """
    started = time.perf_counter()
    cpu = time.process_time()
    config = parse_config(config_path.read_text(), str(config_path))
    pipeline = Pipeline(
        config, read_site_baselines(config), extra_cells=REPLAY_EXTRA_CELLS, backend=backend
    )
    reader = HistoryReader(trend)
    sink = io.StringIO()
    written = 0

    def on_records(records: list[dict]) -> None:
        nonlocal written
        written += len(records)
        write_records(sink, records)

    summary = replay(pipeline, reader, on_records, capped=False)
    seconds, cpu = time.perf_counter() - started, time.process_time() - cpu
    return seconds, cpu, summary.values, summary.counts.rows, written


def read_reference(trend: Path) -> tuple[float, int]:
    """Read the file with csv.reader, every cell to float (the floor); return (seconds, values)."""
    started = time.perf_counter()
    values = 0
    with trend.open(newline="", encoding="utf-8") as handle:
        rows = csv.reader(handle)
        next(rows)
        for row in rows:
            values += len([float(cell) for cell in row[1:]])
    return time.perf_counter() - started, values


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=200)
    parser.add_argument("--days", type=float, default=30.0)
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument(
        "--backend",
        choices=("auto", "python", "compiled"),
        default="auto",
        help="the fleet's back end (arxwatch replay uses auto)",
    )
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="arxwatch-bench-replay-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        trend, config = write_site(folder, args.assets, args.days)
        size = trend.stat().st_size
        print(
            f"site: {args.assets} VAV boxes x 2 points, {args.days:g} days at 60 s; "
            f"trend export {size / 2**20:.0f} MiB written in {time.perf_counter() - t0:.1f} s"
        )
        best_ref = min(read_reference(trend)[0] for _ in range(args.repeat))
        runs = [run_replay_once(trend, config, args.backend) for _ in range(args.repeat)]
        seconds, cpu, values, rows, alerts = min(runs)
        print(f"reference (csv.reader + float per cell): {best_ref:.1f} s")
        print(
            f"replay: {seconds:.1f} s ({cpu:.1f} s CPU judging) for {values:,} values "
            f"({values / seconds:,.0f} values/s), {rows:,} rows ({rows / seconds:,.0f} rows/s), "
            f"{alerts:,} alert records"
        )
        print(f"replay / reference: {seconds / best_ref:.1f}x")


if __name__ == "__main__":
    main()
