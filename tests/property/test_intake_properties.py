"""IntakeBank against its references: one Aligner per asset, one SignalQuality per signal.

The oracle is the project's own readable implementation of the rules
(``daemon/align.py``, ``estimators/detect/quality.py``), driven with the same
calls; the bank must give the same rows and the same evidence.
"""

from __future__ import annotations

import io
import json
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.daemon.align import AlignConfig, Aligner, Row
from arxwatch.daemon.intake import OUTCOMES, IntakeBank, RowBatch
from arxwatch.estimators import native
from arxwatch.estimators.detect import Evidence, QualityConfig, SignalQuality

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z
Op = tuple[Any, ...]

# Outcomes the bank may give for each reference outcome (see the module notes of intake.py).
ALLOWED = {
    "accepted": {"accepted", "superseded"},
    "duplicate": {"duplicate", "late", "superseded", "accepted"},
    "late": {"late"},
    "non_finite": {"non_finite"},
    "not_numeric": {"not_numeric"},
}


def first_index(time_s: float, period: float) -> int:
    """Smallest k with k * period >= time_s, the rule stated in align.py's docstring."""
    k = math.ceil(time_s / period)
    while (k - 1) * period >= time_s:
        k -= 1
    while k * period < time_s:
        k += 1
    return k


def last_index(time_s: float, period: float) -> int:
    """Largest k with k * period <= time_s."""
    k = math.floor(time_s / period)
    while (k + 1) * period <= time_s:
        k += 1
    while k * period > time_s:
        k -= 1
    return k


@dataclass(frozen=True)
class Setup:
    """One drawn asset class: alignment, quality checks, cells per signal, assets."""

    config: AlignConfig
    quality: dict[str, QualityConfig]
    cells: int
    assets: int


@st.composite
def setups(draw: st.DrawFn) -> Setup:
    period = draw(st.sampled_from([60.0, 10.0, 7.5, 0.1]))
    factor = st.sampled_from([None, 0.0, 0.5, 1.0, 3.0])
    staleness, lateness = draw(factor), draw(factor)
    gap = draw(st.sampled_from([None, 1.0, 2.0]))
    config = AlignConfig(
        sample_period_s=period,
        output="sat",
        inputs=("valve", "fan"),
        mode="occ" if draw(st.booleans()) else None,
        staleness_s=None if staleness is None else staleness * period,
        lateness_s=None if lateness is None else lateness * period,
        gap_restart_s=None if gap is None else gap * period,
    )
    quality = {}
    for name in draw(st.sampled_from([(), ("sat",), ("sat", "valve"), ("sat", "valve", "fan")])):
        quality[name] = QualityConfig(
            expected_period_s=period,
            stale_after_s=draw(st.sampled_from([0.5, 2.0, 5.0])) * period,
            gap_factor=draw(st.sampled_from([1.5, 3.0])),
            stuck_window_s=draw(st.sampled_from([1.0, 3.0, math.inf])) * period,
            stuck_epsilon=draw(st.sampled_from([0.0, 0.5])),
            minimum=draw(st.sampled_from([-math.inf, 0.0])),
            maximum=draw(st.sampled_from([math.inf, 50.0])),
        )
    return Setup(config, quality, draw(st.sampled_from([2, 3, 4, 8])), draw(st.integers(1, 3)))


NUMBERS = st.sampled_from([0.0, 0.25, 1.0, 5.0, -3.0, 80.0])
BAD = st.sampled_from([math.nan, math.inf, -math.inf, "n/a"])
LABELS = st.sampled_from(["on", "on", "on", "off", 2, 3.0, 2.5, math.nan])


@st.composite
def operations(draw: st.DrawFn, setup: Setup, max_periods: int = 10) -> list[Op]:
    """Draw a stream of calls, period by period.

    In each period every signal of every asset reports zero to two times, on
    or off the grid; values often repeat (flat runs), some are bad. Samples
    arrive shuffled, some a period late; some are redelivered. Advance is
    called after most periods (so open cells pile up when it is not), stale
    now and then; periods without samples make gaps, and an asset may be
    replaced by a new one in its slot.
    """
    period = setup.config.sample_period_s
    signals = setup.config.signals
    ops: list[Op] = []
    sent: list[Op] = []
    held_back: list[Op] = []
    previous: dict[tuple[int, int], Any] = {}
    p = 0
    for _ in range(draw(st.integers(1, max_periods))):
        p += draw(st.sampled_from([1, 1, 1, 1, 2, 7]))  # skipped periods make gaps
        arriving, held_back = held_back, []
        for asset in range(setup.assets):
            for signal, name in enumerate(signals):
                for _ in range(draw(st.sampled_from([0, 1, 1, 1, 1, 2]))):
                    if name == setup.config.mode:
                        value = draw(LABELS)
                    elif (asset, signal) in previous and draw(st.booleans()):
                        value = previous[(asset, signal)]
                    else:
                        value = (
                            draw(NUMBERS | BAD) if draw(st.integers(0, 9)) == 0 else draw(NUMBERS)
                        )
                    previous[(asset, signal)] = value
                    t = T0 + (8 * p + draw(st.integers(-7, 8))) * period / 8
                    op: Op = ("add", asset, signal, t, value)
                    (held_back if draw(st.integers(0, 7)) == 0 else arriving).append(op)
        if sent:
            arriving += draw(st.lists(st.sampled_from(sent), max_size=2))  # redelivered
        arriving = draw(st.permutations(arriving))
        sent += [op for op in arriving if op not in sent]
        ops += arriving
        if draw(st.integers(0, 9)) < 8:
            ops.append(("advance", T0 + (8 * p + draw(st.integers(4, 12))) * period / 8))
        if draw(st.integers(0, 3)) == 0:
            ops.append(("stale", T0 + (8 * p + draw(st.integers(0, 16))) * period / 8))
        if draw(st.integers(0, 15)) == 0:
            ops.append(("replace", draw(st.integers(0, setup.assets - 1))))
    ops += held_back
    ops.append(("advance", T0 + (8 * p + 40) * period / 8))
    return ops


@dataclass
class Reference:
    """One Aligner per asset and one SignalQuality per checked signal of each."""

    setup: Setup
    aligners: list[Aligner] = field(default_factory=list)
    checks: list[dict[str, SignalQuality]] = field(default_factory=list)
    stale_alarm: list[dict[str, bool]] = field(default_factory=list)

    def __post_init__(self) -> None:
        for _ in range(self.setup.assets):
            self.aligners.append(Aligner(self.setup.config))
            self.checks.append({n: SignalQuality(n, q) for n, q in self.setup.quality.items()})
            self.stale_alarm.append(dict.fromkeys(self.setup.quality, False))

    def replace(self, asset: int) -> None:
        """Start ``asset`` afresh, as a new asset taking its slot."""
        self.aligners[asset] = Aligner(self.setup.config)
        self.checks[asset] = {n: SignalQuality(n, q) for n, q in self.setup.quality.items()}
        self.stale_alarm[asset] = dict.fromkeys(self.setup.quality, False)

    def add(
        self, asset: int, signal: int, t: float, value: float | str
    ) -> tuple[str, list[Evidence]]:
        """Add a sample; return the Aligner's outcome and the SignalQuality evidence."""
        name = self.setup.config.signals[signal]
        outcome = self.aligners[asset].add(name, t, value)
        check = self.checks[asset].get(name)
        evidence: list[Evidence] = []
        # Accepted samples not before the previous quality sample are checked.
        if outcome == "accepted" and check is not None:
            previous = check.to_state()["last_time_s"]
            if previous is None or t >= previous:
                assert not isinstance(value, str)
                evidence = check.update(t, value)
        return outcome, evidence

    def stale(self, now: float) -> list[tuple[int, Evidence]]:
        """Check every signal; keep alarms and evaluations that follow an alarm."""
        out = []
        for asset, checks in enumerate(self.checks):
            for name in self.setup.config.signals:
                if name in checks:
                    ev = checks[name].check(now)
                    if ev.alarm or self.stale_alarm[asset][name]:
                        out.append((asset, ev))
                    self.stale_alarm[asset][name] = ev.alarm
        return out

    def open_cells(self, asset: int) -> int:
        """Most open cells (as defined in intake.py) of any signal of ``asset``."""
        config = self.setup.config
        period = config.sample_period_s
        state = self.aligners[asset].to_state()
        last = state["last_grid_index"]
        most = 0
        for samples in state["samples"].values():
            cells, carry = set(), False
            for t, _ in samples:
                cell = first_index(t, period)
                fresh_to = last_index(t + config.staleness_s, period)
                if last is not None and cell <= last:
                    carry = carry or fresh_to > last
                elif fresh_to >= cell:
                    cells.add(cell)
            most = max(most, len(cells) + carry)
        return most


def batch_rows(bank: IntakeBank, batch: RowBatch, slot: int) -> list[Row]:
    rows = []
    for i in np.flatnonzero(batch.slots == slot).tolist():
        mode = None if batch.mode[i] < 0 else bank.mode_label(int(batch.mode[i]))
        u = tuple(float(v) for v in batch.u[i])
        rows.append(Row(float(batch.time_s[i]), float(batch.y[i]), u, mode, bool(batch.restart[i])))
    return rows


def assert_ordered(batch: RowBatch) -> None:
    keys = list(zip(batch.time_s.tolist(), batch.slots.tolist(), strict=True))
    assert keys == sorted(keys)
    assert len(batch) == len(keys)


@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_rows_and_evidence_equal_the_references(data: st.DataObject) -> None:
    setup = data.draw(setups())
    ops = data.draw(operations(setup))
    config = setup.config
    bank = IntakeBank(config, setup.quality, capacity=1, cells=setup.cells)
    slots = [bank.add_asset() for _ in range(setup.assets)]
    reference = Reference(setup)
    diverged = [False] * setup.assets  # once a signal overflowed its cells
    for op in ops:
        if op[0] == "add":
            _, asset, signal, t, value = op
            slot = slots[asset]
            overflow = bank.asset_counts(slot)["overflow"]
            ref_outcome, ref_evidence = reference.add(asset, signal, t, value)
            outcome = bank.add(slot, signal, t, value)
            # Quality stays exact even after an overflow (it never depends on held cells).
            assert bank.take_quality() == [(slot, ev) for ev in ref_evidence]
            if diverged[asset]:
                continue
            assert outcome in ALLOWED[ref_outcome], (ref_outcome, outcome)
            if outcome == "accepted" and ref_outcome == "duplicate":
                assert config.staleness_s < config.sample_period_s  # an unusable sample
            overflowed = reference.open_cells(asset) > setup.cells
            assert bank.asset_counts(slot)["overflow"] == overflow + overflowed
            diverged[asset] = overflowed
        elif op[0] == "advance":
            incomplete = bank.counts()["incomplete"]
            batch = bank.advance(op[1])
            assert_ordered(batch)
            assert batch.skipped == bank.counts()["incomplete"] - incomplete
            for asset, aligner in enumerate(reference.aligners):
                rows = aligner.advance(op[1])
                if not diverged[asset]:
                    assert batch_rows(bank, batch, slots[asset]) == rows
        elif op[0] == "stale":
            expected = [(slots[a], ev) for a, ev in reference.stale(op[1])]
            assert bank.stale(op[1]) == sorted(expected, key=lambda pair: pair[0])
        elif op[0] == "replace":
            bank.remove_asset(slots[op[1]])
            assert bank.add_asset() == slots[op[1]]  # the lowest free slot
            reference.replace(op[1])
            diverged[op[1]] = False
    grid_keys = ["rows", "incomplete", *(f"incomplete_{name}" for name in config.signals)]
    for asset, aligner in enumerate(reference.aligners):
        if not diverged[asset]:
            counts, ref_counts = bank.asset_counts(slots[asset]), aligner.counts()
            assert {k: counts[k] for k in grid_keys} == {k: ref_counts[k] for k in grid_keys}


def run(bank: IntakeBank, ops: list[Op], slots: list[int]) -> list[Any]:
    """Apply ``ops`` and return everything the bank said, comparable with ==."""
    said: list[Any] = []
    for op in ops:
        if op[0] == "add":
            _, asset, signal, t, value = op
            said.append(bank.add(slots[asset], signal, t, value))
            said.append(bank.take_quality())
        elif op[0] == "advance":
            batch = bank.advance(op[1])
            said.append(
                [np.asarray(getattr(batch, f)).tolist() for f in RowBatch.__dataclass_fields__]
            )
        elif op[0] == "stale":
            said.append(bank.stale(op[1]))
        elif op[0] == "replace":
            bank.remove_asset(slots[op[1]])
            said.append(bank.add_asset())
    return said


def through_npz(state: dict[str, Any]) -> dict[str, Any]:
    """Checkpoint as the daemon would: arrays via np.savez, meta via JSON, no pickle."""
    buffer = io.BytesIO()
    np.savez(buffer, **state["arrays"])
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as loaded:
        arrays = {name: loaded[name] for name in loaded.files}
    return {"arrays": arrays, "meta": json.loads(json.dumps(state["meta"]))}


def assert_same_arrays(a: dict[str, Any], b: dict[str, Any], skip: tuple[str, ...] = ()) -> None:
    assert set(a) == set(b)
    for name in a:
        if name not in skip:
            assert a[name].dtype == b[name].dtype, name
            assert np.array_equal(a[name], b[name], equal_nan=a[name].dtype.kind == "f"), name


@settings(max_examples=80, deadline=None)
@given(data=st.data())
def test_checkpoint_split_at_any_point_changes_nothing(data: st.DataObject) -> None:
    setup = data.draw(setups())
    ops = data.draw(operations(setup, max_periods=8))
    split = data.draw(st.integers(0, len(ops)))
    whole = IntakeBank(setup.config, setup.quality, cells=setup.cells)
    slots = [whole.add_asset() for _ in range(setup.assets)]
    expected = run(whole, ops, slots)

    first = IntakeBank(setup.config, setup.quality, cells=setup.cells)
    for _ in range(setup.assets):
        first.add_asset()
    said = run(first, ops[:split], slots)
    second = IntakeBank(setup.config, setup.quality, capacity=1, cells=setup.cells)
    second.load_state(through_npz(first.to_state()))
    said += run(second, ops[split:], slots)
    assert said == expected
    assert_same_arrays(second.to_state()["arrays"], whole.to_state()["arrays"])


@settings(max_examples=80, deadline=None)
@given(data=st.data())
def test_redelivery_changes_no_state_but_counters(data: st.DataObject) -> None:
    setup = data.draw(setups())
    # Without replaced assets: a replaced asset's old samples are new data to its successor.
    ops = [op for op in data.draw(operations(setup, max_periods=8)) if op[0] != "replace"]
    # Enough cells that nothing overflows: redelivery is idempotent within the cell bound.
    bank = IntakeBank(setup.config, setup.quality, cells=64)
    twin = IntakeBank(setup.config, setup.quality, cells=64)
    slots = [bank.add_asset() for _ in range(setup.assets)]
    for _ in slots:
        twin.add_asset()
    run(bank, ops, slots)
    run(twin, ops, slots)
    adds = [op for op in ops if op[0] == "add"]
    if not adds:
        return
    before = bank.to_state()
    for _, asset, signal, t, value in data.draw(st.lists(st.sampled_from(adds), max_size=30)):
        outcome = bank.add(slots[asset], signal, t, value)
        if outcome == "accepted":  # only a sample that can fill no grid point (see intake.py)
            period = setup.config.sample_period_s
            assert last_index(t + setup.config.staleness_s, period) < first_index(t, period)
    assert bank.take_quality() == []
    assert_same_arrays(bank.to_state()["arrays"], before["arrays"], skip=("counts",))
    later = T0 + 1e4 * setup.config.sample_period_s
    tail: list[Op] = [("advance", later), ("stale", later)]
    assert run(bank, tail, slots) == run(twin, tail, slots)


@st.composite
def sample_sets(draw: st.DrawFn, period: float) -> list[tuple[str, float, float]]:
    """Draw samples with distinct (signal, time): several per cell, on and off the grid."""
    out = []
    for signal in ("sat", "valve"):
        eighths = draw(st.sets(st.integers(0, 120), min_size=1, max_size=40))
        out += [(signal, T0 + n * period / 8, float(n)) for n in sorted(eighths)]
    return out


@settings(max_examples=100, deadline=None)
@given(data=st.data(), period=st.sampled_from([60.0, 7.5, 0.1]))
def test_only_the_latest_sample_of_a_grid_cell_ever_fills_a_grid_point(
    data: st.DataObject, period: float
) -> None:
    # The claim the bank's bounded memory rests on, checked on the reference Aligner alone:
    # dropping every sample that is not the latest of its (signal, cell) changes no row.
    staleness = data.draw(st.sampled_from([0.0, 0.5, 2.0, 3.5])) * period
    config = AlignConfig(
        sample_period_s=period, output="sat", inputs=("valve",), staleness_s=staleness
    )
    samples = data.draw(sample_sets(period))
    latest: dict[tuple[str, int], tuple[str, float, float]] = {}
    for sample in sorted(samples, key=lambda s: s[1]):
        latest[(sample[0], first_index(sample[1], period))] = sample
    everything, thinned = Aligner(config), Aligner(config)
    for signal, t, value in data.draw(st.permutations(samples)):
        everything.add(signal, t, value)
    for signal, t, value in latest.values():
        thinned.add(signal, t, value)
    for now in sorted(data.draw(st.lists(st.integers(0, 20), min_size=1, max_size=3))):
        assert thinned.advance(T0 + now * period) == everything.advance(T0 + now * period)


@st.composite
def rows_of_samples(draw: st.DrawFn, setup: Setup) -> list[Op]:
    """Draw trend-export-like rows: at one time, a sample of some (asset, signal) pairs.

    Rows mostly move forward a period or less, sometimes repeat or go back
    (duplicates and late samples: the one-by-one path); some values are bad
    or out of the caller's range, a pair may repeat within a row, and the
    grid is advanced, stale-checked and read between rows.
    """
    period = setup.config.sample_period_s
    signals = setup.config.signals
    ops: list[Op] = []
    t = T0 + draw(st.sampled_from([0.0, 0.5, 1.0])) * period
    for _ in range(draw(st.integers(1, 14))):
        t += draw(st.sampled_from([1.0, 1.0, 1.0, 0.5, 0.25, 0.0, -1.0, 2.5])) * period
        pairs = [(a, s) for a in range(setup.assets) for s in range(len(signals))]
        messy = draw(st.sampled_from([False, False, False, True]))
        chosen = draw(st.lists(st.sampled_from(pairs), max_size=len(pairs) + 1, unique=not messy))
        row = []
        for asset, signal in chosen:
            if signals[signal] == setup.config.mode:
                if not messy:
                    continue
                value: Any = draw(LABELS)
            else:
                value = draw(st.one_of(NUMBERS, st.just(math.nan)) if messy else NUMBERS)
            row.append((asset, signal, value, draw(st.sampled_from([True, True, True, False]))))
        ops.append(("row", t, row))
        ops.append((draw(st.sampled_from(["advance", "stale", "none", "none"])), t))
    return ops


@pytest.mark.parametrize(
    "backend",
    [
        "python",
        pytest.param(
            "compiled",
            marks=pytest.mark.skipif(not native.available(), reason="numba is not installed"),
        ),
    ],
)
@settings(max_examples=150, deadline=None)
@given(data=st.data())
def test_add_many_is_add_one_by_one(backend: str, data: st.DataObject) -> None:
    # The array path of a trend export row (numpy calls, or one compiled call) against
    # the per-sample path it stands for.
    setup = data.draw(setups())
    ops = data.draw(rows_of_samples(setup))
    many = IntakeBank(
        setup.config,
        setup.quality,
        capacity=1,
        cells=setup.cells,
        backend=backend,  # type: ignore[arg-type]
    )
    one = IntakeBank(setup.config, setup.quality, capacity=1, cells=setup.cells)
    slots = [many.add_asset() for _ in range(setup.assets)]
    assert slots == [one.add_asset() for _ in range(setup.assets)]
    columns: dict[tuple[int, ...], tuple[np.ndarray, np.ndarray]] = {}
    for op in ops:
        if op[0] == "row":
            _, t, row = op
            numbers = [(a, s, v, u) for a, s, v, u in row if not isinstance(v, str)]
            key = tuple(x for a, s, _, _ in numbers for x in (slots[a], s))
            if key not in columns:  # the same arrays for the same columns, as a trend export
                columns[key] = (
                    np.array([slots[a] for a, *_ in numbers], dtype=np.intp),
                    np.array([s for _, s, _, _ in numbers], dtype=np.intp),
                )
            got = many.add_many(
                *columns[key],
                t,
                np.array([v for *_, v, _ in numbers], dtype=np.float64),
                np.array([u for *_, u in numbers], dtype=np.bool_),
            )
            expected = [one.add(slots[a], s, t, v, usable=u) for a, s, v, u in numbers]
            assert [OUTCOMES[code] for code in got] == expected
            assert many.crowded == one.crowded
            assert many.take_quality() == one.take_quality()
        elif op[0] == "advance":
            a, b = many.advance(op[1]), one.advance(op[1])
            for name in RowBatch.__dataclass_fields__:
                assert np.array_equal(getattr(a, name), getattr(b, name), equal_nan=True), name
        elif op[0] == "stale":
            assert many.stale(op[1]) == one.stale(op[1])
    assert_same_arrays(many.to_state()["arrays"], one.to_state()["arrays"])
