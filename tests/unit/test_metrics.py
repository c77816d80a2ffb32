"""Daemon metrics: names, types, labels, pre-created series, snapshot gauges, scraped over HTTP."""

import math
import platform
import re
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import replace
from typing import get_args

import paho.mqtt
import prometheus_client
import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.openmetrics.parser import (
    text_string_to_metric_families as openmetrics_families,
)
from prometheus_client.parser import text_string_to_metric_families

from arxwatch.daemon import metrics as metrics_module
from arxwatch.daemon.align import AddOutcome
from arxwatch.daemon.decode import REJECT_REASONS
from arxwatch.daemon.http import Health, MetricsServer, make_app
from arxwatch.daemon.metrics import (
    ALERT_FAMILIES,
    ALERT_SEVERITIES,
    ALERT_STATES,
    ASSET_STATES,
    NOT_JUDGED_REASONS,
    DaemonMetrics,
    LiveSnapshot,
)
from arxwatch.daemon.route import RefusalReason

DETECTORS = ("innovation_mean", "innovation_variance", "whiteness", "feature_drift", "stale")
REFUSALS = get_args(RefusalReason)
OUTCOMES = get_args(AddOutcome)
NOW_S = 1_796_180_400.0  # 2026-12-02T05:40:00Z

Families = dict[str, prometheus_client.Metric]


def snapshot(**changes: object) -> LiveSnapshot:
    base = LiveSnapshot(
        queue_depth=3,
        queue_capacity=10_000,
        connected=True,
        assets={"monitoring": 40, "learning": 2},
        active_alerts={("behaviour", "warning"): 1},
        top_ratios=[("ahu-c2", "innovation_mean", 1.7), ("vav-3-14", "stale", 0.4)],
        outbox_messages=1,
        journal_messages=5,
        last_sample_s=NOW_S - 2.0,
        last_checkpoint_s=NOW_S - 30.0,
        last_connect_s=NOW_S - 3600.0,
    )
    return replace(base, **changes)


@pytest.fixture
def registry() -> CollectorRegistry:
    return CollectorRegistry()


@pytest.fixture
def metrics(registry: CollectorRegistry) -> DaemonMetrics:
    return DaemonMetrics(
        registry,
        version="0.1.0",
        reject_reasons=REJECT_REASONS,
        refusal_reasons=REFUSALS,
        sample_outcomes=OUTCOMES,
        detectors=DETECTORS,
    )


@pytest.fixture
def scrape(
    registry: CollectorRegistry, metrics: DaemonMetrics
) -> Iterator[Callable[..., Families]]:
    """Scrape the real HTTP server on 127.0.0.1 and parse the text with prometheus_client."""
    server = MetricsServer(make_app(registry, lambda: Health(True, True)), "127.0.0.1", 0)
    server.start()

    def get(openmetrics: bool = False) -> Families:
        req = urllib.request.Request(f"http://127.0.0.1:{server.port}/metrics")
        if openmetrics:
            req.add_header("Accept", "application/openmetrics-text; version=1.0.0")
        with urllib.request.urlopen(req, timeout=10) as resp:
            text = resp.read().decode()
        parse = openmetrics_families if openmetrics else text_string_to_metric_families
        return {f.name: f for f in parse(text)}

    try:
        yield get
    finally:
        server.stop()


def values(family: prometheus_client.Metric, suffix: str = "") -> dict[tuple[str, ...], float]:
    """Sample values of a family keyed by label values (in label-name order)."""
    return {
        tuple(v for _, v in sorted(s.labels.items())): s.value
        for s in family.samples
        if s.name == family.name + suffix
    }


# --- names, types and labels --------------------------------------------------------------

# Name syntax of the Prometheus data model (prometheus.io/docs/concepts/data_model).
METRIC_NAME = re.compile(r"[a-zA-Z_:][a-zA-Z0-9_:]*")
LABEL_NAME = re.compile(r"[a-zA-Z_][a-zA-Z0-9_]*")

EXPECTED = {  # family name as parsed -> (type, label names)
    "arxwatch_build_info": ("gauge", {"version", "python", "paho_mqtt"}),
    "arxwatch_mqtt_messages_received": ("counter", set()),
    "arxwatch_queue_overflows": ("counter", set()),
    "arxwatch_topics_refused": ("counter", {"reason"}),
    "arxwatch_payloads_rejected": ("counter", {"reason"}),
    "arxwatch_samples": ("counter", {"outcome"}),
    "arxwatch_rows": ("counter", set()),
    "arxwatch_grid_points_skipped": ("counter", set()),
    "arxwatch_sample_gaps": ("counter", set()),
    "arxwatch_rows_judged": ("counter", set()),
    "arxwatch_rows_not_judged": ("counter", {"reason"}),
    "arxwatch_alert_transitions": ("counter", {"detector", "state"}),
    "arxwatch_alerts_published": ("counter", set()),
    "arxwatch_baselines": ("counter", {"outcome"}),
    "arxwatch_mqtt_connects": ("counter", set()),
    "arxwatch_mqtt_disconnects": ("counter", set()),
    "arxwatch_mqtt_session_takeovers": ("counter", set()),
    "arxwatch_mqtt_sessions_lost": ("counter", set()),
    "arxwatch_checkpoints": ("counter", set()),
    "arxwatch_checkpoint_failures": ("counter", set()),
    "arxwatch_batch_duration_seconds": ("histogram", set()),
    "arxwatch_checkpoint_duration_seconds": ("histogram", set()),
    "arxwatch_alert_latency_seconds": ("histogram", set()),
    "arxwatch_queue_depth": ("gauge", set()),
    "arxwatch_queue_capacity": ("gauge", set()),
    "arxwatch_mqtt_connected": ("gauge", set()),
    "arxwatch_assets": ("gauge", {"state"}),
    "arxwatch_active_alerts": ("gauge", {"family", "severity"}),
    "arxwatch_outbox_messages": ("gauge", set()),
    "arxwatch_journal_messages": ("gauge", set()),
    "arxwatch_last_sample_timestamp_seconds": ("gauge", set()),
    "arxwatch_last_checkpoint_timestamp_seconds": ("gauge", set()),
    "arxwatch_last_connect_timestamp_seconds": ("gauge", set()),
    "arxwatch_asset_detector_ratio": ("gauge", {"asset", "detector"}),
}


def test_every_metric_has_its_type_and_label_set(metrics, scrape) -> None:
    metrics.publish(snapshot())
    families = scrape()
    ours = {
        name: f
        for name, f in families.items()
        if name.startswith("arxwatch_") and not name.endswith("_created")
    }
    assert set(ours) == set(EXPECTED)
    for name, (kind, labels) in EXPECTED.items():
        family = ours[name]
        assert family.type == kind, name
        assert family.samples, name
        for sample in family.samples:
            assert set(sample.labels) - {"le"} == labels, (name, sample)


def test_names_follow_the_prometheus_conventions(metrics, scrape) -> None:
    metrics.publish(snapshot())
    for name, family in scrape().items():
        assert METRIC_NAME.fullmatch(name), name
        assert name.startswith(("arxwatch_", "process_")), name
        assert name == name.lower(), name  # snake_case (naming practices: PN)
        for sample in family.samples:
            assert METRIC_NAME.fullmatch(sample.name), sample.name
            assert all(LABEL_NAME.fullmatch(k) for k in sample.labels), sample
            if family.type == "counter":
                # naming practices: counters end in _total (the parser strips it from the family)
                assert sample.name == name + "_total", sample.name
        if "timestamp" in name:
            assert name.endswith("_timestamp_seconds"), name


def test_module_docstring_documents_every_metric(metrics, scrape) -> None:
    metrics.publish(snapshot())
    exposed = {
        s.name
        for f in scrape().values()
        if f.name.startswith("arxwatch_") and not f.name.endswith("_created")
        for s in f.samples
    }
    exposed = {re.sub(r"_(bucket|count|sum)$", "", n) for n in exposed}
    documented = set(re.findall(r"``(arxwatch_[a-z_]+)``", metrics_module.__doc__ or ""))
    assert documented == exposed


def test_openmetrics_exposition_parses(metrics, scrape) -> None:
    # The OpenMetrics parser is stricter (types, suffixes, info); Prometheus asks for it.
    metrics.publish(snapshot())
    families = scrape(openmetrics=True)
    assert families["arxwatch_build"].type == "info"
    assert families["arxwatch_payloads_rejected"].type == "counter"
    assert families["arxwatch_asset_detector_ratio"].type == "gauge"


def test_nothing_lands_on_the_global_registry(metrics) -> None:
    names = {m.name for m in prometheus_client.REGISTRY.collect()}
    assert not any(n.startswith("arxwatch_") for n in names)


def test_build_info(metrics, scrape) -> None:
    (labels, value), *_ = [(s.labels, s.value) for s in scrape()["arxwatch_build_info"].samples]
    assert value == 1.0
    # paho's own version attribute and the interpreter's, as outside references
    assert labels == {
        "version": "0.1.0",
        "python": platform.python_version(),
        "paho_mqtt": paho.mqtt.__version__,
    }


def test_process_collector_is_on_the_registry(metrics, scrape) -> None:
    families = scrape()
    assert families["process_cpu_seconds"].type == "counter"
    assert families["process_resident_memory_bytes"].samples[0].value > 0


# --- pre-created labels -------------------------------------------------------------------


def test_known_label_values_exist_at_zero_before_any_event(metrics, scrape) -> None:
    families = scrape()
    assert values(families["arxwatch_payloads_rejected"], "_total") == {
        (r,): 0.0 for r in REJECT_REASONS
    }
    assert values(families["arxwatch_topics_refused"], "_total") == {(r,): 0.0 for r in REFUSALS}
    assert values(families["arxwatch_samples"], "_total") == {(o,): 0.0 for o in OUTCOMES}
    assert values(families["arxwatch_rows_not_judged"], "_total") == {
        (r,): 0.0 for r in NOT_JUDGED_REASONS
    }
    assert values(families["arxwatch_baselines"], "_total") == {
        ("accepted",): 0.0,
        ("refused",): 0.0,
    }
    # sorted label names: detector, state
    assert values(families["arxwatch_alert_transitions"], "_total") == {
        (d, s): 0.0 for d in DETECTORS for s in ALERT_STATES
    }
    assert set(ALERT_STATES) == {"raised", "cleared"}


def test_snapshot_gauges_precreate_every_state_family_and_severity(metrics, scrape) -> None:
    metrics.publish(snapshot(assets={}, active_alerts={}))
    families = scrape()
    assert values(families["arxwatch_assets"]) == {(s,): 0.0 for s in ASSET_STATES}
    # sorted label names: family, severity
    assert values(families["arxwatch_active_alerts"]) == {
        (f, s): 0.0 for f in ALERT_FAMILIES for s in ALERT_SEVERITIES
    }


# --- counters and histograms --------------------------------------------------------------


def test_counters_count(metrics, scrape) -> None:
    metrics.payloads_rejected.labels("not_json").inc()
    metrics.payloads_rejected.labels("not_json").inc()
    metrics.alert_transitions.labels("stale", "raised").inc()
    metrics.messages_received.inc(7)
    families = scrape()
    rejected = values(families["arxwatch_payloads_rejected"], "_total")
    assert rejected[("not_json",)] == 2.0
    assert sum(rejected.values()) == 2.0
    assert values(families["arxwatch_alert_transitions"], "_total")[("stale", "raised")] == 1.0
    assert values(families["arxwatch_mqtt_messages_received"], "_total") == {(): 7.0}


def test_histograms_are_cumulative_with_inclusive_upper_bounds(metrics, scrape) -> None:
    for seconds in (0.003, 0.003, 0.2, 9.0):
        metrics.batch_seconds.observe(seconds)
    family = scrape()["arxwatch_batch_duration_seconds"]
    buckets = {float(s.labels["le"]): s.value for s in family.samples if s.name.endswith("_bucket")}
    # Prometheus histogram semantics: bucket le=x counts observations <= x, cumulatively,
    # and le=+Inf equals _count (prometheus.io/docs/concepts/metric_types/#histogram).
    assert buckets[0.0025] == 0.0
    assert buckets[0.005] == 2.0
    assert buckets[0.25] == 3.0
    assert buckets[math.inf] == 4.0
    assert list(buckets.values()) == sorted(buckets.values())
    count = next(s.value for s in family.samples if s.name.endswith("_count"))
    total = next(s.value for s in family.samples if s.name.endswith("_sum"))
    assert count == 4.0
    assert total == pytest.approx(0.003 + 0.003 + 0.2 + 9.0)


# --- snapshot gauges ----------------------------------------------------------------------


def test_snapshot_gauges_absent_before_the_first_publish(metrics, scrape) -> None:
    families = scrape()
    for name in ("arxwatch_queue_depth", "arxwatch_mqtt_connected", "arxwatch_assets"):
        assert name not in families


def test_snapshot_values(metrics, scrape) -> None:
    metrics.publish(snapshot(connected=False))
    families = scrape()

    def one(name: str) -> float:
        return values(families[name])[()]

    assert one("arxwatch_queue_depth") == 3.0
    assert one("arxwatch_queue_capacity") == 10_000.0
    assert one("arxwatch_mqtt_connected") == 0.0
    assert one("arxwatch_outbox_messages") == 1.0
    assert one("arxwatch_journal_messages") == 5.0
    assert one("arxwatch_last_sample_timestamp_seconds") == NOW_S - 2.0
    assert one("arxwatch_last_checkpoint_timestamp_seconds") == NOW_S - 30.0
    assert one("arxwatch_last_connect_timestamp_seconds") == NOW_S - 3600.0
    assert values(families["arxwatch_assets"]) == {
        ("learning",): 2.0,
        ("monitoring",): 40.0,
        ("no_baseline",): 0.0,
    }
    assert values(families["arxwatch_active_alerts"])[("behaviour", "warning")] == 1.0
    assert values(families["arxwatch_asset_detector_ratio"]) == {
        ("ahu-c2", "innovation_mean"): 1.7,
        ("vav-3-14", "stale"): 0.4,
    }


@pytest.mark.parametrize(
    "field",
    ["last_sample_s", "last_checkpoint_s", "last_connect_s"],
)
def test_timestamp_gauge_absent_not_zero_while_none(metrics, scrape, field) -> None:
    metrics.publish(snapshot(**{field: None}))
    families = scrape()
    name = {
        "last_sample_s": "arxwatch_last_sample_timestamp_seconds",
        "last_checkpoint_s": "arxwatch_last_checkpoint_timestamp_seconds",
        "last_connect_s": "arxwatch_last_connect_timestamp_seconds",
    }[field]
    assert name not in families
    others = {
        "arxwatch_last_sample_timestamp_seconds",
        "arxwatch_last_checkpoint_timestamp_seconds",
        "arxwatch_last_connect_timestamp_seconds",
    } - {name}
    assert others <= set(families)


def test_ratio_series_are_bounded_by_top_ratios_and_follow_them(metrics, scrape) -> None:
    first = [(f"vav-3-{i}", "stale", i / 10) for i in range(20)]
    metrics.publish(snapshot(top_ratios=first))
    series = values(scrape()["arxwatch_asset_detector_ratio"])
    assert len(series) == 20
    second = [("ahu-c2", "whiteness", 3.0), ("vav-3-5", "stale", 0.9)]
    metrics.publish(snapshot(top_ratios=second))
    assert values(scrape()["arxwatch_asset_detector_ratio"]) == {
        ("ahu-c2", "whiteness"): 3.0,
        ("vav-3-5", "stale"): 0.9,
    }
    metrics.publish(snapshot(top_ratios=[]))
    assert "arxwatch_asset_detector_ratio" not in scrape()


def test_more_ratios_than_the_cap_are_refused(metrics, scrape) -> None:
    metrics.publish(snapshot())
    too_many = [(f"vav-3-{i}", "stale", 1.0) for i in range(metrics.max_ratio_series + 1)]
    with pytest.raises(ValueError, match="21 entries, more than max_ratio_series=20"):
        metrics.publish(snapshot(top_ratios=too_many))
    # the previous snapshot still stands
    assert len(values(scrape()["arxwatch_asset_detector_ratio"])) == 2


def test_each_scrape_reads_one_snapshot(registry, metrics) -> None:
    # The worker may publish while a scrape is under way. Simulate the worst moment: the
    # snapshot being read publishes its successor as soon as the collector touches it. All
    # gauges of that scrape must still come from the snapshot the scrape started with.
    newer = snapshot(queue_depth=9, outbox_messages=9, journal_messages=9)

    class Racing(LiveSnapshot):
        def __getattribute__(self, name: str) -> object:
            if name == "queue_depth":
                metrics.publish(newer)
            return super().__getattribute__(name)

    metrics.publish(Racing(**vars(snapshot(outbox_messages=3, journal_messages=3))))
    text = prometheus_client.generate_latest(registry).decode()
    families = {f.name: f for f in text_string_to_metric_families(text)}
    seen = {
        values(families[n])[()]
        for n in ("arxwatch_queue_depth", "arxwatch_outbox_messages", "arxwatch_journal_messages")
    }
    assert seen == {3.0}
    assert registry.get_sample_value("arxwatch_queue_depth") == 9.0  # the next scrape: successor


# --- validation ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"queue_depth": -1}, "queue_depth must be an integer >= 0, got -1"),
        ({"outbox_messages": 1.5}, "outbox_messages must be an integer >= 0, got 1.5"),
        ({"journal_messages": True}, "journal_messages must be an integer >= 0, got True"),
        ({"assets": {"retired": 1}}, "assets: unknown state 'retired'"),
        ({"assets": {"learning": -2}}, r"assets\['learning'\] must be an integer >= 0"),
        ({"active_alerts": {("behaviour", "info"): 1}}, "active_alerts: unknown key"),
        ({"active_alerts": {"behaviour": 1}}, "active_alerts: unknown key 'behaviour'"),
        (
            {"top_ratios": [("ahu-c2", "stale", 1.0), ("ahu-c2", "stale", 2.0)]},
            r"each \(asset, detector\) may appear once, got 2 entries for 1 pairs",
        ),
        ({"last_sample_s": math.nan}, "last_sample_s must be a finite Unix time or None"),
        ({"last_connect_s": math.inf}, "last_connect_s must be a finite Unix time or None"),
    ],
)
def test_snapshot_validation(changes, message) -> None:
    with pytest.raises(ValueError, match=message):
        snapshot(**changes)


def test_snapshot_copies_its_containers() -> None:
    assets = {"learning": 1}
    ratios = [("ahu-c2", "stale", 1.0)]
    snap = snapshot(assets=assets, top_ratios=ratios)
    assets["learning"] = 99
    ratios.append(("vav-3-14", "stale", 2.0))
    assert snap.assets == {"learning": 1}
    assert snap.top_ratios == (("ahu-c2", "stale", 1.0),)
    with pytest.raises(TypeError):
        snap.assets["learning"] = 5  # type: ignore[index]


@pytest.mark.parametrize(
    ("argument", "value", "message"),
    [
        ("reject_reasons", ["not_json", ""], "reject_reasons: label values must be non-empty"),
        ("refusal_reasons", ["a", "a"], r"refusal_reasons: label values must be unique"),
        ("detectors", [None], "detectors: label values must be non-empty strings, got None"),
        ("max_ratio_series", 0, "max_ratio_series must be an integer >= 1, got 0"),
    ],
)
def test_constructor_validation(registry, argument, value, message) -> None:
    kwargs: dict[str, object] = {
        "version": "0.1.0",
        "reject_reasons": REJECT_REASONS,
        "refusal_reasons": REFUSALS,
        "sample_outcomes": OUTCOMES,
        "detectors": DETECTORS,
        argument: value,
    }
    with pytest.raises(ValueError, match=message):
        DaemonMetrics(registry, **kwargs)  # type: ignore[arg-type]


def test_second_instance_on_one_registry_is_refused(registry, metrics) -> None:
    # prometheus_client's DuplicateTimeseries is a ValueError naming the clashing names.
    with pytest.raises(ValueError, match="arxwatch_"):
        DaemonMetrics(
            registry,
            version="0.1.0",
            reject_reasons=REJECT_REASONS,
            refusal_reasons=REFUSALS,
            sample_outcomes=OUTCOMES,
            detectors=DETECTORS,
        )


def test_instances_on_separate_registries_are_independent(metrics) -> None:
    other_registry = CollectorRegistry()
    other = DaemonMetrics(
        other_registry,
        version="0.2.0",
        reject_reasons=REJECT_REASONS,
        refusal_reasons=REFUSALS,
        sample_outcomes=OUTCOMES,
        detectors=DETECTORS,
    )
    other.rows.inc(5)
    assert other_registry.get_sample_value("arxwatch_rows_total") == 5.0
    metrics.rows.inc()
    assert other_registry.get_sample_value("arxwatch_rows_total") == 5.0
