r"""Windowed Ljung–Box test of whether the innovations are still white.

A model that has lost part of the dynamics (a new lag, a slower valve, an
oscillating loop) leaves structure in its innovations. Over the last W
normalised innovations, demeaned, with sample autocorrelations

.. math::

    r_j = \frac{\sum_{t=j+1}^{W} x_t x_{t-j}}{\sum_{t=1}^{W} x_t^2},

the Ljung–Box statistic

.. math::

    Q = W (W + 2) \sum_{j=1}^{L} \frac{r_j^2}{W - j}

is approximately chi-square with L degrees of freedom for white noise; the
test rejects whiteness when the p-value ``chi2.sf(Q, L)`` is below alpha.
Q costs O(W L), so it is evaluated only every ``every`` samples; in between
the sample is just written into a ring buffer.

References
----------
G. M. Ljung and G. E. P. Box, "On a measure of lack of fit in time series
models", *Biometrika* 65 (1978), 297-303.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.stats import chi2

from arxwatch.estimators.detect._checks import (
    check_probability,
    check_setting,
    expect_state,
    is_int,
    state_floats,
    state_int,
)
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.errors import DimensionError

__all__ = ["Whiteness", "WhitenessConfig", "ljung_box"]

_NAME = "innovation_whiteness"


@dataclass(frozen=True)
class WhitenessConfig:
    """Settings of the windowed Ljung–Box test.

    Attributes
    ----------
    window : int
        Number W of most recent innovations tested, > lags. Default 240.
    lags : int
        Number L of autocorrelation lags, >= 1. Default 10.
    every : int
        Evaluate every this many samples once the window is full, >= 1.
        Default 60.
    alpha : float
        Significance level in (0, 1). Default 0.001.
    """

    window: int = 240
    lags: int = 10
    every: int = 60
    alpha: float = 0.001

    def __post_init__(self) -> None:
        owner = type(self).__name__
        check_setting(
            owner, "lags", self.lags, is_int(self.lags) and self.lags >= 1, "an integer >= 1"
        )
        check_setting(
            owner,
            "window",
            self.window,
            is_int(self.window) and self.window > self.lags,
            f"an integer > lags ({self.lags})",
        )
        check_setting(
            owner, "every", self.every, is_int(self.every) and self.every >= 1, "an integer >= 1"
        )
        check_probability(owner, "alpha", self.alpha)

    @property
    def threshold(self) -> float:
        """Critical value of Q, chi2.ppf(1 - alpha, lags)."""
        return float(chi2.ppf(1.0 - self.alpha, self.lags))


def ljung_box(x: ArrayLike, lags: int) -> float:
    """Ljung–Box Q of a series, demeaned, over lags 1..L.

    Parameters
    ----------
    x : array_like, shape (n,)
        Finite series, n > lags.
    lags : int
        Number of lags L, >= 1.

    Returns
    -------
    float
        Q; 0.0 for a constant series (no autocorrelation can be estimated).

    Raises
    ------
    DimensionError
        If ``x`` is not 1-D or has no more than ``lags`` entries.
    ValueError
        If ``lags`` is not an integer >= 1 or ``x`` holds a non-finite value.

    References
    ----------
    G. M. Ljung and G. E. P. Box, "On a measure of lack of fit in time
    series models", *Biometrika* 65 (1978), 297-303.

    Examples
    --------
    >>> round(ljung_box(np.array([1.0, -1.0, 1.0, -1.0, 1.0, -1.0]), 1), 4)
    6.6667
    """
    if not is_int(lags) or lags < 1:
        raise ValueError(f"lags must be an integer >= 1, got {lags!r}")
    arr = np.asarray(x, dtype=np.float64)
    if arr.ndim != 1 or arr.shape[0] <= lags:
        raise DimensionError(
            f"x must be 1-D with more than lags={lags} entries, got shape {arr.shape}"
        )
    if not np.isfinite(arr).all():
        raise ValueError("x must be finite")
    return _q_from(_autocorrelations(arr, lags), arr.shape[0])


def _autocorrelations(x: NDArray[np.float64], lags: int) -> list[float]:
    # Sample autocorrelations r_1..r_L of the demeaned series, normalised by
    # the lag-0 sum (as statsmodels.tsa.stattools.acf with adjusted=False).
    d = x - x.mean()
    denom = float(d @ d)
    if denom == 0.0:
        return [0.0] * lags
    return [float(d[j:] @ d[:-j]) / denom for j in range(1, lags + 1)]


def _q_from(r: list[float], n: int) -> float:
    return n * (n + 2) * math.fsum(rj * rj / (n - j) for j, rj in enumerate(r, start=1))


class Whiteness:
    """Windowed Ljung–Box whiteness test on normalised innovations.

    Parameters
    ----------
    config : WhitenessConfig, optional
        Settings; defaults W = 240, L = 10, every 60 samples, alpha = 0.001.

    Examples
    --------
    >>> det = Whiteness(WhitenessConfig(window=20, lags=2, every=5))
    >>> results = [det.update(float((-1) ** k)) for k in range(25)]
    >>> [k for k, ev in enumerate(results) if ev is not None]
    [19, 24]
    >>> results[19].alarm  # a sign flip every sample is far from white
    True

    References
    ----------
    G. M. Ljung and G. E. P. Box, "On a measure of lack of fit in time
    series models", *Biometrika* 65 (1978), 297-303.
    """

    __slots__ = ("config", "threshold", "_window", "_every", "_buffer", "_count")

    def __init__(self, config: WhitenessConfig | None = None) -> None:
        self.config = config if config is not None else WhitenessConfig()
        #: Critical value of Q, fixed by the settings.
        self.threshold = self.config.threshold
        self._window = self.config.window
        self._every = self.config.every
        self._buffer: NDArray[np.float64] = np.zeros(self._window, dtype=np.float64)
        self._count = 0

    def update(self, z: float) -> Evidence | None:
        """Take one normalised innovation; test when due.

        Parameters
        ----------
        z : float
            Normalised innovation (``StepResult.normalised``), finite.

        Returns
        -------
        Evidence or None
            None while the window fills and on samples that are not
            evaluated (so a caller counting evaluations sees each one once).
            Otherwise ``statistic`` Q, ``threshold`` chi2.ppf(1 - alpha, L),
            ``alarm`` when the p-value is below alpha; ``values``: ``q``,
            ``p_value``, ``lags``, ``window`` and
            ``max_abs_autocorrelation`` (over lags 1..L).

        Raises
        ------
        ValueError
            If ``z`` is not finite; the state is left untouched.
        """
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        count = self._count
        self._buffer[count % self._window] = z
        count += 1
        self._count = count
        past = count - self._window
        if past < 0 or past % self._every:
            return None
        return self._evaluate()

    def _evaluate(self) -> Evidence:
        lags = self.config.lags
        start = self._count % self._window
        x = np.concatenate((self._buffer[start:], self._buffer[:start]))
        r = _autocorrelations(x, lags)
        q = _q_from(r, self._window)
        p_value = float(chi2.sf(q, lags))
        max_r = max(abs(rj) for rj in r)
        return Evidence(
            detector=_NAME,
            family="behaviour",
            statistic=q,
            threshold=self.threshold,
            alarm=p_value < self.config.alpha,
            signal="innovation",
            values={
                "q": q,
                "p_value": p_value,
                "lags": float(lags),
                "window": float(self._window),
                "max_abs_autocorrelation": max_r,
            },
        )

    def reset(self) -> None:
        """Empty the window."""
        self._buffer = np.zeros(self._window, dtype=np.float64)
        self._count = 0

    def clone(self) -> Whiteness:
        """Return an untrained twin with the same settings."""
        return Whiteness(self.config)

    def to_state(self) -> dict[str, Any]:
        """Learned state as plain JSON-safe data (the ring buffer and sample count)."""
        return {
            "detector": _NAME,
            "buffer": [float(v) for v in self._buffer],
            "count": self._count,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, has missing or
            unknown keys, a buffer whose length differs from ``window`` or
            holds non-finite values, or a negative count.
        """
        data = expect_state(state, _NAME, ("buffer", "count"))
        buffer = state_floats(data, _NAME, "buffer", self._window)
        count = state_int(data, _NAME, "count")
        self._buffer = np.array(buffer, dtype=np.float64)
        self._count = count
