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
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.linalg import solve_toeplitz


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
        self._reference: list[float] = []
        self._phi: list[float] | None = None
        self._scale = 1.0
        self._past: list[float] = []

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
        if phi is None:
            self._reference.append(z)
            if len(self._reference) >= self.config.reference_samples:
                self._fit()
            return None
        past = self._past
        predicted = 0.0
        for coefficient, value in zip(phi, past, strict=False):
            predicted += coefficient * value
        if phi:
            past.insert(0, z)
            del past[len(phi) :]
        return (z - predicted) / self._scale

    def _fit(self) -> None:
        x = np.asarray(self._reference)
        p = self.config.ar_order
        x = x - x.mean()
        n = x.shape[0]
        acov = np.array([x[: n - lag] @ x[lag:] / n for lag in range(p + 1)])
        if p == 0 or acov[0] <= 0.0:
            phi = np.zeros(p)
        else:
            phi = solve_toeplitz(acov[:p], acov[1 : p + 1])
        innovation_var = float(acov[0] - phi @ acov[1 : p + 1]) if p else float(acov[0])
        self._phi = [float(v) for v in phi]
        self._scale = math.sqrt(innovation_var) if innovation_var > 0.0 else 1.0
        self._past = [float(v) for v in self._reference[::-1][:p]]
        self._reference = []

    def to_state(self) -> dict[str, Any]:
        """State as plain data, for checkpoints."""
        return {
            "reference": list(self._reference),
            "phi": None if self._phi is None else list(self._phi),
            "scale": self._scale,
            "past": list(self._past),
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore a state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the saved filter does not fit the configured order.
        """
        phi = state["phi"]
        if phi is not None and len(phi) != self.config.ar_order:
            raise ValueError(
                f"saved prewhitening filter has order {len(phi)}, config says "
                f"{self.config.ar_order}"
            )
        scale = float(state["scale"])
        if not (math.isfinite(scale) and scale > 0.0):
            raise ValueError(f"saved prewhitening scale must be positive, got {scale!r}")
        self._reference = [float(v) for v in state["reference"]]
        self._phi = None if phi is None else [float(v) for v in phi]
        self._scale = scale
        self._past = [float(v) for v in state["past"]]
