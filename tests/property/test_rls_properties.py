"""Invariants of the UD-RLS kernel: P symmetric positive definite, bounded."""

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.codec import decode_estimator, encode_estimator
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig

ORDER = ArxOrder(na=2, nb=(2, 1), nk=(1, 0))  # n = 6, two inputs
NO_NUMBA = "numba is not installed (pip install '.[fast]'): the compiled back end is optional"
BACKENDS = [
    "python",
    pytest.param("compiled", marks=pytest.mark.skipif(not native.available(), reason=NO_NUMBA)),
]


def _assert_spd(est: ArxEstimator, bound: float) -> None:
    p = est.covariance
    assert np.all(np.isfinite(p))
    assert np.array_equal(p, p.T) or np.max(np.abs(p - p.T)) <= 1e-12 * np.max(np.abs(p))
    d = np.asarray(est.to_state()["rls"][est.layout.diag])
    assert np.all(d > 0.0)  # P = U D U' with D > 0 is positive definite
    assert est.trace <= bound * (1 + 1e-9)


def _stress_inputs(rng: np.random.Generator, n: int) -> np.ndarray:
    """Alternating phases: rich excitation, parked inputs, collinear inputs, huge scale."""
    u = rng.normal(size=(n, 2))
    for start in range(0, n, 4000):
        kind = (start // 4000) % 4
        stop = min(start + 4000, n)
        if kind == 1:
            u[start:stop] = [0.4, -1.2]  # constant: no excitation at all
        elif kind == 2:
            u[start:stop, 1] = 2.0 * u[start:stop, 0]  # collinear inputs
        elif kind == 3:
            u[start:stop] *= 1e4  # badly scaled inputs
    return u


def test_million_updates_keep_p_positive_definite() -> None:
    # Survival target from the design: 10^6 updates at lambda = 0.98. Run on
    # the python back end only: the compiled one gives the same bits
    # (tests/unit/test_native.py), so a second million would check nothing new.
    cfg = RlsConfig(forgetting=0.98, p0=1e3)
    est = ArxEstimator(ORDER, cfg)
    rng = np.random.default_rng(7)
    n = 1_000_000
    u = _stress_inputs(rng, n)
    noise = rng.normal(size=n)
    y = 0.0
    for k in range(n):
        y = 0.6 * y + 0.2 * u[k, 0] - 0.1 * u[k, 1] + 0.5 + 0.01 * noise[k]
        est.update(y, u[k].tolist())
        if k % 50_000 == 0:
            _assert_spd(est, cfg.trace_bound(6))
    _assert_spd(est, cfg.trace_bound(6))
    assert np.linalg.eigvalsh(est.covariance).min() > 0.0


def test_the_long_run_check_catches_the_textbook_update() -> None:
    # Witness that the invariant check can fail: the unsymmetrised, unbounded
    # covariance update P <- (P - K phi' P) / lambda (Ljung 1999, eq. 11.14)
    # on the same kind of data loses definiteness or blows up.
    rng = np.random.default_rng(7)
    n = 12_000
    u = _stress_inputs(rng, n)
    lam, theta, p = 0.98, np.zeros(6), np.eye(6) * 1e3
    hist_y, y, failed = [0.0, 0.0], 0.0, False
    for k in range(1, n):
        y_new = 0.6 * y + 0.2 * u[k, 0] - 0.1 * u[k, 1] + 0.5 + 0.01 * rng.normal()
        phi = np.array([-hist_y[0], -hist_y[1], u[k - 1, 0], u[k - 2, 0], u[k, 1], 1.0])
        gain = p @ phi / (lam + phi @ p @ phi)
        theta = theta + gain * (y_new - phi @ theta)
        p = (p - np.outer(gain, phi @ p)) / lam
        hist_y = [y_new, hist_y[0]]
        y = y_new
        if not np.all(np.isfinite(p)) or np.trace(p) > 1e3 * 6 * (1 + 1e-9):
            failed = True
            break
    assert failed


finite = st.floats(min_value=-1e3, max_value=1e3, allow_nan=False, width=64)


@pytest.mark.parametrize("backend", BACKENDS)
@settings(max_examples=60, deadline=None)
@given(
    samples=st.lists(st.tuples(finite, finite, finite), min_size=1, max_size=120),
    lam=st.floats(min_value=0.9, max_value=1.0),
    huber=st.one_of(st.none(), st.floats(min_value=0.5, max_value=5.0)),
)
def test_any_sequence_keeps_p_spd_and_round_trips(backend, samples, lam, huber) -> None:
    cfg = RlsConfig(forgetting=lam, p0=1e4, huber_k=huber, warmup_updates=5)
    est = ArxEstimator(ORDER, cfg, backend)
    for y, u1, u2 in samples:
        est.update(y, [u1, u2])
        _assert_spd(est, cfg.trace_bound(6))
    again = decode_estimator(json.loads(json.dumps(encode_estimator(est))))
    assert again.to_state() == est.to_state()
