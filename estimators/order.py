r"""Model-order selection for ARX models by information criteria.

:func:`select_order` fits every order on a grid by least squares and ranks
the fits by one of three criteria computed from the Gaussian
log-likelihood. With N scored samples, n parameters and residual sum of
squares RSS,

.. math::

    \mathrm{AIC} = N \ln(\mathrm{RSS}/N) + 2n, \qquad
    \mathrm{BIC} = N \ln(\mathrm{RSS}/N) + n \ln N, \qquad
    \mathrm{FPE} = \frac{\mathrm{RSS}}{N} \frac{1 + n/N}{1 - n/N}.

These differ from the textbook forms only by terms common to every
candidate. Such a comparison is fair only when every candidate is scored
on the same samples, so all fits share one target: the estimation samples
from the deepest history on the grid onwards.

References
----------
H. Akaike, "Fitting autoregressive models for prediction", *Annals of the
Institute of Statistical Mathematics* 21, 1969, pp. 243-247 (FPE).

H. Akaike, "A new look at the statistical model identification", *IEEE
Transactions on Automatic Control* 19(6), 1974, pp. 716-723 (AIC).

G. Schwarz, "Estimating the dimension of a model", *Annals of Statistics*
6(2), 1978, pp. 461-464 (BIC).

L. Ljung, *System Identification: Theory for the User*, 2nd ed., Prentice
Hall, 1999, section 16.4 (comparing model structures).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import ArrayLike

from arxwatch.estimators.arx import (
    MAX_LAG,
    ArxOrder,
    scored_rows,
    segment_lengths,
    segment_regression_matrix,
)
from arxwatch.estimators.errors import DimensionError, OrderError
from arxwatch.estimators.identify import (
    RankDeficientError,
    fit_ols,
    fit_percent,
    split_breaks,
    split_series,
)

__all__ = [
    "MAX_CANDIDATES",
    "Criteria",
    "Criterion",
    "OrderCandidate",
    "OrderSearch",
    "information_criteria",
    "select_order",
]

#: Default bound on the grid: each candidate is one least-squares fit, and
#: a grid this large is almost always a typo in a range.
MAX_CANDIDATES = 5000

Criterion = Literal["aic", "bic", "fpe"]
_CRITERIA: tuple[Criterion, ...] = ("aic", "bic", "fpe")


class Criteria(NamedTuple):
    """Information criteria of one least-squares fit (smaller is better)."""

    aic: float
    bic: float
    fpe: float


@dataclass(frozen=True)
class OrderCandidate:
    """One fitted order on the search grid.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    aic, bic, fpe : float
        Information criteria on the common estimation samples; see
        :func:`information_criteria`.
    rss : float
        Residual sum of squares on the common estimation samples.
    n_params : int
        Number of parameters.
    fit_percent_validation : float or None
        One-step-ahead fit in percent on the validation samples, or None
        without validation.
    """

    order: ArxOrder
    aic: float
    bic: float
    fpe: float
    rss: float
    n_params: int
    fit_percent_validation: float | None


@dataclass(frozen=True)
class OrderSearch:
    """Result of :func:`select_order`.

    Parameters
    ----------
    candidates : tuple of OrderCandidate
        Fitted candidates, best first by ``criterion``; ties go to fewer
        parameters.
    criterion : {"aic", "bic", "fpe"}
        Criterion used for the ranking.
    skipped : tuple of ArxOrder
        Orders left out because their regression matrix was rank deficient.
    start : int
        Index of the first scored sample in each segment: the deepest
        history on the grid.
    n_samples : int
        Estimation samples every candidate was scored on.
    n_validation_samples : int
        Validation samples every candidate was scored on (0 without
        validation).
    """

    candidates: tuple[OrderCandidate, ...]
    criterion: Criterion
    skipped: tuple[ArxOrder, ...]
    start: int
    n_samples: int
    n_validation_samples: int

    @property
    def best(self) -> OrderCandidate:
        """The best-ranked candidate."""
        return self.candidates[0]

    @property
    def n_skipped(self) -> int:
        """Number of rank-deficient orders left out."""
        return len(self.skipped)


def information_criteria(rss: float, n_samples: int, n_params: int) -> Criteria:
    r"""Return AIC, BIC and FPE of a least-squares fit with Gaussian errors.

    .. math::

        \mathrm{AIC} = N \ln(\mathrm{RSS}/N) + 2n, \quad
        \mathrm{BIC} = N \ln(\mathrm{RSS}/N) + n \ln N, \quad
        \mathrm{FPE} = \frac{\mathrm{RSS}}{N} \frac{1 + n/N}{1 - n/N}.

    A perfect fit (RSS = 0) gives AIC = BIC = -inf and FPE = 0.

    Parameters
    ----------
    rss : float
        Residual sum of squares, >= 0.
    n_samples : int
        Number of fitted samples N.
    n_params : int
        Number of parameters n, 0 <= n < N.

    Returns
    -------
    Criteria
        ``(aic, bic, fpe)``.

    Raises
    ------
    ValueError
        If ``rss`` is negative or not finite, or n and N are inconsistent.

    References
    ----------
    H. Akaike, "Fitting autoregressive models for prediction", *Annals of
    the Institute of Statistical Mathematics* 21, 1969, pp. 243-247.

    H. Akaike, "A new look at the statistical model identification", *IEEE
    Transactions on Automatic Control* 19(6), 1974, pp. 716-723.

    G. Schwarz, "Estimating the dimension of a model", *Annals of
    Statistics* 6(2), 1978, pp. 461-464.

    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    section 16.4.

    Examples
    --------
    >>> c = information_criteria(rss=100.0, n_samples=100, n_params=2)
    >>> round(c.aic, 6), round(c.bic - c.aic, 6), round(c.fpe, 6)
    (4.0, 5.21034, 1.040816)
    """
    if not (math.isfinite(rss) and rss >= 0.0):
        raise ValueError(f"rss must be a finite number >= 0, got {rss!r}")
    if not 0 <= n_params < n_samples:
        raise ValueError(
            f"need 0 <= n_params < n_samples, got n_params={n_params} and n_samples={n_samples}"
        )
    mean_square = rss / n_samples
    log_term = n_samples * math.log(mean_square) if mean_square > 0.0 else -math.inf
    ratio = n_params / n_samples
    return Criteria(
        aic=log_term + 2.0 * n_params,
        bic=log_term + n_params * math.log(n_samples),
        fpe=mean_square * (1.0 + ratio) / (1.0 - ratio),
    )


def _lag_values(values: object, name: str, minimum: int) -> tuple[int, ...]:
    if not isinstance(values, Iterable):
        raise OrderError(f"{name} must be a range or sequence of integers, got {values!r}")
    items = tuple(values)
    if not items:
        raise OrderError(f"{name} is empty; give at least one value")
    lags: set[int] = set()
    for v in items:
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)):
            raise OrderError(f"{name} must hold integers, got {v!r} in {items!r}")
        if not minimum <= v <= MAX_LAG:
            raise OrderError(f"{name} values must be in [{minimum}, {MAX_LAG}], got {v}")
        lags.add(int(v))
    return tuple(sorted(lags))


def _per_input(
    values: Iterable[int] | Sequence[Iterable[int]], name: str, n_inputs: int, minimum: int
) -> tuple[tuple[int, ...], ...]:
    # A sequence of iterables gives one range per input; anything else is
    # one range shared by every input.
    items = tuple(values) if isinstance(values, Iterable) else values
    if isinstance(items, tuple) and items and all(isinstance(v, Iterable) for v in items):
        if len(items) != n_inputs:
            raise OrderError(
                f"{name} gives {len(items)} per-input ranges but u has {n_inputs} input(s)"
            )
        return tuple(_lag_values(v, f"{name}[{i}]", minimum) for i, v in enumerate(items))
    return (_lag_values(items, name, minimum),) * n_inputs


def select_order(
    y: ArrayLike,
    u: ArrayLike,
    na_range: Iterable[int],
    nb_range: Iterable[int] | Sequence[Iterable[int]],
    nk_range: Iterable[int] | Sequence[Iterable[int]],
    *,
    breaks: Sequence[int] = (),
    criterion: Criterion = "bic",
    validation_fraction: float = 0.3,
    constant: bool = True,
    max_candidates: int = MAX_CANDIDATES,
) -> OrderSearch:
    """Fit every ARX order on a grid by least squares and rank them.

    The grid is every combination of ``na`` from ``na_range`` and, for each
    input i, ``nb_i`` and ``nk_i`` from their ranges. Each candidate is
    fitted with :func:`arxwatch.estimators.identify.fit_ols` on the
    estimation segment (the first ``1 - validation_fraction`` of the
    samples) and scored by AIC, BIC and FPE on the same target samples:
    those from index ``start`` = the largest ``depth`` on the grid onwards.
    The one-step-ahead fit percentage is scored on the validation segment
    from the same ``start`` within that segment.

    A record of several gap-free stretches, one after the other, is given
    with ``breaks``; every stretch is then scored from its own sample
    ``start`` on, so no regressor reaches across a join, and a stretch cut
    by the estimation/validation split becomes two
    (:func:`arxwatch.estimators.identify.split_breaks`).

    Parameters
    ----------
    y : array_like, shape (N,)
        Output samples on a uniform grid.
    u : array_like, shape (N, n_inputs) or (N,)
        Input samples on the same grid, at least one input.
    na_range : iterable of int
        Output orders to try, each in [0, MAX_LAG].
    nb_range : iterable of int, or sequence of iterables of int
        Input orders to try, each in [1, MAX_LAG]: one range for every
        input, or one range per input.
    nk_range : iterable of int, or sequence of iterables of int
        Input delays (samples) to try, each in [0, MAX_LAG], shared or per
        input like ``nb_range``.
    breaks : sequence of int, optional
        Index of the first sample of each stretch after the first, strictly
        increasing, in [1, N - 1]; none (the default) for one stretch.
    criterion : {"aic", "bic", "fpe"}, optional
        Ranking criterion; BIC is consistent, AIC and FPE tend to pick
        orders that are too large on long records.
    validation_fraction : float, optional
        Share of the samples kept for validation, in [0, 0.9]; 0 leaves
        ``fit_percent_validation`` None.
    constant : bool, optional
        Whether every candidate estimates a constant offset.
    max_candidates : int, optional
        Largest grid accepted, >= 1.

    Returns
    -------
    OrderSearch
        Candidates ranked best first, the orders skipped as rank deficient
        and the common scoring window.

    Raises
    ------
    OrderError
        If a range is empty, holds a non-integer or a value out of bounds,
        or per-input ranges do not match the number of inputs.
    ValueError
        If ``criterion`` is unknown, the grid is larger than
        ``max_candidates``, ``validation_fraction`` is out of range, the
        data hold NaN or infinity, or every candidate is rank deficient.
    DimensionError
        If ``u`` does not match ``y``, ``breaks`` is out of range, or a
        segment leaves too few scored samples for the grid.

    References
    ----------
    H. Akaike, "A new look at the statistical model identification", *IEEE
    Transactions on Automatic Control* 19(6), 1974, pp. 716-723.

    G. Schwarz, "Estimating the dimension of a model", *Annals of
    Statistics* 6(2), 1978, pp. 461-464.

    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    section 16.4.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> u = rng.standard_normal(400)
    >>> y = np.zeros(400)
    >>> for k in range(2, 400):
    ...     y[k] = 0.5 * y[k - 1] + u[k - 2] + 0.01 * rng.standard_normal()
    >>> search = select_order(y, u, range(3), range(1, 3), range(4))
    >>> search.best.order
    ArxOrder(na=1, nb=(1,), nk=(2,), constant=True)
    >>> len(search.candidates) + search.n_skipped, search.start
    (24, 4)
    """
    if criterion not in _CRITERIA:
        raise ValueError(f"criterion must be one of {list(_CRITERIA)}, got {criterion!r}")
    if (
        isinstance(max_candidates, bool)
        or not isinstance(max_candidates, int)
        or max_candidates < 1
    ):
        raise ValueError(f"max_candidates must be an integer >= 1, got {max_candidates!r}")
    y_est, u_est, y_val, u_val = split_series(y, u, validation_fraction)
    if u_est is None or u_val is None or u_est.shape[1] == 0:
        raise DimensionError("u must hold at least one input column")
    n_validation = y_val.shape[0]
    est_breaks, val_breaks = split_breaks(
        breaks, y_est.shape[0] + n_validation, validation_fraction
    )
    n_inputs = u_est.shape[1]

    na_values = _lag_values(na_range, "na_range", 0)
    nb_values = _per_input(nb_range, "nb_range", n_inputs, 1)
    nk_values = _per_input(nk_range, "nk_range", n_inputs, 0)
    sizes = [len(na_values)] + [
        len(nb) * len(nk) for nb, nk in zip(nb_values, nk_values, strict=True)
    ]
    grid_size = math.prod(sizes)
    if grid_size > max_candidates:
        raise ValueError(
            f"the grid holds {grid_size} candidates ({' x '.join(map(str, sizes))} for na and "
            f"each input's nb x nk), more than max_candidates={max_candidates}; narrow "
            "na_range, nb_range or nk_range"
        )

    start = max(
        max(na_values),
        max(max(nb) + max(nk) - 1 for nb, nk in zip(nb_values, nk_values, strict=True)),
    )
    n_samples = y_est.shape[0] - start  # may be negative: the message below says so
    if est_breaks:
        n_samples = scored_rows(est_breaks, y_est.shape[0], start)
    most_params = max(na_values) + sum(max(nb) for nb in nb_values) + int(constant)
    each = f" ({len(est_breaks) + 1} stretches, each)" if est_breaks else ""
    if n_samples <= most_params:
        raise DimensionError(
            f"estimation segment of {y_est.shape[0]} samples leaves {n_samples} after the "
            f"deepest history on the grid ({start}){each}, but the largest candidate has "
            f"{most_params} parameters; use a longer record or a smaller grid"
        )
    n_validation_rows = scored_rows(val_breaks, n_validation, start)
    if n_validation and n_validation_rows == 0:
        each = " in its longest stretch" if val_breaks else ""
        raise DimensionError(
            f"validation segment has {max(segment_lengths(val_breaks, n_validation))} samples"
            f"{each} but the deepest history on the grid is {start}; use a longer record, a "
            "larger validation_fraction or 0"
        )

    candidates: list[OrderCandidate] = []
    skipped: list[ArxOrder] = []
    input_choices = [
        tuple(itertools.product(nb, nk)) for nb, nk in zip(nb_values, nk_values, strict=True)
    ]
    grid = itertools.product(na_values, itertools.product(*input_choices))
    for na, inputs in grid:
        order = ArxOrder(
            na=na,
            nb=tuple(nb for nb, _ in inputs),
            nk=tuple(nk for _, nk in inputs),
            constant=constant,
        )
        phi, target = segment_regression_matrix(order, y_est, u_est, est_breaks, start=start)
        try:
            fit = fit_ols(phi, target)
        except RankDeficientError:
            skipped.append(order)
            continue
        score = None
        if n_validation:
            phi_val, target_val = segment_regression_matrix(
                order, y_val, u_val, val_breaks, start=start
            )
            score = fit_percent(target_val, fit.predict(phi_val))
        aic, bic, fpe = information_criteria(fit.rss, n_samples, order.n_params)
        candidates.append(
            OrderCandidate(
                order=order,
                aic=aic,
                bic=bic,
                fpe=fpe,
                rss=fit.rss,
                n_params=order.n_params,
                fit_percent_validation=score,
            )
        )
    if not candidates:
        raise ValueError(
            f"all {grid_size} candidate orders are rank deficient on the estimation "
            "segment; an input that stays constant during the record cannot be "
            "identified: excite it or leave it out of u"
        )
    candidates.sort(
        key=lambda c: (getattr(c, criterion), c.n_params, c.order.na, c.order.nb, c.order.nk)
    )
    return OrderSearch(
        candidates=tuple(candidates),
        criterion=criterion,
        skipped=tuple(skipped),
        start=start,
        n_samples=n_samples,
        n_validation_samples=n_validation_rows,
    )
