"""Drift monitor of one asset: estimate, detect, decide, per operating mode.

Pure: aligned samples (time, output, inputs, mode) in, alert records out;
the service shell feeds it from MQTT and the replay command from files, the
same way. Per sample and per mode that has a baseline:

1. the **baseline model** predicts the output from the measured past; its
   normalised residual ``z`` (~N(0, 1) while the asset behaves as at
   commissioning) is winsorised at ``clip_sigma`` so that one spike cannot
   trip a detector, prewhitened by an AR filter learned on a reference
   stretch after start (sensor noise makes ARX residuals correlated), and
   feeds the CUSUM (offsets, bias), the variance test (noise) and the
   whiteness test (unmodelled dynamics);
2. the **live estimator** (RLS warm-started from the baseline) tracks the
   current model; at the first sample of every ``evaluate_every`` sample
   periods of sample time (on the hour at the defaults), once it has
   settled, its physical read-out is compared with the baseline by a Wald
   test on the features and by bands (gain, time constant, dead time, offset);
3. every evidence goes through the alert lifecycle, and transitions become
   alert records (:mod:`arxwatch.daemon.alert`).

Samples in a mode without a baseline are neither learned from nor judged;
switching mode, or a gap, restarts the regressor history of that mode.

References
----------
J. M. Lucas and R. B. Crosier, "Robust CUSUM: a robustness study for CUSUM
quality control schemes", *Communications in Statistics - Theory and
Methods* 11(23), 1982 (winsorising observations before a CUSUM).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.alert import SignalNames, build_record
from arxwatch.daemon.decide import AlertPolicy, AlertTracker
from arxwatch.estimators.arx import ArxOrder, RegressorHistory
from arxwatch.estimators.baseline import Baseline, BaselineSet
from arxwatch.estimators.detect.bands import BandsConfig, PhysicalBands
from arxwatch.estimators.detect.cusum import Cusum, CusumConfig
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.detect.parameter import FeatureDrift, FeatureDriftConfig
from arxwatch.estimators.detect.prewhiten import PrewhitenConfig, Prewhitener
from arxwatch.estimators.detect.quality import QualityConfig, SignalQuality
from arxwatch.estimators.detect.variance import VarianceChange, VarianceConfig
from arxwatch.estimators.detect.whiteness import Whiteness, WhitenessConfig
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.readout import PhysicalReadout, feature_names, feature_vector, read_out
from arxwatch.estimators.rls import RlsConfig, StateLayout


@dataclass(frozen=True)
class MonitorConfig:
    """Settings of the drift monitor (immutable).

    The defaults aim at about one false alert per asset per ten days at a
    60 s sample period: a detector evaluated on every sample (1,440 a day)
    needs a per-sample false-alarm probability far below the textbook 0.001.
    CUSUM with k = 0.5 and h = 9 has an in-control ARL of roughly 26,000
    samples (two-sided, Siegmund's approximation), and holds its statistic
    while a shift persists so that m-of-n persistence can confirm it; the
    variance and whiteness tests use alpha of 1e-6 and 1e-5, the whiteness
    test six lags over blocks of 240 samples (about ln W, the usual choice
    for the Ljung-Box test: Tsay, *Analysis of Financial Time Series*, 3rd
    ed., Wiley, 2010, section 2.2). Measured
    false-alert rates are in the detection tests (``tests/reference``).

    Parameters
    ----------
    rls : RlsConfig
        Live estimator; the forgetting factor sets how fast the live model
        follows a change (memory ~ 1 / (1 - lambda) samples).
    prewhiten : PrewhitenConfig
        AR filter fitted on the first residuals after a start, which whitens
        the residual's own correlation (the reference is taken as fault-free).
    cusum, variance, whiteness : configs
        Innovation detectors on the prewhitened residual. The CUSUM divides
        its input by the successive-difference noise level while that is
        above the calibrated one (``noise_lam`` 0.02, the variance test's
        memory): a noisier sensor then raises the variance alert alone, not
        a mean shift with the re-learning that follows. Whiteness blocks
        are periods of ``whiteness.window`` sample periods of sample time
        (:meth:`block_period`; four hours from midnight UTC at the
        defaults), so that a class's assets test theirs at the same sample
        time.
    drift_alpha : float
        False-alarm probability per evaluation of the feature Wald test.
    bands : BandsConfig
        Relative tolerances of gain, time constant and offset.
    evaluate_every : int
        Sample periods between evaluations of the parameter-based detectors:
        they run at the first sample of each ``evaluate_every`` periods of
        sample time (:meth:`evaluation_due`), the same instants for every
        asset of a class, whatever gaps each had.
    settle_memories : float
        Memories of the live estimator to wait after a start before the
        parameter-based detectors are judged.
    clip_sigma : float
        Winsorising level of the normalised residual.
    reset_factor : float
        When the mean-shift detector (innovation_mean, see
        :data:`CHANGE_DETECTORS`) raises an alert, and again at every
        evaluation while it stays raised, the live estimator's ``P`` is
        multiplied by this (repeated covariance resetting) so that it
        follows the changing asset within a few hours instead of a whole
        memory, and its read-out does not wander through models that mix
        the old and the new behaviour. The Wald distance of such a reset
        estimate is inconclusive (:attr:`Evidence.conclusive`): it can raise
        ``feature_drift`` but not clear it.
    policy : AlertPolicy
        Persistence, hysteresis and severities of the behaviour alerts; by
        default an alert clears only after an hour of quiet evaluations
        (``clear_after_s``), so that an intermittent fault does not clear
        and re-raise every few minutes. Data-quality alerts use it without
        that off-delay (:attr:`quality_policy`): a returning sensor is back.
    """

    rls: RlsConfig = field(default_factory=lambda: RlsConfig(forgetting=0.998))
    prewhiten: PrewhitenConfig = field(default_factory=lambda: PrewhitenConfig(ar_order=6))
    cusum: CusumConfig = field(
        default_factory=lambda: CusumConfig(h=9.0, after_alarm="hold", noise_lam=0.02)
    )
    variance: VarianceConfig = field(default_factory=lambda: VarianceConfig(lam=0.02, alpha=1e-6))
    whiteness: WhitenessConfig = field(default_factory=lambda: WhitenessConfig(lags=6, alpha=1e-5))
    drift_alpha: float = 1e-4
    bands: BandsConfig = field(default_factory=BandsConfig)
    evaluate_every: int = 60
    settle_memories: float = 1.0
    clip_sigma: float = 4.0
    reset_factor: float = 10.0
    policy: AlertPolicy = field(default_factory=lambda: AlertPolicy(clear_after_s=3600.0))

    def __post_init__(self) -> None:
        if isinstance(self.evaluate_every, bool) or not isinstance(self.evaluate_every, int):
            raise ValueError(f"evaluate_every must be an integer, got {self.evaluate_every!r}")
        if self.evaluate_every < 1:
            raise ValueError(f"evaluate_every must be >= 1, got {self.evaluate_every}")
        if not (math.isfinite(self.settle_memories) and self.settle_memories >= 0.0):
            raise ValueError(f"settle_memories must be >= 0, got {self.settle_memories!r}")
        if not (math.isfinite(self.clip_sigma) and self.clip_sigma >= 1.0):
            raise ValueError(f"clip_sigma must be >= 1, got {self.clip_sigma!r}")
        if not 0.0 < self.drift_alpha < 1.0:
            raise ValueError(f"drift_alpha must be in (0, 1), got {self.drift_alpha!r}")

    def evaluation_due(self, time_s: float, sample_period_s: float) -> bool:
        """Whether the sample at ``time_s`` is the first of an evaluation period.

        Periods of ``evaluate_every * sample_period_s`` seconds of sample
        time (from the epoch): on a grid of ``sample_period_s``, exactly one
        sample of each period is the first, unless missing. On a clock, not
        on each asset's sample count, so that a class's assets are judged
        in the same sample time (one batched evaluation, however their gaps
        fell) and a technician sees the hourly checks on the hour.
        """
        period = self.evaluate_every * sample_period_s
        return math.floor(time_s / period) != math.floor((time_s - sample_period_s) / period)

    def block_period(self, time_s: float, sample_period_s: float) -> int:
        """Index of the whiteness block period the sample at ``time_s`` falls in.

        Periods of ``whiteness.window * sample_period_s`` seconds of sample
        time from the epoch (:meth:`Whiteness.enter_period
        <arxwatch.estimators.detect.whiteness.Whiteness.enter_period>`).
        """
        return math.floor(time_s / (self.whiteness.window * sample_period_s))

    def evaluation_intervals(self, sample_period_s: float) -> dict[str, float]:
        """Seconds between evaluations of each behaviour detector, for the off-delay."""
        hourly = self.evaluate_every * sample_period_s
        return {
            "innovation_mean": sample_period_s,
            "innovation_variance": sample_period_s,
            "innovation_whiteness": self.whiteness.window * sample_period_s,
            "feature_drift": hourly,
            "physical_band": hourly,
        }

    @property
    def quality_policy(self) -> AlertPolicy:
        """Return the data-quality alerts' policy: :attr:`policy` without the off-delay."""
        return replace(self.policy, clear_after_s=0.0)

    def settle_samples(self) -> int:
        """Return the samples to wait before parameter-based detectors are judged."""
        lam = self.rls.forgetting
        memory = 1.0 / (1.0 - lam) if lam < 1.0 else 0.0
        return int(math.ceil(self.settle_memories * memory))


def parameter_covariances(layout: StateLayout, states: NDArray[np.float64]) -> NDArray[np.float64]:
    """Estimated ``Cov(theta) = sigma2 U D U'`` of each RLS state, in one pass.

    The sums run in a fixed order, so a state's covariance has the same bits
    alone or in a batch: the per-asset and the fleet-wide monitors both call
    this (``ArxEstimator.parameter_covariance`` would multiply with BLAS,
    whose order of operations is its own).

    Parameters
    ----------
    layout : StateLayout
        Where each quantity sits in a state.
    states : ndarray, shape (layout.size, k)
        Flat RLS states, one per column.

    Returns
    -------
    ndarray, shape (k, n_params, n_params)
        Symmetric covariances.
    """
    n, k = layout.n_params, states.shape[1]
    upper = states[layout.upper]
    diag = states[layout.diag]
    one = np.ones(k)

    def u(i: int, j: int) -> NDArray[np.float64]:
        # U[i, j] for i <= j: upper holds column j's entries from j(j-1)/2
        return one if i == j else upper[j * (j - 1) // 2 + i]

    rss = states[layout.rss]
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma2 = np.where(rss > 0.0, rss / states[layout.weight], 1.0)
    out = np.empty((n, n, k)).transpose(2, 0, 1)  # rows innermost, as the states
    # U[i, m] D[m], each formed once (the products below associate the same way)
    scaled = {(i, m): u(i, m) * diag[m] for i in range(n) for m in range(i, n)}
    for i in range(n):
        for j in range(i, n):
            acc = np.zeros(k)
            for m in range(j, n):
                acc = acc + scaled[i, m] * u(j, m)
            out[:, i, j] = out[:, j, i] = sigma2 * acc
    return out


def readout_values(readout: PhysicalReadout, order: ArxOrder, sigma2: float) -> dict[str, float]:
    """Physical read-out as named values for alert records: features and ``sigma``."""
    values = dict(zip(feature_names(order), feature_vector(readout).tolist(), strict=True))
    values["sigma"] = math.sqrt(sigma2)
    return values


class _ModeMonitor:
    """Everything that judges one baseline (one operating mode)."""

    def __init__(self, baseline: Baseline, config: MonitorConfig) -> None:
        self.baseline = baseline
        self.config = config
        order = baseline.order
        self.history = RegressorHistory(order)
        self.estimator = ArxEstimator(order, config.rls)
        self.prewhiten = Prewhitener(config.prewhiten)
        self.cusum = Cusum(config.cusum)
        self.variance = VarianceChange(config.variance)
        self.whiteness = Whiteness(config.whiteness)
        self.drift = FeatureDrift(
            FeatureDriftConfig(
                order=order,
                sample_period_s=baseline.sample_period_s,
                alpha=config.drift_alpha,
                every=1,
            )
        )
        self.bands = PhysicalBands(config.bands)
        self.tracker = AlertTracker(
            config.policy, config.evaluation_intervals(baseline.sample_period_s)
        )
        self.samples = 0
        self.baseline_values = readout_values(baseline.readout, order, baseline.sigma2)
        self.current_values = dict(self.baseline_values)
        self._start_from_baseline()

    def _start_from_baseline(self) -> None:
        b = self.baseline
        self.estimator.warm_start(b.theta.tolist(), np.asarray(b.covariance) / b.sigma2, b.sigma2)
        self.drift.set_baseline(b.theta, b.covariance)
        # read from theta as the fleet does (a file from before dead times
        # were read from the step response stored nk * Ts)
        readout = read_out(b.order, b.theta, b.sample_period_s)
        self.bands.set_baseline(readout, output_sigma=math.sqrt(b.sigma2))

    def restart(self) -> None:
        """Forget the past samples (after a gap or a mode switch)."""
        self.history.clear()
        self.estimator.restart_history()

    def step(self, time_s: float, y: float, u: Sequence[float]) -> list[Evidence]:
        """Judge one sample; return the evidence of every detector evaluated."""
        config, evidence = self.config, []
        history, y_past = self.history, y
        # a whiteness block of an earlier period is complete: test it first
        white = self.whiteness.enter_period(
            config.block_period(time_s, self.baseline.sample_period_s)
        )
        if white is not None:
            evidence.append(white)
        if history.ready:
            phi = history.regressor(u)
            e, z = self.baseline.residual(phi, y)
            clip = config.clip_sigma
            if abs(z) > clip:
                # Winsorise, and keep the spike out of later regressors too.
                y_past = y - e + e * clip / abs(z)
                z = math.copysign(clip, z)
            eps = self.prewhiten.update(z)
            if eps is not None:
                eps = max(-clip, min(clip, eps))
                evidence.append(self.cusum.update(eps))
                evidence.append(self.variance.update(eps))
                white = self.whiteness.update(eps)
                if white is not None:
                    evidence.append(white)
        history.push(y_past, u)
        if self.estimator.update(y, u) is None:
            return evidence
        self.samples += 1
        if not config.evaluation_due(time_s, self.baseline.sample_period_s):
            return evidence
        relearning = any(key.split("/")[0] in CHANGE_DETECTORS for key in self.tracker.active())
        if relearning:
            # While an innovation alert stays up the asset is still changing:
            # keep the live estimate re-learning (repeated covariance resetting).
            self.estimator.inflate_covariance(config.reset_factor)
        if self.samples >= config.settle_samples():
            theta = self.estimator.theta
            state = np.array(self.estimator.to_state()["rls"])[:, None]
            drift = self.drift.update(theta, parameter_covariances(self.estimator.layout, state)[0])
            if drift is not None:
                # the reset covariance shrinks the distance: it cannot say "back to normal"
                evidence.append(replace(drift, conclusive=not relearning))
            readout = read_out(self.baseline.order, theta, self.baseline.sample_period_s)
            evidence.extend(self.bands.update(readout))
            self.current_values = readout_values(
                readout, self.baseline.order, self.estimator.sigma2
            )
        return evidence

    def to_state(self) -> dict[str, Any]:
        return {
            "history": self.history.to_state(),
            "estimator": self.estimator.to_state(),
            "prewhiten": self.prewhiten.to_state(),
            "cusum": self.cusum.to_state(),
            "variance": self.variance.to_state(),
            "whiteness": self.whiteness.to_state(),
            "drift": self.drift.to_state(),
            "bands": self.bands.to_state(),
            "tracker": self.tracker.to_state(),
            "samples": self.samples,
            "current": self.current_values,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        self.history = RegressorHistory.from_state(self.baseline.order, state["history"])
        self.estimator.load_state(state["estimator"])
        self.prewhiten.load_state(state["prewhiten"])
        self.cusum.load_state(state["cusum"])
        self.variance.load_state(state["variance"])
        self.whiteness.load_state(state["whiteness"])
        self.drift.load_state(state["drift"])
        self.bands.load_state(state["bands"])
        self.tracker.load_state(state["tracker"])
        self.samples = int(state["samples"])
        self.current_values = {str(k): float(v) for k, v in state["current"].items()}


class AssetMonitor:
    """Drift monitor of one asset against its baselines (one per mode).

    Parameters
    ----------
    asset : str
        Asset id used in alert records.
    baselines : BaselineSet
        Accepted baselines; mode None when the asset has no mode signal.
    names : SignalNames
        Site names and units of the signals, for the alert readings.
    config : MonitorConfig, optional
        Detector and lifecycle settings.
    quality : mapping of str to QualityConfig, optional
        Data-quality checks (stale, stuck, out of range, gaps) per raw
        signal name, fed by :meth:`signal_sample` and :meth:`check_stale`;
        their alerts form the data_quality family.
    """

    def __init__(
        self,
        asset: str,
        baselines: BaselineSet,
        names: SignalNames,
        config: MonitorConfig | None = None,
        quality: Mapping[str, QualityConfig] | None = None,
    ) -> None:
        if not asset:
            raise ValueError("asset id must be a non-empty string")
        self.asset = asset
        self.names = names
        self.config = config if config is not None else MonitorConfig()
        self._modes = {
            m: _ModeMonitor(baselines.for_mode(m), self.config)  # type: ignore[arg-type]
            for m in baselines.modes
        }
        for mode, monitor in self._modes.items():
            if len(names.inputs) != monitor.baseline.order.n_inputs:
                raise ValueError(
                    f"asset {asset!r} mode {mode!r}: names give {len(names.inputs)} input(s), "
                    f"the baseline has {monitor.baseline.order.n_inputs}"
                )
        self._last_mode: str | None | object = _NO_MODE
        self.skipped = 0
        self._quality = {name: SignalQuality(name, cfg) for name, cfg in (quality or {}).items()}
        self._quality_tracker = AlertTracker(self.config.quality_policy)

    def step(
        self, time_s: float, y: float, u: Sequence[float], mode: str | None = None
    ) -> list[dict[str, Any]]:
        """Judge one aligned sample; return the alert records it causes.

        Parameters
        ----------
        time_s : float
            Sample time, epoch seconds.
        y : float
            Output value.
        u : sequence of float
            Input values, in the baseline's order.
        mode : str or None
            Operating mode at this sample.

        Returns
        -------
        list of dict
            Alert records (schema ``arxwatch.alert/1``), often empty.
        """
        monitor = self._modes.get(mode)
        if mode != self._last_mode and monitor is not None:
            monitor.restart()
        self._last_mode = mode
        if monitor is None:
            self.skipped += 1
            return []
        records = self._records(monitor, monitor.tracker, monitor.step(time_s, y, u), time_s)
        if any(r["state"] == "raised" and r["detector"] in CHANGE_DETECTORS for r in records):
            monitor.estimator.inflate_covariance(self.config.reset_factor)
        return records

    def signal_sample(self, signal: str, time_s: float, value: float) -> list[dict[str, Any]]:
        """Check one raw sample of a signal for data quality; return alert records.

        Raises
        ------
        KeyError
            If no quality check is configured for ``signal``.
        """
        return self._quality_records(self._quality[signal].update(time_s, value), time_s)

    def check_stale(self, now_s: float) -> list[dict[str, Any]]:
        """Check every signal for staleness at ``now_s``; return alert records."""
        evidence = [check.check(now_s) for check in self._quality.values()]
        return self._quality_records(evidence, now_s)

    def _quality_records(self, evidence: list[Evidence], time_s: float) -> list[dict[str, Any]]:
        last = self._last_mode
        monitor = self._modes.get(last) if isinstance(last, str) or last is None else None
        if monitor is None:
            monitor = next(iter(self._modes.values()))
        return self._records(monitor, self._quality_tracker, evidence, time_s)

    def _records(
        self, monitor: _ModeMonitor, tracker: AlertTracker, evidence: list[Evidence], time_s: float
    ) -> list[dict[str, Any]]:
        """Pass evidence through ``tracker``; build a record per transition."""
        records = []
        for item in evidence:
            transition = tracker.observe(item, time_s)
            if transition is not None:
                records.append(
                    build_record(
                        self.asset,
                        transition,
                        self.names,
                        math.sqrt(monitor.baseline.sigma2),
                        monitor.baseline_values,
                        monitor.current_values,
                        monitor.baseline.mode,
                    )
                )
        return records

    def readout(self, mode: str | None = None) -> dict[str, float]:
        """Return the latest live physical read-out of ``mode`` (gains, tau, offset, sigma).

        Raises
        ------
        KeyError
            If the asset has no baseline for ``mode``.
        """
        return dict(self._modes[mode].current_values)

    def restart(self) -> None:
        """Forget past samples of every mode (call after a data gap)."""
        for monitor in self._modes.values():
            monitor.restart()

    def active(self) -> dict[str, str]:
        """Return the raised alerts (``mode:detector/signal`` -> severity)."""
        active: dict[str, str] = {
            f"{mode}:{key}": severity
            for mode, m in self._modes.items()
            for key, severity in m.tracker.active().items()
        }
        active.update(
            {f"quality:{key}": sev for key, sev in self._quality_tracker.active().items()}
        )
        return active

    def to_state(self) -> dict[str, Any]:
        """Learned and detector state of every mode, as plain data."""
        seen = self._last_mode is not _NO_MODE
        return {
            "modes": [[mode, m.to_state()] for mode, m in self._modes.items()],
            "skipped": self.skipped,
            "last_mode": [self._last_mode] if seen else [],
            "quality": {name: check.to_state() for name, check in self._quality.items()},
            "quality_tracker": self._quality_tracker.to_state(),
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore a state saved by :meth:`to_state` for the same baselines.

        Raises
        ------
        ValueError
            If the saved modes differ from this monitor's baselines.
        """
        saved = {mode: part for mode, part in state["modes"]}
        if set(saved) != set(self._modes):
            raise ValueError(
                f"asset {self.asset!r}: saved modes {sorted(map(str, saved))} differ from "
                f"the baselines' {sorted(map(str, self._modes))}"
            )
        if set(state["quality"]) != set(self._quality):
            raise ValueError(
                f"asset {self.asset!r}: saved quality checks {sorted(state['quality'])} differ "
                f"from the configured {sorted(self._quality)}"
            )
        for mode, part in saved.items():
            self._modes[mode].load_state(part)
        for name, part in state["quality"].items():
            self._quality[name].load_state(part)
        self._quality_tracker.load_state(state["quality_tracker"])
        self.skipped = int(state["skipped"])
        last = state["last_mode"]
        self._last_mode = last[0] if last else _NO_MODE


#: Raising one of these means the asset changed: the live estimate re-learns.
#: A noise increase alone (innovation_variance) is a sensor or disturbance
#: matter, not a changed model: re-learning then only made the live estimate
#: noisy, and the bands alarmed on that noise (a 30 % noise increase raised an
#: offset band alert on each simulated loop).
CHANGE_DETECTORS = frozenset({"innovation_mean"})

#: Sentinel: no sample seen yet, so the first sample restarts nothing.
_NO_MODE = object()
