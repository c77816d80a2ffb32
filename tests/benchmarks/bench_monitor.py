"""Benchmark of the drift monitor: per-sample cost against the estimator alone.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_monitor.py [--days D] [--repeat R]

On a simulated air-handler loop (60 s samples, fault-free) it times, per
sample, the RLS update alone (ArxEstimator.update) and the whole
AssetMonitor.step on the same samples (baseline residual, prewhitening,
innovation detectors, hourly feature Wald test and physical bands, alert
lifecycle), best of R interleaved runs in this thread's CPU time (so
that other processes on a shared machine do not skew a figure), and
prints what the detectors add as a ratio to the estimator: of the best
figures, and the median (and range) of each run against its own reference
timed just before it. Each added cost is then split in two: the innovation
path alone (the same monitor with ``evaluate_every`` beyond the run, so
that the parameter-based evaluations never fall due: baseline residual,
prewhitening, CUSUM, variance, whiteness, their alert lifecycle) and the
rest, the hourly evaluations (feature Wald test, physical bands, read-out).

Then the same for many assets at once (``--assets N``, default 200, 1,000
and 5,000), per asset-row, with the fleet's array memory per asset, for
each back end of FleetMonitor against its own estimator alone on the same
rows:

- numpy (``backend="python"``, what ``arxwatch run`` uses): FleetMonitor.step,
  which does everything AssetMonitor does for every asset of a sample time
  in one vectorised pass, against the estimate alone from the same samples
  (each row's regressor from the histories, BatchRls.update, the histories
  pushed: what ArxEstimator.update does per asset); the bare update on
  ready-made regressors is printed beside it;
- compiled (``backend="compiled"``, numba, the ``fast`` extra, what
  ``arxwatch replay`` uses when numba is installed): the innovation
  detectors and the live estimate a row at a time in compiled code (waves
  of up to ``COMPILED_ROWS`` = 1,024 assets of one order; larger ones run
  the numpy path, so the compiled figures are skipped there),
  against its live estimate alone (``fleetnative.group_kernels(...).live``: regressor
  from the histories, RLS update, histories pushed, the same compiled call
  the fleet makes).
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.fleet import COMPILED_ROWS, FleetMonitor
from arxwatch.daemon.fleetnative import group_kernels
from arxwatch.daemon.monitor import AssetMonitor, MonitorConfig
from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.estimators.arx import regression_matrix
from arxwatch.estimators.baseline import Baseline, BaselineSet, fit_baseline
from arxwatch.estimators.batch import BatchRls
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.native import available
from arxwatch.estimators.rls import StateLayout

TS = 60.0
#: CPU time of this thread: on a shared machine another process's burst does
#: not land in a figure (each runs single-threaded), so the ratios hold.
clock = time.thread_time
PER_DAY = 1440
#: The monitor's settings with the parameter-based evaluations never due
#: (evaluate_every sample periods past any sample time): it times the
#: innovation path alone.
INNOVATION_ONLY = MonitorConfig(evaluate_every=10**9)
LOOP = REFERENCE_LOOPS["first-order+dead-time"]
NAMES = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))


def main() -> None:
    """Time the estimator alone and the whole monitor on the same samples."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=3.0, help="simulated days per run")
    parser.add_argument("--repeat", type=int, default=3, help="runs per figure (best kept)")
    parser.add_argument(
        "--assets", type=int, nargs="*", default=[200, 1000, 5000], help="fleet sizes to time"
    )
    parser.add_argument(
        "--steps",
        type=int,
        default=1440,
        help="sample times per fleet run; the first half warms up (prewhitening, settling)",
    )
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
        start = clock()
        for k in range(n):
            est.update(y[k], inputs[k])
        return (clock() - start) / n

    def monitor(config: MonitorConfig | None = None) -> float:
        mon = AssetMonitor("a", BaselineSet((baseline,)), NAMES, config)
        start = clock()
        for k in range(n):
            mon.step(1.7e9 + k * TS, y[k], inputs[k])
        return (clock() - start) / n

    best = {"estimator": float("inf"), "monitor": float("inf"), "innovation": float("inf")}
    pairs = []
    for _ in range(args.repeat):
        pairs.append((estimator_only(), monitor()))
        best["estimator"] = min(best["estimator"], pairs[-1][0])
        best["monitor"] = min(best["monitor"], pairs[-1][1])
        best["innovation"] = min(best["innovation"], monitor(INNOVATION_ONLY))
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
    print(f"  {'':39s} {paired(pairs)}")
    print(split(est_us, best["innovation"] * 1e6, mon_us, "us/sample", 2))
    for count in args.assets:
        fleet_figures(baseline, count, args.steps, args.repeat)


def paired(runs: list[tuple[float, float]]) -> str:
    """Describe the added cost of each run against its own reference, timed just before it.

    Best-of figures can pair a quiet moment of one timer with a busy one of
    the other; a run and its reference, back to back, share their moment.
    """
    ratios = [(whole - ref) / ref for ref, whole in runs]
    return (
        f"paired runs: median {statistics.median(ratios):.2f}x "
        f"({min(ratios):.2f}x to {max(ratios):.2f}x over {len(ratios)})"
    )


def split(reference: float, innovation: float, whole: float, unit: str, indent: int) -> str:
    """Split the added cost into the innovation path's and the evaluations' (best-of figures).

    ``indent`` is the figures' indent (2 per asset, 4 for a fleet back end),
    whose labels and numbers these lines line up with.
    """
    width, digits = 41 - indent, 2 if indent == 2 else 0
    lines = []
    for label, added in (
        ("  of which the innovation path", innovation - reference),
        ("  of which the hourly evaluations", whole - innovation),
    ):
        lines.append(
            f"{'':{indent}s}{label:{width}s} {added:8.{digits}f} {unit}"
            f"   = {added / reference:5.2f}x the estimator"
        )
    return "\n".join(lines)


def fleet_figures(baseline: Baseline, count: int, steps: int, repeat: int) -> None:
    """Print the batched RLS update and the FleetMonitor per asset-row at ``count`` assets."""
    series = 16  # distinct simulated loops, tiled over the assets
    u = np.stack([daily_operation(steps, TS, seed=100 + j) for j in range(series)], axis=1)
    y = np.stack([LOOP.simulate(u[:, j], seed=200 + j) for j in range(series)], axis=1)
    pick = np.arange(count) % series
    # (steps, count), rows contiguous as the service's rows are (u[:, pick] alone is
    # column-major: every fleet step would first copy its row)
    u_all, y_all = np.ascontiguousarray(u[:, pick]), np.ascontiguousarray(y[:, pick])
    order = baseline.order
    # ready-made regressors for the RLS-only figure (what the fleet builds itself)
    phi = np.zeros((steps, count, order.n_params))
    for j in range(series):
        rows, _ = regression_matrix(order, y[:, j], u[:, j : j + 1])
        phi[steps - rows.shape[0] :, pick == j] = rows[:, None, :]
    monitor_config = MonitorConfig()
    config = monitor_config.rls  # the fleet's own settings, for both references
    times = 1.7e9 + TS * np.arange(steps)
    slots = np.arange(count)
    modes: list[str | None] = [None] * count
    no_restart = np.zeros(count, dtype=bool)
    started = np.random.default_rng(7).integers(0, 60, size=count)  # first sample of each asset

    # Timed after a warm-up: the prewhitening reference (480 samples) and the
    # settling of the live estimate (500) are a start-up cost, paid once.
    warm = steps // 2
    timed = steps - warm

    def per_row(run: Callable[[int], object], first: int = 0) -> float:
        """Run sample times ``first`` to the end; return the CPU time per asset-row timed."""
        for k in range(first, warm):
            run(k)
        start = clock()
        for k in range(warm, steps):
            run(k)
        return (clock() - start) / (timed * count)

    def rls_only() -> float:
        batch = BatchRls(order.n_params, 1, count, config)
        return per_row(lambda k: batch.update(phi[k], y_all[k], u_all[k][:, None]))

    def estimate_only() -> float:
        """Time the numpy estimate from samples: regressor from histories, update, push.

        What ArxEstimator.update does per asset and the fleet's numpy path
        does per wave (step 2 of _Group.step), with BatchRls.update.
        """
        batch = BatchRls(order.n_params, 1, count, config)
        hist_y = np.zeros((order.na, count))
        hist_u = np.zeros((max(order.input_depth - 1, 0), count))
        (nb,), (nk,) = order.nb, order.nk
        ones = np.ones(count)

        def run(k: int) -> None:
            u_k, y_k = u_all[k], y_all[k]
            columns = [-hist_y[j] for j in range(order.na)]
            columns += [u_k if lag == 0 else hist_u[lag - 1] for lag in range(nk, nk + nb)]
            if order.constant:
                columns.append(ones)
            batch.update(np.stack(columns, axis=1), y_k, u_k[:, None])
            hist_y[1:] = hist_y[:-1].copy()
            hist_y[0] = y_k
            hist_u[1:] = hist_u[:-1].copy()
            hist_u[0] = u_k

        return per_row(run)

    def live_only() -> float:
        """Time the compiled fleet's live estimate alone, called as the fleet calls it."""
        layout = StateLayout(order.n_params, order.n_inputs)
        kernels = group_kernels(
            layout, config, monitor_config.prewhiten.ar_order, monitor_config.whiteness.lags
        )
        kernel, constants = kernels.live, kernels.constants
        # the entries of _Group.structure that live reads: constant, depth
        structure = np.array([order.na, order.constant, order.depth, 0, 0, 0, 0])
        nb, nk = np.array(order.nb), np.array(order.nk)
        hist_u = max(order.input_depth - 1, 0)
        rls_y, rls_u = np.zeros((order.na, count)), np.zeros((1, hist_u, count))
        rls_count, samples = np.zeros(count, dtype=np.int16), np.zeros(count, dtype=np.int64)
        rls = np.tile(np.array(layout.initial(config.p0))[:, None], (1, count))

        def run(k: int) -> None:
            out = np.zeros(count, dtype=np.int64)
            kernel(slots, y_all[k], u_all[k][:, None], structure, nb, nk, rls_y, rls_u,
                   rls_count, rls, samples, constants, out)  # fmt: skip

        return per_row(run)

    def fleet(backend: str, config: MonitorConfig | None = None) -> float:
        mon = FleetMonitor(NAMES, config, backend=backend)  # type: ignore[arg-type]
        for a in range(count):
            mon.add_asset(f"vav-{a}", BaselineSet((baseline,)))

        def run(k: int) -> None:
            mon.step(
                slots, np.full(count, times[k]), y_all[k], u_all[k][:, None], modes, no_restart
            )

        # The assets start over an hour, as a site's do (commissioned, back
        # from a gap or a restart at different times): their samples are
        # not in step with each other's.
        for k in range(60):
            rows = slots[started <= k]
            mon.step(rows, np.full(rows.shape[0], times[k]), y_all[k, rows],
                     u_all[k, rows][:, None], modes[: rows.shape[0]], no_restart[rows])  # fmt: skip
        return per_row(run, first=60)

    # back end -> (reference label, reference timer); "rls" is a bare-update figure beside them
    backends: dict[str, tuple[str, Callable[[], float]]] = {
        "python": ("estimate alone (phi, RLS, histories)", estimate_only)
    }
    if available() and count <= COMPILED_ROWS:  # larger waves run the numpy path
        backends["compiled"] = ("live estimate alone (kernels.live)", live_only)
    parts = ("reference", "fleet", "innovation")
    best = {f"{b}/{part}": float("inf") for b in backends for part in parts}
    best["rls"] = float("inf")
    runs: dict[str, list[tuple[float, float]]] = {b: [] for b in backends}
    for _ in range(repeat):  # interleaved, so a busy moment hits every figure alike
        best["rls"] = min(best["rls"], rls_only())
        for backend, (_, reference) in backends.items():
            runs[backend].append((reference(), fleet(backend)))
            ref_s, fleet_s = runs[backend][-1]
            best[f"{backend}/reference"] = min(best[f"{backend}/reference"], ref_s)
            best[f"{backend}/fleet"] = min(best[f"{backend}/fleet"], fleet_s)
            innovation_s = fleet(backend, INNOVATION_ONLY)
            best[f"{backend}/innovation"] = min(best[f"{backend}/innovation"], innovation_s)
    mon = FleetMonitor(NAMES)
    for a in range(count):
        mon.add_asset(f"vav-{a}", BaselineSet((baseline,)))
    print(f"{count:,} assets in one fleet, {timed} sample times timed after {warm} of warm-up")
    for backend, (label, _) in backends.items():
        ref_ns, fleet_ns = best[f"{backend}/reference"] * 1e9, best[f"{backend}/fleet"] * 1e9
        print(f"  {backend} back end")
        if backend == "python":
            rls_ns = best["rls"] * 1e9
            print(f"    {'RLS update alone (BatchRls.update)':37s} {rls_ns:8.0f} ns/asset-row")
        print(f"    {label:37s} {ref_ns:8.0f} ns/asset-row")
        print(f"    {'whole fleet (FleetMonitor.step)':37s} {fleet_ns:8.0f} ns/asset-row")
        print(
            f"    {'detectors and lifecycle add':37s} {fleet_ns - ref_ns:8.0f} ns/asset-row"
            f"   = {(fleet_ns - ref_ns) / ref_ns:5.2f}x the estimator (target <= 1x)"
        )
        print(f"    {'':37s} {paired(runs[backend])}")
        innovation_ns = best[f"{backend}/innovation"] * 1e9
        print(split(ref_ns, innovation_ns, fleet_ns, "ns/asset-row", 4))
    if available() and "compiled" not in backends:
        print(f"  compiled back end: waves over {COMPILED_ROWS:,} rows run the numpy path (above)")
    print(
        f"  fleet arrays                            {mon.memory_bytes() / count:8.0f} bytes/asset"
    )


if __name__ == "__main__":
    main()
