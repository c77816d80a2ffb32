"""Wald parameter and feature drift: schedule, subsets, rank fallback, state, errors."""

import json
from collections.abc import Callable

import numpy as np
import pytest
from scipy.stats import chi2

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.detect import (
    FeatureDrift,
    FeatureDriftConfig,
    ParameterDrift,
    ParameterDriftConfig,
    calibrate,
    wald_distance,
)
from arxwatch.estimators.detect.parameter import wald_distances
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.readout import (
    feature_jacobians,
    feature_matrix,
    feature_names,
    feature_vector,
    read_out,
    readout_jacobian,
)
from arxwatch.estimators.rls import RlsConfig

THETA = np.array([-0.8, 0.3, 0.1])
COV = np.diag([1e-4, 4e-4, 1e-4])
ORDER = ArxOrder(na=1, nb=(1,), nk=(1,))


def _live(seed: int, n: int, drift_at: int) -> list[np.ndarray]:
    """Live estimates scattered by COV around THETA, the gain coefficient +0.1 from drift_at."""
    rng = np.random.default_rng(seed)
    noise = rng.multivariate_normal(np.zeros(3), COV, size=n)
    out = []
    for k in range(n):
        theta = THETA + noise[k]
        if k >= drift_at:
            theta = theta + np.array([0.0, 0.1, 0.0])
        out.append(theta)
    return out


def test_statistic_equals_direct_solve_and_values() -> None:
    det = ParameterDrift(ParameterDriftConfig(every=1, alpha=0.01))
    det.set_baseline(THETA, COV)
    live = THETA + np.array([0.01, -0.02, 0.005])
    ev = det.update(live, 2.0 * COV)
    d = live - THETA
    assert ev is not None
    assert ev.statistic == pytest.approx(float(d @ np.linalg.solve(3.0 * COV, d)), rel=1e-12)
    assert ev.threshold == pytest.approx(chi2.ppf(0.99, 3), rel=1e-12)
    assert ev.values["df"] == 3.0 and ev.values["current_theta_1"] == live[1]
    assert ev.detector == "parameter_drift" and ev.signal == "parameters" and ev.detail == ""


def test_schedule_first_call_then_every_and_skips_without_reading() -> None:
    det = ParameterDrift(ParameterDriftConfig(every=5))
    det.set_baseline(THETA, COV)
    done = [k for k in range(12) if det.update(THETA, COV) is not None]
    assert done == [0, 5, 10]
    assert det.update("not read", None) is None  # type: ignore[arg-type]


def test_pinned_first_alarm_after_gain_coefficient_drift_at_500() -> None:
    det = ParameterDrift(ParameterDriftConfig(every=10))
    det.set_baseline(THETA, COV)
    alarms = [
        k
        for k, t in enumerate(_live(5, 1000, 500))
        if (ev := det.update(t, COV)) is not None and ev.alarm
    ]
    assert alarms[0] == 550 and all(k >= 500 for k in alarms)


def test_subset_of_indices() -> None:
    det = ParameterDrift(ParameterDriftConfig(every=1, indices=(2,)))
    det.set_baseline(THETA, COV)
    ev = det.update(THETA + np.array([5.0, 5.0, 0.02]), COV)
    assert ev is not None and ev.statistic == pytest.approx(0.02**2 / 2e-4)
    assert ev.values["df"] == 1.0 and set(ev.values) >= {"baseline_theta_2", "current_theta_2"}


def test_singular_covariance_falls_back_to_its_range() -> None:
    cov = np.array([[1.0, 1.0, 0.0], [1.0, 1.0, 0.0], [0.0, 0.0, 2.0]]) * 1e-4
    det = ParameterDrift(ParameterDriftConfig(every=1, alpha=0.05))
    det.set_baseline(THETA, cov)
    delta = np.array([0.01, 0.01, 0.02])
    ev = det.update(THETA + delta, cov)
    assert ev is not None and ev.detail == "rank_deficient" and ev.values["df"] == 2.0
    expected = float(delta @ np.linalg.pinv(2.0 * cov) @ delta)
    assert ev.statistic == pytest.approx(expected, rel=1e-9)
    assert ev.threshold == pytest.approx(chi2.ppf(0.95, 2), rel=1e-12)
    with pytest.raises(ValueError, match="covariance has rank 0"):
        wald_distance([1.0, 2.0], np.zeros((2, 2)))


@pytest.mark.parametrize("n", [1, 2, 3, 5])
def test_distances_near_the_rank_cut_off_agree_with_eigh(n: int) -> None:
    # Reference: numpy.linalg.eigh of the covariance in units of each
    # entry's spread (unit diagonal), the eigenvalues above rcond times the
    # largest kept and d2 summed over them (the pseudo-inverse on the kept
    # range). Smallest over largest eigenvalue spread around rcond = 1e-10:
    # the factored path must keep exactly the same rank. Then each entry
    # is put in other units (spreads from 1e-6 to 1e6, as a gain beside a
    # time constant in seconds): rank and d2 must not change.
    rng = np.random.default_rng(n)
    k = 2000
    q, _ = np.linalg.qr(rng.normal(size=(k, n, n)))
    eigenvalues = 10 ** rng.uniform(-4.0, 0.0, size=(k, n))
    eigenvalues[:, 0] = 1.0
    if n > 1:
        eigenvalues[:, -1] = 1e-10 * 10 ** rng.uniform(-0.05, 0.05, size=k)
    cov = q @ (eigenvalues[:, :, None] * q.transpose(0, 2, 1))
    spread = np.sqrt(np.diagonal(cov, axis1=1, axis2=2))
    unit = cov / spread[:, :, None] / spread[:, None, :]  # unit diagonal
    unit = 0.5 * (unit + unit.transpose(0, 2, 1))
    delta = rng.normal(size=(k, n))
    d2, rank = wald_distances(delta, unit)
    w, v = np.linalg.eigh(unit)
    keep = w > 1e-10 * w[:, -1:]
    projected = np.einsum("kij,ki->kj", v, delta)
    expected = np.where(keep, projected**2 / w, 0.0).sum(axis=1)
    np.testing.assert_array_equal(rank, keep.sum(axis=1))
    # Tolerance: both are backward stable, so they agree to about the
    # condition number (1e10) times eps, relative.
    np.testing.assert_allclose(d2, expected, rtol=1e-4)
    units = 10 ** rng.uniform(-6.0, 6.0, size=(k, n))
    d2_units, rank_units = wald_distances(
        delta * units, unit * units[:, :, None] * units[:, None, :]
    )
    np.testing.assert_array_equal(rank_units, rank)
    np.testing.assert_allclose(d2_units, d2, rtol=1e-4)


def test_empirical_threshold_from_calibrate_is_used() -> None:
    rng = np.random.default_rng(3)
    samples = rng.chisquare(3, size=5000)
    threshold = calibrate(samples, 0.01)
    assert threshold == float(np.quantile(samples, 0.99, method="higher"))
    assert np.mean(samples > threshold) <= 0.01
    det = ParameterDrift(ParameterDriftConfig(every=1))
    det.set_baseline(THETA, COV, threshold=threshold)
    ev = det.update(THETA, COV)
    assert ev is not None and ev.threshold == threshold
    with pytest.raises(ValueError, match="needs at least 1000"):
        calibrate(samples[:999], 0.001)
    with pytest.raises(ValueError, match=r"calibrate\.false_alarm_rate must be a number"):
        calibrate(samples, 0.0)
    with pytest.raises(ValueError, match="finite values >= 0"):
        calibrate([1.0, -1.0], 0.5)


def test_feature_drift_is_the_delta_method_on_read_out() -> None:
    det = FeatureDrift(FeatureDriftConfig(ORDER, 60.0, every=1, alpha=0.01))
    det.set_baseline(THETA, COV)
    live = THETA + np.array([0.02, 0.01, -0.01])
    ev = det.update(live, COV)
    f0 = feature_vector(read_out(ORDER, THETA, 60.0))
    f1 = feature_vector(read_out(ORDER, live, 60.0))
    j0 = readout_jacobian(ORDER, THETA, 60.0)
    j1 = readout_jacobian(ORDER, live, 60.0)
    s = j0 @ COV @ j0.T + j1 @ COV @ j1.T
    d = f1 - f0
    assert ev is not None
    assert ev.statistic == pytest.approx(float(d @ np.linalg.solve(s, d)), rel=1e-9)
    assert ev.values["baseline_time_constant_s"] == pytest.approx(f0[1])
    assert ev.values["current_offset"] == pytest.approx(f1[2])
    assert ev.detector == "feature_drift" and ev.values["df"] == 3.0


def test_feature_drift_leaves_out_undefined_features() -> None:
    det = FeatureDrift(FeatureDriftConfig(ORDER, 60.0, every=1))
    det.set_baseline(THETA, COV)
    ev = det.update([0.5, 0.3, 0.1], COV)  # pole at -0.5: no time constant
    assert ev is not None and ev.detail == "partial" and ev.values["n_tested"] == 2.0
    assert "current_time_constant_s" not in ev.values and "current_gain_1" in ev.values
    only_tau = FeatureDrift(FeatureDriftConfig(ORDER, 60.0, every=1, features=("time_constant_s",)))
    only_tau.set_baseline(THETA, COV)
    ev = only_tau.update([-1.0, 0.3, 0.1], COV)  # integrating
    assert ev is not None and ev.detail == "undefined" and not ev.alarm


@pytest.mark.parametrize("features", [None, ("offset", "gain_1")])
def test_feature_projection_is_the_full_product_and_the_read_out(
    features: tuple[str, ...] | None,
) -> None:
    # Reference: J Cov J' summed over every parameter in ascending order
    # (terms where J is 0 included), J from feature_jacobians with its nan
    # rows zeroed and masked afterwards; features from feature_matrix.
    order = ArxOrder(na=2, nb=(2,), nk=(1,))
    det = FeatureDrift(FeatureDriftConfig(order, 60.0, features=features))
    rng = np.random.default_rng(3)
    thetas = np.array([-1.2, 0.36, 0.05, 0.03, 0.4]) + 0.05 * rng.normal(size=(40, 5))
    thetas[0, :2] = [-2.0, 1.0]  # integrating: gains and offset undefined
    root = rng.normal(size=(40, 5, 5)) * 1e-2
    covs = root @ root.transpose(0, 2, 1)
    covs[1, 2, 2] = np.nan  # a broken covariance leaves nothing to test
    rows = [feature_names(order).index(f) for f in features or feature_names(order)]
    jac = feature_jacobians(order, thetas, 60.0)[:, rows, :]
    bad = ~np.isfinite(jac).all(axis=2)
    jac[bad] = 0.0
    expected = np.zeros((40, len(rows), len(rows)))
    for r in range(40):
        left = np.zeros((len(rows), 5))
        for i in range(5):
            left = left + jac[r, :, i, None] * covs[r, None, i, :]
        for j in range(5):
            expected[r] = expected[r] + left[:, None, j] * jac[r, None, :, j]
    expected[bad[:, :, None] | bad[:, None, :]] = np.nan
    all_features, x, cx = det.read_and_project(thetas, covs)
    assert all_features.tobytes() == feature_matrix(order, thetas, 60.0).tobytes()
    np.testing.assert_array_equal(x, np.where(bad, np.nan, all_features[:, rows]))
    assert np.isnan(cx[1]).all()
    np.testing.assert_array_equal(np.delete(cx, 1, axis=0), np.delete(expected, 1, axis=0))
    assert det.project(thetas, covs)[1].tobytes() == cx.tobytes()


def test_works_on_a_live_rls_estimator_with_a_gain_change() -> None:
    rng = np.random.default_rng(2)
    est = ArxEstimator(ORDER, RlsConfig(forgetting=0.995))
    det = FeatureDrift(FeatureDriftConfig(ORDER, 60.0, every=20))
    y = u = 0.0
    alarms = []
    for k in range(5000):
        b = 0.3 if k < 4000 else 0.45
        y = 0.8 * y + b * u + 0.1 + 0.05 * float(rng.standard_normal())
        u = float(rng.random() > 0.5)
        est.update(y, [u])
        if k == 2999:
            det.set_baseline(est.theta, est.parameter_covariance)
        elif k >= 3000:
            ev = det.update(est.theta, est.parameter_covariance)
            if ev is not None and ev.alarm:
                alarms.append(k)
    assert alarms and 4000 <= alarms[0] < 4200


def test_json_state_round_trip_continues_identically() -> None:
    live = _live(6, 300, 150)
    for det in (
        ParameterDrift(ParameterDriftConfig(every=7, indices=(0, 1))),
        FeatureDrift(FeatureDriftConfig(ORDER, 30.0, every=7)),
    ):
        det.set_baseline(THETA, COV, threshold=12.5)
        for t in live[:100]:
            det.update(t, COV)
        twin = det.clone()
        assert not twin.has_baseline
        twin.load_state(json.loads(json.dumps(det.to_state())))
        assert twin.to_state() == det.to_state()
        assert [det.update(t, COV) for t in live[100:]] == [twin.update(t, COV) for t in live[100:]]


def test_undefined_baseline_feature_survives_json_as_null() -> None:
    det = FeatureDrift(FeatureDriftConfig(ORDER, 60.0))
    det.set_baseline([-1.0, 0.3, 0.1], COV)
    state = json.loads(json.dumps(det.to_state(), allow_nan=False))
    assert state["baseline"]["x"][0] is None
    twin = det.clone()
    twin.load_state(state)
    assert twin.to_state() == state


def test_reset_and_missing_baseline() -> None:
    det = ParameterDrift()
    with pytest.raises(RuntimeError, match="no baseline; call set_baseline first"):
        det.update(THETA, COV)
    det.set_baseline(THETA, COV)
    det.reset()
    assert det.to_state() == ParameterDrift().to_state()


@pytest.mark.parametrize(
    ("factory", "match"),
    [
        (lambda: ParameterDriftConfig(alpha=1.5), r"ParameterDriftConfig\.alpha must be a number"),
        (lambda: ParameterDriftConfig(every=0), r"ParameterDriftConfig\.every must be an integer"),
        (lambda: ParameterDriftConfig(indices=(1, 1)), r"indices must be None or a non-empty"),
        (lambda: ParameterDriftConfig(rcond=0.0), r"rcond must be a number in \(0, 1\)"),
        (lambda: FeatureDriftConfig(ORDER, -1.0), r"sample_period_s must be a finite number"),
        (
            lambda: FeatureDriftConfig(ORDER, 60.0, features=("gain_2",)),
            r"features must be None or a non-empty tuple of distinct names from",
        ),
        (
            lambda: FeatureDriftConfig("arx", 60.0),  # type: ignore[arg-type]
            r"FeatureDriftConfig\.order must be an ArxOrder",
        ),
    ],
)
def test_bad_settings_are_refused(factory: Callable[[], object], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        factory()


def test_bad_inputs_and_state_are_refused() -> None:
    det = ParameterDrift(ParameterDriftConfig(every=1, indices=(3,)))
    with pytest.raises(DimensionError, match=r"indices \(3,\) reach beyond theta of length 3"):
        det.set_baseline(THETA, COV)
    det = ParameterDrift(ParameterDriftConfig(every=1))
    det.set_baseline(THETA, COV)
    with pytest.raises(DimensionError, match=r"theta must have shape \(3,\) and covariance"):
        det.update(THETA[:2], COV)
    with pytest.raises(ValueError, match="theta and covariance must be finite"):
        det.update([np.nan, 0.0, 0.0], COV)
    assert det.update(THETA, COV) is not None  # a refused call is not counted
    with pytest.raises(ValueError, match="threshold must be None or a finite number > 0"):
        det.set_baseline(THETA, COV, threshold=-1.0)
    state = det.to_state()
    state["baseline"]["x"] = [0.0]
    with pytest.raises(ValueError, match=r"baseline\.x must be a list of 3 entries"):
        det.load_state(state)
    state["baseline"] = {"x": []}
    with pytest.raises(ValueError, match="baseline must be null or a dict with keys"):
        det.load_state(state)
    with pytest.raises(ValueError, match="by detector 'parameter_drift', not 'feature_drift'"):
        FeatureDrift(FeatureDriftConfig(ORDER, 60.0)).load_state(det.to_state())
