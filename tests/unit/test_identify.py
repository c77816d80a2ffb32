"""Unit tests for arxwatch.estimators.identify: shapes, validation, closed forms.

Simulated signals and sizes are illustrative: common practice, no source,
unless a comment names one.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import doctest
from collections.abc import Callable
from types import SimpleNamespace

import numpy as np
import pytest

from arxwatch.estimators import identify
from arxwatch.estimators.arx import ArxOrder, regression_matrix
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.identify import (
    ArxFit,
    BatchFit,
    RankDeficientError,
    fit_arx,
    fit_lad,
    fit_lasso,
    fit_ols,
    fit_percent,
    fit_ridge,
    one_step_predict,
    split_breaks,
    split_series,
)


def _problem(n_samples: int = 50, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    phi = np.column_stack([rng.standard_normal((n_samples, 2)), np.ones(n_samples)])
    y = phi @ np.array([1.0, -0.5, 2.0]) + 0.1 * rng.standard_normal(n_samples)
    return phi, y


def _arx_record(n_samples: int = 200, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    u = rng.standard_normal(n_samples)
    y = np.zeros(n_samples)
    for k in range(1, n_samples):
        y[k] = 0.7 * y[k - 1] + 0.4 * u[k - 1] + 0.05 * rng.standard_normal()
    return y, u


def test_docstring_examples_run() -> None:
    # Style guide: Examples run as doctests.
    result = doctest.testmod(identify, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0
    assert result.failed == 0


@pytest.mark.parametrize(
    ("name", "fitter"),
    [
        ("ols", fit_ols),
        ("ridge", lambda p, y: fit_ridge(p, y, alpha=1.0)),
        ("lasso", lambda p, y: fit_lasso(p, y, alpha=0.01)),
        ("lad", fit_lad),
    ],
)
def test_batch_fit_shapes_and_read_only(
    name: str, fitter: Callable[[np.ndarray, np.ndarray], BatchFit]
) -> None:
    phi, y = _problem()
    fit = fitter(phi, y)
    assert isinstance(fit, BatchFit)
    assert fit.method == name
    assert fit.theta.shape == (3,)
    assert (fit.n_samples, fit.n_params) == (50, 3)
    assert not fit.theta.flags.writeable
    assert fit.predict(phi).shape == (50,)
    # rss is the plain residual sum of squares for every method.
    residuals = y - phi @ fit.theta
    assert fit.rss == pytest.approx(float(residuals @ residuals), rel=1e-12)
    if name == "lasso":
        assert fit.cov is None
        assert fit.standard_errors() is None
    else:
        assert fit.cov is not None
        assert fit.cov.shape == (3, 3)
        assert not fit.cov.flags.writeable
        se = fit.standard_errors()
        assert se is not None and se.shape == (3,)


def test_batch_fit_does_not_alias_inputs() -> None:
    phi, y = _problem()
    phi_before, y_before = phi.copy(), y.copy()
    fit_ols(phi, y)
    fit_lad(phi, y)
    np.testing.assert_array_equal(phi, phi_before)
    np.testing.assert_array_equal(y, y_before)


def test_ols_exact_line_and_sigma2_definition() -> None:
    # Closed form: y = 1 + 2 x exactly, so theta = (1, 2) and rss = 0.
    x = np.arange(5.0)
    phi = np.column_stack([np.ones(5), x])
    fit = fit_ols(phi, 1.0 + 2.0 * x)
    np.testing.assert_allclose(fit.theta, [1.0, 2.0], atol=1e-12)
    assert fit.rss == pytest.approx(0.0, abs=1e-20)
    # sigma2 = RSS / (N - n) (Ljung 1999, section 7.3).
    fit = fit_ols(phi, np.array([1.0, 3.0, 4.0, 7.0, 9.0]))
    assert fit.sigma2 == pytest.approx(fit.rss / 3.0)
    assert fit.scale == pytest.approx(np.sqrt(fit.sigma2))


def test_ols_scale_invariant_rank_decision() -> None:
    # Columns in very different units (a signal in 1e-6 units beside a
    # constant) are still full rank after equilibration.
    phi, y = _problem()
    phi = phi * np.array([1e-6, 1e6, 1.0])
    fit = fit_ols(phi, y)
    np.testing.assert_allclose(fit.theta * np.array([1e-6, 1e6, 1.0]), fit_ols(*_problem()).theta)


@pytest.mark.parametrize(
    ("phi", "y", "error", "match"),
    [
        (np.ones(5), np.ones(5), DimensionError, r"Phi must be 2-D .* got shape \(5,\)"),
        (np.ones((5, 2)), np.ones((5, 1)), DimensionError, r"y must be 1-D .* shape \(5, 1\)"),
        (np.ones((5, 2)), np.ones(4), DimensionError, "y has 4 samples but Phi has 5 rows"),
        (np.ones((5, 0)), np.ones(5), DimensionError, "Phi has no columns"),
        (np.ones((3, 3)), np.ones(3), DimensionError, r"N=3 rows for n=3 parameters; N > n"),
    ],
)
def test_shape_errors(phi: np.ndarray, y: np.ndarray, error: type, match: str) -> None:
    for fitter in (fit_ols, fit_lad, lambda p, t: fit_ridge(p, t, 1.0)):
        with pytest.raises(error, match=match):
            fitter(phi, y)


def test_non_finite_input_names_argument_value_and_index() -> None:
    phi, y = _problem()
    phi[1, 0] = np.nan
    with pytest.raises(
        ValueError, match=r"Phi must hold finite values, found nan at index \(1, 0\)"
    ):
        fit_ols(phi, y)
    phi, y = _problem()
    y[7] = np.inf
    with pytest.raises(ValueError, match=r"y must hold finite values, found inf at index 7"):
        fit_lasso(phi, y, alpha=0.1)


def test_rank_deficient_constant_input_gives_clear_error() -> None:
    # A valve held at one position during commissioning: with nb=2 the two
    # lagged input columns equal each other and the constant column.
    y, _ = _arx_record(100)
    u = np.full(100, 40.0)
    phi, target = regression_matrix(ArxOrder(na=1, nb=(2,), nk=(1,)), y, u)
    with pytest.raises(RankDeficientError, match=r"rank 2 but 4 independent columns") as info:
        fit_ols(phi, target)
    assert info.value.rank == 2
    assert info.value.n_params == 4
    # Columns 1, 2 (u lags) and 3 (constant) are collinear; column 0 (-y) is not.
    assert info.value.columns == (1, 2, 3)
    assert "commissioning" in str(info.value)
    assert isinstance(info.value, ValueError)


def test_rank_deficient_zero_column_named() -> None:
    phi, y = _problem()
    phi[:, 1] = 0.0
    with pytest.raises(RankDeficientError, match=r"columns \[1\] are linearly dependent"):
        fit_ols(phi, y)
    with pytest.raises(RankDeficientError):
        fit_lad(phi, y)


def test_ridge_with_zero_alpha_is_ols() -> None:
    # alpha = 0 removes the penalty (Hoerl & Kennard 1970).
    phi, y = _problem()
    ols, ridge = fit_ols(phi, y), fit_ridge(phi, y, alpha=0.0)
    np.testing.assert_allclose(ridge.theta, ols.theta, rtol=1e-12)
    assert ridge.cov is not None and ols.cov is not None
    np.testing.assert_allclose(ridge.cov, ols.cov, rtol=1e-10)


def test_ridge_closed_form_and_sandwich_covariance() -> None:
    # theta = (X'X + a D)^-1 X'y and cov = s^2 W X'X W (Hoerl & Kennard 1970).
    phi, y = _problem()
    mask = np.array([True, True, False])
    fit = fit_ridge(phi, y, alpha=3.0, penalize_mask=mask)
    w = np.linalg.inv(phi.T @ phi + 3.0 * np.diag(mask.astype(float)))
    np.testing.assert_allclose(fit.theta, w @ phi.T @ y, rtol=1e-10)
    assert fit.cov is not None
    np.testing.assert_allclose(fit.cov, fit.sigma2 * w @ phi.T @ phi @ w, rtol=1e-10)
    assert fit.sigma2 == pytest.approx(fit.rss / (50 - 3))
    assert fit.alpha == 3.0


def test_ridge_unpenalized_collinear_columns_are_rank_deficient() -> None:
    phi, y = _problem()
    phi[:, 1] = 2.0 * phi[:, 2]
    with pytest.raises(RankDeficientError):
        fit_ridge(phi, y, alpha=1.0, penalize_mask=np.array([True, False, False]))
    # Penalising them makes the problem well posed again.
    assert fit_ridge(phi, y, alpha=1.0).theta.shape == (3,)


@pytest.mark.parametrize(
    ("kwargs", "error", "match"),
    [
        ({"alpha": -1.0}, ValueError, r"alpha must be a finite number >= 0, got -1.0"),
        ({"alpha": float("nan")}, ValueError, "alpha must be a finite number"),
        (
            {"alpha": 1.0, "penalize_mask": np.array([1, 1, 0])},
            ValueError,
            "penalize_mask must hold booleans, got dtype int64",
        ),
        (
            {"alpha": 1.0, "penalize_mask": np.array([True, False])},
            DimensionError,
            r"penalize_mask must have shape \(3,\) to match Phi, got \(2,\)",
        ),
    ],
)
def test_penalty_argument_errors(kwargs: dict[str, object], error: type, match: str) -> None:
    phi, y = _problem()
    for fitter in (fit_ridge, fit_lasso):
        with pytest.raises(error, match=match):
            fitter(phi, y, **kwargs)  # type: ignore[arg-type]


def test_lasso_solver_argument_errors() -> None:
    phi, y = _problem()
    with pytest.raises(ValueError, match=r"tol must be a finite number > 0, got 0.0"):
        fit_lasso(phi, y, alpha=0.1, tol=0.0)
    with pytest.raises(ValueError, match=r"max_iter must be an integer >= 1, got 0"):
        fit_lasso(phi, y, alpha=0.1, max_iter=0)


def test_lasso_large_alpha_gives_zero_and_keeps_unpenalized_offset() -> None:
    # KKT: theta = 0 solves the lasso when alpha >= max_j |phi_j' y| / N, the
    # lambda_max that starts the path (Friedman, Hastie & Tibshirani 2010).
    phi, y = _problem()
    alpha_max = float(np.max(np.abs(phi.T @ y)) / 50)
    fit = fit_lasso(phi, y, alpha=alpha_max * 1.01)
    np.testing.assert_array_equal(fit.theta, np.zeros(3))
    assert fit.converged
    # sigma2 uses N - n_active (Zou, Hastie & Tibshirani 2007); here n_active = 0.
    assert fit.sigma2 == pytest.approx(float(y @ y) / 50)
    # Unpenalised constant: the other two shrink to 0 and the offset is the
    # least-squares offset of the remaining model, mean(y).
    fit = fit_lasso(phi, y, alpha=1e3, penalize_mask=np.array([True, True, False]))
    np.testing.assert_allclose(fit.theta, [0.0, 0.0, y.mean()], atol=1e-12)


def test_lasso_small_alpha_approaches_ols() -> None:
    phi, y = _problem()
    np.testing.assert_allclose(
        fit_lasso(phi, y, alpha=1e-9).theta, fit_ols(phi, y).theta, atol=1e-7
    )


def test_lasso_reports_non_convergence() -> None:
    # Correlated columns need many sweeps; one is not enough.
    rng = np.random.default_rng(3)
    x = rng.standard_normal(100)
    phi = np.column_stack([x, x + 0.3 * rng.standard_normal(100)])
    fit = fit_lasso(phi, x, alpha=1e-4, max_iter=1)
    assert not fit.converged
    assert fit.n_iter == 1
    fit = fit_lasso(phi, x, alpha=1e-4, max_iter=100_000)
    assert fit.converged
    assert fit.n_iter > 1


def test_lad_is_median_and_robust_to_outlier() -> None:
    # Closed form: with only a constant column LAD gives the median.
    phi = np.ones((7, 1))
    y = np.array([1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 1e6])
    fit = fit_lad(phi, y)
    assert fit.theta[0] == pytest.approx(4.0, abs=1e-9)
    # scale is the mean absolute residual.
    assert fit.scale == pytest.approx(np.mean(np.abs(y - 4.0)))
    assert fit.sigma2 == pytest.approx(fit.rss / 6.0)


def test_lad_solver_failure_raises_with_message(monkeypatch: pytest.MonkeyPatch) -> None:
    def failing_linprog(*args: object, **kwargs: object) -> SimpleNamespace:
        return SimpleNamespace(status=4, message="Numerical difficulties encountered.", x=None)

    monkeypatch.setattr(identify, "linprog", failing_linprog)
    phi, y = _problem()
    with pytest.raises(RuntimeError, match=r"status 4\): Numerical difficulties"):
        fit_lad(phi, y)


def test_fit_percent_perfect_mean_and_worse() -> None:
    # Definition 100 (1 - |y - yhat| / |y - mean y|) (Ljung 1999, chapter 16).
    y = np.array([1.0, 4.0, 2.0, 8.0])
    assert fit_percent(y, y) == 100.0
    assert fit_percent(y, np.full(4, y.mean())) == pytest.approx(0.0, abs=1e-12)
    # Halfway between the mean and the truth leaves half the error: 50 %.
    assert fit_percent(y, y.mean() + 0.5 * (y - y.mean())) == pytest.approx(50.0)
    assert fit_percent(y, -y) < 0.0


def test_fit_percent_errors() -> None:
    with pytest.raises(ValueError, match=r"y_true is constant \(all 3 samples equal 2.0\)"):
        fit_percent([2.0, 2.0, 2.0], [1.0, 2.0, 3.0])
    with pytest.raises(DimensionError, match=r"y_pred must have the shape of y_true \(3,\)"):
        fit_percent([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(DimensionError, match="y_true must be 1-D"):
        fit_percent([[1.0, 2.0]], [[1.0, 2.0]])
    with pytest.raises(DimensionError, match="at least 2 samples, got 1"):
        fit_percent([1.0], [1.0])
    with pytest.raises(ValueError, match="y_pred must hold finite values, found nan at index 1"):
        fit_percent([1.0, 2.0], [1.0, np.nan])


def test_one_step_predict_shapes_and_errors() -> None:
    assert one_step_predict([1.0, 2.0], np.ones((4, 2))).tolist() == [3.0] * 4
    with pytest.raises(DimensionError, match=r"Phi must have shape \(M, 2\) to match theta"):
        one_step_predict([1.0, 2.0], np.ones((4, 3)))
    with pytest.raises(DimensionError, match="theta must be 1-D"):
        one_step_predict(np.ones((2, 1)), np.ones((4, 2)))


def test_split_series_lengths_and_errors() -> None:
    y = np.arange(10.0)
    u = np.arange(20.0).reshape(10, 2)
    y_est, u_est, y_val, u_val = split_series(y, u, 0.3)
    assert (y_est.shape, y_val.shape) == ((7,), (3,))
    assert u_est is not None and u_val is not None
    assert (u_est.shape, u_val.shape) == ((7, 2), (3, 2))
    np.testing.assert_array_equal(np.concatenate([y_est, y_val]), y)
    y_est, u_est, y_val, u_val = split_series(y, None, 0.0)
    assert (y_est.shape, y_val.shape, u_est, u_val) == ((10,), (0,), None, None)
    for bad in (-0.1, 0.95, float("nan")):
        with pytest.raises(ValueError, match=r"validation_fraction must be in \[0, 0.9\]"):
            split_series(y, u, bad)
    with pytest.raises(DimensionError, match=r"u must have shape \(N=10, n_inputs\)"):
        split_series(y, np.ones(9), 0.3)
    with pytest.raises(ValueError, match="u must hold finite values, found nan"):
        split_series(y, np.full(10, np.nan), 0.3)


def test_fit_arx_split_rows_do_not_straddle() -> None:
    y, u = _arx_record(200)
    order = ArxOrder(na=1, nb=(2,), nk=(1,))
    result = fit_arx(order, y, u, validation_fraction=0.25)
    assert isinstance(result, ArxFit)
    assert (result.n_estimation, result.n_validation) == (150, 50)
    # Each segment loses its own first depth samples.
    assert result.fit.n_samples == 150 - order.depth
    phi, target = regression_matrix(order, y[:150], u[:150])
    np.testing.assert_allclose(result.fit.theta, fit_ols(phi, target).theta)
    phi_val, target_val = regression_matrix(order, y[150:], u[150:])
    expected = fit_percent(target_val, phi_val @ result.fit.theta)
    assert result.fit_percent_validation == pytest.approx(expected)
    assert result.fit_percent_validation is not None and result.fit_percent_validation > 90.0


def test_fit_arx_without_validation() -> None:
    y, u = _arx_record(100)
    result = fit_arx(ArxOrder(1, (1,), (1,)), y, u, validation_fraction=0.0)
    assert result.fit_percent_validation is None
    assert (result.n_estimation, result.n_validation) == (100, 0)
    assert result.fit.n_samples == 99


def test_fit_arx_penalised_methods_leave_constant_unpenalised() -> None:
    y, u = _arx_record(200)
    order = ArxOrder(1, (1,), (1,))
    result = fit_arx(order, y, u, method="ridge", validation_fraction=0.0, alpha=5.0)
    phi, target = regression_matrix(order, y, u)
    expected = fit_ridge(phi, target, 5.0, penalize_mask=np.array([True, True, False]))
    np.testing.assert_allclose(result.fit.theta, expected.theta)
    result = fit_arx(order, y, u, method="lasso", alpha=0.01, penalize_mask=None)
    assert result.fit.method == "lasso"
    assert fit_arx(order, y, u, method="lad").fit.method == "lad"


def test_fit_arx_errors() -> None:
    y, u = _arx_record(20)
    order = ArxOrder(na=2, nb=(2,), nk=(3,))
    with pytest.raises(ValueError, match=r"method must be one of .* got 'ml'"):
        fit_arx(order, y, u, method="ml")
    with pytest.raises(DimensionError, match=r"validation segment has 4 samples .* depth 4"):
        fit_arx(order, y, u, validation_fraction=0.2)
    with pytest.raises(DimensionError, match="estimation segment has 4 samples"):
        fit_arx(order, y[:8], u[:8], validation_fraction=0.5)
    with pytest.raises(TypeError, match="alpha"):
        fit_arx(order, y, u, method="ols", alpha=1.0)


@pytest.mark.parametrize(
    ("breaks", "fraction", "expected"),
    [
        ((), 0.3, ((), ())),
        ((3, 7), 0.3, ((3,), ())),  # 10 samples, validation 7..9: the split lands on a break
        ((3, 8), 0.3, ((3,), (1,))),  # the stretch 3..7 is cut at 7: its tail 7 starts anew
        ((2, 5), 0.0, ((2, 5), ())),
    ],
)
def test_split_breaks_cuts_a_stretch_at_the_split(
    breaks: tuple[int, ...], fraction: float, expected: tuple[tuple[int, ...], tuple[int, ...]]
) -> None:
    assert split_breaks(breaks, 10, fraction) == expected


def test_fit_arx_with_breaks_needs_a_stretch_longer_than_the_order() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,))
    y = np.arange(12.0)
    with pytest.raises(DimensionError, match=r"estimation segment has 2 samples in its longest"):
        fit_arx(order, y, y, breaks=[2, 4, 6, 8, 10], validation_fraction=0.0)
