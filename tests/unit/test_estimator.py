"""Per-asset estimator object: lifecycle, clone, checkpoints."""

import json

import numpy as np
import pytest

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.codec import CodecError, decode_estimator, encode_estimator
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig

NO_NUMBA = "numba is not installed (pip install '.[fast]'): the compiled back end is optional"


@pytest.fixture(
    params=[
        "python",
        pytest.param("compiled", marks=pytest.mark.skipif(not native.available(), reason=NO_NUMBA)),
    ]
)
def backend(request: pytest.FixtureRequest) -> str:
    """Run the test on each available back end."""
    return request.param


def _feed(est: ArxEstimator, n: int, seed: int) -> list:
    rng = np.random.default_rng(seed)
    y, out = 0.0, []
    for _ in range(n):
        u = [float(rng.random() > 0.5), float(rng.normal())]
        y = 0.7 * y + 0.3 * u[0] - 0.1 * u[1] + 0.05 * float(rng.normal())
        out.append(est.update(y, u))
    return out


ORDER = ArxOrder(na=1, nb=(1, 2), nk=(1, 0))


def test_none_until_history_is_ready_then_results(backend: str) -> None:
    est = ArxEstimator(ORDER, backend=backend)
    results = _feed(est, 5, 0)
    assert results[: ORDER.depth] == [None] * ORDER.depth
    assert all(r is not None for r in results[ORDER.depth :])


def test_json_checkpoint_continues_bit_for_bit(backend: str) -> None:
    est = ArxEstimator(ORDER, RlsConfig(forgetting=0.99), backend)
    _feed(est, 300, 1)
    assert all(type(v) is float for v in est.to_state()["rls"])  # plain data on every back end
    # The codec restores onto the default back end: checkpoints move between them.
    restored = decode_estimator(json.loads(json.dumps(encode_estimator(est))))
    assert restored.to_state() == est.to_state()
    a, b = _feed(est, 50, 2), _feed(restored, 50, 2)
    assert a == b


def test_clone_is_untrained_twin_and_reset_forgets(backend: str) -> None:
    est = ArxEstimator(ORDER, RlsConfig(forgetting=0.97), backend)
    _feed(est, 100, 3)
    twin = est.clone()
    assert twin.config == est.config and twin.order == est.order
    assert twin.backend == est.backend == backend
    assert twin.n_updates == 0 and est.n_updates > 0
    est.reset()
    assert est.to_state() == twin.to_state()


def test_restart_history_keeps_the_model(backend: str) -> None:
    est = ArxEstimator(ORDER, backend=backend)
    _feed(est, 100, 4)
    theta = est.theta
    est.restart_history()
    assert est.update(1.0, [1.0, 0.0]) is None
    np.testing.assert_array_equal(est.theta, theta)


def test_predict_matches_the_next_step_prediction(backend: str) -> None:
    est = ArxEstimator(ORDER, backend=backend)
    _feed(est, 100, 5)
    u = [1.0, 0.5]
    predicted = est.predict(u)
    result = est.update(2.0, u)
    assert result is not None and result.prediction == pytest.approx(predicted, rel=1e-12)


def test_bad_checkpoints_are_refused_with_the_place(backend: str) -> None:
    est = ArxEstimator(ORDER, backend=backend)
    data = encode_estimator(est)
    with pytest.raises(CodecError, match="estimator.version"):
        decode_estimator({**data, "version": 99})
    with pytest.raises(CodecError, match=r"estimator.config: unknown key\(s\) \['bogus'\]"):
        decode_estimator({**data, "config": {**data["config"], "bogus": 1}})
    with pytest.raises(DimensionError, match="saved RLS state has 3 entries"):
        decode_estimator({**data, "state": {**data["state"], "rls": [0.0, 1.0, 2.0]}})
    bad = list(data["state"]["rls"])
    bad[est.layout.diag.start] = -1.0
    with pytest.raises(ValueError, match="not positive definite"):
        decode_estimator({**data, "state": {**data["state"], "rls": bad}})


def test_warm_start_sets_theta_and_p_exactly(backend: str) -> None:
    rng = np.random.default_rng(8)
    a = rng.normal(size=(5, 5))
    p = a @ a.T + 0.1 * np.eye(5)
    theta = rng.normal(size=5)
    est = ArxEstimator(ORDER, backend=backend)
    est.warm_start(theta, p)
    np.testing.assert_allclose(est.covariance, p, rtol=1e-12)
    np.testing.assert_array_equal(est.theta, theta)
    with pytest.raises(ValueError, match="positive definite"):
        est.warm_start(theta, -p)
    with pytest.raises(DimensionError, match="warm start needs theta"):
        est.warm_start(theta[:2], p)


def test_inflate_covariance_scales_p_under_the_cap(backend: str) -> None:
    est = ArxEstimator(ORDER, RlsConfig(p0=10.0), backend)
    _feed(est, 200, 6)
    before = est.covariance
    est.inflate_covariance(4.0)
    np.testing.assert_allclose(est.covariance, 4.0 * before, rtol=1e-12)
    est.inflate_covariance(1e12)
    assert est.trace == pytest.approx(est.config.trace_bound(est.order.n_params), rel=1e-9)
    with pytest.raises(ValueError, match="factor must be a finite number >= 1"):
        est.inflate_covariance(0.5)
