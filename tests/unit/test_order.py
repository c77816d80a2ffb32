"""Unit tests for arxwatch.estimators.order: criteria, ranking, grid handling.

Simulated signals and sizes are illustrative: common practice, no source,
unless a comment names one.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import doctest
import math

import numpy as np
import pytest

from arxwatch.estimators import order as order_module
from arxwatch.estimators.arx import ArxOrder, regression_matrix
from arxwatch.estimators.errors import DimensionError, OrderError
from arxwatch.estimators.identify import fit_ols, fit_percent
from arxwatch.estimators.order import (
    MAX_CANDIDATES,
    OrderCandidate,
    OrderSearch,
    information_criteria,
    select_order,
)


def _record(n_samples: int = 300, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    # y(k) = 0.6 y(k-1) + u(k-1) + 0.5 u(k-2) + e(k)
    rng = np.random.default_rng(seed)
    u = rng.standard_normal(n_samples)
    y = np.zeros(n_samples)
    for k in range(2, n_samples):
        y[k] = 0.6 * y[k - 1] + u[k - 1] + 0.5 * u[k - 2] + 0.1 * rng.standard_normal()
    return y, u


def test_docstring_examples_run() -> None:
    # Style guide: Examples run as doctests.
    result = doctest.testmod(order_module)
    assert result.attempted > 0
    assert result.failed == 0


def test_information_criteria_closed_form() -> None:
    # AIC = N ln(RSS/N) + 2n, BIC = N ln(RSS/N) + n ln N,
    # FPE = (RSS/N)(1 + n/N)/(1 - n/N) (Akaike 1969, 1974; Schwarz 1978).
    c = information_criteria(rss=50.0, n_samples=200, n_params=4)
    assert c.aic == pytest.approx(200 * math.log(0.25) + 8)
    assert c.bic == pytest.approx(200 * math.log(0.25) + 4 * math.log(200))
    assert c.fpe == pytest.approx(0.25 * 1.02 / 0.98)
    # N ln FPE = AIC + O(n^3 / N^2) (Akaike 1974, section IV).
    assert 200 * math.log(c.fpe) == pytest.approx(c.aic, abs=1e-2)


def test_information_criteria_perfect_fit_and_errors() -> None:
    c = information_criteria(rss=0.0, n_samples=10, n_params=2)
    assert c.aic == c.bic == -math.inf
    assert c.fpe == 0.0
    with pytest.raises(ValueError, match=r"rss must be a finite number >= 0, got -1.0"):
        information_criteria(-1.0, 10, 2)
    with pytest.raises(ValueError, match=r"n_params=10 and n_samples=10"):
        information_criteria(1.0, 10, 10)


@pytest.mark.parametrize("criterion", ["aic", "bic", "fpe"])
def test_candidates_ranked_by_criterion(criterion: str) -> None:
    y, u = _record()
    search = select_order(
        y,
        u,
        range(3),
        range(1, 4),
        range(3),
        criterion=criterion,  # type: ignore[arg-type]
    )
    assert isinstance(search, OrderSearch)
    assert search.criterion == criterion
    values = [getattr(c, criterion) for c in search.candidates]
    assert values == sorted(values)
    assert search.best is search.candidates[0]
    assert all(isinstance(c, OrderCandidate) for c in search.candidates)
    assert len(search.candidates) + search.n_skipped == 3 * 3 * 3


def test_common_target_window_and_consistent_scores() -> None:
    y, u = _record()
    search = select_order(y, u, range(1, 3), range(1, 3), range(1, 4), validation_fraction=0.2)
    # Deepest history on the grid: na=2, or nk + nb - 1 = 3 + 2 - 1 = 4.
    assert search.start == 4
    assert search.n_samples == 240 - 4
    assert search.n_validation_samples == 60 - 4
    for cand in search.candidates:
        # Re-fit by hand on y[start:240] and validate on y[240 + start:].
        drop = search.start - cand.order.depth
        phi, target = regression_matrix(cand.order, y[:240], u[:240])
        fit = fit_ols(phi[drop:], target[drop:])
        assert target[drop:].shape == (search.n_samples,)
        assert cand.rss == pytest.approx(fit.rss, rel=1e-10)
        assert cand.n_params == cand.order.n_params
        crit = information_criteria(fit.rss, search.n_samples, cand.n_params)
        assert (cand.aic, cand.bic, cand.fpe) == pytest.approx(tuple(crit))
        phi_val, target_val = regression_matrix(cand.order, y[240:], u[240:])
        expected = fit_percent(target_val[drop:], phi_val[drop:] @ fit.theta)
        assert cand.fit_percent_validation == pytest.approx(expected)


def test_true_order_wins_on_clean_data() -> None:
    y, u = _record(400)
    search = select_order(y, u, range(3), range(1, 4), range(3))
    assert search.best.order == ArxOrder(na=1, nb=(2,), nk=(1,))


def test_no_validation() -> None:
    y, u = _record()
    search = select_order(y, u, [1], [1, 2], [1], validation_fraction=0.0)
    assert all(c.fit_percent_validation is None for c in search.candidates)
    assert search.n_validation_samples == 0
    assert search.n_samples == 300 - search.start


def test_per_input_ranges_and_rank_deficient_candidates_skipped() -> None:
    y, u1 = _record()
    u = np.column_stack([u1, np.full(300, 3.0)])
    # Without a constant term a constant second input is identifiable with
    # nb_2 = 1 (it acts as the offset) but not with nb_2 = 2 (two equal
    # columns): those candidates are skipped, not fatal.
    search = select_order(y, u, [1], [[1, 2], [1, 2]], [[1], [0]], constant=False)
    assert search.n_skipped == 2
    assert all(o.nb[1] == 2 for o in search.skipped)
    assert all(c.order.nb[1] == 1 for c in search.candidates)
    assert len(search.candidates) == 2


def test_all_rank_deficient_raises() -> None:
    y, _ = _record()
    with pytest.raises(ValueError, match="all 4 candidate orders are rank deficient"):
        select_order(y, np.full(300, 3.0), [1], [1, 2], [0, 1])


def test_grid_bound() -> None:
    y, u = _record()
    with pytest.raises(ValueError, match=r"grid holds 12 candidates \(2 x 6 .*max_candidates=10"):
        select_order(y, u, [1, 2], [1, 2], [0, 1, 2], max_candidates=10)
    # The default bound refuses a grid of 11 x 20 x 30 = 6600 before fitting.
    assert MAX_CANDIDATES == 5000
    with pytest.raises(ValueError, match="grid holds 6600 candidates"):
        select_order(y, u, range(11), range(1, 21), range(30))
    with pytest.raises(ValueError, match="max_candidates must be an integer >= 1, got 0"):
        select_order(y, u, [1], [1], [1], max_candidates=0)


@pytest.mark.parametrize(
    ("ranges", "match"),
    [
        (([], [1], [1]), "na_range is empty"),
        (([-1], [1], [1]), r"na_range values must be in \[0, 240\], got -1"),
        (([1], [0], [1]), r"nb_range values must be in \[1, 240\], got 0"),
        (([1], [1], [1.5]), r"nk_range must hold integers, got 1.5"),
        (([1], [[1], [2]], [1]), "nb_range gives 2 per-input ranges but u has 1 input"),
        ((5, [1], [1]), "na_range must be a range or sequence of integers, got 5"),
    ],
)
def test_range_errors(ranges: tuple[object, object, object], match: str) -> None:
    y, u = _record()
    with pytest.raises(OrderError, match=match):
        select_order(y, u, *ranges)  # type: ignore[arg-type]


def test_argument_errors() -> None:
    y, u = _record()
    with pytest.raises(ValueError, match=r"criterion must be one of \['aic', 'bic', 'fpe'\]"):
        select_order(y, u, [1], [1], [1], criterion="hqc")  # type: ignore[arg-type]
    with pytest.raises(DimensionError, match="u must hold at least one input column"):
        select_order(y, np.empty((300, 0)), [1], [1], [1])
    with pytest.raises(DimensionError, match="leaves 3 after the deepest history on the grid"):
        select_order(y[:18], u[:18], [1], [1], [15], validation_fraction=0.0)
    with pytest.raises(DimensionError, match="validation segment has 30 samples"):
        select_order(y, u, [1], [1], [40], validation_fraction=0.1)
    with pytest.raises(ValueError, match="y must hold finite values, found nan at index 3"):
        y_bad = y.copy()
        y_bad[3] = np.nan
        select_order(y_bad, u, [1], [1], [1])
