"""Column-wise intake: alignment and data-quality checks of many assets of one class.

Pure: samples, times and settings in, rows and evidence out; no clock, no I/O.
:class:`IntakeBank` holds every asset of one asset class in numpy arrays
indexed by an asset *slot*, so that one process carries thousands of assets
(a site's VAV boxes) at a few hundred bytes each. It reproduces two readable
reference implementations, which stay the statement of the rules:
:class:`~arxwatch.daemon.align.Aligner` (one per asset) for the rows and
:class:`~arxwatch.estimators.detect.quality.SignalQuality` (one per checked
signal) for the data-quality evidence. The tests drive both with the same
calls and compare.

Grid cells
----------
The *cell* of a sample at time ``s`` is the index ``k`` of the first grid
point at or after it, ``(k - 1) * T < s <= k * T`` for the period ``T``: the
first grid point it can fill. Only the latest sample of a cell can ever fill
a grid point. Proof: a grid point ``t_j`` takes the latest sample at or before
it; every sample of cell ``k`` is at or before ``t_k``, so for ``j >= k`` an
older sample of the cell is never the latest one, and for ``j < k`` no sample
of the cell qualifies. Nor does an older sample of the cell decide whether
``t_j`` has a value at all: if it is at most ``staleness_s`` old at ``t_j``,
so is the newer one. So the bank keeps, per (asset, signal), at most ``cells``
samples, the latest of distinct cells. Of the cells at or before the last
closed grid point only the newest one matters (it *carries* the last value
into the grid points still open), and only while it is fresh for the next
grid point.

The *open cells* of a signal are the cells it holds a sample for that can
still fill a grid point not yet closed: every cell after the last closed grid
point whose latest sample can fill some grid point, plus the carried cell
while it is fresh for the next grid point. A signal sampled once a period,
with :meth:`IntakeBank.advance` called at least once a period, holds at most
three: the carried value, the cell of the grid point about to close and,
when a sample just after that grid point comes before it is closed, the
next cell. As long as no signal of an asset has more than
``cells`` open cells at once, the bank emits exactly the rows of an
``Aligner``. When a sample would open one more, the oldest of the open cells
(possibly the new one) is dropped and counted as ``overflow``; the rows may
then differ from the reference.

Differences from the references
-------------------------------
* **Duplicates** are recognised with bounded memory: a sample whose time
  equals a held sample of its signal, or the newest accepted one, is
  ``"duplicate"``. A redelivered sample at or before the last closed grid
  point is ``"late"`` (the reference remembers up to ``dedupe_keys`` times
  and calls those duplicates; ``dedupe_keys`` is not used here). A sample
  older than the held sample of its own cell is ``"superseded"``: it could
  never fill a grid point, whether it is new (the reference says
  ``"accepted"``) or redelivered (``"duplicate"``). With ``staleness_s``
  shorter than the period, a sample that can fill no grid point at all is
  accepted (and quality-checked) but not held; redelivered, it is accepted
  again unless it is the newest of its signal. In every case rows, evidence
  and all state but the counters are unchanged, so redelivery is idempotent.
* **Mode labels** are stored as int16 codes of a per-bank table of at most
  ``max_mode_labels`` labels (numbers formatted as the reference does); a
  sample that would add one more is refused as ``"mode_label_limit"`` (the
  reference would use it). Codes are never reused, also after
  :meth:`IntakeBank.remove_asset`.
* **Times** further than ``2**50`` sample periods from the epoch are refused
  as ``"time_out_of_range"`` (beyond any real clock): grid indices stay
  exact integers in float64.
* **Counters**: ``unknown_signal`` stays 0 since signals are passed by index
  (an index outside the class raises); ``duplicate`` is checkpointed with the
  rest; ``superseded``, ``mode_label_limit``, ``time_out_of_range`` and
  ``overflow`` are new.

Data quality
------------
For each output or input signal with a :class:`QualityConfig`, every accepted
sample whose time is not before that signal's previous quality sample is
checked exactly as :meth:`SignalQuality.update` does (gap, flat run, range);
out-of-order samples are aligned but not checked. Since every accepted sample
at or after the previous quality sample is checked, the previous quality
sample is the newest accepted one, so the bank keeps one time per signal for
both uses. :meth:`IntakeBank.stale` is :meth:`SignalQuality.check` for every
asset and checked signal at once.
"""

from __future__ import annotations

import math
import operator
from array import array
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Literal, get_args

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.align import AddOutcome, AlignConfig, _mode_label
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.detect.quality import QualityConfig
from arxwatch.estimators.estimator import Backend, resolve_backend

__all__ = ["OUTCOMES", "IntakeBank", "IntakeOutcome", "RowBatch", "cells_for"]

IntakeOutcome = Literal[
    AddOutcome, "superseded", "mode_label_limit", "time_out_of_range", "out_of_range"
]
"""What :meth:`IntakeBank.add` did with a sample (closed set).

The values of :data:`~arxwatch.daemon.align.AddOutcome` keep their meaning
(``"unknown_signal"`` is never returned: signals are indices), and:

``"superseded"``
    Older than the sample held for the same grid cell; it could never fill
    a grid point. Dropped.
``"mode_label_limit"``
    A mode label beyond the bank's ``max_mode_labels`` distinct labels.
    Dropped.
``"time_out_of_range"``
    A time more than ``2**50`` sample periods from the epoch. Dropped.
"""

_FORMAT = "arxwatch.intake"
_STATE_VERSION = 1
_OUTCOMES: tuple[IntakeOutcome, ...] = get_args(IntakeOutcome)
#: Outcomes in the order of the codes :meth:`IntakeBank.add_many` returns.
OUTCOMES: tuple[IntakeOutcome, ...] = _OUTCOMES
_OUTCOME_CODE = {outcome: code for code, outcome in enumerate(_OUTCOMES)}
#: Grid indices stay within +-2**50 (exact in float64, with room for corrections).
_GRID_LIMIT = 2.0**50
#: ``last_index`` before any grid point was closed.
_OPEN = np.iinfo(np.int64).min
#: ``first_index`` before any sample was accepted.
_EMPTY = np.iinfo(np.int64).max
_MAX_LABELS = int(np.iinfo(np.int16).max)

# State arrays: name -> (dtype, axes after the slot axis, value of an empty slot).
# Axes: "signal" (every signal), "cell", "quality" (checked signals), "count" (counters).
_LAYOUT: dict[str, tuple[type[np.generic], tuple[str, ...], float | int | bool]] = {
    "in_use": (np.bool_, (), False),
    "last_index": (np.int64, (), int(_OPEN)),
    "first_index": (np.int64, (), int(_EMPTY)),
    "last_row_s": (np.float64, (), math.nan),
    "time": (np.float64, ("signal", "cell"), math.nan),
    "value": (np.float64, ("signal", "cell"), math.nan),
    "newest": (np.float64, ("signal",), math.nan),
    "counts": (np.int32, ("count",), 0),
    "first_check_s": (np.float64, ("quality",), math.nan),
    "run_start_s": (np.float64, ("quality",), 0.0),
    "run_min": (np.float64, ("quality",), 0.0),
    "run_max": (np.float64, ("quality",), 0.0),
    "has_moved": (np.bool_, ("quality",), False),
    "gap_count": (np.int64, ("quality",), 0),
    "gap_total_s": (np.float64, ("quality",), 0.0),
    "stale_alarm": (np.bool_, ("quality",), False),
}


@dataclass(frozen=True, eq=False)
class RowBatch:
    """Rows closed by one :meth:`IntakeBank.advance`, ordered by (time, slot).

    Attributes
    ----------
    slots : ndarray of intp, shape (k,)
        Asset slot of each row.
    time_s : ndarray of float64, shape (k,)
        Grid time ``index * sample_period_s``, epoch seconds.
    y : ndarray of float64, shape (k,)
        Output value held at the grid point.
    u : ndarray of float64, shape (k, n_inputs)
        Input values, in the configured order.
    mode : ndarray of int16, shape (k,)
        Mode label code (:meth:`IntakeBank.mode_label` gives the text), -1
        when the class has no mode signal.
    restart : ndarray of bool, shape (k,)
        As :attr:`arxwatch.daemon.align.Row.restart`: more than
        ``gap_restart_s`` since the asset's previous row.
    skipped : int
        Grid points this call closed without a complete row (they count as
        ``incomplete`` in :meth:`IntakeBank.counts`).
    """

    slots: NDArray[np.intp]
    time_s: NDArray[np.float64]
    y: NDArray[np.float64]
    u: NDArray[np.float64]
    mode: NDArray[np.int16]
    restart: NDArray[np.bool_]
    skipped: int = 0

    def __len__(self) -> int:
        return int(self.slots.shape[0])


# A quality check waiting for take_quality() is _CHECK_FIELDS numbers in a flat array (no
# Python object per sample): slot, checked-signal index, value, interval, interval in
# periods, gap (0/1), flat-run length, flat-run range, has moved (0/1), gap count, gap total.
_CHECK_FIELDS = 11

#: ``needed(slots, qs)``: whether the evidence of each quiet check (asset slot, index of
#: the checked signal) is wanted anyway; see :meth:`IntakeBank.take_quality`.
Needed = Callable[[NDArray[np.intp], NDArray[np.intp]], NDArray[np.bool_]]


def _flat(array: NDArray[Any]) -> NDArray[Any]:
    """Return a state array with its axes as one, a view: fancy indexing on one axis is cheaper."""
    if not array.flags.c_contiguous:  # never: the state arrays are made and loaded contiguous
        raise AssertionError("intake state arrays must be C-contiguous")
    return array.reshape(-1)


def _first_index(time_s: float, period: float) -> int:
    """Smallest k with ``k * period >= time_s`` (as ``Aligner``, exact in floating point)."""
    k = math.ceil(time_s / period)
    while (k - 1) * period >= time_s:
        k -= 1
    while k * period < time_s:
        k += 1
    return k


def _last_index(time_s: float, period: float) -> int:
    """Largest k with ``k * period <= time_s`` (as ``Aligner``, exact in floating point)."""
    k = math.floor(time_s / period)
    while (k + 1) * period <= time_s:
        k += 1
    while k * period > time_s:
        k -= 1
    return k


def _first_indices(times: NDArray[np.float64], period: float) -> NDArray[np.int64]:
    """:func:`_first_index` element-wise (finite times within the grid limit)."""
    k = np.ceil(times / period)
    while (down := (k - 1.0) * period >= times).any():
        k -= down
    while (up := k * period < times).any():
        k += up
    return k.astype(np.int64)


def _last_indices(times: NDArray[np.float64], period: float) -> NDArray[np.int64]:
    """:func:`_last_index` element-wise (finite times within the grid limit)."""
    k = np.floor(times / period)
    while (up := (k + 1.0) * period <= times).any():
        k += up
    while (down := k * period > times).any():
        k -= down
    return k.astype(np.int64)


def cells_for(config: AlignConfig) -> int:
    """Return the cells per signal a live feed needs under ``config``.

    A signal sampled once a period, advanced at least once a period, holds
    the carried cell, the cells between the last closed grid point and its
    newest sample (``ceil(lateness_s / sample_period_s)`` of them) and one
    just opened before the next advance: ``2 + ceil(lateness / period)``,
    and at least 3 so that a sample just after a grid point fits before that
    point closes. A burst beyond that marks the asset :attr:`IntakeBank.crowded`.

    Examples
    --------
    >>> cells_for(AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",)))
    3
    >>> cells_for(AlignConfig(sample_period_s=1.0, output="sat", inputs=("valve",), lateness_s=5))
    7
    """
    return max(3, 2 + math.ceil(config.lateness_s / config.sample_period_s))


def _repacked(
    times: NDArray[np.float64], values: NDArray[np.float64], cells: int
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return held samples with ``cells`` entries per signal, newest first, empty (NaN) last."""
    order = np.argsort(-times, axis=2, kind="stable")[..., :cells]  # NaN sorts last
    times = np.take_along_axis(times, order, axis=2)
    values = np.take_along_axis(values, order, axis=2)
    pad = cells - times.shape[2]
    if pad > 0:
        blank = np.full((*times.shape[:2], pad), np.nan)
        times = np.concatenate([times, blank], axis=2)
        values = np.concatenate([values, blank], axis=2)
    return np.ascontiguousarray(times), np.ascontiguousarray(values)


def _index_argument(name: str, value: object) -> int:
    if isinstance(value, bool):
        raise TypeError(f"{name} must be an integer index, got {value!r}")
    try:
        return operator.index(value)  # type: ignore[arg-type]
    except TypeError:
        raise TypeError(f"{name} must be an integer index, got {value!r}") from None


class IntakeBank:
    """Alignment and data-quality state of every asset of one class, in arrays.

    Parameters
    ----------
    config : AlignConfig
        Signals and timing shared by the assets (``dedupe_keys`` is not used;
        see the module notes).
    quality : mapping of str to QualityConfig
        Data-quality settings per output or input signal name; signals not
        named are not checked. May be empty. Checked signals keep the order
        of ``config.signals``.
    capacity : int, optional
        Asset slots allocated at first; :meth:`add_asset` doubles them when
        full. Default 64.
    cells : int, optional
        Samples held per (asset, signal): the latest of distinct grid cells,
        see the module notes. Default 4; at least 2.
    max_mode_labels : int, optional
        Distinct mode labels the bank codes, 1 to 32767. Default 64.
    backend : {"python", "compiled", "auto"}, optional
        How :meth:`add_many` takes a row on its array path: numpy calls, or
        one call into numba-compiled code
        (:mod:`arxwatch.daemon.intakenative`, the optional ``fast`` extra);
        the same state, outcomes and evidence. Default ``"python"``.

    Attributes
    ----------
    config : AlignConfig
        As given.
    signals : tuple of str
        ``config.signals``: the meaning of the ``signal`` index of :meth:`add`.
    quality_signals : tuple of str
        The checked signals, in signal order.
    cells, max_mode_labels : int
        As given.

    Raises
    ------
    ValueError
        If a setting is out of range, a quality key is not an output or input
        signal, or ``staleness_s`` or ``lateness_s`` exceed ``2**50`` periods.
    TypeError
        If a quality value is not a :class:`QualityConfig`.
    ImportError
        If ``backend`` is ``"compiled"`` and numba is not installed.

    Examples
    --------
    >>> bank = IntakeBank(AlignConfig(sample_period_s=60.0, output="sat", inputs=("valve",)), {})
    >>> slot = bank.add_asset()
    >>> bank.add(slot, 0, 1_767_225_610.0, 13.2), bank.add(slot, 1, 1_767_225_595.0, 40.0)
    ('accepted', 'accepted')
    >>> bank.add(slot, 0, 1_767_225_610.0, 13.2)
    'duplicate'
    >>> batch = bank.advance(1_767_225_700.0)
    >>> batch.slots.tolist(), batch.time_s.tolist(), batch.y.tolist(), batch.u.tolist()
    ([0], [1767225660.0], [13.2], [[40.0]])
    >>> bank.add(slot, 1, 1_767_225_650.0, 41.0)
    'late'
    """

    def __init__(
        self,
        config: AlignConfig,
        quality: Mapping[str, QualityConfig],
        *,
        capacity: int = 64,
        cells: int = 4,
        max_mode_labels: int = 64,
        backend: Backend = "python",
    ) -> None:
        for name, value, low, high in (
            ("capacity", capacity, 1, None),
            ("cells", cells, 2, None),
            ("max_mode_labels", max_mode_labels, 1, _MAX_LABELS),
        ):
            if (
                isinstance(value, bool)
                or not isinstance(value, int)
                or value < low
                or (high is not None and value > high)
            ):
                expected = f">= {low}" if high is None else f"from {low} to {high}"
                raise ValueError(f"{name} must be an integer {expected}, got {value!r}")
        period = config.sample_period_s
        for name in ("staleness_s", "lateness_s"):
            if getattr(config, name) > _GRID_LIMIT * period:
                raise ValueError(
                    f"config.{name} must be at most 2**50 sample periods, "
                    f"got {getattr(config, name)!r}"
                )
        numeric = (config.output, *config.inputs)
        for name, setting in quality.items():
            if name not in numeric:
                raise ValueError(
                    f"quality key {name!r} is not an output or input signal; "
                    f"expected one of {list(numeric)}"
                )
            if not isinstance(setting, QualityConfig):
                raise TypeError(
                    f"quality[{name!r}] must be a QualityConfig, got {type(setting).__name__}"
                )
        self.config = config
        self.cells = cells
        self.max_mode_labels = max_mode_labels
        self.backend = resolve_backend(backend)
        self._native: Callable[..., int] | None = None
        if self.backend == "compiled":
            from arxwatch.daemon.intakenative import take_row

            self._native = take_row
        #: (slot, signal) pairs that took their last free cell in :meth:`add`;
        #: :meth:`advance` removes the slots it advances. A caller feeding a
        #: burst advances the asset before giving a crowded signal another
        #: sample, so that no cell overflows.
        self.crowded: set[tuple[int, int]] = set()
        self.signals = config.signals
        self.quality_signals = tuple(name for name in numeric if name in quality)
        self._quality_configs = tuple(quality[name] for name in self.quality_signals)
        self._quality_of = [
            self.quality_signals.index(name) if name in quality else -1 for name in self.signals
        ]
        self._quality_columns = np.array(
            [self.signals.index(name) for name in self.quality_signals], dtype=np.intp
        )
        self._stale_after = np.array(
            [q.stale_after_s for q in self._quality_configs], dtype=np.float64
        )
        self._quality_of_array = np.array(self._quality_of, dtype=np.intp)
        # plausible range and flat-run window per checked signal (rows), for take_quality
        self._range_rows = [(q.minimum, q.maximum, q.stuck_window_s) for q in self._quality_configs]
        self._range_table = np.array(self._range_rows, dtype=np.float64).reshape(-1, 3).T
        # expected period, gap factor and flat-run tolerance per checked signal (rows)
        self._quality_table = (
            np.array(
                [
                    [q.expected_period_s, q.gap_factor, q.stuck_epsilon]
                    for q in self._quality_configs
                ],
                dtype=np.float64,
            )
            .reshape(-1, 3)
            .T
        )
        self._quality_rows = np.ascontiguousarray(self._quality_table)  # for the compiled path
        self._mode_index = len(self.signals) - 1 if config.mode is not None else -1
        self._count_keys = (
            *(o for o in _OUTCOMES if o != "unknown_signal"),
            "rows",
            "incomplete",
            *(f"incomplete_{name}" for name in self.signals),
            "overflow",
        )
        self._column = {key: i for i, key in enumerate(self._count_keys)}
        self._native_columns = np.array(
            [self._column[key] for key in ("accepted", "out_of_range", "overflow")], dtype=np.intp
        )
        self._n_counts = len(self._count_keys)
        self._axes = {
            "signal": len(self.signals),
            "cell": cells,
            "quality": len(self.quality_signals),
            "count": len(self._count_keys),
        }
        self._labels: list[str] = []
        self._codes: dict[str, int] = {}
        self._pending = array("d")
        self._arrays: dict[str, NDArray[Any]] = {}
        # Any: typeshed types memoryview items as bytes or int only; these hold floats and bools.
        self._flat: dict[str, Any] = {}
        self._set_arrays(self._allocate(capacity))

    # ---------------------------------------------------------------- slots

    def _allocate(self, capacity: int) -> dict[str, NDArray[Any]]:
        return {
            name: np.full(self._shape(capacity, axes), fill, dtype=dtype)
            for name, (dtype, axes, fill) in _LAYOUT.items()
        }

    def _shape(self, capacity: int, axes: tuple[str, ...]) -> tuple[int, ...]:
        return (capacity, *(self._axes[axis] for axis in axes))

    def _set_arrays(self, arrays: dict[str, NDArray[Any]]) -> None:
        """Install state arrays, with flat memoryviews of them for :meth:`add`.

        One sample touches a few scalars; a flat memoryview reads and writes
        them as Python numbers several times faster than numpy indexing.
        """
        self._arrays = arrays
        self._flat_arrays = {name: _flat(array) for name, array in arrays.items()}
        self._flat = {name: array.data for name, array in self._flat_arrays.items()}
        self._capacity = int(arrays["in_use"].shape[0])
        self._slots_changed()

    def _slots_changed(self) -> None:
        """Forget what was worked out from the slots in use (they or the arrays changed)."""
        # the slots and signals last found ready for add_many, their flat (slot, signal)
        # pairs and flat (slot, checked signal) positions (-1: not checked)
        self._ready: (
            tuple[NDArray[np.intp], NDArray[np.intp], NDArray[np.intp], NDArray[np.intp]] | None
        ) = None
        # slots in use, and the flat positions of their checked signals' newest times
        self._in_use: tuple[NDArray[np.intp], NDArray[np.intp]] | None = None

    @property
    def capacity(self) -> int:
        """Asset slots allocated."""
        return self._capacity

    @property
    def mode_signal(self) -> int:
        """Index of the mode signal in :attr:`signals`, -1 when the class has none."""
        return self._mode_index

    @property
    def n_assets(self) -> int:
        """Slots in use."""
        return int(np.count_nonzero(self._arrays["in_use"]))

    def add_asset(self) -> int:
        """Take the lowest free slot, growing the arrays by a quarter when none is free.

        Returns
        -------
        int
            The slot, with a fresh state (as a new ``Aligner`` and new
            ``SignalQuality`` checkers).
        """
        in_use = self._arrays["in_use"]
        slot = int(np.argmin(in_use))
        if in_use[slot]:
            old = self.capacity
            # a quarter more: amortised O(1) per asset, at most a fifth of the arrays idle
            grown = self._allocate(max(old + 1, old + old // 4))
            for name, array in self._arrays.items():
                grown[name][:old] = array
            self._set_arrays(grown)
            slot = old
        self._arrays["in_use"][slot] = True
        self._slots_changed()
        return slot

    def remove_asset(self, slot: int) -> None:
        """Free ``slot`` for reuse; its state and untaken evidence are cleared.

        Mode labels stay coded.

        Raises
        ------
        IndexError, ValueError, TypeError
            As :meth:`add` for a bad slot.
        """
        slot = self._slot(slot)
        for name, (_, _, fill) in _LAYOUT.items():
            self._arrays[name][slot] = fill
        self._slots_changed()
        self.crowded = {pair for pair in self.crowded if pair[0] != slot}
        pending = self._pending.tolist()
        self._pending = array("d")
        for i in range(0, len(pending), _CHECK_FIELDS):
            if pending[i] != slot:
                self._pending.extend(pending[i : i + _CHECK_FIELDS])

    def _slot(self, slot: int) -> int:
        index = _index_argument("slot", slot)
        if not 0 <= index < self.capacity:
            raise IndexError(f"slot {index} is out of range: the bank has {self.capacity} slots")
        if not self._arrays["in_use"][index]:
            raise ValueError(f"slot {index} is not in use (never added, or removed)")
        return index

    # ------------------------------------------------------------------ add

    def add(
        self, slot: int, signal: int, time_s: float, value: float | str, *, usable: bool = True
    ) -> IntakeOutcome:
        """Take one sample of one asset; never raises for bad data, says what it did.

        Parameters
        ----------
        slot : int
            Asset slot from :meth:`add_asset`.
        signal : int
            Index into ``config.signals`` (output, inputs, then mode).
        time_s : float
            Sample time, epoch seconds.
        value : float or str
            Number for the output and inputs; number or text label for the
            mode signal.
        usable : bool, optional
            False for a value the caller will not let into the model (out of
            its plausible range): it is checked for data quality like any
            other, but not held for alignment, and the outcome is
            ``"out_of_range"``.

        Returns
        -------
        IntakeOutcome
            What happened to the sample; each outcome is counted, see
            :meth:`counts`. An accepted sample of a checked signal at or after
            its previous quality sample leaves evidence for
            :meth:`take_quality`.

        Raises
        ------
        IndexError
            If ``slot`` or ``signal`` is out of range.
        ValueError
            If ``slot`` is not in use.
        TypeError
            If ``slot`` or ``signal`` is not an integer.
        """
        if (
            type(slot) is not int
            or not 0 <= slot < self._capacity
            or not self._flat["in_use"][slot]
        ):
            slot = self._slot(slot)  # raises, or takes a numpy integer
        if type(signal) is not int or not 0 <= signal < len(self.signals):
            signal = self._signal(signal)
        outcome = self._take(slot, signal, time_s, value, usable)
        self._flat["counts"][slot * self._n_counts + self._column[outcome]] += 1
        return outcome

    def add_many(
        self,
        slots: NDArray[np.intp],
        signals: NDArray[np.intp],
        time_s: float,
        values: NDArray[np.float64],
        usable: NDArray[np.bool_],
    ) -> NDArray[np.intp]:
        """Take one sample of each (slot, signal) pair, all at ``time_s``: :meth:`add` in order.

        A row of a trend export: the state, counters, :attr:`crowded` and the
        quality evidence left for :meth:`take_quality` are those of calling
        :meth:`add` for each element in turn (``tests/property``). The usual
        case (numbers for distinct output or input pairs, each newer than
        anything accepted for its pair and after the last closed grid point)
        is done on arrays; anything else goes through :meth:`add` one by one.

        Parameters
        ----------
        slots, signals : ndarray of intp, shape (k,)
            Asset slot and signal index of each sample.
        time_s : float
            The samples' time, epoch seconds.
        values : ndarray of float64, shape (k,)
            The values.
        usable : ndarray of bool, shape (k,)
            As :meth:`add`'s ``usable``.

        Returns
        -------
        ndarray of intp, shape (k,)
            Index into :data:`OUTCOMES` of each sample's outcome.

        Raises
        ------
        IndexError, ValueError, TypeError
            As :meth:`add`; samples before the bad one are taken.
        """
        k = slots.shape[0]
        if not k:
            return np.empty(0, dtype=np.intp)
        pairs = self._vector_ready(slots, signals, time_s, values)
        if pairs is None:
            return np.array(
                [
                    _OUTCOME_CODE[self.add(int(s), int(q), time_s, float(v), usable=bool(u))]
                    for s, q, v, u in zip(
                        slots.tolist(),
                        signals.tolist(),
                        values.tolist(),
                        usable.tolist(),
                        strict=True,
                    )
                ],
                dtype=np.intp,
            )
        arrays = self._arrays
        period = self.config.sample_period_s
        cell = _first_index(time_s, period)
        if self._native is not None:
            return self._add_native(pairs, slots, signals, time_s, values, usable, cell)
        newest = _flat(arrays["newest"])
        old_newest = newest[pairs]
        if usable.any() and cell * period <= time_s + self.config.staleness_s:
            self._hold_many(
                pairs[usable], slots[usable], signals[usable], time_s, values[usable], cell
            )
        first = arrays["first_index"]
        opening = slots[arrays["last_index"][slots] == _OPEN]
        # one cell for all: a slot given twice gets the same value (no ufunc.at needed)
        first[opening] = np.minimum(first[opening], cell)
        newest[pairs] = time_s
        quality_of = self._quality_of_array[signals]
        checked = quality_of >= 0
        if checked.any():
            self._check_many(
                slots[checked], quality_of[checked], time_s, values[checked], old_newest[checked]
            )
        outcome = np.where(usable, _OUTCOME_CODE["accepted"], _OUTCOME_CODE["out_of_range"])
        columns = np.where(usable, self._column["accepted"], self._column["out_of_range"])
        # np.add.at(counts, (slots, columns), 1) by a count over the range the pairs span
        at = slots * arrays["counts"].shape[1] + columns
        low = int(at.min())
        _flat(arrays["counts"])[low : int(at.max()) + 1] += np.bincount(at - low).astype(np.int32)
        return outcome

    def _add_native(
        self,
        pairs: NDArray[np.intp],
        slots: NDArray[np.intp],
        signals: NDArray[np.intp],
        time_s: float,
        values: NDArray[np.float64],
        usable: NDArray[np.bool_],
        cell: int,
    ) -> NDArray[np.intp]:
        """Take a row on the array path of :meth:`add_many` in one compiled call."""
        if self._native is None:  # never: add_many calls it with a compiled kernel only
            raise AssertionError("no compiled intake kernel")
        a = self._flat_arrays
        k = slots.shape[0]
        crowded = np.zeros(k, dtype=np.bool_)
        pending = np.empty((k, _CHECK_FIELDS))
        ready = self._ready  # set by _vector_ready for these slots and signals
        if ready is None:  # never: add_many found them ready just now
            raise AssertionError("add_many's row was not checked")
        queued = self._native(
            pairs,
            slots,
            ready[3],
            float(time_s),
            np.ascontiguousarray(values, dtype=np.float64),
            np.ascontiguousarray(usable, dtype=np.bool_),
            cell,
            self.config.sample_period_s,
            self.config.staleness_s,
            self.cells,
            a["time"],
            a["value"],
            a["newest"],
            a["first_index"],
            a["last_index"],
            a["counts"],
            self._native_columns,
            self._quality_rows,
            a["gap_count"],
            a["gap_total_s"],
            a["run_min"],
            a["run_max"],
            a["run_start_s"],
            a["has_moved"],
            int(_OPEN),
            crowded,
            pending,
        )
        if crowded.any():
            self.crowded.update(
                zip(slots[crowded].tolist(), signals[crowded].tolist(), strict=True)
            )
        if queued:
            self._pending.frombytes(pending[:queued].tobytes())
        return np.where(usable, _OUTCOME_CODE["accepted"], _OUTCOME_CODE["out_of_range"])

    def _vector_ready(
        self,
        slots: NDArray[np.intp],
        signals: NDArray[np.intp],
        time_s: float,
        values: NDArray[np.float64],
    ) -> NDArray[np.intp] | None:
        """Whether :meth:`add_many` can take these samples on arrays (see there).

        Returns their flat (slot, signal) positions if so, else None. What
        depends on the slots and signals alone is worked out once for the
        same two arrays (a trend export's columns, row after row) until a
        slot is added or removed.
        """
        period = self.config.sample_period_s
        if not math.isfinite(time_s) or abs(time_s) > _GRID_LIMIT * period:
            return None
        ready = self._ready
        if ready is not None and ready[0] is slots and ready[1] is signals:
            pairs = ready[2]
        else:
            found = self._distinct_pairs(slots, signals)
            if found is None:
                return None
            pairs = found
            quality_of = self._quality_of_array[signals]
            checks = np.where(quality_of >= 0, slots * len(self.quality_signals) + quality_of, -1)
            self._ready = (slots, signals, pairs, checks)
        if not np.isfinite(values).all():
            return None
        newest = _flat(self._arrays["newest"])[pairs]
        if not (np.isnan(newest) | (newest < time_s)).all():
            return None  # duplicates and older samples: as add decides, one by one
        last = self._arrays["last_index"][slots]
        cell = _first_index(time_s, period)
        return pairs if bool(((last == _OPEN) | (cell > last)).all()) else None

    def _distinct_pairs(
        self, slots: NDArray[np.intp], signals: NDArray[np.intp]
    ) -> NDArray[np.intp] | None:
        """Flat positions of (slot, signal) pairs of slots in use and numeric signals, each once.

        None if a slot or signal is out of range or not in use, a signal is
        the mode signal, or a pair comes twice.
        """
        n_signals = len(self.signals)
        if (
            slots.min() < 0
            or slots.max() >= self._capacity
            or signals.min() < 0
            or signals.max() >= n_signals
            or (self._mode_index >= 0 and bool((signals == self._mode_index).any()))
            or not self._arrays["in_use"][slots].all()
        ):
            return None
        pairs = slots * n_signals + signals
        ordered = np.sort(pairs)
        if bool((ordered[1:] == ordered[:-1]).any()):  # a pair twice
            return None
        return pairs

    def _hold_many(
        self,
        pairs: NDArray[np.intp],
        slots: NDArray[np.intp],
        signals: NDArray[np.intp],
        time_s: float,
        values: NDArray[np.float64],
        cell: int,
    ) -> None:
        """Hold usable samples newer than all held for their pairs (_take, on arrays).

        ``pairs`` are the flat (slot, signal) positions of ``slots`` and ``signals``.
        """
        period = self.config.sample_period_s
        times = self._arrays["time"]
        held = times.reshape(-1, self.cells)[pairs]  # (k, cells)
        same_cell = ((cell - 1) * period < held) & (held <= cell * period)
        empty = np.isnan(held)
        last_col = self.cells - 1
        # _take keeps the last matching entry of each kind
        same = np.where(same_cell.any(axis=1), last_col - np.argmax(same_cell[:, ::-1], axis=1), -1)
        free = np.where(empty.any(axis=1), last_col - np.argmax(empty[:, ::-1], axis=1), -1)
        crowded = (same < 0) & (empty.sum(axis=1) <= 1)
        if crowded.any():
            self.crowded.update(
                zip(slots[crowded].tolist(), signals[crowded].tolist(), strict=True)
            )
        target = np.where(same >= 0, same, free)
        overflow = target < 0
        if overflow.any():  # every entry holds an older cell: the oldest goes
            np.add.at(self._arrays["counts"][:, self._column["overflow"]], slots[overflow], 1)
            target[overflow] = np.argmin(held[overflow], axis=1)
        at = pairs * self.cells + target
        _flat(times)[at] = time_s
        _flat(self._arrays["value"])[at] = values

    def _check_many(
        self,
        slots: NDArray[np.intp],
        qs: NDArray[np.intp],
        time_s: float,
        values: NDArray[np.float64],
        last: NDArray[np.float64],
    ) -> None:
        """:meth:`_check_quality` for samples of distinct pairs at one time, on arrays."""
        a = self._arrays
        expected, gap_factor, epsilon = self._quality_table[:, qs]
        at = slots * len(self.quality_signals) + qs  # flat (slot, checked signal) positions
        gap_counts, gap_totals = _flat(a["gap_count"]), _flat(a["gap_total_s"])
        run_mins, run_maxs = _flat(a["run_min"]), _flat(a["run_max"])
        moveds, run_starts = _flat(a["has_moved"]), _flat(a["run_start_s"])
        first = np.isnan(last)
        interval = np.where(first, 0.0, time_s - last)
        periods = interval / expected
        gap = periods > gap_factor
        gap_count = gap_counts[at] + gap
        old_total = gap_totals[at]
        gap_total = np.where(gap, old_total + interval, old_total)
        gap_counts[at] = gap_count
        gap_totals[at] = gap_total
        low = np.where(first, values, np.minimum(run_mins[at], values))
        high = np.where(first, values, np.maximum(run_maxs[at], values))
        restart = ~first & (high - low > epsilon)
        moved = moveds[at] | restart
        moveds[at] = moved
        run_start = np.where(first | restart, time_s, run_starts[at])
        low = np.where(restart, values, low)
        high = np.where(restart, values, high)
        run_starts[at] = run_start
        run_mins[at] = low
        run_maxs[at] = high
        block = np.empty((slots.shape[0], _CHECK_FIELDS))
        for j, column in enumerate(
            (slots, qs, values, interval, periods, gap, time_s - run_start, high - low, moved,
             gap_count, gap_total)
        ):  # fmt: skip
            block[:, j] = column
        self._pending.frombytes(block.tobytes())

    def _signal(self, signal: int) -> int:
        index = _index_argument("signal", signal)
        if not 0 <= index < len(self.signals):
            raise IndexError(
                f"signal {index} is out of range: the class has {len(self.signals)} signals "
                f"{list(self.signals)}"
            )
        return index

    def _take(
        self, slot: int, signal: int, time_s: float, value: float | str, usable: bool
    ) -> IntakeOutcome:
        label: str | None = None
        number = math.nan
        if signal == self._mode_index:
            if not isinstance(value, str) and not math.isfinite(value):
                return "non_finite"
            label = _mode_label(value)
        else:
            if isinstance(value, str):
                return "not_numeric"
            if not math.isfinite(value):
                return "non_finite"
            number = float(value)
        if not math.isfinite(time_s):
            return "non_finite"
        time_s = float(time_s)
        period = self.config.sample_period_s
        if abs(time_s) > _GRID_LIMIT * period:
            return "time_out_of_range"
        flat = self._flat
        pair = slot * len(self.signals) + signal  # flat index of (slot, signal)
        newest: float = flat["newest"][pair]
        first_cell = pair * self.cells
        held: list[float] = flat["time"][first_cell : first_cell + self.cells].tolist()
        if time_s == newest or time_s in held:
            return "duplicate"
        cell = _first_index(time_s, period)
        last: int = flat["last_index"][slot]
        if last != _OPEN and cell <= last:
            return "late"
        top = cell * period
        # Held only if it can fill a grid point: its own (t_cell) within staleness.
        if usable and top <= time_s + self.config.staleness_s:
            bottom = (cell - 1) * period
            same = free = -1  # held sample of the same cell; a free (NaN) entry
            for j, t in enumerate(held):
                if bottom < t <= top:
                    same = j
                elif t != t:
                    free = j
            if same >= 0 and held[same] > time_s:
                return "superseded"
            if label is not None:
                code = self._codes.get(label)
                if code is None:
                    if len(self._labels) >= self.max_mode_labels:
                        return "mode_label_limit"
                    code = self._codes[label] = len(self._labels)
                    self._labels.append(label)
                number = float(code)
            target = same if same >= 0 else free
            if same < 0 and sum(1 for t in held if t != t) <= 1:
                # No free cell left after this one: the caller should advance
                # before another cell opens, or the oldest would be dropped.
                self.crowded.add((slot, signal))
            if target < 0:
                # More open cells than ``cells``: the oldest goes, possibly the new one.
                flat["counts"][slot * self._n_counts + self._column["overflow"]] += 1
                oldest = min(range(self.cells), key=held.__getitem__)
                target = oldest if held[oldest] < time_s else -1
            if target >= 0:
                flat["time"][first_cell + target] = time_s
                flat["value"][first_cell + target] = number
        if last == _OPEN and cell < flat["first_index"][slot]:
            flat["first_index"][slot] = cell
        if not time_s < newest:  # the newest accepted time (NaN before the first)
            flat["newest"][pair] = time_s
            check = self._quality_of[signal]
            if check >= 0:
                self._check_quality(
                    slot * len(self.quality_signals) + check, time_s, number, newest
                )
        return "accepted" if usable else "out_of_range"

    def _check_quality(self, pair: int, time_s: float, value: float, last: float) -> None:
        """:meth:`SignalQuality.update` on the arrays: same operations, same order.

        ``pair`` is the flat index of (slot, checked signal).
        """
        slot, q = divmod(pair, len(self.quality_signals))
        config = self._quality_configs[q]
        flat = self._flat
        first = last != last  # NaN: no sample before
        interval = 0.0 if first else time_s - last
        periods = interval / config.expected_period_s
        gap = periods > config.gap_factor
        gap_count: int = flat["gap_count"][pair]
        gap_total: float = flat["gap_total_s"][pair]
        if gap:
            gap_count += 1
            gap_total += interval
            flat["gap_count"][pair] = gap_count
            flat["gap_total_s"][pair] = gap_total
        moved: bool = flat["has_moved"][pair]
        if first:
            run_start, low, high = time_s, value, value
        else:
            run_start = flat["run_start_s"][pair]
            low = min(flat["run_min"][pair], value)
            high = max(flat["run_max"][pair], value)
            if high - low > config.stuck_epsilon:
                moved = flat["has_moved"][pair] = True
                run_start, low, high = time_s, value, value
        flat["run_start_s"][pair] = run_start
        flat["run_min"][pair] = low
        flat["run_max"][pair] = high
        self._pending.extend(
            (slot, q, value, interval, periods, gap, time_s - run_start, high - low, moved)
        )
        self._pending.extend((gap_count, gap_total))

    def take_quality(self, needed: Needed | None = None) -> list[tuple[int, Evidence]]:
        """Return the data-quality evidence of the samples added since the last take.

        Parameters
        ----------
        needed : callable, optional
            ``needed(slots, qs)`` for the checks (slot, quality signal
            index, as arrays) in which nothing alarms: whether each one's
            evidence is wanted anyway (its alert is raised or has alarms
            pending). False skips building the three Evidence objects, the
            bulk of the cost; a quiet evaluation of a quiet alert changes
            nothing. None builds all.

        Returns
        -------
        list of (int, Evidence)
            Slot and evidence, in the order of the :meth:`add` calls; for each
            checked sample the three :class:`Evidence` of
            :meth:`SignalQuality.update` (``out_of_range``, ``stuck``,
            ``gap``), with the same fields and values. Untaken evidence is not
            part of :meth:`to_state`: take it before a checkpoint.
        """
        pending = self._pending
        if needed is not None and len(pending) == _CHECK_FIELDS:
            # one check (a live message): the same test on Python numbers, no arrays
            self._pending = array("d")
            return self._take_one(pending.tolist(), needed)
        table = np.frombuffer(pending, dtype=np.float64).reshape(-1, _CHECK_FIELDS)
        self._pending = array("d")
        if not table.shape[0]:
            return []
        keep = np.ones(table.shape[0], dtype=np.bool_)
        if needed is not None:
            q_all = table[:, 1].astype(np.intp)
            value, flat_s = table[:, 2], table[:, 6]
            low, high, window = self._range_table[:, q_all]
            quiet = (
                (table[:, 5] == 0.0)
                & (low <= value)
                & (value <= high)
                & ~((table[:, 8] == 1.0) & (flat_s >= window))
            )
            if quiet.any():
                keep[quiet] = needed(table[quiet, 0].astype(np.intp), q_all[quiet])
        return self._evidence(table[keep].tolist())

    def _take_one(self, row: list[float], needed: Needed) -> list[tuple[int, Evidence]]:
        """:meth:`take_quality` of one pending check, its quiet test on Python numbers."""
        q = int(row[1])
        minimum, maximum, window_s = self._range_rows[q]
        gap, value, flat_s, moved = row[5], row[2], row[6], row[8]
        quiet = (
            gap == 0.0 and minimum <= value <= maximum and not (moved == 1.0 and flat_s >= window_s)
        )
        if quiet and not needed(np.array([int(row[0])]), np.array([q]))[0]:
            return []
        return self._evidence([row])

    def _evidence(self, rows: list[list[float]]) -> list[tuple[int, Evidence]]:
        """Build the three Evidence of each pending check (a row of _CHECK_FIELDS numbers)."""
        out: list[tuple[int, Evidence]] = []
        for row in rows:
            slot_f, q_f, value, interval, periods, gap_f, flat_s, spread, moved_f, count, total = (
                row
            )
            slot, q, gap, moved = int(slot_f), int(q_f), gap_f == 1.0, moved_f == 1.0
            config = self._quality_configs[q]
            signal = self.quality_signals[q]
            if value < config.minimum:
                side, limit, outside = "low", config.minimum, True
            elif value > config.maximum:
                side, limit, outside = "high", config.maximum, True
            else:
                side, limit, outside = "", config.maximum, False
            range_values = {"value": value}
            if math.isfinite(config.minimum):
                range_values["minimum"] = config.minimum
            if math.isfinite(config.maximum):
                range_values["maximum"] = config.maximum
            out += [
                (
                    slot,
                    Evidence(
                        detector="out_of_range",
                        family="data_quality",
                        statistic=value,
                        threshold=limit,
                        alarm=outside,
                        signal=signal,
                        values=range_values,
                        detail=side,
                    ),
                ),
                (
                    slot,
                    Evidence(
                        detector="stuck",
                        family="data_quality",
                        statistic=flat_s,
                        threshold=config.stuck_window_s,
                        alarm=moved and flat_s >= config.stuck_window_s,
                        signal=signal,
                        values={"flat_s": flat_s, "range": spread},
                        detail="stuck",
                    ),
                ),
                (
                    slot,
                    Evidence(
                        detector="gap",
                        family="data_quality",
                        statistic=periods,
                        threshold=config.gap_factor,
                        alarm=gap,
                        signal=signal,
                        values={
                            "interval_s": interval,
                            "gap_count": count,
                            "gap_total_s": total,
                        },
                        detail="gap",
                    ),
                ),
            ]
        return out

    # -------------------------------------------------------------- advance

    def advance(self, now_s: float | NDArray[np.float64]) -> RowBatch:
        """Close every grid point up to ``now_s - lateness_s`` for every asset at once.

        Per asset exactly as :meth:`Aligner.advance`: the first grid point
        considered is the one after the last closed point or, before any was
        closed, the first at or after the earliest accepted sample; an asset
        without either is left alone.

        Parameters
        ----------
        now_s : float or ndarray of shape (capacity,)
            Current time, epoch seconds: one for every asset, or one per
            slot (each asset's own clock; ``-inf`` leaves a slot alone).

        Returns
        -------
        RowBatch
            The rows of the newly closed complete grid points, ordered by
            (time, slot).

        Raises
        ------
        ValueError
            If ``now_s`` is not finite or more than ``2**50`` sample periods
            from the epoch.
        """
        period = self.config.sample_period_s
        arrays = self._arrays
        last = arrays["last_index"]
        if np.ndim(now_s) == 0:
            if not math.isfinite(float(now_s)) or abs(float(now_s)) > _GRID_LIMIT * period:
                raise ValueError(
                    f"now_s must be a finite time within 2**50 sample periods of the epoch, "
                    f"got {now_s!r}"
                )
        now = np.broadcast_to(np.asarray(now_s, dtype=np.float64), last.shape)
        if now.shape != last.shape:
            raise ValueError(f"now_s must be a float or have shape {last.shape}, got {now.shape}")
        known = np.isfinite(now)
        if np.any(np.abs(now[known]) > _GRID_LIMIT * period) or np.isnan(now).any():
            raise ValueError(
                "now_s must hold times within 2**50 sample periods of the epoch, or -inf"
            )
        if self.crowded:  # every slot given a limit has had its chance
            self.crowded = {pair for pair in self.crowded if not known[pair[0]]}
        end_all = np.full(last.shape, np.iinfo(np.int64).min // 2, dtype=np.int64)
        end_all[known] = _last_indices(now[known] - self.config.lateness_s, period)
        start_all = np.where(last != _OPEN, last + 1, arrays["first_index"])
        due = np.flatnonzero(arrays["in_use"] & known & (start_all <= end_all))
        if due.size == 0:
            return self._rows(
                np.empty(0, np.intp), np.empty(0, np.float64), np.empty((0, len(self.signals)))
            )
        start = start_all[due]
        end = end_all[due]
        n_signals = len(self.signals)

        # Held samples per (asset, signal) in time order; empty cells (NaN) last.
        times = arrays["time"][due]
        order = np.argsort(times, axis=2)
        times = np.take_along_axis(times, order, axis=2)
        values = np.take_along_axis(arrays["value"][due], order, axis=2)
        held = ~np.isnan(times)
        cell = np.full(times.shape, _EMPTY, dtype=np.int64)
        fresh_to = np.full(times.shape, _OPEN, dtype=np.int64)
        cell[held] = _first_indices(times[held], period)
        fresh_to[held] = _last_indices(times[held] + self.config.staleness_s, period)

        # Sample j of a signal is the latest at grid points cell[j] .. cell[j+1]-1 and
        # fills them up to fresh_to[j]: a piece [lo, hi] of that signal's available points.
        next_cell = np.full(times.shape, _EMPTY, dtype=np.int64)
        next_cell[..., :-1] = cell[..., 1:]
        lo = np.maximum(cell, start[:, None, None])
        hi = np.minimum(np.minimum(fresh_to, next_cell - 1), end[:, None, None])
        piece = held & (lo <= hi)
        lo, hi = np.where(piece, lo, 0), np.where(piece, hi, -1)  # no piece: empty, no overflow
        covered = (hi - lo + 1).sum(axis=2)
        span = end - start + 1

        # Complete grid points: where the pieces of all signals overlap. Sweep the
        # piece bounds of each asset; between bounds, coverage == n_signals means complete.
        n = due.size
        bounds = np.concatenate([lo.reshape(n, -1), (hi + 1).reshape(n, -1)], axis=1)
        flat = piece.reshape(n, -1)
        step = np.concatenate([flat, flat], axis=1).astype(np.int64)
        step[:, flat.shape[1] :] *= -1
        bounds = np.where(step != 0, bounds, end[:, None] + 2)
        sweep = np.argsort(bounds, axis=1, kind="stable")
        bounds = np.take_along_axis(bounds, sweep, axis=1)
        coverage = np.cumsum(np.take_along_axis(step, sweep, axis=1), axis=1)
        length = np.diff(bounds, axis=1)
        asset, at = np.nonzero((coverage[:, :-1] == n_signals) & (length > 0))
        first = bounds[asset, at]
        count = length[asset, at]

        # Values of each complete stretch: per signal, the latest held sample at its start.
        latest = (held[asset] & (cell[asset] <= first[:, None, None])).sum(axis=2) - 1
        stretch_values = np.take_along_axis(values[asset], latest[..., None], axis=2)[..., 0]
        total = int(count.sum())
        offset = np.arange(total) - np.repeat(np.cumsum(count) - count, count)
        index = np.repeat(first, count) + offset
        row_asset = np.repeat(asset, count)
        slots = due[row_asset]
        time_s = index.astype(np.float64) * period
        batch = self._rows(
            slots, time_s, np.repeat(stretch_values, count, axis=0), int(span.sum()) - total
        )

        rows = np.zeros(n, dtype=np.int64)
        np.add.at(rows, asset, count)
        counts = arrays["counts"]
        counts[due, self._column["rows"]] += rows
        counts[due, self._column["incomplete"]] += span - rows
        missing = [self._column[f"incomplete_{name}"] for name in self.signals]
        counts[due[:, None], missing] += span[:, None] - covered
        last[due] = end

        # Drop what no grid point after ``end`` can use: of the cells at or before it,
        # all but the newest, and that one too once stale.
        closed = held & (cell <= end[:, None, None])
        newest_closed = np.where(closed, times, -np.inf).max(axis=2, keepdims=True)
        keep = held & (~closed | ((times == newest_closed) & (fresh_to > end[:, None, None])))
        arrays["time"][due] = np.where(keep, times, np.nan)
        arrays["value"][due] = np.where(keep, values, np.nan)
        return batch

    def _rows(
        self,
        slots: NDArray[np.intp],
        time_s: NDArray[np.float64],
        values: NDArray[np.float64],
        skipped: int = 0,
    ) -> RowBatch:
        """Flag restarts, update each asset's last row time and order rows by (time, slot).

        ``slots``/``time_s``/``values`` come grouped by asset, each in time order.
        """
        last_row = self._arrays["last_row_s"]
        previous = np.empty_like(time_s)
        previous[1:] = time_s[:-1]
        first_of_asset = np.ones(slots.shape, dtype=np.bool_)
        first_of_asset[1:] = slots[1:] != slots[:-1]
        previous[first_of_asset] = last_row[slots[first_of_asset]]
        restart = time_s - previous > self.config.gap_restart_s  # False after NaN
        last_of_asset = np.ones(slots.shape, dtype=np.bool_)
        last_of_asset[:-1] = first_of_asset[1:]
        last_row[slots[last_of_asset]] = time_s[last_of_asset]
        order = np.lexsort((slots, time_s))
        n_inputs = len(self.config.inputs)
        if self._mode_index >= 0:
            mode = values[order, self._mode_index].astype(np.int16)
        else:
            mode = np.full(order.shape, -1, dtype=np.int16)
        return RowBatch(
            slots=slots[order].astype(np.intp),
            time_s=time_s[order],
            y=values[order, 0],
            u=values[order, 1 : 1 + n_inputs],
            mode=mode,
            restart=restart[order],
            skipped=skipped,
        )

    # ---------------------------------------------------------------- stale

    def stale(self, now_s: float, needed: Needed | None = None) -> list[tuple[int, Evidence]]:
        """Stale check (:meth:`SignalQuality.check`) of every asset and checked signal.

        All pairs are evaluated (and, before their first sample, start their
        age count here), but :class:`Evidence` is built only for the pairs
        that alarm now, for those whose previous evaluation alarmed (the
        evaluation that ends an alarm), and for quiet ones that ``needed``
        asks for. A pair quiet now and at its previous evaluation gives
        nothing otherwise.

        Parameters
        ----------
        now_s : float
            Current time, epoch seconds.
        needed : callable, optional
            ``needed(slots, qs)`` for the pairs quiet now and at their
            previous evaluation: whether their evidence is wanted anyway, as in
            :meth:`take_quality`. An alert lifecycle clears only after
            several quiet evaluations in a row, so a raised stale alert needs
            them all, not only the first.

        Returns
        -------
        list of (int, Evidence)
            Slot and ``stale`` evidence, by slot then signal order.

        Raises
        ------
        ValueError
            If ``now_s`` is not finite.
        """
        if not math.isfinite(now_s):
            raise ValueError(f"now_s must be finite, got {now_s!r}")
        arrays = self._arrays
        if self._in_use is None:
            used = np.flatnonzero(arrays["in_use"])
            at = used[:, None] * len(self.signals) + self._quality_columns[None, :]
            self._in_use = (used, at)
        slots, newest_at = self._in_use
        if slots.size == 0 or not self.quality_signals:
            return []
        last = _flat(arrays["newest"])[newest_at]  # (slots, checked signals)
        no_sample = np.isnan(last)
        reference = last
        if no_sample.any():  # their age counts from their first check
            first_check = arrays["first_check_s"][slots]
            first_check = np.where(no_sample & np.isnan(first_check), now_s, first_check)
            arrays["first_check_s"][slots] = first_check
            reference = np.where(no_sample, first_check, last)
        age = np.maximum(0.0, now_s - reference)
        alarm = age > self._stale_after
        report = alarm | arrays["stale_alarm"][slots]
        arrays["stale_alarm"][slots] = alarm
        if needed is not None and not report.all():
            rows, qs = np.nonzero(~report)
            report[rows, qs] = needed(slots[rows], qs)
        out: list[tuple[int, Evidence]] = []
        for row, q in zip(*np.nonzero(report), strict=True):
            values: dict[str, float] = {}
            if not no_sample[row, q]:
                values["last_sample_s"] = float(reference[row, q])
            values["age_s"] = float(age[row, q])
            evidence = Evidence(
                detector="stale",
                family="data_quality",
                statistic=float(age[row, q]),
                threshold=self._quality_configs[q].stale_after_s,
                alarm=bool(alarm[row, q]),
                signal=self.quality_signals[q],
                values=values,
                detail="stale",
            )
            out.append((int(slots[row]), evidence))
        return out

    # ------------------------------------------------------ labels, counts

    def mode_label(self, code: int) -> str:
        """Return the text of mode label ``code`` (as in :attr:`RowBatch.mode`).

        Raises
        ------
        IndexError
            If no label has that code.
        """
        index = _index_argument("code", code)
        if not 0 <= index < len(self._labels):
            raise IndexError(f"mode label code {index} is unknown: {len(self._labels)} are coded")
        return self._labels[index]

    def _tally(self, counts: NDArray[np.int64]) -> dict[str, int]:
        values = dict(zip(self._count_keys, counts.tolist(), strict=True))
        # Signals come as indices, checked on entry: nothing is ever an unknown signal.
        return {"unknown_signal": 0, **values}

    def counts(self) -> dict[str, int]:
        """Return the tallies summed over the assets in use.

        Returns
        -------
        dict of str to int
            The keys of :meth:`Aligner.counts` (``unknown_signal`` always 0),
            one per :data:`IntakeOutcome`, and ``overflow``: open cells
            dropped because a signal had more than ``cells``.
        """
        arrays = self._arrays
        return self._tally(arrays["counts"][arrays["in_use"]].sum(axis=0))

    def asset_counts(self, slot: int) -> dict[str, int]:
        """Return the tallies of one asset, keys as :meth:`counts`.

        Raises
        ------
        IndexError, ValueError, TypeError
            As :meth:`add` for a bad slot.
        """
        return self._tally(self._arrays["counts"][self._slot(slot)])

    def memory_bytes(self) -> int:
        """Return the bytes held by the state arrays (all allocated slots)."""
        return sum(array.nbytes for array in self._arrays.values())

    # ----------------------------------------------------------- checkpoint

    def _meta(self) -> dict[str, Any]:
        return {
            "format": _FORMAT,
            "version": _STATE_VERSION,
            "sample_period_s": self.config.sample_period_s,
            "signals": list(self.signals),
            "quality_signals": list(self.quality_signals),
            "cells": self.cells,
            "count_keys": list(self._count_keys),
        }

    def to_state(self) -> dict[str, Any]:
        """Return the bank's state for a checkpoint.

        Returns
        -------
        dict
            ``"arrays"``: name -> numeric ndarray (copies, no object dtype),
            ready for :func:`numpy.savez`; ``"meta"``: JSON-safe dict with the
            format, version, structure and the mode label table. Untaken
            quality evidence is not included.
        """
        meta = self._meta()
        meta["mode_labels"] = list(self._labels)
        # up to the last slot in use: idle capacity is not saved, so a restored
        # bank holds only what its assets need
        used = np.flatnonzero(self._arrays["in_use"])
        keep = int(used[-1]) + 1 if used.size else 1
        return {
            "arrays": {name: array[:keep].copy() for name, array in self._arrays.items()},
            "meta": meta,
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Restore a state saved by :meth:`to_state` under the same structure.

        Timing and quality thresholds may differ from the saving bank's (as
        for the references); the version, sample period, signals, checked
        signals and counters must match. A different number of cells (a new
        ``lateness_s``, see :func:`cells_for`) is fine: each signal keeps its
        newest held samples, as many as fit. Untaken evidence is dropped.

        Parameters
        ----------
        state : mapping
            ``{"arrays": ..., "meta": ...}`` as :meth:`to_state` returns,
            possibly through :func:`numpy.savez` and JSON.

        Raises
        ------
        ValueError
            If the state is malformed or saved under another structure; the
            message names the entry, the value found and what was expected.
            The bank is unchanged.
        """
        if not isinstance(state, Mapping) or set(state) != {"arrays", "meta"}:
            found = sorted(state) if isinstance(state, Mapping) else type(state).__name__
            raise ValueError(f"intake state must have keys ['arrays', 'meta'], got {found}")
        meta, saved = state["meta"], state["arrays"]
        if not isinstance(meta, Mapping) or not isinstance(saved, Mapping):
            raise ValueError("intake state 'meta' and 'arrays' must be mappings")
        expected = self._meta()
        saved_cells = meta.get("cells")
        if isinstance(saved_cells, bool) or not isinstance(saved_cells, int) or saved_cells < 2:
            raise ValueError(f"intake state cells must be an integer >= 2, got {saved_cells!r}")
        for key in expected:
            if key != "cells" and meta.get(key) != expected[key]:
                raise ValueError(
                    f"intake state {key} is {meta.get(key)!r}, the bank has {expected[key]!r}"
                )
        labels = meta.get("mode_labels")
        if (
            not isinstance(labels, list)
            or not all(isinstance(label, str) for label in labels)
            or len(set(labels)) != len(labels)
            or len(labels) > self.max_mode_labels
        ):
            raise ValueError(
                f"intake state mode_labels must be at most {self.max_mode_labels} distinct "
                f"strings, got {labels!r}"
            )
        if set(saved) != set(_LAYOUT):
            raise ValueError(f"intake state arrays must be {sorted(_LAYOUT)}, got {sorted(saved)}")
        in_use = np.asarray(saved["in_use"])
        capacity = int(in_use.shape[0]) if in_use.ndim == 1 else 0
        if capacity < 1:
            raise ValueError(
                f"intake state in_use must have shape (slots >= 1,), got {in_use.shape}"
            )
        arrays: dict[str, NDArray[Any]] = {}
        for name, (dtype, axes, _) in _LAYOUT.items():
            loaded = np.asarray(saved[name])
            shape = self._shape(capacity, axes)
            if "cell" in axes:
                shape = (*shape[:-1], saved_cells)
            if loaded.shape != shape or loaded.dtype != np.dtype(dtype):
                raise ValueError(
                    f"intake state array {name!r} has shape {loaded.shape} and dtype "
                    f"{loaded.dtype}; expected {shape} of {np.dtype(dtype)}"
                )
            arrays[name] = loaded.copy()
        if self._mode_index >= 0:
            mode = self._mode_index
            codes = arrays["value"][:, mode][~np.isnan(arrays["time"][:, mode])]
            if not np.all((codes >= 0) & (codes < len(labels)) & (codes == np.round(codes))):
                raise ValueError(
                    f"intake state holds mode codes outside the {len(labels)} saved labels"
                )
        if saved_cells != self.cells:
            arrays["time"], arrays["value"] = _repacked(arrays["time"], arrays["value"], self.cells)
        self._set_arrays(arrays)
        # a signal with no free cell must be advanced before its next new cell
        full = (~np.isnan(arrays["time"])).all(axis=2) & arrays["in_use"][:, None]
        self.crowded = {(int(a), int(b)) for a, b in zip(*np.nonzero(full), strict=True)}
        self._labels = list(labels)
        self._codes = {label: code for code, label in enumerate(labels)}
        self._pending = array("d")
