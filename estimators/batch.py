"""Many assets of one structure, updated in one vectorised call.

The per-asset kernel of :mod:`arxwatch.estimators.rls` is generated as
straight-line code; :class:`BatchRls` runs the same code with every state
entry a numpy array over assets (struct-of-arrays), so one Python-level step
updates thousands of assets and gives the numbers the per-asset path gives.
The vectorised kernel updates the state arrays in place, so it can run on
chunks of views of them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.rls import TRACE_CHECK_EVERY, RlsConfig, StateLayout, build_kernel

#: Most assets per kernel call. Smaller chunks keep the kernel's arrays in
#: cache, larger ones spread numpy's fixed cost per call (~0.5 us, ~230 calls
#: per step) over more assets. Measured at n = 6: one call is best at 10,000
#: assets; at 100,000 chunks of this size halve the time per asset.
CHUNK_ASSETS = 16384


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
    chunk : int, optional
        Most assets per kernel call (see :data:`CHUNK_ASSETS`); results do
        not depend on it.

    Raises
    ------
    DimensionError
        If ``n_assets`` is not an integer >= 1.
    ValueError
        If ``chunk`` is not an integer >= 1.

    Examples
    --------
    >>> batch = BatchRls(n_params=2, n_inputs=1, n_assets=3)
    >>> phi = np.array([[1.0, 0.5], [1.0, -0.5], [0.0, 1.0]])
    >>> out = batch.update(phi, np.array([1.0, 2.0, 3.0]), phi[:, 1:])
    >>> out.updated.tolist()
    [True, True, True]
    """

    def __init__(
        self,
        n_params: int,
        n_inputs: int,
        n_assets: int,
        config: RlsConfig | None = None,
        chunk: int = CHUNK_ASSETS,
    ) -> None:
        if isinstance(n_assets, bool) or not isinstance(n_assets, int) or n_assets < 1:
            raise DimensionError(f"n_assets must be an integer >= 1, got {n_assets!r}")
        if isinstance(chunk, bool) or not isinstance(chunk, int) or chunk < 1:
            raise ValueError(f"chunk must be an integer >= 1, got {chunk!r}")
        self.config = config if config is not None else RlsConfig()
        self.layout = StateLayout(n_params, n_inputs)
        self.n_assets = n_assets
        self._kernel = build_kernel(self.layout, self.config, "arrays")
        self._chunk = chunk
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
        # One contiguous row per regressor entry and input: the kernel's operands.
        phi_t = np.ascontiguousarray(phi_a.T)
        in_t = np.ascontiguousarray(in_a.T)
        # Reducing over the leading axis runs along whole rows: far faster
        # than over the short trailing axis of the (n_assets, n) input.
        finite = np.isfinite(y_a)
        finite &= np.isfinite(phi_t).all(axis=0)
        finite &= np.isfinite(in_t).all(axis=0)
        if active is None:
            mask, rejected = finite, ~finite
        else:
            wanted = _shaped(active, (count,), "active", bool)
            mask, rejected = wanted & finite, wanted & ~finite
        # The kernel checks trace(P) on updates 1, 1 + k, 1 + 2k, ...: where the
        # count before this update is a multiple of k. For a whole number x,
        # x / k is exact when k divides x and at least 1 / k from any whole
        # number otherwise, so comparing it to its floor equals the scalar
        # `x % k == 0` (numpy's remainder is ~6x slower).
        due = self._state[self.layout.n_updates] / TRACE_CHECK_EVERY
        check = due == np.floor(due)
        updated = np.zeros(count, dtype=bool)
        if mask.all():
            out = np.empty((4, count))
            self._run(self._state, phi_t, y_a, in_t, check, out, updated, None)
        else:
            out = np.full((4, count), np.nan)
            if mask.any():
                idx = np.flatnonzero(mask)
                sub = [a[idx] for a in self._state]
                self._run(sub, phi_t[:, idx], y_a[idx], in_t[:, idx], check[idx], out, updated, idx)
                for full, part in zip(self._state, sub, strict=True):
                    full[idx] = part
        innovation, normalised, weight, excitation = out
        return BatchStep(
            innovation, normalised, weight, excitation, updated=updated, rejected=rejected
        )

    def _run(
        self,
        state: list[NDArray[np.float64]],
        phi_t: NDArray[np.float64],
        y: NDArray[np.float64],
        inputs_t: NDArray[np.float64],
        check: NDArray[np.bool_],
        out: NDArray[np.float64],
        updated: NDArray[np.bool_],
        idx: NDArray[np.intp] | None,
    ) -> None:
        """Run the kernel over ``state`` chunk by chunk, scattering results to ``idx``.

        The kernel updates the arrays it is given in place, so a chunk of
        views writes straight into ``state``. Chunks keep the kernel's
        working set (state, inputs and temporaries) in cache.
        """
        size = len(y)
        # Equal chunks: a small remainder would pay the full cost per call.
        chunk = -(-size // -(-size // self._chunk))
        for lo in range(0, size, chunk):
            part = slice(lo, lo + chunk)
            _, e, nrm, w, upd, ex = self._kernel(
                [a[part] for a in state],
                list(phi_t[:, part]),
                y[part],
                list(inputs_t[:, part]),
                check[part],
            )
            dest = part if idx is None else idx[part]
            for row, values in zip(out, (e, nrm, w, ex), strict=True):
                row[dest] = values
            updated[dest] = upd

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
            raise DimensionError(f"asset state needs {self.layout.size} entries, got {len(state)}")
        for a, v in zip(self._state, state, strict=True):
            a[index] = v

    def _check_index(self, index: int) -> None:
        if not 0 <= index < self.n_assets:
            raise IndexError(f"asset index must be in [0, {self.n_assets}), got {index}")


def _shaped(
    value: ArrayLike, shape: tuple[int, ...], name: str, dtype: type = np.float64
) -> NDArray[np.float64]:
    arr: NDArray[np.float64] = np.asarray(value, dtype=dtype)
    if arr.shape != shape:
        raise DimensionError(f"{name} must have shape {shape}, got {arr.shape}")
    return arr
