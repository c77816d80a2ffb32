"""Alignment: irregular per-signal samples -> rows on an asset's fixed sampling grid.

Pure: samples and times in, rows out; times are arguments (epoch seconds),
never read from a clock. Controllers publish each point of an asset on its
own topic at its own moments; the monitor needs one row per grid point
``t_k = k * sample_period_s`` (k an integer), anchored at the epoch, so that a
60 s period gives rows on the minute. A row holds, for every signal, the most
recent sample at or before ``t_k`` that is at most ``staleness_s`` old
(last-value hold within the staleness window); a grid point at which some
signal has no such sample is skipped and counted.

Rules, all decided by sample times and never by arrival order:

* **usable**: a sample at time ``s`` can fill grid point ``t_k`` when
  ``s <= t_k <= s + staleness_s``; the row takes the latest usable one;
* **emitted**: :meth:`Aligner.advance` closes every grid point with
  ``t_k <= now_s - lateness_s`` not closed before, in order, emitting a row
  for each complete one;
* **late**: a sample at or before the last closed grid point is dropped
  and counted, since the first grid point it could enter is already out
  (accepting it would make later rows depend on when it arrived);
* **duplicate**: a sample whose (signal, time) was already seen, as after a
  QoS 1 redelivery, is ignored whatever its value (the first value wins) and
  leaves the aligner, checkpoint included, exactly as it was;
* **restart**: a row more than ``gap_restart_s`` after the previous row
  carries ``restart=True``, so that the monitor forgets its history.

So the same set of samples gives the same rows whatever order they arrive
in, as long as each arrives before its grid point is closed.

Memory per signal is bounded: a held sample is dropped once no grid point
after the last closed one can use it, and duplicate detection remembers the
newest ``dedupe_keys`` sample times. Restored from a checkpoint, the aligner
treats retained or redelivered samples at or before its last closed grid
point as duplicates (when remembered) or late, never as new data.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Generic, Literal, TypeVar, get_args

AddOutcome = Literal["accepted", "duplicate", "late", "unknown_signal", "non_finite", "not_numeric"]
"""What :meth:`Aligner.add` did with a sample (closed set).

``"accepted"``
    Held for the grid points it can fill.
``"duplicate"``
    Its (signal, time) was already seen; nothing changed.
``"late"``
    At or before the last closed grid point; dropped.
``"unknown_signal"``
    Not one of the configured signals; dropped.
``"non_finite"``
    Time, or value of a numeric signal or number label, is NaN or infinite;
    dropped.
``"not_numeric"``
    A text value for the output or an input; dropped.
"""

_STATE_VERSION = 1
_OUTCOMES: tuple[AddOutcome, ...] = get_args(AddOutcome)

V = TypeVar("V", float, str)


@dataclass(frozen=True, init=False)
class AlignConfig:
    """Signals and timing of one asset's alignment (immutable).

    Parameters
    ----------
    sample_period_s : float
        Grid spacing :math:`T_s`, seconds; grid points are ``k * sample_period_s``.
    output : str
        Name of the output signal (the row's ``y``).
    inputs : sequence of str
        Names of the input signals, in the order of the row's ``u``.
    mode : str or None, optional
        Name of the operating-mode signal, if any; its values are labels.
    staleness_s : float, optional
        Oldest a sample may be, relative to a grid point, and still fill it;
        default ``2 * sample_period_s``.
    lateness_s : float, optional
        How long past a grid point :meth:`Aligner.advance` waits before
        closing it; default ``0.5 * sample_period_s``.
    gap_restart_s : float, optional
        A row more than this after the previous row is flagged ``restart``;
        default ``5 * sample_period_s``.
    dedupe_keys : int, optional
        Most recent sample times remembered per signal to recognise
        redelivered samples already behind the grid (default 1024).

    Raises
    ------
    ValueError
        If a setting is out of range or signal names are empty or repeated;
        the message names the setting, the value and what was expected.
    """

    sample_period_s: float
    output: str
    inputs: tuple[str, ...]
    mode: str | None
    staleness_s: float
    lateness_s: float
    gap_restart_s: float
    dedupe_keys: int

    def __init__(
        self,
        *,
        sample_period_s: float,
        output: str,
        inputs: Sequence[str],
        mode: str | None = None,
        staleness_s: float | None = None,
        lateness_s: float | None = None,
        gap_restart_s: float | None = None,
        dedupe_keys: int = 1024,
    ) -> None:
        period = _finite("sample_period_s", sample_period_s)
        if period <= 0.0:
            raise ValueError(f"sample_period_s must be > 0, got {sample_period_s!r}")
        if isinstance(inputs, str):
            raise ValueError(
                f"inputs must be a sequence of signal names, got the string {inputs!r}"
            )
        names = (output, *inputs) + ((mode,) if mode is not None else ())
        for name in names:
            if not isinstance(name, str) or not name:
                raise ValueError(f"signal names must be non-empty strings, got {name!r}")
        repeated = sorted({name for name in names if names.count(name) > 1})
        if repeated:
            raise ValueError(f"signal names must be distinct, got {repeated} more than once")
        staleness = _setting("staleness_s", staleness_s, 2.0 * period)
        lateness = _setting("lateness_s", lateness_s, 0.5 * period)
        gap = _setting("gap_restart_s", gap_restart_s, 5.0 * period)
        if gap < period:
            raise ValueError(
                f"gap_restart_s must be >= sample_period_s ({period!r}), got {gap_restart_s!r}"
            )
        if isinstance(dedupe_keys, bool) or not isinstance(dedupe_keys, int) or dedupe_keys < 1:
            raise ValueError(f"dedupe_keys must be an integer >= 1, got {dedupe_keys!r}")
        for attribute, value in (
            ("sample_period_s", period),
            ("output", output),
            ("inputs", tuple(inputs)),
            ("mode", mode),
            ("staleness_s", staleness),
            ("lateness_s", lateness),
            ("gap_restart_s", gap),
            ("dedupe_keys", dedupe_keys),
        ):
            object.__setattr__(self, attribute, value)

    @property
    def signals(self) -> tuple[str, ...]:
        """Every signal a row needs: output, inputs, then the mode signal if any."""
        return (self.output, *self.inputs) + ((self.mode,) if self.mode is not None else ())


def _finite(name: str, value: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number, got {value!r}")
    return float(value)


def _setting(name: str, value: float | None, default: float) -> float:
    if value is None:
        return default
    number = _finite(name, value)
    if number < 0.0:
        raise ValueError(f"{name} must be >= 0, got {value!r}")
    return number


@dataclass(frozen=True)
class Row:
    """One complete grid point of an asset, ready for the monitor.

    Parameters
    ----------
    time_s : float
        Grid time ``k * sample_period_s``, epoch seconds.
    y : float
        Output value held at the grid point.
    u : tuple of float
        Input values, in the configured order.
    mode : str or None
        Mode label, or None when the asset has no mode signal.
    restart : bool
        True when more than ``gap_restart_s`` passed since the previous row:
        the consumer should forget its history before this row.
    """

    time_s: float
    y: float
    u: tuple[float, ...]
    mode: str | None
    restart: bool


class _Track(Generic[V]):
    """Held samples of one signal, sorted by time, and its remembered times."""

    def __init__(self) -> None:
        self.times: list[float] = []
        self.values: list[V] = []
        self.seen: list[float] = []  # sorted; the newest ``limit`` times seen

    def has_seen(self, time_s: float) -> bool:
        return _contains(self.times, time_s) or _contains(self.seen, time_s)

    def remember(self, time_s: float, limit: int) -> None:
        bisect.insort(self.seen, time_s)
        del self.seen[:-limit]

    def hold(self, time_s: float, value: V) -> None:
        i = bisect.bisect_right(self.times, time_s)
        self.times.insert(i, time_s)
        self.values.insert(i, value)

    def latest_at(self, time_s: float) -> V:
        """Return the value of the latest sample at or before ``time_s`` (one must exist)."""
        return self.values[bisect.bisect_right(self.times, time_s) - 1]

    def drop_before(self, count: int) -> None:
        del self.times[:count]
        del self.values[:count]


def _contains(times: list[float], time_s: float) -> bool:
    i = bisect.bisect_left(times, time_s)
    return i < len(times) and times[i] == time_s


def _mode_label(value: float | str) -> str:
    """Return the label text of a mode value; integral numbers lose their ``.0``."""
    if isinstance(value, str):
        return value
    number = float(value)
    return str(int(number)) if number.is_integer() else repr(number)


class Aligner:
    """Turn one asset's per-signal samples into rows on its sampling grid.

    Parameters
    ----------
    config : AlignConfig
        Signals and timing.

    Examples
    --------
    >>> aligner = Aligner(AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",)))
    >>> aligner.add("sat", 1_767_225_610.0, 13.2), aligner.add("valve", 1_767_225_595.0, 40.0)
    ('accepted', 'accepted')
    >>> aligner.add("sat", 1_767_225_610.0, 13.2)
    'duplicate'
    >>> aligner.advance(1_767_225_700.0)
    [Row(time_s=1767225660.0, y=13.2, u=(40.0,), mode=None, restart=False)]
    >>> aligner.add("valve", 1_767_225_650.0, 41.0)
    'late'
    """

    def __init__(self, config: AlignConfig) -> None:
        self.config = config
        self._numeric: dict[str, _Track[float]] = {
            name: _Track() for name in (config.output, *config.inputs)
        }
        self._mode: _Track[str] | None = _Track() if config.mode is not None else None
        self._last_index: int | None = None
        self._last_row_s: float | None = None
        self._counts = self._zero_counts()
        self._duplicates = 0

    def _zero_counts(self) -> dict[str, int]:
        keys = [o for o in _OUTCOMES if o != "duplicate"] + ["rows", "incomplete"]
        keys += [f"incomplete_{name}" for name in self.config.signals]
        return dict.fromkeys(keys, 0)

    @property
    def last_grid_s(self) -> float | None:
        """Last closed grid point (emitted or skipped), or None before the first."""
        if self._last_index is None:
            return None
        return self._last_index * self.config.sample_period_s

    def add(self, signal: str, time_s: float, value: float | str) -> AddOutcome:
        """Take one sample; never raises for bad input, says what it did instead.

        Parameters
        ----------
        signal : str
            Signal name, as configured.
        time_s : float
            Sample time, epoch seconds.
        value : float or str
            Number for the output and inputs; number or text label for the
            mode signal.

        Returns
        -------
        AddOutcome
            ``"accepted"``, ``"duplicate"``, ``"late"``, ``"unknown_signal"``,
            ``"non_finite"`` or ``"not_numeric"``; each is counted, see
            :meth:`counts`.
        """
        outcome = self._take(signal, time_s, value)
        if outcome == "duplicate":
            self._duplicates += 1
        else:
            self._counts[outcome] += 1
        return outcome

    def _take(self, signal: str, time_s: float, value: float | str) -> AddOutcome:
        if signal in self._numeric:
            if isinstance(value, str):
                return "not_numeric"
            if not math.isfinite(value):
                return "non_finite"
            return self._hold(self._numeric[signal], time_s, float(value))
        if self._mode is not None and signal == self.config.mode:
            if not isinstance(value, str) and not math.isfinite(value):
                return "non_finite"
            return self._hold(self._mode, time_s, _mode_label(value))
        return "unknown_signal"

    def _hold(self, track: _Track[V], time_s: float, value: V) -> AddOutcome:
        if not math.isfinite(time_s):
            return "non_finite"
        time_s = float(time_s)
        if track.has_seen(time_s):
            return "duplicate"
        track.remember(time_s, self.config.dedupe_keys)
        last = self._last_index
        if last is not None and self._first_index_at_or_after(time_s) <= last:
            return "late"
        track.hold(time_s, value)
        return "accepted"

    def advance(self, now_s: float) -> list[Row]:
        """Close every grid point up to ``now_s - lateness_s``; return the complete ones.

        Before anything was closed, the first grid point considered is the
        first at or after the earliest held sample; nothing happens while no
        sample is held.

        Parameters
        ----------
        now_s : float
            Current time, epoch seconds.

        Returns
        -------
        list of Row
            Rows of the newly closed complete grid points, in time order.
        """
        end = self._last_index_at_or_before(now_s - self.config.lateness_s)
        if self._last_index is not None:
            start = self._last_index + 1
        else:
            firsts = [track.times[0] for track in self._tracks() if track.times]
            if not firsts:
                return []
            start = self._first_index_at_or_after(min(firsts))
        if start > end:
            return []
        rows: list[Row] = []
        complete = [(start, end)]
        for name, track in zip(self.config.signals, self._tracks(), strict=True):
            available = self._available(track.times, start, end)
            self._counts[f"incomplete_{name}"] += (end - start + 1) - _size(available)
            complete = _intersect(complete, available)
        for index in _indices(complete):
            rows.append(self._row(index * self.config.sample_period_s))
        self._counts["rows"] += len(rows)
        self._counts["incomplete"] += (end - start + 1) - len(rows)
        self._last_index = end
        self._prune(end)
        return rows

    def _tracks(self) -> list[_Track[float] | _Track[str]]:
        tracks: list[_Track[float] | _Track[str]] = list(self._numeric.values())
        if self._mode is not None:
            tracks.append(self._mode)
        return tracks

    def _row(self, time_s: float) -> Row:
        restart = self._last_row_s is not None and (
            time_s - self._last_row_s > self.config.gap_restart_s
        )
        self._last_row_s = time_s
        y = self._numeric[self.config.output].latest_at(time_s)
        u = tuple(self._numeric[name].latest_at(time_s) for name in self.config.inputs)
        mode = self._mode.latest_at(time_s) if self._mode is not None else None
        return Row(time_s, y, u, mode, restart)

    def _available(self, times: list[float], start: int, end: int) -> list[tuple[int, int]]:
        """Return the merged index ranges within [start, end] that a held sample can fill."""
        merged: list[tuple[int, int]] = []
        for time_s in times:
            first = max(start, self._first_index_at_or_after(time_s))
            last = min(end, self._last_index_at_or_before(time_s + self.config.staleness_s))
            if first > last:
                continue
            if merged and first <= merged[-1][1] + 1:
                merged[-1] = (merged[-1][0], max(merged[-1][1], last))
            else:
                merged.append((first, last))
        return merged

    def _prune(self, last: int) -> None:
        """Drop held samples that no grid point after index ``last`` can use."""
        staleness = self.config.staleness_s
        for track in self._tracks():
            stale = 0
            for time_s in track.times:
                if self._last_index_at_or_before(time_s + staleness) > last:
                    break
                stale += 1
            track.drop_before(stale)

    def _first_index_at_or_after(self, time_s: float) -> int:
        """Smallest k with ``k * sample_period_s >= time_s`` (exact in floating point)."""
        period = self.config.sample_period_s
        k = math.ceil(time_s / period)
        while (k - 1) * period >= time_s:
            k -= 1
        while k * period < time_s:
            k += 1
        return k

    def _last_index_at_or_before(self, time_s: float) -> int:
        """Largest k with ``k * sample_period_s <= time_s`` (exact in floating point)."""
        period = self.config.sample_period_s
        k = math.floor(time_s / period)
        while (k + 1) * period <= time_s:
            k += 1
        while k * period > time_s:
            k -= 1
        return k

    def counts(self) -> dict[str, int]:
        """Return the tallies: one per :data:`AddOutcome`, rows, and skipped grid points.

        Returns
        -------
        dict of str to int
            ``accepted``, ``duplicate``, ``late``, ``unknown_signal``,
            ``non_finite``, ``not_numeric`` (samples by outcome); ``rows``
            (emitted); ``incomplete`` (grid points skipped) and
            ``incomplete_<signal>`` (skipped grid points that lacked that
            signal; one point may lack several). ``duplicate`` covers this
            process only: it is not checkpointed, since a duplicate changes
            nothing.
        """
        return {**self._counts, "duplicate": self._duplicates}

    def to_state(self) -> dict[str, Any]:
        """Return the aligner's state as plain data (JSON-ready) for a checkpoint.

        Returns
        -------
        dict
            Last closed grid index, time of the last row, held samples and
            remembered sample times per signal, and the counters except
            ``duplicate``.
        """
        return {
            "version": _STATE_VERSION,
            "sample_period_s": self.config.sample_period_s,
            "signals": list(self.config.signals),
            "last_grid_index": self._last_index,
            "last_row_s": self._last_row_s,
            "samples": {
                name: [[t, v] for t, v in zip(track.times, track.values, strict=True)]
                for name, track in zip(self.config.signals, self._tracks(), strict=True)
            },
            "seen": {
                name: list(track.seen)
                for name, track in zip(self.config.signals, self._tracks(), strict=True)
            },
            "counts": dict(self._counts),
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Restore a state saved by :meth:`to_state` under the same configuration.

        Parameters
        ----------
        state : mapping
            Output of :meth:`to_state`, possibly through JSON.

        Raises
        ------
        ValueError
            If the state has another version, sample period or signal set.
        """
        if state.get("version") != _STATE_VERSION:
            raise ValueError(
                f"align state version must be {_STATE_VERSION}, got {state.get('version')!r}"
            )
        if float(state["sample_period_s"]) != self.config.sample_period_s:
            raise ValueError(
                f"align state sample_period_s is {state['sample_period_s']!r}, "
                f"the config has {self.config.sample_period_s!r}"
            )
        signals = list(self.config.signals)
        if list(state["signals"]) != signals:
            raise ValueError(
                f"align state signals are {list(state['signals'])}, the config has {signals}"
            )
        last = state["last_grid_index"]
        last_row = state["last_row_s"]
        self._last_index = None if last is None else int(last)
        self._last_row_s = None if last_row is None else float(last_row)
        for name, track in self._numeric.items():
            _restore(track, state, name, float)
        if self._mode is not None and self.config.mode is not None:
            _restore(self._mode, state, self.config.mode, str)
        counts = self._zero_counts()
        counts.update({key: int(state["counts"][key]) for key in counts})
        self._counts = counts


def _restore(track: _Track[V], state: Mapping[str, Any], name: str, kind: type[V]) -> None:
    samples = state["samples"][name]
    track.times = [float(t) for t, _ in samples]
    track.values = [kind(v) for _, v in samples]
    track.seen = [float(t) for t in state["seen"][name]]


def _size(ranges: list[tuple[int, int]]) -> int:
    return sum(last - first + 1 for first, last in ranges)


def _intersect(a: list[tuple[int, int]], b: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Intersection of two sorted lists of disjoint inclusive index ranges."""
    out: list[tuple[int, int]] = []
    i = j = 0
    while i < len(a) and j < len(b):
        first, last = max(a[i][0], b[j][0]), min(a[i][1], b[j][1])
        if first <= last:
            out.append((first, last))
        if a[i][1] < b[j][1]:
            i += 1
        else:
            j += 1
    return out


def _indices(ranges: list[tuple[int, int]]) -> Iterator[int]:
    for first, last in ranges:
        yield from range(first, last + 1)
