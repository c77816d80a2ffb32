"""UD-RLS kernel: agreement with the covariance form, guards, settings."""

import math

import numpy as np
import pytest

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig, StateLayout, kernel_source


def textbook_rls(phis, ys, lam, p0):
    """Covariance-form RLS with forgetting, symmetrised each step.

    Source: L. Ljung, System Identification, 2nd ed., 1999, eq. (11.12)-(11.14).
    """
    n = phis.shape[1]
    theta, p = np.zeros(n), np.eye(n) * p0
    for phi, y in zip(phis, ys, strict=True):
        gain = p @ phi / (lam + phi @ p @ phi)
        theta = theta + gain * (y - phi @ theta)
        p = (p - np.outer(gain, phi @ p)) / lam
        p = 0.5 * (p + p.T)
    return theta, p


def test_ud_form_equals_covariance_form() -> None:
    rng = np.random.default_rng(0)
    phis = rng.normal(size=(400, 4))
    ys = phis @ np.array([0.5, -1.0, 2.0, 0.1]) + 0.05 * rng.normal(size=400)
    cfg = RlsConfig(forgetting=0.99, p0=100.0, huber_k=None)
    est = ArxEstimator(ArxOrder(na=2, nb=(1,), nk=(1,)), cfg)
    for phi, y in zip(phis, ys, strict=True):
        est.step(phi.tolist(), float(y), [float(phi[2])])
    theta, p = textbook_rls(phis, ys, 0.99, 100.0)
    np.testing.assert_allclose(est.theta, theta, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(est.covariance, p, rtol=1e-8, atol=1e-14)
    assert est.trace == pytest.approx(np.trace(p), rel=1e-12)


def test_sigma2_is_the_residual_mean_square_without_forgetting() -> None:
    # With lambda = 1 the a-posteriori recursion sums the exact least-squares
    # residuals (Ljung 1999, eq. 11.17): sigma2 = RSS / N of the final fit,
    # up to the vanishing prior of P0 = p0 I.
    rng = np.random.default_rng(1)
    phis = rng.normal(size=(500, 3))
    ys = phis @ np.array([1.0, 2.0, 3.0]) + 0.3 * rng.normal(size=500)
    exact = RlsConfig(forgetting=1.0, p0=1e8, huber_k=None)
    est = ArxEstimator(ArxOrder(na=0, nb=(2,), nk=(0,)), exact)
    for phi, y in zip(phis, ys, strict=True):
        est.step(phi.tolist(), float(y), [float(phi[0])])
    theta, rss, *_ = np.linalg.lstsq(phis, ys, rcond=None)
    assert est.sigma2 == pytest.approx(rss[0] / 500, rel=1e-6)


def test_spike_moves_robust_estimate_far_less_than_plain() -> None:
    rng = np.random.default_rng(2)
    n = 600
    u = rng.normal(size=n)
    y = np.zeros(n)
    for k in range(1, n):
        y[k] = 0.9 * y[k - 1] + 0.4 * u[k - 1] + 0.02 * rng.normal()
    spiked = y.copy()
    spiked[[300, 301, 450]] += 25.0  # single-sample sensor spikes
    order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    true = np.array([-0.9, 0.4])
    errors = {}
    for label, k_huber in (("plain", None), ("robust", 1.345)):
        est = ArxEstimator(order, RlsConfig(forgetting=0.99, huber_k=k_huber))
        worst = 0.0
        for k in range(n):
            est.update(float(spiked[k]), [float(u[k])])
            if k >= 300:
                worst = max(worst, float(np.max(np.abs(est.theta - true))))
        errors[label] = worst
    # The robust estimate stays within a few percent while the plain one is dragged.
    assert errors["robust"] < 0.05
    assert errors["plain"] > 5 * errors["robust"]


def _windup_run(config: RlsConfig) -> tuple[list[float], list[float], ArxEstimator, np.ndarray]:
    """One excited hour, 48 h constant input, then excitation again, at 60 s."""
    rng = np.random.default_rng(5)
    excited, still, again = 60, 48 * 60, 240
    n = excited + still + again
    u = np.where(rng.random(n) > 0.5, 1.0, 0.0)
    u[excited : excited + still] = 0.4  # valve parked
    a, b, c = 0.8, 0.5, 0.2
    y = np.zeros(n)
    for k in range(1, n):
        y[k] = a * y[k - 1] + b * u[k - 1] + c + 0.01 * rng.normal()
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), config)
    traces, errs = [], []
    truth = np.array([-a, b, c])
    for k in range(n):
        est.update(float(y[k]), [float(u[k])])
        traces.append(est.trace)
        errs.append(float(np.max(np.abs(est.theta - truth))))
    return traces, errs, est, truth


def test_windup_trace_bounded_and_estimate_recovers() -> None:
    cfg = RlsConfig(forgetting=0.98, p0=100.0)
    traces, errs, est, truth = _windup_run(cfg)
    assert max(traces) <= cfg.trace_bound(3) * (1 + 1e-9)
    # Back within 0.05 of the truth after 3 memories (~150 samples) of excitation.
    assert max(errs[-90:]) < 0.05
    assert np.all(np.linalg.eigvalsh(est.covariance) > 0)


def test_windup_without_the_bound_explodes() -> None:
    # The same run with the cap lifted: P grows as lambda**-k (0.98**-2880 ~ 1e25).
    traces, *_ = _windup_run(RlsConfig(forgetting=0.98, p0=100.0, trace_max=1e300))
    assert max(traces) > 1e20


def test_excitation_gate_freezes_exactly() -> None:
    cfg = RlsConfig(forgetting=0.98, p0=100.0, min_input_std=0.05)
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), cfg)
    rng = np.random.default_rng(6)
    y = 0.0
    for _ in range(200):
        u = float(rng.random() > 0.5)
        y = 0.8 * y + 0.5 * u + 0.01 * rng.normal()
        est.update(y, [u])
    # Hold the input until its standard deviation over the memory decays.
    for _ in range(300):
        y = 0.8 * y + 0.5 * 0.4 + 0.01 * rng.normal()
        result = est.update(y, [0.4])
    assert result is not None and not result.updated
    assert result.excitation < 0.05
    before = est.to_state()["rls"]
    est.update(y, [0.4])
    after = est.to_state()["rls"]
    layout = est.layout
    assert after[layout.theta] == before[layout.theta]
    assert after[layout.diag] == before[layout.diag]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"forgetting": 0.0}, "forgetting must be in"),
        ({"forgetting": 1.2}, "forgetting must be in"),
        ({"p0": -1.0}, "p0 must be in"),
        ({"p0": math.inf}, "p0 must be a finite number"),
        ({"huber_k": 0.0}, "huber_k must be in"),
        ({"warmup_updates": -3}, "warmup_updates must be >= 0"),
        ({"warmup_updates": 2.5}, "warmup_updates must be an integer"),
        ({"min_input_std": -0.1}, "min_input_std must be in"),
        ({"trace_max": "big"}, "trace_max must be a finite number"),
    ],
)
def test_config_errors_name_the_setting(kwargs: dict, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        RlsConfig(**kwargs)


def test_non_finite_sample_is_refused_and_state_kept() -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)))
    for k in range(10):
        est.update(float(k % 3), [float(k % 2)])
    before = est.to_state()
    with pytest.raises(ValueError, match="non-finite"):
        est.update(math.nan, [1.0])
    with pytest.raises(ValueError, match="non-finite"):
        est.step([1.0, math.inf, 1.0], 1.0, [1.0])
    assert est.to_state() == before


def test_wrong_lengths_are_refused() -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)))
    with pytest.raises(DimensionError, match="phi needs 3"):
        est.step([1.0, 2.0], 1.0, [1.0])


def test_generated_source_is_plain_python() -> None:
    src = kernel_source(StateLayout(3, 1), RlsConfig(), vectorised=False)
    compile(src, "<test>", "exec")
    assert src.startswith("def step(s, phi, y, u):")
    vec = kernel_source(StateLayout(3, 1), RlsConfig(), vectorised=True)
    assert vec.startswith("def step(s, phi, y, u, check):")


def test_wrong_input_count_is_refused_before_any_change() -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)))
    before = est.to_state()
    with pytest.raises(DimensionError, match="phi needs 3 and inputs 1 values, got 3 and 2"):
        est.step([1.0, 2.0, 3.0], 1.0, [1.0, 2.0])
    no_inputs = ArxEstimator(ArxOrder(na=2, nb=(), nk=(), constant=True))
    with pytest.raises(DimensionError, match="inputs 0 values, got 3 and 1"):
        no_inputs.step([1.0, 2.0, 3.0], 1.0, [1.0])
    assert est.to_state() == before


def test_step_result_fields() -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)))
    res = est.step([0.5, 1.0, 1.0], 2.0, [1.0])
    assert type(res).__name__ == "StepResult"
    assert res.prediction + res.innovation == 2.0
    assert res.updated is True and res.weight == 1.0
