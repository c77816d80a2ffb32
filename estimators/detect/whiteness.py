r"""Ljung–Box test, block by block, of whether the innovations are still white.

A model that has lost part of the dynamics (a new lag, a slower valve, an
oscillating loop) leaves structure in its innovations. The normalised
innovations are cut into consecutive blocks of W samples; for each block,
demeaned, with sample autocorrelations

.. math::

    r_j = \frac{\sum_{t=j+1}^{W} x_t x_{t-j}}{\sum_{t=1}^{W} x_t^2},

the Ljung–Box statistic

.. math::

    Q = W (W + 2) \sum_{j=1}^{L} \frac{r_j^2}{W - j}

is approximately chi-square with L degrees of freedom for white noise; the
test rejects whiteness when the p-value ``chi2.sf(Q, L)`` is below alpha.
Each block is tested once, when it is complete, so successive evaluations
are independent under the null hypothesis.

A caller with a clock may also tie blocks to periods of sample time
(:meth:`Whiteness.enter_period`): a block then holds the samples of one
period, at most W, and a block left short by missing samples is tested
with its own n (the formula above with n for W) when the next period
starts, if it holds at least half the window; a shorter one is dropped.
Blocks tied to the clock end at the same sample time for every asset that
shares the period, so a monitor of many assets tests them together.

The block is not stored: its centred lag products follow exactly from
running sums (:mod:`arxwatch.estimators.detect._sums`), so the detector
holds ``3 L + 2`` numbers whatever W is. That keeps thousands of assets in
one process; the column-wise monitor of the daemon runs the same arithmetic.

References
----------
G. M. Ljung and G. E. P. Box, "On a measure of lack of fit in time series
models", *Biometrika* 65 (1978), 297-303.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import chdtrc
from scipy.stats import chi2

from arxwatch.estimators.detect._checks import (
    check_probability,
    check_setting,
    expect_state,
    is_int,
    state_floats,
    state_int,
)
from arxwatch.estimators.detect._sums import add_value, centred_sums
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.errors import DimensionError

__all__ = [
    "Whiteness",
    "WhitenessConfig",
    "block_evidence",
    "block_statistics",
    "evidence_of_block",
    "ljung_box",
]

_NAME = "innovation_whiteness"


@dataclass(frozen=True)
class WhitenessConfig:
    """Settings of the windowed Ljung–Box test.

    Attributes
    ----------
    window : int
        Block length W: innovations per test, > lags. Default 240.
    lags : int
        Number L of autocorrelation lags, >= 1. Default 10.
    alpha : float
        Significance level in (0, 1). Default 0.001.
    """

    window: int = 240
    lags: int = 10
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
        check_probability(owner, "alpha", self.alpha)

    @property
    def threshold(self) -> float:
        """Critical value of Q, chi2.ppf(1 - alpha, lags)."""
        return float(chi2.ppf(1.0 - self.alpha, self.lags))

    @property
    def shortest_block(self) -> int:
        """Fewest samples a block cut short by its period must hold to be tested.

        Half the window, rounded up, and more than ``lags`` (Q needs n > L);
        the half is common practice, no source: fewer samples make the
        chi-square approximation of Q rough and say little about the period.
        """
        return max((self.window + 1) // 2, self.lags + 1)


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
    """Ljung–Box whiteness test on consecutive blocks of normalised innovations.

    Parameters
    ----------
    config : WhitenessConfig, optional
        Settings; defaults W = 240, L = 10, alpha = 0.001.

    Examples
    --------
    >>> det = Whiteness(WhitenessConfig(window=20, lags=2))
    >>> results = [det.update(float((-1) ** k)) for k in range(40)]
    >>> [k for k, ev in enumerate(results) if ev is not None]
    [19, 39]
    >>> results[19].alarm  # a sign flip every sample is far from white
    True

    References
    ----------
    G. M. Ljung and G. E. P. Box, "On a measure of lack of fit in time
    series models", *Biometrika* 65 (1978), 297-303.
    """

    __slots__ = ("config", "threshold", "_count", "_sums", "_head", "_past", "_period")

    def __init__(self, config: WhitenessConfig | None = None) -> None:
        self.config = config if config is not None else WhitenessConfig()
        #: Critical value of Q, fixed by the settings.
        self.threshold = self.config.threshold
        self._period: int | None = None
        self.reset()

    def enter_period(self, period: int) -> Evidence | None:
        """Tell the test that the caller's clock is in block period ``period``.

        Call it before :meth:`update` for each sample, with the index of
        the period of W sample periods the sample falls in (for example
        ``floor(time / (W * sample period))``). When the open block belongs
        to another period, it is complete: it is tested with its own n if
        it holds at least ``config.shortest_block`` samples (otherwise it is
        dropped), and an empty block starts for ``period``.

        Returns
        -------
        Evidence or None
            The evidence of the block tested (as :meth:`update` at a block
            end, ``samples`` below ``window``), or None.
        """
        if period == self._period:
            return None
        evidence = None
        if self._count >= self.config.shortest_block:
            evidence = self._test()
        self.reset()
        self._period = period
        return evidence

    def update(self, z: float) -> Evidence | None:
        """Take one normalised innovation; test the block when it is complete.

        Parameters
        ----------
        z : float
            Normalised innovation (``StepResult.normalised``), finite.

        Returns
        -------
        Evidence or None
            None while a block fills (so a caller counting evaluations sees
            each block once). At the block's last sample: ``statistic`` Q,
            ``threshold`` chi2.ppf(1 - alpha, L), ``alarm`` when the p-value
            is below alpha; ``values``: ``q``, ``p_value``, ``lags``,
            ``window``, ``samples`` (the block's n) and
            ``max_abs_autocorrelation`` (over lags 1..L).
            The next sample starts a new block.

        Raises
        ------
        ValueError
            If ``z`` is not finite; the state is left untouched.
        """
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        add_value(self._sums, self._head, self._past, self._count, z)
        self._count += 1
        if self._count < self.config.window:
            return None
        evidence = self._test()
        self.reset()
        return evidence

    def _test(self) -> Evidence:
        centred = centred_sums(
            np.array(self._sums), np.array(self._head), np.array(self._past), self._count
        )
        return block_evidence(self.config, self.threshold, centred.tolist(), self._count)

    def reset(self) -> None:
        """Start a new, empty block (in the same period, if one was entered)."""
        lags = self.config.lags
        self._count = 0
        self._sums = [0.0] * (lags + 2)
        self._head = [0.0] * lags
        self._past = [0.0] * lags

    def clone(self) -> Whiteness:
        """Return an untrained twin with the same settings."""
        return Whiteness(self.config)

    def to_state(self) -> dict[str, Any]:
        """Learned state as plain JSON-safe data (the open block's running sums and period)."""
        return {
            "detector": _NAME,
            "count": self._count,
            "sums": list(self._sums),
            "head": list(self._head),
            "past": list(self._past),
            "period": self._period,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, has missing or
            unknown keys, sums of the wrong length or non-finite values, or
            a count outside [0, window), or a period that is neither null
            nor an integer.
        """
        data = expect_state(state, _NAME, ("count", "sums", "head", "past", "period"))
        lags = self.config.lags
        count = state_int(data, _NAME, "count")
        if count >= self.config.window:
            raise ValueError(
                f"{_NAME} state: count must be below window={self.config.window}, got {count}"
            )
        period = data["period"]
        if period is not None and not is_int(period):
            raise ValueError(f"{_NAME} state: period must be null or an integer, got {period!r}")
        self._sums = state_floats(data, _NAME, "sums", lags + 2)
        self._head = state_floats(data, _NAME, "head", lags)
        self._past = state_floats(data, _NAME, "past", lags)
        self._count = count
        self._period = None if period is None else int(period)


def block_statistics(
    config: WhitenessConfig, centred: NDArray[np.float64], samples: NDArray[Any]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Ljung–Box Q, its p-value and the autocorrelations of complete blocks.

    Parameters
    ----------
    config : WhitenessConfig
        Settings (L).
    centred : ndarray, shape (L + 1, k)
        Centred lag sums ``C_0 .. C_L`` of k blocks, from
        :func:`arxwatch.estimators.detect._sums.centred_sums`.
    samples : ndarray, shape (k,)
        Each block's length n (> L): W, or fewer for a block its period cut short.

    Returns
    -------
    q, p_value : ndarray, shape (k,)
        The statistic (0 for a constant block) and ``chi2.sf(q, L)``.
    r : ndarray, shape (L, k)
        Autocorrelations r_1 .. r_L.

    Notes
    -----
    Element-wise arithmetic with the sum over lags in a fixed order, so a
    block's numbers do not depend on the other blocks.
    """
    lags, n = config.lags, samples.astype(np.float64)
    denom = centred[0]
    constant = denom <= 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(constant, 0.0, centred[1:] / np.where(constant, 1.0, denom))
    total = np.zeros(centred.shape[1])
    for j in range(1, lags + 1):
        total = total + r[j - 1] * r[j - 1] / (n - j)
    q = n * (n + 2.0) * total
    # chi2.sf(q, L) is chdtrc(L, q) (scipy computes it so), without the
    # distribution object's ~60 us of argument handling per call
    p_value = np.asarray(chdtrc(lags, q), dtype=np.float64)
    return q, p_value, r


def block_evidence(
    config: WhitenessConfig, threshold: float, centred: Sequence[float], samples: int
) -> Evidence:
    """Evidence of one complete block from its centred lag sums ``C_0 .. C_L``.

    Parameters
    ----------
    config : WhitenessConfig
        Settings (W, L, alpha).
    threshold : float
        ``config.threshold``, computed once by the caller (scipy is slow).
    centred : sequence of float, length L + 1
        From :func:`arxwatch.estimators.detect._sums.centred_sums`.
    samples : int
        The block's length n (> L).

    Returns
    -------
    Evidence
        As :meth:`Whiteness.update` at a block end.
    """
    q, p_value, r = block_statistics(
        config, np.asarray(centred, dtype=np.float64)[:, None], np.array([samples])
    )
    return evidence_of_block(config, threshold, float(q[0]), float(p_value[0]), r[:, 0], samples)


def evidence_of_block(
    config: WhitenessConfig,
    threshold: float,
    q: float,
    p_value: float,
    r: NDArray[np.float64],
    samples: int,
) -> Evidence:
    """Evidence of one block of ``samples`` values from :func:`block_statistics`' numbers for it."""
    return Evidence(
        detector=_NAME,
        family="behaviour",
        statistic=q,
        threshold=threshold,
        alarm=p_value < config.alpha,
        signal="innovation",
        values={
            "q": q,
            "p_value": p_value,
            "lags": float(config.lags),
            "window": float(config.window),
            "samples": float(samples),
            "max_abs_autocorrelation": float(np.max(np.abs(r))),
        },
    )
