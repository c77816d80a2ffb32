"""Reference checks of the batch fits against numpy, statsmodels and scikit-learn.

Each check names its source in a comment. Simulated processes (coefficients,
noise levels, record lengths) are illustrative: common practice, no source.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.typing import NDArray
from scipy.signal import lfilter
from sklearn.linear_model import Lasso, Ridge
from statsmodels.regression.quantile_regression import QuantReg

from arxwatch.estimators.arx import ArxOrder, regression_matrix
from arxwatch.estimators.identify import fit_arx, fit_lad, fit_lasso, fit_ols, fit_ridge


def simulate_arx(
    seed: int, n_samples: int = 2000, sigma_e: float = 0.1
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Simulate y(k) = 0.8 y(k-1) + 0.5 u(k-2) + e(k) with a binary input.

    A(q) = 1 - 0.8 q^-1, B(q) = 0.5 q^-2, so in ArxOrder terms a1 = -0.8,
    b1_1 = 0.5 with nk = 2 (Ljung 1999, section 4.2): y = B/A u + 1/A e.
    """
    rng = np.random.default_rng(seed)
    u = np.where(rng.random(n_samples) < 0.5, -1.0, 1.0)
    e = sigma_e * rng.standard_normal(n_samples)
    y = lfilter([0.0, 0.0, 0.5], [1.0, -0.8], u) + lfilter([1.0], [1.0, -0.8], e)
    return np.asarray(y, dtype=np.float64), u


def arx_problem(
    seed: int = 0, order: ArxOrder | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    y, u = simulate_arx(seed)
    return regression_matrix(order or ArxOrder(na=1, nb=(1,), nk=(2,)), y, u)


def test_ols_matches_numpy_lstsq() -> None:
    # Source: numpy.linalg.lstsq (LAPACK gelsd), the minimum-norm LS solution.
    phi, y = arx_problem()
    fit = fit_ols(phi, y)
    theta, rss, rank, _ = np.linalg.lstsq(phi, y, rcond=None)
    assert rank == 3
    np.testing.assert_allclose(fit.theta, theta, rtol=1e-10, atol=1e-12)
    assert fit.rss == pytest.approx(float(rss[0]), rel=1e-9)


def test_ols_matches_statsmodels_params_cov_and_scale() -> None:
    # Source: statsmodels OLS: params, cov_params() = scale (X'X)^-1 and
    # scale = RSS / (N - n).
    phi, y = arx_problem(order=ArxOrder(na=2, nb=(3,), nk=(1,)))
    fit = fit_ols(phi, y)
    ref = sm.OLS(y, phi).fit()
    np.testing.assert_allclose(fit.theta, ref.params, rtol=1e-9, atol=1e-12)
    assert fit.cov is not None
    np.testing.assert_allclose(fit.cov, ref.cov_params(), rtol=1e-8, atol=1e-16)
    assert fit.sigma2 == pytest.approx(ref.scale, rel=1e-10)
    assert fit.rss == pytest.approx(ref.ssr, rel=1e-10)
    standard_errors = fit.standard_errors()
    assert standard_errors is not None
    np.testing.assert_allclose(standard_errors, ref.bse, rtol=1e-8)


def test_ols_recovers_simulated_arx_coefficients() -> None:
    # Source: Ljung 1999, section 7.3 / chapter 9: for an ARX system with
    # white equation noise OLS is consistent and asymptotically normal with
    # covariance sigma^2 (Phi'Phi)^-1. A 5-standard-error band is missed with
    # probability about 6e-7 per coefficient, so the check is stable for any
    # seed, yet it is tight: one standard error here is about 0.002.
    for seed in range(3):
        phi, y = arx_problem(seed)
        fit = fit_ols(phi, y)
        standard_errors = fit.standard_errors()
        assert standard_errors is not None
        assert np.all(standard_errors < 0.01)
        truth = np.array([-0.8, 0.5, 0.0])  # a1, b1_1, c
        assert np.all(np.abs(fit.theta - truth) < 5.0 * standard_errors)
        # The noise variance is recovered too: sigma_e^2 = 0.01.
        assert fit.sigma2 == pytest.approx(0.01, rel=0.1)


def test_fit_arx_recovers_coefficients_and_predicts_validation() -> None:
    # Same source and tolerance as above; one-step fit on fresh data is
    # high because the noise is small relative to the input response.
    y, u = simulate_arx(7)
    result = fit_arx(ArxOrder(na=1, nb=(1,), nk=(2,), constant=False), y, u)
    standard_errors = result.fit.standard_errors()
    assert standard_errors is not None
    assert np.all(np.abs(result.fit.theta - [-0.8, 0.5]) < 5.0 * standard_errors)
    assert result.fit_percent_validation is not None
    assert result.fit_percent_validation > 85.0


@pytest.mark.parametrize("alpha", [0.1, 10.0, 1000.0])
def test_ridge_matches_sklearn(alpha: float) -> None:
    # Source: sklearn.linear_model.Ridge minimises ||y - Xw||^2 + alpha ||w||^2,
    # the same scaling as fit_ridge, so alpha is passed unchanged.
    phi, y = arx_problem(order=ArxOrder(na=2, nb=(2,), nk=(2,), constant=False))
    fit = fit_ridge(phi, y, alpha)
    ref = Ridge(alpha=alpha, fit_intercept=False, solver="svd").fit(phi, y)
    np.testing.assert_allclose(fit.theta, ref.coef_, rtol=1e-9, atol=1e-12)


def test_ridge_unpenalised_constant_matches_sklearn_intercept() -> None:
    # Source: sklearn Ridge(fit_intercept=True) leaves the intercept
    # unpenalised, which is fit_ridge with the constant column masked out.
    phi, y = arx_problem(order=ArxOrder(na=2, nb=(2,), nk=(2,)))
    y = y + 3.0
    mask = np.array([True, True, True, True, False])
    fit = fit_ridge(phi, y, 50.0, penalize_mask=mask)
    ref = Ridge(alpha=50.0, fit_intercept=True, solver="svd").fit(phi[:, :-1], y)
    np.testing.assert_allclose(fit.theta, [*ref.coef_, ref.intercept_], rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("alpha", [1e-4, 1e-2, 5e-2])
def test_lasso_matches_sklearn(alpha: float) -> None:
    # Source: sklearn.linear_model.Lasso minimises
    # (1/(2N)) ||y - Xw||^2 + alpha ||w||_1, the same scaling as fit_lasso.
    # nb = 3 adds two lags with true coefficient 0, so larger alpha zeroes
    # some of them; the lagged outputs are strongly correlated columns.
    phi, y = arx_problem(order=ArxOrder(na=2, nb=(3,), nk=(1,), constant=False))
    fit = fit_lasso(phi, y, alpha, tol=1e-12, max_iter=100_000)
    ref = Lasso(alpha=alpha, fit_intercept=False, tol=1e-14, max_iter=1_000_000).fit(phi, y)
    assert fit.converged
    np.testing.assert_allclose(fit.theta, ref.coef_, atol=1e-6)
    assert np.count_nonzero(fit.theta) == np.count_nonzero(ref.coef_)


def test_lasso_unpenalised_constant_matches_sklearn_intercept() -> None:
    # Source: sklearn Lasso(fit_intercept=True) does not penalise the
    # intercept, which is fit_lasso with the constant column masked out.
    phi, y = arx_problem(order=ArxOrder(na=1, nb=(2,), nk=(1,)))
    y = y + 3.0
    mask = np.array([True, True, True, False])
    fit = fit_lasso(phi, y, 0.02, penalize_mask=mask, tol=1e-12, max_iter=100_000)
    ref = Lasso(alpha=0.02, fit_intercept=True, tol=1e-14, max_iter=1_000_000).fit(phi[:, :-1], y)
    np.testing.assert_allclose(fit.theta, [*ref.coef_, ref.intercept_], atol=1e-6)


def laplace_problem(seed: int = 0) -> tuple[NDArray[np.float64], NDArray[np.float64], float]:
    # Continuous regressors and Laplace noise put the data in general
    # position, so the LAD minimiser is unique with probability 1 (Koenker
    # 2005, Quantile Regression).
    rng = np.random.default_rng(seed)
    n_samples, scale = 2000, 0.5
    phi = np.column_stack([rng.standard_normal((n_samples, 2)), np.ones(n_samples)])
    y = phi @ np.array([1.0, -2.0, 0.5]) + rng.laplace(scale=scale, size=n_samples)
    return phi, y, scale


def test_lad_matches_statsmodels_quantreg_median() -> None:
    # Source: statsmodels QuantReg(q=0.5) (iteratively reweighted least
    # squares) minimises the same absolute loss; tightened so its own
    # convergence error is far below the tolerance.
    phi, y, _ = laplace_problem()
    fit = fit_lad(phi, y)
    ref = QuantReg(y, phi).fit(q=0.5, p_tol=1e-10, max_iter=10_000)
    np.testing.assert_allclose(fit.theta, ref.params, atol=1e-5)
    assert fit.converged


def test_lad_objective_not_beaten_by_statsmodels() -> None:
    # Source: the LP optimum is the global minimum of sum |y - Phi theta|
    # (Koenker & Bassett 1978), so no other solver can go below it.
    phi, y, _ = laplace_problem(1)
    fit = fit_lad(phi, y)
    ref = QuantReg(y, phi).fit(q=0.5)
    ours = np.sum(np.abs(y - phi @ fit.theta))
    theirs = np.sum(np.abs(y - phi @ ref.params))
    assert ours <= theirs + 1e-9


def test_lad_covariance_matches_gaussian_closed_form() -> None:
    # Source: Koenker 2005, chapter 3: with iid errors the median regression
    # has asymptotic covariance (1/4) f(0)^-2 (Phi'Phi)^-1. Gaussian errors of
    # standard deviation sigma have f(0) = 1/(sigma sqrt(2 pi)), giving
    # (pi/2) sigma^2 (Phi'Phi)^-1. Gaussian rather than Laplace errors here:
    # their density is smooth at the median, so the difference-quotient
    # sparsity estimate has no first-order bias (the Laplace cusp gives it
    # about +9 % at N = 2000). Its sampling error is about 5 % at N = 2000
    # over 20 seeds; 15 % is three times that: common practice, no source.
    rng = np.random.default_rng(0)
    n_samples, sigma = 2000, 0.5
    phi = np.column_stack([rng.standard_normal((n_samples, 2)), np.ones(n_samples)])
    y = phi @ np.array([1.0, -2.0, 0.5]) + sigma * rng.standard_normal(n_samples)
    fit = fit_lad(phi, y)
    expected = np.sqrt(np.diag(np.pi / 2.0 * sigma**2 * np.linalg.inv(phi.T @ phi)))
    standard_errors = fit.standard_errors()
    assert standard_errors is not None
    np.testing.assert_allclose(standard_errors, expected, rtol=0.15)


def test_lad_scale_estimates_laplace_scale() -> None:
    # Source: the maximum-likelihood scale of Laplace(b) errors is the mean
    # absolute deviation from the median (Norton 1984, "The double
    # exponential distribution", The American Statistician 38(2)). Its
    # relative standard error is 1/sqrt(N) = 2.2 % at N = 2000; 7 % is about
    # three of those: common practice, no source.
    phi, y, scale = laplace_problem(2)
    assert fit_lad(phi, y).scale == pytest.approx(scale, rel=0.07)


# --- several gap-free stretches ------------------------------------------------


def stretch(seed: int, n: int, y0: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """One stretch of y(k) = 0.8 y(k-1) + 0.5 u(k-2) + e(k), starting from y0.

    The first two samples are the stretch's own history: any value fits the
    recursion from k = 2 on (Ljung 1999, section 4.2).
    """
    rng = np.random.default_rng(seed)
    u = np.where(rng.random(n) < 0.5, -1.0, 1.0)
    y = np.full(n, y0)
    for k in range(2, n):
        y[k] = 0.8 * y[k - 1] + 0.5 * u[k - 2] + 0.1 * rng.standard_normal()
    return y, u


def hand_rows(
    y: NDArray[np.float64], u: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Rows [-y(k-1), u(k-2), 1] and targets y(k) of one stretch, k = 2 .. N-1, by hand."""
    rows = [[-y[k - 1], u[k - 2], 1.0] for k in range(2, y.shape[0])]
    return np.array(rows), y[2:]


STRETCHES = [
    stretch(1, 300, 0.0),
    stretch(2, 180, 100.0),
    stretch(3, 5, 0.0),
    stretch(4, 250, -80.0),
]
ORDER_12 = ArxOrder(na=1, nb=(1,), nk=(2,))


def joined() -> tuple[NDArray[np.float64], NDArray[np.float64], list[int]]:
    y = np.concatenate([s[0] for s in STRETCHES])
    u = np.concatenate([s[1] for s in STRETCHES])
    lengths = [s[0].shape[0] for s in STRETCHES]
    return y, u, np.cumsum(lengths)[:-1].tolist()


def test_stretch_fit_equals_lstsq_on_rows_stacked_by_hand() -> None:
    y, u, breaks = joined()
    parts = [hand_rows(*s) for s in STRETCHES]
    phi = np.vstack([p[0] for p in parts])
    target = np.concatenate([p[1] for p in parts])
    # Source: numpy.linalg.lstsq, least squares on the stacked rows of each stretch.
    expected, *_ = np.linalg.lstsq(phi, target, rcond=None)
    result = fit_arx(ORDER_12, y, u, breaks=breaks, validation_fraction=0.0)
    np.testing.assert_allclose(result.fit.theta, expected, rtol=1e-10, atol=1e-12)
    assert result.fit.n_samples == target.shape[0] == 727  # 298 + 178 + 3 + 248 rows


def test_a_split_stretch_is_scored_as_two_with_their_own_history() -> None:
    y, u, breaks = joined()
    result = fit_arx(ORDER_12, y, u, breaks=breaks, validation_fraction=0.3)
    # 735 samples, the last round(0.3 * 735) = 220 held back: that cuts the fourth
    # stretch (from sample 485) at 515, leaving 30 of it for estimation.
    head = [STRETCHES[0], STRETCHES[1], STRETCHES[2], (STRETCHES[3][0][:30], STRETCHES[3][1][:30])]
    parts = [hand_rows(*s) for s in head]
    # Source: numpy.linalg.lstsq on the estimation rows.
    expected, *_ = np.linalg.lstsq(
        np.vstack([p[0] for p in parts]), np.concatenate([p[1] for p in parts]), rcond=None
    )
    np.testing.assert_allclose(result.fit.theta, expected, rtol=1e-10, atol=1e-12)
    tail_phi, tail_y = hand_rows(STRETCHES[3][0][30:], STRETCHES[3][1][30:])
    measured, predicted = tail_y, tail_phi @ result.fit.theta
    # Source: the fit percentage's definition, 100 (1 - |y - yhat| / |y - mean y|).
    spread = np.linalg.norm(measured - measured.mean())
    assert result.fit_percent_validation == pytest.approx(
        100.0 * (1.0 - np.linalg.norm(measured - predicted) / spread), rel=1e-12
    )


def test_no_row_straddles_a_join() -> None:
    # The stretches start at 0, 100 and -80 degC: a row across a join would have to
    # explain a jump of 100 by one step of the model, and drags the fit off.
    y, u, breaks = joined()
    together = fit_arx(ORDER_12, y, u, breaks=breaks, validation_fraction=0.0)
    spliced = fit_arx(ORDER_12, y, u, validation_fraction=0.0)
    apart = [
        fit_arx(ORDER_12, s[0], s[1], validation_fraction=0.0) for s in STRETCHES if s[0].size > 50
    ]
    truth = np.array([-0.8, 0.5, 0.0])  # a1, b1_1, c of the simulated recursion
    assert np.abs(together.fit.theta - truth).max() < 0.02
    assert np.abs(spliced.fit.theta - truth).max() > 0.1  # wrecked by the joins
    # as good as the stretches fitted apart: the same innovation variance (0.1^2)
    for single in apart:
        assert together.fit.sigma2 == pytest.approx(single.fit.sigma2, rel=0.25)
    assert together.fit.sigma2 == pytest.approx(0.01, rel=0.15)
    assert spliced.fit.sigma2 > 10 * together.fit.sigma2
