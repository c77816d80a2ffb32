r"""Innovation variance change: exponentially weighted moving variance (EWMV).

A fouled sensor, a loose linkage or a hunting loop makes the innovations
noisier; a stuck or over-filtered signal makes them quieter. With normalised
innovations z(k) ~ N(0, 1) in control, the EWMV

.. math::

    S_k = (1 - \lambda) S_{k-1} + \lambda z_k^2, \qquad S_0 = 1,

estimates the ratio of the current to the baseline innovation variance.
MacGregor and Harris approximate its distribution by a scaled chi-square
matching the first two moments: in control E[S] = 1 and
Var[S] -> 2 lambda / (2 - lambda), so

.. math::

    S \approx \chi^2_\nu / \nu, \qquad \nu = (2 - \lambda) / \lambda,

and the limits are :math:`\chi^2_{\nu, 1-\alpha} / \nu` (upper) and
:math:`\chi^2_{\nu, \alpha} / \nu` (lower). ``alpha`` is the nominal
probability that the stationary statistic lies beyond one limit at a given
sample; successive values are strongly correlated, so the false-alarm rate
per sample is lower than alpha and the run length far longer than 1/alpha.
The approximation matches two moments only, so its far tail is rough: by
simulation (lambda = 0.05) the stationary S exceeds the upper limit about
1.1 % of the time for alpha = 0.01 but about 0.17 % for alpha = 0.001. Where
the false-alarm rate matters, calibrate alpha on baseline data.

Starting from S_0 = 1 the early statistic varies less than the stationary
one, so the limits are conservative during the first ~2/lambda samples.

References
----------
J. F. MacGregor and T. J. Harris, "The exponentially weighted moving
variance", *Journal of Quality Technology* 25 (1993), 106-118.

D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed.,
Wiley, 2009, section 9.2 (the EWMA control chart).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from scipy.stats import chi2

from arxwatch.estimators.detect._checks import (
    check_probability,
    check_setting,
    expect_state,
    is_real,
    state_float,
)
from arxwatch.estimators.detect.evidence import Evidence

__all__ = ["VarianceChange", "VarianceConfig"]

_NAME = "innovation_variance"


@dataclass(frozen=True)
class VarianceConfig:
    """Settings of the EWMV variance detector.

    Attributes
    ----------
    lam : float
        EWMA weight lambda in (0, 1]; the memory is about 2/lambda samples.
        Default 0.05 (nu = 39 equivalent degrees of freedom).
    alpha : float
        Nominal tail probability of each limit, in (0, 1). Default 0.001.
    lower : bool
        Also test for a decrease of the variance (lower limit). Default
        False.
    """

    lam: float = 0.05
    alpha: float = 0.001
    lower: bool = False

    def __post_init__(self) -> None:
        owner = type(self).__name__
        check_setting(
            owner,
            "lam",
            self.lam,
            is_real(self.lam) and 0.0 < self.lam <= 1.0,
            "a number in (0, 1]",
        )
        check_probability(owner, "alpha", self.alpha)
        check_setting(owner, "lower", self.lower, isinstance(self.lower, bool), "a bool")

    @property
    def dof(self) -> float:
        """Equivalent degrees of freedom nu = (2 - lambda) / lambda."""
        return (2.0 - self.lam) / self.lam

    @property
    def upper_limit(self) -> float:
        """Upper limit of S, chi2.ppf(1 - alpha, nu) / nu."""
        nu = self.dof
        return float(chi2.ppf(1.0 - self.alpha, nu)) / nu

    @property
    def lower_limit(self) -> float:
        """Lower limit of S, chi2.ppf(alpha, nu) / nu (used when ``lower``)."""
        nu = self.dof
        return float(chi2.ppf(self.alpha, nu)) / nu


class VarianceChange:
    """EWMV detector of a change in the innovation variance.

    Parameters
    ----------
    config : VarianceConfig, optional
        Settings; defaults lambda = 0.05, alpha = 0.001, upper limit only.

    Examples
    --------
    >>> det = VarianceChange()
    >>> round(det.upper_limit, 4)
    1.8476
    >>> ev = None
    >>> for _ in range(30):
    ...     ev = det.update(2.0)  # four times the baseline variance
    >>> ev.alarm, ev.detail, round(ev.values["sigma_ratio"], 3)
    (True, 'high', 1.832)

    References
    ----------
    J. F. MacGregor and T. J. Harris, "The exponentially weighted moving
    variance", *Journal of Quality Technology* 25 (1993), 106-118.
    """

    __slots__ = ("config", "upper_limit", "lower_limit", "_lam", "_keep", "_s")

    def __init__(self, config: VarianceConfig | None = None) -> None:
        self.config = config if config is not None else VarianceConfig()
        #: Limits of S, fixed by the settings (computed once: scipy is slow per sample).
        self.upper_limit = self.config.upper_limit
        self.lower_limit = self.config.lower_limit
        self._lam = float(self.config.lam)
        self._keep = 1.0 - self._lam
        self._s = 1.0

    def update(self, z: float) -> Evidence:
        """Take one normalised innovation and test the variance ratio.

        Parameters
        ----------
        z : float
            Normalised innovation (``StepResult.normalised``), finite.

        Returns
        -------
        Evidence
            Detail ``"high"``: ``statistic`` is S, ``threshold`` the upper
            limit. With ``lower`` set and S < 1, detail ``"low"``:
            ``statistic`` is 1/S and ``threshold`` 1/lower limit, so both
            sides read "at or above the threshold is an alarm".
            ``values``: ``variance_ratio`` (S), ``sigma_ratio`` (sqrt S,
            current over baseline innovation sigma), ``upper_limit`` and,
            with ``lower``, ``lower_limit``.

        Raises
        ------
        ValueError
            If ``z`` is not finite; the state is left untouched.
        """
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        s = self._keep * self._s + self._lam * z * z
        self._s = s
        values = {"variance_ratio": s, "sigma_ratio": math.sqrt(s), "upper_limit": self.upper_limit}
        if self.config.lower:
            values["lower_limit"] = self.lower_limit
            if s < 1.0:
                statistic = 1.0 / s if s > 0.0 else math.inf
                threshold = 1.0 / self.lower_limit
                return Evidence(
                    detector=_NAME,
                    family="behaviour",
                    statistic=statistic,
                    threshold=threshold,
                    alarm=statistic >= threshold,
                    signal="innovation",
                    values=values,
                    detail="low",
                )
        return Evidence(
            detector=_NAME,
            family="behaviour",
            statistic=s,
            threshold=self.upper_limit,
            alarm=s >= self.upper_limit,
            signal="innovation",
            values=values,
            detail="high",
        )

    @property
    def variance_ratio(self) -> float:
        """Current S: estimated ratio of current to baseline innovation variance."""
        return self._s

    def reset(self) -> None:
        """Back to S = 1 (the baseline variance)."""
        self._s = 1.0

    def clone(self) -> VarianceChange:
        """Return an untrained twin with the same settings."""
        return VarianceChange(self.config)

    def to_state(self) -> dict[str, Any]:
        """Learned state as plain JSON-safe data."""
        return {"detector": _NAME, "s": self._s}

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, has missing or
            unknown keys, or S is negative or not finite.
        """
        data = expect_state(state, _NAME, ("s",))
        self._s = state_float(data, _NAME, "s", minimum=0.0)
