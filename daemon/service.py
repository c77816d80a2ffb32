"""``arxwatch run``: the long-running service around the pipeline.

One worker thread (the caller's) does everything that touches state, in a
loop::

    take queued MQTT messages  -> journal them (SQLite) -> acknowledge them
    -> Pipeline.feed            (route, decode, align, data quality)
    -> Pipeline.advance(now)    (close grid points, learn, judge)
    -> alert records            -> outbox (SQLite) -> MQTT, retained state per asset
    -> every checkpoint_every_s: Pipeline.checkpoint -> one SQLite transaction

paho's network thread only queues messages (:class:`MqttLink`); the HTTP
thread only reads the latest metrics snapshot. A message is acknowledged to
the broker once journalled, so a crash loses nothing acknowledged: at start
the checkpoint is restored and the journal after it replayed through the same
pipeline. Unacknowledged messages stay with the broker's persistent session.

Stopping (SIGTERM or SIGINT): the loop stops taking messages (those queued
but not acknowledged come again with the session), writes a last
checkpoint, gives pending alerts a moment to reach the broker, publishes the
retained ``offline`` status and disconnects.

Alerts are advisory maintenance information; nothing here writes to a
controller.
"""

from __future__ import annotations

import ctypes
import gc
import json
import logging
import math
import queue
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any, get_args

from prometheus_client import CollectorRegistry

from arxwatch.daemon.alert import CAUTION
from arxwatch.daemon.config import Config, read_secret
from arxwatch.daemon.decode import REJECT_REASONS
from arxwatch.daemon.fleet import DETECTORS
from arxwatch.daemon.http import Health, MetricsServer, judge_health, make_app
from arxwatch.daemon.ingest import Incoming, LinkStatus, MqttLink
from arxwatch.daemon.intake import IntakeOutcome
from arxwatch.daemon.library import BaselineFileError, read_site_baselines
from arxwatch.daemon.metrics import DaemonMetrics, LiveSnapshot
from arxwatch.daemon.pipeline import Counts, Pipeline
from arxwatch.daemon.publish import AlertPublisher
from arxwatch.daemon.route import RefusalReason
from arxwatch.daemon.sdnotify import Notifier
from arxwatch.daemon.store import OutboxMessage, StateStore
from arxwatch.estimators.baseline import BaselineSet

__all__ = ["ServiceSettings", "StartError", "run_service"]

logger = logging.getLogger(__name__)

#: Sample outcomes counted (alignment outcomes and the dropped quality flag).
SAMPLE_OUTCOMES = (*get_args(IntakeOutcome), "bad_quality_flag")


class StartError(RuntimeError):
    """The service cannot start; the message says what to fix."""


@dataclass(frozen=True)
class ServiceSettings:
    """Timing of the worker loop (not in the YAML: sensible for every site).

    Parameters
    ----------
    tick_s : float
        Longest wait for a message before the loop goes round anyway
        (closing grid points, checkpoints, health).
    batch : int
        Most messages taken, journalled and acknowledged at once.
    stale_every_s : float
        Seconds between staleness checks of every signal.
    drain_s : float
        At stop, how long pending alerts may take to reach the broker.
    top_ratios : int
        Assets per detector shown in ``arxwatch_asset_detector_ratio``.
    gauges_every_s : float
        Seconds between refreshes of the gauges (queue depth, assets, active
        alerts, journal and outbox sizes, ratios). They count the journal
        and scan the fleet, so once per batch would slow a busy worker;
        the counters move at every batch.
    """

    tick_s: float = 0.05
    batch: int = 2000
    stale_every_s: float = 10.0
    drain_s: float = 3.0
    top_ratios: int = 20
    gauges_every_s: float = 1.0


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("arxwatch")
    except PackageNotFoundError:
        return "unknown"


def load_libraries(config: Config) -> dict[str, dict[str, BaselineSet]]:
    """Read the baseline file of every class that loads one.

    Raises
    ------
    StartError
        If a file cannot be read; the message names the class and the file.
    """
    try:
        return read_site_baselines(config)
    except BaselineFileError as err:
        raise StartError(str(err)) from None


def alert_messages(
    config: Config, records: Sequence[dict[str, Any]], active: Callable[[str], Mapping[str, str]]
) -> list[OutboxMessage]:
    """Turn alert records into outbox messages: events, then each asset's retained state.

    Event ids are the record id with the state, severity and sample time, so
    the same record (replayed after a crash) is the same message. The state
    message says which alerts of the asset are raised now.
    """
    topics = config.topics
    out: list[OutboxMessage] = []
    latest: dict[str, dict[str, Any]] = {}
    for record in records:
        asset = record["asset"]
        event_id = f"{record['id']}/{record['state']}/{record['severity']}/{record['sample_time']}"
        out.append(
            OutboxMessage(
                id=f"event/{event_id}",
                topic=topics.events_topic(asset),
                payload=json.dumps(record, allow_nan=False).encode("utf-8"),
                qos=1,
                retain=False,
            )
        )
        latest[asset] = record
    for asset, record in latest.items():
        raised = active(asset)
        state = {
            "schema": "arxwatch.alert-state/1",
            "asset": asset,
            "updated": record["sample_time"],
            "active": [{"alert": key, "severity": sev} for key, sev in sorted(raised.items())],
            "caution": CAUTION,
        }
        out.append(
            OutboxMessage(
                id=f"state/{asset}/{record['id']}/{record['state']}/{record['sample_time']}",
                topic=topics.state_topic(asset),
                payload=json.dumps(state).encode("utf-8"),
                qos=1,
                retain=True,
            )
        )
    return out


class _Meter:
    """Turns the pipeline's running tallies into Prometheus counter increments."""

    def __init__(self, metrics: DaemonMetrics) -> None:
        self.metrics = metrics
        self.seen = Counts()
        self.link: LinkStatus | None = None

    def update(self, counts: Counts) -> None:
        m, seen = self.metrics, self.seen
        _inc(m.messages_received, counts.messages - seen.messages)
        for reason, n in (counts.refused - seen.refused).items():
            m.topics_refused.labels(reason).inc(n)
        for reason, n in (counts.rejected - seen.rejected).items():
            m.payloads_rejected.labels(reason).inc(n)
        for outcome, n in (counts.samples - seen.samples).items():
            m.samples.labels(outcome).inc(n)
        _inc(m.rows, counts.rows - seen.rows)
        _inc(m.grid_points_skipped, counts.grid_points_skipped - seen.grid_points_skipped)
        _inc(m.sample_gaps, counts.sample_gaps - seen.sample_gaps)
        _inc(m.rows_judged, counts.rows_judged - seen.rows_judged)
        for reason, n in (counts.rows_not_judged - seen.rows_not_judged).items():
            m.rows_not_judged.labels(reason).inc(n)
        for (detector, state), n in (counts.transitions - seen.transitions).items():
            m.alert_transitions.labels(detector, state).inc(n)
        for outcome, n in (counts.baselines - seen.baselines).items():
            m.baselines.labels(outcome).inc(n)
        self.seen = Counts(
            messages=counts.messages,
            refused=counts.refused.copy(),
            rejected=counts.rejected.copy(),
            samples=counts.samples.copy(),
            rows=counts.rows,
            grid_points_skipped=counts.grid_points_skipped,
            sample_gaps=counts.sample_gaps,
            rows_judged=counts.rows_judged,
            rows_not_judged=counts.rows_not_judged.copy(),
            transitions=counts.transitions.copy(),
            baselines=counts.baselines.copy(),
        )

    def link_status(self, status: LinkStatus) -> None:
        m, before = self.metrics, self.link
        for name, counter in (
            ("connects", m.mqtt_connects),
            ("disconnects", m.mqtt_disconnects),
            ("takeovers", m.mqtt_session_takeovers),
            ("sessions_lost", m.mqtt_sessions_lost),
            ("overflows", m.queue_overflows),
        ):
            _inc(counter, getattr(status, name) - (getattr(before, name) if before else 0))
        self.link = status


def _release_transient_memory() -> None:
    """Hand the memory of start-up (parsed baseline files, the restored blobs) back to the OS.

    Python frees the objects, but the C allocator keeps the pages for reuse;
    glibc's ``malloc_trim`` returns them, so the resident size reflects what
    the service holds. Elsewhere (no glibc) this only collects garbage.
    """
    gc.collect()
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return
    libc.malloc_trim(0)


def _inc(counter: Any, n: int) -> None:
    if n > 0:
        counter.inc(n)


class Service:
    """The running daemon: owns the store, the MQTT link, the pipeline and the HTTP server.

    Parameters
    ----------
    config : Config
        Validated configuration.
    environ : mapping of str to str
        Process environment (secret variables, systemd notification).
    settings : ServiceSettings, optional
        Loop timing.
    clock : callable, optional
        Wall clock, epoch seconds.

    Raises
    ------
    StartError
        If a secret, a baseline file, the state store or the metrics address
        cannot be used; the message names what and why.
    """

    def __init__(
        self,
        config: Config,
        environ: Mapping[str, str],
        settings: ServiceSettings | None = None,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.config = config
        self.settings = settings or ServiceSettings()
        self.clock = clock
        self.notifier = Notifier.from_environ(environ)
        self.restored = False
        self._last_tick: float | None = None
        password = read_secret(config, environ)  # ConfigError names the key
        # baseline files are parsed after the restore (the pipeline calls
        # this once), so their objects sit above the restored state and
        # start-up can hand their memory back to the OS
        self.pipeline = Pipeline(config, lambda: load_libraries(config))
        try:
            self.store = StateStore(config.state.path)
        except OSError as err:
            raise StartError(f"state store: {err}") from None
        if self.store.recovered_from is not None:
            logger.error(
                "the state file was damaged and has been moved to %s; starting without saved "
                "state (models and alert states start over)",
                self.store.recovered_from,
            )
        self.registry = CollectorRegistry()
        self.metrics = DaemonMetrics(
            self.registry,
            version=_version(),
            reject_reasons=REJECT_REASONS,
            refusal_reasons=get_args(RefusalReason),
            sample_outcomes=SAMPLE_OUTCOMES,
            detectors=DETECTORS,
            max_ratio_series=self.settings.top_ratios,
        )
        self.meter = _Meter(self.metrics)
        try:
            self.http = MetricsServer(
                make_app(self.registry, self.health), config.metrics.host, config.metrics.port
            )
        except OSError as err:
            self.store.close()
            raise StartError(f"metrics.listen: {err}") from None
        self.inbox: queue.Queue[Incoming] = queue.Queue(maxsize=config.limits.queue_size)
        checkpoint = self._restore()
        _release_transient_memory()  # the parsed files and restored blobs are gone now
        self.link = MqttLink(
            config.broker,
            password=password,
            subscriptions=config.subscriptions(),
            status_topic=config.topics.status,
            inbox=self.inbox,
            clock=clock,
            version=_version(),
            expect_session=checkpoint,
        )
        self.publisher = AlertPublisher(self.store, self.link)
        self._journal_seq = self._last_journal_seq
        self._last_checkpoint: float | None = None
        self._last_stale = -math.inf
        self._last_gauges = -math.inf
        self._latest_arrival: float | None = None
        self._connected_once = False

    # -- start-up -------------------------------------------------------------
    def _restore(self) -> bool:
        """Restore the checkpoint and replay the journal; return whether there was one."""
        saved = self.store.load_checkpoint()
        self._last_journal_seq = saved.journal_upto
        try:
            self.pipeline.restore(saved.entries, self.store.series)
        except (ValueError, KeyError) as err:
            stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
            copy = self.store.path.with_name(f"{self.store.path.name}.incompatible-{stamp}")
            self.store.backup(copy)
            logger.error(
                "the saved state does not fit this configuration (%s); it was copied to %s "
                "and the service starts without it",
                err,
                copy,
            )
            self.pipeline = Pipeline(self.config, lambda: load_libraries(self.config))
        replayed = 0
        records: list[dict[str, Any]] = []
        for entry in self.store.journal_after(saved.journal_upto):
            records += self.pipeline.feed(entry.topic, entry.payload, entry.arrival_s)
            self._last_journal_seq = entry.seq
            replayed += 1
        if replayed:
            records += self.pipeline.advance(self.clock())
            logger.info(
                "replayed %d journalled messages received after the last checkpoint", replayed
            )
        self._pending_records = records
        self.restored = True
        return saved.saved_at_s is not None

    # -- health ---------------------------------------------------------------
    def health(self) -> Health:
        """Liveness from the loop's last tick, readiness from state and connection."""
        return judge_health(
            now_s=time.monotonic(),
            last_tick_s=self._last_tick,
            max_tick_age_s=max(30.0, 10 * self.settings.tick_s),
            restored=self.restored,
            connected=self.link.status().connected,
        )

    # -- the loop -------------------------------------------------------------
    def run(self, stop: threading.Event) -> None:
        """Serve until ``stop`` is set, then shut down in order."""
        self.http.start()
        self.link.start()
        logger.info(
            "arxwatch %s serving %d asset class(es); metrics on http://%s/metrics",
            _version(),
            len(self.config.asset_classes),
            self.config.metrics.listen,
        )
        self.notifier.status("starting: connecting to the broker")
        watchdog = self.notifier.watchdog_interval_s
        last_ping = -math.inf
        try:
            if self._pending_records:
                self._publish(self._pending_records)
            while not stop.is_set():
                self._tick()
                now = time.monotonic()
                if watchdog is not None and now - last_ping >= watchdog:
                    self.notifier.watchdog()
                    last_ping = now
        finally:
            self._shutdown()

    def _tick(self) -> None:
        settings = self.settings
        started = time.monotonic()
        batch = self._take()
        records: list[dict[str, Any]] = []
        if batch:
            self._journal_seq = self.store.append_journal(
                [(m.topic, m.payload, m.arrival_s) for m in batch]
            )
            self.link.ack(batch)
            for message in batch:
                records += self.pipeline.feed(message.topic, message.payload, message.arrival_s)
            self._latest_arrival = batch[-1].arrival_s
            self._log_problem()
        now = self.clock()
        records += self.pipeline.advance(now)
        if now - self._last_stale >= settings.stale_every_s:
            records += self.pipeline.check_stale(now)
            self._last_stale = now
        if records:
            self._publish(records)
        self.publisher.pump()
        self._log_baselines()
        if batch:
            self.metrics.batch_seconds.observe(time.monotonic() - started)
        last = self._last_checkpoint
        if last is None or now - last >= self.config.state.checkpoint_every_s:
            self._checkpoint(now)
            # a checkpoint copies the whole state a few times over (arrays,
            # npz, SQLite); now that the copies are gone, give their pages
            # back rather than keep them as high water
            _release_transient_memory()
        self._observe_link()
        self.meter.update(self.pipeline.counts)
        ticked = time.monotonic()
        if ticked - self._last_gauges >= settings.gauges_every_s:
            self.metrics.publish(self._snapshot())
            self._last_gauges = ticked
        self._last_tick = ticked

    def _take(self) -> list[Incoming]:
        try:
            first = self.inbox.get(timeout=self.settings.tick_s)
        except queue.Empty:
            return []
        batch = [first]
        while len(batch) < self.settings.batch:
            try:
                batch.append(self.inbox.get_nowait())
            except queue.Empty:
                break
        return batch

    def _publish(self, records: list[dict[str, Any]]) -> None:
        pipeline = self.pipeline

        def active(asset: str) -> Mapping[str, str]:
            asset_class = pipeline.class_of(asset)
            return {} if asset_class is None else pipeline.active(asset_class, asset)

        messages = alert_messages(self.config, records, active)
        self.publisher.submit(messages)
        self.metrics.alerts_published.inc(len(records))
        if self._latest_arrival is not None:
            self.metrics.alert_latency_seconds.observe(
                max(0.0, self.clock() - self._latest_arrival)
            )
        for record in records:
            # INFO: every alert is its own event, and the rate limit on
            # repeated warnings (one template) would hide all but the first.
            logger.info(
                "alert %s %s %s/%s: %s",
                record["asset"],
                record["state"],
                record["detector"],
                record["signal"],
                record["reading"],
                extra={"asset": record["asset"], "alert_id": record["id"]},
            )

    def _log_problem(self) -> None:
        problem = self.pipeline.last_problem
        if problem is None:
            return
        self.pipeline.last_problem = None
        # one template: the rate limit lets it through once a minute
        logger.warning(
            "unusable message on %r: %s (all are counted in arxwatch_payloads_rejected_total "
            "and arxwatch_topics_refused_total)",
            problem[0][:120],
            problem[1],
        )

    def _log_baselines(self) -> None:
        for event in self.pipeline.events:
            mode = "" if event.mode is None else f" (mode {event.mode})"
            if event.accepted:
                logger.info(
                    "baseline accepted for %s%s: fit %.1f %% on held-back data; judged from now",
                    event.asset,
                    mode,
                    event.fit_percent or 0.0,
                )
            else:
                logger.warning(
                    "baseline window of %s%s refused: %s; collecting a new window",
                    event.asset,
                    mode,
                    "; ".join(event.reasons),
                )
        self.pipeline.events.clear()

    def _checkpoint(self, now: float) -> None:
        started = time.monotonic()
        try:
            saved = self.pipeline.checkpoint()
            self.store.save_checkpoint(
                saved.entries,
                now_s=now,
                journal_upto=self._journal_seq,
                appended=saved.appended,
                dropped=saved.dropped,
            )
        except OSError as err:
            self.metrics.checkpoint_failures.inc()
            logger.error("checkpoint failed, retrying at the next interval: %s", err)
            return
        self._last_checkpoint = now
        self.metrics.checkpoints.inc()
        self.metrics.checkpoint_seconds.observe(time.monotonic() - started)

    def _observe_link(self) -> None:
        status = self.link.status()
        previous = self.meter.link
        if previous is not None and status.sessions_lost > previous.sessions_lost:
            logger.warning(
                "the broker held no session for us: samples published while we were away are "
                "lost; each signal's alignment sees a gap"
            )
        if status.connected and not self._connected_once:
            self._connected_once = True
            self.notifier.ready()
            self.notifier.status("connected; judging")
        self.meter.link_status(status)

    def _snapshot(self) -> LiveSnapshot:
        status = self.meter.link
        active: dict[tuple[str, str], int] = {}
        for family, severity, count in self.pipeline.alert_counts():
            active[(family, severity)] = count
        return LiveSnapshot(
            queue_depth=self.inbox.qsize(),
            queue_capacity=self.inbox.maxsize,
            connected=bool(status and status.connected),
            assets=self.pipeline.asset_states(),
            active_alerts=active,
            top_ratios=self.pipeline.top_ratios(self.settings.top_ratios),
            outbox_messages=self.store.outbox_count(),
            journal_messages=self.store.journal_count(),
            last_sample_s=self.pipeline.last_sample_s,
            last_checkpoint_s=self._last_checkpoint,
            last_connect_s=None if status is None else status.last_connect_s,
        )

    # -- stopping -------------------------------------------------------------
    def _shutdown(self) -> None:
        self.notifier.stopping()
        logger.info("stopping: writing a last checkpoint")
        try:
            self._checkpoint(self.clock())
            deadline = time.monotonic() + self.settings.drain_s
            while self.publisher.pump() and time.monotonic() < deadline:
                time.sleep(0.05)
        finally:
            self.link.stop()
            self.http.stop()
            self.store.close()
        logger.info("stopped")


def run_service(
    config: Config,
    environ: Mapping[str, str],
    stop: threading.Event,
    settings: ServiceSettings | None = None,
) -> None:
    """Start the service and serve until ``stop`` is set.

    Raises
    ------
    StartError
        If the service cannot start (see :class:`Service`).
    ConfigError
        If a secret cannot be read.
    """
    Service(config, environ, settings).run(stop)
