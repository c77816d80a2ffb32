"""Benchmark of the numerical core: per-sample RLS cost against references.

Prints figures; asserts nothing. Run from the repository root:

    python tests/benchmarks/bench_core.py [--samples N] [--repeat R]

The per-asset path (``ArxEstimator.step``) on the pure-Python back end and
on the compiled one (numba), the batched engine at 1,000 and 10,000 assets,
and, in the same run as references, padasip's ``FilterRLS`` and
statsmodels' ``RecursiveLS.fit`` (install them and numba with ``pip install
'.[bench]'``). Each figure is the best of ``--repeat`` runs, so background
load inflates it less; the repeats of all contenders are interleaved, so
each figure samples the same spells of background load and the ratios
compare like with like. The compiled back end's compilation is timed once,
before the runs: the first in the process (numba's own set-up included),
then one more model structure.
"""

from __future__ import annotations

import argparse
import time
import warnings
from collections.abc import Callable

import numpy as np

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.batch import BatchRls
from arxwatch.estimators.estimator import ArxEstimator, Backend
from arxwatch.estimators.rls import RlsConfig

N_PARAMS = 6
LAMBDA = 0.995
ORDER = ArxOrder(na=2, nb=(2, 1), nk=(1, 0))  # 6 parameters, 2 inputs


Timer = Callable[[], float]


def best_of(repeat: int, runs: dict[str, Timer | None]) -> dict[str, float]:
    """Smallest of ``repeat`` timings (seconds) of each run, taken in turns."""
    timers = {name: run for name, run in runs.items() if run is not None}
    best = dict.fromkeys(timers, float("inf"))
    for _ in range(repeat):
        for name, run in timers.items():
            best[name] = min(best[name], run())
    return best


def data(samples: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Random regressors and outputs of a known linear model."""
    rng = np.random.default_rng(seed)
    phi = rng.normal(size=(samples, N_PARAMS))
    phi[:, -1] = 1.0
    y = phi @ np.linspace(-0.5, 0.5, N_PARAMS) + 0.1 * rng.normal(size=samples)
    return phi, y


def per_asset(samples: int, backend: Backend) -> Timer:
    """Timer: seconds per sample of ArxEstimator.step on ``backend``."""
    phi, y = data(samples)
    rows, ys, ins = phi.tolist(), y.tolist(), phi[:, [2, 4]].tolist()

    def run() -> float:
        est = ArxEstimator(ORDER, RlsConfig(forgetting=LAMBDA), backend)
        step = est.step
        start = time.perf_counter()
        for r, v, i in zip(rows, ys, ins, strict=True):
            step(r, v, i)
        return (time.perf_counter() - start) / samples

    return run


def batched(n_assets: int, steps: int) -> Timer:
    """Timer: seconds per asset-update of BatchRls.update at ``n_assets``."""
    rng = np.random.default_rng(1)
    phis = rng.normal(size=(steps, n_assets, N_PARAMS))
    phis[:, :, -1] = 1.0
    ys = phis @ np.linspace(-0.5, 0.5, N_PARAMS) + 0.1 * rng.normal(size=(steps, n_assets))
    ins = np.ascontiguousarray(phis[:, :, [2, 4]])

    def run() -> float:
        batch = BatchRls(N_PARAMS, 2, n_assets, RlsConfig(forgetting=LAMBDA))
        start = time.perf_counter()
        for t in range(steps):
            batch.update(phis[t], ys[t], ins[t])
        return (time.perf_counter() - start) / (steps * n_assets)

    return run


def padasip_rls(samples: int) -> Timer | None:
    """Timer: seconds per sample of padasip FilterRLS.adapt, or None if absent."""
    try:
        import padasip
    except ImportError:
        return None
    phi, y = data(samples)

    def run() -> float:
        f = padasip.filters.FilterRLS(N_PARAMS, mu=LAMBDA, w="zeros")
        start = time.perf_counter()
        for k in range(samples):
            f.adapt(y[k], phi[k])
        return (time.perf_counter() - start) / samples

    return run


def statsmodels_rls(samples: int) -> Timer | None:
    """Timer: seconds per sample of statsmodels RecursiveLS(...).fit(), or None."""
    try:
        import statsmodels.api as sm
    except ImportError:
        return None
    phi, y = data(samples)

    def run() -> float:
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            sm.RecursiveLS(y, phi).fit()
        return (time.perf_counter() - start) / samples

    return run


def compile_seconds() -> tuple[float, float] | None:
    """Seconds to build the compiled back end: first in the process, then one more structure.

    None when numba is not installed. Must run before anything else compiles.
    """
    if not native.available():
        return None
    start = time.perf_counter()
    ArxEstimator(ORDER, RlsConfig(forgetting=LAMBDA), "compiled")
    first = time.perf_counter() - start
    start = time.perf_counter()
    ArxEstimator(ORDER, RlsConfig(forgetting=LAMBDA, min_input_std=0.01), "compiled")
    return first, time.perf_counter() - start


def line(label: str, figure: str, note: str = "") -> str:
    """One row of the printed table: label, number and unit, note."""
    number, _, unit = figure.strip().partition(" ")
    return f"  {label:42s}{number:>9s} {unit:16s}{note}".rstrip()


def reference_line(label: str, seconds: float, ours: dict[str, float]) -> str:
    """One reference's figure and its ratio to each per-asset back end."""
    ratios = ", ".join(f"{seconds / value:5.2f}x {name}" for name, value in ours.items())
    return line(label, f"{seconds * 1e6:8.2f} us/sample", f"ratio {ratios}  (target >= 4x)")


def main() -> None:
    """Run every benchmark and print a table with ratios and targets."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=int, default=20_000, help="samples per scalar run")
    parser.add_argument("--repeat", type=int, default=5, help="runs per figure (best kept)")
    args = parser.parse_args()

    compiled = compile_seconds()
    best = best_of(
        args.repeat,
        {
            "python": per_asset(args.samples, "python"),
            "compiled": per_asset(args.samples, "compiled") if compiled is not None else None,
            "pad": padasip_rls(args.samples),
            "smd": statsmodels_rls(args.samples),
            "b1k": batched(1_000, 200),
            "b10k": batched(10_000, 60),
        },
    )
    ours = {name: best[name] for name in ("python", "compiled") if name in best}
    b1k, b10k = best["b1k"], best["b10k"]
    pad, smd = best.get("pad"), best.get("smd")
    state = BatchRls(N_PARAMS, 2, 1).state_bytes_per_asset
    python = ours["python"]

    print(f"RLS update, n = {N_PARAMS} parameters, lambda = {LAMBDA}")
    print(line("per-asset path, python (ArxEstimator.step)", f"{python * 1e6:8.2f} us/sample"))
    if compiled is None:
        print(
            line(
                "per-asset path, compiled", "n/a", "numba is not installed (pip install '.[fast]')"
            )
        )
    else:
        fast = ours["compiled"]
        print(
            line(
                "per-asset path, compiled (numba)",
                f"{fast * 1e6:8.2f} us/sample",
                f"{python / fast:5.2f}x the python path",
            )
        )
    if pad is not None:
        print(reference_line("padasip FilterRLS.adapt (reference)", pad, ours))
    if smd is not None:
        print(reference_line("statsmodels RecursiveLS.fit (reference)", smd, ours))
    if compiled is not None:
        first, another = compiled
        print(line("compile, first in a process", f"{first:.2f} s", "numba's set-up included"))
        print(line("compile, one more model structure", f"{another:.2f} s"))
    print(
        line(
            "batched, 1,000 assets",
            f"{b1k * 1e9:8.1f} ns/asset-update",
            f"{python / b1k:6.1f}x the python per-asset path",
        )
    )
    print(
        line(
            "batched, 10,000 assets",
            f"{b10k * 1e9:8.1f} ns/asset-update",
            f"{python / b10k:6.1f}x the python per-asset path  (target <= 150 ns)",
        )
    )
    print(line("batched state", f"{state:8d} bytes/asset", "(target <= 512)"))


if __name__ == "__main__":
    main()
