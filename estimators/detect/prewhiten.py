r"""Prewhitening of residuals: an AR model learned on a fault-free reference.

An ARX model fitted to a plant whose sensor adds noise at the output leaves
residuals that are correlated even when nothing is wrong (equation-error
structure against output-error noise). CUSUM run lengths and whiteness tests
assume independent samples, so the residual ``z`` is first passed through
an autoregressive filter fitted on a reference stretch in which the asset is
taken to be fault-free:

.. math::

    \varepsilon(k) = \frac{z(k) - \sum_{i=1}^{p} \phi_i z(k-i)}{\sigma_\varepsilon}

with ``phi`` from the Yule-Walker equations and ``sigma_eps`` the
one-step error of that filter on the reference. Under the reference
behaviour ``epsilon`` is approximately white N(0, 1); a change of the
asset shows as a change of ``epsilon``.

Constant memory
---------------
The reference is not stored: the autocovariances the Yule-Walker equations
need follow exactly from ``2 p + 2`` running sums and the first and last
``p`` values (:mod:`arxwatch.estimators.detect._sums`), whatever the
reference length. This is what lets one process carry thousands of assets;
the column-wise monitor of the daemon runs the same arithmetic on arrays.

References
----------
D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed.,
Wiley, 2009, section 10.4 (control charts on the residuals of a time-series
model fitted to autocorrelated data).
G. E. P. Box, G. M. Jenkins and G. C. Reinsel, *Time Series Analysis:
Forecasting and Control*, 4th ed., Wiley, 2008, section 3.2 (Yule-Walker
estimates of an AR model).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.linalg import solve_toeplitz

from arxwatch.estimators.detect._sums import add_value, centred_sums

_STATE_VERSION = 2


@dataclass(frozen=True)
class PrewhitenConfig:
    """Settings of the prewhitening filter.

    Parameters
    ----------
    ar_order : int
        Order p of the AR filter, 0 to 10 (0 passes ``z`` through unchanged).
    reference_samples : int
        Samples collected before the filter is fitted; must exceed
        ``10 * ar_order`` (common practice, no source).
    """

    ar_order: int = 2
    reference_samples: int = 480

    def __post_init__(self) -> None:
        if isinstance(self.ar_order, bool) or not isinstance(self.ar_order, int):
            raise ValueError(f"ar_order must be an integer, got {self.ar_order!r}")
        if not 0 <= self.ar_order <= 10:
            raise ValueError(f"ar_order must be in [0, 10], got {self.ar_order}")
        if isinstance(self.reference_samples, bool) or not isinstance(self.reference_samples, int):
            raise ValueError(
                f"reference_samples must be an integer, got {self.reference_samples!r}"
            )
        if self.reference_samples <= 10 * max(self.ar_order, 1):
            raise ValueError(
                f"reference_samples must exceed 10 * ar_order = {10 * max(self.ar_order, 1)}, "
                f"got {self.reference_samples}"
            )


def fit_reference(
    sums: Sequence[float], head: Sequence[float], past: Sequence[float], count: int
) -> tuple[list[float], float]:
    """Yule-Walker AR coefficients and innovation scale from a reference's running sums.

    Parameters
    ----------
    sums, head, past : sequences of float
        As kept by :func:`arxwatch.estimators.detect._sums.add_value`.
    count : int
        Length n of the reference, > p.

    Returns
    -------
    phi : list of float, length p
        AR coefficients (zeros when the reference has no variance).
    scale : float
        Standard deviation of the one-step error of the filter on the
        reference; 1.0 when that is not positive.
    """
    p = len(head)
    gamma = centred_sums(np.array(sums), np.array(head), np.array(past), count) / float(count)
    if p == 0 or gamma[0] <= 0.0:
        phi = np.zeros(p)
    else:
        phi = solve_toeplitz(gamma[:p], gamma[1 : p + 1])
    innovation_var = float(gamma[0] - phi @ gamma[1 : p + 1]) if p else float(gamma[0])
    scale = math.sqrt(innovation_var) if innovation_var > 0.0 else 1.0
    return [float(v) for v in phi], scale


class Prewhitener:
    """AR prewhitening filter, fitted once on the first reference samples.

    Parameters
    ----------
    config : PrewhitenConfig, optional
        Settings.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> v = rng.normal(size=3000)
    >>> z = v[1:] - 0.8 * v[:-1]          # MA(1): correlated residuals
    >>> f = Prewhitener(PrewhitenConfig(ar_order=6, reference_samples=1000))
    >>> out = [f.update(float(x)) for x in z]
    >>> out[999] is None, out[1000] is not None
    (True, True)
    >>> white = np.array(out[1000:])
    >>> bool(abs(np.corrcoef(white[1:], white[:-1])[0, 1]) < 0.1)
    True
    """

    def __init__(self, config: PrewhitenConfig | None = None) -> None:
        self.config = config if config is not None else PrewhitenConfig()
        self.reset()

    def reset(self) -> None:
        """Forget the reference and the filter."""
        p = self.config.ar_order
        self._count = 0
        self._sums = [0.0] * (p + 2)
        self._head = [0.0] * p
        self._past = [0.0] * p
        self._phi: list[float] | None = None
        self._scale = 1.0

    def clone(self) -> Prewhitener:
        """Return an unfitted twin with the same settings."""
        return Prewhitener(self.config)

    @property
    def fitted(self) -> bool:
        """Whether the reference is complete and the filter in use."""
        return self._phi is not None

    def update(self, z: float) -> float | None:
        """Return the prewhitened residual, or None while collecting the reference.

        Raises
        ------
        ValueError
            If ``z`` is not finite.
        """
        if not math.isfinite(z):
            raise ValueError(f"z must be finite, got {z!r}")
        phi = self._phi
        past = self._past
        if phi is None:
            add_value(self._sums, self._head, past, self._count, z)
            self._count += 1
            if self._count >= self.config.reference_samples:
                self._phi, self._scale = fit_reference(self._sums, self._head, past, self._count)
            return None
        predicted = 0.0
        for coefficient, value in zip(phi, past, strict=True):
            predicted += coefficient * value
        if past:
            past.insert(0, z)
            del past[-1]
        return (z - predicted) / self._scale

    def to_state(self) -> dict[str, Any]:
        """State as plain data, for checkpoints."""
        return {
            "version": _STATE_VERSION,
            "count": self._count,
            "sums": list(self._sums),
            "head": list(self._head),
            "past": list(self._past),
            "phi": None if self._phi is None else list(self._phi),
            "scale": self._scale,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore a state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state has another version or does not fit the configured order.
        """
        if state.get("version") != _STATE_VERSION:
            raise ValueError(
                f"prewhitening state version must be {_STATE_VERSION}, got {state.get('version')!r}"
            )
        p = self.config.ar_order
        phi = state["phi"]
        lengths = {"sums": p + 2, "head": p, "past": p}
        for key, size in lengths.items():
            if len(state[key]) != size:
                raise ValueError(
                    f"saved prewhitening {key} has {len(state[key])} entries, "
                    f"order {p} needs {size}"
                )
        if phi is not None and len(phi) != p:
            raise ValueError(f"saved prewhitening filter has order {len(phi)}, config says {p}")
        scale = float(state["scale"])
        if not (math.isfinite(scale) and scale > 0.0):
            raise ValueError(f"saved prewhitening scale must be positive, got {scale!r}")
        count = int(state["count"])
        if count < 0:
            raise ValueError(f"saved prewhitening count must be >= 0, got {count}")
        self._count = count
        self._sums = [float(v) for v in state["sums"]]
        self._head = [float(v) for v in state["head"]]
        self._past = [float(v) for v in state["past"]]
        self._phi = None if phi is None else [float(v) for v in phi]
        self._scale = scale
