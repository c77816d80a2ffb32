"""Invariants of the aligner: arrival order, redelivery and the grid."""

import math

from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.daemon.align import AlignConfig, Aligner, Row

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z, a multiple of every period below
SIGNALS = ("sat", "valve", "fan", "occ")
Sample = tuple[str, float, float | str]

periods = st.sampled_from([10.0, 60.0, 0.1, 7.5])


def make_config(period: float) -> AlignConfig:
    return AlignConfig(sample_period_s=period, output="sat", inputs=("valve", "fan"), mode="occ")


@st.composite
def sample_sets(draw: st.DrawFn, period: float) -> list[Sample]:
    """Draw samples with distinct (signal, time) over ~30 periods.

    Signals report in bursts, each signal up to 1.5 periods after the burst or
    not at all, so that many grid points are complete and some are not. Times
    fall on eighths of a period, exact in floating point for most periods.
    """
    bursts = sorted(draw(st.sets(st.integers(0, 240), min_size=1, max_size=16)))
    labels: st.SearchStrategy[float | str] = st.sampled_from(["on", "off", 2, 3.0])
    numbers = st.floats(-1e3, 1e3, allow_nan=False)
    samples: list[Sample] = []
    for signal in SIGNALS:
        # A negative delay is a burst this signal missed.
        delays = draw(st.lists(st.integers(-3, 12), min_size=len(bursts), max_size=len(bursts)))
        eighths = sorted({n + d for n, d in zip(bursts, delays, strict=True) if d >= 0})
        kind = labels if signal == "occ" else numbers
        values = draw(st.lists(kind, min_size=len(eighths), max_size=len(eighths)))
        samples += [
            (signal, T0 + n * period / 8.0, v) for n, v in zip(eighths, values, strict=True)
        ]
    return samples


def add_all(aligner: Aligner, samples: list[Sample]) -> None:
    for sample in samples:
        aligner.add(*sample)


@settings(max_examples=100, deadline=None)
@given(data=st.data(), period=periods)
def test_any_arrival_order_before_advance_gives_the_same_rows(
    data: st.DataObject, period: float
) -> None:
    samples = data.draw(sample_sets(period))
    shuffled = data.draw(st.permutations(samples))
    now = T0 + data.draw(st.integers(5, 40)) * period
    reference, other = Aligner(make_config(period)), Aligner(make_config(period))
    add_all(reference, samples)
    add_all(other, shuffled)
    assert other.advance(now) == reference.advance(now)
    assert other.to_state() == reference.to_state()


@settings(max_examples=100, deadline=None)
@given(data=st.data(), period=st.sampled_from([10.0, 60.0, 7.5]))  # exact grid arithmetic
def test_arrival_interleaved_with_advances_gives_the_same_rows(
    data: st.DataObject, period: float
) -> None:
    # Each sample arrives, in any order, before the advance that closes its first grid point.
    config = make_config(period)
    samples = data.draw(sample_sets(period))
    nows = [*sorted(data.draw(st.lists(st.integers(0, 40), max_size=5))), 40]
    nows_s = [T0 + n * period for n in nows]
    ends = [math.floor((now - config.lateness_s) / period) for now in nows_s]
    slots: list[list[Sample]] = [[] for _ in range(len(nows_s) + 1)]
    for sample in samples:
        first_grid = math.ceil(sample[1] / period)
        deadline = next((j for j, end in enumerate(ends) if end >= first_grid), len(nows_s))
        slots[data.draw(st.integers(0, deadline))].append(sample)
    live, rows = Aligner(config), []
    for slot, now in zip(slots, nows_s, strict=False):
        add_all(live, data.draw(st.permutations(slot)))
        rows += live.advance(now)
    add_all(live, slots[-1])
    reference = Aligner(config)
    add_all(reference, samples)
    assert rows == reference.advance(nows_s[-1])
    assert live.to_state() == reference.to_state()


@settings(max_examples=100, deadline=None)
@given(data=st.data(), period=periods)
def test_redelivered_samples_change_neither_rows_nor_state(
    data: st.DataObject, period: float
) -> None:
    samples = data.draw(sample_sets(period))
    split = data.draw(st.integers(0, len(samples)))
    first_now = T0 + data.draw(st.integers(0, 40)) * period
    aligner, twin = Aligner(make_config(period)), Aligner(make_config(period))
    for target in (aligner, twin):
        add_all(target, samples[:split])
        target.advance(first_now)
        add_all(target, samples[split:])
    state = aligner.to_state()
    # a drawn set may be empty: then nothing can be redelivered (sampled_from needs items)
    redelivered = (
        data.draw(st.lists(st.sampled_from(samples), min_size=1, max_size=40)) if samples else []
    )
    for signal, t, value in redelivered:
        assert aligner.add(signal, t, value) == "duplicate"
    assert aligner.to_state() == state
    final_now = first_now + data.draw(st.integers(0, 40)) * period
    assert aligner.advance(final_now) == twin.advance(final_now)
    assert aligner.to_state() == twin.to_state()


@settings(max_examples=100, deadline=None)
@given(data=st.data(), period=periods)
def test_rows_increase_strictly_on_the_grid_and_hold_fresh_samples(
    data: st.DataObject, period: float
) -> None:
    config = make_config(period)
    samples = data.draw(sample_sets(period))
    shuffled = data.draw(st.permutations(samples))
    cuts = sorted(data.draw(st.lists(st.integers(0, len(samples)), max_size=5)))
    nows = data.draw(st.lists(st.integers(-5, 40), min_size=len(cuts), max_size=len(cuts)))
    aligner, rows, accepted, done = Aligner(config), [], [], 0
    for cut, now in zip([*cuts, len(shuffled)], [*nows, 45], strict=True):
        for sample in shuffled[done:cut]:
            if aligner.add(*sample) == "accepted":
                accepted.append(sample)
        done = max(done, cut)
        rows += aligner.advance(T0 + now * period)
    times = [row.time_s for row in rows]
    assert all(a < b for a, b in zip(times, times[1:], strict=False))
    for previous, row in zip([None, *rows], rows, strict=False):
        assert row.time_s == round(row.time_s / period) * period
        expected_restart = previous is not None and (
            row.time_s - previous.time_s > config.gap_restart_s
        )
        assert row.restart == expected_restart
        _assert_held_from_fresh_samples(row, accepted, config)


def _assert_held_from_fresh_samples(row: Row, samples: list[Sample], config: AlignConfig) -> None:
    values = {}
    for signal in SIGNALS:
        fresh = [
            (t, v)
            for s, t, v in samples
            if s == signal and t <= row.time_s <= t + config.staleness_s
        ]
        assert fresh, f"{signal} has no fresh sample at {row.time_s}"
        values[signal] = max(fresh)[1]
    assert (row.y, row.u) == (values["sat"], (values["valve"], values["fan"]))
    label = values["occ"]
    assert row.mode == (label if isinstance(label, str) else str(int(label)))
