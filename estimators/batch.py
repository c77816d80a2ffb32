"""Many assets of one structure, updated in one vectorised call.

The per-asset kernel of :mod:`arxwatch.estimators.rls` is generated as
straight-line code; :class:`BatchRls` runs the same code with every state
entry a numpy array over assets (struct-of-arrays), so one Python-level step
updates thousands of assets and gives the numbers the per-asset path gives.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.rls import TRACE_CHECK_EVERY, RlsConfig, StateLayout, build_kernel


@dataclass(frozen=True)
class BatchStep:
    """Per-asset results of one batched update; NaN where an asset sat out.

    Attributes
    ----------
    innovation, normalised, weight, excitation : ndarray, shape (n_assets,)
        As in :class:`arxwatch.estimators.estimator.StepResult`.
    updated : ndarray of bool, shape (n_assets,)
        Which assets changed their estimate (active, finite and not frozen by
        the excitation gate).
    rejected : ndarray of bool, shape (n_assets,)
        Active assets whose sample held a non-finite value.
    """

    innovation: NDArray[np.float64]
    normalised: NDArray[np.float64]
    weight: NDArray[np.float64]
    excitation: NDArray[np.float64]
    updated: NDArray[np.bool_]
    rejected: NDArray[np.bool_]


class BatchRls:
    """RLS state of ``n_assets`` models with the same size and settings.

    Parameters
    ----------
    n_params : int
        Parameters per model.
    n_inputs : int
        Inputs whose excitation each model tracks.
    n_assets : int
        Number of models, >= 1.
    config : RlsConfig, optional
        Shared settings.

    Examples
    --------
    >>> batch = BatchRls(n_params=2, n_inputs=1, n_assets=3)
    >>> phi = np.array([[1.0, 0.5], [1.0, -0.5], [0.0, 1.0]])
    >>> out = batch.update(phi, np.array([1.0, 2.0, 3.0]), phi[:, 1:])
    >>> out.updated.tolist()
    [True, True, True]
    """

    def __init__(
        self, n_params: int, n_inputs: int, n_assets: int, config: RlsConfig | None = None
    ) -> None:
        if isinstance(n_assets, bool) or not isinstance(n_assets, int) or n_assets < 1:
            raise DimensionError(f"n_assets must be an integer >= 1, got {n_assets!r}")
        self.config = config if config is not None else RlsConfig()
        self.layout = StateLayout(n_params, n_inputs)
        self.n_assets = n_assets
        self._kernel = build_kernel(self.layout, self.config, vectorised=True)
        initial = self.layout.initial(self.config.p0)
        self._state: list[NDArray[np.float64]] = [np.full(n_assets, v) for v in initial]

    @property
    def state_bytes_per_asset(self) -> int:
        """Memory held per asset by the state arrays."""
        return sum(a.itemsize for a in self._state)

    @property
    def theta(self) -> NDArray[np.float64]:
        """Parameter estimates, shape (n_assets, n_params) (a copy)."""
        return np.stack(self._state[self.layout.theta], axis=1)

    def update(
        self,
        phi: ArrayLike,
        y: ArrayLike,
        inputs: ArrayLike,
        active: ArrayLike | None = None,
    ) -> BatchStep:
        """Update every active asset with its sample.

        Parameters
        ----------
        phi : array_like, shape (n_assets, n_params)
            Regressors, one row per asset.
        y : array_like, shape (n_assets,)
            Measured outputs.
        inputs : array_like, shape (n_assets, n_inputs)
            Current inputs, for the excitation measure.
        active : array_like of bool, shape (n_assets,), optional
            Assets that have a sample this step; default all.

        Returns
        -------
        BatchStep
            Per-asset results; assets not updated are left untouched.

        Raises
        ------
        DimensionError
            If a shape disagrees with the batch.
        """
        n, m, count = self.layout.n_params, self.layout.n_inputs, self.n_assets
        phi_a = _shaped(phi, (count, n), "phi")
        y_a = _shaped(y, (count,), "y")
        in_a = _shaped(inputs, (count, m), "inputs")
        mask = np.ones(count, dtype=bool) if active is None else _shaped(active, (count,), "active", bool)
        finite = np.isfinite(y_a) & np.isfinite(phi_a).all(axis=1) & np.isfinite(in_a).all(axis=1)
        rejected = mask & ~finite
        mask = mask & finite
        out = [np.full(count, np.nan) for _ in range(5)]
        state = self._state
        # The kernel checks trace(P) on the sample that makes n_seen a multiple.
        check = (state[self.layout.n_seen] + 1.0) % TRACE_CHECK_EVERY == 0.0
        if mask.all():
            self._run(state, phi_a.T, y_a, in_a.T, check, out, None)
        elif mask.any():
            idx = np.flatnonzero(mask)
            sub = [a[idx] for a in state]
            self._run(sub, phi_a[idx].T, y_a[idx], in_a[idx].T, check[idx], out, idx)
            for full, part in zip(state, sub, strict=True):
                full[idx] = part
        innovation, normalised, weight, excitation, gate = out
        return BatchStep(innovation, normalised, weight, excitation,
                         updated=mask & (gate > 0.0), rejected=rejected)

    def _run(
        self,
        state: list[NDArray[np.float64]],
        phi_t: NDArray[np.float64],
        y: NDArray[np.float64],
        inputs_t: NDArray[np.float64],
        check: NDArray[np.bool_],
        out: list[NDArray[np.float64]],
        idx: NDArray[np.intp] | None,
    ) -> None:
        rows = list(np.ascontiguousarray(phi_t))
        ins = list(np.ascontiguousarray(inputs_t))
        results = self._kernel(state, rows, y, ins, check)
        for dest, values in zip(out, results, strict=True):
            if idx is None:
                dest[:] = values
            else:
                dest[idx] = values

    def get_asset(self, index: int) -> list[float]:
        """Flat state of one asset (the per-asset layout), a copy."""
        self._check_index(index)
        return [float(a[index]) for a in self._state]

    def set_asset(self, index: int, state: list[float]) -> None:
        """Overwrite one asset's state with a flat per-asset state.

        Raises
        ------
        DimensionError
            If the state has the wrong length.
        """
        self._check_index(index)
        if len(state) != self.layout.size:
            raise DimensionError(
                f"asset state needs {self.layout.size} entries, got {len(state)}"
            )
        for a, v in zip(self._state, state, strict=True):
            a[index] = v

    def _check_index(self, index: int) -> None:
        if not 0 <= index < self.n_assets:
            raise IndexError(f"asset index must be in [0, {self.n_assets}), got {index}")


def _shaped(
    value: ArrayLike, shape: tuple[int, ...], name: str, dtype: type = np.float64
) -> NDArray[np.float64]:
    arr = np.asarray(value, dtype=dtype)
    if arr.shape != shape:
        raise DimensionError(f"{name} must have shape {shape}, got {arr.shape}")
    return arr
