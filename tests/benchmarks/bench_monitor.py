"""Benchmark of the drift monitor: per-sample cost against the estimator alone.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_monitor.py [--days D] [--repeat R]

On a simulated air-handler loop (60 s samples, fault-free) it times, per
sample, the RLS update alone (ArxEstimator.update) and the whole
AssetMonitor.step on the same samples (baseline residual, prewhitening,
innovation detectors, hourly feature Wald test and physical bands, alert
lifecycle), best of R interleaved runs, and prints what the detectors add
as a ratio to the estimator.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.monitor import AssetMonitor
from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.estimators.baseline import BaselineSet, fit_baseline
from arxwatch.estimators.estimator import ArxEstimator

TS = 60.0
PER_DAY = 1440
LOOP = REFERENCE_LOOPS["first-order+dead-time"]
NAMES = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))


def main() -> None:
    """Time the estimator alone and the whole monitor on the same samples."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=3.0, help="simulated days per run")
    parser.add_argument("--repeat", type=int, default=3, help="runs per figure (best kept)")
    args = parser.parse_args()

    u0 = daily_operation(2 * PER_DAY, TS, seed=1)
    result = fit_baseline(
        LOOP.simulate(u0, seed=2), u0[:, None], np.arange(len(u0)) * TS, sample_period_s=TS
    )
    assert result.baseline is not None, result.reasons
    baseline = result.baseline
    n = int(args.days * PER_DAY)
    u = daily_operation(n, TS, seed=5).tolist()
    y = LOOP.simulate(np.asarray(u), seed=6).tolist()
    inputs = [[v] for v in u]

    def estimator_only() -> float:
        est = ArxEstimator(baseline.order)
        start = time.perf_counter()
        for k in range(n):
            est.update(y[k], inputs[k])
        return (time.perf_counter() - start) / n

    def monitor() -> float:
        mon = AssetMonitor("a", BaselineSet((baseline,)), NAMES)
        start = time.perf_counter()
        for k in range(n):
            mon.step(1.7e9 + k * TS, y[k], inputs[k])
        return (time.perf_counter() - start) / n

    best = {"estimator": float("inf"), "monitor": float("inf")}
    for _ in range(args.repeat):
        best["estimator"] = min(best["estimator"], estimator_only())
        best["monitor"] = min(best["monitor"], monitor())
    est_us, mon_us = best["estimator"] * 1e6, best["monitor"] * 1e6
    print(
        f"drift monitor, order {baseline.order.na}/{baseline.order.nb}/{baseline.order.nk}, "
        f"{baseline.order.n_params} parameters, {n} samples per run"
    )
    print(f"  estimator alone (ArxEstimator.update)   {est_us:8.2f} us/sample")
    print(f"  whole monitor (AssetMonitor.step)       {mon_us:8.2f} us/sample")
    print(
        f"  detectors and lifecycle add             {mon_us - est_us:8.2f} us/sample"
        f"   = {(mon_us - est_us) / est_us:5.2f}x the estimator (target <= 1x)"
    )


if __name__ == "__main__":
    main()
