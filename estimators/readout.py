r"""Physical read-out of an ARX parameter vector.

Technicians act on static gains, time constants, dead times and offsets, not
on raw ARX coefficients. For the model of :mod:`arxwatch.estimators.arx`,

.. math::

    A(q) y(k) = \sum_i B_i(q) u_i(k - nk_i) + c + e(k),

with :math:`\theta = [a_1, ..., a_{na}, b_{1,1}, ..., b_{1,nb_1}, ..., c]`,
this module computes

* the static gain of input i, :math:`K_i = B_i(1) / A(1)`, with
  :math:`A(1) = 1 + \sum_j a_j` and :math:`B_i(1) = \sum_j b_{i,j}`;
* the offset :math:`c / A(1)`, the steady-state output with all inputs zero;
* the poles of A, roots of :math:`z^{na} + a_1 z^{na-1} + ... + a_{na}`, and
  whether all lie strictly inside the unit circle;
* the dominant time constant :math:`\tau = -T_s / \ln|p|` of the pole of
  largest modulus, and its natural frequency and damping ratio when that
  pole is complex;
* the dead time of input i, read from the model's step response to that
  input by the two-point rule (see :attr:`PhysicalReadout.dead_times_s`).

Values that do not exist for the given theta (the gain of an integrating
process, the time constant of an unstable or sign-alternating mode) are
``nan`` and a sentence in :attr:`PhysicalReadout.notes` says why.

:func:`readout_jacobian` differentiates the feature vector
``[K_1, ..., K_m, tau, offset]`` with respect to theta so that a detector can
carry ``Cov(theta)`` over to the physical features by the delta method.

References
----------
L. Ljung, *System Identification: Theory for the User*, 2nd ed., Prentice
Hall, 1999, section 4.2 (ARX model structure).

K. J. Åström and B. Wittenmark, *Computer-Controlled Systems: Theory and
Design*, 3rd ed., Prentice Hall, 1997, chapter 2 (zero-order-hold sampling,
the pole map z = exp(s Ts), poles and zeros of sampled systems).
"""

from __future__ import annotations

import cmath
import math
from dataclasses import dataclass
from numbers import Real
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.errors import DimensionError

__all__ = [
    "PhysicalReadout",
    "dead_time_matrix",
    "feature_jacobians",
    "features_and_jacobians",
    "feature_matrix",
    "feature_names",
    "feature_vector",
    "read_out",
    "readout_jacobian",
]

#: A(1) counts as zero (a pole at z = 1) when |A(1)| <= this times
#: 1 + sum|a_j|. That is some 1e6 rounding errors of the sum, and still far
#: below any self-regulating process: |A(1)| = 1e-9 would mean a time constant
#: of about 1e9 samples. Common practice, no source.
_A1_RTOL = 1e-9

#: A pole with |Im z| <= this times max(1, |z|) is treated as real. numpy.roots
#: resolves a double pole only to about sqrt(eps) ~ 1.5e-8 (a triple one to
#: eps**(1/3) ~ 6e-6), so a merged real pair can come back with a spurious
#: imaginary part; 1e-5 rad per sample is an oscillation period of 6e5
#: samples, nothing a technician could see. Common practice, no source.
_IMAG_RTOL = 1e-5

#: Poles whose moduli agree to this relative tolerance tie for "dominant".
_TIE_RTOL = 1e-9

#: Fractions of the final value at which Smith's two-point method reads a
#: step response: a first-order lag with dead time L and time constant T
#: reaches 1 - e^(-1/3) at L + T/3 and 1 - e^(-1) at L + T, so
#: T = 1.5 (t2 - t1) and L = t2 - T (C. L. Smith, Digital Computer Process
#: Control, Intext, 1972; from memory, as given in process-control texts).
_EARLY = 1.0 - math.exp(-1.0 / 3.0)
_LATE = 1.0 - math.exp(-1.0)

#: A step response is followed for its longest B lag, plus this many
#: dominant time constants, plus _HORIZON_EXTRA samples; one not past 63 %
#: by then has no dead time. A lag passes 63 % after one time constant;
#: ten leave room for slower shapes. Common practice, no source.
_HORIZON_TAUS = 10.0
_HORIZON_EXTRA = 10

#: ... and for at most this many samples, so that a model whose pole creeps
#: towards 1 cannot hold an evaluation up (ten thousand steps of a handful of
#: array operations). Common practice, no source.
_HORIZON_MAX = 10_000.0

#: Default relative step of the central differences: eps**(1/3) balances
#: truncation error O(h^2) against rounding error O(eps/h)
#: (Nocedal and Wright, Numerical Optimization, 2nd ed., 2006, section 8.1).
_DEFAULT_STEP = float(np.finfo(np.float64).eps) ** (1.0 / 3.0)


@dataclass(frozen=True)
class PhysicalReadout:
    """Physical reading of one ARX parameter vector.

    Undefined values are ``nan``; :attr:`notes` explains each of them.

    Attributes
    ----------
    gains : tuple of float, length n_inputs
        Static gain K_i = B_i(1) / A(1) of each input, in output units per
        input unit; ``nan`` for an integrating process (A(1) = 0). For an
        unstable model the value is still the transfer function at z = 1,
        but no steady state is ever reached (see :attr:`notes`).
    offset : float or None
        Steady-state output with all inputs at zero, c / A(1), in output
        units; ``nan`` for an integrating process; ``None`` when the model
        has no constant term.
    poles : tuple of complex, length na
        Roots of z**na + a_1 z**(na-1) + ... + a_na, sorted by decreasing
        modulus; poles judged real carry an imaginary part of exactly 0.
    dominant_pole : complex or None
        The pole of largest modulus (of a complex pair, the one with
        positive imaginary part); ``None`` when na = 0.
    stable : bool
        True when every pole lies strictly inside the unit circle and A(1)
        is not zero; vacuously True for na = 0.
    integrating : bool
        True when A(1) is zero to rounding, i.e. a pole sits at z = 1.
    time_constant_s : float
        Dominant time constant in seconds: -Ts / ln|p| for the dominant pole
        p when 0 < |p| < 1 and p is not negative real; 0.0 when every pole
        is at z = 0 or na = 0; ``nan`` otherwise.
    natural_frequency_rad_s : float
        omega_n = |s| of the continuous pole s = ln(p) / Ts of a complex
        dominant pole, in rad/s; ``nan`` when the dominant pole is real.
    damped_frequency_rad_s : float
        omega_d = |Im s|, the frequency of the oscillation in rad/s;
        ``nan`` when the dominant pole is real.
    damping_ratio : float
        zeta = -Re(s) / |s| of a complex dominant pole (negative when
        unstable); ``nan`` when the dominant pole is real.
    dead_times_s : tuple of float, length n_inputs
        Apparent dead time of input i in seconds: the model's response to a
        unit step in u_i is followed a sample at a time and read by Smith's
        two-point rule (the times t1, t2 at which it passes 28.3 % and 63.2 %
        of its final value K_i give T = 1.5 (t2 - t1) and L = t2 - T; between
        samples the crossing is interpolated on ln(1 - r), exact for a
        first-order lag), plus one sample period for the hold: a
        zero-order-hold lag with pure delay d * Ts has nk = d + 1 and reads
        exactly nk * Ts. Unlike nk * Ts it depends on theta: when the weight
        of B_i moves to later lags (a longer transport delay inside the
        lags nk_i .. nk_i + nb_i - 1 the model has) the reading grows. Never
        below 0; ``nan`` (with a note) when there is no final value to read
        against (no gain or time constant, a zero gain) or the response
        does not pass 63.2 % within ten time constants (at most 10,000
        samples).
    sample_period_s : float
        The sample period Ts the reading was made with.
    notes : tuple of str
        One plain sentence for every undefined or qualified value.
    """

    gains: tuple[float, ...]
    offset: float | None
    poles: tuple[complex, ...]
    dominant_pole: complex | None
    stable: bool
    integrating: bool
    time_constant_s: float
    natural_frequency_rad_s: float
    damped_frequency_rad_s: float
    damping_ratio: float
    dead_times_s: tuple[float, ...]
    sample_period_s: float
    notes: tuple[str, ...]


def read_out(order: ArxOrder, theta: ArrayLike, sample_period_s: float) -> PhysicalReadout:
    """Turn an ARX parameter vector into gains, poles, time constant and dead times.

    Poles come from :func:`numpy.roots`, which forms the companion matrix of
    the monic polynomial z**na + a_1 z**(na-1) + ... + a_na and returns its
    eigenvalues. That is backward stable (the poles found are the exact poles
    of coefficients perturbed by a few units of rounding, Edelman and
    Murakami 1995), it is what an explicit companion-matrix eigenvalue call
    would do, and it returns exact zeros for trailing zero coefficients.
    Repeated poles are ill-conditioned and may come back as a pair with a
    tiny imaginary part; imaginary parts below 1e-5 of the modulus are
    therefore set to zero.

    The dominant pole p is the one of largest modulus; it governs the
    slowest mode of the response.

    * Real, 0 < p < 1: zero-order-hold sampling maps a continuous pole
      s = -1/tau to p = exp(-Ts/tau) (Åström and Wittenmark 1997), so
      tau = -Ts / ln p.
    * Complex pair: tau = -Ts / ln|p| is the time constant of the decay
      envelope |p|**k = exp(-t/tau), and the continuous pole s = ln(p)/Ts
      gives omega_n = |s|, omega_d = |Im s| and zeta = -Re(s)/|s|. The
      envelope is chosen over "undefined" because it is the same formula as
      for a real pole: when two real poles merge into a double pole and
      split into a complex pair, tau stays continuous, so a drift detector
      tracking tau does not lose the feature exactly when a loop starts to
      ring. A note says the response oscillates.
    * Real and negative: ln p = ln|p| + i*pi, a mode that flips sign every
      sample (the Nyquist frequency). Zero-order-hold sampling of a real
      continuous pole never gives it, so it has no time constant; ``nan``
      and a note. It usually means an over-fitted or aliased model.
    * |p| >= 1 (unstable or integrating): ``nan`` and a note.
    * p = 0 (or na = 0): the response settles in finitely many samples;
      tau = 0.0, the limit of -Ts/ln p as p -> 0+.

    Parameters
    ----------
    order : ArxOrder
        Model structure; fixes the layout of theta.
    theta : array_like, shape (n_params,)
        ``[a_1..a_na, b_1_1..b_1_nb1, ..., c]`` as in
        :attr:`ArxOrder.param_names`; all entries finite.
    sample_period_s : float
        Sample period Ts of the model in seconds, finite and > 0.

    Returns
    -------
    PhysicalReadout
        The reading; undefined values are ``nan`` and explained in
        ``notes``.

    Raises
    ------
    TypeError
        If ``order`` is not an :class:`ArxOrder` or ``sample_period_s`` is
        not a real number.
    DimensionError
        If theta is not 1-D or its length differs from ``order.n_params``.
    ValueError
        If theta holds a non-finite value, or ``sample_period_s`` is not
        finite and positive.

    References
    ----------
    K. J. Åström and B. Wittenmark, *Computer-Controlled Systems*, 3rd ed.,
    Prentice Hall, 1997, chapter 2 (zero-order-hold sampling of a first-order
    system, pole map z = exp(s Ts)).

    L. Ljung, *System Identification: Theory for the User*, 2nd ed.,
    Prentice Hall, 1999, section 4.2.

    A. Edelman and H. Murakami, "Polynomial roots from companion matrix
    eigenvalues", *Mathematics of Computation* 64 (1995), 763-776.

    Examples
    --------
    A first-order lag with gain 2 and time constant 300 s sampled every 30 s:

    >>> import math
    >>> order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    >>> a = math.exp(-30.0 / 300.0)
    >>> r = read_out(order, [-a, 2.0 * (1.0 - a)], sample_period_s=30.0)
    >>> round(r.gains[0], 9), round(r.time_constant_s, 6), round(r.dead_times_s[0], 6), r.stable
    (2.0, 300.0, 30.0, True)

    An integrator has no static gain:

    >>> r = read_out(ArxOrder(na=1, nb=(1,), nk=(1,)), [-1.0, 0.5, 0.0], 60.0)
    >>> r.gains, r.offset, r.integrating
    ((nan,), nan, True)
    >>> r.notes[0]
    'pole at z=1.000: integrating process, static gain and offset undefined'
    """
    if not isinstance(order, ArxOrder):
        raise TypeError(f"order must be an ArxOrder, got {type(order).__name__}")
    theta_arr = _check_theta(order, theta)
    ts = _check_sample_period(sample_period_s)
    return _read_out_unchecked(order, theta_arr, ts)


def feature_names(order: ArxOrder) -> tuple[str, ...]:
    """Names of the entries of :func:`feature_vector`, in order.

    Parameters
    ----------
    order : ArxOrder
        Model structure.

    Returns
    -------
    tuple of str, length n_inputs + 1 + int(order.constant)
        ``gain_1 .. gain_m``, ``time_constant_s`` and, when the model has a
        constant term, ``offset``. Dead times are not features of the Wald
        test, whose chi-square rests on the delta method: read from the
        crossing times of a step response, they are only piecewise smooth
        in theta. The physical bands watch them.

    Examples
    --------
    >>> feature_names(ArxOrder(na=2, nb=(1, 2), nk=(1, 3)))
    ('gain_1', 'gain_2', 'time_constant_s', 'offset')
    """
    names = [f"gain_{i + 1}" for i in range(order.n_inputs)]
    names.append("time_constant_s")
    if order.constant:
        names.append("offset")
    return tuple(names)


def feature_vector(readout: PhysicalReadout) -> NDArray[np.float64]:
    """Stack the theta-dependent physical features of a reading.

    Parameters
    ----------
    readout : PhysicalReadout
        A reading from :func:`read_out`.

    Returns
    -------
    ndarray, shape (n_inputs + 1 + int(has offset),)
        ``[K_1, ..., K_m, tau_s, offset]`` (offset only when the model has a
        constant term), named by :func:`feature_names`; undefined entries
        are ``nan``.

    Examples
    --------
    >>> r = read_out(ArxOrder(na=1, nb=(1,), nk=(1,)), [-0.5, 1.0, 0.25], 10.0)
    >>> feature_vector(r).round(6).tolist()
    [2.0, 14.42695, 0.5]
    """
    values = list(readout.gains)
    values.append(readout.time_constant_s)
    if readout.offset is not None:
        values.append(readout.offset)
    return np.asarray(values, dtype=np.float64)


def readout_jacobian(
    order: ArxOrder,
    theta: ArrayLike,
    sample_period_s: float,
    *,
    relative_step: float = _DEFAULT_STEP,
) -> NDArray[np.float64]:
    """Numerical Jacobian of the physical features with respect to theta.

    Column j is the central difference
    ``(f(theta + h_j e_j) - f(theta - h_j e_j)) / (2 h_j)`` with
    ``h_j = relative_step * max(|theta_j|, 1)``, where f is
    :func:`feature_vector` of :func:`read_out`. The gains and the offset
    are rational in theta, tau depends on it through a polynomial root, so
    one scheme serves all features. The delta method then gives
    ``Cov(f) ~= J @ Cov(theta) @ J.T``.

    Entries are ``nan`` where a feature is undefined at theta or within one
    step of it (for example a pole within h of the unit circle). Where the
    dominant pole changes identity (two poles of equal modulus) tau is not
    differentiable and the difference quotient is only a one-sided mixture.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    theta : array_like, shape (n_params,)
        Parameter vector, laid out as :attr:`ArxOrder.param_names`.
    sample_period_s : float
        Sample period Ts in seconds, finite and > 0.
    relative_step : float, optional
        Relative finite-difference step, finite and > 0; default
        eps**(1/3) ~ 6.1e-6.

    Returns
    -------
    J : ndarray, shape (n_features, n_params)
        ``J[r, j] = d feature_r / d theta_j`` with rows named by
        :func:`feature_names` and columns by :attr:`ArxOrder.param_names`;
        n_features = n_inputs + 1 + int(order.constant).

    Raises
    ------
    TypeError
        If ``order`` is not an :class:`ArxOrder` or ``sample_period_s`` is
        not a real number.
    DimensionError
        If theta is not 1-D or its length differs from ``order.n_params``.
    ValueError
        If theta holds a non-finite value, or ``sample_period_s`` or
        ``relative_step`` is not finite and positive.

    References
    ----------
    J. Nocedal and S. J. Wright, *Numerical Optimization*, 2nd ed.,
    Springer, 2006, section 8.1 (central differences and step choice).

    G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed., Duxbury,
    2002, section 5.5.4 (the delta method).

    Examples
    --------
    For y(k) = 0.5 y(k-1) + u(k-1), K = b / (1 + a_1) so dK/da_1 = -4 and
    dK/db = 2:

    >>> order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    >>> J = readout_jacobian(order, [-0.5, 1.0], 10.0)
    >>> J.shape
    (2, 2)
    >>> J[0].round(6).tolist()
    [-4.0, 2.0]
    """
    if not isinstance(order, ArxOrder):
        raise TypeError(f"order must be an ArxOrder, got {type(order).__name__}")
    theta_arr = _check_theta(order, theta)
    jac: NDArray[np.float64] = feature_jacobians(
        order, theta_arr[None, :], sample_period_s, relative_step=relative_step
    )[0]
    return jac


def feature_matrix(
    order: ArxOrder, thetas: ArrayLike, sample_period_s: float
) -> NDArray[np.float64]:
    """Physical features of many parameter vectors at once: the numbers of :func:`read_out`.

    Row r is ``feature_vector(read_out(order, thetas[r], sample_period_s))``:
    gains, time constant and offset by the rules :func:`read_out` states.
    :func:`read_out` takes its numbers from here, so one parameter vector
    gives the same bits whether it is read alone or among thousands; the
    drift monitor of a whole fleet relies on that. For na <= 2 the poles come
    from the closed-form quadratic (Press et al., *Numerical Recipes*, 3rd
    ed., 2007, section 5.6), vectorised; larger na fall back to
    :func:`numpy.roots` row by row.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    thetas : array_like, shape (k, n_params)
        Parameter vectors, finite.
    sample_period_s : float
        Sample period Ts in seconds, finite and > 0.

    Returns
    -------
    ndarray, shape (k, n_inputs + 1 + int(order.constant))
        Columns named by :func:`feature_names`; undefined entries ``nan``.

    Raises
    ------
    DimensionError
        If ``thetas`` is not (k, n_params).
    ValueError
        If a value is not finite or the sample period is not positive.

    Examples
    --------
    >>> order = ArxOrder(na=1, nb=(1,), nk=(1,))
    >>> feature_matrix(order, [[-0.5, 1.0, 0.25], [-1.0, 0.5, 0.0]], 10.0).round(6).tolist()
    [[2.0, 14.42695, 0.5], [nan, nan, nan]]
    """
    arr = np.array(thetas, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != order.n_params:
        raise DimensionError(
            f"thetas must have shape (k, n_params={order.n_params}), got {arr.shape}"
        )
    if not np.isfinite(arr).all():
        raise ValueError("thetas must be finite")
    return np.ascontiguousarray(_features(order, arr, _check_sample_period(sample_period_s)))


def dead_time_matrix(
    order: ArxOrder,
    thetas: NDArray[np.float64],
    sample_period_s: float,
    features: NDArray[np.float64] | None = None,
) -> NDArray[np.float64]:
    """Dead times of many parameter vectors at once: the numbers of :func:`read_out`.

    Row r is ``read_out(order, thetas[r], sample_period_s).dead_times_s``,
    bit for bit (every operation is element-wise over the rows).

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    thetas : ndarray, shape (k, n_params)
        Parameter vectors, finite (not checked here: the caller's).
    sample_period_s : float
        Sample period Ts in seconds, finite and > 0.
    features : ndarray, shape (k, n_features), optional
        ``feature_matrix(order, thetas, sample_period_s)`` when the caller
        has it already; computed when omitted.

    Returns
    -------
    ndarray, shape (k, n_inputs)
        Seconds; ``nan`` where :func:`read_out` says the dead time is
        undefined.

    Examples
    --------
    >>> order = ArxOrder(na=1, nb=(2,), nk=(1,), constant=False)
    >>> dead_time_matrix(order, np.array([[-0.9, 0.1, 0.0], [-0.9, 0.0, 0.1]]), 60.0).round(1)
    array([[ 60.],
           [120.]])
    """
    ts = _check_sample_period(sample_period_s)
    if features is None:
        features = _features(order, thetas, ts)
    return _dead_times(order, thetas, features, ts)


def _sequential_sum(columns: NDArray[np.float64]) -> NDArray[np.float64]:
    """Row sums added left to right (a fixed order, so every caller gets the same bits)."""
    total = np.zeros(columns.shape[0])
    for j in range(columns.shape[1]):
        total = total + columns[:, j]
    return total


def _features(order: ArxOrder, th: NDArray[np.float64], ts: float) -> NDArray[np.float64]:
    constant = th[:, -1] if order.constant else None
    return _features_from(order, th[:, : order.na], _input_sums(order, th), constant, ts)


def _input_sums(order: ArxOrder, th: NDArray[np.float64]) -> list[NDArray[np.float64]]:
    """B_i(1) of every input for each row of theta, summed left to right."""
    return [_sequential_sum(th[:, order.input_slice(i)]) for i in range(order.n_inputs)]


def _features_from(
    order: ArxOrder,
    a: NDArray[np.float64],
    sums: list[NDArray[np.float64]],
    constant: NDArray[np.float64] | None,
    ts: float,
) -> NDArray[np.float64]:
    """Features from the A coefficients (k, na), the B_i(1) sums and the constant c.

    Split from :func:`_features` so the Jacobian can move the A coefficients
    alone and reuse the sums, with the same operations (the same bits).
    """
    k = a.shape[0]
    a_at_one = 1.0 + _sequential_sum(a)
    scale = 1.0 + _sequential_sum(np.abs(a))
    integrating = np.abs(a_at_one) <= _A1_RTOL * scale
    columns = []
    with np.errstate(divide="ignore", invalid="ignore"):
        for total in sums:
            columns.append(np.where(integrating, np.nan, total / a_at_one))
        columns.append(_time_constants(a, integrating, ts))
        if constant is not None:
            columns.append(np.where(integrating, np.nan, constant / a_at_one))
    # feature-major in memory: the rows are the long, contiguous axis
    return np.stack(columns).T if k else np.zeros((0, len(columns)))


def _time_constants(
    a: NDArray[np.float64], integrating: NDArray[np.bool_], ts: float
) -> NDArray[np.float64]:
    """Dominant time constant of each row of A coefficients (the rules of read_out)."""
    k, na = a.shape
    if na == 0:
        return np.zeros(k)
    if na == 1:
        real = -a[:, 0]
        modulus = np.abs(real)
        negative = real < 0.0
    elif na == 2:
        b, c = a[:, 0], a[:, 1]
        disc = b * b - 4.0 * c
        root = np.sqrt(np.abs(disc))
        # two real roots q and c/q (stable form), or a double zero
        q = -0.5 * (b + np.copysign(root, b))
        with np.errstate(divide="ignore", invalid="ignore"):
            other = np.where(q != 0.0, c / q, 0.0)
        m1, m2 = np.abs(q), np.abs(other)
        largest = np.maximum(m1, m2)
        tie = np.minimum(m1, m2) >= largest * (1.0 - _TIE_RTOL)
        real = np.where(tie, np.maximum(q, other), np.where(m1 >= m2, q, other))
        modulus = np.abs(real)
        negative = real < 0.0
        pair = np.flatnonzero(disc < 0.0)
        if pair.shape[0]:
            # complex pair: -b/2 +- i sqrt(-disc)/2; "real" if the imaginary
            # part is negligible (only these rows: hypot is slow)
            re_pair = -0.5 * b[pair]
            im_pair = 0.5 * root[pair]
            mod_pair = np.hypot(re_pair, im_pair)
            flat = im_pair <= _IMAG_RTOL * np.maximum(1.0, mod_pair)
            modulus[pair] = np.where(flat, np.abs(re_pair), mod_pair)
            negative[pair] = flat & (re_pair < 0.0)
    else:
        modulus = np.empty(k)
        negative = np.empty(k, dtype=np.bool_)
        for r in range(k):
            dominant = _dominant(_sorted_poles(a[r]))
            modulus[r] = abs(dominant)
            negative[r] = dominant.imag == 0.0 and dominant.real < 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        tau = -ts / np.log(np.where((modulus > 0.0) & (modulus < 1.0), modulus, 0.5))
    undefined = integrating | (modulus >= 1.0) | negative
    return np.where(modulus == 0.0, 0.0, np.where(undefined, np.nan, tau))


def _dead_times(
    order: ArxOrder, th: NDArray[np.float64], features: NDArray[np.float64], ts: float
) -> NDArray[np.float64]:
    """Apparent dead time of each input for each row of theta (the rules of read_out).

    ``features`` are the rows' :func:`_features` (gains and time constant).
    The step response of A(q) y = B_i(q) u is followed a sample at a time
    and read by Smith's two-point method; every operation is element-wise,
    so a row gives the same bits alone or in a batch.
    """
    k, na = th.shape[0], order.na
    a = th[:, :na]
    tau = features[:, order.n_inputs]
    out = np.full((k, order.n_inputs), np.nan)
    with np.errstate(invalid="ignore"):
        spans = np.ceil(tau / ts * _HORIZON_TAUS)
    for i in range(order.n_inputs):
        nk, nb = order.nk[i], order.nb[i]
        gain = features[:, i]
        usable = np.flatnonzero(np.isfinite(gain) & (gain != 0.0) & np.isfinite(spans))
        if not usable.shape[0]:
            continue
        early, late = _two_point(
            a[usable],
            th[usable, order.input_slice(i)],
            nk,
            gain[usable],
            np.minimum(spans[usable] + (nk + nb - 1 + _HORIZON_EXTRA), _HORIZON_MAX),
        )
        with np.errstate(invalid="ignore"):
            lag = late - 1.5 * (late - early)
            out[usable, i] = np.maximum(lag + 1.0, 0.0) * ts
    return out


def _two_point(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    nk: int,
    gain: NDArray[np.float64],
    horizon: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return when (in samples) each row's unit-step response crosses _EARLY and _LATE.

    Interpolated between samples by :func:`_crossing`, the response before
    the step being 0; ``nan`` for a row that has not crossed _LATE by its
    ``horizon``. Rows that have crossed drop out of the recursion.
    """
    n, na, nb = a.shape[0], a.shape[1], b.shape[1]
    early, late = np.full(n, np.nan), np.full(n, np.nan)
    rows = np.arange(n)  # the rows still followed; the arrays below hold only them
    a_cols = [a[:, j] for j in range(na)]
    b_cols = [b[:, j] for j in range(nb)]
    g, h, t_early = gain, horizon, early.copy()
    drive, before = np.zeros(n), np.zeros(n)
    past = [np.zeros(n) for _ in range(na)]  # y(s-1), y(s-2), ...
    s, last, first_end = 0, float(horizon.max()), float(horizon.min())
    early_pending = True  # some row has not passed _EARLY yet
    while s <= last:
        if nk <= s < nk + nb:
            drive = drive + b_cols[s - nk]
        y = drive
        for j in range(na):
            y = y - a_cols[j] * past[j]
        r = y / g
        if early_pending:
            waiting = np.isnan(t_early) & (r >= _EARLY)
            if waiting.any():
                t_early[waiting] = (s - 1) + _crossing(_EARLY, before[waiting], r[waiting])
                early_pending = bool(np.isnan(t_early).any())
        done = r >= _LATE
        ended = bool(done.any())
        if ended:
            t = (s - 1) + _crossing(_LATE, before[done], r[done])
            late[rows[done]] = t
            early[rows[done]] = t_early[done]
        past = [y, *past[:-1]]
        before = r
        s += 1
        if ended or s > first_end:
            going = ~done & (s <= h)
            if not going.any():
                break
            rows = rows[going]
            g, h, t_early, drive, before = (v[going] for v in (g, h, t_early, drive, before))
            a_cols = [c[going] for c in a_cols]
            b_cols = [c[going] for c in b_cols]
            past = [p[going] for p in past]
            first_end = float(h.min())
            early_pending = bool(np.isnan(t_early).any())
    return early, late


def _crossing(
    frac: float, before: NDArray[np.float64], after: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Return where between two samples (0..1) the response crosses ``frac``.

    The response goes from ``before`` at one sample to ``after`` at the next.

    Interpolated on ln(1 - r), which a first-order lag's response makes a
    straight line in time, so a lag with whole-sample delay reads exactly;
    linearly where the response has passed 1 (overshoot).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        start = np.log1p(-before)
        logged = (math.log1p(-frac) - start) / (np.log1p(-after) - start)
    linear = (frac - before) / (after - before)
    return np.where(after <= 1.0, logged, linear)


def feature_jacobians(
    order: ArxOrder,
    thetas: ArrayLike,
    sample_period_s: float,
    *,
    relative_step: float = _DEFAULT_STEP,
) -> NDArray[np.float64]:
    """:func:`readout_jacobian` of many parameter vectors at once.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    thetas : array_like, shape (k, n_params)
        Parameter vectors, finite.
    sample_period_s : float
        Sample period Ts in seconds, finite and > 0.
    relative_step : float, optional
        Relative finite-difference step (see :func:`readout_jacobian`).

    Returns
    -------
    ndarray, shape (k, n_features, n_params)
        ``readout_jacobian(order, thetas[r], ...)`` for each row r.

    Raises
    ------
    DimensionError
        If ``thetas`` is not (k, n_params).
    ValueError
        If a value or the step is not finite, or the sample period is not positive.
    """
    jac = features_and_jacobians(order, thetas, sample_period_s, relative_step=relative_step)[1]
    return np.ascontiguousarray(jac)


def features_and_jacobians(
    order: ArxOrder,
    thetas: ArrayLike,
    sample_period_s: float,
    *,
    relative_step: float = _DEFAULT_STEP,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """:func:`feature_matrix` and :func:`feature_jacobians` of the same rows, in one pass.

    The differences need the features at theta anyway (an undefined feature
    has no derivative); a caller that wants both, like the delta method of
    a drift test, gets them without reading theta out twice. Parameters,
    errors and values are those of the two functions.

    Returns
    -------
    features : ndarray, shape (k, n_features)
        ``feature_matrix(order, thetas, sample_period_s)``.
    jacobians : ndarray, shape (k, n_features, n_params)
        ``feature_jacobians(order, thetas, sample_period_s, ...)``.
    """
    arr = np.array(thetas, dtype=np.float64)
    if arr.ndim != 2 or arr.shape[1] != order.n_params:
        raise DimensionError(
            f"thetas must have shape (k, n_params={order.n_params}), got {arr.shape}"
        )
    if not np.isfinite(arr).all():
        raise ValueError("thetas must be finite")
    ts = _check_sample_period(sample_period_s)
    if (
        isinstance(relative_step, bool)
        or not isinstance(relative_step, Real)
        or not math.isfinite(float(relative_step))
        or float(relative_step) <= 0.0
    ):
        raise ValueError(f"relative_step must be a finite number > 0, got {relative_step!r}")
    return _jacobians(order, arr, ts, float(relative_step))


def _jacobians(
    order: ArxOrder, th: NDArray[np.float64], ts: float, rel: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Features at theta and their central differences (k, n_features, n_params).

    Only the entries a step can move are differenced: a_j moves every
    feature, a coefficient of B_i only the gain of input i, c only the
    offset. Every other entry is ``(f - f) / width``, which is 0, or nan
    where f is not finite, as differencing the whole read-out gives; the
    moved entries come from the same operations as :func:`_features` on the
    stepped theta, so the result is the full difference bit for bit.
    """
    k, n = th.shape
    na = order.na
    h = rel * np.maximum(np.abs(th), 1.0)
    plus = th + h
    minus = th - h
    width = plus - minus  # the step actually taken
    sums = _input_sums(order, th)
    constant = th[:, -1] if order.constant else None
    # one read-out of every row: block 0 is theta, block 1 + j has a_j
    # stepped up, block 1 + na + j stepped down
    blocks = 2 * na + 1
    a = np.tile(th[:, :na], (blocks, 1))
    for j in range(na):
        a[(1 + j) * k : (2 + j) * k, j] = plus[:, j]
        a[(1 + na + j) * k : (2 + na + j) * k, j] = minus[:, j]
    values = _features_from(
        order,
        a,
        [np.tile(total, blocks) for total in sums],
        None if constant is None else np.tile(constant, blocks),
        ts,
    )
    at_theta = values[:k]
    # parameter- and feature-major in memory, rows innermost: whole-row
    # operations then run over long contiguous stretches
    jac = np.zeros((at_theta.shape[1], n, k)).transpose(2, 0, 1)
    undefined = ~np.isfinite(at_theta)
    if undefined.any():
        jac[undefined] = np.nan  # (f - f) / width where f is not finite
    if na:
        f_up, f_down = values.T[:, k:].reshape(-1, 2, na, k).transpose(1, 0, 2, 3)
        jac[:, :, :na] = ((f_up - f_down) / width[:, :na].T).transpose(2, 0, 1)
    a_at_one = 1.0 + _sequential_sum(th[:, :na])
    with np.errstate(divide="ignore", invalid="ignore"):
        for i in range(order.n_inputs):
            cols = range(order.input_slice(i).start, order.input_slice(i).stop)
            for j in cols:
                # B_i(1) with b_j stepped, summed in _sequential_sum's order
                up = down = np.zeros(k)
                for p in cols:
                    up = up + (plus[:, p] if p == j else th[:, p])
                    down = down + (minus[:, p] if p == j else th[:, p])
                jac[:, i, j] = (up / a_at_one - down / a_at_one) / width[:, j]
        if order.constant:
            jac[:, -1, -1] = (plus[:, -1] / a_at_one - minus[:, -1] / a_at_one) / width[:, -1]
    if undefined.any():
        # a feature undefined at theta has no derivative there, even when both
        # neighbours are finite (the gain of an integrator jumps from -inf to +inf)
        jac[np.isnan(at_theta)] = np.nan
    return at_theta, jac


def _check_theta(order: ArxOrder, theta: ArrayLike) -> NDArray[np.float64]:
    arr = np.array(theta, dtype=np.float64)  # a copy: the caller's array is left alone
    if arr.ndim != 1:
        raise DimensionError(
            f"theta must be 1-D with shape (n_params={order.n_params},), got shape {arr.shape}"
        )
    if arr.shape[0] != order.n_params:
        raise DimensionError(
            f"theta has {arr.shape[0]} entries but order.n_params is {order.n_params} "
            f"({', '.join(order.param_names)})"
        )
    bad = ~np.isfinite(arr)
    if bad.any():
        names = order.param_names
        found = ", ".join(f"{names[j]}={arr[j]!r}" for j in np.flatnonzero(bad))
        raise ValueError(f"theta must be finite, got {found}")
    return arr


def _check_sample_period(sample_period_s: float) -> float:
    if isinstance(sample_period_s, bool) or not isinstance(sample_period_s, Real):
        raise TypeError(
            f"sample_period_s must be a real number of seconds, got {sample_period_s!r}"
        )
    ts = float(sample_period_s)
    if not math.isfinite(ts) or ts <= 0.0:
        raise ValueError(f"sample_period_s must be finite and > 0 seconds, got {sample_period_s!r}")
    return ts


def _format_pole(p: complex) -> str:
    if p.imag == 0.0:
        return f"{p.real:.3f}"
    return f"{p.real:.3f}{p.imag:+.3f}j"


def _sorted_poles(a: NDArray[np.float64]) -> list[complex]:
    if a.shape[0] == 0:
        return []
    raw: list[complex] | NDArray[Any]
    if a.shape[0] == 1:
        raw = [complex(-a[0])]
    elif a.shape[0] == 2:
        # Closed form for the common second-order case: it runs every time
        # the monitor reads the live model, and np.roots costs ~100 us.
        # Stable form of the quadratic formula (Press et al., Numerical
        # Recipes, 3rd ed., 2007, section 5.6).
        b, c = float(a[0]), float(a[1])
        disc = b * b - 4.0 * c
        if disc < 0.0:  # an exact conjugate pair
            im = 0.5 * math.sqrt(-disc)
            raw = [complex(-0.5 * b, im), complex(-0.5 * b, -im)]
        else:
            q = -0.5 * (b + math.copysign(math.sqrt(disc), b))
            raw = [complex(q), complex(c / q)] if q != 0.0 else [0j, 0j]
    else:
        raw = np.roots(np.concatenate(([1.0], a)))
    poles: list[complex] = []
    for z in raw:
        p = complex(z)
        if abs(p.imag) <= _IMAG_RTOL * max(1.0, abs(p)):
            p = complex(p.real, 0.0)
        poles.append(p)
    poles.sort(key=lambda p: (-abs(p), -p.real, -p.imag))
    return poles


def _dominant(poles: list[complex]) -> complex:
    largest = abs(poles[0])
    ties = [p for p in poles if abs(p) >= largest * (1.0 - _TIE_RTOL)]
    # Prefer the slowest-looking mode among equal moduli: the largest real
    # part, then the member of a conjugate pair with positive imaginary part.
    return max(ties, key=lambda p: (p.real, p.imag))


def _read_out_unchecked(order: ArxOrder, theta: NDArray[np.float64], ts: float) -> PhysicalReadout:
    notes: list[str] = []
    a = theta[: order.na]
    a_at_one = 1.0 + float(np.sum(a))
    scale = 1.0 + float(np.sum(np.abs(a)))
    integrating = abs(a_at_one) <= _A1_RTOL * scale

    poles = _sorted_poles(a)
    if integrating:
        near_one = min(poles, key=lambda p: abs(p - 1.0))
        undefined = "static gain and offset" if order.constant else "static gain"
        notes.append(
            f"pole at z={_format_pole(near_one)}: integrating process, {undefined} undefined"
        )
        outside = [p for p in poles if abs(p) >= 1.0]
        if outside:
            outside.remove(min(outside, key=lambda p: abs(p - 1.0)))
    else:
        outside = [p for p in poles if abs(p) >= 1.0]
    if outside:
        listed = ", ".join(f"z={_format_pole(p)} (|z|={abs(p):.3f})" for p in outside)
        qualifier = (
            ""
            if integrating
            else "; static gains are the transfer function at z=1, not a reachable steady state"
        )
        notes.append(f"unstable: pole(s) {listed} on or outside the unit circle{qualifier}")
    stable = not integrating and all(abs(p) < 1.0 for p in poles)

    nan = float("nan")
    # The numbers come from the vectorised read-out, so that a vector read
    # alone and one read among thousands give the same bits.
    features = _features(order, theta[None, :], ts)
    numbers = features[0].tolist()
    dead_times = _dead_times(order, theta[None, :], features, ts)[0].tolist()
    gains = tuple(numbers[: order.n_inputs])
    offset: float | None = numbers[-1] if order.constant else None

    dominant: complex | None = None
    tau = numbers[order.n_inputs]
    omega_n = nan
    omega_d = nan
    zeta = nan
    if not poles:
        notes.append("no poles (na=0): the response settles in finitely many samples, tau 0 s")
    else:
        dominant = _dominant(poles)
        modulus = abs(dominant)
        label = _format_pole(dominant)
        if modulus == 0.0:
            notes.append("all poles at z=0: the response settles in finitely many samples, tau 0 s")
        elif modulus >= 1.0 or integrating:
            notes.append(
                f"dominant pole z={label} is not inside the unit circle: time constant undefined"
            )
        elif dominant.imag == 0.0 and dominant.real < 0.0:
            notes.append(
                f"dominant pole z={label} is real and negative: the output alternates sign "
                "every sample, which no sampled continuous-time lag does; time constant undefined"
            )
        if dominant.imag != 0.0 and modulus > 0.0:
            s = cmath.log(dominant) / ts
            omega_n = abs(s)
            omega_d = abs(s.imag)
            zeta = -s.real / omega_n
            if modulus < 1.0:
                notes.append(
                    f"dominant poles z={dominant.real:.3f}±{abs(dominant.imag):.3f}j are complex: "
                    f"the response oscillates (period {2.0 * math.pi / omega_d:.4g} s, damping "
                    f"ratio {zeta:.3f}); time constant is that of the decay envelope, -Ts/ln|z|"
                )

    for i, dead in enumerate(dead_times):
        if math.isnan(dead):
            notes.append(
                f"dead time of input {i + 1} undefined: its step response has no final value "
                "to read it against (no static gain or time constant, or a zero gain), or "
                "does not pass 63 % of it within ten time constants (10,000 samples at most)"
            )

    return PhysicalReadout(
        gains=gains,
        offset=offset,
        poles=tuple(poles),
        dominant_pole=dominant,
        stable=stable,
        integrating=integrating,
        time_constant_s=tau,
        natural_frequency_rad_s=omega_n,
        damped_frequency_rad_s=omega_d,
        damping_ratio=zeta,
        dead_times_s=tuple(dead_times),
        sample_period_s=ts,
        notes=tuple(notes),
    )
