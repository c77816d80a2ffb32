"""RLS against outside references: numpy least squares, statsmodels RecursiveLS, lfilter."""

import numpy as np
import pytest
import scipy.signal
import statsmodels.api as sm

from arxwatch.estimators import native
from arxwatch.estimators.arx import ArxOrder, regression_matrix
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig

# lambda = 1 and P0 = p0 I: RLS minimises sum e^2 + |theta|^2 / p0 (Ljung 1999,
# eq. 11.15), so with p0 = 1e8 it equals ordinary least squares up to ~1e-8.
EXACT = RlsConfig(forgetting=1.0, p0=1e8, huber_k=None)
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


def _simulate(seed: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    """y(k) = 1.5 y(k-1) - 0.7 y(k-2) + 0.5 u(k-2) + 0.3 u(k-3) + e, via lfilter."""
    rng = np.random.default_rng(seed)
    u = rng.choice([-1.0, 1.0], size=n)
    e = 0.1 * rng.normal(size=n)
    # A(q) y = B(q) u + e with A = 1 - 1.5 q^-1 + 0.7 q^-2, B = q^-2 (0.5 + 0.3 q^-1)
    a = [1.0, -1.5, 0.7]
    y = scipy.signal.lfilter([0.0, 0.0, 0.5, 0.3], a, u) + scipy.signal.lfilter([1.0], a, e)
    return y, u


ORDER = ArxOrder(na=2, nb=(2,), nk=(2,), constant=False)
TRUTH = np.array([-1.5, 0.7, 0.5, 0.3])


def _run(
    y: np.ndarray, u: np.ndarray, config: RlsConfig, backend: str
) -> tuple[ArxEstimator, list]:
    est = ArxEstimator(ORDER, config, backend)
    path = []
    for k in range(len(y)):
        if est.update(float(y[k]), [float(u[k])]) is not None:
            path.append(est.theta)
    return est, path


def test_rls_without_forgetting_reproduces_numpy_lstsq(backend: str) -> None:
    y, u = _simulate(0, 1500)
    est, _ = _run(y, u, EXACT, backend)
    phi, target = regression_matrix(ORDER, y, u)
    theta_ls, *_ = np.linalg.lstsq(phi, target, rcond=None)
    np.testing.assert_allclose(est.theta, theta_ls, rtol=1e-7, atol=1e-9)


def test_rls_path_matches_statsmodels_recursive_ls(backend: str) -> None:
    # statsmodels RecursiveLS.recursive_coefficients: coefficient path of the
    # Kalman-filter form of recursive least squares (diffuse start).
    y, u = _simulate(1, 600)
    _, path = _run(y, u, EXACT, backend)
    phi, target = regression_matrix(ORDER, y, u)
    res = sm.RecursiveLS(target, phi).fit()
    ref = np.asarray(res.recursive_coefficients.filtered).T  # (N, n)
    # Compare once the diffuse period (n samples) is over; before it both
    # are dominated by the prior.
    np.testing.assert_allclose(np.array(path)[20:], ref[20:], rtol=1e-6, atol=1e-7)


def test_arx_coefficients_recovered_from_lfilter_simulation(backend: str) -> None:
    # Tolerance: OLS is the Gaussian MLE with Cov = s^2 (Phi'Phi)^-1 (Ljung 1999,
    # section 7.4); a fair check allows 5 standard errors per coefficient
    # (false-failure odds about 6e-7 each under the model).
    y, u = _simulate(2, 3000)
    est, _ = _run(y, u, EXACT, backend)
    phi, target = regression_matrix(ORDER, y, u)
    resid = target - phi @ est.theta
    s2 = resid @ resid / (len(target) - ORDER.n_params)
    se = np.sqrt(np.diag(s2 * np.linalg.inv(phi.T @ phi)))
    assert np.all(np.abs(est.theta - TRUTH) < 5 * se)


@pytest.mark.parametrize("seed", range(3))
def test_forgetting_tracks_a_step_change_like_weighted_least_squares(
    seed: int, backend: str
) -> None:
    # With forgetting, RLS equals weighted least squares with weights
    # lambda^(N-k) (Ljung 1999, eq. 11.63); checked against numpy lstsq on the
    # row-scaled problem.
    y, u = _simulate(10 + seed, 800)
    lam = 0.99
    est, _ = _run(y, u, RlsConfig(forgetting=lam, p0=1e8, huber_k=None, trace_max=1e300), backend)
    phi, target = regression_matrix(ORDER, y, u)
    w = np.sqrt(lam ** np.arange(len(target) - 1, -1, -1))
    theta_wls, *_ = np.linalg.lstsq(phi * w[:, None], target * w, rcond=None)
    np.testing.assert_allclose(est.theta, theta_wls, rtol=1e-6, atol=1e-8)
