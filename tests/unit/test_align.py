"""Alignment to the sampling grid: outcomes, grid, staleness, lateness, gaps, state."""

import json
import time
from typing import get_args

import pytest

from arxwatch.daemon.align import AddOutcome, AlignConfig, Aligner, Row

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, a multiple of 60 s
P = 60.0


def config(**overrides: object) -> AlignConfig:
    settings: dict[str, object] = {
        "sample_period_s": P,
        "output": "sat",
        "inputs": ("valve", "fan"),
        "mode": "occ",
    }
    settings.update(overrides)
    return AlignConfig(**settings)  # type: ignore[arg-type]


def feed(aligner: Aligner, time_s: float, sat: float = 13.0, mode: float | str = "on") -> None:
    values: tuple[tuple[str, float | str], ...] = (
        ("sat", sat),
        ("valve", 40.0),
        ("fan", 1.0),
        ("occ", mode),
    )
    for signal, value in values:
        assert aligner.add(signal, time_s, value) == "accepted"


# --- configuration ---------------------------------------------------------------------------


def test_defaults_scale_with_the_sample_period() -> None:
    cfg = config()
    assert (cfg.staleness_s, cfg.lateness_s, cfg.gap_restart_s) == (120.0, 30.0, 300.0)
    assert cfg.signals == ("sat", "valve", "fan", "occ")
    assert config(inputs=["valve", "fan"]).inputs == ("valve", "fan")


@pytest.mark.parametrize(
    ("overrides", "match"),
    [
        ({"sample_period_s": 0.0}, r"sample_period_s must be > 0, got 0\.0"),
        ({"sample_period_s": float("nan")}, "sample_period_s must be a finite number"),
        ({"sample_period_s": True}, "sample_period_s must be a finite number, got True"),
        ({"staleness_s": -1.0}, r"staleness_s must be >= 0, got -1\.0"),
        ({"lateness_s": float("inf")}, "lateness_s must be a finite number, got inf"),
        ({"gap_restart_s": 30.0}, r"gap_restart_s must be >= sample_period_s \(60\.0\)"),
        ({"inputs": "valve"}, "inputs must be a sequence of signal names"),
        ({"inputs": ("valve", "")}, "signal names must be non-empty strings, got ''"),
        ({"mode": "sat"}, r"distinct, got \['sat'\]"),
        ({"dedupe_keys": 0}, "dedupe_keys must be an integer >= 1, got 0"),
        ({"dedupe_keys": True}, "dedupe_keys must be an integer >= 1, got True"),
    ],
)
def test_bad_settings_are_refused_by_name(overrides: dict[str, object], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        config(**overrides)


def test_config_is_frozen() -> None:
    with pytest.raises(AttributeError):
        config().sample_period_s = 1.0  # type: ignore[misc]


# --- add outcomes -----------------------------------------------------------------------------


def test_outcomes_form_the_documented_closed_set() -> None:
    assert set(get_args(AddOutcome)) == {
        "accepted",
        "duplicate",
        "late",
        "unknown_signal",
        "non_finite",
        "not_numeric",
    }
    counts = Aligner(config()).counts()
    assert all(counts[outcome] == 0 for outcome in get_args(AddOutcome))


def test_accepted_and_unknown_signal() -> None:
    aligner = Aligner(config())
    assert aligner.add("sat", T0, 13.0) == "accepted"
    assert aligner.add("return_air", T0, 22.0) == "unknown_signal"
    assert aligner.counts()["accepted"] == 1 and aligner.counts()["unknown_signal"] == 1


@pytest.mark.parametrize(
    ("signal", "time_s", "value"),
    [
        ("sat", T0, float("nan")),
        ("valve", T0, float("inf")),
        ("sat", float("nan"), 13.0),
        ("occ", T0, float("-inf")),
        ("occ", float("inf"), "on"),
    ],
)
def test_non_finite_time_or_value_is_dropped(signal: str, time_s: float, value: float) -> None:
    aligner = Aligner(config())
    before = aligner.to_state()
    assert aligner.add(signal, time_s, value) == "non_finite"
    assert aligner.counts()["non_finite"] == 1
    after = aligner.to_state()
    assert after["samples"] == before["samples"] and after["seen"] == before["seen"]


def test_text_for_a_numeric_signal_is_not_numeric() -> None:
    aligner = Aligner(config())
    assert aligner.add("valve", T0, "open") == "not_numeric"
    assert aligner.counts()["not_numeric"] == 1


def test_duplicate_changes_nothing_whatever_its_value() -> None:
    aligner = Aligner(config())
    feed(aligner, T0 - 10.0)
    before = aligner.to_state()
    assert aligner.add("sat", T0 - 10.0, 99.0) == "duplicate"
    assert aligner.add("occ", T0 - 10.0, "off") == "duplicate"
    assert aligner.to_state() == before
    assert aligner.counts()["duplicate"] == 2
    (row,) = aligner.advance(T0 + 30.0)
    assert (row.y, row.mode) == (13.0, "on")  # the first value wins


def test_duplicate_is_recognised_after_its_grid_point_closed() -> None:
    aligner = Aligner(config())
    feed(aligner, T0)
    assert len(aligner.advance(T0 + 30.0)) == 1
    before = aligner.to_state()
    assert aligner.add("sat", T0, 13.0) == "duplicate"  # not "late"
    assert aligner.to_state() == before


def test_held_samples_stay_duplicates_beyond_the_remembered_times() -> None:
    aligner = Aligner(config(dedupe_keys=2))
    for k in range(5):
        assert aligner.add("sat", T0 + k, 13.0) == "accepted"
    state = aligner.to_state()
    assert state["seen"]["sat"] == [T0 + 3, T0 + 4]
    assert aligner.add("sat", T0, 20.0) == "duplicate"  # still held for the open grid point
    assert aligner.to_state() == state


def test_late_is_at_or_before_the_last_closed_grid_point() -> None:
    aligner = Aligner(config())
    feed(aligner, T0)
    aligner.advance(T0 + 30.0)
    assert aligner.last_grid_s == T0
    assert aligner.add("valve", T0, 41.0) == "duplicate"
    assert aligner.add("valve", T0 - 0.001, 41.0) == "late"
    assert aligner.add("fan", T0, 0.0) == "duplicate"
    assert aligner.add("sat", T0 + 0.001, 13.5) == "accepted"
    assert aligner.counts()["late"] == 1
    # A redelivered late sample is a duplicate: counted once as late.
    assert aligner.add("valve", T0 - 0.001, 41.0) == "duplicate"
    assert aligner.counts()["late"] == 1


def test_late_sample_cannot_fill_a_later_grid_point() -> None:
    aligner = Aligner(config())
    feed(aligner, T0 - 90.0)  # usable at T0 - 60 and T0
    assert [r.time_s for r in aligner.advance(T0 + 30.0)] == [T0 - 60.0, T0]
    assert aligner.add("sat", T0 - 5.0, 20.0) == "late"  # would have been held for T0 + 60
    assert aligner.advance(T0 + 90.0) == []  # T0 + 60 lacks everything: T0 - 90 is stale


# --- grid, hold, staleness, lateness ------------------------------------------------------------


def test_rows_sit_on_the_epoch_grid_with_last_value_hold() -> None:
    aligner = Aligner(config())
    feed(aligner, T0 - 47.3, sat=12.0)
    assert aligner.add("sat", T0 - 3.1, 12.5) == "accepted"
    assert aligner.add("sat", T0 + 1.0, 99.0) == "accepted"  # after T0: not used for T0
    rows = aligner.advance(T0 + 30.0)
    assert rows == [Row(T0, 12.5, (40.0, 1.0), "on", False)]


def test_grid_is_exact_for_a_period_without_a_binary_fraction() -> None:
    aligner = Aligner(AlignConfig(sample_period_s=0.1, output="y", inputs=("u",)))
    for k in range(30):
        aligner.add("y", k * 0.1, float(k))
        aligner.add("u", k * 0.1, -float(k))
    rows = aligner.advance(3.0)
    assert [r.time_s for r in rows] == [k * 0.1 for k in range(30)]
    assert [r.y for r in rows] == [float(k) for k in range(30)]  # each point takes its own sample


def test_the_first_grid_point_is_the_first_after_the_earliest_sample() -> None:
    aligner = Aligner(config())
    assert aligner.advance(T0) == [] and aligner.last_grid_s is None  # nothing held yet
    feed(aligner, T0 - 61.0)
    rows = aligner.advance(T0 + 30.0)
    assert [r.time_s for r in rows] == [T0 - 60.0, T0]
    assert aligner.counts()["incomplete"] == 0


def test_staleness_window_is_inclusive() -> None:
    aligner = Aligner(config(staleness_s=60.0))
    feed(aligner, T0 - 60.0)
    assert aligner.add("sat", T0 - 59.0, 14.0) == "accepted"
    rows = aligner.advance(T0 + 30.0 + 60.0)
    # T0 - 60 (own samples), T0 (exactly 60 s old: usable); T0 + 60 is too stale.
    assert [r.time_s for r in rows] == [T0 - 60.0, T0]
    assert rows[1].y == 14.0
    assert aligner.counts()["incomplete_valve"] == 1
    assert aligner.counts()["incomplete_sat"] == 1  # sat of T0 - 59 is 119 s old at T0 + 60


def test_a_grid_point_waits_for_lateness() -> None:
    aligner = Aligner(config(lateness_s=20.0))
    feed(aligner, T0 - 1.0)
    assert aligner.advance(T0 + 19.9) == []
    assert aligner.last_grid_s is None  # the first point after the sample, T0, is still open
    assert aligner.add("sat", T0, 15.0) == "accepted"  # still in time for T0
    (row,) = aligner.advance(T0 + 20.0)
    assert (row.time_s, row.y) == (T0, 15.0)


def test_advance_is_idempotent_in_time() -> None:
    aligner = Aligner(config())
    feed(aligner, T0)
    assert len(aligner.advance(T0 + 30.0)) == 1
    state = aligner.to_state()
    assert aligner.advance(T0 + 30.0) == [] and aligner.advance(T0) == []
    assert aligner.to_state() == state


# --- gaps, modes, counters ---------------------------------------------------------------------


def test_row_after_a_long_gap_asks_for_a_restart() -> None:
    aligner = Aligner(config())  # gap_restart_s = 300
    for k in (0, 1, 6, 12):
        feed(aligner, T0 + k * P)
    rows = aligner.advance(T0 + 13 * P + 30.0)
    times = [(r.time_s - T0) / P for r in rows]
    restarts = [r.restart for r in rows]
    # Samples hold for 2 periods: rows at 0..3, 6..8, 12..13; 3 -> 6 is 180 s, 8 -> 12 is 240 s.
    assert times == [0, 1, 2, 3, 6, 7, 8, 12, 13]
    assert not any(restarts)
    aligner = Aligner(config(gap_restart_s=180.0))
    for k in (0, 6, 11):
        feed(aligner, T0 + k * P)
    rows = aligner.advance(T0 + 11 * P + 30.0)
    assert [(round((r.time_s - T0) / P), r.restart) for r in rows] == [
        (0, False),
        (1, False),
        (2, False),
        (6, True),  # 240 s after the row at 2: more than 180 s
        (7, False),
        (8, False),
        (11, False),  # 180 s after the row at 8: not more
    ]


def test_mode_labels_are_text_and_required() -> None:
    aligner = Aligner(config())
    labels: tuple[float | str, ...] = ("cooling", 2, 2.0, 2.5, True)
    for k, label in enumerate(labels):
        t = T0 + k * P
        feed(aligner, t, mode=label)
    rows = aligner.advance(T0 + 4 * P + 30.0)
    assert [r.mode for r in rows] == ["cooling", "2", "2", "2.5", "1"]
    no_mode = Aligner(config(staleness_s=0.0))
    for signal, value in (("sat", 13.0), ("valve", 40.0), ("fan", 1.0)):
        no_mode.add(signal, T0, value)
    assert no_mode.advance(T0 + 30.0) == []
    assert no_mode.counts()["incomplete_occ"] == 1


def test_without_a_mode_signal_rows_carry_none() -> None:
    aligner = Aligner(AlignConfig(sample_period_s=P, output="sat", inputs=("valve",)))
    aligner.add("sat", T0, 13.0)
    aligner.add("valve", T0, 40.0)
    assert aligner.add("occ", T0, "on") == "unknown_signal"
    (row,) = aligner.advance(T0 + 30.0)
    assert row.mode is None and "incomplete_occ" not in aligner.counts()


def test_counters_tally_rows_and_missing_signals() -> None:
    aligner = Aligner(config(staleness_s=0.0))
    feed(aligner, T0)
    for signal, value in (("sat", 13.0), ("occ", "on")):  # valve and fan missing at T0 + 60
        aligner.add(signal, T0 + P, value)
    aligner.add("sat", T0 + 2 * P, 13.0)  # everything but sat missing at T0 + 120
    aligner.advance(T0 + 2 * P + 30.0)
    assert aligner.counts() == {
        "accepted": 7,
        "duplicate": 0,
        "late": 0,
        "unknown_signal": 0,
        "non_finite": 0,
        "not_numeric": 0,
        "rows": 1,
        "incomplete": 2,
        "incomplete_sat": 0,
        "incomplete_valve": 2,
        "incomplete_fan": 2,
        "incomplete_occ": 1,
    }


def test_a_long_outage_is_skipped_in_bulk() -> None:
    aligner = Aligner(config(sample_period_s=1.0))
    feed(aligner, T0)
    started = time.perf_counter()
    aligner.advance(T0 + 365 * 86400.0)
    assert time.perf_counter() - started < 0.5
    assert aligner.counts()["rows"] == 3  # T0, T0 + 1, T0 + 2 within the 2 s staleness
    assert aligner.counts()["incomplete_sat"] == 365 * 86400 - 3


# --- memory and checkpoints --------------------------------------------------------------------


def test_memory_stays_bounded_over_a_long_run() -> None:
    aligner = Aligner(config(dedupe_keys=50))
    for k in range(2000):
        t = T0 + k * 17.0
        feed(aligner, t)
        aligner.advance(t)
    state = aligner.to_state()
    assert all(len(samples) <= 10 for samples in state["samples"].values())
    assert all(len(seen) == 50 for seen in state["seen"].values())


def test_checkpoint_round_trips_through_json_and_redelivery_changes_nothing() -> None:
    a = Aligner(config())
    samples: list[tuple[str, float, float | str]] = [
        ("sat", T0 + k * 23.0, 13.0 + k) for k in range(40)
    ]
    samples += [("valve", T0 + k * 31.0, 1.0 * k) for k in range(30)]
    samples += [("fan", T0 + k * 45.0, 1.0) for k in range(20)]
    samples += [("occ", T0 + k * 300.0, "on") for k in range(4)]
    for signal, t, value in samples[::2]:
        a.add(signal, t, value)
    a.advance(T0 + 400.0)
    b = Aligner(config())
    b.load_state(json.loads(json.dumps(a.to_state())))
    assert b.to_state() == a.to_state()
    state = b.to_state()
    # The broker redelivers what was unacked when the process stopped.
    assert all(b.add(*sample) == "duplicate" for sample in samples[::2])
    assert b.to_state() == state
    assert b.advance(T0 + 400.0) == []
    for signal, t, value in samples[1::2]:
        assert a.add(signal, t, value) == b.add(signal, t, value)
    assert a.advance(T0 + 1200.0) == b.advance(T0 + 1200.0)
    assert a.to_state() == b.to_state()


@pytest.mark.parametrize(
    ("key", "value", "match"),
    [
        ("version", 99, "align state version must be 1, got 99"),
        ("sample_period_s", 30.0, "sample_period_s is 30.0, the config has 60.0"),
        ("signals", ["sat", "valve"], r"signals are \['sat', 'valve'\]"),
    ],
)
def test_foreign_checkpoint_is_refused(key: str, value: object, match: str) -> None:
    state = Aligner(config()).to_state()
    state[key] = value
    with pytest.raises(ValueError, match=match):
        Aligner(config()).load_state(state)
