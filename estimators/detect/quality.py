"""Data quality of one signal: stale, stuck (flat-lined), out of range, gaps.

These checks look at the raw samples, not at a model, and form their own
alert family (``"data_quality"``): a model fitted to a dead sensor drifts for
reasons no technician can fix at the equipment.

Rules, with time always passed in (seconds, any fixed epoch):

* **stale**: :meth:`SignalQuality.check` at ``now_s`` alarms when no sample
  has arrived for more than ``stale_after_s``. Before the first sample the
  age counts from the first check, so a freshly started monitor does not
  call every signal stale at once.
* **gap**: a sample interval longer than ``gap_factor * expected_period_s``;
  gaps are counted and their intervals summed since the last reset.
* **out of range**: a value below ``minimum`` or above ``maximum``.
* **stuck**: the current flat run has lasted ``stuck_window_s`` or longer
  while the signal is known to move. A flat run is a run of consecutive
  samples whose range (max - min) stays within ``stuck_epsilon`` (the
  sensor resolution); the sample that breaks it starts a new run. "Known to
  move" means some earlier run was broken since the last reset, so a signal
  that is constant by nature (a status, a fixed setpoint) is never called
  stuck, while one that moved and then froze is. A signal that legitimately
  rests for long periods needs a ``stuck_window_s`` longer than its rests
  (or ``inf`` to switch the check off).

This is the run rule of a flat-line check: O(1) time and state per sample
instead of a sliding window. Because a run restarts at the breaking sample,
samples just before it that lie within epsilon of it are not counted, so a
run can come out shorter than the longest flat stretch; a truly frozen value
is timed from its first repeat.

References
----------
I. Zahumenský, *Guidelines on Quality Control Procedures for Data from
Automatic Weather Stations*, World Meteorological Organization, 2004
(plausible value check; time consistency: minimum required variability,
the persistence test for a sensor that no longer responds).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from numbers import Real
from typing import Any

from arxwatch.estimators.detect._checks import (
    check_setting,
    expect_state,
    state_float,
    state_int,
)
from arxwatch.estimators.detect.evidence import Evidence, Family

__all__ = ["QualityConfig", "SignalQuality"]

_NAME = "data_quality"
_KEYS = (
    "last_time_s",
    "first_check_s",
    "run_start_s",
    "run_min",
    "run_max",
    "has_moved",
    "gap_count",
    "gap_total_s",
)


def _positive(value: float, allow_inf: bool) -> bool:
    if isinstance(value, bool) or not isinstance(value, Real):
        return False
    v = float(value)
    return v > 0.0 and (math.isfinite(v) or (allow_inf and v == math.inf))


@dataclass(frozen=True)
class QualityConfig:
    """Settings of the data-quality checks of one signal.

    Attributes
    ----------
    expected_period_s : float
        Nominal sample period in seconds, finite and > 0. Default 60.0.
    stale_after_s : float
        Age in seconds beyond which the signal is stale, > 0 (``inf``
        disables the check). Default 300.0.
    gap_factor : float
        An interval longer than this many expected periods is a gap, finite
        and > 1. Default 3.0.
    stuck_window_s : float
        Flat-run length in seconds that counts as stuck, > 0 (``inf``
        disables). Default 3600.0.
    stuck_epsilon : float
        Resolution in signal units: a run whose range stays at or below it
        is flat, finite and >= 0. Default 0.0 (exact repeats).
    minimum, maximum : float
        Valid range (``-inf``/``inf`` for none), minimum < maximum.
        Defaults ``-inf`` and ``inf``.
    """

    expected_period_s: float = 60.0
    stale_after_s: float = 300.0
    gap_factor: float = 3.0
    stuck_window_s: float = 3600.0
    stuck_epsilon: float = 0.0
    minimum: float = -math.inf
    maximum: float = math.inf

    def __post_init__(self) -> None:
        owner = type(self).__name__
        check_setting(
            owner,
            "expected_period_s",
            self.expected_period_s,
            _positive(self.expected_period_s, False),
            "a finite number of seconds > 0",
        )
        check_setting(
            owner,
            "stale_after_s",
            self.stale_after_s,
            _positive(self.stale_after_s, True),
            "a number of seconds > 0 or inf",
        )
        check_setting(
            owner,
            "gap_factor",
            self.gap_factor,
            _positive(self.gap_factor, False) and self.gap_factor > 1.0,
            "a finite number > 1",
        )
        check_setting(
            owner,
            "stuck_window_s",
            self.stuck_window_s,
            _positive(self.stuck_window_s, True),
            "a number of seconds > 0 or inf",
        )
        eps = self.stuck_epsilon
        check_setting(
            owner, "stuck_epsilon", eps, eps == 0.0 or _positive(eps, False), "a finite number >= 0"
        )
        for name in ("minimum", "maximum"):
            value = getattr(self, name)
            check_setting(
                owner,
                name,
                value,
                isinstance(value, Real)
                and not isinstance(value, bool)
                and not math.isnan(float(value)),
                "a number (may be infinite)",
            )
        check_setting(
            owner,
            "maximum",
            self.maximum,
            self.maximum > self.minimum,
            f"greater than minimum ({self.minimum!r})",
        )


class SignalQuality:
    """Stale, stuck, out-of-range and gap checks for one signal.

    Parameters
    ----------
    signal : str
        Signal name reported in the evidence, non-empty.
    config : QualityConfig, optional
        Settings; defaults as :class:`QualityConfig`.

    Examples
    --------
    >>> q = SignalQuality("supply_air_temp", QualityConfig(maximum=60.0, stuck_window_s=180.0))
    >>> [ev.alarm for ev in q.update(0.0, 14.0)]
    [False, False, False]
    >>> [(ev.detector, ev.alarm) for ev in q.update(300.0, 75.0)]
    [('out_of_range', True), ('stuck', False), ('gap', True)]
    >>> for t in (360.0, 420.0, 480.0, 540.0):
    ...     stuck = q.update(t, 15.0)[1]
    >>> stuck.alarm, stuck.statistic
    (True, 180.0)
    >>> q.check(now_s=900.0).alarm, q.check(now_s=839.0).alarm
    (True, False)

    References
    ----------
    I. Zahumenský, *Guidelines on Quality Control Procedures for Data from
    Automatic Weather Stations*, World Meteorological Organization, 2004.
    """

    __slots__ = (
        "signal",
        "config",
        "_last",
        "_first_check",
        "_run_start",
        "_run_min",
        "_run_max",
        "_has_moved",
        "_gap_count",
        "_gap_total",
    )

    def __init__(self, signal: str, config: QualityConfig | None = None) -> None:
        if not isinstance(signal, str) or not signal:
            raise ValueError(f"signal must be a non-empty string, got {signal!r}")
        self.signal = signal
        self.config = config if config is not None else QualityConfig()
        self._last: float | None = None
        self._first_check: float | None = None
        self._run_start = 0.0
        self._run_min = 0.0
        self._run_max = 0.0
        self._has_moved = False
        self._gap_count = 0
        self._gap_total = 0.0

    def update(self, time_s: float, value: float) -> list[Evidence]:
        """Take one sample; check range, flat run and the interval since the last one.

        Parameters
        ----------
        time_s : float
            Sample time in seconds, finite, not before the previous sample.
        value : float
            Sample value, finite (non-finite payloads are rejected when
            decoded).

        Returns
        -------
        list of Evidence
            Always three, in this order:

            * ``out_of_range``: ``statistic`` the value, ``threshold`` the
              limit it is compared with (the minimum for detail ``"low"``,
              else the maximum); alarm by its own rule, value < minimum
              (detail ``"low"``) or > maximum (``"high"``). ``values``:
              ``value`` and the finite limits.
            * ``stuck``: ``statistic`` the flat-run length in seconds,
              ``threshold`` ``stuck_window_s``; ``values``: ``flat_s``,
              ``range``; alarm when the run reaches the window and the
              signal is known to move.
            * ``gap``: ``statistic`` the interval in expected periods
              (0 for the first sample), ``threshold`` ``gap_factor``; alarm
              when the interval exceeds it. ``values``: ``interval_s``,
              ``gap_count`` and ``gap_total_s`` since the last reset.

        Raises
        ------
        ValueError
            If ``time_s`` or ``value`` is not finite, or ``time_s`` lies
            before the previous sample; nothing is changed.
        """
        if not (math.isfinite(time_s) and math.isfinite(value)):
            raise ValueError(f"time_s and value must be finite, got {time_s!r} and {value!r}")
        last = self._last
        if last is not None and time_s < last:
            raise ValueError(f"time_s={time_s!r} lies before the previous sample at {last!r}")
        config = self.config
        family: Family = "data_quality"

        # gap
        interval = 0.0 if last is None else time_s - last
        periods = interval / config.expected_period_s
        gap = periods > config.gap_factor
        if gap:
            self._gap_count += 1
            self._gap_total += interval
        self._last = time_s

        # flat run
        if last is None:
            self._run_start, self._run_min, self._run_max = time_s, value, value
        else:
            low = min(self._run_min, value)
            high = max(self._run_max, value)
            if high - low > config.stuck_epsilon:
                self._has_moved = True
                self._run_start, low, high = time_s, value, value
            self._run_min, self._run_max = low, high
        flat_s = time_s - self._run_start

        # range
        if value < config.minimum:
            side, limit, out = "low", config.minimum, True
        elif value > config.maximum:
            side, limit, out = "high", config.maximum, True
        else:
            side, limit, out = "", config.maximum, False
        range_values = {"value": value}
        if math.isfinite(config.minimum):
            range_values["minimum"] = config.minimum
        if math.isfinite(config.maximum):
            range_values["maximum"] = config.maximum

        return [
            Evidence(
                detector="out_of_range",
                family=family,
                statistic=value,
                threshold=limit,
                alarm=out,
                signal=self.signal,
                values=range_values,
                detail=side,
            ),
            Evidence(
                detector="stuck",
                family=family,
                statistic=flat_s,
                threshold=config.stuck_window_s,
                alarm=self._has_moved and flat_s >= config.stuck_window_s,
                signal=self.signal,
                values={"flat_s": flat_s, "range": self._run_max - self._run_min},
                detail="stuck",
            ),
            Evidence(
                detector="gap",
                family=family,
                statistic=periods,
                threshold=config.gap_factor,
                alarm=gap,
                signal=self.signal,
                values={
                    "interval_s": interval,
                    "gap_count": float(self._gap_count),
                    "gap_total_s": self._gap_total,
                },
                detail="gap",
            ),
        ]

    def check(self, now_s: float) -> Evidence:
        """Stale check at time ``now_s``.

        Parameters
        ----------
        now_s : float
            Current time in seconds on the same clock as the sample times.

        Returns
        -------
        Evidence
            ``detector`` ``"stale"``, ``statistic`` the age in seconds of
            the last sample (or since the first check when none has come;
            never below 0), ``threshold`` ``stale_after_s``, alarm when the
            age exceeds it. ``values``: ``age_s`` and, once a sample has
            come, ``last_sample_s``.

        Raises
        ------
        ValueError
            If ``now_s`` is not finite.
        """
        if not math.isfinite(now_s):
            raise ValueError(f"now_s must be finite, got {now_s!r}")
        reference = self._last
        values: dict[str, float] = {}
        if reference is None:
            if self._first_check is None:
                self._first_check = now_s
            reference = self._first_check
        else:
            values["last_sample_s"] = reference
        age = max(0.0, now_s - reference)
        values["age_s"] = age
        return Evidence(
            detector="stale",
            family="data_quality",
            statistic=age,
            threshold=self.config.stale_after_s,
            alarm=age > self.config.stale_after_s,
            signal=self.signal,
            values=values,
            detail="stale",
        )

    def reset(self) -> None:
        """Forget all samples, runs and gap counts."""
        self._last = None
        self._first_check = None
        self._run_start = self._run_min = self._run_max = 0.0
        self._has_moved = False
        self._gap_count = 0
        self._gap_total = 0.0

    def clone(self) -> SignalQuality:
        """Return a fresh checker for the same signal and settings."""
        return SignalQuality(self.signal, self.config)

    def to_state(self) -> dict[str, Any]:
        """Learned state as plain JSON-safe data (None for times not yet seen)."""
        return {
            "detector": _NAME,
            "last_time_s": self._last,
            "first_check_s": self._first_check,
            "run_start_s": self._run_start,
            "run_min": self._run_min,
            "run_max": self._run_max,
            "has_moved": self._has_moved,
            "gap_count": self._gap_count,
            "gap_total_s": self._gap_total,
        }

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, has missing or
            unknown keys or malformed entries.
        """
        data = expect_state(state, _NAME, _KEYS)
        times: list[float | None] = []
        for key in ("last_time_s", "first_check_s"):
            times.append(None if data[key] is None else state_float(data, _NAME, key))
        run_start = state_float(data, _NAME, "run_start_s")
        run_min = state_float(data, _NAME, "run_min")
        run_max = state_float(data, _NAME, "run_max")
        if run_max < run_min:
            raise ValueError(f"{_NAME} state: run_max={run_max!r} < run_min={run_min!r}")
        has_moved = data["has_moved"]
        if not isinstance(has_moved, bool):
            raise ValueError(f"{_NAME} state: has_moved must be a bool, got {has_moved!r}")
        gap_count = state_int(data, _NAME, "gap_count")
        gap_total = state_float(data, _NAME, "gap_total_s", minimum=0.0)
        self._last, self._first_check = times
        self._run_start, self._run_min, self._run_max = run_start, run_min, run_max
        self._has_moved = has_moved
        self._gap_count, self._gap_total = gap_count, gap_total
