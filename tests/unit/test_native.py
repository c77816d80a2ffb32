"""Compiled back end: the pure and batched kernels' bits, their errors, optional numba."""

import math
import subprocess
import sys
from dataclasses import dataclass

import numpy as np
import pytest

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.batch import BatchRls
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.estimator import ArxEstimator, resolve_backend
from arxwatch.estimators.rls import RlsConfig, kernel_constants, kernel_source

needs_numba = pytest.mark.skipif(
    not native.available(),
    reason="numba is not installed (pip install '.[fast]'): the compiled back end is optional",
)


@dataclass(frozen=True)
class Case:
    """A model size and settings, with the order that gives that size."""

    order: ArxOrder
    config: RlsConfig
    inputs_park: bool  # hold the inputs still for a spell (gate, wind-up)


CASES = {
    # Every guard at once: trace cap far below n * p0, gate, Huber weights.
    "gated-capped": Case(
        ArxOrder(na=2, nb=(2, 1), nk=(1, 0)),
        RlsConfig(forgetting=0.98, p0=1e3, trace_max=50.0, warmup_updates=20, min_input_std=0.05),
        True,
    ),
    "plain-ls": Case(
        ArxOrder(na=2, nb=(2,), nk=(0,), constant=False),
        RlsConfig(forgetting=1.0, p0=1e6, huber_k=None),
        False,
    ),
    "fast-forgetting": Case(
        ArxOrder(na=1, nb=(1,), nk=(1,)),
        RlsConfig(forgetting=0.9, p0=10.0, huber_k=2.0, warmup_updates=0, min_input_std=0.2),
        True,
    ),
    "no-inputs": Case(ArxOrder(na=3, nb=(), nk=()), RlsConfig(huber_k=1.0), False),
}


def bits(values: object) -> list[int]:
    """Return the IEEE-754 bit patterns of float values: equal bits, not just values."""
    return np.asarray(values, dtype=np.float64).view(np.uint64).tolist()


def result_bits(result: tuple) -> list[int]:
    prediction, innovation, normalised, weight, _, excitation = result
    return bits([prediction, innovation, normalised, weight, excitation])


def random_stream(case: Case, n_assets: int, steps: int, seed: int):
    """Yield (phi, y, inputs, active) per step for ``n_assets`` assets.

    Heavy tails, six decades of scale, parked inputs, spikes, non-finite values.
    """
    order = case.order
    n, m = order.n_params, order.n_inputs
    rng = np.random.default_rng(seed)
    truth = rng.uniform(-1.0, 1.0, size=n)
    scale = 10.0 ** rng.uniform(-2.0, 3.0, size=(n_assets, 1))  # six decades of signal size
    input_cols = list(range(order.na, order.na + m))  # a current input sits in phi
    for t in range(steps):
        phi = scale * rng.standard_t(3, size=(n_assets, n))
        if order.constant:
            phi[:, -1] = 1.0
        inputs = phi[:, input_cols].copy() if m else np.zeros((n_assets, 0))
        if case.inputs_park and steps // 4 <= t < steps // 2:
            inputs[:] = 0.4 * scale  # parked: the gate freezes, P would wind up
            phi[:, input_cols] = inputs
        y = phi @ truth + rng.standard_t(2, size=n_assets)  # t(2): Huber weights
        spikes = rng.random(n_assets) < 0.01
        y[spikes] += 1e3 * scale[spikes, 0]
        for target in (phi, y, inputs):
            if target.size:
                broken = rng.random(target.shape) < 0.0005
                target[broken] = rng.choice([math.nan, math.inf, -math.inf], size=broken.sum())
        yield phi, y, inputs, rng.random(n_assets) > 0.1


@needs_numba
@pytest.mark.parametrize("name", sorted(CASES))
def test_compiled_pure_and_batched_agree_bit_for_bit(name: str) -> None:
    # 4 cases x 25 assets x 1000 steps = 10^5 updates of each back end. The
    # reference is the pure-Python kernel; the claim is equality of bits
    # (IEEE-754 operations in the same order, no FMA contraction).
    case = CASES[name]
    n_assets, steps = 25, 1000
    pure = [ArxEstimator(case.order, case.config, "python") for _ in range(n_assets)]
    fast = [ArxEstimator(case.order, case.config, "compiled") for _ in range(n_assets)]
    layout = pure[0].layout
    batch = BatchRls(layout.n_params, layout.n_inputs, n_assets, case.config)
    cap = kernel_constants(layout, case.config)["cap"]
    seen = {"down-weighted": 0, "frozen": 0, "rejected": 0, "capped": 0}
    for t, (phi, y, inputs, active) in enumerate(random_stream(case, n_assets, steps, seed=3)):
        out = batch.update(phi, y, inputs, active)
        for i in np.flatnonzero(active):
            args = (phi[i].tolist(), float(y[i]), inputs[i].tolist())
            try:
                ref = pure[i].step(*args)
            except ValueError as exc:
                with pytest.raises(ValueError) as caught:
                    fast[i].step(*args)
                assert str(caught.value) == str(exc)
                assert out.rejected[i]
                seen["rejected"] += 1
                continue
            got = fast[i].step(*args)
            assert result_bits(got) == result_bits(ref), (t, i)
            assert got.updated is ref.updated
            batched = (out.innovation[i], out.normalised[i], out.weight[i], out.excitation[i])
            assert bits(batched) == bits([ref[1], ref[2], ref[3], ref[5]]), (t, i)
            assert bool(out.updated[i]) == ref.updated
            seen["down-weighted"] += ref.weight < 1.0
            seen["frozen"] += not ref.updated
            if ref.updated and pure[i].n_updates % 16 == 1:
                # At a check the cap scales D so that trace(P) equals it.
                seen["capped"] += math.isclose(pure[i].trace, cap, rel_tol=1e-12)
        if t % 100 == 99 or t == steps - 1:
            for i in range(n_assets):
                state = pure[i].to_state()["rls"]
                assert bits(fast[i].to_state()["rls"]) == bits(state), (t, i)
                assert bits(batch.get_asset(i)) == bits(state), (t, i)
    # Each guard did act, so the equality covers its code path.
    assert seen["rejected"] > 0
    assert seen["down-weighted"] > 0 or case.config.huber_k is None
    assert seen["frozen"] > 0 or case.config.min_input_std is None
    assert seen["capped"] > 0 or case.config.trace_max is None


@needs_numba
def test_the_bit_check_catches_fused_multiply_add() -> None:
    # Witness that bit equality can fail: the same source compiled with
    # fastmath's "contract" flag lets LLVM fuse a * b + c into one rounding
    # (IEEE 754-2019 fusedMultiplyAdd), which changes low bits at once.
    numba = pytest.importorskip("numba")
    llvm = pytest.importorskip("llvmlite.binding")
    if not llvm.get_host_cpu_features().get("fma", False):
        pytest.skip("this processor has no FMA instruction to contract into")
    case = CASES["no-inputs"]
    layout = ArxEstimator(case.order, case.config).layout
    namespace = {"_sqrt": math.sqrt, "_isfinite": math.isfinite, "_inf": math.inf}
    namespace["_NonFinite"] = type("NonFinite", (Exception,), {})
    exec(kernel_source(layout, case.config, "native"), namespace)
    fused = numba.njit(fastmath={"contract"})(namespace["native"])
    constants = np.array(list(kernel_constants(layout, case.config).values()))
    reference = ArxEstimator(case.order, case.config, "compiled")
    state = np.array(reference.to_state()["rls"])
    rng = np.random.default_rng(4)
    for _ in range(200):
        phi = [*rng.normal(size=layout.n_params - 1).tolist(), 1.0]
        y = float(rng.normal())
        reference.step(phi, y, [])
        fused(state, constants, *phi, y)
    assert bits(state) != bits(reference.to_state()["rls"])


@needs_numba
@pytest.mark.parametrize("name", sorted(CASES))
def test_both_back_ends_refuse_wrong_lengths_with_the_same_words(name: str) -> None:
    case = CASES[name]
    pure = ArxEstimator(case.order, case.config, "python")
    fast = ArxEstimator(case.order, case.config, "compiled")
    n, m = case.order.n_params, case.order.n_inputs
    for phi, u in (([1.0] * (n + 1), [1.0] * m), ([1.0] * n, [1.0] * (m + 1)), ([], [])):
        messages = []
        for est in (pure, fast):
            before = est.to_state()
            with pytest.raises(DimensionError, match=f"phi needs {n} and inputs {m} values") as e:
                est.step(phi, 1.0, u)
            messages.append(str(e.value))
            assert est.to_state() == before
        assert messages[0] == messages[1]


@needs_numba
def test_compiled_takes_ints_and_numpy_values_as_the_pure_path_does() -> None:
    # int -> float64 is exact below 2**53 in both (Python's int * float
    # converts the int first); numpy float64 scalars are floats.
    order = ArxOrder(na=1, nb=(1,), nk=(1,))
    pure, fast = ArxEstimator(order, backend="python"), ArxEstimator(order, backend="compiled")
    for k in range(60):
        phi, y, u = [k % 7, 1 - k % 3, 1], k % 5, [k % 2]
        assert result_bits(fast.step(phi, y, u)) == result_bits(pure.step(phi, y, u))
        row = np.array([0.5 * k, -1.0, 1.0])
        assert result_bits(fast.step(row, np.float64(k), row[1:2])) == result_bits(
            pure.step(row, np.float64(k), row[1:2])
        )
    assert fast.to_state() == pure.to_state()
    assert all(type(v) is float for v in fast.to_state()["rls"])


@needs_numba
def test_one_compilation_serves_every_setting_of_a_structure() -> None:
    # Settings are run-time constants: kernels of two forgetting factors share
    # the compiled code, and still each follow their own setting.
    order = ArxOrder(na=1, nb=(1,), nk=(1,))
    slow = ArxEstimator(order, RlsConfig(forgetting=0.999), "compiled")
    quick = ArxEstimator(order, RlsConfig(forgetting=0.9), "compiled")
    assert slow._kernel.__globals__["_native"] is quick._kernel.__globals__["_native"]
    twins = (ArxEstimator(order, RlsConfig(forgetting=0.999)), ArxEstimator(order, quick.config))
    rng = np.random.default_rng(9)
    for _ in range(300):
        u = [float(rng.normal())]
        y = float(rng.normal())
        for est in (slow, quick, *twins):
            est.update(y, u)
    assert slow.to_state() == twins[0].to_state()
    assert quick.to_state() == twins[1].to_state()
    assert slow.to_state() != quick.to_state()


def test_backend_names_are_checked() -> None:
    order = ArxOrder(na=1, nb=(1,), nk=(1,))
    with pytest.raises(ValueError, match=r"backend must be one of .* got 'numba'"):
        ArxEstimator(order, backend="numba")  # type: ignore[arg-type]
    assert ArxEstimator(order).backend == "python"  # the default compiles nothing
    assert ArxEstimator(order, backend="auto").backend == (
        "compiled" if native.available() else "python"
    )


def test_without_numba_auto_falls_back_and_compiled_says_what_to_install(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setattr(native, "available", lambda: False)
    assert resolve_backend("auto") == "python"
    with pytest.raises(ImportError, match=r"needs numba: pip install 'arxwatch\[fast\]'"):
        ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), backend="compiled")


def test_the_package_and_the_python_back_end_never_load_numba() -> None:
    code = (
        "import sys\n"
        "from arxwatch.estimators import ArxEstimator, ArxOrder, BatchRls\n"
        "est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), backend='python')\n"
        "est.update(1.0, [0.5]); est.update(2.0, [0.1])\n"
        "BatchRls(3, 1, 4)\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] in ('numba', 'llvmlite')))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
