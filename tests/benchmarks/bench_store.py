"""Benchmark of the state store: checkpoint saves and journal appends, synchronous normal vs full.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_store.py [--dir DIR] [--repeat R]

For each ``synchronous`` setting it times, best of R runs on a fresh store
in DIR (default: the system temporary directory; put it on the disk the
daemon will use, since fsync cost is a property of the disk):

* ``save_checkpoint`` of 5,000 entries of 1 KiB, first save (inserts) and a
  second save of the same keys (updates);
* ``load_checkpoint`` of those 5,000 entries;
* ``append_journal`` of 10,000 rows with 60-byte payloads in batches of 100
  (100 transactions), as rows per second and milliseconds per batch;
* reading the 10,000 rows back with ``journal_after`` (rows per second).
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

from arxwatch.daemon.store import StateStore

ENTRIES = 5_000
ENTRY_BYTES = 1024
ROWS = 10_000
ROW_BYTES = 60
BATCH = 100
TOPIC = "larkspur-yard/block-b/vav-3-14/zone-temp"


def run(directory: Path, synchronous: str) -> dict[str, float]:
    """Time one fresh store; return the figures in seconds."""
    path = directory / f"bench-{synchronous}.db"
    entries = {f"block-b/vav-{k}": os.urandom(ENTRY_BYTES) for k in range(ENTRIES)}
    updated = {key: os.urandom(ENTRY_BYTES) for key in entries}
    payload = b'{"value": 21.5, "ts": 1772366400.0, "quality": "good", "n": 1}'[:ROW_BYTES]
    batches = [
        [(TOPIC, payload.ljust(ROW_BYTES), 1_772_366_400.0 + b * BATCH + k) for k in range(BATCH)]
        for b in range(ROWS // BATCH)
    ]
    figures: dict[str, float] = {}
    try:
        with StateStore(path, synchronous="full" if synchronous == "full" else "normal") as store:
            start = time.perf_counter()
            store.save_checkpoint(entries, now_s=1.0)
            figures["save_insert"] = time.perf_counter() - start
            start = time.perf_counter()
            store.save_checkpoint(updated, now_s=2.0)
            figures["save_update"] = time.perf_counter() - start
            start = time.perf_counter()
            store.load_checkpoint()
            figures["load"] = time.perf_counter() - start
            start = time.perf_counter()
            for batch in batches:
                store.append_journal(batch)
            figures["append"] = time.perf_counter() - start
            start = time.perf_counter()
            count = sum(1 for _ in store.journal_after(0))
            figures["replay"] = time.perf_counter() - start
            assert count == ROWS, count
    finally:
        for suffix in ("", "-wal", "-shm", ".lock"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
    return figures


def main() -> None:
    """Time both synchronous settings and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dir", type=Path, default=None, help="directory for the test files")
    parser.add_argument("--repeat", type=int, default=3, help="runs per figure (best kept)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(dir=args.dir, prefix="arxwatch-bench-") as name:
        directory = Path(name)
        print(f"files in {directory}")
        print(
            f"{'synchronous':<12} {'save 5k x 1KiB':>15} {'update 5k':>10} {'load 5k':>8}"
            f" {'append rows/s':>14} {'ms/batch':>9} {'replay rows/s':>14}"
        )
        for synchronous in ("normal", "full"):
            runs = [run(directory, synchronous) for _ in range(args.repeat)]
            best = {key: min(r[key] for r in runs) for key in runs[0]}
            print(
                f"{synchronous:<12} {best['save_insert'] * 1e3:>12.1f} ms"
                f" {best['save_update'] * 1e3:>7.1f} ms {best['load'] * 1e3:>5.1f} ms"
                f" {ROWS / best['append']:>14,.0f} {best['append'] / (ROWS / BATCH) * 1e3:>9.3f}"
                f" {ROWS / best['replay']:>14,.0f}"
            )


if __name__ == "__main__":
    main()
