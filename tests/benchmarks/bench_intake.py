"""Benchmark of the column-wise intake against one Aligner and SignalQuality per asset.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_intake.py [--assets N] [--periods P] [--batch B] [--repeat R]

A VAV-like class of an invented site (discharge temperature and two inputs,
60 s period, data-quality checks on all three) with N assets, each signal
sampled once per period at a random moment, arriving in random order across
assets. Per period: every sample is added, the quality evidence is taken
after every B samples (as a daemon draining its queue in batches would; the
Evidence objects piling up in one long batch cost garbage-collector passes),
the grid is advanced and the stale check runs. The same samples go through
the reference objects (one Aligner per asset, one SignalQuality per signal)
in the same run. Figures are best of R interleaved runs: per sample for add (with and
without building the quality evidence), per row for advance, per (asset,
signal) for the stale check; then bytes per asset of both, the reference's
measured with tracemalloc on a smaller set run long enough to fill its
duplicate memory (1,024 times per signal).
"""

from __future__ import annotations

import argparse
import random
import time
import tracemalloc
from collections.abc import Callable

from arxwatch.daemon.align import AlignConfig, Aligner
from arxwatch.daemon.intake import IntakeBank
from arxwatch.estimators.detect.quality import QualityConfig, SignalQuality

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z
TS = 60.0
CONFIG = AlignConfig(sample_period_s=TS, output="sat", inputs=("damper", "airflow"))
QUALITY = {
    name: QualityConfig(expected_period_s=TS, stale_after_s=5 * TS, minimum=-50.0, maximum=150.0)
    for name in CONFIG.signals
}
Sample = tuple[int, int, float, float]  # asset, signal, time, value


def make_periods(assets: int, periods: int, seed: int) -> list[list[Sample]]:
    """Return, per period, every asset's samples in a shuffled arrival order."""
    rng = random.Random(seed)
    out = []
    for p in range(periods):
        samples = [
            (a, s, T0 + (p + rng.random()) * TS, 20.0 + rng.random())
            for a in range(assets)
            for s in range(len(CONFIG.signals))
        ]
        rng.shuffle(samples)
        out.append(samples)
    return out


def now_after(p: int) -> float:
    """Time at which period ``p``'s closing grid point is due (lateness past it)."""
    return T0 + (p + 1) * TS + CONFIG.lateness_s


def run_bank(assets: int, periods: list[list[Sample]], batch: int) -> dict[str, float]:
    bank = IntakeBank(CONFIG, QUALITY)
    slots = [bank.add_asset() for _ in range(assets)]
    add = take = advance = stale = 0.0
    rows = 0
    for p, samples in enumerate(periods):
        for first in range(0, len(samples), batch):
            start = time.perf_counter()
            for a, s, t, v in samples[first : first + batch]:
                bank.add(slots[a], s, t, v)
            add += time.perf_counter() - start
            start = time.perf_counter()
            bank.take_quality()
            take += time.perf_counter() - start
        start = time.perf_counter()
        rows += len(bank.advance(now_after(p)))
        advance += time.perf_counter() - start
        start = time.perf_counter()
        bank.stale(now_after(p))
        stale += time.perf_counter() - start
    n = sum(len(samples) for samples in periods)
    return {
        "add": add / n,
        "add+evidence": (add + take) / n,
        "advance": advance / rows,
        "stale": stale / (len(periods) * assets * len(CONFIG.signals)),
        "rows": rows,
    }


def run_reference(assets: int, periods: list[list[Sample]]) -> dict[str, float]:
    names = CONFIG.signals
    aligners = [Aligner(CONFIG) for _ in range(assets)]
    checks = [[SignalQuality(name, QUALITY[name]) for name in names] for _ in range(assets)]
    newest = [[-float("inf")] * len(names) for _ in range(assets)]
    add = advance = stale = 0.0
    rows = 0
    for p, samples in enumerate(periods):
        start = time.perf_counter()
        for a, s, t, v in samples:
            # Accepted samples not before the signal's previous quality sample are checked.
            if aligners[a].add(names[s], t, v) == "accepted" and t >= newest[a][s]:
                newest[a][s] = t
                checks[a][s].update(t, v)
        add += time.perf_counter() - start
        now = now_after(p)
        start = time.perf_counter()
        for aligner in aligners:
            rows += len(aligner.advance(now))
        advance += time.perf_counter() - start
        start = time.perf_counter()
        for asset_checks in checks:
            for check in asset_checks:
                check.check(now)
        stale += time.perf_counter() - start
    n = sum(len(samples) for samples in periods)
    return {
        "add+evidence": add / n,
        "advance": advance / rows,
        "stale": stale / (len(periods) * assets * len(names)),
        "rows": rows,
    }


def reference_bytes(assets: int, periods: int) -> float:
    """Bytes per asset held by Aligner + SignalQuality objects after ``periods`` periods."""
    samples = make_periods(assets, periods, seed=3)
    tracemalloc.start()
    before = tracemalloc.get_traced_memory()[0]
    aligners = [Aligner(CONFIG) for _ in range(assets)]
    checks = [[SignalQuality(n, QUALITY[n]) for n in CONFIG.signals] for _ in range(assets)]
    for p, period in enumerate(samples):
        for a, s, t, v in period:
            if aligners[a].add(CONFIG.signals[s], t, v) == "accepted":
                checks[a][s].update(t, v)
        for aligner in aligners:
            aligner.advance(now_after(p))
    held = tracemalloc.get_traced_memory()[0] - before
    tracemalloc.stop()
    return held / assets


def best(runs: int, *works: Callable[[], dict[str, float]]) -> list[dict[str, float]]:
    """Run the works in turn ``runs`` times (interleaved, so load hits both) and keep the best."""
    figures: list[list[dict[str, float]]] = [[] for _ in works]
    for _ in range(runs):
        for done, work in zip(figures, works, strict=True):
            done.append(work())
    return [{key: min(f[key] for f in done) for key in done[0]} for done in figures]


def main() -> None:
    """Time both implementations on the same samples and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=5000, help="assets of the class")
    parser.add_argument("--periods", type=int, default=10, help="sample periods per run")
    parser.add_argument("--batch", type=int, default=500, help="samples per evidence take")
    parser.add_argument("--repeat", type=int, default=3, help="runs per figure (best kept)")
    parser.add_argument(
        "--memory-assets", type=int, default=50, help="reference assets measured for memory"
    )
    args = parser.parse_args()

    periods = make_periods(args.assets, args.periods, seed=1)
    bank, ref = best(
        args.repeat,
        lambda: run_bank(args.assets, periods, args.batch),
        lambda: run_reference(args.assets, periods),
    )
    n_signals = len(CONFIG.signals)
    print(
        f"intake of {args.assets} assets x {n_signals} signals, one sample per signal and "
        f"period, {args.periods} periods, evidence taken every {args.batch} samples, "
        f"best of {args.repeat}"
    )
    print(f"  {'':34} {'IntakeBank':>12} {'reference':>12} {'ratio':>7}")
    for label, key in (
        ("add, per sample", "add"),
        ("add + quality evidence, per sample", "add+evidence"),
        ("advance, per row", "advance"),
        ("stale check, per asset and signal", "stale"),
    ):
        mine = bank[key] * 1e6
        if key in ref:
            theirs = ref[key] * 1e6
            print(f"  {label:34} {mine:9.2f} us {theirs:9.2f} us {theirs / mine:6.1f}x")
        else:
            print(f"  {label:34} {mine:9.2f} us {'':>12}")
    print(f"  rows per run: {int(bank['rows'])} (bank), {int(ref['rows'])} (reference)")

    sized = IntakeBank(CONFIG, QUALITY)
    for _ in range(args.assets):
        sized.add_asset()
    vav = IntakeBank(
        AlignConfig(sample_period_s=TS, output="sat", inputs=("damper", "airflow"), mode="occ"),
        QUALITY,
    )
    for _ in range(args.assets):
        vav.add_asset()
    print("memory per asset")
    for label, b in (("3 signals", sized), ("3 signals + mode", vav)):
        print(
            f"  IntakeBank, {label:17} {b.memory_bytes() / b.n_assets:8.0f} B "
            f"({b.memory_bytes() / b.capacity:.0f} B per allocated slot, "
            f"{b.capacity} slots for {b.n_assets} assets)"
        )
    for periods_run in (20, 1100):
        held = reference_bytes(args.memory_assets, periods_run)
        print(
            f"  reference after {periods_run:4} periods   {held:8.0f} B "
            f"(tracemalloc, {args.memory_assets} assets)"
        )


if __name__ == "__main__":
    main()
