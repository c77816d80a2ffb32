"""UD-RLS kernel: agreement with the covariance form, guards, settings."""

import math

import numpy as np
import pytest

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import (
    RlsConfig,
    StateLayout,
    kernel_constants,
    kernel_source,
    kernel_structure,
)

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


def test_ud_form_equals_covariance_form(backend: str) -> None:
    rng = np.random.default_rng(0)
    phis = rng.normal(size=(400, 4))
    ys = phis @ np.array([0.5, -1.0, 2.0, 0.1]) + 0.05 * rng.normal(size=400)
    cfg = RlsConfig(forgetting=0.99, p0=100.0, huber_k=None)
    est = ArxEstimator(ArxOrder(na=2, nb=(1,), nk=(1,)), cfg, backend)
    for phi, y in zip(phis, ys, strict=True):
        est.step(phi.tolist(), float(y), [float(phi[2])])
    theta, p = textbook_rls(phis, ys, 0.99, 100.0)
    np.testing.assert_allclose(est.theta, theta, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(est.covariance, p, rtol=1e-8, atol=1e-14)
    assert est.trace == pytest.approx(np.trace(p), rel=1e-12)


def test_sigma2_is_the_residual_mean_square_without_forgetting(backend: str) -> None:
    # With lambda = 1 the a-posteriori recursion sums the exact least-squares
    # residuals (Ljung 1999, eq. 11.17): sigma2 = RSS / N of the final fit,
    # up to the vanishing prior of P0 = p0 I.
    rng = np.random.default_rng(1)
    phis = rng.normal(size=(500, 3))
    ys = phis @ np.array([1.0, 2.0, 3.0]) + 0.3 * rng.normal(size=500)
    exact = RlsConfig(forgetting=1.0, p0=1e8, huber_k=None)
    est = ArxEstimator(ArxOrder(na=0, nb=(2,), nk=(0,)), exact, backend)
    for phi, y in zip(phis, ys, strict=True):
        est.step(phi.tolist(), float(y), [float(phi[0])])
    theta, rss, *_ = np.linalg.lstsq(phis, ys, rcond=None)
    assert est.sigma2 == pytest.approx(rss[0] / 500, rel=1e-6)


def test_spike_moves_robust_estimate_far_less_than_plain(backend: str) -> None:
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
        est = ArxEstimator(order, RlsConfig(forgetting=0.99, huber_k=k_huber), backend)
        worst = 0.0
        for k in range(n):
            est.update(float(spiked[k]), [float(u[k])])
            if k >= 300:
                worst = max(worst, float(np.max(np.abs(est.theta - true))))
        errors[label] = worst
    # The robust estimate stays within a few percent while the plain one is dragged.
    assert errors["robust"] < 0.05
    assert errors["plain"] > 5 * errors["robust"]


def _windup_run(
    config: RlsConfig, backend: str
) -> tuple[list[float], list[float], ArxEstimator, np.ndarray]:
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
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), config, backend)
    traces, errs = [], []
    truth = np.array([-a, b, c])
    for k in range(n):
        est.update(float(y[k]), [float(u[k])])
        traces.append(est.trace)
        errs.append(float(np.max(np.abs(est.theta - truth))))
    return traces, errs, est, truth


def test_windup_trace_bounded_and_estimate_recovers(backend: str) -> None:
    cfg = RlsConfig(forgetting=0.98, p0=100.0)
    traces, errs, est, truth = _windup_run(cfg, backend)
    assert max(traces) <= cfg.trace_bound(3) * (1 + 1e-9)
    # Back within 0.05 of the truth after 3 memories (~150 samples) of excitation.
    assert max(errs[-90:]) < 0.05
    assert np.all(np.linalg.eigvalsh(est.covariance) > 0)


def test_windup_without_the_bound_explodes(backend: str) -> None:
    # The same run with the cap lifted: P grows as lambda**-k (0.98**-2880 ~ 1e25).
    traces, *_ = _windup_run(RlsConfig(forgetting=0.98, p0=100.0, trace_max=1e300), backend)
    assert max(traces) > 1e20


def test_excitation_gate_freezes_exactly(backend: str) -> None:
    cfg = RlsConfig(forgetting=0.98, p0=100.0, min_input_std=0.05)
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), cfg, backend)
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


def test_non_finite_sample_is_refused_and_state_kept(backend: str) -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), backend=backend)
    for k in range(10):
        est.update(float(k % 3), [float(k % 2)])
    before = est.to_state()
    with pytest.raises(ValueError, match="non-finite"):
        est.update(math.nan, [1.0])
    with pytest.raises(ValueError, match="non-finite"):
        est.step([1.0, math.inf, 1.0], 1.0, [1.0])
    assert est.to_state() == before


def test_wrong_lengths_are_refused(backend: str) -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), backend=backend)
    with pytest.raises(DimensionError, match="phi needs 3"):
        est.step([1.0, 2.0], 1.0, [1.0])


def test_generated_source_is_plain_python() -> None:
    src = kernel_source(StateLayout(3, 1), RlsConfig(), "floats")
    compile(src, "<test>", "exec")
    assert src.startswith("def step(s, phi, y, u):")
    vec = kernel_source(StateLayout(3, 1), RlsConfig(), "arrays")
    assert vec.startswith("def step(s, phi, y, u, check):")
    nat = kernel_source(StateLayout(3, 1), RlsConfig(), "native")
    compile(nat, "<test>", "exec")
    assert nat.startswith("def native(s, c, p0, p1, p2, y, x0):")
    assert "\n\ndef step(s, phi, y, u):\n" in nat
    with pytest.raises(ValueError, match="target must be one of .* got 'gpu'"):
        kernel_source(StateLayout(3, 1), RlsConfig(), "gpu")  # type: ignore[arg-type]


@pytest.mark.parametrize(
    "config",
    [
        RlsConfig(),
        RlsConfig(forgetting=1.0, huber_k=None, trace_max=7.0),
        RlsConfig(forgetting=0.9, huber_k=2.5, warmup_updates=0, min_input_std=0.125),
    ],
)
def test_native_source_is_the_pure_source_with_settings_as_names(config: RlsConfig) -> None:
    # The compiled kernel must run the pure kernel's statements: with each
    # setting's value written in for its name, its body is the pure step line
    # for line, except where the sample arrives (arguments instead of
    # unpacking phi and u) and who words the non-finite error (the wrapper).
    layout = StateLayout(4, 2)
    constants = kernel_constants(layout, config)

    def same_raise(line: str) -> str:
        raises = "raise _NonFinite" in line or "raise ValueError(f'non-finite" in line
        return "        raise <non-finite sample>" if raises else line

    pure = kernel_source(layout, config, "floats").splitlines()
    assert pure[2].strip() == "try:" and pure[7].strip().startswith("f'got")
    expected = [same_raise(line) for line in [pure[1], *pure[8:]]]  # without unpacking
    native_source = kernel_source(layout, config, "native").split("\n\n\n")[0]
    body = native_source.splitlines()
    assert body[1] == "    " + ", ".join(f"c_{name}" for name in constants) + ", = c"
    for name in sorted(constants, key=len, reverse=True):  # lam_hk before lam
        native_source = native_source.replace(f"c_{name}", repr(constants[name]))
    assert [same_raise(line) for line in native_source.splitlines()[2:]] == expected


def test_settings_of_one_structure_share_the_native_source() -> None:
    layout = StateLayout(3, 1)
    slow, quick = RlsConfig(forgetting=0.999), RlsConfig(forgetting=0.9, p0=5.0, warmup_updates=3)
    assert (
        kernel_structure(layout, slow) == kernel_structure(layout, quick) == (layout, True, False)
    )
    assert kernel_source(layout, slow, "native") == kernel_source(layout, quick, "native")
    assert kernel_source(layout, slow, "floats") != kernel_source(layout, quick, "floats")
    gated = RlsConfig(huber_k=None, min_input_std=0.1)
    assert kernel_structure(layout, gated) == (layout, False, True)
    assert kernel_source(layout, gated, "native") != kernel_source(layout, slow, "native")
    # Without inputs there is nothing to gate on.
    assert kernel_structure(StateLayout(3, 0), gated)[2] is False


def test_wrong_input_count_is_refused_before_any_change(backend: str) -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), backend=backend)
    before = est.to_state()
    with pytest.raises(DimensionError, match="phi needs 3 and inputs 1 values, got 3 and 2"):
        est.step([1.0, 2.0, 3.0], 1.0, [1.0, 2.0])
    no_inputs = ArxEstimator(ArxOrder(na=2, nb=(), nk=(), constant=True), backend=backend)
    with pytest.raises(DimensionError, match="inputs 0 values, got 3 and 1"):
        no_inputs.step([1.0, 2.0, 3.0], 1.0, [1.0])
    assert est.to_state() == before


def test_step_result_fields(backend: str) -> None:
    est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,)), backend=backend)
    res = est.step([0.5, 1.0, 1.0], 2.0, [1.0])
    assert type(res).__name__ == "StepResult"
    assert res.prediction + res.innovation == 2.0
    assert res.updated is True and res.weight == 1.0
