r"""Parameter drift: Wald distance of live parameters or physical features from the baseline.

With the baseline estimate :math:`\theta_0` and the live estimate
:math:`\theta` independent and each approximately normal,

.. math::

    d^2 = (\theta - \theta_0)^T S^{-1} (\theta - \theta_0), \qquad
    S = \mathrm{Cov}(\theta_0) + \mathrm{Cov}(\theta),

is approximately chi-square with n degrees of freedom when nothing has
changed, and the test alarms when :math:`d^2 \ge \chi^2_{n, 1-\alpha}`.

:class:`ParameterDrift` tests raw ARX coefficients (optionally a subset).
:class:`FeatureDrift` tests the physical features of
:func:`~arxwatch.estimators.readout.feature_vector` (static gains, time
constant, offset), whose covariance follows by the delta method,
:math:`\mathrm{Cov}(f) \approx J \,\mathrm{Cov}(\theta)\, J^T` with
J from :func:`~arxwatch.estimators.readout.readout_jacobian`. Features are
what a technician reads; raw coefficients are better conditioned.

Singular S. Correlated coefficients (a slow process sampled fast) or a
feature subset that depends on few parameters can leave S singular or nearly
so. S is then inverted on its range: with the eigen-decomposition
:math:`S = V \Lambda V^T`, eigenvalues at or below ``rcond`` times the largest
are dropped, :math:`d^2 = \sum_{i \in \text{kept}} (v_i^T \delta)^2 / \lambda_i`
(the Moore–Penrose pseudo-inverse) and the degrees of freedom are the rank
kept. The difference along a dropped direction carries no evidence either
way, so it is not tested.

Units. The rank is decided on S in units of each entry's own spread,
:math:`R = D^{-1/2} S D^{-1/2}` with :math:`D = \mathrm{diag}(S)`, and
:math:`d^2 = (D^{-1/2}\delta)^T R^+ (D^{-1/2}\delta)`. Unscaled, a time
constant in seconds (variance ~1e3 s^2) beside a gain (~1e-7) gives S a
condition number near 1e10, and a slower loop would push the gain's
direction under the cut-off: the test would stop looking at the gain
because of the units of another feature. At full rank the distance is the
same (:math:`D^{-1/2} R^{-1} D^{-1/2} = S^{-1}`); on a singular S it is the
same for a difference in the range of S, since :math:`D^{-1/2} R^+
D^{-1/2}` is a generalized inverse of S (Rao and Mitra).

Empirical threshold. The chi-square law holds only as far as the covariances
are right; RLS covariances with forgetting are only approximate. A threshold
can instead be learned from d2 values seen during the baseline period with
:func:`calibrate` and passed to ``set_baseline``.

References
----------
A. Wald, "Tests of statistical hypotheses concerning several parameters
when the number of observations is large", *Transactions of the American
Mathematical Society* 54 (1943), 426-482.

G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed., Duxbury,
2002, sections 5.5.4 (delta method) and 10.3.2 (Wald tests).

C. R. Rao and S. K. Mitra, *Generalized Inverse of Matrices and its
Applications*, Wiley, 1971 (quadratic forms in a generalized inverse of a
singular normal covariance are chi-square with df equal to its rank).
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import chdtrc
from scipy.stats import chi2

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.detect._checks import (
    check_probability,
    check_setting,
    expect_state,
    is_int,
    is_real,
    state_int,
)
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.readout import feature_names, features_and_jacobians

__all__ = [
    "FeatureDrift",
    "FeatureDriftConfig",
    "ParameterDrift",
    "ParameterDriftConfig",
    "WaldResult",
    "calibrate",
    "wald_distance",
    "wald_distances",
]

_Vector = NDArray[np.float64]


def wald_distance(
    delta: ArrayLike, covariance: ArrayLike, *, rcond: float = 1e-10
) -> tuple[float, int]:
    """Squared Mahalanobis distance of ``delta`` under ``covariance``, on its range.

    Parameters
    ----------
    delta : array_like, shape (n,)
        Difference of the live and baseline vectors.
    covariance : array_like, shape (n, n)
        Symmetric positive semi-definite covariance of the difference.
    rcond : float, optional
        Eigenvalues at or below ``rcond`` times the largest are treated as
        zero, those of the covariance scaled to a unit diagonal (module
        notes). Default 1e-10.

    Returns
    -------
    d2 : float
        ``delta' S^+ delta`` with S^+ the pseudo-inverse on the kept range
        (``delta' S^-1 delta`` at full rank).
    rank : int
        Number of eigenvalues kept: the chi-square degrees of freedom.

    Raises
    ------
    DimensionError
        If the shapes do not match.
    ValueError
        If an entry is not finite or the covariance has rank 0.

    References
    ----------
    C. R. Rao and S. K. Mitra, *Generalized Inverse of Matrices and its
    Applications*, Wiley, 1971.

    Examples
    --------
    >>> d2, rank = wald_distance([1.0, 2.0], [[1.0, 0.0], [0.0, 4.0]])
    >>> round(d2, 12), rank
    (2.0, 2)
    >>> d2, rank = wald_distance([1.0, 1.0], [[1.0, 1.0], [1.0, 1.0]])  # singular
    >>> round(d2, 12), rank
    (1.0, 1)
    """
    d = np.asarray(delta, dtype=np.float64)
    s = np.asarray(covariance, dtype=np.float64)
    if d.ndim != 1 or s.shape != (d.shape[0], d.shape[0]):
        raise DimensionError(
            f"delta must have shape (n,) and covariance (n, n), got {d.shape} and {s.shape}"
        )
    d2, rank = wald_distances(d[None, :], s[None, :, :], rcond=rcond)
    if rank[0] == 0:
        raise ValueError("covariance has rank 0: no direction can be tested")
    return float(d2[0]), int(rank[0])


def wald_distances(
    delta: ArrayLike, covariance: ArrayLike, *, rcond: float = 1e-10
) -> tuple[NDArray[np.float64], NDArray[np.intp]]:
    """:func:`wald_distance` of many differences at once.

    Each row is computed by the same operations in the same order whatever
    the other rows are, so a row's result does not depend on the batch (the
    per-asset and the fleet-wide monitors agree bit for bit). A row whose
    every eigenvalue is surely kept is solved by an LDL' factorisation,
    ``d' S^-1 d``, in column operations over all rows; the others by the
    eigen-decomposition of the module notes (one LAPACK call per row).

    Parameters
    ----------
    delta : array_like, shape (k, n)
        Differences of the live and baseline vectors.
    covariance : array_like, shape (k, n, n)
        Their covariances, symmetric positive semi-definite.
    rcond : float, optional
        Relative eigenvalue cut-off, as :func:`wald_distance`.

    Returns
    -------
    d2 : ndarray, shape (k,)
        Squared distances; 0.0 where the rank is 0.
    rank : ndarray of intp, shape (k,)
        Eigenvalues kept; 0 where no direction can be tested.

    Raises
    ------
    DimensionError
        If the shapes do not match.
    ValueError
        If an entry is not finite.
    """
    d = np.asarray(delta, dtype=np.float64)
    s = np.asarray(covariance, dtype=np.float64)
    if d.ndim != 2 or s.shape != (d.shape[0], d.shape[1], d.shape[1]):
        raise DimensionError(
            f"delta must have shape (k, n) and covariance (k, n, n), got {d.shape} and {s.shape}"
        )
    if not (np.isfinite(d).all() and np.isfinite(s).all()):
        raise ValueError("delta and covariance must be finite")
    n = d.shape[1]
    sym = 0.5 * (s + s.transpose(0, 2, 1))
    # in units of each entry's own spread (unit diagonal), so that the rank
    # does not depend on the units (see the module notes)
    diagonal = np.diagonal(sym, axis1=1, axis2=2)
    spread = np.sqrt(np.where(diagonal > 0.0, diagonal, 1.0))
    d = d / spread
    sym = sym / spread[:, :, None] / spread[:, None, :]
    d2, full = _full_rank_distances(d, sym, rcond)
    rank = np.where(full, n, 0).astype(np.intp)
    rest = np.flatnonzero(~full)
    if rest.shape[0]:
        d2[rest], rank[rest] = _range_distances(d[rest], sym[rest], rcond)
    return d2, rank


def _full_rank_distances(d: _Vector, s: _Vector, rcond: float) -> tuple[_Vector, NDArray[np.bool_]]:
    """``d' S^-1 d`` by ``S = L D L'``, and where eigh would surely keep every direction.

    A row is certified when its pivots are positive and
    ``1 / trace(S^-1) > (1 + mu) rcond trace(S)``: the left side bounds the
    smallest eigenvalue from below and ``trace(S)`` the largest from above,
    so every eigenvalue is above ``rcond`` times the largest. On a
    certified row the condition number is below 1 / rcond, so the rounding
    of the factors and of eigh's eigenvalues stays within some
    ``n**2 eps / rcond``; ``mu = 1000 n**2 eps / rcond`` covers it (2e-2 for
    three features and rcond 1e-10). Other rows (d2 meaningless there) go to
    :func:`_range_distances`. Column operations over the rows: for the few
    features tested, cheaper than one LAPACK call per row (Golub and Van
    Loan, *Matrix Computations*, 4th ed., 2013, section 4.1, LDL').
    """
    k, n = d.shape
    pivots: list[_Vector] = []
    lower: list[list[_Vector]] = []  # lower[i][j] = L[i, j] for j < i
    z: list[_Vector] = []  # L z = d
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for i in range(n):
            row: list[_Vector] = []
            for j in range(i):
                acc = s[:, i, j]
                for p in range(j):
                    acc = acc - row[p] * lower[j][p] * pivots[p]
                row.append(acc / pivots[j])
            pivot = s[:, i, i]
            solved = d[:, i]
            for p in range(i):
                pivot = pivot - row[p] * row[p] * pivots[p]
                solved = solved - row[p] * z[p]
            lower.append(row)
            pivots.append(pivot)
            z.append(solved)
        d2 = np.zeros(k)
        trace = np.zeros(k)
        inverse_trace = np.zeros(k)
        positive = np.ones(k, dtype=np.bool_)
        for i in range(n):
            d2 = d2 + z[i] * z[i] / pivots[i]
            trace = trace + s[:, i, i]
            positive &= pivots[i] > 0.0
            # row i of W = L^-1; trace(S^-1) = sum_i |W[i, :]|^2 / D_i
            w = [np.zeros(k)] * i + [np.ones(k)]
            for j in range(i - 1, -1, -1):
                acc = np.zeros(k)
                for p in range(j + 1, i + 1):
                    acc = acc - w[p] * lower[p][j]
                w[j] = acc
            norm = np.zeros(k)
            for value in w:
                norm = norm + value * value
            inverse_trace = inverse_trace + norm / pivots[i]
        margin = 1.0 + 1e3 * n * n * float(np.finfo(np.float64).eps) / rcond
        full = positive & (margin * rcond * trace * inverse_trace < 1.0)
    return np.where(full, d2, 0.0), full


def _range_distances(d: _Vector, s: _Vector, rcond: float) -> tuple[_Vector, NDArray[np.intp]]:
    """``d' S^+ d`` on the eigenvalues above ``rcond`` times the largest, and their count."""
    k, n = d.shape
    w, v = np.linalg.eigh(s)
    largest = w[:, -1] if n else np.zeros(k)
    keep = (w > rcond * largest[:, None]) & (largest[:, None] > 0.0)
    rank = keep.sum(axis=1).astype(np.intp)
    d2 = np.zeros(k)
    with np.errstate(divide="ignore", invalid="ignore"):
        for j in range(n):
            proj = np.zeros(k)
            for i in range(n):
                proj = proj + v[:, i, j] * d[:, i]
            d2 = d2 + np.where(keep[:, j], proj * proj / w[:, j], 0.0)
    return d2, rank


def calibrate(d2_samples: ArrayLike, false_alarm_rate: float) -> float:
    """Empirical threshold: the (1 - rate) quantile of d2 values from the baseline period.

    The quantile uses ``method="higher"`` so the threshold is an observed
    value and at most a fraction ``false_alarm_rate`` of the samples lie
    strictly above it. Successive d2 values of a recursive estimator are
    strongly correlated, so the effective sample is smaller than its length:
    use evaluations spaced ``every`` samples apart over a baseline much longer
    than the estimator memory.

    Parameters
    ----------
    d2_samples : array_like, shape (n,)
        Finite, non-negative d2 values, n >= ceil(1 / false_alarm_rate).
    false_alarm_rate : float
        Target fraction of evaluations above the threshold, in (0, 1).

    Returns
    -------
    float
        The threshold, for ``set_baseline(..., threshold=...)``.

    Raises
    ------
    ValueError
        If the rate is not in (0, 1), the samples are not finite and
        non-negative, or there are too few of them to resolve the quantile.

    References
    ----------
    R. J. Hyndman and Y. Fan, "Sample quantiles in statistical packages",
    *The American Statistician* 50 (1996), 361-365.

    Examples
    --------
    >>> calibrate([float(v) for v in range(1, 101)], 0.05)
    96.0
    """
    check_probability("calibrate", "false_alarm_rate", false_alarm_rate)
    arr = np.asarray(d2_samples, dtype=np.float64)
    if arr.ndim != 1 or not np.isfinite(arr).all() or (arr < 0.0).any():
        raise ValueError("d2_samples must be a 1-D sequence of finite values >= 0")
    needed = math.ceil(1.0 / false_alarm_rate)
    if arr.shape[0] < needed:
        raise ValueError(
            f"d2_samples has {arr.shape[0]} values; a false_alarm_rate of "
            f"{false_alarm_rate!r} needs at least {needed}"
        )
    return float(np.quantile(arr, 1.0 - false_alarm_rate, method="higher"))


def _check_common(owner: str, alpha: float, every: int, rcond: float) -> None:
    check_probability(owner, "alpha", alpha)
    check_setting(owner, "every", every, is_int(every) and every >= 1, "an integer >= 1")
    check_setting(owner, "rcond", rcond, is_real(rcond) and 0.0 < rcond < 1.0, "a number in (0, 1)")


@dataclass(frozen=True)
class ParameterDriftConfig:
    """Settings of the raw-parameter Wald test.

    Attributes
    ----------
    alpha : float
        False-alarm probability per evaluation of the chi-square threshold,
        in (0, 1). Default 0.001.
    every : int
        Evaluate on the first call and then every this many calls, >= 1.
        Default 60.
    indices : tuple of int or None
        Entries of theta to test (distinct, >= 0); None tests all. Default
        None.
    rcond : float
        Relative eigenvalue cut-off for a singular S, in (0, 1). Default
        1e-10.
    """

    alpha: float = 0.001
    every: int = 60
    indices: tuple[int, ...] | None = None
    rcond: float = 1e-10

    def __post_init__(self) -> None:
        owner = type(self).__name__
        _check_common(owner, self.alpha, self.every, self.rcond)
        if self.indices is not None:
            ok = (
                isinstance(self.indices, tuple)
                and len(self.indices) > 0
                and all(is_int(i) and i >= 0 for i in self.indices)
                and len(set(self.indices)) == len(self.indices)
            )
            check_setting(
                owner,
                "indices",
                self.indices,
                ok,
                "None or a non-empty tuple of distinct integers >= 0",
            )


@dataclass(frozen=True)
class FeatureDriftConfig:
    """Settings of the physical-feature Wald test.

    Attributes
    ----------
    order : ArxOrder
        Model structure of the theta vectors given.
    sample_period_s : float
        Model sample period in seconds, > 0.
    alpha : float
        False-alarm probability per evaluation, in (0, 1). Default 0.001.
    every : int
        Evaluate on the first call and then every this many calls. Default 60.
    features : tuple of str or None
        Names from :func:`~arxwatch.estimators.readout.feature_names` to
        test; None tests all. Default None.
    rcond : float
        Relative eigenvalue cut-off for a singular S. Default 1e-10.
    """

    order: ArxOrder
    sample_period_s: float
    alpha: float = 0.001
    every: int = 60
    features: tuple[str, ...] | None = None
    rcond: float = 1e-10

    def __post_init__(self) -> None:
        owner = type(self).__name__
        check_setting(owner, "order", self.order, isinstance(self.order, ArxOrder), "an ArxOrder")
        check_setting(
            owner,
            "sample_period_s",
            self.sample_period_s,
            is_real(self.sample_period_s) and self.sample_period_s > 0.0,
            "a finite number of seconds > 0",
        )
        _check_common(owner, self.alpha, self.every, self.rcond)
        if self.features is not None:
            names = feature_names(self.order)
            ok = (
                isinstance(self.features, tuple)
                and len(self.features) > 0
                and all(f in names for f in self.features)
                and len(set(self.features)) == len(self.features)
            )
            check_setting(
                owner,
                "features",
                self.features,
                ok,
                f"None or a non-empty tuple of distinct names from {names}",
            )


@dataclass(frozen=True)
class WaldResult:
    """Wald tests of many rows, as arrays (see :meth:`FeatureDrift.distances`).

    Attributes
    ----------
    statistic, threshold : ndarray, shape (k,)
        d2 (0 where nothing could be tested) and the threshold it is
        compared with (inf where nothing could be tested).
    alarm : ndarray of bool, shape (k,)
        ``statistic >= threshold`` where something was tested.
    rank : ndarray of intp, shape (k,)
        Degrees of freedom used (0: nothing tested).
    usable : ndarray of bool, shape (k, m)
        Entries defined in both the baseline and the live vector.
    """

    statistic: NDArray[np.float64]
    threshold: NDArray[np.float64]
    alarm: NDArray[np.bool_]
    rank: NDArray[np.intp]
    usable: NDArray[np.bool_]


class _WaldDrift(ABC):
    """Evaluation schedule, baseline and Wald test shared by both detectors."""

    _name = ""
    _signal = ""
    __slots__ = ("_alpha", "_every", "_rcond", "_chi2_cache", "_count", "_baseline")

    def __init__(self, alpha: float, every: int, rcond: float) -> None:
        self._alpha = float(alpha)
        self._every = int(every)
        self._rcond = float(rcond)
        self._chi2_cache: dict[int, float] = {}
        self._count = 0
        # (x0, Cov(x0), n_params, empirical threshold or None)
        self._baseline: tuple[_Vector, _Vector, int, float | None] | None = None

    # -- subclass hooks ------------------------------------------------------
    @abstractmethod
    def project(self, thetas: _Vector, covs: _Vector) -> tuple[_Vector, _Vector]:
        """Map rows of theta (k, n) and Cov(theta) (k, n, n) to tested vectors and covariances.

        Each row's result depends on that row alone (same bits in any batch).
        """

    @abstractmethod
    def _labels(self) -> tuple[str, ...]:
        """Return the names of the tested entries, for the baseline_/current_ values."""

    @abstractmethod
    def _baseline_params(self, n_given: int) -> int:
        """Return the parameter count a new baseline needs, ``n_given`` offered."""

    @abstractmethod
    def _tested_size(self, n_params: int) -> int:
        """Return the tested length for ``n_params`` parameters (ValueError if impossible)."""

    # -- shared --------------------------------------------------------------
    @staticmethod
    def _inputs(theta: ArrayLike, covariance: ArrayLike, n: int) -> tuple[_Vector, _Vector]:
        t = np.array(theta, dtype=np.float64)
        c = np.array(covariance, dtype=np.float64)
        if t.shape != (n,) or c.shape != (n, n):
            raise DimensionError(
                f"theta must have shape ({n},) and covariance ({n}, {n}), "
                f"got {t.shape} and {c.shape}"
            )
        if not (np.isfinite(t).all() and np.isfinite(c).all()):
            raise ValueError("theta and covariance must be finite")
        return t, c

    def set_baseline(
        self, theta: ArrayLike, covariance: ArrayLike, *, threshold: float | None = None
    ) -> None:
        """Store the baseline estimate and its covariance; restart the schedule.

        Parameters
        ----------
        theta : array_like, shape (n_params,)
            Baseline parameter vector theta_0.
        covariance : array_like, shape (n_params, n_params)
            Its covariance Cov(theta_0).
        threshold : float, optional
            Empirical threshold from :func:`calibrate` (finite, > 0); None
            uses chi2.ppf(1 - alpha, df).

        Raises
        ------
        DimensionError
            If the shapes do not fit.
        ValueError
            If an entry or the threshold is not finite (threshold also > 0).
        """
        if threshold is not None and not (is_real(threshold) and threshold > 0.0):
            raise ValueError(f"threshold must be None or a finite number > 0, got {threshold!r}")
        n_given = int(np.shape(theta)[0]) if np.ndim(theta) == 1 else -1
        t, c = self._inputs(theta, covariance, self._baseline_params(n_given))
        x0, c0 = self.project(t[None, :], c[None, :, :])
        empirical = None if threshold is None else float(threshold)
        self._baseline = (x0[0], c0[0], t.shape[0], empirical)
        self._count = 0

    @property
    def has_baseline(self) -> bool:
        """Whether :meth:`set_baseline` (or a restored state) provided a baseline."""
        return self._baseline is not None

    def update(self, theta: ArrayLike, covariance: ArrayLike) -> Evidence | None:
        """Count one sample; test the live estimate when due.

        Parameters
        ----------
        theta : array_like, shape (n_params,)
            Live parameter vector.
        covariance : array_like, shape (n_params, n_params)
            Its covariance (``ArxEstimator.parameter_covariance``).

        Returns
        -------
        Evidence or None
            None on calls that are not evaluated (evaluation on the first
            call after the baseline, then every ``every`` calls); the inputs
            are then not even read. Otherwise ``statistic`` d2,
            ``threshold`` the chi-square quantile for the rank used (or the
            empirical threshold); ``values`` hold ``d2``, ``df``,
            ``p_value`` (chi-square, whichever threshold is used) and
            ``n_tested``, and ``baseline_<name>`` and ``current_<name>``
            for each tested entry (``theta_<j>`` for :class:`ParameterDrift`,
            the feature name for :class:`FeatureDrift`). ``detail`` is
            ``"rank_deficient"`` when S was inverted on a smaller range, ``"partial"`` when
            undefined features were left out, ``"undefined"`` when no
            feature could be tested (then never an alarm), else empty.

        Raises
        ------
        RuntimeError
            If no baseline is set.
        DimensionError
            If the shapes do not fit (on an evaluated call; the call is then
            not counted).
        ValueError
            If an entry is not finite (likewise).
        """
        baseline = self._baseline
        if baseline is None:
            raise RuntimeError(f"{self._name}: no baseline; call set_baseline first")
        count = self._count
        if count % self._every:
            self._count = count + 1
            return None
        x0, c0, n_params, empirical = baseline
        t, c = self._inputs(theta, covariance, n_params)
        x, cx = self.project(t[None, :], c[None, :, :])
        # Counted only once the inputs passed: a refused call is retried next time.
        self._count = count + 1
        return self.judge(x0[None, :], c0[None, :, :], x, cx, empirical)[0]

    def judge(
        self,
        x0: _Vector,
        c0: _Vector,
        x: _Vector,
        cx: _Vector,
        empirical: float | None = None,
    ) -> list[Evidence]:
        """Test many live vectors against their baselines (no schedule, no stored baseline).

        Parameters
        ----------
        x0, x : ndarray, shape (k, m)
            Baseline and live tested vectors (from :meth:`project`).
        c0, cx : ndarray, shape (k, m, m)
            Their covariances.
        empirical : float, optional
            Empirical threshold used instead of the chi-square quantile.

        Returns
        -------
        list of Evidence
            One per row, as :meth:`update` reports an evaluation; a row's
            evidence does not depend on the other rows.
        """
        result = self.distances(x0, c0, x, cx, empirical)
        return [self.evidence(result, x0, x, r) for r in range(x.shape[0])]

    def distances(
        self,
        x0: _Vector,
        c0: _Vector,
        x: _Vector,
        cx: _Vector,
        empirical: float | None = None,
    ) -> WaldResult:
        """Return the numbers of :meth:`judge` as arrays; :meth:`evidence` builds a row's Evidence.

        Lets a caller judging thousands of rows build Evidence only for the
        few rows it reports.
        """
        k, m = x.shape
        diag0 = np.diagonal(c0, axis1=1, axis2=2)
        diagx = np.diagonal(cx, axis1=1, axis2=2)
        usable = np.isfinite(x0) & np.isfinite(x) & np.isfinite(diag0) & np.isfinite(diagx)
        if usable.all():  # the common case: every entry of every row, no selections
            d2, rank = wald_distances(x - x0, c0 + cx, rcond=self._rcond)
        else:
            d2 = np.zeros(k)
            rank = np.zeros(k, dtype=np.intp)
            patterns, groups = np.unique(usable, axis=0, return_inverse=True)
            for g, pattern in enumerate(patterns):
                idx = np.flatnonzero(pattern)
                if idx.shape[0] == 0:
                    continue
                members = np.flatnonzero(groups.reshape(-1) == g)
                sub = np.ix_(members, idx, idx)
                pair = np.ix_(members, idx)
                delta: _Vector = x[pair] - x0[pair]
                d2[members], rank[members] = wald_distances(
                    delta, c0[sub] + cx[sub], rcond=self._rcond
                )
        if empirical is not None:
            threshold = np.where(rank > 0, float(empirical), math.inf)
        else:
            table = np.array([math.inf] + [self._chi2(df) for df in range(1, m + 1)])
            threshold = table[rank]
        alarm = (rank > 0) & (d2 >= threshold)
        statistic = np.where(rank > 0, d2, 0.0)
        return WaldResult(statistic, threshold, alarm, rank, usable)

    def evidence(self, result: WaldResult, x0: _Vector, x: _Vector, r: int) -> Evidence:
        """Build the Evidence of row ``r`` of :meth:`distances`, as :meth:`judge` reports it."""
        idx = np.flatnonzero(result.usable[r])
        rank = int(result.rank[r])
        values: dict[str, float] = {}
        labels = self._labels()
        for i in idx.tolist():
            values[f"baseline_{labels[i]}"] = float(x0[r, i])
            values[f"current_{labels[i]}"] = float(x[r, i])
        if rank == 0:
            values["n_tested"] = 0.0
            return Evidence(
                detector=self._name,
                family="behaviour",
                statistic=0.0,
                threshold=math.inf,
                alarm=False,
                signal=self._signal,
                values=values,
                detail="undefined",
            )
        d2 = float(result.statistic[r])
        detail = ""
        if idx.shape[0] < x.shape[1]:
            detail = "partial"
        elif rank < idx.shape[0]:
            detail = "rank_deficient"
        values.update(
            {
                "d2": d2,
                "df": float(rank),
                "p_value": float(chdtrc(rank, d2)),  # chi2.sf(d2, rank), without its overhead
                "n_tested": float(idx.shape[0]),
            }
        )
        return Evidence(
            detector=self._name,
            family="behaviour",
            statistic=d2,
            threshold=float(result.threshold[r]),
            alarm=bool(result.alarm[r]),
            signal=self._signal,
            values=values,
            detail=detail,
        )

    def _chi2(self, df: int) -> float:
        cached = self._chi2_cache.get(df)
        if cached is None:
            cached = float(chi2.ppf(1.0 - self._alpha, df))
            self._chi2_cache[df] = cached
        return cached

    def reset(self) -> None:
        """Forget the baseline and the schedule."""
        self._baseline = None
        self._count = 0

    def to_state(self) -> dict[str, Any]:
        """Learned state (baseline, empirical threshold, schedule) as JSON-safe data.

        Undefined baseline features are stored as None.
        """
        baseline: dict[str, Any] | None = None
        if self._baseline is not None:
            x0, c0, n_params, empirical = self._baseline
            baseline = {
                "x": [_plain(v) for v in x0],
                "covariance": [[_plain(v) for v in row] for row in c0],
                "n_params": n_params,
                "threshold": empirical,
            }
        return {"detector": self._name, "count": self._count, "baseline": baseline}

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, has missing or
            unknown keys, or a baseline of the wrong size or with bad entries.
        """
        name = self._name
        data = expect_state(state, name, ("count", "baseline"))
        count = state_int(data, name, "count")
        raw = data["baseline"]
        if raw is None:
            self._baseline, self._count = None, count
            return
        keys = {"x", "covariance", "n_params", "threshold"}
        if not isinstance(raw, dict) or set(raw) != keys:
            raise ValueError(
                f"{name} state: baseline must be null or a dict with keys {sorted(keys)}"
            )
        n_params = state_int(raw, name, "n_params", minimum=1)
        n = self._tested_size(n_params)
        x0 = np.array(_vector_or_nan(raw["x"], name, "baseline.x", n), dtype=np.float64)
        rows = raw["covariance"]
        if not isinstance(rows, list) or len(rows) != n:
            raise ValueError(f"{name} state: baseline.covariance must be a list of {n} rows")
        c0 = np.array(
            [_vector_or_nan(row, name, "baseline.covariance row", n) for row in rows],
            dtype=np.float64,
        ).reshape(n, n)
        empirical = raw["threshold"]
        if empirical is not None and not (is_real(empirical) and empirical > 0.0):
            raise ValueError(
                f"{name} state: baseline.threshold must be null or a finite number > 0, "
                f"got {empirical!r}"
            )
        self._baseline = (x0, c0, n_params, None if empirical is None else float(empirical))
        self._count = count


def _plain(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None


def _vector_or_nan(value: Any, name: str, key: str, n: int) -> list[float]:
    if not isinstance(value, list) or len(value) != n:
        raise ValueError(f"{name} state: {key} must be a list of {n} entries")
    out = []
    for v in value:
        if v is None:
            out.append(math.nan)
        elif is_real(v):
            out.append(float(v))
        else:
            raise ValueError(f"{name} state: {key} entries must be finite numbers or null")
    return out


class ParameterDrift(_WaldDrift):
    """Wald test of the live ARX parameters against the baseline.

    Parameters
    ----------
    config : ParameterDriftConfig, optional
        Settings; defaults alpha = 0.001, every 60 calls, all parameters.

    Examples
    --------
    >>> det = ParameterDrift(ParameterDriftConfig(every=1))
    >>> det.set_baseline([0.8, 0.5], [[1e-4, 0.0], [0.0, 1e-4]])
    >>> ev = det.update([0.8, 0.56], [[1e-4, 0.0], [0.0, 1e-4]])
    >>> round(ev.statistic, 6), round(ev.threshold, 3), ev.alarm
    (18.0, 13.816, True)

    References
    ----------
    A. Wald, "Tests of statistical hypotheses concerning several parameters
    when the number of observations is large", *Transactions of the
    American Mathematical Society* 54 (1943), 426-482.
    """

    _name = "parameter_drift"
    _signal = "parameters"
    __slots__ = ("config",)

    def __init__(self, config: ParameterDriftConfig | None = None) -> None:
        self.config = config if config is not None else ParameterDriftConfig()
        super().__init__(self.config.alpha, self.config.every, self.config.rcond)

    def _baseline_params(self, n_given: int) -> int:
        indices = self.config.indices
        if indices is not None and max(indices) >= n_given:
            raise DimensionError(f"indices {indices} reach beyond theta of length {n_given}")
        return n_given

    def project(self, thetas: _Vector, covs: _Vector) -> tuple[_Vector, _Vector]:
        """Select the tested entries of theta (k, n) and their covariances."""
        indices = self.config.indices
        if indices is None:
            return thetas, covs
        idx = list(indices)
        return thetas[:, idx], covs[:, idx][:, :, idx]

    def _tested_size(self, n_params: int) -> int:
        indices = self.config.indices
        if indices is None:
            return n_params
        if max(indices) >= n_params:
            raise ValueError(
                f"{self._name} state: baseline has {n_params} parameters, "
                f"indices {indices} need more"
            )
        return len(indices)

    def _labels(self) -> tuple[str, ...]:
        indices = self.config.indices
        if indices is None:
            indices = tuple(range(self._baseline[2] if self._baseline is not None else 0))
        return tuple(f"theta_{j}" for j in indices)

    def clone(self) -> ParameterDrift:
        """Return an untrained twin (no baseline) with the same settings."""
        return ParameterDrift(self.config)


class FeatureDrift(_WaldDrift):
    """Wald test of the physical features (gains, time constant, offset) by the delta method.

    Parameters
    ----------
    config : FeatureDriftConfig
        Model structure, sample period and test settings.

    Examples
    --------
    >>> from arxwatch.estimators.arx import ArxOrder
    >>> order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    >>> det = FeatureDrift(FeatureDriftConfig(order, 60.0, every=1, features=("gain_1",)))
    >>> cov = [[1e-5, 0.0], [0.0, 1e-5]]
    >>> det.set_baseline([-0.8, 0.4], cov)  # gain 0.4 / 0.2 = 2
    >>> ev = det.update([-0.8, 0.5], cov)   # gain 2.5
    >>> round(ev.values["baseline_gain_1"], 9), round(ev.values["current_gain_1"], 9)
    (2.0, 2.5)
    >>> round(ev.statistic, 2), ev.alarm
    (81.63, True)

    References
    ----------
    G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed., Duxbury,
    2002, section 5.5.4 (the delta method).
    """

    _name = "feature_drift"
    _signal = "features"
    __slots__ = ("config", "_rows", "_names", "_moved")

    def __init__(self, config: FeatureDriftConfig) -> None:
        self.config = config
        super().__init__(config.alpha, config.every, config.rcond)
        order = config.order
        names = feature_names(order)
        chosen = config.features if config.features is not None else names
        self._rows = [names.index(f) for f in chosen]
        self._names = tuple(chosen)
        # Every feature depends on each A coefficient; beyond those, (tested
        # row, parameter) pairs where J is not structurally 0: an input's B
        # coefficients move its gain, c the offset. Ascending parameter.
        moved = []
        for i in range(order.n_inputs):
            cols = order.input_slice(i)
            moved += [(i, j) for j in range(cols.start, cols.stop)]
        if order.constant:
            moved.append((len(names) - 1, order.n_params - 1))
        self._moved = [(self._rows.index(r), j) for r, j in moved if r in self._rows]

    def _baseline_params(self, n_given: int) -> int:
        return self.config.order.n_params

    def project(self, thetas: _Vector, covs: _Vector) -> tuple[_Vector, _Vector]:
        """Features of theta rows (k, n) and their covariances ``J Cov J'`` (delta method)."""
        _, f, cf = self.read_and_project(thetas, covs)
        return f, cf

    def read_and_project(self, thetas: _Vector, covs: _Vector) -> tuple[_Vector, _Vector, _Vector]:
        """:meth:`project`, with every feature of the rows as ``feature_matrix`` gives them.

        The Jacobian needs the read-out at theta anyway; a caller that also
        shows or bands the features (the fleet's hourly evaluation) takes
        them from here instead of reading theta out again.

        Returns
        -------
        features : ndarray, shape (k, n_features)
            ``feature_matrix(order, thetas, sample_period_s)``.
        x, cx : ndarray, shapes (k, m) and (k, m, m)
            What :meth:`project` returns.
        """
        order, ts = self.config.order, self.config.sample_period_s
        features, full = features_and_jacobians(order, thetas, ts)
        rows = self._rows
        if rows == list(range(features.shape[1])):
            f, jac = features.copy(), full
        else:
            f, jac = features[:, rows], full[:, rows, :]
        # nan rows of J (undefined features) would spread nan over the whole
        # product; zero them here and let the finiteness mask on f drop them.
        bad: NDArray[np.bool_] | None = None
        finite = np.isfinite(jac)
        if not finite.all():
            bad = np.asarray(~finite.all(axis=2), dtype=np.bool_)
            jac[bad] = 0.0
        # J Cov J' with sums in a fixed order (ascending parameter), so a row
        # does not depend on its batch. Every feature moves with the A
        # coefficients; a later parameter moves one feature at most, and the
        # terms where J is structurally 0 are left out (they change no
        # finite sum).
        k, m = f.shape
        na = self.config.order.na
        left = np.zeros((m, covs.shape[2], k)).transpose(2, 0, 1)  # rows innermost
        for i in range(na):
            left = left + jac[:, :, i, None] * covs[:, None, i, :]
        for r, i in self._moved:
            left[:, r, :] += jac[:, r, i, None] * covs[:, i, :]
        cf = np.zeros((m, m, k)).transpose(2, 0, 1)
        for j in range(na):
            cf = cf + left[:, :, None, j] * jac[:, None, :, j]
        for r, j in self._moved:
            cf[:, :, r] += left[:, :, j] * jac[:, r, j, None]
        # a covariance with an entry that is not finite leaves nothing to test
        # (the full product, 0 * inf included, is nan everywhere)
        usable = np.isfinite(covs)
        if not usable.all():
            cf[~usable.all(axis=(1, 2))] = np.nan
        if bad is not None:
            cf[bad[:, :, None] | bad[:, None, :]] = np.nan
            f[bad] = np.nan
        return features, f, cf

    def _tested_size(self, n_params: int) -> int:
        if n_params != self.config.order.n_params:
            raise ValueError(
                f"{self._name} state: baseline has {n_params} parameters, the order needs "
                f"{self.config.order.n_params}"
            )
        return len(self._rows)

    def _labels(self) -> tuple[str, ...]:
        return self._names

    def clone(self) -> FeatureDrift:
        """Return an untrained twin (no baseline) with the same settings."""
        return FeatureDrift(self.config)
