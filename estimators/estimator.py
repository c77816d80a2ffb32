"""One asset's live ARX model: regressor history plus the RLS state.

References
----------
R. D. Martin, "Robust methods for time series", in *Applied Time Series
Analysis II*, D. F. Findley (ed.), Academic Press, 1981 (the filter-cleaner:
outliers are replaced by their cleaned values before they enter the
regressor).

:class:`ArxEstimator` is the thin per-asset object the service holds: its
frozen structure and settings are kept apart from its learned state, which
round-trips through plain data (:meth:`ArxEstimator.to_state`) for checkpoints.

Back ends
---------
The update runs on one of two back ends that give the same results to the
last bit (the same generated statements, :func:`arxwatch.estimators.rls.
kernel_source`): ``"python"``, plain Python on a list of floats, always
available; and ``"compiled"``, the same statements compiled by numba
(:mod:`arxwatch.estimators.native`, the optional ``fast`` extra) on a float64
array. The compiled step is three to four times faster
(``tests/benchmarks/bench_core.py``) but costs a compilation per model
structure (about 3 s for the first in a process, then about 1 s each) and
about 140 MB of memory for numba and LLVM. ``"auto"`` picks ``"compiled"``
when numba can be imported. The default is ``"python"`` so that short-lived
processes and tests pay no compilation; a service that keeps estimators for
long opts in with ``backend="auto"``.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any, Literal, NamedTuple

import numpy as np
from numpy.typing import NDArray

from arxwatch.estimators.arx import ArxOrder, RegressorHistory
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.rls import RlsConfig, StateLayout, build_kernel

#: Where an estimator runs its update: ``"python"`` (always available),
#: ``"compiled"`` (numba; the ``fast`` extra) or ``"auto"`` (compiled when
#: numba can be imported, otherwise python).
Backend = Literal["auto", "python", "compiled"]
BACKENDS: tuple[Backend, ...] = ("auto", "python", "compiled")

#: The back end when none is named: no compilation unless asked for.
DEFAULT_BACKEND: Backend = "python"

#: One asset's flat RLS state: a list for the python back end, a float64
#: array for the compiled one.
State = list[float] | NDArray[np.float64]


class StepResult(NamedTuple):
    """What one update reports (all floats).

    Attributes
    ----------
    prediction : float
        One-step prediction of y(k) made before seeing it.
    innovation : float
        ``y(k) - prediction``.
    normalised : float
        Innovation divided by its predicted standard deviation: ~N(0, 1) and
        white while the model holds.
    weight : float
        Huber weight: 1 for a plain sample, below 1 for a down-weighted outlier.
    updated : bool
        False when the excitation gate froze the estimate.
    excitation : float
        Smallest input standard deviation over the estimator memory (signal
        units; inf for a model without inputs).
    """

    prediction: float
    innovation: float
    normalised: float
    weight: float
    updated: bool
    excitation: float


#: Makes a StepResult from a plain tuple of its fields. Calling the class
#: instead runs the Python-level NamedTuple ``__new__``, which cost a fifth of
#: a whole step.
_as_result: Callable[[type[StepResult], tuple[Any, ...]], StepResult] = tuple.__new__


class ArxEstimator:
    """Recursive ARX estimator for one asset.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    config : RlsConfig, optional
        Estimator settings; defaults are :class:`RlsConfig` defaults.
    backend : {"python", "compiled", "auto"}, optional
        Where the update runs (see the module notes); default
        :data:`DEFAULT_BACKEND`. Both back ends give the same numbers to the
        last bit; ``"compiled"`` is faster per update once compiled.

    Raises
    ------
    ValueError
        If ``backend`` is not one of :data:`BACKENDS`.
    ImportError
        If ``backend`` is ``"compiled"`` and numba is not installed.

    Examples
    --------
    >>> est = ArxEstimator(ArxOrder(na=1, nb=(1,), nk=(1,), constant=False))
    >>> u = [1.0, 0.0, 1.0, 1.0, 0.0] * 40
    >>> y = 0.0
    >>> for k in range(1, len(u)):
    ...     y = 0.8 * y + 0.5 * u[k - 1]
    ...     _ = est.update(y, [u[k]])
    >>> [round(float(v), 6) for v in est.theta]
    [-0.8, 0.5]
    """

    __slots__ = ("order", "config", "layout", "backend", "_kernel", "_state", "_history")

    def __init__(
        self, order: ArxOrder, config: RlsConfig | None = None, backend: Backend = DEFAULT_BACKEND
    ) -> None:
        self.order = order
        self.config = config if config is not None else RlsConfig()
        self.layout = StateLayout(order.n_params, order.n_inputs)
        #: The back end in use, "python" or "compiled" ("auto" resolved).
        self.backend = resolve_backend(backend)
        if self.backend == "compiled":
            # Imported here: the compiled back end is optional.
            from arxwatch.estimators.native import build_native_kernel

            self._kernel = build_native_kernel(self.layout, self.config)
        else:
            self._kernel = build_kernel(self.layout, self.config)
        self._state: State = self._as_state(self.layout.initial(self.config.p0))
        self._history = RegressorHistory(order)

    def _as_state(self, values: list[float]) -> State:
        """Hold ``values`` (plain floats) as this back end's state."""
        if self.backend == "compiled":
            return np.array(values, dtype=np.float64)
        return values

    # -- learning -----------------------------------------------------------
    def step(self, phi: Sequence[float], y: float, inputs: Sequence[float]) -> StepResult:
        """Update with a ready-made regressor (no history bookkeeping).

        Raises
        ------
        DimensionError
            If ``phi`` or ``inputs`` has the wrong length.
        ValueError
            If a value is not finite; the state is left untouched.
        """
        # The kernel checks both and returns the StepResult fields in order.
        return _as_result(StepResult, self._kernel(self._state, phi, y, inputs))

    def update(self, y: float, u: Sequence[float]) -> StepResult | None:
        """Take the sample y(k), u(k); None while the history is still filling.

        Raises
        ------
        DimensionError
            If ``u`` has the wrong length.
        ValueError
            If ``y`` or ``u`` is not finite; nothing is changed.
        """
        if not (math.isfinite(y) and all(map(math.isfinite, u))):  # map: no generator frames
            raise ValueError(f"non-finite sample: y={y!r}, u={list(u)!r}")
        history = self._history
        result = None
        if history.ready:
            result = self.step(history.regressor(u), y, u)
            # Filter-cleaner: a down-weighted output enters later regressors
            # as prediction + w * innovation, so one spike is not re-used as a
            # large regressor entry for the next na samples (Martin 1981).
            y = result.prediction + result.weight * result.innovation
        history.push(y, u)
        return result

    def predict(self, u: Sequence[float]) -> float:
        """One-step prediction of y(k) from the history and the inputs u(k).

        Raises
        ------
        ValueError
            If the history does not yet reach back far enough.
        """
        if not self._history.ready:
            raise ValueError(f"history not ready: need {self.order.depth} samples first")
        phi = self._history.regressor(u)
        return math.fsum(p * t for p, t in zip(phi, self._state[self.layout.theta], strict=True))

    def warm_start(
        self, theta: Sequence[float], covariance: NDArray[np.float64], sigma2: float | None = None
    ) -> None:
        """Start from a known model (e.g. a baseline) instead of from zero.

        Parameters
        ----------
        theta : sequence of float, length n_params
            Starting estimate.
        covariance : ndarray, shape (n_params, n_params)
            Starting ``P`` (unscaled: ``Cov(theta) / sigma2``), symmetric
            positive definite. Factorised as ``U D U'`` by a Cholesky
            factorisation of the index-reversed matrix.
        sigma2 : float, optional
            Known innovation variance: counted as one memory's worth of
            samples, and robust weighting engages at once. Without it the
            noise level is learned from scratch.

        Raises
        ------
        DimensionError
            If a shape disagrees with the model.
        ValueError
            If ``covariance`` is not symmetric positive definite or a value
            is not finite.
        """
        n = self.layout.n_params
        t = np.asarray(theta, dtype=np.float64)
        p = np.asarray(covariance, dtype=np.float64)
        if t.shape != (n,) or p.shape != (n, n):
            raise DimensionError(
                f"warm start needs theta ({n},) and covariance ({n}, {n}), "
                f"got {t.shape} and {p.shape}"
            )
        if not (np.all(np.isfinite(t)) and np.all(np.isfinite(p))):
            raise ValueError("warm start values must be finite")
        if not np.allclose(p, p.T, rtol=1e-10, atol=0.0):
            raise ValueError("warm start covariance must be symmetric")
        try:
            # J P J = L L' with J the exchange matrix gives P = R R', R = J L J
            # upper triangular; then U = R diag(R)^-1 and D = diag(R)^2.
            low = np.linalg.cholesky(p[::-1, ::-1])
        except np.linalg.LinAlgError:
            raise ValueError("warm start covariance must be positive definite") from None
        r = low[::-1, ::-1]
        diag = np.diag(r)
        u = r / diag
        state = self.layout.initial(self.config.p0)
        state[self.layout.theta] = t.tolist()
        state[self.layout.upper] = [float(u[i, j]) for j in range(n) for i in range(j)]
        state[self.layout.diag] = (diag * diag).tolist()
        if sigma2 is not None:
            if not (math.isfinite(sigma2) and sigma2 > 0.0):
                raise ValueError(f"warm start sigma2 must be positive and finite, got {sigma2!r}")
            lam = self.config.forgetting
            memory = 1.0 / (1.0 - lam) if lam < 1.0 else float(self.config.warmup_updates + 1)
            state[self.layout.rss] = sigma2 * memory
            state[self.layout.weight] = memory
            state[self.layout.n_updates] = float(self.config.warmup_updates)
        self._state = self._as_state(state)

    def inflate_covariance(self, factor: float) -> None:
        """Multiply ``P`` by ``factor`` so the estimate re-learns quickly.

        Used when a change has been detected: the data before it no longer
        describe the asset, and a large ``P`` lets the next samples dominate
        (covariance resetting; Åström and Wittenmark, *Adaptive Control*,
        2nd ed., 1995, section 11.2). The trace cap still applies.

        Raises
        ------
        ValueError
            If ``factor`` is not a finite number >= 1.
        """
        if not (math.isfinite(factor) and factor >= 1.0):
            raise ValueError(f"factor must be a finite number >= 1, got {factor!r}")
        state = self._state
        diag = self.layout.diag
        scaled = [float(d) * factor for d in state[diag]]
        bound = self.config.trace_bound(self.layout.n_params)
        trace = self.layout.trace(state) * factor
        if trace > bound:
            scaled = [d * bound / trace for d in scaled]
        state[diag] = scaled

    def restart_history(self) -> None:
        """Forget past samples (after a data gap) but keep the learned model."""
        self._history.clear()

    def reset(self) -> None:
        """Forget everything learned: back to the initial state."""
        self._state = self._as_state(self.layout.initial(self.config.p0))
        self._history.clear()

    def clone(self) -> ArxEstimator:
        """Return an untrained estimator with the same structure, settings and back end."""
        return ArxEstimator(self.order, self.config, self.backend)

    # -- read-out -----------------------------------------------------------
    @property
    def theta(self) -> NDArray[np.float64]:
        """Current parameter estimate, shape (n_params,) (a copy)."""
        return np.array(self._state[self.layout.theta], dtype=np.float64)

    @property
    def covariance(self) -> NDArray[np.float64]:
        """Current ``P = U D U'``, shape (n_params, n_params)."""
        return self.layout.covariance(self._state)

    @property
    def parameter_covariance(self) -> NDArray[np.float64]:
        """Estimated ``Cov(theta) ~ sigma2 * P`` (exact for lambda = 1)."""
        return self.sigma2 * self.covariance

    @property
    def sigma2(self) -> float:
        """Innovation variance estimate."""
        return float(self.layout.sigma2(self._state))

    @property
    def n_updates(self) -> int:
        """Samples that changed the estimate."""
        return int(self._state[self.layout.n_updates])

    @property
    def n_seen(self) -> int:
        """Samples offered to the estimator (regressor ready)."""
        return int(self._state[self.layout.n_seen])

    @property
    def trace(self) -> float:
        """Current ``trace(P)``."""
        return float(self.layout.trace(self._state))

    # -- checkpoints --------------------------------------------------------
    def to_state(self) -> dict[str, Any]:
        """Learned state as plain data (lists of floats), without settings."""
        state = self._state
        rls = state.tolist() if isinstance(state, np.ndarray) else list(state)
        return {"rls": rls, "history": self._history.to_state()}

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore learned state saved by :meth:`to_state`.

        Raises
        ------
        DimensionError
            If the saved state does not fit this estimator's order.
        ValueError
            If it holds non-numbers or non-finite values.
        """
        rls = state["rls"]
        if len(rls) != self.layout.size:
            raise DimensionError(
                f"saved RLS state has {len(rls)} entries, this model needs {self.layout.size}"
            )
        values = [float(v) for v in rls]
        if not all(math.isfinite(v) for v in values):
            raise ValueError("saved RLS state holds non-finite values")
        if min(values[self.layout.diag]) <= 0.0:
            raise ValueError("saved RLS state has a non-positive D entry: P not positive definite")
        history = RegressorHistory.from_state(self.order, state["history"])
        self._state, self._history = self._as_state(values), history


def resolve_backend(backend: str) -> Literal["python", "compiled"]:
    """Return the back end that ``backend`` names on this installation.

    Parameters
    ----------
    backend : {"python", "compiled", "auto"}
        ``"auto"`` means ``"compiled"`` when numba can be imported.

    Returns
    -------
    {"python", "compiled"}

    Raises
    ------
    ValueError
        If ``backend`` is not one of :data:`BACKENDS`.
    ImportError
        If ``backend`` is ``"compiled"`` and numba is not installed.

    Examples
    --------
    >>> resolve_backend("python")
    'python'
    >>> resolve_backend("auto") in ("python", "compiled")
    True
    """
    if backend not in BACKENDS:
        raise ValueError(f"backend must be one of {BACKENDS}, got {backend!r}")
    if backend == "python":
        return "python"
    # Imported here: the compiled back end is optional.
    from arxwatch.estimators import native

    if native.available():
        return "compiled"
    if backend == "compiled":
        raise ImportError("backend='compiled' needs numba: pip install 'arxwatch[fast]'")
    return "python"
