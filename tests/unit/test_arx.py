"""ARX structure and regressor construction."""

import numpy as np
import pytest

from arxwatch.estimators.arx import (
    ArxOrder,
    RegressorHistory,
    check_breaks,
    regression_matrix,
    segment_regression_matrix,
)
from arxwatch.estimators.errors import DimensionError, OrderError


def test_counts_and_names() -> None:
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 0))
    assert order.n_params == 6
    assert order.param_names == ("a1", "a2", "b1_1", "b1_2", "b2_1", "c")
    assert order.input_slice(1) == slice(4, 5)
    # deepest lag: u_1(k-1-2+1) = u_1(k-2), y(k-2) -> two samples of history
    assert order.depth == 2


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"na": -1, "nb": (1,), "nk": (1,)}, "na must be in"),
        ({"na": 1, "nb": (0,), "nk": (1,)}, r"nb\[0\] must be in"),
        ({"na": 1, "nb": (1,), "nk": (-2,)}, r"nk\[0\] must be in"),
        ({"na": 1, "nb": (1, 2), "nk": (1,)}, "one entry per input"),
        ({"na": 0, "nb": (), "nk": (), "constant": False}, "no parameters"),
        ({"na": 1.5, "nb": (1,), "nk": (1,)}, "na must be an integer"),
        ({"na": 1, "nb": ("2",), "nk": (1,)}, "nb must hold integers"),
        ({"na": 1000, "nb": (1,), "nk": (1,)}, "na must be in"),
    ],
)
def test_impossible_orders_are_refused(kwargs: dict, match: str) -> None:
    with pytest.raises(OrderError, match=match):
        ArxOrder(**kwargs)


def test_regression_matrix_matches_definition() -> None:
    # Definition of the ARX regressor (Ljung 1999, eq. 4.11), written out by hand.
    rng = np.random.default_rng(3)
    y = rng.normal(size=12)
    u = rng.normal(size=(12, 2))
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 0))
    phi, target = regression_matrix(order, y, u)
    k = 5
    row = phi[k - order.depth]
    expected = [-y[k - 1], -y[k - 2], u[k - 1, 0], u[k - 2, 0], u[k, 1], 1.0]
    np.testing.assert_array_equal(row, expected)
    assert target[k - order.depth] == y[k]
    assert phi.shape == (12 - order.depth, 6)


def test_history_builds_the_same_rows_as_the_batch_matrix() -> None:
    rng = np.random.default_rng(4)
    y = rng.normal(size=30)
    u = rng.normal(size=(30, 2))
    order = ArxOrder(na=3, nb=(2, 3), nk=(2, 1), constant=False)
    phi, _ = regression_matrix(order, y, u)
    history = RegressorHistory(order)
    rows = []
    for k in range(30):
        if history.ready:
            rows.append(history.regressor(u[k].tolist()))
        history.push(float(y[k]), u[k].tolist())
    np.testing.assert_array_equal(np.array(rows), phi)


def test_history_clear_waits_for_fresh_samples() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,))
    history = RegressorHistory(order)
    history.push(1.0, [1.0])
    history.push(2.0, [1.0])
    assert history.ready
    history.clear()
    assert not history.ready
    restored = RegressorHistory.from_state(order, history.to_state())
    assert restored.to_state() == history.to_state()


def test_shape_errors_name_the_argument() -> None:
    order = ArxOrder(na=1, nb=(1,), nk=(1,))
    with pytest.raises(DimensionError, match="u has 2 input column"):
        regression_matrix(order, np.zeros(10), np.zeros((10, 2)))
    with pytest.raises(DimensionError, match="y must be 1-D"):
        regression_matrix(order, np.zeros((10, 1)), np.zeros(10))
    with pytest.raises(DimensionError, match="too short"):
        regression_matrix(order, np.zeros(1), np.zeros(1))
    with pytest.raises(DimensionError, match="u_now has 2"):
        RegressorHistory(order).regressor([1.0, 2.0])


def test_one_segment_is_regression_matrix_bit_for_bit() -> None:
    rng = np.random.default_rng(1)
    y, u = rng.standard_normal(50), rng.standard_normal((50, 2))
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 3))
    phi, target = regression_matrix(order, y, u)
    for start in (None, order.depth):
        phi_s, target_s = segment_regression_matrix(order, y, u, start=start)
        assert phi_s.tobytes() == phi.tobytes() and target_s.tobytes() == target.tobytes()
    phi_s, target_s = segment_regression_matrix(order, y, u, start=order.depth + 2)
    assert phi_s.tobytes() == phi[2:].tobytes() and target_s.tobytes() == target[2:].tobytes()


def test_segments_are_built_apart_and_short_ones_give_no_rows() -> None:
    rng = np.random.default_rng(2)
    y, u = rng.standard_normal(30), rng.standard_normal(30)
    order = ArxOrder(na=1, nb=(2,), nk=(1,))  # depth 2
    phi, target = segment_regression_matrix(order, y, u, breaks=[10, 12, 20])
    parts = [regression_matrix(order, y[a:b], u[a:b]) for a, b in ((0, 10), (12, 20), (20, 30))]
    assert phi.tobytes() == np.vstack([p[0] for p in parts]).tobytes()
    assert target.tobytes() == np.concatenate([p[1] for p in parts]).tobytes()
    assert phi.shape == (8 + 6 + 8, 4)  # the stretch of 2 samples (10, 11) gives none


@pytest.mark.parametrize(
    ("breaks", "start", "match"),
    [
        ([5, 5], None, r"breaks must increase strictly within \(0, 10\)"),
        ([0], None, r"breaks must increase strictly"),
        ([10], None, r"breaks must increase strictly"),
        ([2.5], None, r"breaks\[0\] must be an integer, got 2.5"),
        ([], 1, r"start must be at least the order depth 2, got 1"),
        ([2, 4, 6, 8], None, r"no segment is longer than 2 samples \(the longest of 5 has 2\)"),
    ],
)
def test_segment_errors_name_the_argument(
    breaks: list[object], start: int | None, match: str
) -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,))
    with pytest.raises(DimensionError, match=match):
        segment_regression_matrix(order, np.zeros(10), np.zeros(10), breaks, start=start)  # type: ignore[arg-type]


def test_check_breaks_returns_plain_ints() -> None:
    assert check_breaks(np.array([3, 7]), 9) == (3, 7)
    assert all(type(b) is int for b in check_breaks(np.array([3, 7]), 9))
