r"""Batch identification of linear regressions for commissioning baselines.

Every fit takes a regression matrix ``Phi`` of shape (N, n) and a target
``y`` of shape (N,), as built by
:func:`arxwatch.estimators.arx.regression_matrix`, and returns a frozen
:class:`BatchFit`. Four criteria are offered:

========  ==============================================================
method    minimised objective
========  ==============================================================
``ols``   :math:`\|y - \Phi\theta\|_2^2`
``ridge`` :math:`\|y - \Phi\theta\|_2^2 + \alpha \sum_{j \in M} \theta_j^2`
``lasso`` :math:`\frac{1}{2N}\|y - \Phi\theta\|_2^2 + \alpha \sum_{j \in M} |\theta_j|`
``lad``   :math:`\|y - \Phi\theta\|_1`
========  ==============================================================

where :math:`M` is the set of penalised columns (``penalize_mask``).
:func:`fit_arx` splits a recorded series into an estimation and a
validation segment, fits one of these and scores the one-step-ahead
prediction on the validation segment with :func:`fit_percent`.

References
----------
L. Ljung, *System Identification: Theory for the User*, 2nd ed., Prentice
Hall, 1999, section 7.3 (linear regressions and least squares) and
chapter 16 (model validation).

G. H. Golub and C. F. Van Loan, *Matrix Computations*, 4th ed., Johns
Hopkins University Press, 2013, section 5.5 (rank-deficient least squares).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import sparse
from scipy.optimize import linprog
from scipy.special import ndtri

from arxwatch.estimators.arx import (
    ArxOrder,
    check_breaks,
    scored_rows,
    segment_lengths,
    segment_regression_matrix,
)
from arxwatch.estimators.errors import DimensionError

__all__ = [
    "ArxFit",
    "BatchFit",
    "RankDeficientError",
    "fit_arx",
    "fit_lad",
    "fit_lasso",
    "fit_ols",
    "fit_percent",
    "fit_ridge",
    "one_step_predict",
    "split_breaks",
    "split_series",
]

#: Largest accepted ``validation_fraction``: at least a tenth of the record
#: must remain for estimation.
MAX_VALIDATION_FRACTION = 0.9

#: A column belongs to the dependent set when its unit vector has at least
#: this much projection on the numerical null space of the equilibrated
#: matrix. Columns outside the set project at rounding level (~1e-16).
_NULL_SPACE_SHARE = math.sqrt(float(np.finfo(np.float64).eps))


class RankDeficientError(ValueError):
    """The regression matrix does not determine every parameter.

    Parameters
    ----------
    message : str
        Human-readable explanation.
    rank : int
        Numerical rank found.
    n_params : int
        Rank needed (number of columns).
    columns : tuple of int
        Indices of the columns that are linearly dependent on each other.
    """

    def __init__(self, message: str, *, rank: int, n_params: int, columns: tuple[int, ...]) -> None:
        super().__init__(message)
        self.rank = rank
        self.n_params = n_params
        self.columns = columns


@dataclass(frozen=True, eq=False)
class BatchFit:
    """Result of one batch fit.

    Arrays are stored as read-only copies. Equality is identity (arrays
    have no single truth value).

    Parameters
    ----------
    method : str
        ``"ols"``, ``"ridge"``, ``"lasso"`` or ``"lad"``.
    theta : ndarray, shape (n,)
        Estimated parameters.
    cov : ndarray, shape (n, n) or None
        Estimated covariance of ``theta``; None where the method has no
        standard estimate (lasso).
    sigma2 : float
        Residual variance estimate, ``rss / (n_samples - dof)`` with the
        degrees of freedom ``dof`` given in the fitting function.
    rss : float
        Residual sum of squares on the fitted rows.
    n_samples : int
        Number of rows N that were fitted.
    n_params : int
        Number of parameters n.
    alpha : float
        Penalty weight (0.0 for ``ols`` and ``lad``).
    scale : float
        Residual scale in the method's own loss: ``sqrt(sigma2)`` for the
        squared-error fits, the mean absolute residual for ``lad``.
    converged : bool
        Whether an iterative solver met its tolerance (always True for the
        closed-form fits).
    n_iter : int
        Iterations used by an iterative solver; 0 for closed-form fits.
    """

    method: str
    theta: NDArray[np.float64]
    cov: NDArray[np.float64] | None
    sigma2: float
    rss: float
    n_samples: int
    n_params: int
    alpha: float
    scale: float
    converged: bool
    n_iter: int

    def __post_init__(self) -> None:
        object.__setattr__(self, "theta", _read_only(self.theta))
        if self.cov is not None:
            object.__setattr__(self, "cov", _read_only(self.cov))

    def standard_errors(self) -> NDArray[np.float64] | None:
        """Return the standard errors ``sqrt(diag(cov))``, or None without ``cov``.

        Returns
        -------
        ndarray, shape (n,) or None
            Standard error of each entry of ``theta``.
        """
        if self.cov is None:
            return None
        return np.sqrt(np.diag(self.cov))

    def predict(self, Phi: ArrayLike) -> NDArray[np.float64]:
        """Return the one-step-ahead predictions ``Phi @ theta``.

        Parameters
        ----------
        Phi : array_like, shape (M, n)
            Regressors to predict from.

        Returns
        -------
        ndarray, shape (M,)
            Predicted outputs.

        Raises
        ------
        DimensionError
            If ``Phi`` does not have n columns.
        """
        return one_step_predict(self.theta, Phi)


@dataclass(frozen=True, eq=False)
class ArxFit:
    """An ARX model fitted on the head of a record and scored on its tail.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    fit : BatchFit
        Fit on the estimation segment.
    fit_percent_validation : float or None
        :func:`fit_percent` of the one-step-ahead prediction on the
        validation segment; None when no validation segment was kept.
    n_estimation : int
        Samples in the estimation segment (the fit uses
        ``n_estimation - order.depth`` rows, less ``order.depth`` more per
        further stretch).
    n_validation : int
        Samples in the validation segment (``n_validation - order.depth``
        rows are scored, likewise per stretch); 0 without validation.
    """

    order: ArxOrder
    fit: BatchFit
    fit_percent_validation: float | None
    n_estimation: int
    n_validation: int


def _read_only(values: NDArray[np.float64]) -> NDArray[np.float64]:
    out = np.array(values, dtype=np.float64, copy=True)
    out.setflags(write=False)
    return out


def _check_finite(values: NDArray[np.float64], name: str) -> None:
    bad = ~np.isfinite(values)
    if bad.any():
        index = tuple(int(i) for i in np.argwhere(bad)[0])
        where = index[0] if len(index) == 1 else index
        raise ValueError(f"{name} must hold finite values, found {values[index]} at index {where}")


def _check_problem(Phi: ArrayLike, y: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    phi = np.asarray(Phi, dtype=np.float64)
    target = np.asarray(y, dtype=np.float64)
    if phi.ndim != 2:
        raise DimensionError(f"Phi must be 2-D with shape (N, n), got shape {phi.shape}")
    if target.ndim != 1:
        raise DimensionError(f"y must be 1-D with shape (N,), got shape {target.shape}")
    n_samples, n_params = phi.shape
    if target.shape[0] != n_samples:
        raise DimensionError(f"y has {target.shape[0]} samples but Phi has {n_samples} rows")
    if n_params == 0:
        raise DimensionError("Phi has no columns; at least one parameter is needed")
    if n_samples <= n_params:
        raise DimensionError(
            f"Phi has N={n_samples} rows for n={n_params} parameters; N > n is needed"
        )
    _check_finite(phi, "Phi")
    _check_finite(target, "y")
    return phi, target


def _check_alpha(alpha: float) -> float:
    value = float(alpha)
    if not math.isfinite(value) or value < 0.0:
        raise ValueError(f"alpha must be a finite number >= 0, got {alpha!r}")
    return value


def _check_mask(penalize_mask: ArrayLike | None, n_params: int) -> NDArray[np.bool_]:
    if penalize_mask is None:
        return np.ones(n_params, dtype=bool)
    mask = np.asarray(penalize_mask)
    if mask.dtype != np.bool_:
        raise ValueError(f"penalize_mask must hold booleans, got dtype {mask.dtype}")
    if mask.shape != (n_params,):
        raise DimensionError(
            f"penalize_mask must have shape ({n_params},) to match Phi, got {mask.shape}"
        )
    return mask


@dataclass(frozen=True, eq=False)
class _Svd:
    """SVD of a column-equilibrated matrix ``A = (U diag(s) Vt) diag(col_scale)``."""

    u: NDArray[np.float64]
    s: NDArray[np.float64]
    vt: NDArray[np.float64]
    col_scale: NDArray[np.float64]

    def solve(self, b: NDArray[np.float64]) -> NDArray[np.float64]:
        """Least-squares solution of ``A x = b``."""
        scaled: NDArray[np.float64] = self.vt.T @ ((self.u.T @ b) / self.s)
        return scaled / self.col_scale

    def inverse_gram(self) -> NDArray[np.float64]:
        """``(A^T A)^{-1}`` without forming ``A^T A``."""
        inner: NDArray[np.float64] = (self.vt.T / self.s**2) @ self.vt
        return inner / np.outer(self.col_scale, self.col_scale)


def _full_rank_svd(A: NDArray[np.float64], name: str) -> _Svd:
    # Scaling the columns to unit norm is a change of variables that leaves
    # the solution unchanged but makes the rank decision independent of the
    # signals' units (a valve in % next to a constant column); it nearly
    # minimises the condition number (van der Sluis 1969).
    norms = np.linalg.norm(A, axis=0)
    col_scale = np.where(norms > 0.0, norms, 1.0)
    u, s, vt = np.linalg.svd(A / col_scale, full_matrices=False)
    n_rows, n_params = A.shape
    # Same threshold as numpy.linalg.matrix_rank.
    tol = s[0] * max(n_rows, n_params) * np.finfo(np.float64).eps
    rank = int(np.count_nonzero(s > tol))
    if rank < n_params:
        null_basis = vt[rank:].T
        share = np.linalg.norm(null_basis, axis=1)
        columns = tuple(int(j) for j in np.flatnonzero(share > _NULL_SPACE_SHARE))
        raise RankDeficientError(
            f"{name} has numerical rank {rank} but {n_params} independent columns are "
            f"needed; columns {list(columns)} are linearly dependent. A constant or "
            "repeated input during commissioning (a valve held at one position, a fan "
            "at fixed speed) makes its lagged columns copies of each other and of the "
            "constant term: excite the inputs, or drop them or the constant from the "
            "order",
            rank=rank,
            n_params=n_params,
            columns=columns,
        )
    return _Svd(u=u, s=s, vt=vt, col_scale=col_scale)


def fit_ols(Phi: ArrayLike, y: ArrayLike) -> BatchFit:
    r"""Fit by ordinary least squares.

    Minimises :math:`\|y - \Phi\theta\|_2^2`. The solution comes from the
    singular value decomposition of ``Phi`` with unit-norm columns: unlike
    the normal equations it does not square the condition number, and the
    same factorisation gives the rank decision and
    :math:`(\Phi^T\Phi)^{-1}`.

    Parameters
    ----------
    Phi : array_like, shape (N, n)
        Regression matrix, N > n.
    y : array_like, shape (N,)
        Target.

    Returns
    -------
    BatchFit
        ``method="ols"``, ``sigma2 = rss / (N - n)`` and
        ``cov = sigma2 (Phi^T Phi)^{-1}``.

    Raises
    ------
    DimensionError
        If the shapes are wrong or N <= n.
    ValueError
        If ``Phi`` or ``y`` holds NaN or infinity.
    RankDeficientError
        If ``Phi`` does not have full column rank; the message gives the
        rank found and the dependent columns.

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    section 7.3.

    G. H. Golub and C. F. Van Loan, *Matrix Computations*, 4th ed., 2013,
    sections 5.3 and 5.5.

    A. van der Sluis, "Condition numbers and equilibration of matrices",
    *Numerische Mathematik* 14, 1969, pp. 14-23.

    Examples
    --------
    >>> fit = fit_ols([[1.0, 0.0], [1.0, 1.0], [1.0, 2.0]], [1.0, 3.0, 5.0])
    >>> fit.theta.round(12).tolist(), round(fit.rss, 12)
    ([1.0, 2.0], 0.0)
    """
    phi, target = _check_problem(Phi, y)
    n_samples, n_params = phi.shape
    svd = _full_rank_svd(phi, "Phi")
    theta = svd.solve(target)
    residuals = target - phi @ theta
    rss = float(residuals @ residuals)
    sigma2 = rss / (n_samples - n_params)
    return BatchFit(
        method="ols",
        theta=theta,
        cov=sigma2 * svd.inverse_gram(),
        sigma2=sigma2,
        rss=rss,
        n_samples=n_samples,
        n_params=n_params,
        alpha=0.0,
        scale=math.sqrt(sigma2),
        converged=True,
        n_iter=0,
    )


def fit_ridge(
    Phi: ArrayLike,
    y: ArrayLike,
    alpha: float,
    penalize_mask: ArrayLike | None = None,
) -> BatchFit:
    r"""Fit by ridge (Tikhonov) regression.

    Minimises :math:`\|y - \Phi\theta\|_2^2 + \alpha \sum_{j \in M}
    \theta_j^2`, the same objective as scikit-learn's ``Ridge`` without
    intercept. It is solved as the least-squares problem
    :math:`[\Phi; \sqrt{\alpha} D_M]\theta \approx [y; 0]` with
    :math:`D_M` the diagonal indicator of the penalised columns, so the
    Gram matrix is never formed.

    Parameters
    ----------
    Phi : array_like, shape (N, n)
        Regression matrix, N > n.
    y : array_like, shape (N,)
        Target.
    alpha : float
        Penalty weight, >= 0 (0 gives ordinary least squares).
    penalize_mask : array_like of bool, shape (n,), optional
        True for the columns whose coefficient is penalised; default all.
        Pass False for the constant column so the offset is not shrunk.

    Returns
    -------
    BatchFit
        ``method="ridge"``, ``sigma2 = rss / (N - n)`` and the sandwich
        covariance ``sigma2 W Phi^T Phi W`` with
        ``W = (Phi^T Phi + alpha D_M)^{-1}``.

    Raises
    ------
    DimensionError
        If the shapes are wrong or N <= n.
    ValueError
        If an input holds NaN or infinity, ``alpha`` is negative or not
        finite, or ``penalize_mask`` is not boolean.
    RankDeficientError
        If the unpenalised columns leave a parameter undetermined.

    References
    ----------
    A. E. Hoerl and R. W. Kennard, "Ridge regression: biased estimation for
    nonorthogonal problems", *Technometrics* 12(1), 1970, pp. 55-67.

    T. Hastie, R. Tibshirani and J. Friedman, *The Elements of Statistical
    Learning*, 2nd ed., Springer, 2009, section 3.4.1.

    Examples
    --------
    >>> fit = fit_ridge([[1.0], [2.0], [3.0]], [1.0, 2.0, 3.0], alpha=14.0)
    >>> fit.theta.round(12).tolist()  # 14 / (14 + 14)
    [0.5]
    """
    phi, target = _check_problem(Phi, y)
    n_samples, n_params = phi.shape
    penalty = _check_alpha(alpha)
    mask = _check_mask(penalize_mask, n_params)
    augmented = np.vstack([phi, math.sqrt(penalty) * np.diag(mask.astype(np.float64))])
    svd = _full_rank_svd(augmented, "[Phi; sqrt(alpha) * diag(penalize_mask)]")
    theta = svd.solve(np.concatenate([target, np.zeros(n_params)]))
    residuals = target - phi @ theta
    rss = float(residuals @ residuals)
    sigma2 = rss / (n_samples - n_params)
    w = svd.inverse_gram()
    return BatchFit(
        method="ridge",
        theta=theta,
        cov=sigma2 * (w @ (phi.T @ phi) @ w),
        sigma2=sigma2,
        rss=rss,
        n_samples=n_samples,
        n_params=n_params,
        alpha=penalty,
        scale=math.sqrt(sigma2),
        converged=True,
        n_iter=0,
    )


def fit_lasso(
    Phi: ArrayLike,
    y: ArrayLike,
    alpha: float,
    penalize_mask: ArrayLike | None = None,
    *,
    tol: float = 1e-10,
    max_iter: int = 10_000,
) -> BatchFit:
    r"""Fit by the lasso, solved with cyclic coordinate descent.

    Minimises

    .. math::

        \frac{1}{2N}\|y - \Phi\theta\|_2^2 + \alpha \sum_{j \in M} |\theta_j|,

    the same scaling as scikit-learn's ``Lasso``. Each sweep updates every
    coordinate in turn by soft thresholding, using covariance updates
    (the Gram matrix :math:`\Phi^T\Phi/N` is formed once, so a sweep
    costs O(n^2) whatever N). Iteration stops when no coordinate moved
    the fitted values by more than ``tol`` times the RMS of ``y``:
    :math:`\max_j \|\varphi_j\| |\Delta\theta_j| / \sqrt{N} \le
    tol \cdot \mathrm{rms}(y)`. A column of zeros keeps coefficient 0.

    Parameters
    ----------
    Phi : array_like, shape (N, n)
        Regression matrix, N > n.
    y : array_like, shape (N,)
        Target.
    alpha : float
        Penalty weight, >= 0.
    penalize_mask : array_like of bool, shape (n,), optional
        True for the columns whose coefficient is penalised; default all.
        Pass False for the constant column so the offset is not shrunk.
    tol : float, optional
        Relative stopping tolerance, > 0.
    max_iter : int, optional
        Largest number of sweeps, >= 1.

    Returns
    -------
    BatchFit
        ``method="lasso"``, ``cov=None`` (the lasso has no standard
        covariance estimate), ``sigma2 = rss / (N - n_active)`` with
        ``n_active`` the number of nonzero coefficients, ``converged``
        telling whether ``tol`` was met within ``max_iter`` sweeps and
        ``n_iter`` the sweeps used.

    Raises
    ------
    DimensionError
        If the shapes are wrong or N <= n.
    ValueError
        If an input holds NaN or infinity, ``alpha`` is negative,
        ``penalize_mask`` is not boolean, ``tol`` is not positive or
        ``max_iter`` is below 1.

    References
    ----------
    J. Friedman, T. Hastie and R. Tibshirani, "Regularization paths for
    generalized linear models via coordinate descent", *Journal of
    Statistical Software* 33(1), 2010, pp. 1-22 (sections 2.1 and 2.2).

    R. Tibshirani, "Regression shrinkage and selection via the lasso",
    *Journal of the Royal Statistical Society B* 58(1), 1996, pp. 267-288.

    H. Zou, T. Hastie and R. Tibshirani, "On the degrees of freedom of the
    lasso", *Annals of Statistics* 35(5), 2007, pp. 2173-2192 (the number of
    nonzero coefficients as degrees of freedom).

    Examples
    --------
    >>> fit = fit_lasso([[1.0], [-1.0], [1.0], [-1.0]], [3.0, -3.0, 1.0, -1.0], alpha=0.5)
    >>> fit.theta.tolist(), fit.converged  # soft threshold of 2 by 0.5
    ([1.5], True)
    """
    phi, target = _check_problem(Phi, y)
    n_samples, n_params = phi.shape
    penalty = _check_alpha(alpha)
    mask = _check_mask(penalize_mask, n_params)
    if not (math.isfinite(tol) and tol > 0.0):
        raise ValueError(f"tol must be a finite number > 0, got {tol!r}")
    if isinstance(max_iter, bool) or not isinstance(max_iter, int) or max_iter < 1:
        raise ValueError(f"max_iter must be an integer >= 1, got {max_iter!r}")

    gram = (phi.T @ phi) / n_samples
    corr = (phi.T @ target) / n_samples
    diag = np.diag(gram).copy()
    threshold = tol * math.sqrt(float(target @ target) / n_samples)
    theta = np.zeros(n_params)
    converged = False
    sweeps = 0
    while sweeps < max_iter:
        sweeps += 1
        # Recomputed each sweep (O(n^2)) so rounding from the rank-one
        # updates cannot accumulate over thousands of sweeps.
        residual_corr = corr - gram @ theta
        largest_move = 0.0
        for j in range(n_params):
            if diag[j] == 0.0:
                continue
            old = theta[j]
            rho = residual_corr[j] + diag[j] * old
            if mask[j]:
                new = math.copysign(max(abs(rho) - penalty, 0.0), rho) / diag[j]
            else:
                new = rho / diag[j]
            delta = new - old
            if delta != 0.0:
                theta[j] = new
                residual_corr -= gram[:, j] * delta
                largest_move = max(largest_move, math.sqrt(diag[j]) * abs(delta))
        if largest_move <= threshold:
            converged = True
            break

    residuals = target - phi @ theta
    rss = float(residuals @ residuals)
    n_active = int(np.count_nonzero(theta))
    sigma2 = rss / (n_samples - n_active)
    return BatchFit(
        method="lasso",
        theta=theta,
        cov=None,
        sigma2=sigma2,
        rss=rss,
        n_samples=n_samples,
        n_params=n_params,
        alpha=penalty,
        scale=math.sqrt(sigma2),
        converged=converged,
        n_iter=sweeps,
    )


def _hall_sheather_bandwidth(n_samples: int) -> float:
    # Hall & Sheather (1988) bandwidth at the median (tau = 0.5, so
    # Phi^-1(tau) = 0 and phi(0)^2 = 1 / (2 pi)), 95 % level.
    z = float(ndtri(0.975))
    density_term = 1.5 / (2.0 * math.pi)
    return float(n_samples ** (-1.0 / 3.0) * z ** (2.0 / 3.0) * density_term ** (1.0 / 3.0))


def fit_lad(Phi: ArrayLike, y: ArrayLike) -> BatchFit:
    r"""Fit by least absolute deviations (median regression).

    Minimises :math:`\|y - \Phi\theta\|_1`, written as the linear program

    .. math::

        \min \sum_k (t^+_k + t^-_k) \quad \text{s.t.} \quad
        \Phi\theta + t^+ - t^- = y, \quad t^\pm \ge 0,

    and solved with HiGHS through :func:`scipy.optimize.linprog`. The fit
    is robust to outliers in ``y`` (a stuck or spiking sensor).

    The covariance is the asymptotic one for independent, identically
    distributed errors at the median, :math:`\tfrac14 s^2 (\Phi^T\Phi)^{-1}`,
    where the sparsity :math:`s = 1/f(0)` (f the error density) is
    estimated by the difference quotient of the residual quantiles
    :math:`s = [\hat F^{-1}(\tfrac12 + h) - \hat F^{-1}(\tfrac12 - h)] / 2h`
    with the Hall-Sheather bandwidth h.

    Parameters
    ----------
    Phi : array_like, shape (N, n)
        Regression matrix, N > n.
    y : array_like, shape (N,)
        Target.

    Returns
    -------
    BatchFit
        ``method="lad"``, ``sigma2 = rss / (N - n)`` (for comparison with
        the squared-error fits), ``scale`` the mean absolute residual (the
        maximum-likelihood scale of Laplace errors), ``cov`` as above and
        ``n_iter`` the solver's iterations.

    Raises
    ------
    DimensionError
        If the shapes are wrong or N <= n.
    ValueError
        If ``Phi`` or ``y`` holds NaN or infinity.
    RankDeficientError
        If ``Phi`` does not have full column rank (the minimiser would not
        be unique).
    RuntimeError
        If the linear-program solver reports failure; the message carries
        its status and message.

    References
    ----------
    R. Koenker, *Quantile Regression*, Cambridge University Press, 2005,
    chapter 3 (asymptotic covariance and sparsity estimation).

    R. Koenker and G. Bassett, "Regression quantiles", *Econometrica* 46(1),
    1978, pp. 33-50.

    P. Hall and S. J. Sheather, "On the distribution of a studentized
    quantile", *Journal of the Royal Statistical Society B* 50(3), 1988,
    pp. 381-391.

    I. Barrodale and F. D. K. Roberts, "An improved algorithm for discrete
    l1 linear approximation", *SIAM Journal on Numerical Analysis* 10(5),
    1973, pp. 839-848.

    Q. Huangfu and J. A. J. Hall, "Parallelizing the dual revised simplex
    method", *Mathematical Programming Computation* 10, 2018, pp. 119-142.

    Examples
    --------
    >>> fit = fit_lad([[1.0], [1.0], [1.0], [1.0], [1.0]], [1.0, 2.0, 3.0, 4.0, 100.0])
    >>> fit.theta.round(9).tolist()  # the median, untouched by the outlier
    [3.0]
    """
    phi, target = _check_problem(Phi, y)
    n_samples, n_params = phi.shape
    svd = _full_rank_svd(phi, "Phi")
    identity = sparse.eye_array(n_samples, format="csr")
    # Sparse: a dense (N, n + 2N) constraint matrix would need 16 N^2 bytes.
    # HiGHS takes sparse matrices; the type stubs only list dense arrays.
    constraints = cast(
        "NDArray[np.float64]",
        sparse.hstack([sparse.csr_array(phi), identity, -identity], format="csc"),
    )
    cost = np.concatenate([np.zeros(n_params), np.ones(2 * n_samples)])
    free: list[tuple[float | None, float | None]] = [(None, None)] * n_params
    bounds = free + [(0.0, None)] * (2 * n_samples)
    result = linprog(cost, A_eq=constraints, b_eq=target, bounds=bounds, method="highs")
    if result.status != 0 or result.x is None:
        raise RuntimeError(f"LAD linear program failed (status {result.status}): {result.message}")
    theta = np.asarray(result.x[:n_params], dtype=np.float64)
    residuals = target - phi @ theta
    rss = float(residuals @ residuals)
    h = min(_hall_sheather_bandwidth(n_samples), 0.5)
    upper, lower = np.quantile(residuals, [0.5 + h, 0.5 - h])
    sparsity = float(upper - lower) / (2.0 * h)
    return BatchFit(
        method="lad",
        theta=theta,
        cov=0.25 * sparsity**2 * svd.inverse_gram(),
        sigma2=rss / (n_samples - n_params),
        rss=rss,
        n_samples=n_samples,
        n_params=n_params,
        alpha=0.0,
        scale=float(np.mean(np.abs(residuals))),
        converged=True,
        n_iter=int(result.nit),
    )


def one_step_predict(theta: ArrayLike, Phi: ArrayLike) -> NDArray[np.float64]:
    r"""Return the one-step-ahead predictions :math:`\hat y = \Phi\theta`.

    Parameters
    ----------
    theta : array_like, shape (n,)
        Parameters.
    Phi : array_like, shape (M, n)
        Regressors, one row per predicted sample.

    Returns
    -------
    ndarray, shape (M,)
        Predicted outputs.

    Raises
    ------
    DimensionError
        If ``theta`` is not 1-D or ``Phi`` does not have ``len(theta)``
        columns.
    ValueError
        If an input holds NaN or infinity.

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    section 4.2 (the ARX predictor is linear in theta).

    Examples
    --------
    >>> one_step_predict([2.0, 1.0], [[1.0, 1.0], [0.0, 1.0]]).tolist()
    [3.0, 1.0]
    """
    params = np.asarray(theta, dtype=np.float64)
    phi = np.asarray(Phi, dtype=np.float64)
    if params.ndim != 1:
        raise DimensionError(f"theta must be 1-D with shape (n,), got shape {params.shape}")
    if phi.ndim != 2 or phi.shape[1] != params.shape[0]:
        raise DimensionError(
            f"Phi must have shape (M, {params.shape[0]}) to match theta, got {phi.shape}"
        )
    _check_finite(params, "theta")
    _check_finite(phi, "Phi")
    prediction: NDArray[np.float64] = phi @ params
    return prediction


def fit_percent(y_true: ArrayLike, y_pred: ArrayLike) -> float:
    r"""Return the normalised fit :math:`100 (1 - \|y - \hat y\| / \|y - \bar y\|)`.

    100 is a perfect prediction, 0 is no better than the mean of
    ``y_true``, and the value is negative for worse predictions. This is
    the fit measure reported by MATLAB's ``compare``.

    Parameters
    ----------
    y_true : array_like, shape (M,)
        Measured outputs, not all equal.
    y_pred : array_like, shape (M,)
        Predicted outputs.

    Returns
    -------
    float
        Fit in percent, at most 100.

    Raises
    ------
    DimensionError
        If the inputs are not 1-D of the same length, or hold fewer than 2
        samples.
    ValueError
        If an input holds NaN or infinity, or ``y_true`` is constant (the
        fit is then undefined).

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    chapter 16 (model validation by comparing measured and model outputs).

    Examples
    --------
    >>> fit_percent([1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    100.0
    >>> fit_percent([1.0, 2.0, 3.0], [2.0, 2.0, 2.0])
    0.0
    """
    measured = np.asarray(y_true, dtype=np.float64)
    predicted = np.asarray(y_pred, dtype=np.float64)
    if measured.ndim != 1:
        raise DimensionError(f"y_true must be 1-D with shape (M,), got shape {measured.shape}")
    if predicted.shape != measured.shape:
        raise DimensionError(
            f"y_pred must have the shape of y_true {measured.shape}, got {predicted.shape}"
        )
    if measured.shape[0] < 2:
        raise DimensionError(f"y_true needs at least 2 samples, got {measured.shape[0]}")
    _check_finite(measured, "y_true")
    _check_finite(predicted, "y_pred")
    spread = float(np.linalg.norm(measured - measured.mean()))
    if spread == 0.0:
        raise ValueError(
            f"y_true is constant (all {measured.shape[0]} samples equal {measured[0]}); "
            "the fit percentage needs a varying output"
        )
    return 100.0 * (1.0 - float(np.linalg.norm(measured - predicted)) / spread)


def split_series(
    y: ArrayLike, u: ArrayLike | None, validation_fraction: float
) -> tuple[
    NDArray[np.float64], NDArray[np.float64] | None, NDArray[np.float64], NDArray[np.float64] | None
]:
    """Split a record into a leading estimation and a trailing validation segment.

    Parameters
    ----------
    y : array_like, shape (N,)
        Output samples.
    u : array_like, shape (N, n_inputs) or (N,), or None
        Input samples on the same grid, or None for a model without inputs.
    validation_fraction : float
        Share of the samples kept for validation, in [0, 0.9]; the
        validation segment has ``round(validation_fraction * N)`` samples.

    Returns
    -------
    y_est : ndarray, shape (N_est,)
        Leading outputs.
    u_est : ndarray, shape (N_est, n_inputs), or None
        Leading inputs (None if ``u`` is None).
    y_val : ndarray, shape (N - N_est,)
        Trailing outputs (empty if ``validation_fraction`` is 0).
    u_val : ndarray, shape (N - N_est, n_inputs), or None
        Trailing inputs.

    Raises
    ------
    DimensionError
        If ``y`` is not 1-D or ``u`` does not have N rows.
    ValueError
        If ``validation_fraction`` is outside [0, 0.9], or ``y`` or ``u``
        holds NaN or infinity.

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    chapter 16 (cross-validation on fresh data).

    Examples
    --------
    >>> y_est, _, y_val, _ = split_series([1.0, 2.0, 3.0, 4.0], None, 0.25)
    >>> y_est.tolist(), y_val.tolist()
    ([1.0, 2.0, 3.0], [4.0])
    """
    fraction = float(validation_fraction)
    if not 0.0 <= fraction <= MAX_VALIDATION_FRACTION:
        raise ValueError(
            f"validation_fraction must be in [0, {MAX_VALIDATION_FRACTION}], "
            f"got {validation_fraction!r}"
        )
    y_arr = np.asarray(y, dtype=np.float64)
    if y_arr.ndim != 1:
        raise DimensionError(f"y must be 1-D with shape (N,), got shape {y_arr.shape}")
    _check_finite(y_arr, "y")
    n_total = y_arr.shape[0]
    u_arr = None
    if u is not None:
        u_arr = np.asarray(u, dtype=np.float64)
        if u_arr.ndim == 1:
            u_arr = u_arr[:, None]
        if u_arr.ndim != 2 or u_arr.shape[0] != n_total:
            raise DimensionError(
                f"u must have shape (N={n_total}, n_inputs) to match y, got {u_arr.shape}"
            )
        _check_finite(u_arr, "u")
    n_estimation = n_total - round(fraction * n_total)
    if u_arr is None:
        return y_arr[:n_estimation], None, y_arr[n_estimation:], None
    return y_arr[:n_estimation], u_arr[:n_estimation], y_arr[n_estimation:], u_arr[n_estimation:]


def split_breaks(
    breaks: Sequence[int], n_total: int, validation_fraction: float
) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """Split segment starts the way :func:`split_series` splits the samples.

    The validation part is the last ``round(validation_fraction * N)``
    samples in time order, as in :func:`split_series`. A segment cut by the
    split becomes two: the validation part starts a segment of its own.

    Parameters
    ----------
    breaks : sequence of int
        Index of the first sample of each segment after the first, strictly
        increasing, in [1, n_total - 1].
    n_total : int
        Samples in the record.
    validation_fraction : float
        As for :func:`split_series`, in [0, 0.9].

    Returns
    -------
    estimation_breaks : tuple of int
        Segment starts within the estimation part.
    validation_breaks : tuple of int
        Segment starts within the validation part, counted from its first
        sample.

    Raises
    ------
    DimensionError
        If ``breaks`` is not strictly increasing within (0, n_total).
    ValueError
        If ``validation_fraction`` is outside [0, 0.9].

    Examples
    --------
    >>> split_breaks([2, 7, 9], 10, 0.5)
    ((2,), (2, 4))
    """
    fraction = float(validation_fraction)
    if not 0.0 <= fraction <= MAX_VALIDATION_FRACTION:
        raise ValueError(
            f"validation_fraction must be in [0, {MAX_VALIDATION_FRACTION}], "
            f"got {validation_fraction!r}"
        )
    cuts = check_breaks(breaks, n_total)
    n_estimation = n_total - round(fraction * n_total)
    return (
        tuple(b for b in cuts if b < n_estimation),
        tuple(b - n_estimation for b in cuts if b > n_estimation),
    )


_FITTERS: dict[str, Callable[..., BatchFit]] = {
    "ols": fit_ols,
    "ridge": fit_ridge,
    "lasso": fit_lasso,
    "lad": fit_lad,
}


def fit_arx(
    order: ArxOrder,
    y: ArrayLike,
    u: ArrayLike | None = None,
    *,
    breaks: Sequence[int] = (),
    method: str = "ols",
    validation_fraction: float = 0.3,
    **method_kwargs: Any,
) -> ArxFit:
    """Fit an ARX model on the head of a record and score it on the tail.

    The regression matrices of the estimation segment (the first
    ``1 - validation_fraction`` of the samples) and of the validation
    segment (the rest) are built separately, so no regressor straddles the
    split. A record of several gap-free stretches, one after the other, is
    given with ``breaks``: each stretch gives its own rows after its own
    history (:func:`arxwatch.estimators.arx.segment_regression_matrix`), and
    a stretch cut by the split becomes two. For ``ridge`` and ``lasso`` with
    ``order.constant`` the offset is left unpenalised unless
    ``penalize_mask`` is given.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    y : array_like, shape (N,)
        Output samples on a uniform grid.
    u : array_like, shape (N, n_inputs) or (N,), optional
        Input samples on the same grid; omit for a model without inputs.
    breaks : sequence of int, optional
        Index of the first sample of each stretch after the first, strictly
        increasing, in [1, N - 1]; none (the default) for one stretch.
    method : {"ols", "ridge", "lasso", "lad"}, optional
        Fitting function: :func:`fit_ols`, :func:`fit_ridge`,
        :func:`fit_lasso` or :func:`fit_lad`.
    validation_fraction : float, optional
        Share of the samples kept for validation, in [0, 0.9]; 0 fits on
        everything and leaves ``fit_percent_validation`` None.
    **method_kwargs
        Passed on to the fitting function (``alpha``, ``penalize_mask``,
        ``tol``, ``max_iter``).

    Returns
    -------
    ArxFit
        The fit and its one-step-ahead :func:`fit_percent` on validation.

    Raises
    ------
    ValueError
        If ``method`` is unknown, ``validation_fraction`` is out of range,
        ``y`` or ``u`` holds NaN or infinity, or as raised by the fitting
        function.
    DimensionError
        If the shapes disagree with ``order`` or ``breaks`` is out of range,
        or no stretch of the estimation or validation segment is longer
        than the order's depth.
    RankDeficientError
        If the estimation segment does not determine every parameter.
    TypeError
        If ``method_kwargs`` names an argument the fitting function does
        not take.

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    sections 4.2 and 7.3 and chapter 16.

    Examples
    --------
    >>> u = [0.0, 1.0, 0.0, 0.0, 1.0, 1.0, 0.0, 1.0, 0.0, 1.0]
    >>> y = [0.0] + [2.0 * v for v in u[:-1]]  # y(k) = 2 u(k-1)
    >>> result = fit_arx(ArxOrder(0, (1,), (1,), constant=False), y, u)
    >>> result.fit.theta.round(9).tolist(), round(result.fit_percent_validation, 6)
    ([2.0], 100.0)
    >>> result.n_estimation, result.n_validation
    (7, 3)
    """
    if method not in _FITTERS:
        raise ValueError(f"method must be one of {sorted(_FITTERS)}, got {method!r}")
    y_est, u_est, y_val, u_val = split_series(y, u, validation_fraction)
    n_estimation, n_validation = y_est.shape[0], y_val.shape[0]
    est_breaks, val_breaks = split_breaks(breaks, n_estimation + n_validation, validation_fraction)
    stretches = "" if not breaks else " in its longest stretch"
    if scored_rows(est_breaks, n_estimation, order.depth) == 0:
        longest = max(segment_lengths(est_breaks, n_estimation))
        raise DimensionError(
            f"estimation segment has {longest} samples{stretches} but order depth "
            f"{order.depth} needs more than {order.depth}"
        )
    if n_validation > 0 and scored_rows(val_breaks, n_validation, order.depth) == 0:
        longest = max(segment_lengths(val_breaks, n_validation))
        raise DimensionError(
            f"validation segment has {longest} samples{stretches} (validation_fraction="
            f"{validation_fraction!r}) but order depth {order.depth} needs more than "
            f"{order.depth}; use a longer record or validation_fraction=0"
        )
    kwargs = dict(method_kwargs)
    if method in ("ridge", "lasso") and order.constant and "penalize_mask" not in kwargs:
        mask = np.ones(order.n_params, dtype=bool)
        mask[-1] = False
        kwargs["penalize_mask"] = mask
    phi, target = segment_regression_matrix(order, y_est, u_est, est_breaks)
    fit = _FITTERS[method](phi, target, **kwargs)
    score = None
    if n_validation > 0:
        phi_val, target_val = segment_regression_matrix(order, y_val, u_val, val_breaks)
        score = fit_percent(target_val, fit.predict(phi_val))
    return ArxFit(
        order=order,
        fit=fit,
        fit_percent_validation=score,
        n_estimation=n_estimation,
        n_validation=n_validation,
    )
