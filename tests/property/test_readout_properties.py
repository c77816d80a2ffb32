"""The vectorised read-out: same bits alone or in a batch, and the poles numpy.roots finds."""

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.readout import (
    feature_jacobians,
    feature_matrix,
    feature_vector,
    read_out,
    readout_jacobian,
)

ORDERS = [
    ArxOrder(na=1, nb=(1,), nk=(1,)),
    ArxOrder(na=2, nb=(2,), nk=(2,)),
    ArxOrder(na=2, nb=(1, 2), nk=(0, 3), constant=False),
    ArxOrder(na=3, nb=(1,), nk=(1,)),
]
# coefficients on a coarse grid hit double poles, poles at 0 and on the unit circle
coefficient = st.sampled_from([-2.0, -1.5, -1.0, -0.81, -0.5, -0.25, 0.0, 0.25, 0.5, 1.0, 1.6])


@settings(max_examples=150, deadline=None)
@given(st.sampled_from(ORDERS), st.data())
def test_a_row_in_a_batch_reads_as_it_does_alone(order: ArxOrder, data: st.DataObject) -> None:
    rows = data.draw(st.integers(1, 6))
    thetas = data.draw(
        arrays(
            np.float64, (rows, order.n_params), elements=st.one_of(coefficient, st.floats(-3, 3))
        )
    )
    batch = feature_matrix(order, thetas, 60.0)
    jacobians = feature_jacobians(order, thetas, 60.0)
    for r in range(rows):
        alone = feature_vector(read_out(order, thetas[r], 60.0))
        np.testing.assert_array_equal(batch[r], alone)
        np.testing.assert_array_equal(jacobians[r], readout_jacobian(order, thetas[r], 60.0))


@settings(max_examples=300, deadline=None)
@given(st.floats(-1.99, 1.99), st.floats(-0.99, 0.99))
def test_second_order_time_constant_matches_numpy_roots(a1: float, a2: float) -> None:
    # Source: numpy.roots (companion-matrix eigenvalues) and tau = -Ts / ln|p|
    # of the pole of largest modulus (Astrom and Wittenmark 1997, chapter 2);
    # a negative real dominant pole has none.
    order = ArxOrder(na=2, nb=(1,), nk=(1,), constant=False)
    tau = float(feature_matrix(order, [[a1, a2, 1.0]], 60.0)[0, 1])
    poles = np.roots([1.0, a1, a2])
    largest = max(abs(p) for p in poles)
    # equal moduli (to 1e-9, read_out's tie rule) go to the slowest-looking pole
    dominant = max((p for p in poles if abs(p) >= largest * (1 - 1e-9)), key=lambda p: p.real)
    modulus = abs(dominant)
    if not 1e-6 < modulus < 1.0 - 1e-6 or abs(a1 * a1 - 4.0 * a2) < 1e-6:
        return  # near zero, the unit circle or a double pole: ill-conditioned for both
    if abs(dominant.imag) == 0.0 and dominant.real < 0.0:
        assert math.isnan(tau)
    else:
        assert math.isclose(tau, -60.0 / math.log(modulus), rel_tol=1e-8)
