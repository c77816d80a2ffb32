r"""Commissioning baselines: the fault-free models the drift monitor compares against.

A baseline is an ARX model of one asset in one operating mode, fitted by
:func:`fit_baseline` on a gap-free window recorded while the equipment was
known to work, or on several gap-free stretches of it (``gaps="split"``).
It holds the parameter estimate :math:`\theta_0`, its covariance
:math:`\mathrm{Cov}(\theta_0)`, the innovation variance :math:`\sigma^2`,
the fit on held-back data and the physical reading (gains, time constant,
dead times, offset). :meth:`Baseline.residual` scores each
new sample against it. An :class:`AcceptanceRule` decides whether a fit is
good enough to monitor against; a refusal says why in sentences a technician
can act on. :class:`LiveBaselineLearner` collects stretches per mode while the
service runs and freezes the baseline once they cover its span, and
:class:`BaselineSet` holds the frozen baselines of one asset.

Plain-data format
-----------------
:meth:`Baseline.to_dict` writes only JSON types, and :meth:`Baseline.from_dict`
reads them back. Floats are written as Python floats, which :mod:`json`
prints in the shortest form that reads back to the same double, so a
baseline moved between replicas is bit for bit the same. A number that is
undefined in memory (``nan``, only ever in the read-out) is written as
``null``. Version 2 of ``"arxwatch.baseline"`` has exactly these keys
(n = ``order.n_params``, m = ``order.n_inputs``); version 1 is the same
without ``n_stretches`` (one stretch). A baseline of one stretch is written
as version 1, so releases that read only version 1 still read it; one of
several stretches as version 2, which those releases refuse by its version
rather than misread:

=========================  ===================  ==============================
key                        JSON type            meaning (unit)
=========================  ===================  ==============================
``format``                 string               ``"arxwatch.baseline"``
``version``                integer              ``1``
``mode``                   string or null       operating mode; null: the
                                                asset has no mode signal
``order``                  object               ``na`` (integer), ``nb``,
                                                ``nk`` (lists of m integers,
                                                ``nk`` in samples),
                                                ``constant`` (boolean)
``sample_period_s``        number               sample period Ts (s), > 0
``method``                 string               ``"ols"``, ``"ridge"``,
                                                ``"lasso"`` or ``"lad"``
``alpha``                  number               penalty weight of ridge and
                                                lasso, >= 0; 0 for ols, lad
``theta``                  list of n numbers    :math:`\theta_0`, laid out as
                                                :attr:`ArxOrder.param_names`
                                                (a: none; b: output unit per
                                                input unit; c: output unit)
``covariance``             n lists of n         :math:`\mathrm{Cov}(\theta_0)`
                           numbers              (units of theta squared)
``sigma2``                 number               innovation variance (output
                                                unit squared), > 0
``fit_percent``            number               one-step fit on held-back
                                                data (%), <= 100
``window_start_s``         number               epoch time of the first
                                                sample used (s)
``window_end_s``           number               epoch time of the last sample
                                                used (s)
``n_samples``              integer              samples used, of all
                                                stretches (estimation and
                                                held back)
``n_stretches``            integer              gap-free stretches used,
                                                >= 1 (version 2 only)
``criterion``              string or null       ``"aic"``, ``"bic"`` or
                                                ``"fpe"``; null when the
                                                order was given
``candidates``             list of objects      the ranked order search, best
                                                first (empty when the order
                                                was given); each has ``order``
                                                (as above), ``aic``, ``bic``,
                                                ``fpe``, ``rss`` (numbers),
                                                ``n_params`` (integer),
                                                ``fit_percent_validation``
                                                (number (%) or null)
``readout``                object               the physical reading, below
=========================  ===================  ==============================

``readout`` has the fields of :class:`~arxwatch.estimators.readout.PhysicalReadout`
except ``sample_period_s`` (it is the top-level one): ``gains`` (m numbers or
nulls; output unit per input unit), ``offset`` (number or null; output unit;
null means "undefined" when ``order.constant`` is true and "no constant term"
otherwise), ``poles`` (na pairs ``[real, imag]``), ``dominant_pole`` (a pair
or null), ``stable`` and ``integrating`` (booleans), ``time_constant_s`` (s),
``natural_frequency_rad_s`` and ``damped_frequency_rad_s`` (rad/s),
``damping_ratio`` (numbers or null), ``dead_times_s`` (m numbers or nulls,
s; files written before dead times were read from the step response hold
``nk * Ts``, and the monitor reads its band's baseline from ``theta``) and
``notes`` (list of strings). The stored reading is read back as it was
written, not recomputed, so every replica reports the same numbers.

A :class:`BaselineSet` is ``{"format": "arxwatch.baseline-set", "version":
1, "baselines": [...]}``. Decoding errors are :class:`CodecError` and name
the key path, for example ``baseline.theta: expected 4 numbers, got 3``.
Unknown keys are refused: a newer writer must bump the version.

References
----------
L. Ljung, *System Identification: Theory for the User*, 2nd ed., Prentice
Hall, 1999, sections 4.2 and 7.3 (ARX models and least squares), chapter 9
(asymptotic covariance of the estimate) and chapter 16 (order selection and
validation on fresh data).

H. Akaike, "A new look at the statistical model identification", *IEEE
Transactions on Automatic Control* 19(6), 1974, pp. 716-723 (AIC).

G. Schwarz, "Estimating the dimension of a model", *Annals of Statistics*
6(2), 1978, pp. 461-464 (BIC).
"""

from __future__ import annotations

import math
from array import array
from collections.abc import Sequence
from dataclasses import dataclass, field
from numbers import Real
from typing import Any, ClassVar, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from arxwatch.estimators.arx import (
    MAX_LAG,
    ArxOrder,
    scored_rows,
    segment_regression_matrix,
)
from arxwatch.estimators.codec import CodecError, encode_order, expect_keys, kind_of
from arxwatch.estimators.errors import DimensionError, OrderError
from arxwatch.estimators.identify import (
    MAX_VALIDATION_FRACTION,
    BatchFit,
    RankDeficientError,
    fit_arx,
    split_breaks,
    split_series,
)
from arxwatch.estimators.order import Criterion, OrderCandidate, select_order
from arxwatch.estimators.readout import (
    PhysicalReadout,
    feature_vector,
    read_out,
    readout_jacobian,
)

__all__ = [
    "DEFAULT_ACCEPTANCE",
    "GAP_FACTOR",
    "AcceptanceRule",
    "AddOutcome",
    "Baseline",
    "BaselineResult",
    "BaselineSet",
    "GridError",
    "LearnerConfig",
    "LiveBaselineLearner",
    "SearchRanges",
    "fit_baseline",
]

#: Two samples further apart than this many sample periods leave a gap.
#: One and a half periods tolerates the jitter of a publish-on-change or
#: polled point without letting a missed sample pass. Common practice, no
#: source.
GAP_FACTOR = 1.5

#: A residual standard deviation below this fraction of the largest output
#: means the model reproduces the output to rounding: no sensor is that
#: quiet (a 0.01 step over a 20 range is 5e-4), so the output is computed or
#: stuck and the innovations would be meaningless. Common practice, no source.
_EXACT_FIT_RTOL = 1e-9

#: Two samples closer than this many periods are not on the grid
#: (a duplicate, out-of-order or extra sample).
_EARLY_FACTOR = 0.5

_METHODS = ("ols", "ridge", "lasso", "lad")
_CRITERIA: tuple[Criterion, ...] = ("aic", "bic", "fpe")

#: What :meth:`LiveBaselineLearner.add` did with a sample.
AddOutcome = Literal["collected", "ignored"]

#: What :func:`fit_baseline` does with a gap in the window: ``"refuse"``
#: raises :class:`GridError`, ``"split"`` fits across the gap-free stretches.
Gaps = Literal["refuse", "split"]
_GAPS: tuple[Gaps, ...] = ("refuse", "split")


def _real(value: object, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, Real):
        raise ValueError(f"{name} must be a real number, got {value!r}")
    return float(value)


def _finite(value: object, name: str) -> float:
    number = _real(value, name)
    if not math.isfinite(number):
        raise ValueError(f"{name}: expected a finite number, got {value!r}")
    return number


def _positive(value: object, name: str) -> float:
    number = _real(value, name)
    if not (math.isfinite(number) and number > 0.0):
        raise ValueError(f"{name}: expected a finite number > 0 (seconds), got {value!r}")
    return number


class GridError(ValueError):
    """The sample times are not one gap-free uniform grid.

    Parameters
    ----------
    message : str
        What is wrong and where.
    index : int
        Index of the sample after the gap or irregular step.
    """

    def __init__(self, message: str, *, index: int) -> None:
        super().__init__(message)
        self.index = index


def _lags(values: object, name: str, minimum: int) -> tuple[int, ...]:
    if isinstance(values, (str, bytes)) or not isinstance(values, Sequence):
        raise OrderError(f"{name} must be a sequence of integers, got {values!r}")
    items = tuple(values)
    if not items:
        raise OrderError(f"{name} is empty; give at least one value")
    for v in items:
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)):
            raise OrderError(f"{name} must hold integers, got {v!r} in {items!r}")
        if not minimum <= v <= MAX_LAG:
            raise OrderError(f"{name} values must be in [{minimum}, {MAX_LAG}], got {v}")
    return tuple(sorted({int(v) for v in items}))


@dataclass(frozen=True)
class SearchRanges:
    """The grid of ARX orders :func:`fit_baseline` searches when no order is given.

    The same ``nb`` and ``nk`` ranges apply to every input. The defaults
    suit HVAC loops sampled every 30 to 60 s (coil discharge temperature
    against valve position, zone temperature against damper or reheat):
    these behave like a lag plus dead time, so ``na`` 1 covers the lag and
    2 a second, faster one (sensor well, coil mass); ``nb`` 2 lets a dead
    time that is not a whole number of samples show as two B coefficients;
    ``nk`` 0 to 6 covers transport delays up to 3 to 6 minutes, and 0 a
    controller that publishes its output after the sensor reading of the
    same sample. That is 28 candidates per input, 784 for two inputs.
    Common practice, no source.

    Parameters
    ----------
    na : tuple of int
        Output orders to try, each in [0, MAX_LAG].
    nb : tuple of int
        Input orders to try, each in [1, MAX_LAG].
    nk : tuple of int
        Input delays (samples) to try, each in [0, MAX_LAG].
    constant : bool
        Whether every candidate estimates an offset.

    Raises
    ------
    OrderError
        If a range is empty or holds a non-integer or a value out of bounds.
    """

    na: tuple[int, ...] = (1, 2)
    nb: tuple[int, ...] = (1, 2)
    nk: tuple[int, ...] = (0, 1, 2, 3, 4, 5, 6)
    constant: bool = True

    def __post_init__(self) -> None:
        object.__setattr__(self, "na", _lags(self.na, "na", 0))
        object.__setattr__(self, "nb", _lags(self.nb, "nb", 1))
        object.__setattr__(self, "nk", _lags(self.nk, "nk", 0))
        if not isinstance(self.constant, bool):
            raise OrderError(f"constant must be a bool, got {self.constant!r}")

    @property
    def depth(self) -> int:
        """Deepest history any candidate needs, in samples."""
        return max(self.na[-1], self.nb[-1] + self.nk[-1] - 1)

    def largest_n_params(self, n_inputs: int) -> int:
        """Parameters of the largest candidate for ``n_inputs`` inputs."""
        return self.na[-1] + n_inputs * self.nb[-1] + int(self.constant)


@dataclass(frozen=True)
class AcceptanceRule:
    """When a fitted baseline is good enough to monitor against.

    The default thresholds are common practice, no source: a one-step fit
    of 70 % on held-back data, ten samples per estimated parameter, and
    gains known to within a quarter of their value (one standard error).

    Parameters
    ----------
    min_fit_percent : float
        Smallest accepted one-step fit on the held-back data, in percent
        (see :func:`arxwatch.estimators.identify.fit_percent`).
    require_stable : bool
        Refuse a model with a pole on or outside the unit circle.
    min_samples_per_param : int
        Smallest number of fitted samples per parameter, >= 1; judged for
        the largest candidate on the order grid, so every candidate is
        ranked on enough data.
    max_relative_se : float
        Largest accepted standard error of each static gain relative to
        the gain, > 0; the standard error comes from Cov(theta0) by the
        delta method. A window in which an input hardly moved gives a gain
        that is mostly noise, and drift in it could not be seen.

    Raises
    ------
    ValueError
        If a threshold is out of range.
    """

    min_fit_percent: float = 70.0
    require_stable: bool = True
    min_samples_per_param: int = 10
    max_relative_se: float = 0.25

    def __post_init__(self) -> None:
        fit = _real(self.min_fit_percent, "min_fit_percent")
        if not (math.isfinite(fit) and fit <= 100.0):
            raise ValueError(f"min_fit_percent must be a finite number <= 100, got {fit!r}")
        object.__setattr__(self, "min_fit_percent", fit)
        if not isinstance(self.require_stable, bool):
            raise ValueError(f"require_stable must be a bool, got {self.require_stable!r}")
        spp = self.min_samples_per_param
        if isinstance(spp, bool) or not isinstance(spp, int) or spp < 1:
            raise ValueError(f"min_samples_per_param must be an integer >= 1, got {spp!r}")
        se = _real(self.max_relative_se, "max_relative_se")
        if not (math.isfinite(se) and se > 0.0):
            raise ValueError(f"max_relative_se must be a finite number > 0, got {se!r}")
        object.__setattr__(self, "max_relative_se", se)

    def check(self, baseline: Baseline) -> tuple[str, ...]:
        """Return the reasons to refuse ``baseline``; empty when it is acceptable.

        The sample count is not judged here: it is a property of the
        window, checked by :func:`fit_baseline` before fitting.

        Parameters
        ----------
        baseline : Baseline
            A fitted baseline.

        Returns
        -------
        tuple of str
            Plain sentences, one per failed test.

        References
        ----------
        G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed.,
        Duxbury, 2002, section 5.5.4 (the delta method).
        """
        reasons: list[str] = []
        if baseline.fit_percent < self.min_fit_percent:
            reasons.append(
                f"fit on held-back data {baseline.fit_percent:.0f} % is below the "
                f"{self.min_fit_percent:.0f} % needed: the model does not explain the output "
                "well enough to monitor against"
            )
        readout = baseline.readout
        if self.require_stable and not readout.stable:
            if readout.integrating:
                reasons.append(
                    "the fitted model is integrating (a pole at z=1): the output does not "
                    "settle after the input changes, so there is no steady gain to watch; "
                    "check that the loop was in automatic and the equipment running"
                )
            else:
                outside = ", ".join(f"{abs(p):.3f}" for p in readout.poles if abs(p) >= 1.0)
                reasons.append(
                    f"the fitted model is unstable (pole modulus {outside}, at least 1): its "
                    "output would run away instead of settling, which working equipment does "
                    "not do; the window may hold a fault, manual operation or a drifting sensor"
                )
        gain_cov = baseline.feature_covariance()
        for i, gain in enumerate(readout.gains):
            if not math.isfinite(gain):
                reasons.append(
                    f"the gain of input {i + 1} is undefined: the model has no steady state"
                )
                continue
            relative = math.sqrt(max(float(gain_cov[i, i]), 0.0)) / abs(gain)
            if not relative <= self.max_relative_se:
                shown = f"{100.0 * relative:.0f} %" if math.isfinite(relative) else "unbounded"
                reasons.append(
                    f"the gain of input {i + 1} is uncertain: its standard error is {shown} of "
                    f"its value, at most {100.0 * self.max_relative_se:.0f} % is allowed; the "
                    "input hardly moved during the window (or the output hardly responded), so "
                    "a drift could not be told from noise: move the valve or damper through a "
                    "good part of its range while recording"
                )
        return tuple(reasons)


#: The rule :func:`fit_baseline` applies unless told otherwise.
DEFAULT_ACCEPTANCE = AcceptanceRule()


@dataclass(frozen=True, eq=False)
class Baseline:
    r"""A commissioning baseline of one asset in one operating mode.

    Arrays are stored as read-only copies. Equality is identity; compare
    :meth:`to_dict` outputs instead (``nan`` becomes ``None`` there, so
    they compare equal).

    Parameters
    ----------
    mode : str or None
        Operating mode the baseline belongs to; None when the asset has no
        mode signal.
    order : ArxOrder
        Model structure, at least one input.
    sample_period_s : float
        Sample period Ts in seconds, > 0.
    method : {"ols", "ridge", "lasso", "lad"}
        Fitting method.
    alpha : float
        Penalty weight of ridge and lasso, >= 0; 0.0 for ols and lad.
    theta : ndarray, shape (n,)
        Parameter estimate :math:`\theta_0`, laid out as
        :attr:`ArxOrder.param_names`.
    covariance : ndarray, shape (n, n)
        :math:`\mathrm{Cov}(\theta_0)`, finite, with a non-negative
        diagonal; stored symmetrised, ``(C + C') / 2``. For lasso it is the
        covariance of least squares on the active set, zero elsewhere (see
        :func:`fit_baseline`).
    sigma2 : float
        Innovation variance, finite and > 0, in output units squared.
    fit_percent : float
        One-step fit on the held-back data, in percent.
    readout : PhysicalReadout
        Gains, poles, time constant, dead times and offset of ``theta``.
    window_start_s, window_end_s : float
        Epoch seconds of the first and the last sample of the window.
    n_samples : int
        Samples in the window, estimation and held-back parts together.
    criterion : {"aic", "bic", "fpe"} or None, optional
        Criterion that selected the order; None when it was given.
    candidates : tuple of OrderCandidate, optional
        The ranked order search, best first; empty when the order was given.
    n_stretches : int, optional
        Gap-free stretches the window was made of, >= 1 (see
        :func:`fit_baseline`, ``gaps="split"``); ``window_start_s`` is the
        first sample of the first, ``window_end_s`` the last of the last, and
        ``n_samples`` counts the samples of all of them.

    Raises
    ------
    DimensionError
        If ``theta``, ``covariance`` or the read-out do not fit ``order``.
    ValueError
        If a value is out of range; the message starts with the field name.

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    section 7.3 and chapter 9.
    """

    FORMAT: ClassVar[str] = "arxwatch.baseline"
    VERSION: ClassVar[int] = 2

    mode: str | None
    order: ArxOrder
    sample_period_s: float
    method: str
    alpha: float
    theta: NDArray[np.float64]
    covariance: NDArray[np.float64]
    sigma2: float
    fit_percent: float
    readout: PhysicalReadout
    window_start_s: float
    window_end_s: float
    n_samples: int
    criterion: Criterion | None = None
    candidates: tuple[OrderCandidate, ...] = ()
    n_stretches: int = 1
    _theta_values: tuple[float, ...] = field(init=False, repr=False)
    _cov_rows: tuple[tuple[float, ...], ...] = field(init=False, repr=False)

    def __post_init__(self) -> None:
        if self.mode is not None and not isinstance(self.mode, str):
            raise ValueError(f"mode: expected a string or None, got {self.mode!r}")
        if not isinstance(self.order, ArxOrder):
            raise ValueError(f"order: expected an ArxOrder, got {type(self.order).__name__}")
        order = self.order
        if order.n_inputs == 0:
            raise ValueError("order: a baseline needs at least one input")
        object.__setattr__(
            self, "sample_period_s", _positive(self.sample_period_s, "sample_period_s")
        )
        if self.method not in _METHODS:
            raise ValueError(f"method: expected one of {list(_METHODS)}, got {self.method!r}")
        alpha = _real(self.alpha, "alpha")
        if not (math.isfinite(alpha) and alpha >= 0.0):
            raise ValueError(f"alpha: expected a finite number >= 0, got {self.alpha!r}")
        object.__setattr__(self, "alpha", alpha)
        n = order.n_params
        theta = np.array(self.theta, dtype=np.float64)
        if theta.shape != (n,):
            raise DimensionError(f"theta: expected shape ({n},), got {theta.shape}")
        cov = np.array(self.covariance, dtype=np.float64)
        if cov.shape != (n, n):
            raise DimensionError(f"covariance: expected shape ({n}, {n}), got {cov.shape}")
        if not np.isfinite(theta).all():
            raise ValueError(f"theta: expected finite numbers, got {theta.tolist()}")
        if not np.isfinite(cov).all():
            raise ValueError("covariance: expected finite numbers, found NaN or infinity")
        if (np.diag(cov) < 0.0).any():
            raise ValueError("covariance: a diagonal entry is negative, not a covariance")
        # Exactly symmetric (an exactly symmetric input is unchanged: (a + a) / 2 == a),
        # so the upper triangle alone reproduces every row.
        cov = (cov + cov.T) / 2.0
        theta.setflags(write=False)
        cov.setflags(write=False)
        object.__setattr__(self, "theta", theta)
        object.__setattr__(self, "covariance", cov)
        sigma2 = _real(self.sigma2, "sigma2")
        if not (math.isfinite(sigma2) and sigma2 > 0.0):
            raise ValueError(f"sigma2: expected a finite number > 0, got {self.sigma2!r}")
        object.__setattr__(self, "sigma2", sigma2)
        fit = _real(self.fit_percent, "fit_percent")
        if not (math.isfinite(fit) and fit <= 100.0):
            raise ValueError(f"fit_percent: expected a finite number <= 100, got {fit!r}")
        object.__setattr__(self, "fit_percent", fit)
        _check_readout(self.readout, order, self.sample_period_s)
        start = _finite(self.window_start_s, "window_start_s")
        end = _finite(self.window_end_s, "window_end_s")
        if end < start:
            raise ValueError(f"window_end_s: {end!r} is before window_start_s {start!r}")
        object.__setattr__(self, "window_start_s", start)
        object.__setattr__(self, "window_end_s", end)
        count = self.n_samples
        if isinstance(count, bool) or not isinstance(count, int) or count <= n:
            raise ValueError(
                f"n_samples: expected an integer > n_params={n}, got {self.n_samples!r}"
            )
        if self.criterion is not None and self.criterion not in _CRITERIA:
            raise ValueError(
                f"criterion: expected one of {list(_CRITERIA)} or None, got {self.criterion!r}"
            )
        object.__setattr__(self, "candidates", tuple(self.candidates))
        for j, c in enumerate(self.candidates):
            if not isinstance(c, OrderCandidate):
                raise ValueError(f"candidates[{j}]: expected an OrderCandidate, got {c!r}")
            if not all(math.isfinite(v) for v in (c.aic, c.bic, c.fpe, c.rss)):
                raise ValueError(f"candidates[{j}]: criteria and rss must be finite")
        stretches = self.n_stretches
        if isinstance(stretches, bool) or not isinstance(stretches, int) or stretches < 1:
            raise ValueError(f"n_stretches: expected an integer >= 1, got {stretches!r}")
        object.__setattr__(self, "_theta_values", tuple(float(v) for v in theta))
        object.__setattr__(self, "_cov_rows", tuple(tuple(float(v) for v in row) for row in cov))

    def residual(self, phi: Sequence[float], y: float) -> tuple[float, float]:
        r"""Score one sample against the baseline model.

        .. math::

            e = y - \varphi^T\theta_0, \qquad
            z = \frac{e}{\sqrt{\sigma^2 + \varphi^T \mathrm{Cov}(\theta_0)\varphi}}.

        The denominator is the variance of the prediction error of the fixed
        estimated model on data it was not fitted to: the innovation
        variance plus the spread the estimation error of theta0 adds at this
        regressor. While the asset behaves as in the baseline window, z is
        approximately N(0, 1). Pure Python on floats: it runs per sample.

        Parameters
        ----------
        phi : sequence of float, length n
            Regressor phi(k), e.g. from
            :meth:`arxwatch.estimators.arx.RegressorHistory.regressor`.
        y : float
            Measured output y(k).

        Returns
        -------
        e : float
            One-step residual, in output units.
        z : float
            Normalised residual, dimensionless.

        Raises
        ------
        DimensionError
            If ``phi`` does not have n entries.

        References
        ----------
        L. Ljung, *System Identification: Theory for the User*, 2nd ed.,
        1999, chapter 9 (the covariance of the estimate carried over to the
        model's predictions).
        """
        theta = self._theta_values
        if len(phi) != len(theta):
            raise DimensionError(
                f"phi has {len(phi)} entries but the baseline has {len(theta)} parameters"
            )
        prediction = 0.0
        spread = 0.0
        # Plain loops: about twice as fast as sum() over a generator. The
        # lengths were checked above, so zip need not check them again.
        # phi' C phi from the upper triangle, row j: phi_j (C_jj phi_j + 2
        # sum_{a > j} C_ja phi_a), in this order of operations, as the
        # column-wise monitor computes it for many assets at once.
        for j, (p, t, row) in enumerate(zip(phi, theta, self._cov_rows, strict=False)):
            prediction += p * t
            off = 0.0
            for a in range(j + 1, len(row)):
                off += row[a] * phi[a]
            spread += p * (row[j] * p + (off + off))
        e = y - prediction
        return e, e / math.sqrt(self.sigma2 + spread)

    def features(self) -> NDArray[np.float64]:
        """Return the physical features ``[K_1, ..., K_m, tau_s, offset]``.

        Returns
        -------
        ndarray, shape (m + 1 + int(order.constant),)
            As :func:`arxwatch.estimators.readout.feature_vector`, named by
            :func:`arxwatch.estimators.readout.feature_names`.
        """
        return feature_vector(self.readout)

    def feature_covariance(self) -> NDArray[np.float64]:
        """Return the covariance of :meth:`features` by the delta method, ``J Cov J'``.

        Returns
        -------
        ndarray, shape (n_features, n_features)
            With J from :func:`arxwatch.estimators.readout.readout_jacobian`;
            rows and columns of undefined features are ``nan``.

        References
        ----------
        G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed.,
        Duxbury, 2002, section 5.5.4.
        """
        jac = readout_jacobian(self.order, self.theta, self.sample_period_s)
        cov: NDArray[np.float64] = jac @ self.covariance @ jac.T
        return cov

    def to_dict(self) -> dict[str, Any]:
        """Return the baseline as JSON-safe plain data (format in the module docstring).

        Returns
        -------
        dict
            Version 2 of ``"arxwatch.baseline"`` for a baseline fitted on
            several stretches; version 1 (the same without ``n_stretches``)
            for one, so that releases reading only version 1 still read it.
        """
        several = self.n_stretches > 1
        extra = {"n_stretches": self.n_stretches} if several else {}
        return {
            "format": self.FORMAT,
            "version": self.VERSION if several else 1,
            "mode": self.mode,
            "order": encode_order(self.order),
            "sample_period_s": self.sample_period_s,
            "method": self.method,
            "alpha": self.alpha,
            "theta": list(self._theta_values),
            "covariance": [list(row) for row in self._cov_rows],
            "sigma2": self.sigma2,
            "fit_percent": self.fit_percent,
            "window_start_s": self.window_start_s,
            "window_end_s": self.window_end_s,
            "n_samples": self.n_samples,
            "criterion": self.criterion,
            "candidates": [_encode_candidate(c) for c in self.candidates],
            "readout": _encode_readout(self.readout),
            **extra,
        }

    @classmethod
    def from_dict(cls, data: Any, *, where: str = "baseline") -> Baseline:
        """Read a baseline written by :meth:`to_dict`.

        Parameters
        ----------
        data : Any
            Decoded JSON (untrusted).
        where : str, optional
            Key path of ``data`` for error messages.

        Returns
        -------
        Baseline
            Bit for bit the baseline that was written.

        Raises
        ------
        CodecError
            If the format is not this one or the version is not 1 or 2, a key
            is missing or unknown, or a value has the wrong type, length or
            range; the message names the key path.
        """
        version = data.get("version") if isinstance(data, dict) else None
        several = version == 2 and not isinstance(version, bool)
        expect_keys(data, _BASELINE_KEYS | {"n_stretches"} if several else _BASELINE_KEYS, where)
        _expect_header(data, cls.FORMAT, (1, cls.VERSION), where)
        order = _decode_order(data["order"], f"{where}.order")
        n = order.n_params
        sample_period_s = _number(data["sample_period_s"], f"{where}.sample_period_s")
        criterion = data["criterion"]
        if criterion is not None and criterion not in _CRITERIA:
            raise CodecError(
                f"{where}.criterion: expected one of {list(_CRITERIA)} or null, got {criterion!r}"
            )
        candidates = data["candidates"]
        if not isinstance(candidates, list):
            raise CodecError(f"{where}.candidates: expected a list, got {kind_of(candidates)}")
        try:
            return cls(
                mode=_optional_string(data["mode"], f"{where}.mode"),
                order=order,
                sample_period_s=sample_period_s,
                method=_string(data["method"], f"{where}.method"),
                alpha=_number(data["alpha"], f"{where}.alpha"),
                theta=np.array(_numbers(data["theta"], n, f"{where}.theta")),
                covariance=np.array(
                    [
                        _numbers(row, n, f"{where}.covariance[{r}]")
                        for r, row in enumerate(_list(data["covariance"], n, f"{where}.covariance"))
                    ]
                ),
                sigma2=_number(data["sigma2"], f"{where}.sigma2"),
                fit_percent=_number(data["fit_percent"], f"{where}.fit_percent"),
                readout=_decode_readout(
                    data["readout"], order, sample_period_s, f"{where}.readout"
                ),
                window_start_s=_number(data["window_start_s"], f"{where}.window_start_s"),
                window_end_s=_number(data["window_end_s"], f"{where}.window_end_s"),
                n_samples=_integer(data["n_samples"], f"{where}.n_samples"),
                criterion=criterion,
                candidates=tuple(
                    _decode_candidate(c, f"{where}.candidates[{j}]")
                    for j, c in enumerate(candidates)
                ),
                n_stretches=_integer(data["n_stretches"], f"{where}.n_stretches") if several else 1,
            )
        except CodecError:
            raise
        except ValueError as exc:
            # Field checks in __post_init__ start their message with the field.
            raise CodecError(f"{where}.{exc}") from exc


@dataclass(frozen=True, eq=False)
class BaselineResult:
    """Outcome of :func:`fit_baseline`: an accepted baseline or a refusal.

    Parameters
    ----------
    baseline : Baseline or None
        The accepted baseline; None when refused.
    accepted : bool
        Whether the fit passed the acceptance rule.
    reasons : tuple of str
        Why it was refused, one plain sentence per failed test; empty when
        accepted.
    candidates : tuple of OrderCandidate
        The ranked order search, best first; empty when the order was given
        or the window was refused before the search.
    fitted : Baseline or None
        The model that was judged, also when refused (to show its gains and
        time constant next to the reasons); None when the window was refused
        before fitting or the fit gave no usable model.
    n_stretches : int
        Gap-free stretches of the window the fit used (those long enough),
        >= 0; 1 for a window without gaps.
    n_short_stretches : int
        Stretches left out as too short to give a regression row, >= 0.

    Raises
    ------
    ValueError
        If the fields contradict each other.
    """

    baseline: Baseline | None
    accepted: bool
    reasons: tuple[str, ...]
    candidates: tuple[OrderCandidate, ...] = ()
    fitted: Baseline | None = None
    n_stretches: int = 1
    n_short_stretches: int = 0

    def __post_init__(self) -> None:
        object.__setattr__(self, "reasons", tuple(self.reasons))
        object.__setattr__(self, "candidates", tuple(self.candidates))
        if self.accepted != (self.baseline is not None) or self.accepted == bool(self.reasons):
            raise ValueError(
                "an accepted result needs a baseline and no reasons, a refused one reasons "
                f"and no baseline; got accepted={self.accepted!r}, "
                f"baseline={'set' if self.baseline is not None else None}, "
                f"{len(self.reasons)} reason(s)"
            )
        if self.baseline is not None and self.fitted is not self.baseline:
            raise ValueError("fitted must be the accepted baseline itself")
        for name in ("n_stretches", "n_short_stretches"):
            count = getattr(self, name)
            if isinstance(count, bool) or not isinstance(count, int) or count < 0:
                raise ValueError(f"{name} must be an integer >= 0, got {count!r}")
        if self.fitted is not None and self.fitted.n_stretches != self.n_stretches:
            raise ValueError(
                f"n_stretches={self.n_stretches} differs from the fitted baseline's "
                f"{self.fitted.n_stretches}"
            )


def _refused(
    reasons: Sequence[str],
    candidates: tuple[OrderCandidate, ...] = (),
    fitted: Baseline | None = None,
    *,
    n_stretches: int = 1,
    n_short_stretches: int = 0,
) -> BaselineResult:
    return BaselineResult(
        baseline=None,
        accepted=False,
        reasons=tuple(reasons),
        candidates=candidates,
        fitted=fitted,
        n_stretches=n_stretches,
        n_short_stretches=n_short_stretches,
    )


@dataclass(frozen=True)
class _FitOptions:
    """Validated settings shared by :func:`fit_baseline` and :class:`LearnerConfig`."""

    order: ArxOrder | None
    search: SearchRanges
    criterion: Criterion
    method: str
    alpha: float | None
    validation_fraction: float
    acceptance: AcceptanceRule

    def depth(self) -> int:
        return self.order.depth if self.order is not None else self.search.depth

    def largest_n_params(self, n_inputs: int) -> int:
        if self.order is not None:
            return self.order.n_params
        return self.search.largest_n_params(n_inputs)

    def shortfall(self, n_total: int, n_inputs: int, breaks: tuple[int, ...] = ()) -> str | None:
        """Why a window of ``n_total`` samples cut at ``breaks`` is too short, or None.

        Counts the regression rows the fit would use: each stretch, and each
        side of the validation split, loses its first ``depth`` samples.
        """
        n_validation = round(self.validation_fraction * n_total)
        depth = self.depth()
        n_params = self.largest_n_params(n_inputs)
        spp = self.acceptance.min_samples_per_param
        est_breaks, val_breaks = split_breaks(breaks, n_total, self.validation_fraction)
        rows = scored_rows(est_breaks, n_total - n_validation, depth)
        needed = max(spp * n_params, n_params + 1)
        held = f"{n_total} samples" + (f" in {len(breaks) + 1} stretches" if breaks else "")
        each = " per stretch" if breaks else ""
        if rows < needed:
            return (
                f"the window holds {held}: after "
                f"{100.0 * self.validation_fraction:.0f} % held back for validation and "
                f"{depth}{each} for the model's history, {rows} remain to fit up to {n_params} "
                f"parameters, but {needed} ({spp} per parameter) are needed: record a longer window"
            )
        if scored_rows(val_breaks, n_validation, depth) < 2:
            return (
                f"the window holds {held}, of which {n_validation} are held back for "
                f"validation, but scoring the fit needs at least {depth + 2} there (the model's "
                f"history plus two{each}): record a longer window or hold back a larger share"
            )
        return None

    def minimum_samples(self, n_inputs: int) -> int:
        """Fewest samples a window needs to pass :meth:`shortfall`."""
        n_total = self.depth() + 1
        while self.shortfall(n_total, n_inputs) is not None:
            n_total += 1
        return n_total


def _fit_options(
    order: ArxOrder | None,
    search: SearchRanges | None,
    criterion: Criterion,
    method: str,
    alpha: float | None,
    validation_fraction: float,
    acceptance: AcceptanceRule,
    n_inputs: int,
) -> _FitOptions:
    if order is not None and search is not None:
        raise ValueError("give either order or search, not both")
    if order is not None:
        if not isinstance(order, ArxOrder):
            raise TypeError(f"order must be an ArxOrder, got {type(order).__name__}")
        if order.n_inputs != n_inputs:
            raise DimensionError(
                f"order names {order.n_inputs} input(s) but there are {n_inputs} input column(s)"
            )
    if search is not None and not isinstance(search, SearchRanges):
        raise TypeError(f"search must be a SearchRanges, got {type(search).__name__}")
    if criterion not in _CRITERIA:
        raise ValueError(f"criterion must be one of {list(_CRITERIA)}, got {criterion!r}")
    if method not in _METHODS:
        raise ValueError(f"method must be one of {list(_METHODS)}, got {method!r}")
    if method in ("ridge", "lasso"):
        if alpha is None:
            raise ValueError(f"method={method!r} needs a penalty weight alpha >= 0")
        alpha = _real(alpha, "alpha")
        if not (math.isfinite(alpha) and alpha >= 0.0):
            raise ValueError(f"alpha must be a finite number >= 0, got {alpha!r}")
    elif alpha is not None:
        raise ValueError(f"alpha applies to ridge and lasso only, not to method={method!r}")
    fraction = _real(validation_fraction, "validation_fraction")
    if not 0.0 < fraction <= MAX_VALIDATION_FRACTION:
        raise ValueError(
            f"validation_fraction must be in (0, {MAX_VALIDATION_FRACTION}]: the acceptance "
            f"rule scores the fit on held-back data; got {validation_fraction!r}"
        )
    if not isinstance(acceptance, AcceptanceRule):
        raise TypeError(f"acceptance must be an AcceptanceRule, got {type(acceptance).__name__}")
    return _FitOptions(
        order=order,
        search=search if search is not None else SearchRanges(),
        criterion=criterion,
        method=method,
        alpha=alpha,
        validation_fraction=fraction,
        acceptance=acceptance,
    )


def _check_record(
    y: ArrayLike, u: ArrayLike, t: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    y_arr = np.asarray(y, dtype=np.float64)
    if y_arr.ndim != 1 or y_arr.shape[0] < 2:
        raise DimensionError(f"y must be 1-D with at least 2 samples, got shape {y_arr.shape}")
    n = y_arr.shape[0]
    u_arr = np.asarray(u, dtype=np.float64)
    if u_arr.ndim == 1:
        u_arr = u_arr[:, None]
    if u_arr.ndim != 2 or u_arr.shape[0] != n or u_arr.shape[1] == 0:
        raise DimensionError(
            f"u must have shape (N={n},) or (N={n}, n_inputs >= 1), got {np.shape(u)}"
        )
    t_arr = np.asarray(t, dtype=np.float64)
    if t_arr.shape != (n,):
        raise DimensionError(f"t must have shape (N={n},) like y, got {t_arr.shape}")
    for name, values in (("y", y_arr), ("u", u_arr), ("t", t_arr)):
        bad = np.argwhere(~np.isfinite(values))
        if bad.size:
            index = tuple(int(i) for i in bad[0])
            raise ValueError(
                f"{name} must hold finite values, found {values[index]} at index "
                f"{index[0] if len(index) == 1 else index}"
            )
    return y_arr, u_arr, t_arr


def _check_grid(t: NDArray[np.float64], sample_period_s: float, gaps: Gaps) -> tuple[int, ...]:
    """Return the index after each gap; raise at an irregular step, or a gap when refused."""
    steps = np.diff(t)
    late = np.flatnonzero(steps > GAP_FACTOR * sample_period_s)
    early = np.flatnonzero(steps < _EARLY_FACTOR * sample_period_s)
    if gaps == "refuse" and late.size and (not early.size or late[0] < early[0]):
        k = int(late[0]) + 1
        raise GridError(
            f"t: gap of {steps[k - 1]:.6g} s between sample {k - 1} (t={t[k - 1]:.3f}) and "
            f"sample {k} (t={t[k]:.3f}), more than {GAP_FACTOR} sample periods "
            f"({GAP_FACTOR * sample_period_s:.6g} s): give a gap-free window, for example the "
            'samples before or after the gap, or fit across the gaps with gaps="split"',
            index=k,
        )
    if early.size:
        k = int(early[0]) + 1
        raise GridError(
            f"t: samples {k - 1} (t={t[k - 1]:.3f}) and {k} (t={t[k]:.3f}) are "
            f"{steps[k - 1]:.6g} s apart, less than half the sample period "
            f"({sample_period_s:.6g} s): the record is not on one grid (duplicate, "
            "out-of-order or extra samples)",
            index=k,
        )
    return tuple(int(k) + 1 for k in late)


def _long_stretches(
    breaks: tuple[int, ...], n_total: int, depth: int
) -> tuple[NDArray[np.intp] | None, tuple[int, ...], int]:
    """Leave out stretches of at most ``depth`` samples: they give no regression row.

    Returns the indices of the samples kept (None: all of them), the
    breaks among them and the number of stretches left out.
    """
    bounds = (0, *breaks, n_total)
    kept: list[NDArray[np.intp]] = []
    new_breaks: list[int] = []
    count = 0
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        if b - a <= depth:
            continue
        if kept:
            new_breaks.append(count)
        kept.append(np.arange(a, b))
        count += b - a
    left_out = len(bounds) - 1 - len(kept)
    if not left_out:
        return None, breaks, 0
    index = np.concatenate(kept) if kept else np.zeros(0, dtype=np.intp)
    return index, tuple(new_breaks), left_out


def _scored(
    values: NDArray[np.float64], breaks: tuple[int, ...], start: int
) -> NDArray[np.float64]:
    """Return the samples of each stretch from its sample ``start`` on, stretch after stretch."""
    bounds = (0, *breaks, values.shape[0])
    return np.concatenate(
        [values[a + start : b] for a, b in zip(bounds[:-1], bounds[1:], strict=True)]
    )


def _excitation_reasons(
    y_est: NDArray[np.float64], u_est: NDArray[np.float64], y_val: NDArray[np.float64]
) -> list[str]:
    reasons = []
    centred = u_est - u_est.mean(axis=0)
    norms = np.linalg.norm(centred, axis=0)
    for i in np.flatnonzero(norms == 0.0):
        reasons.append(
            f"input {i + 1} stayed at {u_est[0, i]:.6g} for the whole estimation part of the "
            "window: with no movement its effect on the output cannot be measured; move it "
            "(open and close the valve or damper) while recording"
        )
    moving = norms > 0.0
    if (
        moving.sum() > 1
        and np.linalg.matrix_rank(centred[:, moving] / norms[moving]) < moving.sum()
    ):
        reasons.append(
            "the inputs moved in step with each other during the window, so their separate "
            "effects on the output cannot be told apart; move them independently while recording"
        )
    for part, values in (("estimation", y_est), ("held-back", y_val)):
        if np.ptp(values) == 0.0:
            reasons.append(
                f"the output stayed at {values[0]:.6g} for the whole {part} part of the window: "
                "a stuck or disconnected sensor, or equipment that was off"
            )
    return reasons


def _lasso_covariance(
    order: ArxOrder,
    fit: BatchFit,
    y_est: NDArray[np.float64],
    u_est: NDArray[np.float64],
    breaks: tuple[int, ...],
) -> NDArray[np.float64]:
    phi, _ = segment_regression_matrix(order, y_est, u_est, breaks)
    active = np.flatnonzero(fit.theta != 0.0)
    cov = np.zeros((order.n_params, order.n_params))
    if active.size:
        pinv = np.linalg.pinv(phi[:, active])
        cov[np.ix_(active, active)] = fit.sigma2 * (pinv @ pinv.T)
    return cov


def fit_baseline(
    y: ArrayLike,
    u: ArrayLike,
    t: ArrayLike,
    *,
    sample_period_s: float,
    order: ArxOrder | None = None,
    search: SearchRanges | None = None,
    criterion: Criterion = "bic",
    method: str = "ols",
    alpha: float | None = None,
    validation_fraction: float = 0.3,
    mode: str | None = None,
    acceptance: AcceptanceRule = DEFAULT_ACCEPTANCE,
    gaps: Gaps = "refuse",
) -> BaselineResult:
    r"""Fit a commissioning baseline on a gap-free window, or on several, and judge it.

    Steps:

    1. Check that ``t`` is one uniform grid: consecutive samples between
       half and :data:`GAP_FACTOR` sample periods apart. By default a gap
       raises :class:`GridError` with its location, and the caller picks a
       gap-free window (splitting silently would fit on a window nobody
       chose). With ``gaps="split"`` the caller asks for the split: the
       gaps cut the window into gap-free stretches (of one operating mode,
       say, recorded on several days), and the fit uses them all, each with
       its own history, so no regressor reaches across a gap. A stretch too
       short to give a regression row (at most the deepest history on the
       order grid) is left out and counted in
       :attr:`BaselineResult.n_short_stretches`.
    2. Refuse, with a reason, a window that is too short for
       ``acceptance.min_samples_per_param`` (judged for the largest
       candidate, on the regression rows the stretches give), an input that
       never moved, inputs that moved in step, or an output that never
       changed.
    3. Without ``order``, rank the orders of ``search`` by ``criterion``
       with :func:`arxwatch.estimators.order.select_order` (always by least
       squares, on the same estimation samples) and take the best.
    4. Fit that order with
       :func:`arxwatch.estimators.identify.fit_arx` on the leading
       ``1 - validation_fraction`` of the window's samples and score the
       one-step prediction on the rest (a stretch cut by the split becomes
       two).
    5. Refuse a fit that leaves no noise (residual standard deviation
       below 1e-9 of the largest output: a computed or stuck point), then
       judge the rest with ``acceptance``.

    ``Cov(theta0)`` is the fitting method's own: ``sigma2 (Phi'Phi)^-1``
    for ols, the sandwich form for ridge, the asymptotic one for lad. The
    lasso has no standard covariance; the baseline uses that of least
    squares on the active set (the nonzero coefficients), zero elsewhere.
    Given the active set and the signs, the lasso solution is the
    least-squares one on those columns shifted by a constant
    (:math:`\theta_A = (\Phi_A^T\Phi_A)^{-1}(\Phi_A^T y - N\alpha s_A)`),
    so this is its covariance given the selection; it ignores the
    uncertainty of the selection itself and so understates the spread.

    Parameters
    ----------
    y : array_like, shape (N,)
        Output samples.
    u : array_like, shape (N,) or (N, n_inputs)
        Input samples, at least one input.
    t : array_like, shape (N,)
        Epoch seconds of each sample.
    sample_period_s : float
        Grid spacing Ts in seconds, > 0.
    order : ArxOrder, optional
        Model structure; when omitted it is selected over ``search``.
    search : SearchRanges, optional
        Orders to search when ``order`` is omitted; default
        :class:`SearchRanges` (na 1..2, nb 1..2, nk 0..6). Not with ``order``.
    criterion : {"aic", "bic", "fpe"}, optional
        Order-selection criterion; BIC is consistent, AIC and FPE tend to
        over-fit long records.
    method : {"ols", "ridge", "lasso", "lad"}, optional
        Fitting method for the chosen order.
    alpha : float, optional
        Penalty weight, required for ridge and lasso and refused otherwise.
    validation_fraction : float, optional
        Share of the window held back for validation, in (0, 0.9].
    mode : str, optional
        Operating mode the baseline is for.
    acceptance : AcceptanceRule, optional
        When to accept; default :data:`DEFAULT_ACCEPTANCE`.
    gaps : {"refuse", "split"}, optional
        What a gap in ``t`` does: raise :class:`GridError` (the default) or
        split the window into stretches fitted together.

    Returns
    -------
    BaselineResult
        The accepted baseline, or the reasons for refusing the window; the
        baseline records the first and last time, the samples and the
        stretches it was fitted on.

    Raises
    ------
    GridError
        If ``t`` has an irregular step, or a gap unless ``gaps="split"``;
        the message gives the sample indices and times.
    DimensionError
        If the shapes of ``y``, ``u``, ``t`` or ``order`` disagree.
    ValueError
        If an option is out of range or contradicts another (``gaps``
        included), the data hold NaN or infinity, or (rarely, after the
        input checks) every order on the grid is rank deficient.
    TypeError
        If ``order``, ``search`` or ``acceptance`` has the wrong type.

    References
    ----------
    L. Ljung, *System Identification: Theory for the User*, 2nd ed., 1999,
    sections 7.3 and 16.4 and chapter 16.

    J. D. Lee, D. L. Sun, Y. Sun and J. E. Taylor, "Exact post-selection
    inference, with application to the lasso", *Annals of Statistics*
    44(3), 2016, pp. 907-927 (the lasso given its active set and signs).

    H. Leeb and B. M. Pötscher, "Model selection and inference: facts and
    fiction", *Econometric Theory* 21, 2005, pp. 21-59.

    Examples
    --------
    A valve (%) driving a discharge air temperature (degC) with gain -0.2,
    time constant 600 s and one sample of transport delay, sampled every
    60 s:

    >>> from scipy.signal import lfilter
    >>> rng = np.random.default_rng(3)
    >>> a = math.exp(-60.0 / 600.0)
    >>> valve = np.repeat(rng.uniform(10.0, 90.0, 40), 15)
    >>> noise = 0.02 * rng.standard_normal(valve.size)
    >>> temp = 18.0 + lfilter([0.0, 0.0, -0.2 * (1 - a)], [1.0, -a], valve - 50.0)
    >>> temp += lfilter([1.0], [1.0, -a], noise)
    >>> t = 1.7e9 + 60.0 * np.arange(valve.size)
    >>> result = fit_baseline(temp[100:], valve[100:], t[100:], sample_period_s=60.0)
    >>> result.accepted, result.baseline.order.nk, result.baseline.readout.dead_times_s
    (True, (2,), (120.0,))
    >>> readout = result.baseline.readout
    >>> round(readout.gains[0], 2), round(readout.time_constant_s, -1)
    (-0.2, 600.0)

    The same record with two hours missing in the middle: the two stretches
    are fitted together.

    >>> kept = np.r_[100:300, 420:600]
    >>> split = fit_baseline(temp[kept], valve[kept], t[kept], sample_period_s=60.0, gaps="split")
    >>> split.accepted, split.baseline.n_stretches, split.baseline.n_samples
    (True, 2, 380)
    """
    ts = _positive(sample_period_s, "sample_period_s")
    y_arr, u_arr, t_arr = _check_record(y, u, t)
    n_inputs = u_arr.shape[1]
    options = _fit_options(
        order, search, criterion, method, alpha, validation_fraction, acceptance, n_inputs
    )
    if mode is not None and not isinstance(mode, str):
        raise TypeError(f"mode must be a string or None, got {mode!r}")
    if gaps not in _GAPS:
        raise ValueError(f"gaps must be one of {list(_GAPS)}, got {gaps!r}")
    breaks = _check_grid(t_arr, ts, gaps)
    depth = options.depth()
    kept, breaks, left_out = _long_stretches(breaks, t_arr.shape[0], depth)
    if kept is not None:
        if not kept.size:
            return _refused(
                [
                    f"none of the {left_out} gap-free stretches of the window is longer than "
                    f"the model's history ({depth} samples), so none gives a sample to fit: "
                    "record longer stretches of steady operation in this mode"
                ],
                n_stretches=0,
                n_short_stretches=left_out,
            )
        y_arr, u_arr, t_arr = y_arr[kept], u_arr[kept], t_arr[kept]
    n_total, n_used = y_arr.shape[0], len(breaks) + 1
    short = options.shortfall(n_total, n_inputs, breaks)
    if short is not None:
        return _refused([short], n_stretches=n_used, n_short_stretches=left_out)
    y_est, _, y_val, _ = split_series(y_arr, u_arr, options.validation_fraction)
    u_est = u_arr[: y_est.shape[0]]
    est_breaks, val_breaks = split_breaks(breaks, n_total, options.validation_fraction)
    reasons = _excitation_reasons(y_est, u_est, _scored(y_val, val_breaks, depth))
    if reasons:
        return _refused(reasons, n_stretches=n_used, n_short_stretches=left_out)

    candidates: tuple[OrderCandidate, ...] = ()
    chosen = options.order
    if chosen is None:
        grid = options.search
        ranking = select_order(
            y_arr,
            u_arr,
            grid.na,
            grid.nb,
            grid.nk,
            breaks=breaks,
            criterion=options.criterion,
            validation_fraction=options.validation_fraction,
            constant=grid.constant,
        )
        candidates = ranking.candidates
        chosen = ranking.best.order
    kwargs = {} if options.alpha is None else {"alpha": options.alpha}
    try:
        arx_fit = fit_arx(
            chosen,
            y_arr,
            u_arr,
            breaks=breaks,
            method=options.method,
            validation_fraction=options.validation_fraction,
            **kwargs,
        )
    except RankDeficientError:
        return _refused(
            [
                "the recorded inputs do not determine every model coefficient (an input held "
                "still or repeating itself): move the inputs more while recording"
            ],
            candidates,
            n_stretches=n_used,
            n_short_stretches=left_out,
        )
    fit = arx_fit.fit
    floor = (_EXACT_FIT_RTOL * float(np.max(np.abs(y_arr)))) ** 2
    if not (math.isfinite(fit.sigma2) and fit.sigma2 > floor):
        return _refused(
            [
                "the model reproduces the output exactly, with no noise left: the output is "
                "likely computed from the input or stuck, not a measurement"
            ],
            candidates,
            n_stretches=n_used,
            n_short_stretches=left_out,
        )
    cov = fit.cov
    if cov is None:
        cov = _lasso_covariance(chosen, fit, y_est, u_est, est_breaks)
    assert arx_fit.fit_percent_validation is not None  # validation_fraction > 0
    fitted = Baseline(
        mode=mode,
        order=chosen,
        sample_period_s=ts,
        method=fit.method,
        alpha=fit.alpha,
        theta=fit.theta,
        covariance=cov,
        sigma2=fit.sigma2,
        fit_percent=arx_fit.fit_percent_validation,
        readout=read_out(chosen, fit.theta, ts),
        window_start_s=float(t_arr[0]),
        window_end_s=float(t_arr[-1]),
        n_samples=n_total,
        criterion=options.criterion if options.order is None else None,
        candidates=candidates,
        n_stretches=n_used,
    )
    reasons = list(options.acceptance.check(fitted))
    if reasons:
        return _refused(reasons, candidates, fitted, n_stretches=n_used, n_short_stretches=left_out)
    return BaselineResult(
        baseline=fitted,
        accepted=True,
        reasons=(),
        candidates=candidates,
        fitted=fitted,
        n_stretches=n_used,
        n_short_stretches=left_out,
    )


@dataclass(frozen=True, eq=False)
class BaselineSet:
    """The frozen baselines of one asset, one per operating mode.

    A baseline with mode None means the asset has no mode signal; it must
    then be the only one in the set.

    Parameters
    ----------
    baselines : tuple of Baseline
        At most one per mode.

    Raises
    ------
    ValueError
        If two baselines share a mode, or a mode-None baseline is not alone.
    """

    FORMAT: ClassVar[str] = "arxwatch.baseline-set"
    VERSION: ClassVar[int] = 1

    baselines: tuple[Baseline, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "baselines", tuple(self.baselines))
        modes: list[str | None] = []
        for j, b in enumerate(self.baselines):
            if not isinstance(b, Baseline):
                raise ValueError(f"baselines[{j}]: expected a Baseline, got {type(b).__name__}")
            if b.mode in modes:
                raise ValueError(f"baselines[{j}]: a second baseline for mode {b.mode!r}")
            modes.append(b.mode)
        if None in modes and len(modes) > 1:
            raise ValueError(
                "baselines: a baseline without a mode (mode None) must be the only one; the "
                f"set has modes {modes!r}"
            )

    @property
    def modes(self) -> tuple[str | None, ...]:
        """Modes that have a baseline, in set order."""
        return tuple(b.mode for b in self.baselines)

    def for_mode(self, mode: str | None) -> Baseline | None:
        """Return the baseline of ``mode`` (None: the asset has no modes), or None."""
        for b in self.baselines:
            if b.mode == mode:
                return b
        return None

    def to_dict(self) -> dict[str, Any]:
        """Return the set as JSON-safe plain data (format in the module docstring)."""
        return {
            "format": self.FORMAT,
            "version": self.VERSION,
            "baselines": [b.to_dict() for b in self.baselines],
        }

    @classmethod
    def from_dict(cls, data: Any, *, where: str = "baseline_set") -> BaselineSet:
        """Read a set written by :meth:`to_dict`.

        Raises
        ------
        CodecError
            If anything is malformed; the message names the key path.
        """
        expect_keys(data, {"format", "version", "baselines"}, where)
        _expect_header(data, cls.FORMAT, (cls.VERSION,), where)
        items = data["baselines"]
        if not isinstance(items, list):
            raise CodecError(f"{where}.baselines: expected a list, got {kind_of(items)}")
        decoded = tuple(
            Baseline.from_dict(b, where=f"{where}.baselines[{j}]") for j, b in enumerate(items)
        )
        try:
            return cls(decoded)
        except ValueError as exc:
            raise CodecError(f"{where}.{exc}") from exc


@dataclass(frozen=True)
class LearnerConfig:
    """Settings of a :class:`LiveBaselineLearner`.

    Parameters
    ----------
    sample_period_s : float
        Grid spacing Ts of the incoming samples, seconds, > 0.
    span_s : float
        Operation in one mode to learn from, seconds: the gap-free stretches
        of the mode together (each counts from its first to its last
        sample); long enough for the order grid and the acceptance rule.
    max_samples : int, optional
        Most samples kept per mode (a memory bound), at least the
        ``floor(span_s / sample_period_s) + 1`` of a regular grid.
        The default, 10 000, is a week at 60 s or 3.5 days at 30 s; common
        practice, no source.
    modes : tuple of (str or None), optional
        Modes to learn; ``(None,)`` (the default) for an asset without a
        mode signal, which cannot be mixed with named modes.
    n_inputs : int, optional
        Number of input signals, >= 1.
    order, search, criterion, method, alpha, validation_fraction, acceptance
        As for :func:`fit_baseline`.

    Raises
    ------
    ValueError
        If a setting is out of range or contradicts another, or ``span_s``
        is too short for the order grid and the acceptance rule.
    DimensionError
        If ``order`` does not name ``n_inputs`` inputs.
    """

    sample_period_s: float
    span_s: float
    max_samples: int = 10_000
    modes: tuple[str | None, ...] = (None,)
    n_inputs: int = 1
    order: ArxOrder | None = None
    search: SearchRanges | None = None
    criterion: Criterion = "bic"
    method: str = "ols"
    alpha: float | None = None
    validation_fraction: float = 0.3
    acceptance: AcceptanceRule = DEFAULT_ACCEPTANCE

    def __post_init__(self) -> None:
        ts = _positive(self.sample_period_s, "sample_period_s")
        span = _positive(self.span_s, "span_s")
        object.__setattr__(self, "sample_period_s", ts)
        object.__setattr__(self, "span_s", span)
        if (
            isinstance(self.n_inputs, bool)
            or not isinstance(self.n_inputs, int)
            or self.n_inputs < 1
        ):
            raise ValueError(f"n_inputs must be an integer >= 1, got {self.n_inputs!r}")
        modes = tuple(self.modes)
        if not modes:
            raise ValueError("modes is empty; give (None,) for an asset without modes")
        for m in modes:
            if m is not None and not isinstance(m, str):
                raise ValueError(f"modes must hold strings or None, got {m!r}")
        if len(set(modes)) != len(modes):
            raise ValueError(f"modes must not repeat, got {modes!r}")
        if None in modes and len(modes) > 1:
            raise ValueError(f"mode None (no mode signal) cannot be mixed with others: {modes!r}")
        object.__setattr__(self, "modes", modes)
        per_grid = math.floor(span / ts) + 1
        count = self.max_samples
        if isinstance(count, bool) or not isinstance(count, int) or count < per_grid:
            raise ValueError(
                f"max_samples must be an integer >= {per_grid} (span_s={span:g} s at "
                f"{ts:g} s), got {count!r}"
            )
        needed = _config_options(self).minimum_samples(self.n_inputs)
        if per_grid < needed:
            raise ValueError(
                f"span_s={span:g} s gives {per_grid} samples at {ts:g} s, but the order grid and "
                f"the acceptance rule need at least {needed} ({(needed - 1) * ts:g} s)"
            )


def _config_options(config: LearnerConfig) -> _FitOptions:
    return _fit_options(
        config.order,
        config.search,
        config.criterion,
        config.method,
        config.alpha,
        config.validation_fraction,
        config.acceptance,
        config.n_inputs,
    )


class _Run:
    """Samples of one mode collected so far: compact float arrays and their coverage."""

    __slots__ = ("t", "y", "u", "closed_s", "stretch_start_s")

    def __init__(self) -> None:
        self.clear()

    def clear(self) -> None:
        self.t = array("d")
        self.y = array("d")
        self.u = array("d")  # row-major, n_inputs per sample
        self.closed_s = 0.0  # seconds covered by the stretches before the current one
        self.stretch_start_s = 0.0  # time of the current stretch's first sample

    def start_stretch(self, t: float) -> None:
        """Close the current stretch (if any) and start one at ``t``."""
        if self.t:
            self.closed_s += self.t[-1] - self.stretch_start_s
        self.stretch_start_s = t

    def coverage_s(self) -> float:
        """Seconds covered by all stretches, each from its first to its last sample."""
        return self.closed_s + (self.t[-1] - self.stretch_start_s) if self.t else 0.0


class LiveBaselineLearner:
    """Collect gap-free stretches per operating mode while the service runs, then freeze.

    Rules, per mode of ``config.modes``:

    * A sample of a mode that is not learned, of a frozen mode, or with a
      non-finite value is ignored (a non-finite sample leaves a hole, so
      the next one sees a gap).
    * A sample less than half a sample period after the previous one
      (duplicate, re-delivered or out of order) is ignored.
    * A sample more than :data:`GAP_FACTOR` periods after the previous one
      starts a new stretch of that mode; what was collected is kept. Time
      spent in another mode is such a gap, so an air handler switching
      between occupied and unoccupied every day collects both modes, a
      stretch a day each.
    * Once the stretches together cover ``span_s`` (each from its first to
      its last sample; see :meth:`coverage_s`) or hold ``max_samples``, the
      mode is :meth:`ready` and further samples are ignored until
      :meth:`finish`. For one uninterrupted stretch that is the window from
      its first sample to the one ``span_s`` later. With ``max_samples`` at
      ``span_s / sample_period_s + 1``, as the service sets it, a mode
      gathered in several stretches is ready once its samples times the
      period cover ``span_s``.
    * :meth:`finish` fits all stretches together (:func:`fit_baseline` with
      ``gaps="split"``: no regressor reaches across a gap; a stretch too
      short for the model's history is left out). An accepted baseline
      freezes the mode; a refusal drops the window and collection starts
      afresh, so the next window gets a new chance.

    Parameters
    ----------
    config : LearnerConfig
        Frozen settings.

    Examples
    --------
    >>> learner = LiveBaselineLearner(
    ...     LearnerConfig(sample_period_s=60.0, span_s=36_000.0, modes=("heating", "cooling"))
    ... )
    >>> learner.add(1.7e9, 21.0, [40.0], mode="heating")
    'collected'
    >>> learner.add(1.7e9 + 60.0, 21.0, [40.0], mode="dehumidify")
    'ignored'
    >>> learner.add(1.7e9 + 300.0, 21.1, [45.0], mode="heating")
    'collected'
    >>> learner.add(1.7e9 + 360.0, 21.2, [45.0], mode="heating")
    'collected'
    >>> learner.ready("heating"), learner.coverage_s("heating")
    (False, 60.0)
    """

    __slots__ = ("config", "_options", "_runs", "_frozen")

    FORMAT: ClassVar[str] = "arxwatch.baseline-learner"
    VERSION: ClassVar[int] = 2

    def __init__(self, config: LearnerConfig) -> None:
        if not isinstance(config, LearnerConfig):
            raise TypeError(f"config must be a LearnerConfig, got {type(config).__name__}")
        self.config = config
        self._options = _config_options(config)
        self._runs: dict[str | None, _Run] = {m: _Run() for m in config.modes}
        self._frozen: dict[str | None, Baseline] = {}

    def add(self, t: float, y: float, u: Sequence[float], mode: str | None = None) -> AddOutcome:
        """Offer one sample.

        Parameters
        ----------
        t : float
            Epoch seconds of the sample.
        y : float
            Output.
        u : sequence of float, length n_inputs
            Inputs.
        mode : str or None, optional
            Operating mode the equipment was in.

        Returns
        -------
        {"collected", "ignored"}
            Whether the sample was kept (also when it starts a new stretch
            after a gap).

        Raises
        ------
        DimensionError
            If ``u`` does not hold ``n_inputs`` values.
        """
        n_inputs = self.config.n_inputs
        if len(u) != n_inputs:
            raise DimensionError(f"u has {len(u)} value(s), the learner expects {n_inputs}")
        run = self._runs.get(mode)
        if run is None or mode in self._frozen or self._is_full(run):
            return "ignored"
        values = [float(t), float(y), *(float(v) for v in u)]
        if not all(math.isfinite(v) for v in values):
            return "ignored"
        if run.t:
            step = values[0] - run.t[-1]
            ts = self.config.sample_period_s
            if step < _EARLY_FACTOR * ts:
                return "ignored"
            if step > GAP_FACTOR * ts:
                run.start_stretch(values[0])
        else:
            run.start_stretch(values[0])
        run.t.append(values[0])
        run.y.append(values[1])
        run.u.extend(values[2:])
        return "collected"

    def coverage_s(self, mode: str | None = None) -> float:
        """Seconds covered by the stretches collected in ``mode`` (0 once frozen).

        Each stretch counts from its first to its last sample, so a single
        sample after a gap adds nothing (it gives no regression row either).

        Raises
        ------
        ValueError
            If ``mode`` is not learned.
        """
        return self._run(mode).coverage_s()

    def ready(self, mode: str | None = None) -> bool:
        """Whether ``mode`` has a full window waiting for :meth:`finish`.

        Raises
        ------
        ValueError
            If ``mode`` is not learned.
        """
        return mode not in self._frozen and self._is_full(self._run(mode))

    def finish(self, mode: str | None = None) -> BaselineResult:
        """Fit the window of ``mode``; freeze it if accepted, start afresh if not.

        Returns
        -------
        BaselineResult
            As :func:`fit_baseline`.

        Raises
        ------
        ValueError
            If ``mode`` is not learned, is frozen, or is not :meth:`ready`.
        """
        run = self._run(mode)
        if mode in self._frozen:
            raise ValueError(f"mode {mode!r} is frozen; reset it to learn again")
        if not self._is_full(run):
            raise ValueError(
                f"mode {mode!r} is not ready: its window covers {self.coverage_s(mode):g} s of "
                f"{self.config.span_s:g} s"
            )
        options = self._options
        result = fit_baseline(
            np.array(run.y),
            np.array(run.u).reshape(-1, self.config.n_inputs),
            np.array(run.t),
            sample_period_s=self.config.sample_period_s,
            order=options.order,
            search=None if options.order is not None else options.search,
            criterion=options.criterion,
            method=options.method,
            alpha=options.alpha,
            validation_fraction=options.validation_fraction,
            mode=mode,
            acceptance=options.acceptance,
            gaps="split",
        )
        run.clear()
        if result.baseline is not None:
            self._frozen[mode] = result.baseline
        return result

    def baseline(self, mode: str | None = None) -> Baseline | None:
        """Return the frozen baseline of ``mode``, or None while it is still learning.

        Raises
        ------
        ValueError
            If ``mode`` is not learned.
        """
        self._run(mode)
        return self._frozen.get(mode)

    def baselines(self) -> BaselineSet:
        """All frozen baselines, in the order of ``config.modes``."""
        return BaselineSet(tuple(self._frozen[m] for m in self.config.modes if m in self._frozen))

    def reset(self, mode: str | None = None) -> None:
        """Forget the window and the frozen baseline of ``mode``: learn it again.

        Raises
        ------
        ValueError
            If ``mode`` is not learned.
        """
        self._run(mode).clear()
        self._frozen.pop(mode, None)

    def to_state(self) -> dict[str, Any]:
        """Return the collected windows and frozen baselines as JSON-safe plain data.

        Returns
        -------
        dict
            ``{"format": "arxwatch.baseline-learner", "version": 2, "modes":
            [{"mode", "t", "y", "u", "baseline"}, ...]}`` in the order of
            ``config.modes``; ``t`` and ``y`` are lists of numbers, ``u`` a
            list of per-sample lists, ``baseline`` a :meth:`Baseline.to_dict`
            or null. Settings are not included: they come from the config.
            Version 2 may hold several stretches of a mode (the gaps in
            ``t`` separate them); version 1, written before, never did, and
            is read the same way.
        """
        n_inputs = self.config.n_inputs
        entries = []
        for m, run in self._runs.items():
            flat = run.u.tolist()
            frozen = self._frozen.get(m)
            entries.append(
                {
                    "mode": m,
                    "t": run.t.tolist(),
                    "y": run.y.tolist(),
                    "u": [flat[k : k + n_inputs] for k in range(0, len(flat), n_inputs)],
                    "baseline": None if frozen is None else frozen.to_dict(),
                }
            )
        return {"format": self.FORMAT, "version": self.VERSION, "modes": entries}

    def load_state(self, state: Any) -> None:
        """Restore the state saved by :meth:`to_state`; nothing changes on error.

        Raises
        ------
        CodecError
            If the state is malformed, of a version other than 1 or 2, or
            its modes differ from ``config.modes``; the message names the
            key path.
        """
        where = "learner"
        expect_keys(state, {"format", "version", "modes"}, where)
        _expect_header(state, self.FORMAT, (1, self.VERSION), where)
        entries = state["modes"]
        modes = self.config.modes
        if not isinstance(entries, list) or len(entries) != len(modes):
            raise CodecError(f"{where}.modes: expected a list of {len(modes)} entries")
        runs: dict[str | None, _Run] = {}
        frozen: dict[str | None, Baseline] = {}
        n_inputs = self.config.n_inputs
        for j, entry in enumerate(entries):
            path = f"{where}.modes[{j}]"
            expect_keys(entry, {"mode", "t", "y", "u", "baseline"}, path)
            mode = entry["mode"]
            if mode not in modes or mode in runs:
                raise CodecError(f"{path}.mode: expected one of {list(modes)} once, got {mode!r}")
            count = len(_list(entry["t"], None, f"{path}.t"))
            run = _Run()
            run.t.extend(_numbers(entry["t"], count, f"{path}.t"))
            run.y.extend(_numbers(entry["y"], count, f"{path}.y"))
            for k, row in enumerate(_list(entry["u"], count, f"{path}.u")):
                run.u.extend(_numbers(row, n_inputs, f"{path}.u[{k}]"))
            self._restore_coverage(run)
            if entry["baseline"] is not None:
                baseline = Baseline.from_dict(entry["baseline"], where=f"{path}.baseline")
                if baseline.mode != mode:
                    raise CodecError(
                        f"{path}.baseline.mode: expected {mode!r}, got {baseline.mode!r}"
                    )
                frozen[mode] = baseline
            runs[mode] = run
        self._runs = {m: runs[m] for m in modes}
        self._frozen = frozen

    def _run(self, mode: str | None) -> _Run:
        run = self._runs.get(mode)
        if run is None:
            raise ValueError(f"mode {mode!r} is not learned; learned modes: {list(self._runs)}")
        return run

    def _restore_coverage(self, run: _Run) -> None:
        """Find the stretches of loaded samples as :meth:`add` did: same operations, same bits."""
        gap = GAP_FACTOR * self.config.sample_period_s
        times = run.t
        run.t = array("d")
        for k, t in enumerate(times):
            if k == 0 or t - times[k - 1] > gap:
                run.start_stretch(t)
            run.t.append(t)

    def _is_full(self, run: _Run) -> bool:
        if not run.t:
            return False
        return len(run.t) >= self.config.max_samples or run.coverage_s() >= self.config.span_s


# -- plain-data helpers ----------------------------------------------------------

_BASELINE_KEYS = {
    "format",
    "version",
    "mode",
    "order",
    "sample_period_s",
    "method",
    "alpha",
    "theta",
    "covariance",
    "sigma2",
    "fit_percent",
    "window_start_s",
    "window_end_s",
    "n_samples",
    "criterion",
    "candidates",
    "readout",
}

_READOUT_KEYS = {
    "gains",
    "offset",
    "poles",
    "dominant_pole",
    "stable",
    "integrating",
    "time_constant_s",
    "natural_frequency_rad_s",
    "damped_frequency_rad_s",
    "damping_ratio",
    "dead_times_s",
    "notes",
}

_CANDIDATE_KEYS = {"order", "aic", "bic", "fpe", "rss", "n_params", "fit_percent_validation"}


def _check_readout(readout: object, order: ArxOrder, sample_period_s: float) -> None:
    if not isinstance(readout, PhysicalReadout):
        raise ValueError(f"readout: expected a PhysicalReadout, got {type(readout).__name__}")
    if len(readout.gains) != order.n_inputs or len(readout.dead_times_s) != order.n_inputs:
        raise DimensionError(
            f"readout: expected {order.n_inputs} gain(s) and dead time(s), got "
            f"{len(readout.gains)} and {len(readout.dead_times_s)}"
        )
    if len(readout.poles) != order.na:
        raise DimensionError(f"readout: expected {order.na} pole(s), got {len(readout.poles)}")
    if (readout.offset is None) == order.constant:
        raise ValueError("readout: offset must be a number exactly when the order has a constant")
    if readout.sample_period_s != sample_period_s:
        raise ValueError(
            f"readout: made at sample period {readout.sample_period_s!r} s, the baseline has "
            f"{sample_period_s!r} s"
        )
    numbers = [
        *readout.gains,
        *(() if readout.offset is None else (readout.offset,)),
        readout.time_constant_s,
        readout.natural_frequency_rad_s,
        readout.damped_frequency_rad_s,
        readout.damping_ratio,
        *readout.dead_times_s,
        *(part for p in readout.poles for part in (p.real, p.imag)),
    ]
    if any(math.isinf(v) for v in numbers):
        raise ValueError("readout: values must be finite numbers or nan, found an infinity")


def _expect_header(data: dict[str, Any], fmt: str, versions: tuple[int, ...], where: str) -> None:
    if data["format"] != fmt:
        raise CodecError(f"{where}.format: expected {fmt!r}, got {data['format']!r}")
    if data["version"] not in versions or isinstance(data["version"], bool):
        readable = " and ".join(map(str, versions))
        raise CodecError(
            f"{where}.version: this build reads version{'s' if len(versions) > 1 else ''} "
            f"{readable}, got {data['version']!r}"
        )


def _encode_float(value: float) -> float | None:
    return None if math.isnan(value) else float(value)


def _number(value: Any, where: str, *, nullable: bool = False) -> float:
    if value is None and nullable:
        return math.nan
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        expected = "a number or null" if nullable else "a number"
        raise CodecError(f"{where}: expected {expected}, got {value!r}")
    number = float(value)
    if not math.isfinite(number):
        raise CodecError(f"{where}: expected a finite number, got {value!r}")
    return number


def _list(value: Any, length: int | None, where: str) -> list[Any]:
    if not isinstance(value, list):
        raise CodecError(f"{where}: expected a list, got {kind_of(value)}")
    if length is not None and len(value) != length:
        raise CodecError(f"{where}: expected {length} entries, got {len(value)}")
    return value


def _numbers(value: Any, length: int, where: str, *, nullable: bool = False) -> list[float]:
    if not isinstance(value, list):
        raise CodecError(f"{where}: expected a list of {length} numbers, got {kind_of(value)}")
    if len(value) != length:
        raise CodecError(f"{where}: expected {length} numbers, got {len(value)}")
    return [_number(v, f"{where}[{k}]", nullable=nullable) for k, v in enumerate(value)]


def _integer(value: Any, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise CodecError(f"{where}: expected an integer, got {value!r}")
    return value


def _string(value: Any, where: str) -> str:
    if not isinstance(value, str):
        raise CodecError(f"{where}: expected a string, got {value!r}")
    return value


def _optional_string(value: Any, where: str) -> str | None:
    return None if value is None else _string(value, where)


def _boolean(value: Any, where: str) -> bool:
    if not isinstance(value, bool):
        raise CodecError(f"{where}: expected true or false, got {value!r}")
    return value


def _decode_order(data: Any, where: str) -> ArxOrder:
    expect_keys(data, {"na", "nb", "nk", "constant"}, where)
    na = _integer(data["na"], f"{where}.na")
    nb = [
        _integer(v, f"{where}.nb[{k}]")
        for k, v in enumerate(_list(data["nb"], None, f"{where}.nb"))
    ]
    nk = [
        _integer(v, f"{where}.nk[{k}]")
        for k, v in enumerate(_list(data["nk"], None, f"{where}.nk"))
    ]
    constant = _boolean(data["constant"], f"{where}.constant")
    try:
        return ArxOrder(na=na, nb=tuple(nb), nk=tuple(nk), constant=constant)
    except OrderError as exc:
        raise CodecError(f"{where}: {exc}") from exc


def _encode_candidate(c: OrderCandidate) -> dict[str, Any]:
    return {
        "order": encode_order(c.order),
        "aic": c.aic,
        "bic": c.bic,
        "fpe": c.fpe,
        "rss": c.rss,
        "n_params": c.n_params,
        "fit_percent_validation": c.fit_percent_validation,
    }


def _decode_candidate(data: Any, where: str) -> OrderCandidate:
    expect_keys(data, _CANDIDATE_KEYS, where)
    fit = data["fit_percent_validation"]
    return OrderCandidate(
        order=_decode_order(data["order"], f"{where}.order"),
        aic=_number(data["aic"], f"{where}.aic"),
        bic=_number(data["bic"], f"{where}.bic"),
        fpe=_number(data["fpe"], f"{where}.fpe"),
        rss=_number(data["rss"], f"{where}.rss"),
        n_params=_integer(data["n_params"], f"{where}.n_params"),
        fit_percent_validation=None
        if fit is None
        else _number(fit, f"{where}.fit_percent_validation"),
    )


def _encode_pole(p: complex) -> list[float]:
    return [p.real, p.imag]


def _decode_pole(value: Any, where: str) -> complex:
    real, imag = _numbers(value, 2, where)
    return complex(real, imag)


def _encode_readout(r: PhysicalReadout) -> dict[str, Any]:
    return {
        "gains": [_encode_float(g) for g in r.gains],
        "offset": None if r.offset is None else _encode_float(r.offset),
        "poles": [_encode_pole(p) for p in r.poles],
        "dominant_pole": None if r.dominant_pole is None else _encode_pole(r.dominant_pole),
        "stable": r.stable,
        "integrating": r.integrating,
        "time_constant_s": _encode_float(r.time_constant_s),
        "natural_frequency_rad_s": _encode_float(r.natural_frequency_rad_s),
        "damped_frequency_rad_s": _encode_float(r.damped_frequency_rad_s),
        "damping_ratio": _encode_float(r.damping_ratio),
        "dead_times_s": [_encode_float(d) for d in r.dead_times_s],
        "notes": list(r.notes),
    }


def _decode_readout(
    data: Any, order: ArxOrder, sample_period_s: float, where: str
) -> PhysicalReadout:
    expect_keys(data, _READOUT_KEYS, where)
    m = order.n_inputs
    if order.constant:
        offset: float | None = _number(data["offset"], f"{where}.offset", nullable=True)
    elif data["offset"] is not None:
        raise CodecError(
            f"{where}.offset: expected null (the order has no constant), got {data['offset']!r}"
        )
    else:
        offset = None
    poles = [
        _decode_pole(p, f"{where}.poles[{k}]")
        for k, p in enumerate(_list(data["poles"], order.na, f"{where}.poles"))
    ]
    dominant = data["dominant_pole"]
    notes = _list(data["notes"], None, f"{where}.notes")
    return PhysicalReadout(
        gains=tuple(_numbers(data["gains"], m, f"{where}.gains", nullable=True)),
        offset=offset,
        poles=tuple(poles),
        dominant_pole=None
        if dominant is None
        else _decode_pole(dominant, f"{where}.dominant_pole"),
        stable=_boolean(data["stable"], f"{where}.stable"),
        integrating=_boolean(data["integrating"], f"{where}.integrating"),
        time_constant_s=_number(data["time_constant_s"], f"{where}.time_constant_s", nullable=True),
        natural_frequency_rad_s=_number(
            data["natural_frequency_rad_s"], f"{where}.natural_frequency_rad_s", nullable=True
        ),
        damped_frequency_rad_s=_number(
            data["damped_frequency_rad_s"], f"{where}.damped_frequency_rad_s", nullable=True
        ),
        damping_ratio=_number(data["damping_ratio"], f"{where}.damping_ratio", nullable=True),
        dead_times_s=tuple(
            _numbers(data["dead_times_s"], m, f"{where}.dead_times_s", nullable=True)
        ),
        sample_period_s=sample_period_s,
        notes=tuple(_string(s, f"{where}.notes[{k}]") for k, s in enumerate(notes)),
    )
