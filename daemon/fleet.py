"""Drift monitor of many assets in arrays: the column-wise twin of AssetMonitor.

One process must judge thousands of assets (every VAV box of a site) within
a few kilobytes each. :class:`~arxwatch.daemon.monitor.AssetMonitor` keeps
one asset in Python objects (about 30 KB); :class:`FleetMonitor` keeps every
asset of an asset class in numpy arrays indexed by channel, where a channel
is one asset in one operating mode, and judges all rows that share a sample
time in one vectorised pass per model order. For the same rows in the same
order it produces the same alert records as one ``AssetMonitor`` per asset,
bit for bit (``tests/unit/test_fleet.py`` compares them), because every
floating-point operation is the same one in the same order:

* the baseline residual and its prediction variance accumulate over the
  regressor entries in the order :meth:`Baseline.residual` uses;
* the live estimate runs the vectorised form of the RLS kernel
  (:func:`arxwatch.estimators.rls.build_kernel`), which reproduces the
  per-asset kernel bit for bit;
* prewhitening, CUSUM, variance and whiteness repeat the scalar updates
  element-wise, and the rare steps (fitting a prewhitening filter, ending a
  whiteness block, the parameter-based evaluations at the first sample of
  each evaluation period, building records) call the very functions the
  scalar detectors use, one channel at a time;
* the alert lifecycle is :class:`~arxwatch.daemon.decide.TrackerBank`.

Rows of one call are taken in waves of distinct sample times, so an asset
with several rows in one call sees them in time order, as sequential calls
of ``AssetMonitor.step`` would. Pure: arrays in, records out; no clock, no
I/O.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping, Sequence
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.alert import SignalNames, build_record
from arxwatch.daemon.decide import BankTransition, TrackerBank, Transition
from arxwatch.daemon.fleetnative import (
    FLOAT_OUT,
    INT_OUT,
    TOTALS,
    group_kernels,
)
from arxwatch.daemon.monitor import (
    CHANGE_DETECTORS,
    MonitorConfig,
    parameter_covariances,
)
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.baseline import Baseline, BaselineSet
from arxwatch.estimators.codec import decode_order, encode_order
from arxwatch.estimators.detect._sums import centred_sums
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.detect.parameter import FeatureDrift, FeatureDriftConfig
from arxwatch.estimators.detect.prewhiten import fit_reference
from arxwatch.estimators.detect.whiteness import block_statistics, evidence_of_block
from arxwatch.estimators.estimator import ArxEstimator, Backend, resolve_backend
from arxwatch.estimators.native import NON_FINITE
from arxwatch.estimators.readout import dead_time_matrix, feature_matrix, feature_names
from arxwatch.estimators.rls import TRACE_CHECK_EVERY, StateLayout, build_kernel

__all__ = ["COMPILED_ROWS", "DETECTORS", "FleetMonitor", "TraceSink"]

#: Every detector whose evidence can become an alert (stable names, metric labels).
DETECTORS = (
    "innovation_mean",
    "innovation_variance",
    "innovation_whiteness",
    "feature_drift",
    "physical_band",
    "out_of_range",
    "stuck",
    "gap",
    "stale",
)

_STATE_VERSION = 2
#: Capacity grows by this factor, so at most a fifth of the arrays is slack.
_GROWTH = 1.25
#: ``_last_mode`` before an asset's first row (AssetMonitor's sentinel).
_NO_SAMPLE = -2
#: ``_last_mode`` of a mode label no baseline has.
_OTHER_MODE = -1

_CUSUM_KEY = "innovation_mean/innovation"
_VARIANCE_KEY = "innovation_variance/innovation"
_WHITENESS_KEY = "innovation_whiteness/innovation"
_DRIFT_KEY = "feature_drift/features"
#: Position of _CUSUM_KEY in _Group.keys: innovation_mean is the one detector
#: of CHANGE_DETECTORS, whose raised alert keeps the live estimate re-learning.
_CHANGE_KEY = 0
_QUALITY_KINDS = ("out_of_range", "stuck", "gap", "stale")

#: Largest wave of a group that the compiled back end takes a row at a time:
#: beyond a thousand channels or so the row's state no longer stays in the
#: cache between rows, and the numpy path (column at a time, same bits) is
#: faster (tests/benchmarks/bench_monitor.py).
COMPILED_ROWS = 1024

#: State arrays the compiled kernels take, in their argument order.
_BASE_STATE = ("base_y", "base_u", "base_count", "theta0", "cov0", "sigma2")
_DETECTOR_STATE = (
    *("pw_count", "sums", "pw_head", "pw_past", "pw_scale"),
    *("c_high", "c_low", "n_high", "n_low", "cu_previous", "cu_noise", "var_s"),
    *("wh_count", "wh_head", "wh_past"),
)
_LIVE_STATE = ("rls_y", "rls_u", "rls_count", "rls", "samples")
#: State arrays added after _STATE_VERSION was fixed: a saved state may lack them.
_ADDED_STATE = frozenset({"cu_previous", "cu_noise"})
#: The two arrays that ``sums`` replaced after _STATE_VERSION was fixed (see _shared_sums).
_SPLIT_SUMS = ("pw_sums", "wh_sums")
#: Rows of the compiled innovation kernel's outputs (fleetnative.FLOAT_OUT, INT_OUT).
(
    _F_PREDICTION,
    _F_Z,
    _F_C_HIGH,
    _F_C_LOW,
    _F_CUSUM_STATISTIC,
    _F_CUSUM_NOISE_SCALE,
    _F_VARIANCE_S,
    _F_VARIANCE_STATISTIC,
    _F_VARIANCE_THRESHOLD,
) = range(len(FLOAT_OUT))
(
    _I_FIT,
    _I_N_HIGH,
    _I_N_LOW,
    _I_CUSUM_ALARM,
    _I_CUSUM_BUSY,
    _I_VARIANCE_ALARM,
    _I_VARIANCE_BUSY,
    _I_BLOCK_ENDED,
) = range(len(INT_OUT))

Float = NDArray[np.float64]
Index = NDArray[np.intp]
#: Channels or positions: a slice when they form a contiguous range (views, no copies).
Sel = Index | slice


class TraceSink(Protocol):
    """What :attr:`FleetMonitor.trace` takes (:class:`arxwatch.daemon.trace.FleetTrace`)."""

    #: Read-out columns of :meth:`add_evaluations` (``trace.readout_features``).
    features: tuple[str, ...]

    def bind(self, fleet: FleetMonitor) -> None:
        """Attach to ``fleet``; called when the trace is assigned."""

    def forget_slot(self, slot: int) -> None:
        """Note that ``slot`` was freed."""

    def add_rows(
        self,
        slots: NDArray[Any],
        time_s: Float,
        output: Float,
        prediction: Float,
        innovation: Float,
        cusum_high: Float,
        cusum_low: Float,
    ) -> None:
        """Take one judged row per slot."""

    def add_evaluations(
        self,
        slots: NDArray[Any],
        modes: NDArray[Any],
        time_s: Float,
        value: Float,
        baseline: Float,
        lower: Float,
        upper: Float,
        distance: Float,
        distance_limit: Float,
    ) -> None:
        """Take one evaluation of the parameter-based detectors per slot."""


def _as_slice(ch: Index) -> Sel:
    """Return ``ch`` as a slice when it is a contiguous increasing range, else unchanged."""
    if ch.shape[0] and int(ch[-1]) - int(ch[0]) == ch.shape[0] - 1:
        if ch.shape[0] == 1 or bool((np.diff(ch) == 1).all()):
            return slice(int(ch[0]), int(ch[-1]) + 1)
    return ch


def _indices(sel: Sel) -> Index:
    """Return ``sel`` as an index array."""
    if isinstance(sel, slice):
        return np.arange(sel.start, sel.stop, dtype=np.intp)
    return sel


def _narrow(sel: Sel, mask: NDArray[np.bool_]) -> Sel:
    """Return the members of ``sel`` where ``mask`` holds (``sel`` itself when all do)."""
    return sel if mask.all() else _indices(sel)[mask]


def _band_features(order: ArxOrder) -> tuple[str, ...]:
    """Every feature a band may watch for ``order`` (PhysicalBands order)."""
    names = [f"gain_{i + 1}" for i in range(order.n_inputs)]
    names.append("time_constant_s")
    names.extend(f"dead_time_{i + 1}_s" for i in range(order.n_inputs))
    if order.constant:
        names.append("offset")
    return tuple(names)


def _shared_sums(arrays: Mapping[str, NDArray[Any]], reference: int) -> dict[str, NDArray[Any]]:
    """Return a group's saved arrays with the shared ``sums`` of this release.

    A state saved before the prewhitening reference and the whiteness blocks
    shared one array holds ``pw_sums`` and ``wh_sums`` instead: each channel
    keeps the one it was using, the reference's until its filter was fitted
    (``reference`` samples), the whiteness block's after. Other states are
    returned as they are.

    Raises
    ------
    ValueError
        If the two older arrays do not fit together.
    """
    if "sums" in arrays or not all(name in arrays for name in (*_SPLIT_SUMS, "pw_count")):
        return dict(arrays)
    pw, wh = np.asarray(arrays["pw_sums"]), np.asarray(arrays["wh_sums"])
    fitted = np.asarray(arrays["pw_count"]) >= reference
    if pw.ndim != 2 or wh.ndim != 2 or not pw.shape[1] == wh.shape[1] == fitted.shape[0]:
        raise ValueError(
            f"saved monitor arrays 'pw_sums' {pw.shape}, 'wh_sums' {wh.shape} and "
            f"'pw_count' {fitted.shape} do not fit together"
        )
    sums = np.zeros((max(pw.shape[0], wh.shape[0]), fitted.shape[0]))
    sums[: pw.shape[0], ~fitted] = pw[:, ~fitted]
    sums[: wh.shape[0], fitted] = wh[:, fitted]
    upgraded = {name: v for name, v in arrays.items() if name not in _SPLIT_SUMS}
    upgraded["sums"] = sums
    return upgraded


def _grown(size: int, capacity: int) -> int:
    return max(size, int(capacity * _GROWTH) + 1)


class _Group:
    """Every channel whose baseline has one model order, in arrays."""

    def __init__(
        self, order: ArxOrder, sample_period_s: float, config: MonitorConfig, compiled: bool
    ) -> None:
        self.order = order
        self.sample_period_s = sample_period_s
        self.config = config
        n, m = order.n_params, order.n_inputs
        self.layout = StateLayout(n, m)
        self.kernel = build_kernel(self.layout, config.rls, target="arrays")
        self.depth = order.depth
        self.p = config.prewhiten.ar_order
        self.lags = config.whiteness.lags
        self.features = feature_names(order)
        self.band_names = _band_features(order)
        self.keys = (
            _CUSUM_KEY,
            _VARIANCE_KEY,
            _WHITENESS_KEY,
            _DRIFT_KEY,
            *(f"physical_band/{name}" for name in self.band_names),
        )
        self.whiteness_threshold = config.whiteness.threshold
        self.variance_upper = config.variance.upper_limit
        self.variance_lower = config.variance.lower_limit
        self.settle = config.settle_samples()
        # the compiled innovation path and live estimate (fleetnative), in one call per wave
        self.compiled = (
            group_kernels(self.layout, config.rls, self.p, self.lags) if compiled else None
        )
        self.structure = np.array(
            [
                order.na,
                order.constant,
                self.depth,
                config.prewhiten.reference_samples,
                config.whiteness.window,
                config.cusum.after_alarm == "restart",
                config.variance.lower,
            ],
            dtype=np.int64,
        )
        self.settings = np.array(
            [
                config.clip_sigma,
                config.cusum.k,
                config.cusum.h,
                config.variance.lam,
                1.0 / self.variance_lower if config.variance.lower else math.inf,
                self.variance_upper,
                config.cusum.noise_lam,
            ],
            dtype=np.float64,
        )
        self.nb = np.array(order.nb, dtype=np.int64)
        self.nk = np.array(order.nk, dtype=np.int64)
        self.drift = FeatureDrift(
            FeatureDriftConfig(
                order=order, sample_period_s=sample_period_s, alpha=config.drift_alpha, every=1
            )
        )
        self.tri_rows, self.tri_cols = np.triu_indices(n)
        # full (n, n) positions of the upper triangle, for rebuilding rows
        tri_index = np.zeros((n, n), dtype=np.intp)
        tri_index[self.tri_rows, self.tri_cols] = np.arange(self.tri_rows.shape[0])
        tri_index[self.tri_cols, self.tri_rows] = np.arange(self.tri_rows.shape[0])
        self.tri_index = tri_index
        self.arrays: dict[str, NDArray[Any]] = {}
        self.tracker = TrackerBank(
            config.policy, self.keys, 0, config.evaluation_intervals(sample_period_s)
        )
        self.free: list[int] = []
        # what the last step computed, by name, for a trace to read (FleetMonitor.trace):
        # references to arrays the step makes anyway, so keeping them costs nothing
        self.tap: dict[str, Any] = {}
        self._allocate(0)

    # -- storage ------------------------------------------------------------
    def _shapes(self) -> dict[str, tuple[tuple[int, ...], Any, float]]:
        """Name -> (shape after the channel axis, dtype, initial value)."""
        order, n, m, p, lags = (
            self.order,
            self.order.n_params,
            self.order.n_inputs,
            self.p,
            self.lags,
        )
        hist_u = max(order.input_depth - 1, 0)
        return {
            "used": ((), np.bool_, False),
            "asset": ((), np.int32, -1),
            "mode": ((), np.int16, 0),
            "theta0": ((n,), np.float64, 0.0),
            "cov0": ((n * (n + 1) // 2,), np.float64, 0.0),
            "sigma2": ((), np.float64, 1.0),
            "base_y": ((order.na,), np.float64, 0.0),
            "base_u": ((m, hist_u), np.float64, 0.0),
            "base_count": ((), np.int16, 0),
            "rls_y": ((order.na,), np.float64, 0.0),
            "rls_u": ((m, hist_u), np.float64, 0.0),
            "rls_count": ((), np.int16, 0),
            "rls": ((self.layout.size,), np.float64, 0.0),
            "pw_count": ((), np.int32, 0),
            # running sums (detect._sums) of the prewhitening reference while
            # it is collected, then of the open whiteness block: the blocks
            # start only after the filter is fitted, so one array serves both
            "sums": ((max(p, lags) + 2,), np.float64, 0.0),
            # the reference's first p values while it is collected, then the
            # AR coefficients fitted on it (the head is not needed after the fit)
            "pw_head": ((p,), np.float64, 0.0),
            "pw_past": ((p,), np.float64, 0.0),
            "pw_scale": ((), np.float64, 1.0),
            "c_high": ((), np.float64, 0.0),
            "c_low": ((), np.float64, 0.0),
            "n_high": ((), np.int32, 0),
            "n_low": ((), np.int32, 0),
            # the CUSUM's last input (nan: none yet) and successive-difference noise level
            "cu_previous": ((), np.float64, np.nan),
            "cu_noise": ((), np.float64, 1.0),
            "var_s": ((), np.float64, 1.0),
            "wh_count": ((), np.int32, 0),
            "wh_head": ((lags,), np.float64, 0.0),
            "wh_past": ((lags,), np.float64, 0.0),
            # the period of sample time of its open block (MonitorConfig.block_period); -1: none
            "wh_period": ((), np.int64, -1),
            "samples": ((), np.int64, 0),
            "current": ((len(self.features) + 1,), np.float64, 0.0),
        }

    def _allocate(self, capacity: int) -> None:
        # The channel axis is last: each component is one contiguous row over
        # channels, so a wave over a contiguous range of channels works on
        # views (the RLS kernel updates the state in place).
        old = self.capacity
        keep = min(old, capacity)
        for name, (tail, dtype, initial) in self._shapes().items():
            grown = np.full((*tail, capacity), initial, dtype=dtype)
            if name in self.arrays and keep:
                grown[..., :keep] = self.arrays[name][..., :keep]
            self.arrays[name] = grown
        self.tracker.resize(capacity)

    @property
    def capacity(self) -> int:
        used = self.arrays.get("used")
        return 0 if used is None else int(used.shape[0])

    def memory_bytes(self) -> int:
        own = sum(a.nbytes for a in self.arrays.values())
        return own + sum(a.nbytes for a in self.tracker.arrays().values())

    def add(self, asset: int, mode: int, baseline: Baseline) -> int:
        """Give ``baseline`` a channel, started as AssetMonitor starts a mode; return it."""
        if not self.free:
            old = self.capacity
            self._allocate(_grown(old + 1, old))
            self.free = list(range(self.capacity - 1, old - 1, -1))
        c = self.free.pop()
        a = self.arrays
        for name, (_, _, initial) in self._shapes().items():
            a[name][..., c] = initial
        self.tracker.clear([c])
        a["used"][c] = True
        a["asset"][c] = asset
        a["mode"][c] = mode
        a["theta0"][:, c] = baseline.theta
        a["cov0"][:, c] = baseline.covariance[self.tri_rows, self.tri_cols]
        a["sigma2"][c] = baseline.sigma2
        estimator = ArxEstimator(self.order, self.config.rls)
        estimator.warm_start(
            baseline.theta.tolist(),
            np.asarray(baseline.covariance) / baseline.sigma2,
            baseline.sigma2,
        )
        a["rls"][:, c] = estimator.to_state()["rls"]
        a["current"][:, c] = list(self.baseline_values(c).values())
        return c

    def remove(self, c: int) -> None:
        self.arrays["used"][c] = False
        self.arrays["asset"][c] = -1
        self.free.append(c)

    def restart(self, channels: Index) -> None:
        """Forget past samples of ``channels`` (RegressorHistory.clear, twice)."""
        a = self.arrays
        for prefix in ("base", "rls"):
            a[f"{prefix}_y"][..., channels] = 0.0
            a[f"{prefix}_u"][..., channels] = 0.0
            a[f"{prefix}_count"][channels] = 0

    def to_state(self) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
        """Return (JSON-safe description, arrays) of the group, for checkpoints."""
        # up to the last channel in use: idle capacity is not saved
        used = np.flatnonzero(self.arrays["used"])
        keep = int(used[-1]) + 1 if used.size else 0
        meta = {
            "order": encode_order(self.order),
            "sample_period_s": self.sample_period_s,
            "capacity": keep,
            "free": [c for c in self.free if c < keep],
        }
        arrays = {name: a[..., :keep] for name, a in self.arrays.items()}
        arrays.update({f"tracker.{k}": v[:keep] for k, v in self.tracker.arrays().items()})
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> None:
        """Restore a group saved by :meth:`to_state` under the same settings.

        Raises
        ------
        ValueError
            If an array is missing or its shape or type does not fit.
        """
        capacity = int(meta["capacity"])
        arrays = _shared_sums(arrays, self.config.prewhiten.reference_samples)
        self._allocate(capacity)
        for name, (tail, dtype, _) in self._shapes().items():
            saved = arrays.get(name)
            if saved is None and name in _ADDED_STATE:
                continue  # saved before this array existed: it keeps its initial value
            if saved is None:
                raise ValueError(f"saved monitor state lacks {name!r}")
            shape = (*tail, capacity)
            if saved.shape != shape or saved.dtype != np.dtype(dtype):
                raise ValueError(
                    f"saved monitor array {name!r} has shape {saved.shape} and dtype "
                    f"{saved.dtype}; these settings need {shape} of {np.dtype(dtype)}"
                )
            self.arrays[name] = np.array(saved, copy=True)
        prefix = "tracker."
        self.tracker.load_arrays(
            {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
        )
        self.free = [int(c) for c in meta["free"]]

    # -- read-outs ----------------------------------------------------------
    def baseline_values(self, c: int) -> dict[str, float]:
        """Return the baseline's features and sigma, as ``readout_values`` of its read-out does.

        From :func:`feature_matrix`, the numbers ``read_out`` takes (the same
        bits), without the rest of a read-out (poles, the step response of
        each dead time): a record needs only these, and a building gone
        quiet makes thousands of records at once.
        """
        features = feature_matrix(
            self.order, self.arrays["theta0"][:, c][None, :], self.sample_period_s
        )
        values = dict(zip(self.features, features[0].tolist(), strict=True))
        values["sigma"] = math.sqrt(float(self.arrays["sigma2"][c]))
        return values

    def current_values(self, c: int) -> dict[str, float]:
        names = (*self.features, "sigma")
        return dict(zip(names, self.arrays["current"][:, c].tolist(), strict=True))

    def rls_column(self, c: int) -> list[float]:
        column: list[float] = self.arrays["rls"][:, c].tolist()
        return column

    # -- the vectorised step ------------------------------------------------
    def _regressor(self, prefix: str, ch: Sel, u: list[Float]) -> list[Float]:
        """phi(k) of ``ch``, one array per entry (RegressorHistory.regressor)."""
        order, a = self.order, self.arrays
        hist_y, hist_u = a[f"{prefix}_y"][:, ch], a[f"{prefix}_u"][:, :, ch]
        columns = [-hist_y[j] for j in range(order.na)]
        for i, (nb_i, nk_i) in enumerate(zip(order.nb, order.nk, strict=True)):
            for lag in range(nk_i, nk_i + nb_i):
                columns.append(u[i] if lag == 0 else hist_u[i, lag - 1])
        if order.constant:
            columns.append(np.ones(u[0].shape[0]))
        return columns

    def _push(self, prefix: str, ch: Sel, y: Float, u: Float) -> None:
        """Shift y(k) and u(k) into the histories of ``ch`` (RegressorHistory.push)."""
        a = self.arrays
        gathered = not isinstance(ch, slice)  # a copy to write back, not a view
        hist_y = a[f"{prefix}_y"]
        if hist_y.shape[0]:
            rows = hist_y[:, ch]
            rows[1:] = rows[:-1].copy()
            rows[0] = y
            if gathered:
                hist_y[:, ch] = rows
        hist_u = a[f"{prefix}_u"]
        if hist_u.shape[1]:
            rows_u = hist_u[:, :, ch]
            rows_u[:, 1:] = rows_u[:, :-1].copy()
            rows_u[:, 0] = u.T
            if gathered:
                hist_u[:, :, ch] = rows_u
        count = a[f"{prefix}_count"]
        count[ch] = np.minimum(count[ch] + 1, self.depth)

    def step(
        self, ch: Index, time_s: Float, y: Float, u: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Judge one row for each of ``ch`` (distinct channels); return tracker transitions.

        Returns
        -------
        list of (position, key index, evidence, transition)
            Position in ``ch`` and key of each transition, with the evidence
            that caused it.
        """
        a = self.arrays
        self.tap = {}
        compiled = self.compiled is not None and ch.shape[0] <= COMPILED_ROWS
        sel = ch if compiled else _as_slice(ch)
        # 0. whiteness blocks of an earlier period are complete: test them first
        found = self._enter_period(sel, time_s)
        if compiled:
            # steps 1 and 2 compiled, then step 3 as below
            due = self.evaluation_due(time_s)
            # read before the rows' evidence is observed, as in _innovate
            changing = self.tracker.raised[ch, _CHANGE_KEY] if due else None
            innovated, updated = self._step_compiled(ch, time_s, y, u)
            found += innovated
            if changing is not None and updated.any():
                dp = np.flatnonzero(updated)
                found += self._evaluate(dp, ch[dp], time_s[dp], changing[dp])
            return found
        every: Sel = slice(0, ch.shape[0])
        innovated, changing = self._innovate(sel, time_s, y, u)
        found += innovated
        # 2. the live estimate (ArxEstimator.update)
        ready = a["rls_count"][sel] >= self.depth
        y_hist = y.copy()
        if ready.any():
            rp, rc = _narrow(every, ready), _narrow(sel, ready)
            u_t = np.ascontiguousarray(u[rp].T)
            phi = self._regressor("rls", rc, list(u_t))
            state = a["rls"][:, rc]  # a view for a slice: the kernel updates it in place
            due = state[self.layout.n_updates] / TRACE_CHECK_EVERY
            check = due == np.floor(due)
            prediction, e, _, w, _, _ = self.kernel(list(state), phi, y[rp], list(u_t), check)
            if not isinstance(rc, slice):
                a["rls"][:, rc] = state
            y_hist[rp] = prediction + w * e
            a["samples"][rc] += 1
        self._push("rls", sel, y_hist, u)
        # 3. parameter-based evaluations, at the first sample of each evaluation period
        if ready.any() and self.evaluation_due(time_s):
            dp = _indices(_narrow(every, ready))
            found += self._evaluate(dp, _indices(_narrow(sel, ready)), time_s[dp], changing[dp])
        return found

    def _enter_period(
        self, sel: Sel, time_s: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Whiteness.enter_period for each channel of ``sel``, with this wave's block period."""
        period = self.config.block_period(float(time_s[0]), self.sample_period_s)
        periods = self.arrays["wh_period"]
        new = periods[sel] != period
        if not new.any():
            return []
        positions = np.flatnonzero(new)
        channels = _indices(sel)[positions]
        periods[channels] = period
        count = self.arrays["wh_count"][channels]
        ending = np.flatnonzero(count > 0)
        if not ending.size:
            return []
        return self._end_blocks(positions[ending], channels[ending], time_s[positions[ending]])

    def evaluation_due(self, time_s: Float) -> bool:
        """Whether this wave's sample time (one for every row) starts an evaluation period."""
        return self.config.evaluation_due(float(time_s[0]), self.sample_period_s)

    def _innovate(
        self, sel: Sel, time_s: Float, y: Float, u: Float
    ) -> tuple[list[tuple[int, int, Evidence, BankTransition]], NDArray[np.bool_]]:
        """Step 1 of :meth:`step` in numpy: the baseline residual, then the innovation detectors.

        Returns the transitions and, per row, whether an innovation alert
        was up before the row (``changing``).
        """
        a, config, tap = self.arrays, self.config, self.tap
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        every: Sel = slice(0, y.shape[0])
        # _ModeMonitor.step reads the tracker before this row's evidence is observed
        changing = self.tracker.raised[sel, _CHANGE_KEY]
        # 1. the baseline model's normalised residual, winsorised
        ready = a["base_count"][sel] >= self.depth
        y_past = y.copy()
        if ready.any():
            rp, rc = _narrow(every, ready), _narrow(sel, ready)
            y_r = y[rp]
            u_r = u[rp]
            phi = self._regressor("base", rc, [u_r[:, i] for i in range(u.shape[1])])
            theta = a["theta0"][:, rc]
            cov = a["cov0"][:, rc]
            # phi' theta, and phi' C phi from the upper triangle (Baseline.residual:
            # phi_j (C_jj phi_j + 2 sum_{a > j} C_ja phi_a)), in the order of
            # operations of Baseline.residual and the compiled kernel
            n, k, tri = self.order.n_params, y_r.shape[0], self.tri_index
            prediction, spread = np.zeros(k), np.zeros(k)
            for j in range(n):
                prediction += phi[j] * theta[j]
                off = np.zeros(k)
                for i in range(j + 1, n):
                    off += cov[tri[j, i]] * phi[i]
                spread += phi[j] * (cov[tri[j, j]] * phi[j] + (off + off))
            e = y_r - prediction
            z = e / np.sqrt(a["sigma2"][rc] + spread)
            tap["base"] = (rp, prediction, z)
            clip = config.clip_sigma
            big = np.abs(z) > clip
            if big.any():
                with np.errstate(divide="ignore", invalid="ignore"):
                    cleaned = y_r - e + e * clip / np.abs(z)
                y_past[rp] = np.where(big, cleaned, y_r)
                z = np.where(big, np.copysign(clip, z), z)
            found += self._innovations(rp, rc, time_s[rp], z)
        self._push("base", sel, y_past, u)
        return found, changing

    def _step_compiled(
        self, ch: Index, time_s: Float, y: Float, u: Float
    ) -> tuple[list[tuple[int, int, Evidence, BankTransition]], NDArray[np.bool_]]:
        """Run steps 1 and 2 of :meth:`step` in one compiled call (:mod:`.fleetnative`).

        The kernel updates the state arrays; the rare steps of the innovation
        path and the tracker's episodes touched (busy) are taken here, by the
        numpy path's code. Returns the transitions and the rows whose live
        estimate was updated.

        Raises
        ------
        ValueError
            If a sample is not finite (the numpy path lets nan into the
            state instead; AssetMonitor refuses it as this does).
        """
        a, k, tracker = self.arrays, ch.shape[0], self.tracker
        out_f = np.empty((len(FLOAT_OUT), k))
        out_i = np.zeros((len(INT_OUT), k), dtype=np.int64)
        totals = np.zeros(len(TOTALS), dtype=np.int64)
        live = np.zeros(k, dtype=np.int64)
        assert self.compiled is not None
        try:
            self.compiled.wave(
                ch,
                y,
                u,
                self.structure,
                self.nb,
                self.nk,
                *map(a.__getitem__, _BASE_STATE),
                *map(a.__getitem__, _DETECTOR_STATE),
                tracker.raised,
                tracker.alarms,
                self.settings,
                out_f,
                out_i,
                totals,
                *map(a.__getitem__, _LIVE_STATE),
                self.compiled.constants,
                live,
            )
        except NON_FINITE:
            raise ValueError("a sample for the live estimate is not finite") from None
        updated: NDArray[np.bool_] = live != 0
        return self._innovated(ch, time_s, out_f, out_i, totals), updated

    def _innovated(
        self,
        ch: Index,
        time_s: Float,
        out_f: Float,
        out_i: NDArray[np.int64],
        totals: NDArray[np.int64],
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Take what the compiled innovation path left for Python: taps, fits, busy episodes."""
        k, tracker = ch.shape[0], self.tracker
        ready, judged, fit, cusum_busy, variance_busy, block_ended = totals.tolist()
        every = slice(0, k)  # the kernel leaves nan where a value was not computed
        if ready:
            self.tap["base"] = (every, out_f[_F_PREDICTION], out_f[_F_Z])
        if fit:
            for c in ch[out_i[_I_FIT] != 0].tolist():
                self._fit_prewhitener(c)
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        if not judged:
            return found
        c_high, c_low = out_f[_F_C_HIGH], out_f[_F_C_LOW]
        noise_scale = out_f[_F_CUSUM_NOISE_SCALE]
        self.tap["cusum"] = (every, c_high, c_low)
        if cusum_busy:
            busy = np.flatnonzero(out_i[_I_CUSUM_BUSY])
            alarm = out_i[_I_CUSUM_ALARM, busy] != 0
            statistic = out_f[_F_CUSUM_STATISTIC, busy]
            cusum_h = float(self.config.cusum.h)
            n_high, n_low = out_i[_I_N_HIGH], out_i[_I_N_LOW]
            for t in tracker.observe(ch[busy], 0, statistic, cusum_h, alarm, time_s[busy]):
                r = int(busy[t.position])
                ev = self._cusum_evidence(c_high, c_low, n_high, n_low, noise_scale, r)
                found.append((r, 0, ev, t))
        if variance_busy:
            busy = np.flatnonzero(out_i[_I_VARIANCE_BUSY])
            statistic = out_f[_F_VARIANCE_STATISTIC, busy]
            threshold = out_f[_F_VARIANCE_THRESHOLD, busy]
            alarm = out_i[_I_VARIANCE_ALARM, busy] != 0
            for t in tracker.observe(ch[busy], 1, statistic, threshold, alarm, time_s[busy]):
                r = int(busy[t.position])
                s = float(out_f[_F_VARIANCE_S, r])
                found.append((r, 1, self._variance_evidence(s), t))
        if block_ended:
            ended = np.flatnonzero(out_i[_I_BLOCK_ENDED])
            found += self._end_blocks(ended, ch[ended], time_s[ended])
        return found

    def _innovations(
        self, rp: Sel, rc: Sel, time_s: Float, z: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Prewhiten ``z``, then run CUSUM, variance and whiteness element-wise."""
        a, config = self.arrays, self.config
        p = self.p
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        fitted = a["pw_count"][rc] >= config.prewhiten.reference_samples
        # collecting the reference: add_value, element-wise
        if not fitted.all():
            cc, zz = _indices(rc)[~fitted], z[~fitted]
            self._add_values(cc, zz, "pw")
            count = a["pw_count"][cc] + 1
            a["pw_count"][cc] = count
            for c in cc[count >= config.prewhiten.reference_samples].tolist():
                self._fit_prewhitener(c)
        if not fitted.any():
            return found
        if not fitted.all():
            rp, rc = _indices(rp)[fitted], _indices(rc)[fitted]
            z, time_s = z[fitted], time_s[fitted]
        predicted = np.zeros(z.shape[0])
        if p:
            coefficients, past = a["pw_head"][:, rc], a["pw_past"][:, rc]
            for i in range(p):
                predicted += coefficients[i] * past[i]
            past[1:] = past[:-1].copy()
            past[0] = z
            if not isinstance(rc, slice):  # a gathered copy: write it back
                a["pw_past"][:, rc] = past
        eps = (z - predicted) / a["pw_scale"][rc]
        clip = config.clip_sigma
        eps = np.maximum(-clip, np.minimum(clip, eps))
        found += self._cusum(rp, rc, time_s, eps)
        found += self._variance(rp, rc, time_s, eps)
        found += self._whiteness(rp, rc, time_s, eps)
        return found

    def _fit_prewhitener(self, c: int) -> None:
        """Fit channel ``c``'s prewhitening filter on its complete reference.

        The reference's sums are then cleared: the whiteness blocks, which
        start now, use the same array.
        """
        a = self.arrays
        phi, scale = fit_reference(
            a["sums"][: self.p + 2, c].tolist(),
            a["pw_head"][:, c].tolist(),
            a["pw_past"][:, c].tolist(),
            int(a["pw_count"][c]),
        )
        a["pw_head"][:, c] = phi
        a["pw_scale"][c] = scale
        a["sums"][:, c] = 0.0

    def _add_values(self, cc: Sel, x: Float, prefix: str) -> None:
        """:func:`arxwatch.estimators.detect._sums.add_value` for each channel of ``cc``."""
        a = self.arrays
        head = a[f"{prefix}_head"][:, cc]
        past = a[f"{prefix}_past"][:, cc]
        count = a[f"{prefix}_count"][cc]
        lags = past.shape[0]
        sums = a["sums"][: lags + 2, cc]
        sums[0] += x
        sums[1] += x * x
        if count.min() >= lags:  # the common case: every lag exists
            for lag in range(1, lags + 1):
                sums[lag + 1] += x * past[lag - 1]
        else:
            for lag in range(1, lags + 1):
                has = count >= lag
                sums[lag + 1, has] += x[has] * past[lag - 1, has]
            starting = np.flatnonzero(count < lags)
            head[count[starting], starting] = x[starting]
        if lags:
            past[1:] = past[:-1].copy()
            past[0] = x
        if not isinstance(cc, slice):  # a gathered copy: write it back
            a["sums"][: lags + 2, cc] = sums
            a[f"{prefix}_head"][:, cc] = head
            a[f"{prefix}_past"][:, cc] = past

    def _cusum(
        self, rp: Sel, rc: Sel, time_s: Float, eps: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Cusum.update, element-wise."""
        a, cusum = self.arrays, self.config.cusum
        lam = float(cusum.noise_lam)
        previous = a["cu_previous"][rc]
        d = eps - previous
        noise = a["cu_noise"][rc]
        noise = np.where(previous == previous, (1.0 - lam) * noise + lam * (0.5 * (d * d)), noise)
        a["cu_previous"][rc], a["cu_noise"][rc] = eps, noise
        scale = np.where(noise > 1.0, np.sqrt(noise), 1.0)
        eps = eps / scale
        k = float(cusum.k)
        c_high = a["c_high"][rc] + eps - k
        up = c_high > 0.0
        c_high = np.where(up, c_high, 0.0)
        n_high = np.where(up, a["n_high"][rc] + 1, 0)
        c_low = a["c_low"][rc] - eps - k
        down = c_low > 0.0
        c_low = np.where(down, c_low, 0.0)
        n_low = np.where(down, a["n_low"][rc] + 1, 0)
        high = c_high >= c_low
        statistic = np.where(high, c_high, c_low)
        alarm = statistic >= float(cusum.h)
        a["c_high"][rc], a["c_low"][rc], a["n_high"][rc], a["n_low"][rc] = (
            c_high,
            c_low,
            n_high,
            n_low,
        )
        self.tap["cusum"] = (rp, c_high, c_low)
        transitions = self.tracker.observe(rc, 0, statistic, float(cusum.h), alarm, time_s)
        found = [
            (
                int(_indices(rp)[t.position]),
                0,
                self._cusum_evidence(c_high, c_low, n_high, n_low, scale, t.position),
                t,
            )
            for t in transitions
        ]
        if cusum.after_alarm == "restart":
            reset = _indices(rc)[alarm]
            a["c_high"][reset] = 0.0
            a["c_low"][reset] = 0.0
            a["n_high"][reset] = 0
            a["n_low"][reset] = 0
        return found

    def _cusum_evidence(
        self,
        c_high: Float,
        c_low: Float,
        n_high: NDArray[Any],
        n_low: NDArray[Any],
        scale: Float,
        i: int,
    ) -> Evidence:
        """Build the Evidence Cusum.update would return for element ``i``."""
        k, h = float(self.config.cusum.k), float(self.config.cusum.h)
        hi, lo = float(c_high[i]), float(c_low[i])
        if hi >= lo:
            statistic, n, detail = hi, int(n_high[i]), "high"
            shift = k + hi / n if n else 0.0
        else:
            statistic, n, detail = lo, int(n_low[i]), "low"
            shift = -(k + lo / n)
        return Evidence(
            detector="innovation_mean",
            family="behaviour",
            statistic=statistic,
            threshold=h,
            alarm=statistic >= h,
            signal="innovation",
            values={
                "c_high": hi,
                "c_low": lo,
                "samples_since_zero": float(n),
                "shift_sigma": shift,
                "noise_scale": float(scale[i]),
            },
            detail=detail,
        )

    def _variance(
        self, rp: Sel, rc: Sel, time_s: Float, eps: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """VarianceChange.update, element-wise."""
        a, variance = self.arrays, self.config.variance
        lam = float(variance.lam)
        keep = 1.0 - lam
        s = keep * a["var_s"][rc] + lam * eps * eps
        a["var_s"][rc] = s
        if variance.lower:
            with np.errstate(divide="ignore"):
                inverse = np.where(s > 0.0, 1.0 / s, np.inf)
            low = s < 1.0
            statistic = np.where(low, inverse, s)
            threshold = np.where(low, 1.0 / self.variance_lower, self.variance_upper)
        else:
            statistic, threshold = s, np.full(s.shape, self.variance_upper)
        alarm = statistic >= threshold
        transitions = self.tracker.observe(rc, 1, statistic, threshold, alarm, time_s)
        return [
            (int(_indices(rp)[t.position]), 1, self._variance_evidence(float(s[t.position])), t)
            for t in transitions
        ]

    def _variance_evidence(self, s: float) -> Evidence:
        """Build the Evidence VarianceChange.update returns when S becomes ``s``."""
        variance = self.config.variance
        values = {
            "variance_ratio": s,
            "sigma_ratio": math.sqrt(s),
            "upper_limit": self.variance_upper,
        }
        if variance.lower:
            values["lower_limit"] = self.variance_lower
            if s < 1.0:
                statistic = 1.0 / s if s > 0.0 else math.inf
                threshold = 1.0 / self.variance_lower
                return Evidence(
                    "innovation_variance",
                    "behaviour",
                    statistic,
                    threshold,
                    statistic >= threshold,
                    "innovation",
                    values,
                    "low",
                )
        return Evidence(
            "innovation_variance",
            "behaviour",
            s,
            self.variance_upper,
            s >= self.variance_upper,
            "innovation",
            values,
            "high",
        )

    def _whiteness(
        self, rp: Sel, rc: Sel, time_s: Float, eps: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Whiteness.update, element-wise, block ends included."""
        a = self.arrays
        self._add_values(rc, eps, "wh")
        count = a["wh_count"][rc] + 1
        a["wh_count"][rc] = count
        ended = count >= self.config.whiteness.window
        if not ended.any():
            return []
        return self._end_blocks(_indices(rp)[ended], _indices(rc)[ended], time_s[ended])

    def _end_blocks(
        self, ep: Index, ec: Index, et: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Test the complete whiteness blocks of channels ``ec`` (at ``ep``); restart them.

        A block shorter than ``shortest_block`` (its period cut it short) is dropped untested.
        """
        a, config = self.arrays, self.config.whiteness
        reset = ec
        count = a["wh_count"][ec]
        tested = count >= config.shortest_block
        if not tested.all():
            ep, ec, et, count = ep[tested], ec[tested], et[tested], count[tested]
        sums = a["sums"][: self.lags + 2, ec]
        centred = centred_sums(sums, a["wh_head"][:, ec], a["wh_past"][:, ec], count)
        for name, initial in (
            ("wh_count", 0),
            ("sums", 0.0),
            ("wh_head", 0.0),
            ("wh_past", 0.0),
        ):
            a[name][..., reset] = initial
        if not ec.size:
            return []
        q, p_value, r = block_statistics(config, centred, count)
        alarm = p_value < config.alpha
        transitions = self.tracker.observe(ec, 2, q, self.whiteness_threshold, alarm, et)
        return [
            (
                int(ep[t.position]),
                2,
                evidence_of_block(
                    config,
                    self.whiteness_threshold,
                    float(q[t.position]),
                    float(p_value[t.position]),
                    r[:, t.position],
                    int(count[t.position]),
                ),
                t,
            )
            for t in transitions
        ]

    def _evaluate(
        self, dp: Index, dc: Index, time_s: Float, changing: NDArray[np.bool_]
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Run the parameter-based step of _ModeMonitor for channels ``dc``, all at once."""
        a, config, layout = self.arrays, self.config, self.layout
        for c in dc[changing].tolist():
            # an innovation alert is up: keep the live estimate re-learning
            self.inflate(c, config.reset_factor)
        settled = a["samples"][dc] >= self.settle
        if not settled.any():
            return []
        dp, dc, time_s = dp[settled], dc[settled], time_s[settled]
        relearning = changing[settled]
        states = a["rls"][:, dc]
        thetas = states[layout.theta].T
        covs = parameter_covariances(layout, states)
        sigma2 = a["sigma2"][dc]
        # The baseline side is computed again at every evaluation: caching it
        # per channel took 120 bytes per asset, which the memory target
        # (bench_service.py, under 2,048 bytes per asset) cannot spare.
        theta0 = a["theta0"][:, dc].T
        cov0 = a["cov0"][:, dc][self.tri_index].transpose(2, 0, 1)  # channels innermost
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        # feature Wald test; the read-outs serve the bands and the records
        # too. Both sides in one pass (a row's values do not depend on its
        # batch): the read-out's numpy calls, not its rows, take the time.
        k = dc.shape[0]
        both = np.concatenate((theta0, thetas))
        features, projected, projected_cov = self.drift.read_and_project(
            both, np.concatenate((cov0, covs))
        )
        base, live = features[:k], features[k:]
        x0, x, c0, cx = projected[:k], projected[k:], projected_cov[:k], projected_cov[k:]
        wald = self.drift.distances(x0, c0, x, cx)
        self.tap["evaluate"] = (dp, dc, wald)
        # the reset covariance shrinks the distance: it cannot say "back to normal"
        transitions = self.tracker.observe(
            dc, 3, wald.statistic, wald.threshold, wald.alarm, time_s, ~relearning
        )
        for t in transitions:
            ev = self.drift.evidence(wald, x0, x, t.position)
            found.append((int(dp[t.position]), 3, ev, t))
        # physical bands (PhysicalBands.update, element-wise); both sides'
        # dead times in one pass
        dead = dead_time_matrix(self.order, both, self.sample_period_s, features)
        found += self._bands(dp, dc, live, base, dead[k:], dead[:k], np.sqrt(sigma2), time_s)
        # the live read-out the records show
        rss = a["rls"][layout.rss, dc]
        with np.errstate(divide="ignore", invalid="ignore"):
            live_sigma2 = np.where(rss > 0.0, rss / a["rls"][layout.weight, dc], 1.0)
        a["current"][:, dc] = np.concatenate((live, np.sqrt(live_sigma2)[:, None]), axis=1).T
        return found

    def _bands(
        self,
        dp: Index,
        dc: Index,
        live: Float,
        base: Float,
        live_dead: Float,
        base_dead: Float,
        output_sigma: Float,
        time_s: Float,
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """PhysicalBands.set_baseline then update, for every channel of ``dc``.

        ``live`` and ``base`` are feature rows, ``live_dead`` and
        ``base_dead`` the (k, n_inputs) dead times of the same rows.
        """
        bands, order = self.config.bands, self.order
        m = order.n_inputs
        # (name, baseline column or constant, live column or constant, relative, tolerance)
        spec: list[tuple[str, Float, Float, bool, Float]] = []
        k = dc.shape[0]
        for i in range(m):
            tol = np.full(k, float(bands.gain_tolerance))
            spec.append((f"gain_{i + 1}", base[:, i], live[:, i], True, tol))
        tol = np.full(k, float(bands.time_constant_tolerance))
        spec.append(("time_constant_s", base[:, m], live[:, m], True, tol))
        for i in range(m):
            tol = np.full(k, float(bands.dead_time_tolerance))
            spec.append((f"dead_time_{i + 1}_s", base_dead[:, i], live_dead[:, i], True, tol))
        if order.constant:
            if bands.offset_tolerance is None:
                tol = bands.offset_sigmas * output_sigma
            else:
                tol = np.full(k, float(bands.offset_tolerance))
            spec.append(("offset", base[:, m + 1], live[:, m + 1], False, tol))
        self.tap["bands"] = spec
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        for name, baseline, value, relative, tol in spec:
            watched = np.isfinite(baseline) & ~(relative & (baseline == 0.0))
            if not watched.any():
                continue
            defined = np.isfinite(value)
            with np.errstate(divide="ignore", invalid="ignore"):
                change = (value - baseline) / np.abs(baseline) if relative else value - baseline
            statistic = np.where(defined, np.abs(change), np.inf)
            alarm = ~defined | (statistic >= tol)
            key = 4 + self.band_names.index(name)
            if watched.all():  # the common case: every channel, no selections
                w = None
                transitions = self.tracker.observe(dc, key, statistic, tol, alarm, time_s)
            else:
                w = np.flatnonzero(watched)
                transitions = self.tracker.observe(
                    dc[w], key, statistic[w], tol[w], alarm[w], time_s[w]
                )
            for t in transitions:
                r = t.position if w is None else int(w[t.position])
                found.append(
                    (
                        int(dp[r]),
                        key,
                        self._band_evidence(name, baseline[r], value[r], change[r], tol[r]),
                        t,
                    )
                )
        return found

    @staticmethod
    def _band_evidence(name: str, base: float, value: float, change: float, tol: float) -> Evidence:
        """Build the Evidence PhysicalBands.update returns for one feature."""
        base, value, change, tol = float(base), float(value), float(change), float(tol)
        if not math.isfinite(value):
            return Evidence(
                "physical_band",
                "behaviour",
                math.inf,
                tol,
                True,
                name,
                {"baseline": base},
                "undefined",
            )
        statistic = abs(change)
        return Evidence(
            "physical_band",
            "behaviour",
            statistic,
            tol,
            statistic >= tol,
            name,
            {"baseline": base, "current": value, "change": change},
            "high" if change >= 0.0 else "low",
        )

    def inflate(self, c: int, factor: float) -> None:
        """ArxEstimator.inflate_covariance on channel ``c``."""
        layout, column = self.layout, self.rls_column(c)
        scaled = [d * factor for d in column[layout.diag]]
        bound = self.config.rls.trace_bound(layout.n_params)
        trace = layout.trace(column) * factor
        if trace > bound:
            scaled = [d * bound / trace for d in scaled]
        self.arrays["rls"][layout.diag, c] = scaled


class _Route:
    """How the rows of the last one-wave step reached their channels, kept for the next.

    A site's assets report every sample time in the same order, so a step's
    rows usually come from the same slots, in the same mode, as the last
    one's: then the slot checks, the channel look-ups and the mode-switch
    test (nothing switched) would find what they found last time, and are
    skipped. Any other step, and any change of assets or baselines, drops it.
    """

    __slots__ = ("channels", "code", "group", "key", "slots")

    def __init__(self, code: int, slots: Index, group: int, channels: Index) -> None:
        self.code, self.group, self.channels = code, group, channels
        self.key = slots.tobytes()
        self.slots: Index = np.frombuffer(self.key, dtype=np.intp)  # a view: no second copy

    def matches(self, slots: Index, code: int | NDArray[np.int16]) -> bool:
        """Whether rows from ``slots`` in mode ``code`` take this route."""
        return isinstance(code, int) and code == self.code and slots.tobytes() == self.key


class FleetMonitor:
    """Drift monitor of every asset of one asset class, in arrays.

    Equivalent to one :class:`~arxwatch.daemon.monitor.AssetMonitor` per
    asset (same records for the same calls), at a few kilobytes per asset.
    Slot-by-mode tables route each row to its channel without a Python
    loop over rows.

    Parameters
    ----------
    names : SignalNames
        Site names and units of the class's signals, for alert readings.
    config : MonitorConfig, optional
        Detector and lifecycle settings shared by the class.
    quality_signals : sequence of str, optional
        Signals whose data-quality evidence :meth:`quality` will be given.
    backend : {"python", "compiled", "auto"}, optional
        How the rows of a sample time are judged: ``"python"`` (default),
        numpy calls per sample time, always available; ``"compiled"``, the
        innovation detectors and the live estimate in code compiled by numba
        (:mod:`arxwatch.daemon.fleetnative`, the optional ``fast`` extra;
        compiled when a model order is first met in a process, a few
        seconds), for sample times of up to about a thousand assets of one
        order (more go the numpy way); ``"auto"``, compiled when numba can
        be imported. The records and state are the same, bit for bit; a
        non-finite sample raises ValueError on the compiled back end.

    Raises
    ------
    ValueError
        If ``backend`` is not one of these names.
    ImportError
        If ``backend`` is ``"compiled"`` and numba is not installed.

    Examples
    --------
    >>> from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
    >>> from arxwatch.estimators.baseline import fit_baseline
    >>> loop = REFERENCE_LOOPS["first-order+dead-time"]
    >>> u = daily_operation(2 * 1440, 60.0, seed=1)
    >>> t = 1.7e9 + 60.0 * np.arange(len(u))
    >>> base = fit_baseline(loop.simulate(u, seed=2), u[:, None], t, sample_period_s=60.0).baseline
    >>> names = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))
    >>> fleet = FleetMonitor(names)
    >>> fleet.add_asset("block-c/ahu-c2", BaselineSet((base,)))
    0
    >>> fleet.step([0], [1.8e9], [14.0], [[40.0]], [None], [False])
    []
    """

    def __init__(
        self,
        names: SignalNames,
        config: MonitorConfig | None = None,
        quality_signals: Sequence[str] = (),
        backend: Backend = "python",
    ) -> None:
        self.names = names
        self.config = config if config is not None else MonitorConfig()
        self.backend = resolve_backend(backend)
        self._groups: list[_Group] = []
        self._group_of: dict[tuple[ArxOrder, float], int] = {}
        self._ids: list[str | None] = []
        self._slots: dict[str, int] = {}
        self._free: list[int] = []
        self._mode_codes: dict[str | None, int] = {}
        self._mode_labels: list[str | None] = []
        # per slot: mode code -> (group, channel) of its baseline; -1 where none
        self._chan_group = np.full((0, 0), -1, dtype=np.int16)
        self._chan_index = np.full((0, 0), -1, dtype=np.int32)
        self._first_mode = np.zeros(0, dtype=np.int16)  # first baseline of the set
        self._last_mode = np.zeros(0, dtype=np.int16)
        self._used = np.zeros(0, dtype=np.bool_)
        self.quality_keys = tuple(
            f"{kind}/{signal}" for signal in quality_signals for kind in _QUALITY_KINDS
        )
        self._quality_key = {key: i for i, key in enumerate(self.quality_keys)}
        self._quality = (
            TrackerBank(self.config.quality_policy, self.quality_keys, 0)
            if self.quality_keys
            else None
        )
        self.skipped = 0
        self._trace: TraceSink | None = None
        self._route: _Route | None = None  # see _Route

    # -- trace --------------------------------------------------------------
    @property
    def trace(self) -> TraceSink | None:
        """Collector of what each judged row and evaluation computed; None (the default): off.

        Assign a :class:`~arxwatch.daemon.trace.FleetTrace` to record the
        numbers behind the replay report's plots. Off, it costs one check per
        model order and wave; on or off, the records are the same.
        """
        return self._trace

    @trace.setter
    def trace(self, trace: TraceSink | None) -> None:
        if trace is not None:
            trace.bind(self)
        self._trace = trace

    @property
    def mode_labels(self) -> tuple[str | None, ...]:
        """Mode labels by the codes the fleet uses (a trace's evaluations carry codes)."""
        return tuple(self._mode_labels)

    def asset_at(self, slot: int) -> str:
        """Return the asset id in ``slot``.

        Raises
        ------
        KeyError
            If the slot holds no asset.
        """
        asset = self._ids[slot] if 0 <= slot < len(self._ids) else None
        if asset is None:
            raise KeyError(f"slot {slot} holds no asset")
        return asset

    # -- assets -------------------------------------------------------------
    def __contains__(self, asset_id: object) -> bool:
        return asset_id in self._slots

    def __len__(self) -> int:
        return len(self._slots)

    def slot(self, asset_id: str) -> int:
        """Return the slot of ``asset_id``.

        Raises
        ------
        KeyError
            If the asset is not monitored.
        """
        return self._slots[asset_id]

    def _resize_slots(self, size: int) -> None:
        old = self._last_mode.shape[0]
        modes = self._chan_group.shape[1]
        group = np.full((size, modes), -1, dtype=np.int16)
        index = np.full((size, modes), -1, dtype=np.int32)
        group[:old], index[:old] = self._chan_group, self._chan_index
        self._chan_group, self._chan_index = group, index
        self._first_mode = np.resize(self._first_mode, size)
        self._last_mode = np.resize(self._last_mode, size)
        used = np.zeros(size, dtype=np.bool_)
        used[:old] = self._used
        self._used = used
        if self._quality is not None:
            self._quality.resize(size)

    def _mode_code(self, label: str | None) -> int:
        code = self._mode_codes.get(label)
        if code is None:
            code = self._mode_codes[label] = len(self._mode_labels)
            self._mode_labels.append(label)
            slots = self._chan_group.shape[0]
            self._chan_group = np.hstack((self._chan_group, np.full((slots, 1), -1, np.int16)))
            self._chan_index = np.hstack((self._chan_index, np.full((slots, 1), -1, np.int32)))
        return code

    def _channels(self, slot: int) -> list[tuple[int, int, int]]:
        """(mode code, group, channel) of every baseline of ``slot``."""
        codes = np.flatnonzero(self._chan_group[slot] >= 0).tolist()
        return [
            (code, int(self._chan_group[slot, code]), int(self._chan_index[slot, code]))
            for code in codes
        ]

    def add_asset(self, asset_id: str, baselines: BaselineSet) -> int:
        """Start monitoring ``asset_id`` against ``baselines``; return its slot.

        Raises
        ------
        ValueError
            If the asset is already monitored, the set is empty, or a
            baseline's inputs disagree with the signal names.
        """
        if not asset_id:
            raise ValueError("asset id must be a non-empty string")
        if asset_id in self._slots:
            raise ValueError(f"asset {asset_id!r} is already monitored")
        if not baselines.baselines:
            raise ValueError(f"asset {asset_id!r}: the baseline set is empty")
        for b in baselines.baselines:
            if b.order.n_inputs != len(self.names.inputs):
                raise ValueError(
                    f"asset {asset_id!r} mode {b.mode!r}: names give {len(self.names.inputs)} "
                    f"input(s), the baseline has {b.order.n_inputs}"
                )
        codes = [self._mode_code(b.mode) for b in baselines.baselines]
        if self._free:
            slot = self._free.pop()
            self._ids[slot] = asset_id
        else:
            slot = len(self._ids)
            self._ids.append(asset_id)
            if slot >= self._last_mode.shape[0]:
                self._resize_slots(_grown(slot + 1, self._last_mode.shape[0]))
        self._slots[asset_id] = slot
        self._used[slot] = True
        self._chan_group[slot] = -1
        self._chan_index[slot] = -1
        self._first_mode[slot] = codes[0]
        self._last_mode[slot] = _NO_SAMPLE
        if self._quality is not None:
            self._quality.clear([slot])
        for b, code in zip(baselines.baselines, codes, strict=True):
            self._add_channel(slot, code, b)
        return slot

    def _add_channel(self, slot: int, code: int, baseline: Baseline) -> None:
        self._route = None
        key = (baseline.order, baseline.sample_period_s)
        g = self._group_of.get(key)
        if g is None:
            g = self._group_of[key] = len(self._groups)
            compiled = self.backend == "compiled"
            group = _Group(baseline.order, baseline.sample_period_s, self.config, compiled)
            self._groups.append(group)
        self._chan_group[slot, code] = g
        self._chan_index[slot, code] = self._groups[g].add(slot, code, baseline)

    def add_baseline(self, asset_id: str, baseline: Baseline) -> None:
        """Start judging one more operating mode of a monitored asset.

        For baselines learned one mode at a time: the asset's other modes
        keep their state.

        Raises
        ------
        KeyError
            If the asset is not monitored.
        ValueError
            If the mode already has a baseline, or mixing it with the
            asset's modes would break :class:`BaselineSet`'s rules (a
            baseline without a mode must be the asset's only one).
        """
        slot = self._slots[asset_id]
        modes = [self._mode_labels[code] for code, _, _ in self._channels(slot)]
        if baseline.order.n_inputs != len(self.names.inputs):
            raise ValueError(
                f"asset {asset_id!r} mode {baseline.mode!r}: names give "
                f"{len(self.names.inputs)} input(s), the baseline has {baseline.order.n_inputs}"
            )
        if baseline.mode in modes or (None in modes) or (baseline.mode is None and modes):
            raise ValueError(
                f"asset {asset_id!r} has baselines for modes {modes}; cannot add mode "
                f"{baseline.mode!r}"
            )
        self._add_channel(slot, self._mode_code(baseline.mode), baseline)

    def remove_asset(self, asset_id: str) -> None:
        """Stop monitoring ``asset_id`` and free its arrays for reuse.

        Raises
        ------
        KeyError
            If the asset is not monitored.
        """
        slot = self._slots.pop(asset_id)
        self._route = None
        for _, g, c in self._channels(slot):
            self._groups[g].remove(c)
        self._chan_group[slot] = -1
        self._chan_index[slot] = -1
        self._used[slot] = False
        self._ids[slot] = None
        self._free.append(slot)
        if self._trace is not None:
            self._trace.forget_slot(slot)

    def restart(self, slot: int) -> None:
        """Forget the past samples of every mode of ``slot`` (after a data gap)."""
        for _, g, c in self._channels(slot):
            self._groups[g].restart(np.array([c], dtype=np.intp))

    # -- rows ---------------------------------------------------------------
    def step(
        self,
        slots: Sequence[int] | NDArray[np.intp],
        time_s: Sequence[float] | Float,
        y: Sequence[float] | Float,
        u: Sequence[Sequence[float]] | Float,
        modes: Sequence[str | None],
        restart: Sequence[bool] | NDArray[np.bool_],
    ) -> list[dict[str, Any]]:
        """Judge aligned rows; return the alert records they cause.

        Equivalent, row by row in the given order, to ``if restart:
        monitor.restart()`` followed by ``monitor.step(time_s, y, u, mode)``
        on each asset's :class:`~arxwatch.daemon.monitor.AssetMonitor`.

        Parameters
        ----------
        slots : sequence of int, shape (k,)
            Asset slots (:meth:`add_asset`).
        time_s, y : sequences of float, shape (k,)
            Sample times (epoch seconds) and outputs.
        u : array_like, shape (k, n_inputs)
            Inputs, in the baseline's order.
        modes : sequence of str or None, length k
            Operating mode of each row.
        restart : sequence of bool, shape (k,)
            Rows after a data gap.

        Returns
        -------
        list of dict
            Alert records (schema ``arxwatch.alert/1``), in row order.

        Raises
        ------
        ValueError
            If the rows disagree in length, a slot holds no asset, or an
            asset has two rows with the same sample time.
        """
        slot_a = np.asarray(slots, dtype=np.intp)
        time_a = np.asarray(time_s, dtype=np.float64)
        # contiguous, as the compiled kernels take them
        y_a = np.ascontiguousarray(y, dtype=np.float64)
        k = slot_a.shape[0]
        u_a = np.ascontiguousarray(np.reshape(u, (k, len(self.names.inputs))), dtype=np.float64)
        if not (time_a.shape == y_a.shape == slot_a.shape) or len(modes) != k:
            raise ValueError(
                f"rows disagree in length: slots {slot_a.shape}, time_s {time_a.shape}, "
                f"y {y_a.shape}, u {u_a.shape}, modes {len(modes)}"
            )
        if k == 0:
            return []
        # one mode label for every row (the usual case) is a scalar code: no array to
        # build (count compares in C; a set would hash every label, ~15x slower)
        first = modes[0]
        get = self._mode_codes.get
        code_a: int | NDArray[np.int16]
        if modes.count(first) == k:
            code_a = get(first, _OTHER_MODE)
        else:
            code_a = np.array([get(m, _OTHER_MODE) for m in modes], dtype=np.int16)
        restart_a = np.asarray(restart, dtype=np.bool_)
        one_time = bool(time_a.min() == time_a.max())  # a live grid point: one wave
        route = self._route
        if one_time and route is not None and route.matches(slot_a, code_a):
            return self._finish(self._wave_routed(route, time_a, y_a, u_a, restart_a))
        self._route = None  # the rows below may switch modes: a route is made anew
        used = self._used
        if slot_a.min() < 0 or slot_a.max() >= used.shape[0] or not used[slot_a].all():
            inside = (slot_a >= 0) & (slot_a < used.shape[0])
            held = np.zeros(k, dtype=np.bool_)
            held[inside] = used[slot_a[inside]]
            raise ValueError(f"slot {int(slot_a[~held][0])} holds no asset")
        records: list[tuple[int, int, dict[str, Any]]] = []
        # waves of rows with distinct sample times: each asset has one row per wave
        if one_time:
            if k > 1 and np.bincount(slot_a).max() > 1:
                raise ValueError("an asset has two rows with the same sample time")
            records = self._wave(None, slot_a, time_a, y_a, u_a, code_a, restart_a)
        else:
            order = np.argsort(time_a, kind="stable")
            for wave in np.split(order, np.flatnonzero(np.diff(time_a[order])) + 1):
                if np.bincount(slot_a[wave]).max() > 1:
                    raise ValueError("an asset has two rows with the same sample time")
                records += self._wave(wave, slot_a, time_a, y_a, u_a, code_a, restart_a)
        return self._finish(records)

    @staticmethod
    def _finish(records: list[tuple[int, int, dict[str, Any]]]) -> list[dict[str, Any]]:
        """Return the records of a step in row order, then key order."""
        if len(records) > 1:
            records.sort(key=lambda item: (item[0], item[1]))
        return [record for _, _, record in records]

    def _wave(
        self,
        rows: Index | None,
        slots: Index,
        time_s: Float,
        y: Float,
        u: Float,
        codes: int | NDArray[np.int16],
        restart: NDArray[np.bool_],
    ) -> list[tuple[int, int, dict[str, Any]]]:
        """Judge the rows ``rows`` (None: every row, in order) of one sample time."""
        if rows is None:
            s, restarting, code = slots, restart, codes
        else:
            s, restarting = slots[rows], restart[rows]
            code = codes if isinstance(codes, int) else codes[rows]
            time_s, y, u = time_s[rows], y[rows], u[rows]
        if restarting.any():
            for slot in s[restarting].tolist():
                self.restart(slot)
        # from here on, positions are within the wave; ``rows`` maps them back
        if isinstance(code, int) and code < 0:  # one mode, and no baseline has it
            group = np.full(s.shape[0], -1, dtype=np.intp)
        elif isinstance(code, int) or code.min() >= 0:  # every row's mode has a code
            group = self._chan_group[s, code].astype(np.intp)
        else:
            known = code >= 0
            group = np.full(s.shape[0], -1, dtype=np.intp)
            group[known] = self._chan_group[s[known], code[known]]
        # a mode switch into a mode with a baseline restarts that mode's histories
        switch = self._last_mode[s] != code
        self._last_mode[s] = code
        out: list[tuple[int, int, dict[str, Any]]] = []
        low, high = int(group.min()), int(group.max())
        everyone = low >= 0
        if not everyone:  # rows in a mode without a baseline
            has = group >= 0
            self.skipped += int((~has).sum())
            if high < 0:
                return []
            low = int(group[has].min())
            switch &= has
        for g in [low] if low == high else np.unique(group[group >= 0]).tolist():
            target = self._groups[g]
            if low == high and everyone:  # one group takes every row: no selection
                ch = self._chan_index[s, code].astype(np.intp)
                if switch.any():
                    target.restart(ch[switch])
                out += self._judge(target, ch, rows, time_s, y, u)
                if rows is None and isinstance(code, int):
                    self._route = _Route(code, s, g, ch)
                continue
            where = np.flatnonzero(group == g)
            code_g = code if isinstance(code, int) else code[where]
            ch = self._chan_index[s[where], code_g].astype(np.intp)
            switched = switch[where]
            if switched.any():
                target.restart(ch[switched])
            at = where if rows is None else rows[where]
            out += self._judge(target, ch, at, time_s[where], y[where], u[where])
        return out

    def _wave_routed(
        self, route: _Route, time_s: Float, y: Float, u: Float, restart: NDArray[np.bool_]
    ) -> list[tuple[int, int, dict[str, Any]]]:
        """Judge a one-wave step whose rows follow ``route`` (nothing to look up or switch)."""
        if restart.any():
            for slot in route.slots[restart].tolist():
                self.restart(slot)
        return self._judge(self._groups[route.group], route.channels, None, time_s, y, u)

    def _judge(
        self, target: _Group, ch: Index, rows: Index | None, time_s: Float, y: Float, u: Float
    ) -> list[tuple[int, int, dict[str, Any]]]:
        """Step ``target``'s channels ``ch``; return (row, key, record) of its transitions.

        ``rows`` maps a position in ``ch`` to the step's row (None: the same).
        """
        found = target.step(ch, time_s, y, u)
        if self._trace is not None:
            self._trace_group(self._trace, target, ch, time_s, y)
        out: list[tuple[int, int, dict[str, Any]]] = []
        inflate: set[int] = set()
        for pos, key, evidence, transition in found:
            c = int(ch[pos])
            row = pos if rows is None else int(rows[pos])
            record = self._record(target, c, key, evidence, transition, float(time_s[pos]))
            out.append((row, key, record))
            if transition.state == "raised" and evidence.detector in CHANGE_DETECTORS:
                inflate.add(c)
        for c in inflate:
            target.inflate(c, self.config.reset_factor)
        return out

    @staticmethod
    def _trace_group(trace: TraceSink, group: _Group, ch: Index, time_s: Float, y: Float) -> None:
        """Hand ``trace`` what ``group.step`` just computed for channels ``ch``."""
        tap, k = group.tap, ch.shape[0]
        prediction, innovation = np.full(k, np.nan), np.full(k, np.nan)
        high, low = np.full(k, np.nan), np.full(k, np.nan)
        if "base" in tap:
            rp, predicted, z = tap["base"]
            prediction[rp], innovation[rp] = predicted, z
        if "cusum" in tap:
            rp, c_high, c_low = tap["cusum"]
            high[rp], low[rp] = c_high, c_low
        slots = group.arrays["asset"][ch]
        trace.add_rows(slots, time_s, y, prediction, innovation, high, low)
        if "evaluate" not in tap:
            return
        dp, dc, wald = tap["evaluate"]
        features = trace.features
        shape = (dc.shape[0], len(features))
        value, baseline = np.full(shape, np.nan), np.full(shape, np.nan)
        lower, upper = np.full(shape, np.nan), np.full(shape, np.nan)
        for name, base, live, relative, tol in tap["bands"]:
            j = features.index(name)
            value[:, j], baseline[:, j] = live, base
            # the band _bands judges: |change| >= tol alarms (relative to |baseline|)
            watched = np.isfinite(base) & ~(relative & (base == 0.0))
            half = tol * np.abs(base) if relative else tol
            lower[:, j] = np.where(watched, base - half, np.nan)
            upper[:, j] = np.where(watched, base + half, np.nan)
        trace.add_evaluations(
            group.arrays["asset"][dc],
            group.arrays["mode"][dc],
            time_s[dp],
            value,
            baseline,
            lower,
            upper,
            wald.statistic,
            wald.threshold,
        )

    def _record(
        self,
        group: _Group,
        c: int,
        key: int,
        evidence: Evidence,
        transition: BankTransition,
        time_s: float,
        keys: Sequence[str] | None = None,
    ) -> dict[str, Any]:
        asset = self._ids[int(group.arrays["asset"][c])]
        if asset is None:
            raise AssertionError("a channel in use belongs to an asset")
        return build_record(
            asset,
            Transition(
                (keys or group.keys)[key],
                transition.state,
                transition.severity,
                time_s,
                transition.first_seen_s,
                evidence,
            ),
            self.names,
            math.sqrt(float(group.arrays["sigma2"][c])),
            group.baseline_values(c),
            group.current_values(c),
            self._mode_labels[int(group.arrays["mode"][c])],
        )

    # -- data quality -------------------------------------------------------
    def quality(
        self, slot: int, evidence: Sequence[Evidence], time_s: float
    ) -> list[dict[str, Any]]:
        """Pass data-quality evidence of ``slot`` through its lifecycle; return records.

        Equivalent to the records ``AssetMonitor.signal_sample`` (or
        ``check_stale``) returns for the same evidence.

        Raises
        ------
        KeyError
            If an evidence's ``detector/signal`` is not one of :attr:`quality_keys`.
        """
        bank = self._quality
        if bank is None:
            if evidence:
                raise KeyError(f"no quality signals configured, got {evidence[0].signal!r}")
            return []
        out = []
        for ev in evidence:
            key = self._quality_key[f"{ev.detector}/{ev.signal}"]
            transition = bank.observe_one(slot, key, ev.statistic, ev.threshold, ev.alarm, time_s)
            if transition is None:
                continue
            # the records of the mode last seen, else of the first baseline (as AssetMonitor)
            code = int(self._last_mode[slot])
            if code < 0 or self._chan_group[slot, code] < 0:
                code = int(self._first_mode[slot])
            group = self._groups[int(self._chan_group[slot, code])]
            channel = int(self._chan_index[slot, code])
            out.append(self._record(group, channel, key, ev, transition, time_s, self.quality_keys))
        return out

    def quality_busy(self, slots: NDArray[np.intp], signals: NDArray[np.intp]) -> NDArray[np.bool_]:
        """Return, per (slot, quality signal index), whether any of its episodes is busy.

        Busy: alarms pending or raised. A quiet evaluation of a quiet episode
        changes nothing (see :meth:`TrackerBank.observe_one`), so a caller
        only needs to build evidence for evaluations that alarm or whose
        episode is busy. ``signals`` index the fleet's ``quality_signals``.
        """
        bank = self._quality
        if bank is None:
            return np.zeros(slots.shape, dtype=np.bool_)
        kinds = len(_QUALITY_KINDS)
        if slots.shape[0] == 1:  # one check (a live message): its own episodes alone
            slot, first = int(slots[0]), int(signals[0]) * kinds
            row = slice(first, first + kinds)
            # a handful of entries: Python's any() on lists beats two ndarray.any() calls
            busy = any(bank.raised[slot, row].tolist()) or any(bank.alarms[slot, row].tolist())
            return np.array([busy])
        if not (bank.raised.any() or bank.alarms.any()):  # the usual case: all quiet
            return np.zeros(slots.shape, dtype=np.bool_)
        busy = bank.raised[slots] | (bank.alarms[slots] != 0)
        per_signal = busy.reshape(slots.shape[0], busy.shape[1] // kinds, kinds)  # none: shape kept
        out: NDArray[np.bool_] = per_signal[np.arange(slots.shape[0]), signals].any(axis=1)
        return out

    # -- read-out -----------------------------------------------------------
    def active(self, asset_id: str) -> dict[str, str]:
        """Return the raised alerts of ``asset_id`` (``mode:detector/signal`` -> severity)."""
        slot = self._slots[asset_id]
        active: dict[str, str] = {}
        for code, g, c in self._channels(slot):
            for key, severity in self._groups[g].tracker.active(c).items():
                active[f"{self._mode_labels[code]}:{key}"] = severity
        if self._quality is not None:
            active.update({f"quality:{k}": v for k, v in self._quality.active(slot).items()})
        return active

    def readout(self, asset_id: str, mode: str | None = None) -> dict[str, float]:
        """Return the latest live physical read-out of ``asset_id`` in ``mode``.

        Raises
        ------
        KeyError
            If the asset has no baseline for ``mode``.
        """
        slot = self._slots[asset_id]
        code = self._mode_codes.get(mode)
        if code is None or self._chan_group[slot, code] < 0:
            raise KeyError(f"asset {asset_id!r} has no baseline for mode {mode!r}")
        group = self._groups[int(self._chan_group[slot, code])]
        return group.current_values(int(self._chan_index[slot, code]))

    # -- checkpoints --------------------------------------------------------
    def _slot_arrays(self) -> dict[str, NDArray[Any]]:
        return {
            "chan_group": self._chan_group,
            "chan_index": self._chan_index,
            "first_mode": self._first_mode,
            "last_mode": self._last_mode,
            "used": self._used,
        }

    def to_state(self) -> dict[str, Any]:
        """Return the whole monitor as ``{"meta": JSON-safe dict, "arrays": {name: ndarray}}``.

        The arrays are numeric (no object dtype), so they can be stored with
        ``numpy.savez`` and read back with ``allow_pickle=False``.
        """
        groups = []
        slots = len(self._ids)  # idle slot capacity is not saved
        arrays: dict[str, NDArray[Any]] = {
            name: a[:slots] for name, a in self._slot_arrays().items()
        }
        for g, group in enumerate(self._groups):
            meta, group_arrays = group.to_state()
            groups.append(meta)
            arrays.update({f"g{g}.{name}": v for name, v in group_arrays.items()})
        if self._quality is not None:
            arrays.update({f"quality.{k}": v[:slots] for k, v in self._quality.arrays().items()})
        meta = {
            "format": "arxwatch.fleet",
            "version": _STATE_VERSION,
            "quality_keys": list(self.quality_keys),
            "modes": list(self._mode_labels),
            "groups": groups,
            "ids": list(self._ids),
            "free": list(self._free),
            "skipped": self.skipped,
        }
        return {"meta": meta, "arrays": arrays}

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Restore a monitor saved by :meth:`to_state` with the same names and settings.

        Raises
        ------
        ValueError
            If the state has another format or version, other quality
            signals, or arrays that do not fit these settings; the monitor is
            then left as it was.
        """
        self._route = None
        meta, arrays = state["meta"], state["arrays"]
        if meta.get("format") != "arxwatch.fleet" or meta.get("version") != _STATE_VERSION:
            raise ValueError(
                f"saved monitor state is {meta.get('format')!r} version {meta.get('version')!r}; "
                f"this release reads 'arxwatch.fleet' version {_STATE_VERSION}"
            )
        if list(meta["quality_keys"]) != list(self.quality_keys):
            raise ValueError(
                f"saved monitor checks quality of {meta['quality_keys']}, "
                f"the configuration of {list(self.quality_keys)}"
            )
        fresh = FleetMonitor(self.names, self.config, (), self.backend)
        fresh.quality_keys = self.quality_keys
        fresh._quality_key = self._quality_key
        fresh._quality = (
            TrackerBank(self.config.quality_policy, self.quality_keys, 0)
            if self.quality_keys
            else None
        )
        for g, group_meta in enumerate(meta["groups"]):
            order = decode_order(group_meta["order"], f"groups[{g}].order")
            period = float(group_meta["sample_period_s"])
            group = _Group(order, period, self.config, self.backend == "compiled")
            prefix = f"g{g}."
            group.load_state(
                group_meta, {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
            )
            fresh._group_of[(order, period)] = g
            fresh._groups.append(group)
        fresh._mode_labels = [None if m is None else str(m) for m in meta["modes"]]
        fresh._mode_codes = {label: code for code, label in enumerate(fresh._mode_labels)}
        fresh._ids = [None if i is None else sys.intern(str(i)) for i in meta["ids"]]
        fresh._slots = {i: slot for slot, i in enumerate(fresh._ids) if i is not None}
        fresh._free = [int(v) for v in meta["free"]]
        slots = np.asarray(arrays["last_mode"]).shape[0]
        for name, array in self._slot_arrays().items():
            saved = np.asarray(arrays[name])
            expected = (slots, len(fresh._mode_labels)) if array.ndim == 2 else (slots,)
            if saved.shape != expected or saved.dtype != array.dtype:
                raise ValueError(
                    f"saved monitor array {name!r} has shape {saved.shape} and dtype "
                    f"{saved.dtype}; expected {expected} of {array.dtype}"
                )
            setattr(fresh, f"_{name}", saved.copy())
        if fresh._quality is not None:
            prefix = "quality."
            fresh._quality.load_arrays(
                {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
            )
            if fresh._quality.capacity != slots:
                raise ValueError("saved quality state and slots disagree in size")
        fresh.skipped = int(meta["skipped"])
        trace = self._trace
        self.__dict__.update(fresh.__dict__)
        self.trace = trace  # rebinding re-reads which asset each slot holds

    def alert_counts(self) -> dict[tuple[str, str], int]:
        """Return how many alerts are raised, by (family, severity)."""
        out = {
            (family, severity): 0
            for family in ("behaviour", "data_quality")
            for severity in ("warning", "critical")
        }
        banks = [("behaviour", g.tracker, g.arrays["used"]) for g in self._groups]
        if self._quality is not None:
            banks.append(("data_quality", self._quality, self._used))
        for family, bank, used in banks:
            raised = bank.raised[used]
            critical = int((raised & bank.critical[used]).sum())
            out[(family, "critical")] += critical
            out[(family, "warning")] += int(raised.sum()) - critical
        return out

    def top_ratios(self, limit: int) -> list[tuple[str, str, float]]:
        """Return the ``limit`` largest statistic / threshold ratios of the innovation tests.

        Each entry is (asset, detector, ratio) for the CUSUM and the variance
        test of every judged asset and mode: how close each is to alarming
        (1 is the threshold), for a dashboard of the assets to watch.
        """
        found: list[tuple[float, str, str]] = []
        for g in self._groups:
            used = np.flatnonzero(g.arrays["used"])
            if not used.shape[0]:
                continue
            cusum = np.maximum(g.arrays["c_high"][used], g.arrays["c_low"][used])
            for detector, ratio in (
                ("innovation_mean", cusum / float(self.config.cusum.h)),
                ("innovation_variance", g.arrays["var_s"][used] / g.variance_upper),
            ):
                best = np.argsort(-ratio, kind="stable")[:limit]
                for i in best.tolist():
                    asset = self._ids[int(g.arrays["asset"][used[i]])]
                    if asset is not None:
                        found.append((float(ratio[i]), asset, detector))
        found.sort(key=lambda item: -item[0])
        top: list[tuple[str, str, float]] = []
        seen: set[tuple[str, str]] = set()
        for ratio, asset, detector in found:
            if (asset, detector) not in seen:  # an asset's other mode says less
                seen.add((asset, detector))
                top.append((asset, detector, ratio))
            if len(top) == limit:
                break
        return top

    def memory_bytes(self) -> int:
        """Bytes held by the arrays of every channel and slot."""
        total = sum(g.memory_bytes() for g in self._groups)
        total += sum(a.nbytes for a in self._slot_arrays().values())
        if self._quality is not None:
            total += sum(a.nbytes for a in self._quality.arrays().values())
        return total
