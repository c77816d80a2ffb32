"""Column-wise intake: outcomes, slots, growth, labels, stale evidence, errors, checkpoints."""

import json
import math
from typing import Any, get_args

import numpy as np
import pytest

from arxwatch.daemon.align import AddOutcome, AlignConfig, Aligner
from arxwatch.daemon.intake import IntakeBank, IntakeOutcome
from arxwatch.estimators.detect import QualityConfig, SignalQuality

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, a multiple of 60 s
P = 60.0
SAT, VALVE, FAN, OCC = range(4)  # signal indices of the VAV-like class below


def vav_config(**overrides: Any) -> AlignConfig:
    """Return the class of a Larkspur Yard VAV box: discharge air, damper, fan, occupancy."""
    settings: dict[str, Any] = {
        "sample_period_s": P,
        "output": "sat",
        "inputs": ("valve", "fan"),
        "mode": "occ",
    }
    settings.update(overrides)
    return AlignConfig(**settings)


def vav_quality() -> dict[str, QualityConfig]:
    return {
        name: QualityConfig(expected_period_s=P, stale_after_s=5 * P, maximum=100.0)
        for name in ("sat", "valve", "fan")
    }


def bank(**options: Any) -> IntakeBank:
    return IntakeBank(vav_config(), vav_quality(), **options)


def feed(b: IntakeBank, slot: int, time_s: float, sat: float = 13.0, mode: str = "on") -> None:
    for signal, value in ((SAT, sat), (VALVE, 40.0), (FAN, 1.0), (OCC, mode)):
        assert b.add(slot, signal, time_s, value) == "accepted"


# --- construction ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("options", "match"),
    [
        ({"capacity": 0}, "capacity must be an integer >= 1, got 0"),
        ({"cells": 1}, "cells must be an integer >= 2, got 1"),
        ({"cells": True}, "cells must be an integer >= 2, got True"),
        ({"max_mode_labels": 40_000}, "max_mode_labels must be an integer from 1 to 32767"),
    ],
)
def test_bad_options_are_refused_by_name(options: dict[str, Any], match: str) -> None:
    with pytest.raises(ValueError, match=match):
        bank(**options)


def test_quality_keys_must_be_output_or_input_signals() -> None:
    with pytest.raises(ValueError, match=r"quality key 'occ' is not an output or input signal"):
        IntakeBank(vav_config(), {"occ": QualityConfig()})
    with pytest.raises(TypeError, match=r"quality\['sat'\] must be a QualityConfig, got dict"):
        IntakeBank(vav_config(), {"sat": {"maximum": 1.0}})  # type: ignore[dict-item]


def test_checked_signals_follow_the_config_order() -> None:
    b = IntakeBank(vav_config(), {"fan": QualityConfig(), "sat": QualityConfig()})
    assert b.quality_signals == ("sat", "fan")


def test_staleness_beyond_the_exact_grid_is_refused() -> None:
    with pytest.raises(ValueError, match="config.staleness_s must be at most 2\\*\\*50"):
        IntakeBank(vav_config(staleness_s=1e18), {})


# --- add outcomes ------------------------------------------------------------------------------


def test_outcomes_extend_the_aligners_closed_set() -> None:
    assert set(get_args(IntakeOutcome)) == set(get_args(AddOutcome)) | {
        "superseded",
        "mode_label_limit",
        "time_out_of_range",
        "out_of_range",
    }
    counts = bank().counts()
    assert set(counts) == set(Aligner(vav_config()).counts()) | {
        "superseded",
        "mode_label_limit",
        "time_out_of_range",
        "out_of_range",
        "overflow",
    }
    assert not any(counts.values())


@pytest.mark.parametrize(
    ("signal", "time_s", "value", "outcome"),
    [
        (SAT, T0, math.nan, "non_finite"),
        (VALVE, T0, math.inf, "non_finite"),
        (SAT, math.nan, 13.0, "non_finite"),
        (OCC, T0, -math.inf, "non_finite"),
        (OCC, math.inf, "on", "non_finite"),
        (FAN, T0, "off", "not_numeric"),
        (SAT, 2.0**51 * P, 13.0, "time_out_of_range"),
        (SAT, -(2.0**51) * P, 13.0, "time_out_of_range"),
    ],
)
def test_bad_samples_are_dropped_as_the_aligner_drops_them(
    signal: int, time_s: float, value: float | str, outcome: str
) -> None:
    b = bank()
    slot = b.add_asset()
    before = b.to_state()["arrays"]
    assert b.add(slot, signal, time_s, value) == outcome
    if outcome in get_args(AddOutcome):  # the reference says the same
        name = vav_config().signals[signal]
        assert Aligner(vav_config()).add(name, time_s, value) == outcome
    assert b.counts()[outcome] == 1
    after = b.to_state()["arrays"]
    assert all(np.array_equal(before[k], after[k], equal_nan=True) for k in after if k != "counts")
    assert b.take_quality() == []


def test_duplicates_of_held_and_newest_samples_change_nothing() -> None:
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0 - 10.0)
    assert b.add(slot, SAT, T0 - 40.0, 12.0) == "superseded"  # same cell, older
    state = b.to_state()["arrays"]
    assert b.add(slot, SAT, T0 - 10.0, 99.0) == "duplicate"  # held: the first value wins
    assert b.add(slot, OCC, T0 - 10.0, "off") == "duplicate"
    assert b.take_quality() and b.take_quality() == []  # the feed's evidence, then nothing
    after = b.to_state()["arrays"]
    assert all(np.array_equal(state[k], after[k], equal_nan=True) for k in after if k != "counts")
    batch = b.advance(T0 + 30.0)
    assert (batch.y.tolist(), b.mode_label(int(batch.mode[0]))) == ([13.0], "on")
    # After its grid point closed and it went stale, the newest sample is still a duplicate.
    b.advance(T0 + 400.0)
    assert b.add(slot, SAT, T0 - 10.0, 13.0) == "duplicate"
    assert b.asset_counts(slot)["duplicate"] == 3


def test_late_is_at_or_before_the_last_closed_grid_point() -> None:
    b, reference = bank(), Aligner(vav_config())
    slot = b.add_asset()
    feed(b, slot, T0)
    for name in ("sat", "valve", "fan"):
        reference.add(name, T0, 1.0)
    reference.add("occ", T0, "on")
    b.advance(T0 + 30.0)
    reference.advance(T0 + 30.0)
    assert b.add(slot, VALVE, T0 - 0.001, 41.0) == reference.add("valve", T0 - 0.001, 41.0)
    assert b.add(slot, SAT, T0 + 0.001, 13.5) == reference.add("sat", T0 + 0.001, 13.5)
    # Differs from the reference by design: a redelivered sample behind the grid is late
    # here (the reference remembers it and calls it a duplicate); neither changes state.
    assert reference.add("valve", T0 - 0.001, 41.0) == "duplicate"
    assert b.add(slot, VALVE, T0 - 0.001, 41.0) == "late"
    assert b.asset_counts(slot)["late"] == 2


def test_a_newer_sample_of_the_same_cell_replaces_the_held_one() -> None:
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0 - 50.0, sat=11.0)
    assert b.add(slot, SAT, T0 - 20.0, 12.0) == "accepted"  # same cell (T0 - 60, T0]
    assert b.add(slot, SAT, T0 - 30.0, 99.0) == "superseded"
    held = b.to_state()["arrays"]["time"][slot, SAT]
    assert sorted(held[~np.isnan(held)].tolist()) == [T0 - 20.0]
    assert b.advance(T0 + 30.0).y.tolist() == [12.0]


def test_an_unusable_sample_is_accepted_and_checked_but_not_held() -> None:
    # With no staleness allowed only samples on the grid can fill a grid point.
    b = IntakeBank(vav_config(staleness_s=0.0), vav_quality())
    slot = b.add_asset()
    assert b.add(slot, SAT, T0 - 10.0, 13.0) == "accepted"
    assert len(b.take_quality()) == 3
    assert np.isnan(b.to_state()["arrays"]["time"][slot]).all()
    feed(b, slot, T0)
    assert len(b.advance(T0 + 30.0)) == 1
    assert b.add(slot, SAT, T0 - 10.0, 13.0) == "late"


def test_the_first_grid_point_follows_the_earliest_accepted_sample() -> None:
    # As the Aligner: before anything closed, grid points start after the earliest sample,
    # even one that can fill none (staleness 0, off the grid), and count as incomplete.
    config = vav_config(staleness_s=0.0)
    b, reference = IntakeBank(config, {}), Aligner(config)
    slot = b.add_asset()
    assert b.add(slot, SAT, T0 - 130.0, 1.0) == reference.add("sat", T0 - 130.0, 1.0)
    for name, signal in (("sat", SAT), ("valve", VALVE), ("fan", FAN), ("occ", OCC)):
        value: float | str = "on" if name == "occ" else 2.0
        assert b.add(slot, signal, T0, value) == reference.add(name, T0, value)
    batch, rows = b.advance(T0 + 30.0), reference.advance(T0 + 30.0)
    assert batch.time_s.tolist() == [row.time_s for row in rows] == [T0]
    assert b.asset_counts(slot)["incomplete"] == reference.counts()["incomplete"] == 2


def test_quality_evidence_is_what_signal_quality_gives() -> None:
    # The reference: one SignalQuality per checked signal, fed the accepted in-order samples.
    quality = {
        "sat": QualityConfig(
            expected_period_s=P, stuck_window_s=120.0, stuck_epsilon=0.1, minimum=5.0, maximum=30.0
        )
    }
    b, check = IntakeBank(vav_config(), quality), SignalQuality("sat", quality["sat"])
    slot = b.add_asset()
    samples = [(0.0, 12.0), (60.0, 4.0), (400.0, 31.0), (460.0, 20.0), (520.0, 20.05)]
    samples += [(580.0, 20.0), (640.0, 20.08), (700.0, 20.0)]
    for t, value in samples:
        assert b.add(slot, SAT, T0 + t, value) == "accepted"
        assert b.take_quality() == [(slot, ev) for ev in check.update(T0 + t, value)]
    assert b.add(slot, SAT, T0 + 650.0, 20.0) == "accepted"  # out of order: not checked
    assert b.take_quality() == []
    *_, (_, stuck), (_, gap) = [(slot, ev) for ev in check.update(T0 + 760.0, 20.0)]
    b.add(slot, SAT, T0 + 760.0, 20.0)
    assert b.take_quality()[1:] == [(slot, stuck), (slot, gap)]
    assert stuck.alarm and gap.values["gap_count"] == 1.0  # the checks really fired


# --- slots and errors --------------------------------------------------------------------------


def test_slots_are_reused_after_removal_with_a_fresh_state() -> None:
    b = bank(capacity=4)
    first, second = b.add_asset(), b.add_asset()
    feed(b, first, T0 - 10.0)
    feed(b, second, T0 - 10.0)
    b.take_quality()
    b.remove_asset(first)
    assert b.n_assets == 1
    assert b.add_asset() == first  # the lowest free slot
    assert b.asset_counts(first) == {key: 0 for key in b.counts()}
    batch = b.advance(T0 + 30.0)
    assert batch.slots.tolist() == [second]  # nothing of the removed asset survives
    assert b.add(first, SAT, T0 + 5.0, 13.0) == "accepted"  # not late: a new asset
    *_, (_, gap) = b.take_quality()
    assert gap.values["interval_s"] == 0.0  # its first quality sample


def test_removal_drops_untaken_evidence_of_that_slot_only() -> None:
    b = bank()
    first, second = b.add_asset(), b.add_asset()
    b.add(first, SAT, T0, 13.0)
    b.add(second, SAT, T0, 13.0)
    b.remove_asset(first)
    assert {slot for slot, _ in b.take_quality()} == {second}


def test_arrays_grow_past_capacity_and_keep_every_asset() -> None:
    b = bank(capacity=1)
    slots = [b.add_asset() for _ in range(5)]
    # capacities 1, 2, 3, 4, 5: a quarter more each time, at least one slot
    assert slots == [0, 1, 2, 3, 4] and b.capacity == 5 and b.n_assets == 5
    for slot in slots:
        feed(b, slot, T0 - 10.0, sat=float(slot))
    batch = b.advance(T0 + 30.0)
    assert batch.slots.tolist() == slots and batch.y.tolist() == [0.0, 1.0, 2.0, 3.0, 4.0]
    grown = b.memory_bytes()
    assert grown == 5 * bank(capacity=1).memory_bytes()
    for _ in range(100):
        b.add_asset()
    assert b.capacity <= 1.25 * b.n_assets + 1


@pytest.mark.parametrize(
    ("slot", "error", "match"),
    [
        (7, IndexError, "slot 7 is out of range: the bank has 4 slots"),
        (-1, IndexError, "slot -1 is out of range"),
        (1, ValueError, r"slot 1 is not in use \(never added, or removed\)"),
        (1.0, TypeError, "slot must be an integer index, got 1.0"),
        (True, TypeError, "slot must be an integer index, got True"),
    ],
)
def test_bad_slots_are_refused_clearly(slot: Any, error: type[Exception], match: str) -> None:
    b = bank(capacity=4)
    b.add_asset()
    for call in (
        lambda: b.add(slot, SAT, T0, 1.0),
        lambda: b.remove_asset(slot),
        lambda: b.asset_counts(slot),
    ):
        with pytest.raises(error, match=match):
            call()


def test_numpy_integer_slots_are_accepted() -> None:
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0)
    batch = b.advance(T0 + 30.0)
    assert b.asset_counts(batch.slots[0])["rows"] == 1


def test_bad_signal_indices_are_refused_clearly() -> None:
    b = bank()
    slot = b.add_asset()
    with pytest.raises(IndexError, match=r"signal 4 is out of range: the class has 4 signals"):
        b.add(slot, 4, T0, 1.0)
    with pytest.raises(TypeError, match="signal must be an integer index, got 'sat'"):
        b.add(slot, "sat", T0, 1.0)  # type: ignore[arg-type]


def test_advance_and_stale_refuse_a_non_finite_now() -> None:
    b = bank()
    b.add_asset()
    with pytest.raises(ValueError, match="now_s must be a finite time"):
        b.advance(math.nan)
    with pytest.raises(ValueError, match="now_s must be finite, got inf"):
        b.stale(math.inf)


# --- mode labels -------------------------------------------------------------------------------


def test_mode_labels_are_coded_per_bank_and_bounded() -> None:
    b = bank(max_mode_labels=3)
    slots = [b.add_asset() for _ in range(2)]
    labels: list[float | str] = ["cooling", 2, 2.0, 2.5]  # "2" and "2.0" are one label
    for k, label in enumerate(labels):
        assert b.add(slots[0], OCC, T0 + k * P, label) == "accepted"
    assert b.add(slots[1], OCC, T0, "heating") == "mode_label_limit"
    assert b.add(slots[1], OCC, T0, 2.5) == "accepted"  # a known label still fits
    assert [b.mode_label(code) for code in range(3)] == ["cooling", "2", "2.5"]
    assert b.counts()["mode_label_limit"] == 1
    with pytest.raises(IndexError, match="mode label code 3 is unknown: 3 are coded"):
        b.mode_label(3)


def test_rows_carry_mode_codes_and_minus_one_without_a_mode_signal() -> None:
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0, mode="occupied")
    batch = b.advance(T0 + 30.0)
    assert batch.mode.dtype == np.int16 and b.mode_label(int(batch.mode[0])) == "occupied"
    plain = IntakeBank(AlignConfig(sample_period_s=P, output="sat", inputs=("valve",)), {})
    slot = plain.add_asset()
    plain.add(slot, 0, T0, 13.0)
    plain.add(slot, 1, T0, 40.0)
    batch = plain.advance(T0 + 30.0)
    assert batch.mode.tolist() == [-1] and batch.u.shape == (1, 1)


# --- cells -------------------------------------------------------------------------------------


def test_more_open_cells_than_allowed_drop_the_oldest() -> None:
    # Two cells: the carried value and one more. Three cells of the damper open at once
    # (advance not called for two periods): the oldest goes and the grid point it alone
    # could fill is skipped, where the reference Aligner fills it.
    config = vav_config()
    b, reference = IntakeBank(config, {}, cells=2), Aligner(config)
    slot = b.add_asset()
    names = ("sat", "valve", "fan", "occ")
    for k in range(3):
        for signal, name in enumerate(names):
            value: float | str = "on" if name == "occ" else float(k)
            reference.add(name, T0 + k * P, value)
            b.add(slot, signal, T0 + k * P, value)
    assert b.asset_counts(slot)["overflow"] == 4  # one per signal
    rows = reference.advance(T0 + 2 * P + 30.0)
    batch = b.advance(T0 + 2 * P + 30.0)
    assert [row.time_s for row in rows] == [T0, T0 + P, T0 + 2 * P]
    assert batch.time_s.tolist() == [T0 + P, T0 + 2 * P]
    assert b.asset_counts(slot)["incomplete"] == 1
    # The new sample is dropped when it is the oldest.
    assert b.add(slot, SAT, T0 + 3 * P + 10.0, 5.0) == "accepted"
    assert b.add(slot, SAT, T0 + 4 * P + 10.0, 6.0) == "accepted"  # the carried T0 + 2P goes
    assert b.add(slot, SAT, T0 + 3 * P - 10.0, 7.0) == "accepted"  # older than both: goes
    assert b.asset_counts(slot)["overflow"] == 6
    held = b.to_state()["arrays"]["time"][slot, SAT]
    assert sorted(held.tolist()) == [T0 + 3 * P + 10.0, T0 + 4 * P + 10.0]


# --- stale -------------------------------------------------------------------------------------


def test_stale_returns_alarms_and_the_evaluation_that_ends_one() -> None:
    b = bank()
    slots = [b.add_asset() for _ in range(2)]
    checks = {name: SignalQuality(name, q) for name, q in vav_quality().items()}  # slot 0
    assert b.stale(T0) == []  # no sample: ages count from this first check
    for check in checks.values():
        assert not check.check(T0).alarm
    b.add(slots[0], SAT, T0 + 10.0, 13.0)
    checks["sat"].update(T0 + 10.0, 13.0)
    b.add(slots[1], VALVE, T0 + 200.0, 40.0)
    # 301 s after the first check: every signal without a sample is stale, sat at 291 s
    # is not, and the valve of slot 1 (101 s) is not.
    got = b.stale(T0 + 301.0)
    assert [(slot, ev.signal) for slot, ev in got] == [
        (0, "valve"),
        (0, "fan"),
        (1, "sat"),
        (1, "fan"),
    ]
    assert got[0][1] == checks["valve"].check(T0 + 301.0)  # the reference's evidence
    assert got[0][1].values == {"age_s": 301.0}
    b.add(slots[0], VALVE, T0 + 302.0, 40.0)
    checks["valve"].update(T0 + 302.0, 40.0)
    got = b.stale(T0 + 305.0)
    ended = [ev for slot, ev in got if slot == 0 and ev.signal == "valve"]
    assert ended == [checks["valve"].check(T0 + 305.0)] and not ended[0].alarm
    assert ended[0].values == {"last_sample_s": T0 + 302.0, "age_s": 3.0}
    assert all(ev.alarm for slot, ev in got if (slot, ev.signal) != (0, "valve"))
    again = b.stale(T0 + 306.0)
    assert (0, "valve") not in [(slot, ev.signal) for slot, ev in again]  # quiet twice: omitted


def test_stale_gives_the_quiet_evaluations_a_raised_alert_needs_to_clear() -> None:
    b = bank()
    slot = b.add_asset()
    check = SignalQuality("valve", vav_quality()["valve"])
    q = b.quality_signals.index("valve")
    b.stale(T0)
    check.check(T0)
    assert [ev.signal for _, ev in b.stale(T0 + 301.0)].count("valve") == 1  # stale
    b.add(slot, VALVE, T0 + 302.0, 40.0)
    check.update(T0 + 302.0, 40.0)
    b.stale(T0 + 305.0)  # the evaluation that ends the alarm
    asked: list[tuple[int, int]] = []

    def needed(slots: np.ndarray, signals: np.ndarray) -> np.ndarray:
        asked.extend(zip(slots.tolist(), signals.tolist(), strict=True))
        return signals == q  # the tracker of the valve still holds its alert

    got = b.stale(T0 + 310.0, needed)
    assert (slot, q) in asked
    assert [(s, ev.signal) for s, ev in got if not ev.alarm] == [(slot, "valve")]
    assert [ev for _, ev in got if ev.signal == "valve"] == [check.check(T0 + 310.0)]
    assert "valve" not in [ev.signal for _, ev in b.stale(T0 + 311.0)]  # not asked: omitted


# --- rows --------------------------------------------------------------------------------------


def test_rows_are_ordered_by_time_then_slot() -> None:
    b = bank()
    slots = [b.add_asset() for _ in range(3)]
    for k, slot in enumerate(reversed(slots)):
        feed(b, slot, T0 - 90.0 + 30.0 * k, sat=float(slot))
    batch = b.advance(T0 + 30.0)
    keys = list(zip(batch.time_s.tolist(), batch.slots.tolist(), strict=True))
    assert keys == sorted(keys) and len(batch) == len(keys) == 5
    assert batch.slots.dtype == np.intp


def test_a_long_outage_is_skipped_in_bulk() -> None:
    config = vav_config(sample_period_s=1.0)
    b, reference = IntakeBank(config, {}), Aligner(config)
    slot = b.add_asset()
    for signal, name in enumerate(config.signals):
        value: float | str = "on" if name == "occ" else 1.0
        b.add(slot, signal, T0, value)
        reference.add(name, T0, value)
    year = T0 + 365 * 86400.0
    assert len(b.advance(year)) == len(reference.advance(year)) == 3
    counts, expected = b.asset_counts(slot), reference.counts()
    assert counts["incomplete_sat"] == expected["incomplete_sat"] == 365 * 86400 - 3


# --- memory and checkpoints --------------------------------------------------------------------


def test_a_vav_class_fits_a_few_hundred_bytes_per_asset() -> None:
    b = bank()
    for _ in range(5000):
        b.add_asset()
    per_asset = b.memory_bytes() / b.n_assets
    print("\nIntakeBank, VAV-like class (4 signals, 3 checked, 4 cells), 5,000 assets:")
    print(f"  {per_asset:.0f} bytes per asset ({b.memory_bytes() / b.capacity:.0f} per slot)")
    assert per_asset < 2048  # the budget per asset (brief: under ~2 KiB); no source


def test_state_is_numeric_arrays_and_json_meta() -> None:
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0)
    state = b.to_state()
    assert all(a.dtype.kind in "biuf" for a in state["arrays"].values())
    assert json.loads(json.dumps(state["meta"])) == state["meta"]
    state["arrays"]["time"][:] = 0.0  # copies: the bank is untouched
    assert len(b.advance(T0 + 30.0)) == 1


@pytest.mark.parametrize(
    ("key", "value", "match"),
    [
        ("version", 99, "intake state version is 99, the bank has 1"),
        ("format", "arxwatch.align", "intake state format is 'arxwatch.align'"),
        ("sample_period_s", 30.0, "intake state sample_period_s is 30.0, the bank has 60.0"),
        ("signals", ["sat", "valve"], r"intake state signals is \['sat', 'valve'\]"),
        ("cells", 1, "intake state cells must be an integer >= 2, got 1"),
        ("quality_signals", ["sat"], r"quality_signals is \['sat'\]"),
        ("mode_labels", ["on", "on"], "mode_labels must be at most 64 distinct strings"),
    ],
)
def test_foreign_checkpoint_is_refused_and_changes_nothing(
    key: str, value: object, match: str
) -> None:
    state = bank().to_state()
    state["meta"][key] = value
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0)
    with pytest.raises(ValueError, match=match):
        b.load_state(state)
    assert len(b.advance(T0 + 30.0)) == 1


def test_a_checkpoint_loads_under_another_cells_count() -> None:
    # A new lateness_s changes the cells per signal (cells_for): the held
    # samples move over, and the rows are those of the saving bank.
    saving = bank(cells=4)
    slot = saving.add_asset()
    for k in range(3):  # three open cells per signal, nothing closed yet
        feed(saving, slot, T0 + P * k, sat=13.0 + k)
    state = saving.to_state()
    expected = saving.advance(T0 + 10 * P)
    for cells in (3, 8):
        b = bank(cells=cells)
        b.load_state(state)
        assert ((slot, SAT) in b.crowded) == (cells == 3)  # no free cell left
        rows = b.advance(T0 + 10 * P)
        assert rows.time_s.tolist() == expected.time_s.tolist()
        assert rows.y.tolist() == expected.y.tolist()
        assert rows.y.tolist()[:3] == [13.0, 14.0, 15.0]  # then carried while fresh
        assert rows.skipped == expected.skipped


@pytest.mark.parametrize(
    ("change", "match"),
    [
        (lambda a: a.pop("newest"), "intake state arrays must be"),
        (
            lambda a: a.__setitem__("time", a["time"][:, :, :2]),
            r"array 'time' has shape \((\d+), 4, 2\) and dtype float64; expected \(\1, 4, 4\)",
        ),
        (
            lambda a: a.__setitem__("counts", a["counts"].astype(np.int64)),
            "array 'counts' has shape .* and dtype int64; expected .* of int32",
        ),
    ],
)
def test_malformed_arrays_are_refused(change: Any, match: str) -> None:
    state = bank().to_state()
    change(state["arrays"])
    with pytest.raises(ValueError, match=match):
        bank().load_state(state)


def test_mode_codes_outside_the_saved_labels_are_refused() -> None:
    b = bank()
    slot = b.add_asset()
    feed(b, slot, T0)
    state = b.to_state()
    state["meta"]["mode_labels"] = []
    with pytest.raises(ValueError, match="mode codes outside the 0 saved labels"):
        bank().load_state(state)


def test_take_quality_skips_quiet_checks_the_caller_does_not_need() -> None:
    # A check in which nothing alarms is built only if needed(slot, q) says so;
    # one that alarms (out of range here) is always built.
    bank = IntakeBank(
        AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",)),
        {"sat": QualityConfig(expected_period_s=60.0, minimum=0.0, maximum=40.0)},
    )
    slot = bank.add_asset()
    asked: list[tuple[int, int]] = []

    def needed(slots: np.ndarray, qs: np.ndarray) -> np.ndarray:
        asked.extend(zip(slots.tolist(), qs.tolist(), strict=True))
        return np.zeros(slots.shape, dtype=bool)

    bank.add(slot, 0, 1.7e9, 20.0)
    bank.add(slot, 0, 1.7e9 + 60.0, 55.0)  # out of range: always built
    taken = bank.take_quality(needed)
    assert asked == [(slot, 0)]
    assert [ev.detector for _, ev in taken] == ["out_of_range", "stuck", "gap"]
    assert taken[0][1].alarm


def test_taking_one_check_at_a_time_gives_what_one_take_of_all_gives() -> None:
    # A live message leaves one check, tested on Python numbers; a trend
    # export's row leaves many, tested on arrays: the evidence must agree.
    # The samples go quiet, out of range, across a gap and flat for long.
    def make() -> IntakeBank:
        return IntakeBank(
            AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",)),
            {
                "sat": QualityConfig(expected_period_s=60.0, minimum=0.0, maximum=40.0),
                "valve": QualityConfig(expected_period_s=60.0, stuck_window_s=600.0),
            },
        )

    def needed(slots: np.ndarray, qs: np.ndarray) -> np.ndarray:
        return (slots + qs) % 2 == 1  # some quiet checks are wanted, some not

    samples = []
    t = 1.7e9
    for k in range(40):
        t += 600.0 if k == 12 else 60.0  # one gap
        sat = 55.0 if k in (5, 6) else 20.0 + 0.1 * k  # out of range twice
        valve = 30.0 if k >= 20 else float(k)  # flat from k = 20 on
        samples += [(k % 2, 0, t, sat), (k % 2, 1, t, valve)]
    one, many = make(), make()
    for bank in (one, many):
        bank.add_asset()
        bank.add_asset()
    taken_one = []
    for slot, signal, time_s, value in samples:
        one.add(slot, signal, time_s, value)
        taken_one += one.take_quality(needed)
        many.add(slot, signal, time_s, value)
    taken_many = many.take_quality(needed)
    assert taken_one == taken_many
    assert {ev.detector for _, ev in taken_one if ev.alarm} == {"out_of_range", "gap", "stuck"}


def test_crowded_asks_for_an_advance_before_a_cell_would_overflow() -> None:
    # A burst of samples far ahead of the last advance: advancing whenever
    # the bank says crowded keeps every sample (no overflow, no skipped point).
    config = AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",))
    bank = IntakeBank(config, {}, cells=4)
    slot = bank.add_asset()
    rows = 0
    start = 1_767_225_600.0  # on the minute
    for k in range(200):
        t = start + 60.0 * k
        for signal in (0, 1):
            assert bank.add(slot, signal, t, float(k)) == "accepted"
        if (slot, 0) in bank.crowded:
            rows += len(bank.advance(t))
            assert not bank.crowded
    rows += len(bank.advance(start + 60.0 * 200))
    counts = bank.counts()
    assert counts["overflow"] == 0 and counts["incomplete"] == 0
    assert rows == 200


def test_an_unusable_value_is_checked_but_not_aligned() -> None:
    config = AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",))
    bank = IntakeBank(config, {"sat": QualityConfig(expected_period_s=60.0, maximum=40.0)})
    slot = bank.add_asset()
    start = 1_767_225_600.0
    assert bank.add(slot, 0, start, 20.0) == "accepted"
    assert bank.add(slot, 1, start, 50.0) == "accepted"
    assert bank.add(slot, 0, start + 60.0, 99.0, usable=False) == "out_of_range"
    assert bank.add(slot, 1, start + 60.0, 51.0) == "accepted"
    evidence = [ev for _, ev in bank.take_quality()]
    assert [ev.alarm for ev in evidence if ev.detector == "out_of_range"] == [False, True]
    rows = bank.advance(start + 120.0)
    # the second grid point holds the last usable output, 20.0, not 99.0
    assert rows.y.tolist() == [20.0, 20.0]
    assert bank.counts()["out_of_range"] == 1


def test_idle_capacity_is_not_saved() -> None:
    b = bank(capacity=64)
    for _ in range(3):
        b.add_asset()
    state = b.to_state()
    assert all(a.shape[0] == 3 for a in state["arrays"].values())
    again = bank(capacity=1)
    again.load_state(state)
    assert again.capacity == 3 and again.n_assets == 3
    assert again.add_asset() == 3  # grows from there
