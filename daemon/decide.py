"""Alert lifecycle: persistence before raising, hysteresis before clearing.

Pure: evidence and sample times in, alert records out; no clock, no I/O.
Each (detector, signal) pair of an asset has its own episode state:

* **quiet -> raised** when at least ``raise_m`` of the last ``raise_n``
  evaluations were alarms (m-of-n persistence filters single excursions);
* **raised -> raised (severity up)** when ``critical_m`` of the last
  ``raise_n`` evaluations reached ``critical_ratio`` times the threshold;
* **raised -> cleared** after ``clear_n`` consecutive evaluations below
  ``clear_ratio`` times the threshold (hysteresis: a statistic hovering at
  the threshold neither clears nor re-raises); an inconclusive evaluation
  (``Evidence.conclusive`` false) never counts toward clearing.

A statistic that wanders around its threshold therefore produces one raised
record and, once it has settled clearly below, one cleared record, not a
stream of flips.

References
----------
D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed.,
Wiley, 2009, section 5.3.6 (supplementary run rules: k of m points beyond a
limit) — the m-of-n rule here is that idea applied to detector alarms.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from arxwatch.estimators.detect.evidence import Evidence

Severity = Literal["warning", "critical"]
State = Literal["raised", "cleared"]


@dataclass(frozen=True)
class AlertPolicy:
    """Persistence, hysteresis and severity settings (immutable).

    Parameters
    ----------
    raise_m, raise_n : int
        Raise when ``raise_m`` of the last ``raise_n`` evaluations alarm.
    critical_ratio : float
        Statistic / threshold at which an evaluation counts as critical.
    critical_m : int
        Critical evaluations (of the last ``raise_n``) that make a raised
        alert critical.
    clear_ratio : float
        Evaluations below ``clear_ratio * threshold`` count toward clearing.
    clear_n : int
        Consecutive such evaluations needed to clear.
    clear_after_s : float
        Seconds the quiet run must also span, from its first evaluation to
        the clearing one (an off-delay): a detector judged every minute
        would otherwise clear after ten quiet minutes, and an intermittent
        fault would clear and re-raise all day. The trackers turn it into a
        count with each detector's evaluation interval
        (:meth:`quiet_needed`), so it holds on a regular grid of evaluations
        and errs long across gaps. 0 clears on ``clear_n`` alone.

    Raises
    ------
    ValueError
        If a setting is inconsistent; the message names it.
    """

    raise_m: int = 3
    raise_n: int = 5
    critical_ratio: float = 2.0
    critical_m: int = 3
    clear_ratio: float = 0.8
    clear_n: int = 10
    clear_after_s: float = 0.0

    def __post_init__(self) -> None:
        for name in ("raise_m", "raise_n", "critical_m", "clear_n"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"{name} must be an integer >= 1, got {value!r}")
        if self.raise_m > self.raise_n:
            raise ValueError(f"raise_m ({self.raise_m}) cannot exceed raise_n ({self.raise_n})")
        if self.critical_m > self.raise_n:
            raise ValueError(
                f"critical_m ({self.critical_m}) cannot exceed raise_n ({self.raise_n})"
            )
        if self.raise_n > 64:
            raise ValueError(f"raise_n must be <= 64, got {self.raise_n}")
        if not 0.0 < self.clear_ratio <= 1.0:
            raise ValueError(f"clear_ratio must be in (0, 1], got {self.clear_ratio!r}")
        if not self.critical_ratio > 1.0:
            raise ValueError(f"critical_ratio must be > 1, got {self.critical_ratio!r}")
        if not 0.0 <= self.clear_after_s < math.inf:
            raise ValueError(f"clear_after_s must be finite and >= 0, got {self.clear_after_s!r}")

    def quiet_needed(self, interval_s: float | None) -> int:
        """Quiet evaluations in a row that clear, for evaluations ``interval_s`` apart.

        ``clear_n``, or more when ``clear_after_s`` needs them: the run's
        first and last evaluations must lie ``clear_after_s`` apart. Without
        an interval (None) the off-delay does not apply.

        Examples
        --------
        >>> AlertPolicy(clear_n=10, clear_after_s=3600.0).quiet_needed(60.0)
        61
        >>> AlertPolicy(clear_n=10, clear_after_s=3600.0).quiet_needed(3600.0)
        10
        """
        if interval_s is None or self.clear_after_s == 0.0:
            return self.clear_n
        return max(self.clear_n, math.ceil(self.clear_after_s / interval_s) + 1)


@dataclass(frozen=True)
class Transition:
    """A change of an alert's state or severity, with the evidence behind it.

    Attributes
    ----------
    key : str
        ``detector/signal``, unique per asset.
    state : str
        ``"raised"`` or ``"cleared"``.
    severity : str
        ``"warning"`` or ``"critical"`` (for a cleared alert: its last one).
    sample_time_s : float
        Time of the sample whose evaluation caused the transition.
    first_seen_s : float
        Time of the first alarm evaluation of this episode.
    evidence : Evidence
        The evaluation that caused the transition.
    """

    key: str
    state: State
    severity: Severity
    sample_time_s: float
    first_seen_s: float
    evidence: Evidence


@dataclass
class _Episode:
    alarms: int = 0  # bit i = evaluation i back was an alarm
    criticals: int = 0
    evaluations: int = 0
    quiet_run: int = 0
    raised: bool = False
    severity: Severity = "warning"
    first_seen_s: float | None = None


@dataclass
class AlertTracker:
    """Episode state of every (detector, signal) pair of one asset.

    Parameters
    ----------
    policy : AlertPolicy
        Settings shared by all pairs.
    intervals : mapping of str to float, optional
        Seconds between evaluations by detector name, for the policy's
        off-delay (:meth:`AlertPolicy.quiet_needed`); a detector not named
        clears on ``clear_n`` alone.

    Examples
    --------
    >>> from arxwatch.estimators.detect.evidence import Evidence
    >>> tracker = AlertTracker(AlertPolicy(raise_m=2, raise_n=3, clear_n=2))
    >>> def ev(stat):
    ...     return Evidence("innovation_mean", "behaviour", stat, 5.0, stat >= 5.0, "innovation")
    >>> [t.state for k, s in enumerate([6, 7, 1, 1]) for t in [tracker.observe(ev(s), k)] if t]
    ['raised', 'cleared']
    """

    policy: AlertPolicy = field(default_factory=AlertPolicy)
    intervals: Mapping[str, float] = field(default_factory=dict)
    _episodes: dict[str, _Episode] = field(default_factory=dict)

    def observe(self, evidence: Evidence, sample_time_s: float) -> Transition | None:
        """Account one evaluation; return the transition it causes, if any."""
        policy = self.policy
        key = f"{evidence.detector}/{evidence.signal}"
        episode = self._episodes.get(key)
        if episode is None:
            episode = self._episodes[key] = _Episode()
        window = (1 << policy.raise_n) - 1
        critical = evidence.alarm and evidence.ratio >= policy.critical_ratio
        episode.alarms = ((episode.alarms << 1) | int(evidence.alarm)) & window
        episode.criticals = ((episode.criticals << 1) | int(critical)) & window
        episode.evaluations += 1
        if evidence.alarm and episode.first_seen_s is None:
            episode.first_seen_s = sample_time_s
        quiet = (
            evidence.statistic < policy.clear_ratio * evidence.threshold
            and not evidence.alarm
            and evidence.conclusive
        )
        episode.quiet_run = episode.quiet_run + 1 if quiet else 0

        if not episode.raised:
            if episode.alarms.bit_count() >= policy.raise_m:
                episode.raised = True
                severe = episode.criticals.bit_count() >= policy.critical_m
                episode.severity = "critical" if severe else "warning"
                return self._transition(key, "raised", episode, sample_time_s, evidence)
            if not episode.alarms:
                episode.first_seen_s = None  # an isolated excursion has passed
            return None
        if episode.severity == "warning" and episode.criticals.bit_count() >= policy.critical_m:
            episode.severity = "critical"
            return self._transition(key, "raised", episode, sample_time_s, evidence)
        if episode.quiet_run >= policy.quiet_needed(self.intervals.get(evidence.detector)):
            transition = self._transition(key, "cleared", episode, sample_time_s, evidence)
            self._episodes[key] = _Episode()
            return transition
        return None

    @staticmethod
    def _transition(
        key: str, state: State, episode: _Episode, time_s: float, evidence: Evidence
    ) -> Transition:
        first = episode.first_seen_s if episode.first_seen_s is not None else time_s
        return Transition(key, state, episode.severity, time_s, first, evidence)

    def active(self) -> dict[str, Severity]:
        """Return the raised alerts by key, with their severity."""
        return {k: e.severity for k, e in self._episodes.items() if e.raised}

    def to_state(self) -> dict[str, Any]:
        """Episode state as plain data, for checkpoints."""
        return {
            key: {
                "alarms": e.alarms,
                "criticals": e.criticals,
                "evaluations": e.evaluations,
                "quiet_run": e.quiet_run,
                "raised": e.raised,
                "severity": e.severity,
                "first_seen_s": e.first_seen_s,
            }
            for key, e in self._episodes.items()
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Restore episode state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If an entry is malformed; the message names the key.
        """
        episodes: dict[str, _Episode] = {}
        for key, raw in state.items():
            try:
                severity = raw["severity"]
                if severity not in ("warning", "critical"):
                    raise ValueError(f"severity {severity!r}")
                first = raw["first_seen_s"]
                episodes[key] = _Episode(
                    alarms=int(raw["alarms"]),
                    criticals=int(raw["criticals"]),
                    evaluations=int(raw["evaluations"]),
                    quiet_run=int(raw["quiet_run"]),
                    raised=bool(raw["raised"]),
                    severity=severity,
                    first_seen_s=None if first is None else float(first),
                )
            except (KeyError, TypeError, ValueError) as exc:
                raise ValueError(f"alert state {key!r}: malformed entry ({exc})") from None
        self._episodes = episodes


#: Busy episodes up to which TrackerBank.observe takes them one by one.
_FEW_BUSY = 8

#: Number of set bits of every byte value, for popcounts over any unsigned width.
_BITS_IN_BYTE = np.array([bin(v).count("1") for v in range(256)], dtype=np.uint8)


def _popcount(values: NDArray[np.unsignedinteger[Any]]) -> NDArray[np.intp]:
    """Set bits of each unsigned integer (``int.bit_count`` element-wise)."""
    size = values.dtype.itemsize
    counts = _BITS_IN_BYTE[values.reshape(-1).view(np.uint8)].reshape(-1, size)
    total: NDArray[np.intp] = counts.sum(axis=1, dtype=np.intp).reshape(values.shape)
    return total


def _bits_dtype(raise_n: int) -> np.dtype[Any]:
    for dtype in (np.uint8, np.uint16, np.uint32, np.uint64):
        if raise_n <= np.iinfo(dtype).bits:
            return np.dtype(dtype)
    raise ValueError(f"raise_n must be <= 64, got {raise_n}")


@dataclass(frozen=True)
class BankTransition:
    """A transition found by :meth:`TrackerBank.observe` (the evidence stays with the caller).

    Attributes
    ----------
    position : int
        Index into the ``rows`` argument of the call.
    state, severity : str
        As :class:`Transition`.
    first_seen_s : float
        As :class:`Transition`.
    """

    position: int
    state: State
    severity: Severity
    first_seen_s: float


class TrackerBank:
    """Episode state of many (row, key) pairs in arrays: the column-wise twin of AlertTracker.

    A row is one monitored unit (an asset, or an asset in one operating
    mode); the keys are a fixed list of ``detector/signal`` names. For the
    same evaluations in the same order, :meth:`observe` decides exactly as
    :meth:`AlertTracker.observe` does for each row (the tests compare them);
    only the bookkeeping differs: the alarm histories use the smallest
    unsigned type that holds ``raise_n`` bits, and the quiet run stops
    counting where it clears (larger values decide nothing).

    Parameters
    ----------
    policy : AlertPolicy
        Settings shared by all pairs.
    keys : sequence of str
        Key names, distinct.
    capacity : int
        Rows to allocate; :meth:`resize` grows them.
    intervals : mapping of str to float, optional
        As for :class:`AlertTracker`, by the detector part of each key.

    Raises
    ------
    ValueError
        If ``keys`` is empty or repeats a name, or ``capacity`` is negative.
    """

    def __init__(
        self,
        policy: AlertPolicy,
        keys: Sequence[str],
        capacity: int,
        intervals: Mapping[str, float] | None = None,
    ) -> None:
        self.policy = policy
        self.keys = tuple(keys)
        if not self.keys or len(set(self.keys)) != len(self.keys):
            raise ValueError(f"keys must be distinct and at least one, got {list(self.keys)!r}")
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 0:
            raise ValueError(f"capacity must be an integer >= 0, got {capacity!r}")
        self._bits = _bits_dtype(policy.raise_n)
        self._window = (1 << policy.raise_n) - 1
        every = intervals or {}
        #: quiet evaluations in a row that clear, by key (AlertPolicy.quiet_needed)
        self.quiet_needed = np.array(
            [policy.quiet_needed(every.get(key.split("/")[0])) for key in self.keys],
            dtype=np.int64,
        )
        # the quiet run stops counting one past that: the smallest type that holds it
        run_type = np.uint16 if int(self.quiet_needed.max()) < 2**16 - 1 else np.uint32
        shape = (capacity, len(self.keys))
        self.alarms = np.zeros(shape, dtype=self._bits)
        self.criticals = np.zeros(shape, dtype=self._bits)
        self.quiet_run = np.zeros(shape, dtype=run_type)
        self.raised = np.zeros(shape, dtype=np.bool_)
        self.critical = np.zeros(shape, dtype=np.bool_)
        self.first_seen_s = np.full(shape, np.nan)

    @property
    def capacity(self) -> int:
        """Rows allocated."""
        return int(self.alarms.shape[0])

    def arrays(self) -> dict[str, NDArray[Any]]:
        """Return the state arrays by name (views), for checkpoints."""
        return {
            "alarms": self.alarms,
            "criticals": self.criticals,
            "quiet_run": self.quiet_run,
            "raised": self.raised,
            "critical": self.critical,
            "first_seen_s": self.first_seen_s,
        }

    def load_arrays(self, arrays: Mapping[str, NDArray[Any]]) -> None:
        """Restore arrays saved from :meth:`arrays` (same keys, any capacity).

        Raises
        ------
        ValueError
            If a name is missing or a shape or dtype does not fit.
        """
        mine = self.arrays()
        if set(arrays) != set(mine):
            raise ValueError(f"tracker arrays must be {sorted(mine)}, got {sorted(arrays)}")
        rows = {int(np.shape(a)[0]) for a in arrays.values()}
        if len(rows) != 1:
            raise ValueError("tracker arrays disagree in their number of rows")
        for name, current in mine.items():
            saved = np.asarray(arrays[name])
            if name == "quiet_run" and saved.dtype.kind == "u" and saved.ndim == 2:
                # saved in another width: a run beyond what clears decides the same
                saved = np.minimum(saved, self.quiet_needed).astype(current.dtype)
            if saved.ndim != 2 or saved.shape[1] != len(self.keys) or saved.dtype != current.dtype:
                raise ValueError(
                    f"tracker array {name!r} has shape {saved.shape} and dtype {saved.dtype}; "
                    f"expected (rows, {len(self.keys)}) of {current.dtype}"
                )
            setattr(self, name, saved.copy())

    def resize(self, capacity: int) -> None:
        """Grow (or shrink) to ``capacity`` rows; new rows start quiet."""
        old = self.capacity
        for name, array in self.arrays().items():
            grown = np.resize(array, (capacity, len(self.keys)))
            if capacity > old:
                grown[old:] = np.nan if name == "first_seen_s" else 0
            setattr(self, name, grown)

    def clear(self, rows: NDArray[np.intp] | Sequence[int]) -> None:
        """Reset every episode of ``rows`` to quiet."""
        index = np.asarray(rows, dtype=np.intp)
        for name, array in self.arrays().items():
            array[index] = np.nan if name == "first_seen_s" else 0

    def active(self, row: int) -> dict[str, Severity]:
        """Return the raised alerts of ``row`` by key, with their severity."""
        raised = np.flatnonzero(self.raised[row])
        return {
            self.keys[k]: "critical" if self.critical[row, k] else "warning"
            for k in raised.tolist()
        }

    def observe_one(
        self,
        row: int,
        key: int,
        statistic: float,
        threshold: float,
        alarm: bool,
        time_s: float,
        conclusive: bool = True,
    ) -> BankTransition | None:
        """Account one evaluation of one pair (the scalar path of :meth:`observe`).

        Returns
        -------
        BankTransition or None
            The transition, with ``position`` 0, if there is one.
        """
        raised = bool(self.raised[row, key])
        alarms = int(self.alarms[row, key])
        if not alarm and not raised and not alarms:
            # A quiet evaluation of a quiet episode changes nothing that
            # matters: only the quiet run, which decides nothing before a
            # raise, and a raise needs an alarm (which resets it).
            return None
        policy = self.policy
        if threshold == 0.0:
            ratio = math.inf if statistic > 0.0 else 0.0
        else:
            ratio = statistic / threshold
        critical = alarm and ratio >= policy.critical_ratio
        alarms = ((alarms << 1) | int(alarm)) & self._window
        criticals = ((int(self.criticals[row, key]) << 1) | int(critical)) & self._window
        first = float(self.first_seen_s[row, key])
        if alarm and math.isnan(first):
            first = time_s
        quiet = statistic < policy.clear_ratio * threshold and not alarm and conclusive
        needed = int(self.quiet_needed[key])
        run = min(int(self.quiet_run[row, key]), needed) + 1 if quiet else 0
        severe = bool(self.critical[row, key])
        state: State | None = None
        if not raised:
            if alarms.bit_count() >= policy.raise_m:
                raised, state = True, "raised"
                severe = criticals.bit_count() >= policy.critical_m
            elif not alarms:
                first = math.nan
        elif not severe and criticals.bit_count() >= policy.critical_m:
            severe, state = True, "raised"
        elif run >= needed:
            state = "cleared"
        out = None
        if state is not None:
            out = BankTransition(
                position=0,
                state=state,
                severity="critical" if severe else "warning",
                first_seen_s=first if not math.isnan(first) else time_s,
            )
        if state == "cleared":
            alarms = criticals = run = 0
            raised = severe = False
            first = math.nan
        self.alarms[row, key] = alarms
        self.criticals[row, key] = criticals
        self.quiet_run[row, key] = run
        self.raised[row, key] = raised
        self.critical[row, key] = severe
        self.first_seen_s[row, key] = first
        return out

    def observe(
        self,
        rows: NDArray[np.intp] | slice,
        key: int,
        statistic: NDArray[np.float64],
        threshold: NDArray[np.float64] | float,
        alarm: NDArray[np.bool_],
        time_s: NDArray[np.float64] | float,
        conclusive: NDArray[np.bool_] | None = None,
    ) -> list[BankTransition]:
        """Account one evaluation of key ``key`` for each of ``rows`` (distinct).

        Parameters
        ----------
        rows : ndarray of intp, shape (k,), or slice
            Rows evaluated, each at most once (a slice of consecutive rows
            works on views).
        key : int
            Index into :attr:`keys`.
        statistic, threshold, alarm : arrays of shape (k,) (threshold may be a scalar)
            The evaluations, as the fields of :class:`Evidence`.
        time_s : array of shape (k,) or float
            Sample times.
        conclusive : array of bool, shape (k,), optional
            As :attr:`Evidence.conclusive`; all true when omitted.

        Returns
        -------
        list of BankTransition
            The transitions, in the order of ``rows``.
        """
        policy = self.policy
        alarm = np.asarray(alarm, dtype=np.bool_)
        # A quiet evaluation of a quiet episode changes nothing that matters
        # (see observe_one): work on the others only.
        busy = alarm | self.raised[rows, key] | (self.alarms[rows, key] != 0)
        if not busy.any():  # the usual case: settled before anything else is made
            return []
        stat = np.asarray(statistic, dtype=np.float64)
        limit = np.broadcast_to(np.asarray(threshold, dtype=np.float64), stat.shape)
        when = np.broadcast_to(np.asarray(time_s, dtype=np.float64), stat.shape)
        if not busy.all():
            if isinstance(rows, slice):
                rows = np.arange(rows.start, rows.stop, dtype=np.intp)
            picked = np.flatnonzero(busy)
            if picked.shape[0] <= _FEW_BUSY:
                # a handful of episodes: the scalar path costs less than forty array calls
                few = []
                for pos in picked.tolist():
                    one = self.observe_one(
                        int(rows[pos]),
                        key,
                        float(stat[pos]),
                        float(limit[pos]),
                        bool(alarm[pos]),
                        float(when[pos]),
                        True if conclusive is None else bool(conclusive[pos]),
                    )
                    if one is not None:
                        few.append(BankTransition(pos, one.state, one.severity, one.first_seen_s))
                return few
            found = self.observe(
                rows[picked],
                key,
                stat[picked],
                limit[picked],
                alarm[picked],
                when[picked],
                None if conclusive is None else conclusive[picked],
            )
            return [
                BankTransition(int(picked[t.position]), t.state, t.severity, t.first_seen_s)
                for t in found
            ]
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(limit == 0.0, np.where(stat > 0.0, np.inf, 0.0), stat / limit)
        critical = alarm & (ratio >= policy.critical_ratio)
        one = self._bits.type(1)
        window = self._bits.type(self._window)
        alarms = ((self.alarms[rows, key] << one) | alarm.astype(self._bits)) & window
        criticals = ((self.criticals[rows, key] << one) | critical.astype(self._bits)) & window
        first = self.first_seen_s[rows, key]
        first = np.where(alarm & np.isnan(first), when, first)
        quiet = (stat < policy.clear_ratio * limit) & ~alarm
        if conclusive is not None:
            quiet &= conclusive
        needed = self.quiet_needed[key]
        run = np.where(quiet, np.minimum(self.quiet_run[rows, key], needed) + 1, 0)
        raised = self.raised[rows, key].copy()
        severe = self.critical[rows, key].copy()
        n_alarms = _popcount(alarms)
        n_criticals = _popcount(criticals)

        rise = ~raised & (n_alarms >= policy.raise_m)
        first = np.where(~raised & ~rise & (alarms == 0), np.nan, first)
        severe = np.where(rise, n_criticals >= policy.critical_m, severe)
        escalate = raised & ~severe & (n_criticals >= policy.critical_m)
        severe |= escalate
        clear = raised & ~escalate & (run >= needed)
        raised |= rise

        out: list[BankTransition] = []
        changed = np.flatnonzero(rise | escalate | clear)
        for pos in changed.tolist():
            seen = float(first[pos])
            out.append(
                BankTransition(
                    position=pos,
                    state="cleared" if clear[pos] else "raised",
                    severity="critical" if severe[pos] else "warning",
                    first_seen_s=seen if not math.isnan(seen) else float(when[pos]),
                )
            )
        # A cleared episode starts over.
        alarms[clear] = 0
        criticals[clear] = 0
        run[clear] = 0
        raised[clear] = False
        severe[clear] = False
        first[clear] = np.nan
        self.alarms[rows, key] = alarms
        self.criticals[rows, key] = criticals
        self.quiet_run[rows, key] = run
        self.raised[rows, key] = raised
        self.critical[rows, key] = severe
        self.first_seen_s[rows, key] = first
        return out
