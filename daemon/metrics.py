"""Prometheus metrics of the daemon, on a registry passed in.

Two kinds of metric live here:

* **event counters and histograms**, public attributes of
  :class:`DaemonMetrics` that the worker (and the MQTT adapter) increment as
  things happen;
* **gauges of live state**, computed at scrape time by a custom collector
  from the latest :class:`LiveSnapshot` the worker handed to
  :meth:`DaemonMetrics.publish`. Publishing is one reference assignment (atomic
  in CPython), so the worker takes no lock and the HTTP thread never touches
  worker objects; a scrape reads one snapshot, so its gauges agree with each
  other. Until the first publish, the snapshot gauges are absent.

Nothing is registered on prometheus_client's global default registry. Label
values that are known in advance (reject reasons, detectors, states) are
created at 0 so that ``rate()`` and alert rules see the series from the start.

Metrics, as exposed in the Prometheus text format (counters also expose the
client library's ``_created`` sample; labels in parentheses):

Build and process

``arxwatch_build_info`` (``version``, ``python``, ``paho_mqtt``), info
    Always 1; the labels carry the build data.
``process_*``
    prometheus_client's process collector: CPU seconds, resident and virtual
    memory, open and maximum file descriptors, start time (Linux only).

Counters, incremented as events happen

``arxwatch_mqtt_messages_received_total``
    MQTT messages received by the network thread.
``arxwatch_queue_overflows_total``
    Messages the network thread could not queue (worker queue full).
``arxwatch_topics_refused_total`` (``reason``)
    Messages whose topic routing refused (no matching rule, asset limit...).
``arxwatch_payloads_rejected_total`` (``reason``)
    Payloads the decoder rejected, by reason.
``arxwatch_samples_total`` (``outcome``)
    Decoded samples by what alignment did with them.
``arxwatch_rows_total``
    Aligned rows produced (one per asset and grid point).
``arxwatch_grid_points_skipped_total``
    Grid points without a complete row.
``arxwatch_sample_gaps_total``
    Gaps in a checked signal's samples (an interval longer than its
    ``gap_factor`` expected periods): outages, or messages a broker dropped
    past its queue limit.
``arxwatch_rows_judged_total``
    Rows that went through the detectors.
``arxwatch_rows_not_judged_total`` (``reason``)
    Rows not judged: ``learning``, ``no_baseline``, ``mode_without_baseline``.
``arxwatch_alert_transitions_total`` (``detector``, ``state``)
    Alert lifecycle transitions, ``raised`` (also on escalation) or ``cleared``.
``arxwatch_alerts_published_total``
    Alert messages handed to the MQTT client.
``arxwatch_baselines_total`` (``outcome``)
    Baseline fits ``accepted`` or ``refused``.
``arxwatch_mqtt_connects_total``, ``arxwatch_mqtt_disconnects_total``
    Successful broker connects; connections lost or closed.
``arxwatch_mqtt_session_takeovers_total``
    Disconnects because another client took the client id (MQTT 5 reason
    code 0x8E).
``arxwatch_mqtt_sessions_lost_total``
    Connects at which the broker had no session to resume.
``arxwatch_checkpoints_total``, ``arxwatch_checkpoint_failures_total``
    Checkpoints written; checkpoints that failed.

Histograms, in seconds

``arxwatch_batch_duration_seconds``
    Worker time per processed batch of messages.
``arxwatch_checkpoint_duration_seconds``
    Time to write one checkpoint.
``arxwatch_alert_latency_seconds``
    Message arrival to alert handed to the MQTT client.

Gauges, from the latest snapshot

``arxwatch_queue_depth``, ``arxwatch_queue_capacity``
    Messages waiting in the worker queue; its size.
``arxwatch_mqtt_connected``
    1 while connected to the broker, else 0.
``arxwatch_assets`` (``state``)
    Assets by state: ``learning``, ``monitoring``, ``no_baseline``.
``arxwatch_active_alerts`` (``family``, ``severity``)
    Raised alerts; family ``behaviour`` or ``data_quality``, severity
    ``warning`` or ``critical``.
``arxwatch_outbox_messages``
    Alert messages not yet acknowledged by the broker.
``arxwatch_journal_messages``
    Messages journalled since the last checkpoint (replayed at a restart).
``arxwatch_last_sample_timestamp_seconds``
    Unix time of the newest sample processed.
``arxwatch_last_checkpoint_timestamp_seconds``
    Unix time of the last successful checkpoint.
``arxwatch_last_connect_timestamp_seconds``
    Unix time of the last successful broker connect.
``arxwatch_asset_detector_ratio`` (``asset``, ``detector``)
    Detector statistic / threshold (1 = alarm level), for the highest ratios
    only: at most ``max_ratio_series`` series.

The three ``_timestamp_seconds`` gauges are absent, not 0, while the event has
not happened. ``arxwatch_asset_detector_ratio`` carries per-asset labels, so
its series are capped: only the snapshot's ``top_ratios`` appear, and an asset
that leaves that list loses its series at the next scrape.

References
----------
Prometheus documentation, "Metric and label naming", "Instrumentation" and
"Writing exporters" (prometheus.io/docs/practices/naming,
/docs/practices/instrumentation, /docs/instrumenting/writing_exporters).
prometheus_client documentation, "Custom Collectors" (Python client).
"""

from __future__ import annotations

import math
import platform
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as package_version
from types import MappingProxyType
from typing import Final, Literal, get_args

from prometheus_client import CollectorRegistry, Counter, Histogram, Info, ProcessCollector
from prometheus_client.metrics_core import GaugeMetricFamily, Metric

from arxwatch.daemon.decide import Severity, State
from arxwatch.estimators.detect.evidence import Family

__all__ = [
    "ALERT_FAMILIES",
    "ALERT_SEVERITIES",
    "ALERT_STATES",
    "ASSET_STATES",
    "BASELINE_OUTCOMES",
    "NOT_JUDGED_REASONS",
    "AssetState",
    "DaemonMetrics",
    "LiveSnapshot",
    "NotJudgedReason",
]

AssetState = Literal["learning", "monitoring", "no_baseline"]
"""What an asset is doing: learning a baseline, monitoring against one, or neither."""

NotJudgedReason = Literal["learning", "no_baseline", "mode_without_baseline"]
"""Why a row did not go through the detectors."""

ASSET_STATES: Final[tuple[str, ...]] = get_args(AssetState)
NOT_JUDGED_REASONS: Final[tuple[str, ...]] = get_args(NotJudgedReason)
ALERT_FAMILIES: Final[tuple[str, ...]] = get_args(Family)
ALERT_SEVERITIES: Final[tuple[str, ...]] = get_args(Severity)
ALERT_STATES: Final[tuple[str, ...]] = get_args(State)
BASELINE_OUTCOMES: Final = ("accepted", "refused")

# Bucket bounds in seconds (common practice, no source: roughly 1-2.5-5 steps
# spanning the expected range of each duration).
_BATCH_BUCKETS: Final = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
_CHECKPOINT_BUCKETS: Final = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
_LATENCY_BUCKETS: Final = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0)


@dataclass(frozen=True)
class LiveSnapshot:
    """Live state of the daemon at the end of a worker batch (immutable).

    The mappings and the sequence are copied on construction, so the worker
    may reuse its own containers afterwards.

    Parameters
    ----------
    queue_depth, queue_capacity : int
        Messages waiting in the worker queue, and its size (both >= 0).
    connected : bool
        Whether the MQTT connection is up.
    assets : Mapping[str, int]
        Asset count per state, keys from :data:`ASSET_STATES`; missing states
        are reported as 0.
    active_alerts : Mapping[tuple[str, str], int]
        Raised alerts per ``(family, severity)``, keys from
        :data:`ALERT_FAMILIES` x :data:`ALERT_SEVERITIES`; missing pairs are 0.
    top_ratios : Sequence[tuple[str, str, float]]
        ``(asset, detector, statistic / threshold)`` of the highest ratios,
        already capped by the worker; each ``(asset, detector)`` at most once.
    outbox_messages, journal_messages : int
        Alert messages not yet acknowledged by the broker, and messages
        journalled since the last checkpoint (both >= 0).
    last_sample_s, last_checkpoint_s, last_connect_s : float or None
        Unix times of the newest sample processed, the last successful
        checkpoint and the last successful connect; ``None`` if none yet.

    Raises
    ------
    ValueError
        If a count is negative or not an integer, a key is not a known label
        value, an ``(asset, detector)`` pair repeats, or a time is not finite;
        the message names the field and the value.
    """

    queue_depth: int
    queue_capacity: int
    connected: bool
    assets: Mapping[str, int]
    active_alerts: Mapping[tuple[str, str], int]
    top_ratios: Sequence[tuple[str, str, float]]
    outbox_messages: int
    journal_messages: int
    last_sample_s: float | None
    last_checkpoint_s: float | None
    last_connect_s: float | None

    def __post_init__(self) -> None:
        for name in ("queue_depth", "queue_capacity", "outbox_messages", "journal_messages"):
            _check_count(name, getattr(self, name))
        for state, count in self.assets.items():
            if state not in ASSET_STATES:
                raise ValueError(f"assets: unknown state {state!r}, expected one of {ASSET_STATES}")
            _check_count(f"assets[{state!r}]", count)
        for key, count in self.active_alerts.items():
            if (
                not isinstance(key, tuple)
                or len(key) != 2
                or key[0] not in ALERT_FAMILIES
                or key[1] not in ALERT_SEVERITIES
            ):
                raise ValueError(
                    f"active_alerts: unknown key {key!r}, expected (family, severity) with family "
                    f"in {ALERT_FAMILIES} and severity in {ALERT_SEVERITIES}"
                )
            _check_count(f"active_alerts[{key!r}]", count)
        ratios = tuple((str(a), str(d), float(r)) for a, d, r in self.top_ratios)
        pairs = {(a, d) for a, d, _ in ratios}
        if len(pairs) != len(ratios):
            raise ValueError(
                f"top_ratios: each (asset, detector) may appear once, got {len(ratios)} entries "
                f"for {len(pairs)} pairs"
            )
        for name in ("last_sample_s", "last_checkpoint_s", "last_connect_s"):
            value = getattr(self, name)
            if value is not None and not math.isfinite(value):
                raise ValueError(f"{name} must be a finite Unix time or None, got {value!r}")
        object.__setattr__(self, "assets", MappingProxyType(dict(self.assets)))
        object.__setattr__(self, "active_alerts", MappingProxyType(dict(self.active_alerts)))
        object.__setattr__(self, "top_ratios", ratios)


def _check_count(name: str, value: object) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ValueError(f"{name} must be an integer >= 0, got {value!r}")


def _check_labels(name: str, values: Sequence[str]) -> tuple[str, ...]:
    found = tuple(values)
    for value in found:
        if not isinstance(value, str) or not value:
            raise ValueError(f"{name}: label values must be non-empty strings, got {value!r}")
    if len(set(found)) != len(found):
        raise ValueError(f"{name}: label values must be unique, got {list(found)}")
    return found


class _SnapshotCollector:
    """Gauges computed at scrape time from the latest :class:`LiveSnapshot`."""

    def __init__(self) -> None:
        self.snapshot: LiveSnapshot | None = None

    def describe(self) -> Iterable[Metric]:
        """Families this collector yields, without samples (for name clash checks)."""
        return self._families(None)

    def collect(self) -> Iterable[Metric]:
        """Families with samples from the snapshot current at this call."""
        snapshot = self.snapshot  # one read: every gauge of a scrape comes from one snapshot
        if snapshot is None:
            return []
        return self._families(snapshot)

    @staticmethod
    def _families(s: LiveSnapshot | None) -> list[Metric]:
        def gauge(name: str, doc: str, labels: Sequence[str] = ()) -> GaugeMetricFamily:
            return GaugeMetricFamily(name, doc, labels=list(labels))

        depth = gauge("arxwatch_queue_depth", "Messages waiting in the worker queue.")
        capacity = gauge("arxwatch_queue_capacity", "Size of the worker queue.")
        connected = gauge("arxwatch_mqtt_connected", "1 while connected to the broker, else 0.")
        assets = gauge("arxwatch_assets", "Assets by state.", ("state",))
        alerts = gauge(
            "arxwatch_active_alerts",
            "Raised alerts by family and severity.",
            ("family", "severity"),
        )
        outbox = gauge("arxwatch_outbox_messages", "Alert messages not yet acknowledged.")
        journal = gauge(
            "arxwatch_journal_messages",
            "Messages journalled since the last checkpoint (replayed at a restart).",
        )
        last_sample = gauge(
            "arxwatch_last_sample_timestamp_seconds", "Unix time of the newest sample processed."
        )
        last_checkpoint = gauge(
            "arxwatch_last_checkpoint_timestamp_seconds",
            "Unix time of the last successful checkpoint.",
        )
        last_connect = gauge(
            "arxwatch_last_connect_timestamp_seconds",
            "Unix time of the last successful broker connect.",
        )
        ratio = gauge(
            "arxwatch_asset_detector_ratio",
            "Detector statistic / threshold (1 = alarm level), highest ratios only.",
            ("asset", "detector"),
        )
        families: list[Metric] = [depth, capacity, connected, assets, alerts, outbox, journal]
        families += [last_sample, last_checkpoint, last_connect, ratio]
        if s is None:
            return families
        depth.add_metric([], s.queue_depth)
        capacity.add_metric([], s.queue_capacity)
        connected.add_metric([], 1.0 if s.connected else 0.0)
        for state in ASSET_STATES:
            assets.add_metric([state], s.assets.get(state, 0))
        for family in ALERT_FAMILIES:
            for severity in ALERT_SEVERITIES:
                alerts.add_metric([family, severity], s.active_alerts.get((family, severity), 0))
        outbox.add_metric([], s.outbox_messages)
        journal.add_metric([], s.journal_messages)
        for stamp, value in (
            (last_sample, s.last_sample_s),
            (last_checkpoint, s.last_checkpoint_s),
            (last_connect, s.last_connect_s),
        ):
            if value is not None:
                stamp.add_metric([], value)
        for asset, detector, value in s.top_ratios:
            ratio.add_metric([asset, detector], value)
        return [f for f in families if f.samples]  # absent, not 0, when there is no value


class DaemonMetrics:
    """Every metric of the daemon, registered on ``registry``.

    See the module docstring for the table of names, types and labels.

    Parameters
    ----------
    registry : CollectorRegistry
        Registry to register on (never the global default one).
    version : str
        arxwatch version, for ``arxwatch_build_info``.
    reject_reasons : Sequence[str]
        Label values of ``arxwatch_payloads_rejected_total`` (the decoder's
        closed set), created at 0.
    refusal_reasons : Sequence[str]
        Label values of ``arxwatch_topics_refused_total``, created at 0.
    sample_outcomes : Sequence[str]
        Label values of ``arxwatch_samples_total``, created at 0.
    detectors : Sequence[str]
        Detector names; ``arxwatch_alert_transitions_total`` is created at 0
        for every detector and state.
    max_ratio_series : int, default 20
        Most ``top_ratios`` entries a snapshot may carry.

    Raises
    ------
    ValueError
        If a label sequence has an empty, non-string or repeated value, or
        ``max_ratio_series`` is not a positive integer.
    prometheus_client.registry.DuplicateTimeseries
        If ``registry`` already holds one of these names (a ``ValueError``).

    Attributes
    ----------
    messages_received, queue_overflows, topics_refused, payloads_rejected, samples,
    rows, grid_points_skipped, sample_gaps, rows_judged, rows_not_judged, alert_transitions,
    alerts_published, baselines, mqtt_connects, mqtt_disconnects,
    mqtt_session_takeovers, mqtt_sessions_lost, checkpoints, checkpoint_failures : Counter
        Event counters, incremented by the daemon (labelled ones through
        ``.labels(...)``).
    batch_seconds, checkpoint_seconds, alert_latency_seconds : Histogram
        Durations, recorded with ``.observe(seconds)``.

    Examples
    --------
    >>> registry = CollectorRegistry()
    >>> metrics = DaemonMetrics(registry, version="0.1.0", reject_reasons=["not_json"],
    ...     refusal_reasons=["asset limit"], sample_outcomes=["accepted"],
    ...     detectors=["innovation_mean"])
    >>> metrics.payloads_rejected.labels("not_json").inc()
    >>> registry.get_sample_value("arxwatch_payloads_rejected_total", {"reason": "not_json"})
    1.0
    """

    def __init__(
        self,
        registry: CollectorRegistry,
        *,
        version: str,
        reject_reasons: Sequence[str],
        refusal_reasons: Sequence[str],
        sample_outcomes: Sequence[str],
        detectors: Sequence[str],
        max_ratio_series: int = 20,
    ) -> None:
        reject = _check_labels("reject_reasons", reject_reasons)
        refusal = _check_labels("refusal_reasons", refusal_reasons)
        outcomes = _check_labels("sample_outcomes", sample_outcomes)
        detector_names = _check_labels("detectors", detectors)
        if (
            isinstance(max_ratio_series, bool)
            or not isinstance(max_ratio_series, int)
            or max_ratio_series < 1
        ):
            raise ValueError(f"max_ratio_series must be an integer >= 1, got {max_ratio_series!r}")
        self.max_ratio_series = max_ratio_series

        def counter(name: str, doc: str, labels: Sequence[str] = ()) -> Counter:
            return Counter(name, doc, labelnames=labels, registry=registry)

        def histogram(name: str, doc: str, buckets: Sequence[float]) -> Histogram:
            return Histogram(name, doc, buckets=buckets, registry=registry)

        build = Info(
            "arxwatch_build", "Build information; the value is always 1.", registry=registry
        )
        build.info(
            {"version": version, "python": platform.python_version(), "paho_mqtt": _paho_version()}
        )
        self.messages_received = counter(
            "arxwatch_mqtt_messages_received_total", "MQTT messages received."
        )
        self.queue_overflows = counter(
            "arxwatch_queue_overflows_total", "Messages dropped because the worker queue was full."
        )
        self.topics_refused = counter(
            "arxwatch_topics_refused_total", "Messages whose topic was refused.", ("reason",)
        )
        self.payloads_rejected = counter(
            "arxwatch_payloads_rejected_total", "Payloads rejected by the decoder.", ("reason",)
        )
        self.samples = counter(
            "arxwatch_samples_total", "Decoded samples by alignment outcome.", ("outcome",)
        )
        self.rows = counter("arxwatch_rows_total", "Aligned rows produced.")
        self.grid_points_skipped = counter(
            "arxwatch_grid_points_skipped_total", "Grid points without a complete row."
        )
        self.sample_gaps = counter(
            "arxwatch_sample_gaps_total",
            "Gaps in a checked signal's samples (longer than gap_factor expected periods).",
        )
        self.rows_judged = counter("arxwatch_rows_judged_total", "Rows judged by the detectors.")
        self.rows_not_judged = counter(
            "arxwatch_rows_not_judged_total", "Rows not judged, by reason.", ("reason",)
        )
        self.alert_transitions = counter(
            "arxwatch_alert_transitions_total",
            "Alert lifecycle transitions.",
            ("detector", "state"),
        )
        self.alerts_published = counter(
            "arxwatch_alerts_published_total", "Alert messages handed to the MQTT client."
        )
        self.baselines = counter(
            "arxwatch_baselines_total", "Baseline fits by outcome.", ("outcome",)
        )
        self.mqtt_connects = counter("arxwatch_mqtt_connects_total", "Successful broker connects.")
        self.mqtt_disconnects = counter(
            "arxwatch_mqtt_disconnects_total", "Broker connections lost or closed."
        )
        self.mqtt_session_takeovers = counter(
            "arxwatch_mqtt_session_takeovers_total",
            "Disconnects because another client took over the client id.",
        )
        self.mqtt_sessions_lost = counter(
            "arxwatch_mqtt_sessions_lost_total", "Connects without a session to resume."
        )
        self.checkpoints = counter("arxwatch_checkpoints_total", "Checkpoints written.")
        self.checkpoint_failures = counter(
            "arxwatch_checkpoint_failures_total", "Checkpoints that failed."
        )
        self.batch_seconds = histogram(
            "arxwatch_batch_duration_seconds", "Worker time per batch.", _BATCH_BUCKETS
        )
        self.checkpoint_seconds = histogram(
            "arxwatch_checkpoint_duration_seconds",
            "Time to write a checkpoint.",
            _CHECKPOINT_BUCKETS,
        )
        self.alert_latency_seconds = histogram(
            "arxwatch_alert_latency_seconds",
            "Message arrival to alert handed to the MQTT client.",
            _LATENCY_BUCKETS,
        )
        for labelled, values in (
            (self.payloads_rejected, reject),
            (self.topics_refused, refusal),
            (self.samples, outcomes),
            (self.rows_not_judged, NOT_JUDGED_REASONS),
            (self.baselines, BASELINE_OUTCOMES),
        ):
            for value in values:
                labelled.labels(value)
        for detector in detector_names:
            for state in ALERT_STATES:
                self.alert_transitions.labels(detector, state)
        self._snapshots = _SnapshotCollector()
        registry.register(self._snapshots)
        ProcessCollector(registry=registry)

    def publish(self, snapshot: LiveSnapshot) -> None:
        """Make ``snapshot`` the state that scrapes report (one reference swap).

        Parameters
        ----------
        snapshot : LiveSnapshot
            Live state at the end of a worker batch.

        Raises
        ------
        ValueError
            If ``snapshot.top_ratios`` holds more than ``max_ratio_series``
            entries (the per-asset series must stay capped).
        """
        if len(snapshot.top_ratios) > self.max_ratio_series:
            raise ValueError(
                f"snapshot.top_ratios has {len(snapshot.top_ratios)} entries, more than "
                f"max_ratio_series={self.max_ratio_series}"
            )
        self._snapshots.snapshot = snapshot


def _paho_version() -> str:
    try:
        return package_version("paho-mqtt")
    except PackageNotFoundError:  # the package declares it; only a broken install lacks it
        return "unknown"
