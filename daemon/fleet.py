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
  whiteness block, the parameter-based evaluations every
  ``evaluate_every`` samples, building records) call the very functions the
  scalar detectors use, one channel at a time;
* the alert lifecycle is :class:`~arxwatch.daemon.decide.TrackerBank`.

Rows of one call are taken in waves of distinct sample times, so an asset
with several rows in one call sees them in time order, as sequential calls
of ``AssetMonitor.step`` would. Pure: arrays in, records out; no clock, no
I/O.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.alert import SignalNames, build_record
from arxwatch.daemon.decide import BankTransition, TrackerBank, Transition
from arxwatch.daemon.monitor import CHANGE_DETECTORS, MonitorConfig, readout_values
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.baseline import Baseline, BaselineSet
from arxwatch.estimators.codec import decode_order, encode_order
from arxwatch.estimators.detect._sums import centred_sums
from arxwatch.estimators.detect.bands import PhysicalBands
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.detect.parameter import FeatureDrift, FeatureDriftConfig
from arxwatch.estimators.detect.prewhiten import fit_reference
from arxwatch.estimators.detect.whiteness import block_evidence
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.readout import feature_names, read_out
from arxwatch.estimators.rls import TRACE_CHECK_EVERY, StateLayout, build_kernel

__all__ = ["FleetMonitor"]

_STATE_VERSION = 1
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
_QUALITY_KINDS = ("out_of_range", "stuck", "gap", "stale")

Float = NDArray[np.float64]
Index = NDArray[np.intp]


def _band_features(order: ArxOrder) -> tuple[str, ...]:
    """Every feature a band may watch for ``order`` (PhysicalBands order)."""
    names = [f"gain_{i + 1}" for i in range(order.n_inputs)]
    names.append("time_constant_s")
    names.extend(f"dead_time_{i + 1}_s" for i in range(order.n_inputs))
    if order.constant:
        names.append("offset")
    return tuple(names)


def _grown(size: int, capacity: int) -> int:
    return max(size, int(capacity * _GROWTH) + 1)


class _Group:
    """Every channel whose baseline has one model order, in arrays."""

    def __init__(self, order: ArxOrder, sample_period_s: float, config: MonitorConfig) -> None:
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
        self.drift = FeatureDrift(
            FeatureDriftConfig(
                order=order, sample_period_s=sample_period_s, alpha=config.drift_alpha, every=1
            )
        )
        self.bands = PhysicalBands(config.bands)
        self.tri_rows, self.tri_cols = np.triu_indices(n)
        # full (n, n) positions of the upper triangle, for rebuilding rows
        tri_index = np.zeros((n, n), dtype=np.intp)
        tri_index[self.tri_rows, self.tri_cols] = np.arange(self.tri_rows.shape[0])
        tri_index[self.tri_cols, self.tri_rows] = np.arange(self.tri_rows.shape[0])
        self.tri_index = tri_index
        self.arrays: dict[str, NDArray[Any]] = {}
        self.tracker = TrackerBank(config.policy, self.keys, 0)
        self.free: list[int] = []
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
            "pw_sums": ((p + 2,), np.float64, 0.0),
            "pw_head": ((p,), np.float64, 0.0),
            "pw_past": ((p,), np.float64, 0.0),
            "pw_phi": ((p,), np.float64, 0.0),
            "pw_scale": ((), np.float64, 1.0),
            "c_high": ((), np.float64, 0.0),
            "c_low": ((), np.float64, 0.0),
            "n_high": ((), np.int32, 0),
            "n_low": ((), np.int32, 0),
            "var_s": ((), np.float64, 1.0),
            "wh_count": ((), np.int32, 0),
            "wh_sums": ((lags + 2,), np.float64, 0.0),
            "wh_head": ((lags,), np.float64, 0.0),
            "wh_past": ((lags,), np.float64, 0.0),
            "samples": ((), np.int64, 0),
            "current": ((len(self.features) + 1,), np.float64, 0.0),
        }

    def _allocate(self, capacity: int) -> None:
        old = self.capacity
        for name, (tail, dtype, initial) in self._shapes().items():
            grown = np.full((capacity, *tail), initial, dtype=dtype)
            if name in self.arrays and old:
                grown[: min(old, capacity)] = self.arrays[name][:capacity]
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
            a[name][c] = initial
        self.tracker.clear([c])
        a["used"][c] = True
        a["asset"][c] = asset
        a["mode"][c] = mode
        a["theta0"][c] = baseline.theta
        a["cov0"][c] = baseline.covariance[self.tri_rows, self.tri_cols]
        a["sigma2"][c] = baseline.sigma2
        estimator = ArxEstimator(self.order, self.config.rls)
        estimator.warm_start(
            baseline.theta.tolist(),
            np.asarray(baseline.covariance) / baseline.sigma2,
            baseline.sigma2,
        )
        a["rls"][c] = estimator.to_state()["rls"]
        a["current"][c] = list(self.baseline_values(c).values())
        return c

    def remove(self, c: int) -> None:
        self.arrays["used"][c] = False
        self.arrays["asset"][c] = -1
        self.free.append(c)

    def restart(self, channels: Index) -> None:
        """Forget past samples of ``channels`` (RegressorHistory.clear, twice)."""
        a = self.arrays
        for prefix in ("base", "rls"):
            a[f"{prefix}_y"][channels] = 0.0
            a[f"{prefix}_u"][channels] = 0.0
            a[f"{prefix}_count"][channels] = 0

    def to_state(self) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
        """Return (JSON-safe description, arrays) of the group, for checkpoints."""
        meta = {
            "order": encode_order(self.order),
            "sample_period_s": self.sample_period_s,
            "capacity": self.capacity,
            "free": list(self.free),
        }
        arrays = dict(self.arrays)
        arrays.update({f"tracker.{k}": v for k, v in self.tracker.arrays().items()})
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> None:
        """Restore a group saved by :meth:`to_state` under the same settings.

        Raises
        ------
        ValueError
            If an array is missing or its shape or type does not fit.
        """
        capacity = int(meta["capacity"])
        self._allocate(capacity)
        for name, (tail, dtype, _) in self._shapes().items():
            saved = arrays.get(name)
            if saved is None:
                raise ValueError(f"saved monitor state lacks {name!r}")
            if saved.shape != (capacity, *tail) or saved.dtype != np.dtype(dtype):
                raise ValueError(
                    f"saved monitor array {name!r} has shape {saved.shape} and dtype "
                    f"{saved.dtype}; these settings need {(capacity, *tail)} of {np.dtype(dtype)}"
                )
            self.arrays[name] = np.array(saved, copy=True)
        prefix = "tracker."
        self.tracker.load_arrays(
            {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
        )
        self.free = [int(c) for c in meta["free"]]

    # -- read-outs ----------------------------------------------------------
    def baseline_theta_cov(self, c: int) -> tuple[Float, Float]:
        cov = self.arrays["cov0"][c][self.tri_index]
        return self.arrays["theta0"][c].copy(), cov

    def baseline_readout_values(self, c: int) -> tuple[Any, dict[str, float]]:
        theta0 = self.arrays["theta0"][c]
        readout = read_out(self.order, theta0, self.sample_period_s)
        return readout, readout_values(readout, self.order, float(self.arrays["sigma2"][c]))

    def baseline_values(self, c: int) -> dict[str, float]:
        return self.baseline_readout_values(c)[1]

    def current_values(self, c: int) -> dict[str, float]:
        names = (*self.features, "sigma")
        return dict(zip(names, self.arrays["current"][c].tolist(), strict=True))

    def rls_column(self, c: int) -> list[float]:
        column: list[float] = self.arrays["rls"][c].tolist()
        return column

    # -- the vectorised step ------------------------------------------------
    def _regressor(self, prefix: str, ch: Index, u: Float) -> Float:
        """phi(k) of ``ch`` from their histories and current inputs (RegressorHistory.regressor)."""
        order, a = self.order, self.arrays
        hist_y, hist_u = a[f"{prefix}_y"][ch], a[f"{prefix}_u"][ch]
        columns = [-hist_y[:, j] for j in range(order.na)]
        for i, (nb_i, nk_i) in enumerate(zip(order.nb, order.nk, strict=True)):
            for lag in range(nk_i, nk_i + nb_i):
                columns.append(u[:, i] if lag == 0 else hist_u[:, i, lag - 1])
        if order.constant:
            columns.append(np.ones(ch.shape[0]))
        return np.stack(columns, axis=1)

    def _push(self, prefix: str, ch: Index, y: Float, u: Float) -> None:
        """Shift y(k) and u(k) into the histories of ``ch`` (RegressorHistory.push)."""
        a = self.arrays
        hist_y = a[f"{prefix}_y"]
        if hist_y.shape[1]:
            rows = hist_y[ch]
            rows[:, 1:] = rows[:, :-1].copy()
            rows[:, 0] = y
            hist_y[ch] = rows
        hist_u = a[f"{prefix}_u"]
        if hist_u.shape[2]:
            rows_u = hist_u[ch]
            rows_u[:, :, 1:] = rows_u[:, :, :-1].copy()
            rows_u[:, :, 0] = u
            hist_u[ch] = rows_u
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
        a, config = self.arrays, self.config
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        positions = np.arange(ch.shape[0])
        # _ModeMonitor.step reads the tracker before this row's evidence is observed
        changing = self.tracker.raised[ch, 0] | self.tracker.raised[ch, 1]
        # 1. the baseline model's normalised residual, winsorised
        ready = a["base_count"][ch] >= self.depth
        y_past = y.copy()
        if ready.any():
            rp = positions[ready]
            rc = ch[ready]
            phi = self._regressor("base", rc, u[ready])
            theta = a["theta0"][rc]
            cov = a["cov0"][rc]
            prediction = np.zeros(rc.shape[0])
            spread = np.zeros(rc.shape[0])
            n = self.order.n_params
            for j in range(n):
                prediction += phi[:, j] * theta[:, j]
                inner = np.zeros(rc.shape[0])
                for i in range(n):
                    inner += cov[:, self.tri_index[j, i]] * phi[:, i]
                spread += phi[:, j] * inner
            e = y[ready] - prediction
            z = e / np.sqrt(a["sigma2"][rc] + spread)
            clip = config.clip_sigma
            big = np.abs(z) > clip
            with np.errstate(divide="ignore", invalid="ignore"):
                cleaned = y[ready] - e + e * clip / np.abs(z)
            y_past[ready] = np.where(big, cleaned, y[ready])
            z = np.where(big, np.copysign(clip, z), z)
            found += self._innovations(rp, rc, time_s[ready], z)
        self._push("base", ch, y_past, u)
        # 2. the live estimate (ArxEstimator.update)
        ready = a["rls_count"][ch] >= self.depth
        y_hist = y.copy()
        if ready.any():
            rc = ch[ready]
            phi = self._regressor("rls", rc, u[ready])
            state = a["rls"][rc].T.copy()
            due = state[self.layout.n_updates] / TRACE_CHECK_EVERY
            check = due == np.floor(due)
            prediction, e, _, w, _, _ = self.kernel(
                list(state), list(phi.T.copy()), y[ready], list(u[ready].T.copy()), check
            )
            a["rls"][rc] = state.T
            y_hist[ready] = prediction + w * e
            a["samples"][rc] += 1
        self._push("rls", ch, y_hist, u)
        # 3. parameter-based evaluations, every evaluate_every samples per channel
        if ready.any():
            rp, rc = positions[ready], ch[ready]
            due_eval = a["samples"][rc] % config.evaluate_every == 0
            for pos, c in zip(rp[due_eval].tolist(), rc[due_eval].tolist(), strict=True):
                found += self._evaluate(pos, c, float(time_s[pos]), bool(changing[pos]))
        return found

    def _innovations(
        self, rp: Index, rc: Index, time_s: Float, z: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Prewhiten ``z``, then run CUSUM, variance and whiteness element-wise."""
        a, config = self.arrays, self.config
        p = self.p
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        fitted = a["pw_count"][rc] >= config.prewhiten.reference_samples
        # collecting the reference: add_value, element-wise
        if (~fitted).any():
            cc, zz = rc[~fitted], z[~fitted]
            self._add_values(cc, zz, "pw")
            count = a["pw_count"][cc] + 1
            a["pw_count"][cc] = count
            for c in cc[count >= config.prewhiten.reference_samples].tolist():
                phi, scale = fit_reference(
                    a["pw_sums"][c].tolist(),
                    a["pw_head"][c].tolist(),
                    a["pw_past"][c].tolist(),
                    int(a["pw_count"][c]),
                )
                a["pw_phi"][c] = phi
                a["pw_scale"][c] = scale
        if not fitted.any():
            return found
        rp, rc, z, time_s = rp[fitted], rc[fitted], z[fitted], time_s[fitted]
        predicted = np.zeros(rc.shape[0])
        if p:
            coefficients, past = a["pw_phi"][rc], a["pw_past"][rc]
            for i in range(p):
                predicted += coefficients[:, i] * past[:, i]
            past[:, 1:] = past[:, :-1].copy()
            past[:, 0] = z
            a["pw_past"][rc] = past
        eps = (z - predicted) / a["pw_scale"][rc]
        clip = config.clip_sigma
        eps = np.maximum(-clip, np.minimum(clip, eps))
        found += self._cusum(rp, rc, time_s, eps)
        found += self._variance(rp, rc, time_s, eps)
        found += self._whiteness(rp, rc, time_s, eps)
        return found

    def _add_values(self, cc: Index, x: Float, prefix: str) -> None:
        """:func:`arxwatch.estimators.detect._sums.add_value` for each channel of ``cc``."""
        a = self.arrays
        sums, head, past = a[f"{prefix}_sums"][cc], a[f"{prefix}_head"][cc], a[f"{prefix}_past"][cc]
        count = a[f"{prefix}_count"][cc]
        sums[:, 0] += x
        sums[:, 1] += x * x
        lags = past.shape[1]
        for lag in range(1, lags + 1):
            has = count >= lag
            sums[has, lag + 1] += x[has] * past[has, lag - 1]
        starting = np.flatnonzero(count < lags)
        head[starting, count[starting]] = x[starting]
        if lags:
            past[:, 1:] = past[:, :-1].copy()
            past[:, 0] = x
        a[f"{prefix}_sums"][cc] = sums
        a[f"{prefix}_head"][cc] = head
        a[f"{prefix}_past"][cc] = past

    def _cusum(
        self, rp: Index, rc: Index, time_s: Float, eps: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Cusum.update, element-wise."""
        a, cusum = self.arrays, self.config.cusum
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
        transitions = self.tracker.observe(rc, 0, statistic, float(cusum.h), alarm, time_s)
        found = [
            (
                int(rp[t.position]),
                0,
                self._cusum_evidence(c_high, c_low, n_high, n_low, t.position),
                t,
            )
            for t in transitions
        ]
        if cusum.after_alarm == "restart":
            reset = rc[alarm]
            a["c_high"][reset] = 0.0
            a["c_low"][reset] = 0.0
            a["n_high"][reset] = 0
            a["n_low"][reset] = 0
        return found

    def _cusum_evidence(
        self, c_high: Float, c_low: Float, n_high: NDArray[Any], n_low: NDArray[Any], i: int
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
            },
            detail=detail,
        )

    def _variance(
        self, rp: Index, rc: Index, time_s: Float, eps: Float
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
            (int(rp[t.position]), 1, self._variance_evidence(float(s[t.position])), t)
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
        self, rp: Index, rc: Index, time_s: Float, eps: Float
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Whiteness.update, element-wise; block ends evaluated one channel at a time."""
        a = self.arrays
        self._add_values(rc, eps, "wh")
        count = a["wh_count"][rc] + 1
        a["wh_count"][rc] = count
        ended = count >= self.config.whiteness.window
        if not ended.any():
            return []
        ep, ec, et = rp[ended], rc[ended], time_s[ended]
        evidence = [
            block_evidence(
                self.config.whiteness,
                self.whiteness_threshold,
                centred_sums(
                    a["wh_sums"][c].tolist(),
                    a["wh_head"][c].tolist(),
                    a["wh_past"][c].tolist(),
                    int(a["wh_count"][c]),
                ),
            )
            for c in ec.tolist()
        ]
        for name, initial in (
            ("wh_count", 0),
            ("wh_sums", 0.0),
            ("wh_head", 0.0),
            ("wh_past", 0.0),
        ):
            a[name][ec] = initial
        statistic = np.array([ev.statistic for ev in evidence])
        alarm = np.array([ev.alarm for ev in evidence], dtype=np.bool_)
        transitions = self.tracker.observe(ec, 2, statistic, self.whiteness_threshold, alarm, et)
        return [(int(ep[t.position]), 2, evidence[t.position], t) for t in transitions]

    def _evaluate(
        self, pos: int, c: int, time_s: float, changing: bool
    ) -> list[tuple[int, int, Evidence, BankTransition]]:
        """Run the parameter-based step of _ModeMonitor for channel ``c``."""
        a, config = self.arrays, self.config
        if changing:
            # an innovation alert is up: keep the live estimate re-learning
            self.inflate(c, config.reset_factor)
        if int(a["samples"][c]) < self.settle:
            return []
        column = self.rls_column(c)
        layout = self.layout
        theta = np.array(column[layout.theta], dtype=np.float64)
        covariance = layout.sigma2(column) * layout.covariance(column)
        theta0, cov0 = self.baseline_theta_cov(c)
        self.drift.set_baseline(theta0, cov0)
        evidence: list[tuple[int, Evidence]] = []
        drift = self.drift.update(theta, covariance)
        if drift is not None:
            evidence.append((3, drift))
        readout = read_out(self.order, theta, self.sample_period_s)
        base_readout, _ = self.baseline_readout_values(c)
        self.bands.set_baseline(base_readout, output_sigma=math.sqrt(float(a["sigma2"][c])))
        for band in self.bands.update(readout):
            evidence.append((4 + self.band_names.index(band.signal), band))
        values = readout_values(readout, self.order, layout.sigma2(column))
        a["current"][c] = list(values.values())
        found: list[tuple[int, int, Evidence, BankTransition]] = []
        for key, ev in evidence:
            t = self.tracker.observe_one(c, key, ev.statistic, ev.threshold, ev.alarm, time_s)
            if t is not None:
                found.append((pos, key, ev, t))
        return found

    def inflate(self, c: int, factor: float) -> None:
        """ArxEstimator.inflate_covariance on channel ``c``."""
        layout, column = self.layout, self.rls_column(c)
        scaled = [d * factor for d in column[layout.diag]]
        bound = self.config.rls.trace_bound(layout.n_params)
        trace = layout.trace(column) * factor
        if trace > bound:
            scaled = [d * bound / trace for d in scaled]
        self.arrays["rls"][c, layout.diag] = scaled


@dataclass(frozen=True)
class _Channel:
    group: int
    index: int


class FleetMonitor:
    """Drift monitor of every asset of one asset class, in arrays.

    Equivalent to one :class:`~arxwatch.daemon.monitor.AssetMonitor` per
    asset (same records for the same calls), at a few kilobytes per asset.

    Parameters
    ----------
    names : SignalNames
        Site names and units of the class's signals, for alert readings.
    config : MonitorConfig, optional
        Detector and lifecycle settings shared by the class.
    quality_signals : sequence of str, optional
        Signals whose data-quality evidence :meth:`quality` will be given.

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
    ) -> None:
        self.names = names
        self.config = config if config is not None else MonitorConfig()
        self._groups: list[_Group] = []
        self._group_of: dict[tuple[ArxOrder, float], int] = {}
        self._ids: list[str | None] = []
        self._slots: dict[str, int] = {}
        self._free: list[int] = []
        self._mode_codes: dict[str | None, int] = {}
        self._channels: list[list[_Channel]] = []  # per slot, in BaselineSet order
        self._by_mode: list[dict[int, _Channel]] = []  # per slot: mode code -> channel
        self._last_mode = np.zeros(0, dtype=np.int16)
        self.quality_keys = tuple(
            f"{kind}/{signal}" for signal in quality_signals for kind in _QUALITY_KINDS
        )
        self._quality_key = {key: i for i, key in enumerate(self.quality_keys)}
        self._quality = (
            TrackerBank(self.config.policy, self.quality_keys, 0) if self.quality_keys else None
        )
        self.skipped = 0

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
        if self._free:
            slot = self._free.pop()
            self._ids[slot] = asset_id
            self._channels[slot] = []
            self._by_mode[slot] = {}
        else:
            slot = len(self._ids)
            self._ids.append(asset_id)
            self._channels.append([])
            self._by_mode.append({})
            if slot >= self._last_mode.shape[0]:
                size = _grown(slot + 1, self._last_mode.shape[0])
                self._last_mode = np.resize(self._last_mode, size)
                if self._quality is not None:
                    self._quality.resize(size)
        self._slots[asset_id] = slot
        self._last_mode[slot] = _NO_SAMPLE
        if self._quality is not None:
            self._quality.clear([slot])
        for b in baselines.baselines:
            key = (b.order, b.sample_period_s)
            g = self._group_of.get(key)
            if g is None:
                g = self._group_of[key] = len(self._groups)
                self._groups.append(_Group(b.order, b.sample_period_s, self.config))
            code = self._mode_codes.setdefault(b.mode, len(self._mode_codes))
            channel = _Channel(g, self._groups[g].add(slot, code, b))
            self._channels[slot].append(channel)
            self._by_mode[slot][code] = channel
        return slot

    def remove_asset(self, asset_id: str) -> None:
        """Stop monitoring ``asset_id`` and free its arrays for reuse.

        Raises
        ------
        KeyError
            If the asset is not monitored.
        """
        slot = self._slots.pop(asset_id)
        for channel in self._channels[slot]:
            self._groups[channel.group].remove(channel.index)
        self._ids[slot] = None
        self._channels[slot] = []
        self._by_mode[slot] = {}
        self._free.append(slot)

    def restart(self, slot: int) -> None:
        """Forget the past samples of every mode of ``slot`` (after a data gap)."""
        for channel in self._channels[slot]:
            self._groups[channel.group].restart(np.array([channel.index], dtype=np.intp))

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
        """
        slot_a = np.asarray(slots, dtype=np.intp)
        time_a = np.asarray(time_s, dtype=np.float64)
        y_a = np.asarray(y, dtype=np.float64)
        u_a = np.asarray(u, dtype=np.float64).reshape(slot_a.shape[0], len(self.names.inputs))
        if not (time_a.shape == y_a.shape == slot_a.shape) or len(modes) != slot_a.shape[0]:
            raise ValueError(
                f"rows disagree in length: slots {slot_a.shape}, time_s {time_a.shape}, "
                f"y {y_a.shape}, u {u_a.shape}, modes {len(modes)}"
            )
        records: list[tuple[int, int, dict[str, Any]]] = []
        restart_a = np.asarray(restart, dtype=np.bool_)
        # waves of rows with distinct sample times: each asset has one row per wave
        order = np.argsort(time_a, kind="stable")
        bounds = np.flatnonzero(np.diff(time_a[order])) + 1
        for wave in np.split(order, bounds):
            if wave.shape[0] and np.unique(slot_a[wave]).shape[0] != wave.shape[0]:
                raise ValueError("an asset has two rows with the same sample time")
            records += self._wave(wave, slot_a, time_a, y_a, u_a, modes, restart_a)
        records.sort(key=lambda item: (item[0], item[1]))
        return [record for _, _, record in records]

    def _wave(
        self,
        rows: Index,
        slots: Index,
        time_s: Float,
        y: Float,
        u: Float,
        modes: Sequence[str | None],
        restart: NDArray[np.bool_],
    ) -> list[tuple[int, int, dict[str, Any]]]:
        per_group: dict[int, list[tuple[int, int]]] = {}
        for row in rows.tolist():
            slot = int(slots[row])
            if self._ids[slot] is None:
                raise ValueError(f"slot {slot} holds no asset")
            if restart[row]:
                self.restart(slot)
            code = self._mode_codes.get(modes[row], _OTHER_MODE)
            channel = self._by_mode[slot].get(code)
            if code != self._last_mode[slot] and channel is not None:
                self._groups[channel.group].restart(np.array([channel.index], dtype=np.intp))
            self._last_mode[slot] = code
            if channel is None:
                self.skipped += 1
                continue
            per_group.setdefault(channel.group, []).append((row, channel.index))
        out: list[tuple[int, int, dict[str, Any]]] = []
        for g, members in per_group.items():
            group = self._groups[g]
            index = np.array([row for row, _ in members], dtype=np.intp)
            ch = np.array([c for _, c in members], dtype=np.intp)
            found = group.step(ch, time_s[index], y[index], u[index])
            inflate: set[int] = set()
            for pos, key, evidence, transition in found:
                row, c = members[pos]
                record = self._record(group, c, key, evidence, transition, float(time_s[row]))
                out.append((row, key, record))
                if transition.state == "raised" and evidence.detector in CHANGE_DETECTORS:
                    inflate.add(c)
            for c in inflate:
                group.inflate(c, self.config.reset_factor)
        return out

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
        assert asset is not None  # a channel in use belongs to an asset
        mode = self._mode_label(int(group.arrays["mode"][c]))
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
            mode,
        )

    def _mode_label(self, code: int) -> str | None:
        for label, value in self._mode_codes.items():
            if value == code:
                return label
        raise ValueError(f"unknown mode code {code}")

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
            channel = self._by_mode[slot].get(int(self._last_mode[slot]))
            if channel is None:
                channel = self._channels[slot][0]
            group = self._groups[channel.group]
            out.append(
                self._record(group, channel.index, key, ev, transition, time_s, self.quality_keys)
            )
        return out

    def quality_watch(self, slot: int) -> dict[str, bool]:
        """Return, per quality key, whether its episode is not quiet (alarms pending or raised).

        A caller that decodes samples in bulk only needs to build evidence
        for evaluations that alarm or that belong to such an episode: a quiet
        evaluation of a quiet episode changes nothing.
        """
        bank = self._quality
        if bank is None:
            return {}
        busy = bank.raised[slot] | (bank.alarms[slot] != 0)
        return dict(zip(self.quality_keys, busy.tolist(), strict=True))

    # -- read-out -----------------------------------------------------------
    def active(self, asset_id: str) -> dict[str, str]:
        """Return the raised alerts of ``asset_id`` (``mode:detector/signal`` -> severity)."""
        slot = self._slots[asset_id]
        active: dict[str, str] = {}
        for channel in self._channels[slot]:
            group = self._groups[channel.group]
            mode = self._mode_label(int(group.arrays["mode"][channel.index]))
            for key, severity in group.tracker.active(channel.index).items():
                active[f"{mode}:{key}"] = severity
        if self._quality is not None:
            active.update({f"quality:{k}": v for k, v in self._quality.active(slot).items()})
        return active

    def readout(self, asset_id: str, mode: str | None = None) -> dict[str, float]:
        """Latest live physical read-out of ``asset_id`` in ``mode``.

        Raises
        ------
        KeyError
            If the asset has no baseline for ``mode``.
        """
        slot = self._slots[asset_id]
        code = self._mode_codes.get(mode)
        channel = None if code is None else self._by_mode[slot].get(code)
        if channel is None:
            raise KeyError(f"asset {asset_id!r} has no baseline for mode {mode!r}")
        return self._groups[channel.group].current_values(channel.index)

    # -- checkpoints --------------------------------------------------------
    def to_state(self) -> dict[str, Any]:
        """Return the whole monitor as ``{"meta": JSON-safe dict, "arrays": {name: ndarray}}``.

        The arrays are numeric (no object dtype), so they can be stored with
        ``numpy.savez`` and read back with ``allow_pickle=False``.
        """
        groups = []
        arrays: dict[str, NDArray[Any]] = {"last_mode": self._last_mode}
        for g, group in enumerate(self._groups):
            meta, group_arrays = group.to_state()
            groups.append(meta)
            arrays.update({f"g{g}.{name}": v for name, v in group_arrays.items()})
        if self._quality is not None:
            arrays.update({f"quality.{k}": v for k, v in self._quality.arrays().items()})
        meta = {
            "format": "arxwatch.fleet",
            "version": _STATE_VERSION,
            "quality_keys": list(self.quality_keys),
            "modes": [[label, code] for label, code in self._mode_codes.items()],
            "groups": groups,
            "ids": list(self._ids),
            "free": list(self._free),
            "channels": [[[c.group, c.index] for c in chans] for chans in self._channels],
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
        fresh = FleetMonitor(self.names, self.config, ())
        fresh.quality_keys = self.quality_keys
        fresh._quality_key = self._quality_key
        fresh._quality = (
            TrackerBank(self.config.policy, self.quality_keys, 0) if self.quality_keys else None
        )
        for g, group_meta in enumerate(meta["groups"]):
            order = decode_order(group_meta["order"], f"groups[{g}].order")
            period = float(group_meta["sample_period_s"])
            group = _Group(order, period, self.config)
            prefix = f"g{g}."
            group.load_state(
                group_meta, {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
            )
            fresh._group_of[(order, period)] = g
            fresh._groups.append(group)
        fresh._mode_codes = {label: int(code) for label, code in meta["modes"]}
        fresh._ids = [None if i is None else str(i) for i in meta["ids"]]
        fresh._slots = {i: slot for slot, i in enumerate(fresh._ids) if i is not None}
        fresh._free = [int(v) for v in meta["free"]]
        fresh._channels = [
            [_Channel(int(g), int(c)) for g, c in chans] for chans in meta["channels"]
        ]
        fresh._by_mode = [
            {int(fresh._groups[c.group].arrays["mode"][c.index]): c for c in chans}
            for chans in fresh._channels
        ]
        fresh._last_mode = np.array(arrays["last_mode"], dtype=np.int16)
        if fresh._quality is not None:
            prefix = "quality."
            fresh._quality.load_arrays(
                {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
            )
            if fresh._quality.capacity != fresh._last_mode.shape[0]:
                raise ValueError("saved quality state and slots disagree in size")
        fresh.skipped = int(meta["skipped"])
        self.__dict__.update(fresh.__dict__)

    def memory_bytes(self) -> int:
        """Bytes held by the arrays of every channel and slot."""
        total = sum(g.memory_bytes() for g in self._groups) + self._last_mode.nbytes
        if self._quality is not None:
            total += sum(a.nbytes for a in self._quality.arrays().values())
        return total
