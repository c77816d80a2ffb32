"""Unit tests of arxwatch.estimators.readout.

Parameter values are illustrative: common practice, no source, unless a
comment names one.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import dataclasses
import doctest
import math

import numpy as np
import pytest

from arxwatch.estimators import readout as readout_module
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.readout import (
    PhysicalReadout,
    dead_time_matrix,
    feature_jacobians,
    feature_matrix,
    feature_names,
    feature_vector,
    features_and_jacobians,
    read_out,
    readout_jacobian,
)

FIRST_ORDER = ArxOrder(na=1, nb=(1,), nk=(1,), constant=True)


# --- validation -------------------------------------------------------------


def test_theta_length_names_both_lengths() -> None:
    # Source: STYLE.md "Errors": the message names the argument, value and expectation.
    with pytest.raises(DimensionError, match=r"theta has 2 entries but order.n_params is 3"):
        read_out(FIRST_ORDER, [0.1, 0.2], 10.0)
    with pytest.raises(DimensionError, match=r"n_params is 3 \(a1, b1_1, c\)"):
        readout_jacobian(FIRST_ORDER, [0.1, 0.2, 0.3, 0.4], 10.0)


def test_theta_must_be_one_dimensional() -> None:
    with pytest.raises(DimensionError, match=r"theta must be 1-D .*got shape \(3, 1\)"):
        read_out(FIRST_ORDER, np.zeros((3, 1)), 10.0)


def test_dimension_error_is_a_value_error() -> None:
    # Source: STYLE.md "Errors": exceptions subclass builtins.
    with pytest.raises(ValueError):
        read_out(FIRST_ORDER, [0.1], 10.0)


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf])
def test_non_finite_theta_rejected(bad: float) -> None:
    with pytest.raises(ValueError, match=r"theta must be finite, got b1_1="):
        read_out(FIRST_ORDER, [-0.5, bad, 0.0], 10.0)


@pytest.mark.parametrize("bad", [0.0, -5.0, math.nan, math.inf])
def test_sample_period_must_be_finite_positive(bad: float) -> None:
    with pytest.raises(ValueError, match=r"sample_period_s must be finite and > 0"):
        read_out(FIRST_ORDER, [-0.5, 1.0, 0.0], bad)
    with pytest.raises(ValueError, match=r"sample_period_s"):
        readout_jacobian(FIRST_ORDER, [-0.5, 1.0, 0.0], bad)


@pytest.mark.parametrize("bad", ["10", True, None])
def test_sample_period_must_be_a_number(bad: object) -> None:
    with pytest.raises(TypeError, match=r"sample_period_s must be a real number"):
        read_out(FIRST_ORDER, [-0.5, 1.0, 0.0], bad)  # type: ignore[arg-type]


def test_order_must_be_arx_order() -> None:
    with pytest.raises(TypeError, match=r"order must be an ArxOrder"):
        read_out((1, (1,), (1,)), [-0.5, 1.0, 0.0], 10.0)  # type: ignore[arg-type]


@pytest.mark.parametrize("bad", [0.0, -1e-6, math.nan])
def test_relative_step_validated(bad: float) -> None:
    with pytest.raises(ValueError, match=r"relative_step must be a finite number > 0"):
        readout_jacobian(FIRST_ORDER, [-0.5, 1.0, 0.0], 10.0, relative_step=bad)


def test_input_array_left_untouched() -> None:
    # Source: STYLE.md "Estimators": a function writes into caller arrays only when documented.
    theta = np.array([-0.5, 1.0, 0.2])
    before = theta.copy()
    read_out(FIRST_ORDER, theta, 10.0)
    readout_jacobian(FIRST_ORDER, theta, 10.0)
    np.testing.assert_array_equal(theta, before)


# --- read-out cases ---------------------------------------------------------


def test_first_order_closed_form() -> None:
    a1, b, c, ts = -0.8, 0.4, 0.1, 15.0
    r = read_out(FIRST_ORDER, [a1, b, c], ts)
    # Source: closed form K = b/(1 + a1), offset = c/(1 + a1), tau = -Ts/ln(-a1).
    assert r.gains == pytest.approx((b / (1 + a1),), rel=1e-12)
    assert r.offset == pytest.approx(c / (1 + a1), rel=1e-12)
    assert r.time_constant_s == pytest.approx(-ts / math.log(-a1), rel=1e-12)
    assert r.poles == pytest.approx((0.8,), rel=1e-12)
    assert r.stable and not r.integrating
    assert r.dead_times_s == (15.0,)
    assert r.sample_period_s == 15.0
    assert math.isnan(r.damping_ratio) and math.isnan(r.natural_frequency_rad_s)
    assert r.notes == ()


def test_result_is_frozen() -> None:
    r = read_out(FIRST_ORDER, [-0.5, 1.0, 0.0], 10.0)
    assert isinstance(r, PhysicalReadout)
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.stable = False  # type: ignore[misc]


def test_integrator_gives_nan_gain_and_note() -> None:
    # Source: closed form, A(1) = 1 + a1 = 0 puts a pole at z = 1 (pure integrator).
    r = read_out(FIRST_ORDER, [-1.0, 0.5, 0.2], 60.0)
    assert r.integrating
    assert not r.stable
    assert math.isnan(r.gains[0])
    assert r.offset is not None and math.isnan(r.offset)
    assert math.isnan(r.time_constant_s)
    assert r.notes[0] == "pole at z=1.000: integrating process, static gain and offset undefined"
    assert any("time constant undefined" in note for note in r.notes)
    # Only the integrator pole is on the circle: no separate "unstable" note.
    assert not any(note.startswith("unstable") for note in r.notes)


def test_integrator_without_constant_mentions_gain_only() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,), constant=False)
    # A(z) = (z - 1)(z - 0.5) = z^2 - 1.5 z + 0.5: integrator plus a lag.
    r = read_out(order, [-1.5, 0.5, 0.3], 10.0)
    assert r.integrating
    assert r.offset is None
    assert math.isnan(r.gains[0])
    assert r.notes[0] == "pole at z=1.000: integrating process, static gain undefined"


def test_integrator_tolerance_is_relative() -> None:
    # A(1) = 1e-13 is rounding of the sum: integrating. A(1) = 1e-6 is a real,
    # very slow lag: finite (large) gain.
    near = read_out(FIRST_ORDER, [-1.0 + 1e-13, 0.5, 0.0], 10.0)
    slow = read_out(FIRST_ORDER, [-1.0 + 1e-6, 0.5, 0.0], 10.0)
    assert near.integrating
    assert not slow.integrating and slow.stable
    assert slow.gains[0] == pytest.approx(0.5e6, rel=1e-6)


def test_unstable_real_pole_flagged() -> None:
    r = read_out(FIRST_ORDER, [-1.2, 0.5, 0.0], 10.0)
    assert not r.stable and not r.integrating
    assert r.poles == pytest.approx((1.2,))
    # The transfer function at z = 1 still exists: reported, with a caveat.
    assert r.gains[0] == pytest.approx(0.5 / -0.2)
    assert math.isnan(r.time_constant_s)
    assert any(
        note.startswith("unstable: pole(s) z=1.200 (|z|=1.200)") and "not a reachable" in note
        for note in r.notes
    )


def test_unstable_complex_pair_flagged() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,), constant=False)
    # z^2 - 0.2 z + 1.21: poles 0.1 +- j 1.095..., |z| = 1.1.
    r = read_out(order, [-0.2, 1.21, 1.0], 10.0)
    assert not r.stable
    assert all(abs(p) == pytest.approx(1.1) for p in r.poles)
    assert math.isnan(r.time_constant_s)
    assert r.damping_ratio < 0.0  # Source: closed form, Re(ln z) > 0 when |z| > 1.
    assert any(note.startswith("unstable") for note in r.notes)


def test_negative_real_pole_has_no_time_constant() -> None:
    # y(k) = -0.5 y(k-1) + ...: pole at z = -0.5, sign flips each sample.
    r = read_out(FIRST_ORDER, [0.5, 1.0, 0.0], 10.0)
    assert r.stable
    assert r.dominant_pole == -0.5
    assert math.isnan(r.time_constant_s)
    assert r.gains[0] == pytest.approx(1.0 / 1.5)
    assert any("real and negative" in note and "undefined" in note for note in r.notes)


def test_complex_dominant_pole_reports_envelope_and_damping() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,), constant=False)
    rho, angle, ts = 0.9, 0.3, 5.0
    # A(z) = z^2 - 2 rho cos(angle) z + rho^2 has poles rho exp(+-j angle).
    r = read_out(order, [-2 * rho * math.cos(angle), rho**2, 1.0], ts)
    assert r.dominant_pole is not None
    assert r.dominant_pole.imag > 0
    # Source: closed form, s = ln(z)/Ts = (ln rho + j angle)/Ts.
    sigma, omega = math.log(rho) / ts, angle / ts
    assert r.time_constant_s == pytest.approx(-ts / math.log(rho), rel=1e-12)
    assert r.damped_frequency_rad_s == pytest.approx(omega, rel=1e-12)
    assert r.natural_frequency_rad_s == pytest.approx(math.hypot(sigma, omega), rel=1e-12)
    assert r.damping_ratio == pytest.approx(-sigma / math.hypot(sigma, omega), rel=1e-12)
    assert any("complex" in note and "envelope" in note for note in r.notes)


def test_double_real_pole_is_real_and_tau_continuous() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,), constant=False)
    p, ts = 0.95, 10.0
    expected = -ts / math.log(p)
    double = read_out(order, [-2 * p, p * p, 1.0], ts)
    # numpy.roots resolves a double root only to ~sqrt(eps); it is reported real.
    assert all(z.imag == 0.0 for z in double.poles)
    assert double.time_constant_s == pytest.approx(expected, rel=1e-6)
    assert math.isnan(double.damping_ratio)
    # Just past the merge, the pair is complex and tau (from |z|) barely moves.
    split = read_out(order, [-2 * p, p * p + 1e-6, 1.0], ts)
    assert split.dominant_pole is not None and split.dominant_pole.imag > 0
    assert split.time_constant_s == pytest.approx(expected, rel=1e-4)


def test_poles_sorted_by_modulus() -> None:
    order = ArxOrder(na=3, nb=(1,), nk=(1,), constant=False)
    # A(z) = (z - 0.2)(z + 0.5)(z - 0.9)
    a = np.poly([0.2, -0.5, 0.9])[1:]
    r = read_out(order, np.concatenate((a, [1.0])), 10.0)
    np.testing.assert_allclose([z.real for z in r.poles], [0.9, -0.5, 0.2], atol=1e-12)
    assert r.dominant_pole == pytest.approx(0.9)
    assert r.time_constant_s == pytest.approx(-10.0 / math.log(0.9))


def test_multi_input_gains_and_dead_times() -> None:
    order = ArxOrder(na=2, nb=(2, 1, 3), nk=(1, 0, 4), constant=True)
    a = [-1.1, 0.3]
    b1, b2, b3 = [0.2, 0.1], [-0.05], [0.01, 0.02, 0.03]
    c = 0.4
    r = read_out(order, [*a, *b1, *b2, *b3, c], 30.0)
    a_at_one = 1 + sum(a)  # Source: closed form, A(1) = 1 + sum a_j = 0.2.
    assert r.gains == pytest.approx(
        (sum(b1) / a_at_one, sum(b2) / a_at_one, sum(b3) / a_at_one), rel=1e-12
    )
    assert r.offset == pytest.approx(c / a_at_one)
    # dead times from the step response (checked against scipy in
    # tests/reference/test_readout_reference.py): ordered as the delays,
    # each at least its structure's first lag minus the hold's sample
    d1, d2, d3 = r.dead_times_s
    assert 0.0 <= d2 < d1 < d3
    assert d1 >= 0.0 and d3 >= (4 - 1) * 30.0


def test_no_output_polynomial_gives_zero_tau() -> None:
    order = ArxOrder(na=0, nb=(3,), nk=(2,), constant=True)
    r = read_out(order, [0.1, 0.2, 0.3, -1.0], 10.0)
    assert r.poles == ()
    assert r.dominant_pole is None
    assert r.stable
    assert r.time_constant_s == 0.0
    assert r.gains == pytest.approx((0.6,))
    assert r.offset == -1.0
    assert any("na=0" in note for note in r.notes)


def test_all_poles_at_origin_give_zero_tau() -> None:
    order = ArxOrder(na=2, nb=(1,), nk=(1,), constant=False)
    r = read_out(order, [0.0, 0.0, 2.0], 10.0)
    assert r.poles == (0j, 0j)
    assert r.time_constant_s == 0.0
    assert r.gains == (2.0,)


# --- features and Jacobian --------------------------------------------------


def test_feature_vector_matches_names() -> None:
    order = ArxOrder(na=1, nb=(1, 2), nk=(1, 2), constant=True)
    r = read_out(order, [-0.6, 0.2, 0.1, 0.1, 0.8], 20.0)
    names = feature_names(order)
    values = feature_vector(r)
    assert names == ("gain_1", "gain_2", "time_constant_s", "offset")
    assert values.shape == (len(names),)
    assert values.dtype == np.float64
    assert r.offset is not None
    expected = np.array([r.gains[0], r.gains[1], r.time_constant_s, r.offset])
    np.testing.assert_array_equal(values, expected)


def test_feature_vector_without_constant_has_no_offset() -> None:
    order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    assert feature_names(order) == ("gain_1", "time_constant_s")
    assert feature_vector(read_out(order, [-0.5, 1.0], 10.0)).shape == (2,)


@pytest.mark.parametrize(("a1", "b", "c", "ts"), [(-0.8, 0.4, 0.1, 15.0), (-0.98, -2.0, 3.0, 60.0)])
def test_jacobian_matches_first_order_closed_form(a1: float, b: float, c: float, ts: float) -> None:
    jac = readout_jacobian(FIRST_ORDER, [a1, b, c], ts)
    assert jac.shape == (3, 3)  # (n_features, n_params)
    p = -a1
    # Source: closed-form derivatives of K = b/(1 + a1), offset = c/(1 + a1),
    # tau = -Ts/ln(p) with p = -a1, so dtau/da1 = -Ts / (p ln(p)^2).
    expected = np.array(
        [
            [-b / (1 + a1) ** 2, 1 / (1 + a1), 0.0],
            [-ts / (p * math.log(p) ** 2), 0.0, 0.0],
            [-c / (1 + a1) ** 2, 0.0, 1 / (1 + a1)],
        ]
    )
    # Tolerance: central differences with h ~ eps**(1/3) are good to ~1e-10
    # relative on smooth functions (Nocedal & Wright 2006, section 8.1); 1e-7
    # leaves room for the curvature of tau near p = 1.
    np.testing.assert_allclose(jac, expected, rtol=1e-7, atol=1e-9 * np.abs(expected).max())


def test_jacobian_delta_method_shape() -> None:
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 3), constant=False)
    theta = np.array([-1.3, 0.4, 0.05, 0.03, -0.02])
    jac = readout_jacobian(order, theta, 60.0)
    assert jac.shape == (len(feature_names(order)), order.n_params)
    cov_theta = np.diag(np.full(order.n_params, 1e-6))
    cov_features = jac @ cov_theta @ jac.T
    assert cov_features.shape == (3, 3)
    assert np.all(np.isfinite(cov_features))
    # Gains do not depend on the other input's coefficients.
    assert np.all(jac[0, 4:5] == 0.0) and np.all(jac[1, 2:4] == 0.0)


@pytest.mark.parametrize(
    "order",
    [
        FIRST_ORDER,
        ArxOrder(na=2, nb=(2,), nk=(2,)),
        ArxOrder(na=2, nb=(3, 1), nk=(1, 1), constant=False),
        ArxOrder(na=3, nb=(1,), nk=(1,)),
        ArxOrder(na=0, nb=(2,), nk=(1,)),
    ],
    ids=str,
)
def test_jacobians_are_the_full_central_difference_bit_for_bit(order: ArxOrder) -> None:
    # Reference: the definition readout_jacobian states, every parameter
    # stepped by h_j = eps**(1/3) max(|theta_j|, 1) and the whole read-out
    # (feature_matrix) differenced; nan where the feature is nan at theta.
    # Only the entries a step can move are differenced in the module; the
    # others must still come out as (f - f) / width.
    rng = np.random.default_rng(7)
    grid = np.array([-2.0, -1.0, -0.81, -0.5, 0.0, 0.25, 0.5, 1.0, 1.6])
    thetas = rng.uniform(-2.0, 2.0, size=(60, order.n_params))
    coarse = rng.random(thetas.shape) < 0.4
    thetas[coarse] = rng.choice(grid, size=int(coarse.sum()))
    thetas[0, : order.na] = 0.0  # poles at the origin
    thetas[1, -1] = 1e300  # an infinite gain or offset
    h = float(np.finfo(np.float64).eps) ** (1.0 / 3.0) * np.maximum(np.abs(thetas), 1.0)
    expected = np.empty((60, len(feature_names(order)), order.n_params))
    with np.errstate(all="ignore"):
        for j in range(order.n_params):
            up, down = thetas.copy(), thetas.copy()
            up[:, j] += h[:, j]
            down[:, j] -= h[:, j]
            width = up[:, j] - down[:, j]
            step = feature_matrix(order, up, 60.0) - feature_matrix(order, down, 60.0)
            expected[:, :, j] = step / width[:, None]
        at_theta = feature_matrix(order, thetas, 60.0)
        expected[np.isnan(at_theta)] = np.nan
        features, jacobians = features_and_jacobians(order, thetas, 60.0)
    assert features.tobytes() == at_theta.tobytes()
    assert jacobians.tobytes() == expected.tobytes()
    assert jacobians.tobytes() == feature_jacobians(order, thetas, 60.0).tobytes()


def test_dead_time_matrix_gives_each_row_the_bits_of_read_out() -> None:
    # Rows read alone (read_out) and among others, in any order, agree bit for
    # bit; rows with no final value (integrating, zero gain) are nan and say why.
    order = ArxOrder(na=2, nb=(2, 1), nk=(2, 1), constant=True)
    rng = np.random.default_rng(3)
    thetas = np.column_stack(
        (
            rng.uniform(-1.2, -0.6, 40),
            rng.uniform(0.0, 0.3, 40),
            rng.normal(0.0, 0.1, (40, 3)),
            rng.normal(0.0, 1.0, 40),
        )
    )
    thetas[0, :2] = [-1.5, 0.5]  # integrating: A(1) = 0
    thetas[1, 2:4] = 0.0  # input 1 has no effect
    alone = np.array([read_out(order, row, 60.0).dead_times_s for row in thetas])
    together = dead_time_matrix(order, thetas, 60.0)
    assert together.tobytes() == alone.tobytes()
    flipped = dead_time_matrix(order, thetas[::-1].copy(), 60.0)[::-1]
    assert flipped.tobytes() == alone.tobytes()
    assert np.isnan(alone[0]).all() and np.isnan(alone[1, 0]) and np.isfinite(alone[1, 1])
    notes = read_out(order, thetas[1], 60.0).notes
    assert any("dead time of input 1 undefined" in n for n in notes)
    assert np.isfinite(alone[2:]).mean() > 0.5  # the check above is not vacuous


def test_dead_time_of_a_very_slow_model_is_undefined_past_the_horizon_cap() -> None:
    # pole 0.99999: a time constant of 1e5 samples, past the 10,000-sample cap
    order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    r = read_out(order, [-0.99999, 1e-5], 60.0)
    assert math.isnan(r.dead_times_s[0]) and math.isfinite(r.time_constant_s)
    assert any("10,000 samples at most" in n for n in r.notes)


def test_jacobian_is_nan_where_feature_undefined() -> None:
    jac = readout_jacobian(FIRST_ORDER, [-1.0, 0.5, 0.2], 10.0)
    assert np.all(np.isnan(jac[0]))  # gain undefined at an integrator
    assert np.all(np.isnan(jac[1]))  # tau undefined at |p| = 1


def test_docstring_examples_run() -> None:
    # Source: STYLE.md "Docstrings": examples run as doctests.
    result = doctest.testmod(readout_module, optionflags=doctest.ELLIPSIS)
    assert result.attempted > 0
    assert result.failed == 0
