"""Every streaming estimator through one suite: untouched inputs, clone, state."""

import copy
import dataclasses
import functools
import json
from collections.abc import Callable

import numpy as np
import pytest

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.codec import decode_estimator, encode_estimator
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig

NO_NUMBA = "numba is not installed (pip install '.[fast]'): the compiled back end is optional"

MODELS: dict[str, tuple[ArxOrder, RlsConfig]] = {
    "default": (ArxOrder(na=1, nb=(1,), nk=(1,)), RlsConfig()),
    "plain-ls": (
        ArxOrder(na=2, nb=(2,), nk=(0,), constant=False),
        RlsConfig(forgetting=1.0, huber_k=None),
    ),
    "gated-two-inputs": (
        ArxOrder(na=2, nb=(1, 2), nk=(3, 1)),
        RlsConfig(forgetting=0.97, min_input_std=0.01, warmup_updates=5),
    ),
    "no-inputs": (ArxOrder(na=3, nb=(), nk=()), RlsConfig()),
}
# Each model on each back end; the compiled one is skipped without numba.
FACTORIES: dict[str, Callable[[], ArxEstimator]] = {
    f"{name}-{backend}": functools.partial(ArxEstimator, order, config, backend)
    for name, (order, config) in MODELS.items()
    for backend in ("python", "compiled")
}


def stream(est: ArxEstimator, n: int = 120, seed: int = 0) -> list:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        u = rng.normal(size=est.order.n_inputs).tolist()
        out.append(est.update(float(rng.normal()), u))
    return out


@pytest.fixture(
    params=[
        pytest.param(
            name,
            marks=pytest.mark.skipif(
                name.endswith("-compiled") and not native.available(), reason=NO_NUMBA
            ),
        )
        for name in sorted(FACTORIES)
    ]
)
def factory(request: pytest.FixtureRequest) -> Callable[[], ArxEstimator]:
    return FACTORIES[request.param]


def test_inputs_are_left_untouched(factory: Callable[[], ArxEstimator]) -> None:
    est = factory()
    stream(est, 30)
    phi = [0.5] * est.order.n_params
    inputs = [0.25] * est.order.n_inputs
    saved = (copy.copy(phi), copy.copy(inputs))
    est.step(phi, 1.0, inputs)
    assert (phi, inputs) == saved


def test_clone_is_an_untrained_twin_and_idempotent(factory: Callable[[], ArxEstimator]) -> None:
    est = factory()
    stream(est)
    twin = est.clone()
    assert twin.to_state() == factory().to_state()
    assert twin.clone().to_state() == twin.to_state()
    assert (twin.order, twin.config) == (est.order, est.config)


def test_state_round_trip_continues_identically(factory: Callable[[], ArxEstimator]) -> None:
    est = factory()
    stream(est, seed=1)
    again = decode_estimator(json.loads(json.dumps(encode_estimator(est))))
    assert stream(est, seed=2) == stream(again, seed=2)


def test_settings_are_frozen_and_defaults_shared_safely(
    factory: Callable[[], ArxEstimator],
) -> None:
    est = factory()
    with pytest.raises(dataclasses.FrozenInstanceError):
        est.config.forgetting = 0.5  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        est.order.na = 9  # type: ignore[misc]
    stream(est)
    assert factory().to_state() != est.to_state()  # no learned state leaks via defaults


def test_public_methods_are_documented(factory: Callable[[], ArxEstimator]) -> None:
    est = factory()
    for name in ("update", "step", "predict", "reset", "clone", "to_state", "load_state"):
        assert getattr(type(est), name).__doc__, name
