"""The demo's scaled clock and duration option (the whole demo runs in tests/integration)."""

from __future__ import annotations

import threading

import pytest

from arxwatch.daemon.demo import ScaledClock, parse_duration


class FakeWall:
    """A monotonic clock the test moves by hand."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        """Return the time set by the test."""
        return self.now


def test_clock_runs_at_speed_up_to_what_was_published_and_taken_in() -> None:
    wall = FakeWall()
    clock = ScaledClock(1_000.0, speed=1200.0, monotonic=wall)
    assert clock() == 1_000.0  # not started
    clock.start()
    wall.now += 0.5  # 600 simulated seconds
    assert clock.paced() == 1_600.0
    assert clock() == 1_000.0  # nothing published yet
    clock.allow(1_120.0)
    assert clock() == 1_120.0
    clock.allow(2_000.0)
    assert clock() == 1_600.0
    taken: list[float | None] = [None]
    clock.follow(lambda: taken[0])
    assert clock() == 1_600.0  # the service has taken nothing in: no extra hold
    taken[0] = 1_300.0
    assert clock() == 1_360.0  # one sample period past the newest sample taken in


def test_the_building_waits_for_the_service() -> None:
    clock = ScaledClock(1_000.0, speed=1e6)
    taken: list[float | None] = [None]
    clock.follow(lambda: taken[0])
    stop = threading.Event()
    assert clock.wait_for_consumer(1_120.0, stop)  # the first steps go out
    taken[0] = 1_060.0
    assert clock.wait_for_consumer(1_180.0, stop)
    stop.set()
    assert not clock.wait_for_consumer(1_300.0, stop)  # behind: only a stop ends the wait


@pytest.mark.parametrize(
    ("text", "seconds"), [("14h", 50_400.0), ("90m", 5_400.0), ("1D", 86_400.0)]
)
def test_durations_read_with_their_unit(text: str, seconds: float) -> None:
    assert parse_duration(text) == seconds


@pytest.mark.parametrize(
    ("text", "message"),
    [("14", "with a unit m, h or d"), ("xh", "a number before the unit"), ("nanh", "> 0")],
)
def test_bad_durations_are_refused(text: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        parse_duration(text)
