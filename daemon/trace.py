"""What a fleet monitor computed, row by row, kept for the replay report's plots.

A :class:`FleetTrace` assigned to :attr:`FleetMonitor.trace
<arxwatch.daemon.fleet.FleetMonitor.trace>` receives, for every row the
fleet judges, the measured output, the baseline model's one-step prediction,
the normalised innovation and both sides of the CUSUM; and for every
evaluation of the parameter-based detectors (at the first row of each
``evaluate_every`` sample periods, once settled) the live physical
read-out (gains, time constant, dead times, offset), the baseline's values
and band limits, and
the Wald distance of the read-out from the baseline with its limit. It only
reads what the fleet computed anyway: the fleet's results are the same with
or without a trace (``tests/unit/test_trace.py``).

Memory is bounded. Rows are stored per asset in two-dimensional numpy
arrays (asset, row), times as float64 and everything else as float32 (28
bytes a row); no Python object is made per row. When the arrays would
outgrow ``max_bytes``, every asset's rows are thinned by merging pairs, and
from then on each stored row stands for twice as many judged rows
(:attr:`FleetTrace.every`): the last row's output, prediction and time, the
largest CUSUM values and the innovation of largest magnitude, so an alarm
level reached by the CUSUM or a spike of the innovation is never lost.
Evaluations are thinned the same way in their own share of the budget,
keeping the last read-out and the largest Wald distance.
``every`` can also be set from the start. A month of 60 s rows of 200 assets
(8.6 million rows, 240 MB at full resolution) fits the default 128 MiB at
one row kept in two or four, still ten thousand points per asset, more than
a plot can show.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Literal

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.alert import SignalNames

if TYPE_CHECKING:
    from arxwatch.daemon.fleet import FleetMonitor
    from arxwatch.daemon.pipeline import Pipeline

__all__ = [
    "DEFAULT_MAX_BYTES",
    "FleetTrace",
    "TraceEvaluations",
    "TraceRows",
    "attach_traces",
    "readout_features",
]

#: Default memory budget of one trace (rows and evaluations together).
DEFAULT_MAX_BYTES = 128 * 2**20

#: Rows get this share of the budget, evaluations the rest.
_ROW_SHARE = 7 / 8
#: First row capacity per asset; capacities stay even (rows are merged in pairs).
_FIRST_CAPACITY = 64
_GROWTH = 1.5

Merge = Literal["last", "max", "maxabs"]
Float = NDArray[np.float64]


def readout_features(n_inputs: int) -> tuple[str, ...]:
    """Names of the read-out columns of a trace with ``n_inputs`` model inputs.

    Gains per input, the dominant time constant, dead times per input and the
    offset: every feature a physical band can watch (a model without a
    constant term has no offset; its column is ``nan``).

    Examples
    --------
    >>> readout_features(2)
    ('gain_1', 'gain_2', 'time_constant_s', 'dead_time_1_s', 'dead_time_2_s', 'offset')
    """
    return (
        *(f"gain_{i + 1}" for i in range(n_inputs)),
        "time_constant_s",
        *(f"dead_time_{i + 1}_s" for i in range(n_inputs)),
        "offset",
    )


@dataclass(frozen=True)
class _Column:
    """One stored quantity: its type, its width (0: one value a row) and how pairs merge."""

    dtype: type[np.generic]
    width: int
    merge: Merge


def _combine(kind: Merge, early: NDArray[Any], late: NDArray[Any]) -> NDArray[Any]:
    """Merge two consecutive stored rows of one column into one."""
    if kind == "last":
        return late
    if kind == "max":
        highest: NDArray[Any] = np.fmax(early, late)
        return highest
    take_late = np.isnan(early) | (np.abs(late) > np.abs(early))
    larger: NDArray[Any] = np.where(take_late, late, early)
    return larger


def _even(n: int) -> int:
    return n + (n & 1)


class _Store:
    """Rows of many assets in arrays of shape (asset, row[, width]), thinned within a budget."""

    def __init__(self, columns: Mapping[str, _Column], budget: int, every: int) -> None:
        self.columns = dict(columns)
        self.budget = budget
        self.every = every
        self.seen = 0
        self.capacity = 0
        self.count = np.zeros(0, dtype=np.int64)
        self.pending_count = np.zeros(0, dtype=np.int64)
        self.data: dict[str, NDArray[Any]] = {}
        self.pending: dict[str, NDArray[Any]] = {}
        self.row_bytes = sum(
            np.dtype(c.dtype).itemsize * max(c.width, 1) for c in self.columns.values()
        )
        self._allocate(0, 0)

    def _tail(self, name: str) -> tuple[int, ...]:
        width = self.columns[name].width
        return (width,) if width else ()

    def _allocate(self, assets: int, capacity: int) -> None:
        keep_a = min(assets, self.count.shape[0])
        keep_r = min(capacity, self.capacity)
        for name, column in self.columns.items():
            fill = np.nan if np.issubdtype(column.dtype, np.floating) else -1
            grown = np.full((assets, capacity, *self._tail(name)), fill, dtype=column.dtype)
            waiting = np.full((assets, *self._tail(name)), fill, dtype=column.dtype)
            if name in self.data:
                grown[:keep_a, :keep_r] = self.data[name][:keep_a, :keep_r]
                waiting[:keep_a] = self.pending[name][:keep_a]
            self.data[name] = grown
            self.pending[name] = waiting
        for attr in ("count", "pending_count"):
            old = getattr(self, attr)
            new = np.zeros(assets, dtype=np.int64)
            new[:keep_a] = old[:keep_a]
            setattr(self, attr, new)
        self.capacity = capacity

    @property
    def assets(self) -> int:
        return int(self.count.shape[0])

    def bytes_for(self, assets: int, capacity: int) -> int:
        """Bytes the arrays would take at this size."""
        return assets * (capacity + 1) * self.row_bytes + assets * 16

    def nbytes(self) -> int:
        arrays = [*self.data.values(), *self.pending.values(), self.count, self.pending_count]
        return sum(a.nbytes for a in arrays)

    def thin(self) -> None:
        """Merge every asset's stored rows in pairs; each row then stands for twice as many."""
        half = self.capacity // 2
        paired = (2 * np.arange(half) + 1)[None, :] < self.count[:, None]
        for name, column in self.columns.items():
            array = self.data[name]
            early, late = array[:, 0::2], array[:, 1::2]
            mask = paired.reshape(paired.shape + (1,) * (array.ndim - 2))
            array[:, :half] = np.where(mask, _combine(column.merge, early, late), early)
        self.count = (self.count + 1) // 2
        self.every *= 2

    def ensure_assets(self, needed: int) -> None:
        """Make room for asset indices below ``needed``, thinning to stay within the budget."""
        if needed <= self.assets:
            return
        assets = max(needed, int(self.assets * _GROWTH) + 8)
        capacity = self.capacity
        while capacity > 2 and self.bytes_for(assets, capacity) > self.budget:
            self.thin()
            capacity = max(2, _even(capacity // 2))
        self._allocate(assets, capacity)

    def _grow_rows(self) -> None:
        """Make room for one more row of every asset: more capacity, or thinning."""
        capacity = _even(max(_FIRST_CAPACITY, int(self.capacity * _GROWTH)))
        if self.bytes_for(self.assets, capacity) > self.budget:
            # the most rows the budget allows (at least two: a pair to merge)
            fits = (self.budget - 16 * self.assets) // (self.assets * self.row_bytes) - 1
            capacity = max(2, fits - (fits & 1))
        if capacity > self.capacity:
            self._allocate(self.assets, capacity)
        else:
            self.thin()

    def _write(self, index: NDArray[np.intp], values: Mapping[str, NDArray[Any]]) -> None:
        if int(self.count[index].max()) >= self.capacity:
            self._grow_rows()
        position = self.count[index]
        for name in self.columns:
            self.data[name][index, position] = values[name]
        self.count[index] = position + 1

    def add(self, index: NDArray[np.intp], values: Mapping[str, NDArray[Any]]) -> None:
        """Offer one row for each of ``index`` (distinct asset indices)."""
        if not index.shape[0]:
            return
        self.ensure_assets(int(index.max()) + 1)
        self.seen += int(index.shape[0])
        if self.every == 1:
            self._write(index, values)
            return
        count = self.pending_count[index]
        first = count == 0
        for name, column in self.columns.items():
            new = np.asarray(values[name], dtype=column.dtype)
            old = self.pending[name][index]
            mask = first.reshape(first.shape + (1,) * (new.ndim - 1))
            self.pending[name][index] = np.where(mask, new, _combine(column.merge, old, new))
        count = count + 1
        full = count >= self.every
        self.pending_count[index] = np.where(full, 0, count)
        if full.any():
            done = index[full]
            self._write(done, {name: self.pending[name][done] for name in self.columns})

    def series(self, asset: int, name: str) -> NDArray[Any]:
        """Return the stored rows of one asset and column, then the block still being merged."""
        if asset >= self.assets:
            return np.zeros((0, *self._tail(name)), dtype=self.columns[name].dtype)
        stored = self.data[name][asset, : int(self.count[asset])]
        if self.pending_count[asset] == 0:
            return stored.copy()
        return np.concatenate((stored, self.pending[name][asset][None]))


_ROW_COLUMNS = {
    "time_s": _Column(np.float64, 0, "last"),
    "output": _Column(np.float32, 0, "last"),
    "prediction": _Column(np.float32, 0, "last"),
    "innovation": _Column(np.float32, 0, "maxabs"),
    "cusum_high": _Column(np.float32, 0, "max"),
    "cusum_low": _Column(np.float32, 0, "max"),
}


def _evaluation_columns(width: int) -> dict[str, _Column]:
    return {
        "time_s": _Column(np.float64, 0, "last"),
        "mode": _Column(np.int16, 0, "last"),
        "distance": _Column(np.float32, 0, "max"),
        "distance_limit": _Column(np.float32, 0, "last"),
        "value": _Column(np.float32, width, "last"),
        "baseline": _Column(np.float32, width, "last"),
        "lower": _Column(np.float32, width, "last"),
        "upper": _Column(np.float32, width, "last"),
    }


@dataclass(frozen=True)
class TraceRows:
    """One asset's traced rows, in time order.

    Attributes
    ----------
    time_s : ndarray of float64, shape (k,)
        Sample times (epoch seconds).
    output : ndarray of float32, shape (k,)
        Measured output.
    prediction : ndarray of float32, shape (k,)
        One-step prediction of the baseline model (``nan`` until the model
        has its past samples, after a start, gap or mode switch).
    innovation : ndarray of float32, shape (k,)
        Normalised innovation: prediction error over its standard deviation,
        before winsorising (``nan`` where there is no prediction).
    cusum_high, cusum_low : ndarray of float32, shape (k,)
        Upward and downward CUSUM statistics, in innovation standard
        deviations (``nan`` while the prewhitening filter is learned).
    every : int
        Judged rows per stored row (1 unless thinned).
    """

    time_s: NDArray[np.float64]
    output: NDArray[np.float32]
    prediction: NDArray[np.float32]
    innovation: NDArray[np.float32]
    cusum_high: NDArray[np.float32]
    cusum_low: NDArray[np.float32]
    every: int

    def __len__(self) -> int:
        return int(self.time_s.shape[0])


@dataclass(frozen=True)
class TraceEvaluations:
    """One asset's traced evaluations of the parameter-based detectors, in time order.

    Attributes
    ----------
    time_s : ndarray of float64, shape (k,)
        Sample times of the evaluations.
    mode : tuple of (str or None)
        Operating mode of each evaluation.
    features : tuple of str
        Column names of the read-out arrays (:func:`readout_features`).
    value, baseline : ndarray of float32, shape (k, n_features)
        Live read-out and the baseline's (``nan`` where undefined).
    lower, upper : ndarray of float32, shape (k, n_features)
        Band limits: the live value alarms at or beyond them (``nan`` where
        the feature is not watched).
    distance, distance_limit : ndarray of float32, shape (k,)
        Wald distance of the read-out from the baseline, and its limit.
    every : int
        Evaluations per stored one (1 unless thinned).
    """

    time_s: NDArray[np.float64]
    mode: tuple[str | None, ...]
    features: tuple[str, ...]
    value: NDArray[np.float32]
    baseline: NDArray[np.float32]
    lower: NDArray[np.float32]
    upper: NDArray[np.float32]
    distance: NDArray[np.float32]
    distance_limit: NDArray[np.float32]
    every: int

    def __len__(self) -> int:
        return int(self.time_s.shape[0])


class FleetTrace:
    """Per-row and per-evaluation numbers of one fleet monitor, for plots.

    Assign it to a fleet (``fleet.trace = FleetTrace()``); the fleet binds it
    and calls :meth:`add_rows` and :meth:`add_evaluations`. One trace serves
    one fleet.

    Parameters
    ----------
    every : int
        Judged rows merged into one stored row from the start (1: keep all).
    max_bytes : int
        Memory budget of the stored numbers; rows are thinned to stay
        within it (see the module docstring).
    assets : collection of str, optional
        Trace only these assets; None traces every asset.

    Raises
    ------
    ValueError
        If ``every`` < 1 or ``max_bytes`` < 64 KiB.

    Examples
    --------
    >>> trace = FleetTrace(max_bytes=2**20)
    >>> trace.every, trace.rows_seen
    (1, 0)
    """

    def __init__(
        self,
        *,
        every: int = 1,
        max_bytes: int = DEFAULT_MAX_BYTES,
        assets: Collection[str] | None = None,
    ) -> None:
        if isinstance(every, bool) or not isinstance(every, int) or every < 1:
            raise ValueError(f"every must be an integer >= 1, got {every!r}")
        if isinstance(max_bytes, bool) or not isinstance(max_bytes, int) or max_bytes < 2**16:
            raise ValueError(f"max_bytes must be an integer >= 65536, got {max_bytes!r}")
        self.max_bytes = max_bytes
        self.only = None if assets is None else frozenset(assets)
        self._rows = _Store(_ROW_COLUMNS, int(max_bytes * _ROW_SHARE), every)
        self._evaluations: _Store | None = None
        self._fleet: FleetMonitor | None = None
        self.names: SignalNames | None = None
        self.features: tuple[str, ...] = ()
        self.cusum_threshold = float("nan")
        self._slot_index = np.zeros(0, dtype=np.int32)  # fleet slot -> asset index; -1, -2
        self._ids: list[str] = []
        self._index: dict[str, int] = {}

    # -- the fleet's side -----------------------------------------------------
    def bind(self, fleet: FleetMonitor) -> None:
        """Attach to ``fleet`` (done by assigning ``fleet.trace``).

        Raises
        ------
        ValueError
            If the trace already belongs to another fleet.
        """
        if self._fleet is not None and self._fleet is not fleet:
            raise ValueError("this trace already records another fleet monitor")
        self._fleet = fleet
        # slots are looked up again: a restored fleet may hold its assets elsewhere
        self._slot_index = np.zeros(0, dtype=np.int32)
        self.names = fleet.names
        self.features = readout_features(len(fleet.names.inputs))
        self.cusum_threshold = float(fleet.config.cusum.h)
        if self._evaluations is None:
            budget = self.max_bytes - self._rows.budget
            self._evaluations = _Store(_evaluation_columns(len(self.features)), budget, 1)

    def forget_slot(self, slot: int) -> None:
        """Note that the fleet freed ``slot``: a later asset there is another asset."""
        if slot < self._slot_index.shape[0]:
            self._slot_index[slot] = -1

    def _asset_index(self, slots: NDArray[Any]) -> NDArray[np.intp]:
        """Trace index of each fleet slot; -2 for assets not traced."""
        fleet = self._fleet
        if fleet is None:
            raise RuntimeError("assign the trace to a fleet monitor first (fleet.trace = trace)")
        size = int(slots.max()) + 1
        if size > self._slot_index.shape[0]:
            grown = np.full(max(size, 2 * self._slot_index.shape[0]), -1, dtype=np.int32)
            grown[: self._slot_index.shape[0]] = self._slot_index
            self._slot_index = grown
        index: NDArray[np.intp] = self._slot_index[slots].astype(np.intp)
        if (index == -1).any():
            for slot in np.unique(slots[index == -1]).tolist():
                asset = fleet.asset_at(int(slot))
                if self.only is not None and asset not in self.only:
                    self._slot_index[slot] = -2
                    continue
                known = self._index.get(asset)
                if known is None:
                    known = self._index[asset] = len(self._ids)
                    self._ids.append(asset)
                self._slot_index[slot] = known
            index = self._slot_index[slots].astype(np.intp)
        return index

    def add_rows(
        self,
        slots: NDArray[Any],
        time_s: Float,
        output: Float,
        prediction: Float,
        innovation: Float,
        cusum_high: Float,
        cusum_low: Float,
    ) -> None:
        """Record one judged row for each of ``slots`` (distinct fleet slots), shape (k,)."""
        values = {
            "time_s": time_s,
            "output": output,
            "prediction": prediction,
            "innovation": innovation,
            "cusum_high": cusum_high,
            "cusum_low": cusum_low,
        }
        self._offer(self._rows, slots, values)

    def add_evaluations(
        self,
        slots: NDArray[Any],
        modes: NDArray[Any],
        time_s: Float,
        value: Float,
        baseline: Float,
        lower: Float,
        upper: Float,
        distance: Float,
        distance_limit: Float,
    ) -> None:
        """Record one evaluation for each of ``slots``; read-outs of shape (k, n_features).

        ``modes`` are the fleet's mode codes (:attr:`FleetMonitor.mode_labels`).
        """
        if self._evaluations is None:
            return
        values = {
            "time_s": time_s,
            "mode": modes,
            "value": value,
            "baseline": baseline,
            "lower": lower,
            "upper": upper,
            "distance": distance,
            "distance_limit": distance_limit,
        }
        self._offer(self._evaluations, slots, values)

    def _offer(self, store: _Store, slots: NDArray[Any], values: dict[str, NDArray[Any]]) -> None:
        """Hand ``store`` the rows of the traced assets among ``slots``."""
        if not slots.shape[0]:
            return
        index = self._asset_index(slots)
        keep = index >= 0
        if not keep.all():
            values = {name: v[keep] for name, v in values.items()}
        store.add(index[keep], values)

    # -- reading --------------------------------------------------------------
    def assets(self) -> tuple[str, ...]:
        """Return the traced assets, in the order they were first judged."""
        return tuple(self._ids)

    def __contains__(self, asset: object) -> bool:
        return asset in self._index

    @property
    def every(self) -> int:
        """Judged rows per stored row (grows when the rows are thinned)."""
        return self._rows.every

    @property
    def evaluation_every(self) -> int:
        """Evaluations per stored evaluation."""
        return 1 if self._evaluations is None else self._evaluations.every

    @property
    def rows_seen(self) -> int:
        """Rows offered to the trace (of traced assets)."""
        return self._rows.seen

    def rows(self, asset: str) -> TraceRows:
        """Return the traced rows of ``asset``.

        Raises
        ------
        KeyError
            If the asset was never traced.
        """
        i = self._index[asset]
        s = self._rows.series
        return TraceRows(
            time_s=s(i, "time_s"),
            output=s(i, "output"),
            prediction=s(i, "prediction"),
            innovation=s(i, "innovation"),
            cusum_high=s(i, "cusum_high"),
            cusum_low=s(i, "cusum_low"),
            every=self._rows.every,
        )

    def evaluations(self, asset: str) -> TraceEvaluations:
        """Return the traced evaluations of ``asset`` (none before it settled).

        Raises
        ------
        KeyError
            If the asset was never traced.
        """
        i = self._index[asset]
        store = self._evaluations
        width = len(self.features)
        if store is None:
            empty = np.zeros(0)
            grid = np.zeros((0, width), dtype=np.float32)
            return TraceEvaluations(
                empty, (), self.features, grid, grid, grid, grid,
                empty.astype(np.float32), empty.astype(np.float32), 1,
            )  # fmt: skip
        labels = () if self._fleet is None else self._fleet.mode_labels
        codes = store.series(i, "mode").tolist()
        return TraceEvaluations(
            time_s=store.series(i, "time_s"),
            mode=tuple(labels[c] if 0 <= c < len(labels) else None for c in codes),
            features=self.features,
            value=store.series(i, "value"),
            baseline=store.series(i, "baseline"),
            lower=store.series(i, "lower"),
            upper=store.series(i, "upper"),
            distance=store.series(i, "distance"),
            distance_limit=store.series(i, "distance_limit"),
            every=store.every,
        )

    def memory_bytes(self) -> int:
        """Bytes held by the trace's arrays."""
        total = self._rows.nbytes() + self._slot_index.nbytes
        if self._evaluations is not None:
            total += self._evaluations.nbytes()
        return total


def attach_traces(
    pipeline: Pipeline,
    *,
    every: int = 1,
    max_bytes: int = DEFAULT_MAX_BYTES,
    assets: Collection[str] | None = None,
) -> dict[str, FleetTrace]:
    """Give every asset class of ``pipeline`` a trace; return them by class name.

    ``max_bytes`` is shared equally among the classes.
    """
    classes = pipeline.classes()
    share = max(2**16, max_bytes // max(len(classes), 1))
    traces: dict[str, FleetTrace] = {}
    for name in classes:
        trace = FleetTrace(every=every, max_bytes=share, assets=assets)
        pipeline.fleet_of(name).trace = trace
        traces[name] = trace
    return traces
