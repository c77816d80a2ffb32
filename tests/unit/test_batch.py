"""Batched engine: same numbers as the per-asset path, masks, shapes."""

import numpy as np
import pytest

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.batch import BatchRls
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig


@pytest.mark.parametrize("gated", [False, True])
def test_batch_equals_per_asset_path(gated: bool) -> None:
    cfg = RlsConfig(
        forgetting=0.98, p0=1e3, warmup_updates=10, min_input_std=0.3 if gated else None
    )
    rng = np.random.default_rng(11)
    n_assets, steps = 40, 1500
    batch = BatchRls(6, 2, n_assets, cfg)
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 1))
    singles = [ArxEstimator(order, cfg) for _ in range(n_assets)]
    truth = np.array([-0.5, 0.1, 0.8, 0.3, -0.4, 0.2])
    for t in range(steps):
        phi = rng.normal(size=(n_assets, 6))
        if gated and 500 <= t < 900:
            phi[:, 2:5] = 0.25  # inputs parked: the gate freezes
        phi[:, 5] = 1.0
        y = phi @ truth + 0.05 * rng.standard_t(3, size=n_assets)
        inputs = phi[:, [2, 4]]
        active = rng.random(n_assets) > 0.2
        out = batch.update(phi, y, inputs, active)
        for i in np.flatnonzero(active):
            ref = singles[i].step(phi[i].tolist(), float(y[i]), inputs[i].tolist())
            assert out.innovation[i] == pytest.approx(ref.innovation, rel=1e-9, abs=1e-12)
            assert bool(out.updated[i]) == ref.updated
    for i, single in enumerate(singles):
        np.testing.assert_allclose(
            batch.get_asset(i), single.to_state()["rls"], rtol=1e-9, atol=1e-300
        )


def test_inactive_and_non_finite_assets_are_untouched() -> None:
    batch = BatchRls(2, 1, 3)
    before = [batch.get_asset(i) for i in range(3)]
    phi = np.array([[1.0, 2.0], [np.nan, 1.0], [1.0, 1.0]])
    out = batch.update(phi, np.array([1.0, 1.0, 1.0]), phi[:, 1:], active=[True, True, False])
    assert out.updated.tolist() == [True, False, False]
    assert out.rejected.tolist() == [False, True, False]
    assert batch.get_asset(1) == before[1] and batch.get_asset(2) == before[2]
    assert batch.get_asset(0) != before[0]
    assert np.isnan(out.innovation[1]) and np.isnan(out.innovation[2])


def test_state_is_small() -> None:
    # Target from the design: <= 512 bytes per asset for n = 6.
    assert BatchRls(6, 2, 10).state_bytes_per_asset <= 512


def test_shape_errors_name_the_argument() -> None:
    batch = BatchRls(3, 1, 4)
    with pytest.raises(DimensionError, match=r"phi must have shape \(4, 3\)"):
        batch.update(np.zeros((4, 2)), np.zeros(4), np.zeros((4, 1)))
    with pytest.raises(DimensionError, match="n_assets must be"):
        BatchRls(3, 1, 0)
    with pytest.raises(DimensionError, match="asset state needs"):
        batch.set_asset(0, [0.0])


@pytest.mark.parametrize("gated", [False, True])
def test_chunks_give_the_same_bits_and_update_in_place(gated: bool) -> None:
    # The vectorised kernel writes into the state arrays, so chunks of views
    # must give exactly what one call over all assets gives.
    cfg = RlsConfig(forgetting=0.97, p0=1e2, warmup_updates=5, min_input_std=0.3 if gated else None)
    rng = np.random.default_rng(12)
    whole, chunked = BatchRls(4, 1, 23, cfg), BatchRls(4, 1, 23, cfg, chunk=5)
    arrays = list(chunked._state)
    for t in range(120):
        phi = rng.normal(size=(23, 4))
        if gated and 40 <= t < 80:
            phi[:, 1] = 0.5
        y = phi @ np.array([0.3, -0.2, 0.1, 1.0]) + 0.1 * rng.normal(size=23)
        active = None if t % 2 else rng.random(23) > 0.3
        a = whole.update(phi, y, phi[:, 1:2], active)
        b = chunked.update(phi, y, phi[:, 1:2], active)
        for field in ("innovation", "normalised", "weight", "excitation", "updated"):
            np.testing.assert_array_equal(getattr(a, field), getattr(b, field))
    assert all(x is y for x, y in zip(chunked._state, arrays, strict=True))
    for i in range(23):
        assert whole.get_asset(i) == chunked.get_asset(i)


def test_trace_check_falls_on_the_same_updates_as_the_per_asset_path() -> None:
    # The batch marks the due assets without a float remainder; a tight cap
    # shows when the scaling happened, as in the per-asset path.
    cfg = RlsConfig(forgetting=0.9, p0=10.0, trace_max=5.0, huber_k=None)
    batch = BatchRls(2, 1, 2, cfg)
    single = ArxEstimator(ArxOrder(na=0, nb=(1,), nk=(0,)), cfg)
    batch.set_asset(1, single.to_state()["rls"][:-2] + [7.0, 7.0])
    for k in range(40):
        phi = np.array([[1.0, 0.5 * k], [1.0, 0.5 * k]])
        batch.update(phi, np.array([1.0, 1.0]), phi[:, :1])
        ref = single.step(phi[0].tolist(), 1.0, [1.0])
        assert batch.get_asset(0) == single.to_state()["rls"], k
        assert ref.updated
    assert batch.get_asset(1) != batch.get_asset(0)


def test_chunk_must_be_positive() -> None:
    with pytest.raises(ValueError, match="chunk must be"):
        BatchRls(2, 1, 3, chunk=0)
