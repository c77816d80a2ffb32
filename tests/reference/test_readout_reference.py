"""Reference checks of the physical read-out against scipy and closed forms.

Each check names its source in a comment. Process values (gains, time
constants, sample periods) are typical of HVAC loops: common practice, no
source.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import scipy.signal as signal
from numpy.typing import NDArray

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.readout import read_out

# Tolerance asked of the read-out against closed forms: common practice, no source.
RTOL = 1e-9


def zoh_first_order(gain: float, tau_s: float, ts: float) -> tuple[float, float]:
    """Closed-form ZOH sampling of K/(tau s + 1): y(k) = a y(k-1) + b u(k-1).

    Source: K. J. Åström and B. Wittenmark, Computer-Controlled Systems, 3rd ed.,
    1997, chapter 2 (sampling a first-order system): a = exp(-Ts/tau),
    b = K (1 - a).
    """
    a = math.exp(-ts / tau_s)
    return a, gain * (1.0 - a)


def theta_to_z_inverse(
    order: ArxOrder, theta: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Numerator and denominator in powers of z^-1 for input 1 (for scipy.signal.freqz)."""
    b = np.concatenate((np.zeros(order.nk[0]), theta[order.input_slice(0)]))
    a = np.concatenate(([1.0], theta[: order.na]))
    return b, a


def dc_gain_scipy(order: ArxOrder, theta: NDArray[np.float64]) -> float:
    """Transfer function at z = 1 (w = 0) via scipy.signal.freqz, an outside oracle."""
    b, a = theta_to_z_inverse(order, theta)
    _, h = signal.freqz(b, a, worN=[0.0])
    value = complex(h[0])
    assert abs(value.imag) < 1e-12
    return value.real


def two_point_dead_times(order: ArxOrder, theta: NDArray[np.float64], ts: float) -> list[float]:
    """Dead time of each input from scipy.signal.dstep's step response, by the two-point rule.

    Source of the rule: C. L. Smith, Digital Computer Process Control, Intext,
    1972 (from memory): a first-order lag with dead time L and time constant
    T reaches 28.3 % of its final value at L + T/3 and 63.2 % at L + T, so
    T = 1.5 (t2 - t1) and L = t2 - T. Between samples the crossing is
    interpolated on ln(1 - r), a straight line for such a lag, and one sample
    period is added for the hold, as read_out documents (its convention, so
    that a zero-order-hold lag with pure delay d Ts reads (d + 1) Ts = nk Ts).
    Source of the response: scipy.signal.dstep, an outside oracle.
    """
    a = np.concatenate(([1.0], theta[: order.na]))
    out = []
    for i in range(order.n_inputs):
        b = np.concatenate((np.zeros(order.nk[i]), theta[order.input_slice(i)]))
        size = max(a.shape[0], b.shape[0])
        # equal lengths: B(z^-1) / A(z^-1) = (z^N B(z^-1)) / (z^N A(z^-1)) in powers of z
        num, den = np.pad(b, (0, size - b.shape[0])), np.pad(a, (0, size - a.shape[0]))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", signal.BadCoefficients)
            _, (y,) = signal.dstep(signal.dlti(num, den, dt=ts), n=2000)
        r = y[:, 0] / (b.sum() / a.sum())
        times = []
        for frac in (1.0 - math.exp(-1.0 / 3.0), 1.0 - math.exp(-1.0)):
            k = int(np.flatnonzero(r >= frac)[0])
            before, after = (r[k - 1] if k else 0.0), r[k]
            if after <= 1.0:
                part = (math.log1p(-frac) - math.log1p(-before)) / (
                    math.log1p(-after) - math.log1p(-before)
                )
            else:
                part = (frac - before) / (after - before)
            times.append(k - 1 + part)
        lag = times[1] - 1.5 * (times[1] - times[0])
        out.append(max(lag + 1.0, 0.0) * ts)
    return out


@pytest.mark.parametrize(
    ("gain", "tau_s", "ts"),
    [(2.5, 300.0, 30.0), (-0.8, 45.0, 5.0), (12.0, 3600.0, 60.0), (0.3, 20.0, 15.0)],
)
def test_first_order_lag_recovers_gain_and_time_constant(
    gain: float, tau_s: float, ts: float
) -> None:
    a, b = zoh_first_order(gain, tau_s, ts)
    # Source: scipy.signal.cont2discrete(method='zoh') must agree with the
    # closed-form discretisation used to build theta.
    num, den, _ = signal.cont2discrete(([gain], [tau_s, 1.0]), ts, method="zoh")
    np.testing.assert_allclose(np.ravel(num), [0.0, b], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(den, [1.0, -a], rtol=1e-12)

    order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    theta = np.array([-a, b])
    r = read_out(order, theta, ts)
    # Source: closed form K = b / (1 - a) and tau = -Ts / ln(a) (Åström & Wittenmark 1997).
    assert r.gains[0] == pytest.approx(gain, rel=RTOL)
    assert r.time_constant_s == pytest.approx(tau_s, rel=RTOL)
    assert r.stable and not r.integrating
    # Source: the two-point rule reads a first-order lag exactly: no delay
    # but the hold's sample (see two_point_dead_times).
    assert r.dead_times_s == pytest.approx((ts,), rel=RTOL)
    assert r.offset is None
    # Source: scipy.signal.freqz of B/A at w = 0.
    assert r.gains[0] == pytest.approx(dc_gain_scipy(order, theta), rel=RTOL)
    # Source: scipy.signal.dlti(...).freqresp at w = 0, i.e. H(z = 1).
    _, h = signal.dlti([b], [1.0, -a], dt=ts).freqresp(w=[0.0])
    assert r.gains[0] == pytest.approx(complex(h[0]).real, rel=RTOL)


def test_first_order_offset_is_steady_state_with_zero_input() -> None:
    a, b = zoh_first_order(1.5, 600.0, 60.0)
    c = 0.7
    order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=True)
    r = read_out(order, [-a, b, c], 60.0)
    # Source: closed form, y_ss = c / (1 + a1) for y(k) = -a1 y(k-1) + c.
    assert r.offset == pytest.approx(c / (1.0 - a), rel=RTOL)
    # Source: scipy.signal.dlsim, running y(k) = a y(k-1) + c (c as a unit
    # input with gain c, zero initial state) for long enough to settle.
    _, y = signal.dlsim(signal.dlti([c, 0.0], [1.0, -a], dt=60.0), np.ones(2000))
    assert r.offset == pytest.approx(float(y[-1, 0]), rel=RTOL)


@pytest.mark.parametrize("d", [0, 1, 3, 7])
def test_first_order_plus_dead_time(d: int) -> None:
    gain, tau_s, ts = 4.0, 240.0, 20.0
    a, b = zoh_first_order(gain, tau_s, ts)
    # Source: Åström & Wittenmark 1997, chapter 2: a pure delay of d whole
    # samples multiplies the ZOH pulse transfer function by z^-d, so
    # y(k) = a y(k-1) + b u(k-1-d), i.e. nk = 1 + d.
    nk = 1 + d
    order = ArxOrder(na=1, nb=(1,), nk=(nk,), constant=False)
    theta = np.array([-a, b])
    r = read_out(order, theta, ts)
    assert r.dead_times_s == pytest.approx((nk * ts,), rel=RTOL)
    assert r.gains[0] == pytest.approx(gain, rel=RTOL)
    assert r.time_constant_s == pytest.approx(tau_s, rel=RTOL)
    # Source: scipy.signal.dstep: the first output sample that responds to a
    # step at k = 0 is k = nk, so dead time = nk * Ts.
    # In powers of z: H(z) = b / (z^d (z - a)).
    system = signal.dlti([b], np.concatenate(([1.0, -a], np.zeros(d))), dt=ts)
    _, (y,) = signal.dstep(system, n=nk + 5)
    first = int(np.flatnonzero(np.abs(y[:, 0]) > 1e-12)[0])
    assert first * ts == pytest.approx(r.dead_times_s[0], rel=RTOL)
    # Source: scipy.signal.freqz at w = 0 (static gain).
    assert r.gains[0] == pytest.approx(dc_gain_scipy(order, theta), rel=RTOL)


@pytest.mark.parametrize(
    ("k1", "tau1", "k2", "tau2", "ts"),
    [(2.0, 600.0, 0.5, 120.0, 30.0), (-1.2, 90.0, 3.0, 400.0, 10.0)],
)
def test_two_lags_in_series(k1: float, tau1: float, k2: float, tau2: float, ts: float) -> None:
    # Source: scipy.signal.cont2discrete(method='zoh') of the product
    # K1 K2 / ((tau1 s + 1)(tau2 s + 1)).
    num_c = [k1 * k2]
    den_c = np.polymul([tau1, 1.0], [tau2, 1.0])
    num, den, _ = signal.cont2discrete((num_c, den_c), ts, method="zoh")
    num = np.ravel(num)
    assert abs(num[0]) < 1e-12  # strictly proper: one sample of delay, nk = 1
    order = ArxOrder(na=2, nb=(2,), nk=(1,), constant=False)
    theta = np.array([den[1], den[2], num[1], num[2]])
    r = read_out(order, theta, ts)

    # Source: closed form, static gain of lags in series is K1 K2 (ZOH keeps DC gain).
    assert r.gains[0] == pytest.approx(k1 * k2, rel=RTOL)
    # Source: scipy.signal.freqz of the sampled B/A at w = 0.
    assert r.gains[0] == pytest.approx(dc_gain_scipy(order, theta), rel=RTOL)
    # Source: Åström & Wittenmark 1997, chapter 2: ZOH maps the pole -1/tau to
    # exp(-Ts/tau); the dominant (slowest) pole belongs to the larger tau.
    assert r.time_constant_s == pytest.approx(max(tau1, tau2), rel=RTOL)
    assert r.dominant_pole is not None
    assert r.dominant_pole.real == pytest.approx(math.exp(-ts / max(tau1, tau2)), rel=RTOL)
    assert all(p.imag == 0.0 for p in r.poles)
    expected = sorted([math.exp(-ts / tau1), math.exp(-ts / tau2)], reverse=True)
    np.testing.assert_allclose([p.real for p in r.poles], expected, rtol=RTOL)
    # Source: numpy.roots and scipy.signal.tf2zpk of the A polynomial.
    np.testing.assert_allclose(
        sorted(np.roots(den).real, reverse=True), [p.real for p in r.poles], rtol=1e-12
    )
    _, poles_zpk, _ = signal.tf2zpk(num[1:], den)
    np.testing.assert_allclose(
        sorted(np.real(poles_zpk), reverse=True), [p.real for p in r.poles], rtol=1e-12
    )
    assert r.stable


@pytest.mark.parametrize(("wn", "zeta", "ts"), [(0.02, 0.3, 10.0), (0.1, 0.05, 2.0)])
def test_underdamped_second_order(wn: float, zeta: float, ts: float) -> None:
    gain = 1.7
    # Source: scipy.signal.cont2discrete(method='zoh') of K wn^2 / (s^2 + 2 zeta wn s + wn^2).
    num, den, _ = signal.cont2discrete(
        ([gain * wn**2], [1.0, 2.0 * zeta * wn, wn**2]), ts, method="zoh"
    )
    num = np.ravel(num)
    assert abs(num[0]) < 1e-12  # strictly proper: nk = 1
    order = ArxOrder(na=2, nb=(2,), nk=(1,), constant=False)
    theta = np.array([den[1], den[2], num[1], num[2]])
    r = read_out(order, theta, ts)
    # Source: closed form, s = -zeta wn +- j wn sqrt(1 - zeta^2) and ZOH maps
    # s to exp(s Ts) (Åström & Wittenmark 1997, chapter 2), so ln(z)/Ts gives
    # s back while |Im s| Ts < pi; the envelope decays like exp(-zeta wn t).
    assert r.natural_frequency_rad_s == pytest.approx(wn, rel=1e-8)
    assert r.damping_ratio == pytest.approx(zeta, rel=1e-8)
    assert r.damped_frequency_rad_s == pytest.approx(wn * math.sqrt(1 - zeta**2), rel=1e-8)
    assert r.time_constant_s == pytest.approx(1.0 / (zeta * wn), rel=1e-8)
    assert r.gains[0] == pytest.approx(gain, rel=1e-8)
    # Source: scipy.signal.tf2zpk poles of the sampled system.
    _, poles_zpk, _ = signal.tf2zpk(num[1:], den)
    upper = max(poles_zpk, key=lambda p: p.imag)
    assert r.dominant_pole == pytest.approx(complex(upper), rel=1e-12)
    assert any("complex" in note for note in r.notes)


def test_two_input_gains_against_freqz() -> None:
    # Values: common practice, no source. Source of the oracle:
    # scipy.signal.freqz at w = 0 of each B_i(z^-1) z^-nk_i / A(z^-1).
    order = ArxOrder(na=2, nb=(2, 1), nk=(1, 4), constant=True)
    theta = np.array([-1.3, 0.4, 0.05, 0.03, -0.02, 0.6])
    r = read_out(order, theta, 60.0)
    a = np.concatenate(([1.0], theta[:2]))
    for i in range(2):
        b = np.concatenate((np.zeros(order.nk[i]), theta[order.input_slice(i)]))
        _, h = signal.freqz(b, a, worN=[0.0])
        assert r.gains[i] == pytest.approx(complex(h[0]).real, rel=RTOL)
    assert r.dead_times_s == pytest.approx(two_point_dead_times(order, theta, 60.0), rel=RTOL)


def test_multi_input_dead_times_against_the_step_response() -> None:
    # Values: common practice, no source (slow poles 0.8 and 0.3, three inputs
    # with different delays and B shapes). Oracle: two_point_dead_times.
    order = ArxOrder(na=2, nb=(2, 1, 3), nk=(1, 0, 4), constant=True)
    theta = np.array([-1.1, 0.24, 0.2, 0.1, -0.05, 0.01, 0.02, 0.03, 0.4])
    r = read_out(order, theta, 30.0)
    assert r.dead_times_s == pytest.approx(two_point_dead_times(order, theta, 30.0), rel=RTOL)


@pytest.mark.parametrize("late", [0.0, 0.25, 0.5, 0.75, 1.0])
def test_dead_time_follows_the_weight_of_b_to_a_later_lag(late: float) -> None:
    # A first-order lag whose B holds two lags (nb = 2): the share `late` of
    # the input's effect arrives one sample later. At the ends the process
    # is a lag with whole-sample delay, read exactly (Smith's rule on a
    # first-order lag); in between the reading moves one way with the share.
    # Oracle: two_point_dead_times (scipy.signal.dstep).
    gain, tau_s, ts, nk = 2.0, 300.0, 30.0, 2
    a, b = zoh_first_order(gain, tau_s, ts)
    order = ArxOrder(na=1, nb=(2,), nk=(nk,), constant=False)
    theta = np.array([-a, b * (1.0 - late), b * late])
    r = read_out(order, theta, ts)
    assert r.dead_times_s == pytest.approx(two_point_dead_times(order, theta, ts), rel=RTOL)
    if late in (0.0, 1.0):
        assert r.dead_times_s[0] == pytest.approx((nk + late) * ts, rel=RTOL)
    else:
        assert nk * ts < r.dead_times_s[0] < (nk + 1) * ts
