r"""Two-sided tabular CUSUM on normalised innovations: offsets and biases.

While the model holds, the normalised innovations z(k) are ~N(0, 1). A
sensor bias or a new load shifts their mean; the tabular CUSUM accumulates
the excess over a reference value k on each side,

.. math::

    C^+_k = \max(0, C^+_{k-1} + z_k - k), \qquad
    C^-_k = \max(0, C^-_{k-1} - z_k - k),

and signals when either reaches the decision interval h. With k = 1/2 the
scheme is tuned to a shift of one standard deviation; h = 5 gives an
in-control average run length of about 465 samples for the two-sided scheme
(Montgomery, table of ARLs for the tabular CUSUM).

At a signal the size of the shift is estimated as
:math:`\hat\mu = k + C^+/N^+` (or :math:`-(k + C^-/N^-)`), where N counts
the consecutive samples that side has been non-zero: the average excess of
z over k since the side last left zero, in sigma units.

A noisier sensor is not a mean shift, but on z ~ N(0, s^2) with s > 1 the
scheme above signals within tens of samples. With ``noise_lam`` > 0 each z is
first divided by the current noise level when that exceeds the calibrated
one, :math:`z_k / \sqrt{\max(1, v_k)}`, where

.. math::

    v_k = (1 - \lambda) v_{k-1} + \lambda (z_k - z_{k-1})^2 / 2

is an exponentially weighted mean square successive difference (v_0 = 1).
For white z of variance s^2 it tends to s^2; a shift or a slow drift of the
mean, which is what the CUSUM looks for, cancels in the difference (von
Neumann et al., 1941), so v stays near 1 and the scheme keeps its
sensitivity to those. The scaling only ever widens the scheme: its
in-control run length on N(0, 1) data is at least the tabulated one.

References
----------
E. S. Page, "Continuous inspection schemes", *Biometrika* 41 (1954), 100-115.

D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed.,
Wiley, 2009, section 9.1 (the tabular CUSUM, estimating the shift, ARL table
for k = 1/2).

J. von Neumann, R. H. Kent, H. R. Bellinson and B. I. Hart, "The mean square
successive difference", *Ann. Math. Statist.* 12 (1941), 153-162 (cited from
memory).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal

from arxwatch.estimators.detect._checks import (
    check_setting,
    expect_state,
    is_real,
    state_float,
    state_int,
)
from arxwatch.estimators.detect.evidence import Evidence

__all__ = ["Cusum", "CusumConfig"]

_NAME = "innovation_mean"
_KEYS = ("c_high", "c_low", "n_high", "n_low")
#: State keys of the noise scaling; a state saved before it had none.
_NOISE_KEYS = ("previous", "noise")


@dataclass(frozen=True)
class CusumConfig:
    """Settings of the tabular CUSUM, in units of the innovation sigma.

    Attributes
    ----------
    k : float
        Reference value (allowance), >= 0; half the shift to detect fastest.
        Default 0.5 (tuned to a 1-sigma shift).
    h : float
        Decision interval, > 0. Default 5.0.
    after_alarm : {"restart", "hold"}
        ``"restart"`` (default, the usual practice once a signal has been
        reported): both sides return to zero after an alarm, so a persisting
        shift signals again every run length. ``"hold"``: the sums carry on,
        so the alarm stays raised while the shift lasts and clears once the
        side drains below h.
    noise_lam : float
        Forgetting factor of the successive-difference noise level that
        divides the input while it exceeds 1 (see the module notes), in
        [0, 1). Default 0.0: off, the plain tabular CUSUM.
    """

    k: float = 0.5
    h: float = 5.0
    after_alarm: Literal["restart", "hold"] = "restart"
    noise_lam: float = 0.0

    def __post_init__(self) -> None:
        owner = type(self).__name__
        check_setting(owner, "k", self.k, is_real(self.k) and self.k >= 0.0, "a finite number >= 0")
        check_setting(owner, "h", self.h, is_real(self.h) and self.h > 0.0, "a finite number > 0")
        check_setting(
            owner,
            "after_alarm",
            self.after_alarm,
            self.after_alarm in ("restart", "hold"),
            "'restart' or 'hold'",
        )
        check_setting(
            owner,
            "noise_lam",
            self.noise_lam,
            is_real(self.noise_lam) and 0.0 <= self.noise_lam < 1.0,
            "a finite number in [0, 1)",
        )


class Cusum:
    """Two-sided tabular CUSUM detector for the mean of normalised innovations.

    Parameters
    ----------
    config : CusumConfig, optional
        Settings; defaults k = 0.5, h = 5, restart after an alarm.

    Examples
    --------
    >>> det = Cusum()
    >>> ev = None
    >>> for _ in range(4):
    ...     ev = det.update(2.0)
    >>> ev.statistic, ev.alarm, ev.detail, ev.values["shift_sigma"]
    (6.0, True, 'high', 2.0)
    >>> det.update(0.0).statistic  # restarted after the alarm
    0.0

    References
    ----------
    D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed.,
    Wiley, 2009, section 9.1.

    E. S. Page, "Continuous inspection schemes", *Biometrika* 41 (1954),
    100-115.
    """

    __slots__ = (
        "config",
        "_k",
        "_h",
        "_restart",
        "_lam",
        "_c_high",
        "_c_low",
        "_n_high",
        "_n_low",
        "_previous",
        "_noise",
    )

    def __init__(self, config: CusumConfig | None = None) -> None:
        self.config = config if config is not None else CusumConfig()
        self._k = float(self.config.k)
        self._h = float(self.config.h)
        self._restart = self.config.after_alarm == "restart"
        self._lam = float(self.config.noise_lam)
        self._c_high = 0.0
        self._c_low = 0.0
        self._n_high = 0
        self._n_low = 0
        self._previous = math.nan  # the last input; nan before the first
        self._noise = 1.0

    def update(self, z: float) -> Evidence:
        """Take one normalised innovation and report the larger side.

        Parameters
        ----------
        z : float
            Normalised innovation (``StepResult.normalised``), finite.

        Returns
        -------
        Evidence
            ``statistic`` is max(C+, C-) at this sample (before any restart),
            ``threshold`` is h, ``detail`` ``"high"`` or ``"low"`` names the
            larger side (``"high"`` on a tie). ``values``: ``c_high``,
            ``c_low``, ``samples_since_zero`` (N of the reported side),
            ``shift_sigma``, the signed shift estimate of that side in
            units of the scaled input (0.0 while the side is zero), and
            ``noise_scale``, what z was divided by (1.0 unless the noise
            level exceeds 1; multiply ``shift_sigma`` by it for units of z).

        Raises
        ------
        ValueError
            If ``z`` is not finite; the state is left untouched.
        """
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        previous, self._previous = self._previous, z
        if previous == previous:  # not nan: there is a last input
            d = z - previous
            lam = self._lam
            self._noise = (1.0 - lam) * self._noise + lam * (0.5 * (d * d))
        noise = self._noise
        scale = math.sqrt(noise) if noise > 1.0 else 1.0
        z = z / scale
        k = self._k
        c_high = self._c_high + z - k
        if c_high > 0.0:
            self._c_high = c_high
            self._n_high += 1
        else:
            self._c_high = 0.0
            self._n_high = 0
        c_low = self._c_low - z - k
        if c_low > 0.0:
            self._c_low = c_low
            self._n_low += 1
        else:
            self._c_low = 0.0
            self._n_low = 0
        c_high, c_low = self._c_high, self._c_low
        if c_high >= c_low:
            statistic, n, detail = c_high, self._n_high, "high"
            shift = k + c_high / n if n else 0.0
        else:
            statistic, n, detail = c_low, self._n_low, "low"
            shift = -(k + c_low / n)
        alarm = statistic >= self._h
        if alarm and self._restart:
            self._zero_sides()
        return Evidence(
            detector=_NAME,
            family="behaviour",
            statistic=statistic,
            threshold=self._h,
            alarm=alarm,
            signal="innovation",
            values={
                "c_high": c_high,
                "c_low": c_low,
                "samples_since_zero": float(n),
                "shift_sigma": shift,
                "noise_scale": scale,
            },
            detail=detail,
        )

    def reset(self) -> None:
        """Forget everything: both sides back to zero, the noise level back to 1."""
        self._zero_sides()
        self._previous = math.nan
        self._noise = 1.0

    def _zero_sides(self) -> None:
        """Both sides back to zero (a restart after an alarm keeps the noise level)."""
        self._c_high = 0.0
        self._c_low = 0.0
        self._n_high = 0
        self._n_low = 0

    def clone(self) -> Cusum:
        """Return an untrained twin with the same settings."""
        return Cusum(self.config)

    def to_state(self) -> dict[str, Any]:
        """Learned state as plain JSON-safe data."""
        return {
            "detector": _NAME,
            "c_high": self._c_high,
            "c_low": self._c_low,
            "n_high": self._n_high,
            "n_low": self._n_low,
            "previous": None if math.isnan(self._previous) else self._previous,
            "noise": self._noise,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, has missing or
            unknown keys, negative sums or counts, or a side that is non-zero
            with a zero count (or the reverse).
        """
        # a state saved before the noise scaling lacks its keys: it starts afresh
        noise_keys = _NOISE_KEYS if isinstance(state, Mapping) and "noise" in state else ()
        data = expect_state(state, _NAME, (*_KEYS, *noise_keys))
        c_high = state_float(data, _NAME, "c_high", minimum=0.0)
        c_low = state_float(data, _NAME, "c_low", minimum=0.0)
        n_high = state_int(data, _NAME, "n_high")
        n_low = state_int(data, _NAME, "n_low")
        for side, c, n in (("high", c_high, n_high), ("low", c_low, n_low)):
            if (c > 0.0) != (n > 0):
                raise ValueError(
                    f"{_NAME} state: c_{side}={c!r} and n_{side}={n!r} disagree "
                    "(a side is non-zero exactly when its count is positive)"
                )
        previous, noise = math.nan, 1.0
        if noise_keys:
            noise = state_float(data, _NAME, "noise", minimum=0.0)
            if data["previous"] is not None:
                previous = state_float(data, _NAME, "previous")
        self._c_high, self._c_low, self._n_high, self._n_low = c_high, c_low, n_high, n_low
        self._previous, self._noise = previous, noise
