"""The daemon's processing, shared by the live service and replay.

::

    feed(topic, payload, arrival_s)   route -> decode -> align (IntakeBank)
                                      -> data-quality lifecycle
    feed_row(columns, time_s, cells)  the same for a trend export row at once
    advance(now_s)                    close grid points -> rows
                                      -> live baseline learners, until a mode is accepted
                                      -> FleetMonitor: drift detectors and alert lifecycle
                                      -> alert records (schema arxwatch.alert/1)

Pure: no clock, no MQTT, no SQLite, no threads. Grid points close by event
time: each asset keeps a frontier, the latest sample time accepted for it,
and its grid points close up to that frontier (less the class's lateness),
capped by the caller's clock when it gives one. So a backlog of older
samples (what the broker's persistent session delivers after an outage, one
gateway catching up while others are live, or a replayed file) is aligned
exactly as if it had arrived live, and ``arxwatch run`` and ``arxwatch
replay`` give the same alerts for the same samples. A device whose clock
runs ahead only moves its own asset's frontier, and never past the wall
clock. During a burst, :meth:`Pipeline.feed` closes grid points as soon as
an asset has buffered a few (``IntakeBank.crowded``), so none is dropped.
Every message that cannot be used is counted by reason in :class:`Counts`
and dropped; nothing raises for bad input.

State for checkpoints comes out of :meth:`Pipeline.checkpoint` as named
blobs (numeric arrays in ``npz`` form, no pickle, plus JSON) and goes back
in with :meth:`Pipeline.restore`. A baseline window being learned live
grows by a chunk per checkpoint (a store series), so a week of samples is
not rewritten every minute.

Where the baselines come from, per asset class:

* ``baseline.file``: a baseline file (:mod:`arxwatch.daemon.library`).
  Every asset in it gets its place in the fleet once, at start (after any
  restore), and the parsed file is dropped, so memory does not hold two
  copies; it is judged from its first row. An asset missing from the file
  is counted as ``no_baseline`` and not judged.
* ``baseline.learn_for_s``: a :class:`~arxwatch.estimators.baseline.LiveBaselineLearner`
  per asset collects gap-free stretches per operating mode until they cover
  the span, fits them together (order chosen by BIC, acceptance rule), and
  an accepted mode starts being judged at once. Fits are spread over calls
  (:data:`FITS_PER_ADVANCE`) so that a fleet commissioned together does not
  stall the service.
"""

from __future__ import annotations

import io
import json
import sys
from collections import Counter, deque
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.config import AssetClassConfig, Config
from arxwatch.daemon.decode import PayloadFormat, Rejected, decode
from arxwatch.daemon.fleet import FleetMonitor
from arxwatch.daemon.history import TrendBlock, TrendRow
from arxwatch.daemon.intake import OUTCOMES, IntakeBank, RowBatch, cells_for
from arxwatch.daemon.route import Refused, Router
from arxwatch.estimators.baseline import BaselineSet, LiveBaselineLearner
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.estimator import Backend

__all__ = ["FITS_PER_ADVANCE", "BaselineEvent", "Checkpoint", "Counts", "Pipeline", "TrendColumns"]

#: Receiver of closed rows: asset class, asset id per row, the rows, mode label per row.
RowTap = Callable[[str, list[str], RowBatch, list[str | None]], None]

#: Live baseline fits done per :meth:`Pipeline.advance` call at most (each
#: takes tens to hundreds of milliseconds); more wait for the next call.
FITS_PER_ADVANCE = 2

#: Topic refusals that point at the config or the site, not at unrelated
#: traffic under the subscription (``no matching rule`` is usually that).
NOTEWORTHY_REFUSALS = frozenset({"asset limit", "asset class conflict"})

_ACCEPTED = OUTCOMES.index("accepted")
_OUT_OF_RANGE = OUTCOMES.index("out_of_range")

_STATE_VERSION = 1
_META = "__meta__"

#: Per asset class, a baseline file's content: asset id -> baselines.
Libraries = Mapping[str, Mapping[str, BaselineSet]]


def pack(meta: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> bytes:
    """Numeric arrays and a JSON description in one ``npz`` blob (no pickle)."""
    buffer = io.BytesIO()
    text = np.frombuffer(json.dumps(meta, allow_nan=False).encode("utf-8"), dtype=np.uint8)
    named: dict[str, Any] = {_META: text, **arrays}
    np.savez(buffer, **named)
    return buffer.getvalue()


def unpack(blob: bytes) -> tuple[dict[str, Any], dict[str, NDArray[Any]]]:
    """Read a blob written by :func:`pack`.

    Raises
    ------
    ValueError
        If the blob is not such a file.
    """
    try:
        with np.load(io.BytesIO(blob), allow_pickle=False) as saved:
            arrays = {name: saved[name] for name in saved.files}
    except (OSError, ValueError, EOFError) as err:
        raise ValueError(f"not a saved state blob: {err}") from None
    raw = arrays.pop(_META, None)
    if raw is None:
        raise ValueError("saved state blob lacks its description")
    meta: dict[str, Any] = json.loads(raw.tobytes().decode("utf-8"))
    return meta, arrays


@dataclass
class Counts:
    """Running tallies for metrics (the service turns differences into counters).

    Attributes
    ----------
    messages : int
        Messages fed.
    refused : Counter
        Topics routing refused, by reason.
    rejected : Counter
        Payloads the decoder rejected, by reason.
    samples : Counter
        Decoded samples by alignment outcome, plus ``bad_quality_flag`` for
        samples whose quality flag said not good (dropped).
    rows : int
        Aligned rows produced.
    grid_points_skipped : int
        Grid points without a complete row.
    sample_gaps : int
        Gaps in the samples of a checked signal: an interval longer than its
        ``gap_factor`` expected periods (a controller or network outage, or
        messages a broker dropped past its queue limit).
    rows_judged : int
        Rows that reached a detector.
    rows_not_judged : Counter
        Rows by reason: ``learning``, ``no_baseline``, ``mode_without_baseline``.
    transitions : Counter
        Alert transitions by (detector, state).
    baselines : Counter
        Live fits by outcome: ``accepted``, ``refused``.
    """

    messages: int = 0
    refused: Counter[str] = field(default_factory=Counter)
    rejected: Counter[str] = field(default_factory=Counter)
    samples: Counter[str] = field(default_factory=Counter)
    rows: int = 0
    grid_points_skipped: int = 0
    sample_gaps: int = 0
    rows_judged: int = 0
    rows_not_judged: Counter[str] = field(default_factory=Counter)
    transitions: Counter[tuple[str, str]] = field(default_factory=Counter)
    baselines: Counter[str] = field(default_factory=Counter)


@dataclass(frozen=True)
class BaselineEvent:
    """A live baseline fit: what the service logs.

    Attributes
    ----------
    asset, asset_class : str
        The asset.
    mode : str or None
        Operating mode of the window.
    accepted : bool
        Whether the baseline was accepted (and is now judged against).
    fit_percent : float or None
        Fit on held-back data, when a model was fitted.
    reasons : tuple of str
        Why the window was refused; empty when accepted.
    """

    asset: str
    asset_class: str
    mode: str | None
    accepted: bool
    fit_percent: float | None
    reasons: tuple[str, ...]


@dataclass(frozen=True)
class Checkpoint:
    """What one checkpoint writes (see :meth:`StateStore.save_checkpoint`).

    Attributes
    ----------
    entries : dict of str to bytes
        Named blobs to write.
    appended : dict of str to bytes
        Chunks to append to series (baseline windows being learned).
    dropped : list of str
        Series to delete first (windows fitted or restarted).
    """

    entries: dict[str, bytes]
    appended: dict[str, bytes]
    dropped: list[str]


class _Class:
    """Everything of one asset class: alignment, learners, the fleet."""

    def __init__(
        self,
        config: AssetClassConfig,
        *,
        from_file: bool,
        extra_cells: int = 0,
        backend: Backend = "python",
    ) -> None:
        self.config = config
        self.signals = config.signals
        self.signal_index = {signal: i for i, signal in enumerate(self.signals)}
        self.formats: dict[str, PayloadFormat] = {s: config.payload_format(s) for s in self.signals}
        # a trend-export cell: the signal's value as a bare number (or label)
        self.bare_formats = {
            s: PayloadFormat(
                kind="number",
                time_field=None,
                scale=f.scale,
                offset=f.offset,
                max_payload_bytes=f.max_payload_bytes,
                labels=f.labels,
            )
            for s, f in self.formats.items()
        }
        # plausible range per signal index (the mode signal has none)
        numeric = (config.output, *config.inputs)
        self.ranges = [(s.minimum, s.maximum) for s in numeric] + [(-np.inf, np.inf)] * (
            len(self.signals) - len(numeric)
        )
        quality = config.quality_configs()
        # as many cells per signal as the lateness needs; feed() advances an
        # asset whose cells filled (IntakeBank.crowded), so none overflows
        align = config.align_config()
        self.intake = IntakeBank(
            align, quality, cells=cells_for(align) + extra_cells, backend=backend
        )
        self.fleet = FleetMonitor(
            config.signal_names(),
            config.monitor_config(),
            quality_signals=tuple(quality),
            backend=backend,
        )
        self.n_checked = len(quality)
        self.from_file = from_file
        self.learner_config = (
            config.learner_config() if config.baseline.learn_for_s is not None else None
        )
        self.assets: list[str | None] = []  # intake slot -> asset id
        self.slot_of: dict[str, int] = {}
        self.fleet_slot = np.zeros(0, dtype=np.int32)  # intake slot -> fleet slot, -1: none
        self.learners: dict[int, LiveBaselineLearner] = {}
        self.window_rows: dict[int, list[float]] = {}  # new window rows since the checkpoint
        self.windows_dropped: set[int] = set()
        self.accepted: dict[int, list[dict[str, Any]]] = {}  # accepted baselines, as dicts
        # per intake slot: latest accepted sample time, the asset's event clock
        self.frontier = np.full(self.intake.capacity, -np.inf)

    def window_key(self, slot: int) -> str:
        return f"window/{self.config.name}/{self.assets[slot]}"

    def add(self, asset_id: str) -> int:
        slot = self.intake.add_asset()
        while len(self.assets) <= slot:
            self.assets.append(None)
        self.assets[slot] = asset_id
        self.slot_of[asset_id] = slot
        if slot >= self.fleet_slot.shape[0]:
            grown = np.full(max(slot + 1, 2 * self.fleet_slot.shape[0]), -1, dtype=np.int32)
            grown[: self.fleet_slot.shape[0]] = self.fleet_slot
            self.fleet_slot = grown
        self.fleet_slot[slot] = -1
        if slot >= self.frontier.shape[0] or self.frontier.shape[0] != self.intake.capacity:
            grown = np.full(self.intake.capacity, -np.inf)
            grown[: min(self.frontier.shape[0], grown.shape[0])] = self.frontier[: grown.shape[0]]
            self.frontier = grown
        self.frontier[slot] = -np.inf
        if self.from_file:
            if asset_id in self.fleet:
                self.fleet_slot[slot] = self.fleet.slot(asset_id)
        elif self.learner_config is not None:
            self.learners[slot] = LiveBaselineLearner(self.learner_config)
        return slot

    def admit_library(self, library: Mapping[str, BaselineSet]) -> None:
        """Give every asset of the baseline file its place in the fleet."""
        for asset, baselines in library.items():
            if asset not in self.fleet:
                fleet_slot = self.fleet.add_asset(asset, baselines)
                slot = self.slot_of.get(asset)
                if slot is not None:
                    self.fleet_slot[slot] = fleet_slot

    def needed(self, slots: NDArray[np.intp], qs: NDArray[np.intp]) -> NDArray[np.bool_]:
        """Whether each quiet quality check (intake slot, checked signal) has a busy alert."""
        fleet_slots = self.fleet_slot[slots]
        judged = fleet_slots >= 0
        if judged.all():  # the usual case, a live message's one check included: no masks
            return self.fleet.quality_busy(fleet_slots.astype(np.intp), qs)
        out = np.zeros(slots.shape, dtype=np.bool_)
        if judged.any():
            out[judged] = self.fleet.quality_busy(fleet_slots[judged].astype(np.intp), qs[judged])
        return out


@dataclass(eq=False)
class _ColumnPlan:
    """The numeric columns of a trend export routed to one asset class, as arrays."""

    state: _Class
    index: NDArray[np.intp]  # column positions in a row's cells
    topics: list[str]
    slots: NDArray[np.intp]
    signals: NDArray[np.intp]
    scale: NDArray[np.float64]
    offset: NDArray[np.float64]
    low: NDArray[np.float64]
    high: NDArray[np.float64]
    max_chars: int

    def rows(self, block: TrendBlock) -> _PlanRows:
        """Scale and check this plan's cells of every row of ``block`` at once."""
        scaled = block.values[:, self.index] * self.scale + self.offset
        finite = np.isfinite(scaled)
        plain: NDArray[np.bool_]
        if block.empty is None:
            present = None
            plain = np.asarray(finite.all(axis=1))
            full = np.ones(len(block), dtype=np.bool_)
            count = np.full(len(block), self.index.shape[0])
        else:
            present = ~block.empty[:, self.index]
            plain = np.asarray((finite | ~present).all(axis=1))
            full = np.asarray(present.all(axis=1))
            count = present.sum(axis=1)
        if block.longest > self.max_chars:  # a cell too long for the decoder somewhere
            columns = self.index.tolist()
            for i in np.flatnonzero(plain).tolist():
                cells = block.cells(i)
                plain[i] = max(len(cells[j]) for j in columns) <= self.max_chars
        return _PlanRows(
            scaled=scaled,
            usable=(self.low <= scaled) & (scaled <= self.high),
            present=present,
            plain=plain.tolist(),
            full=full.tolist(),
            count=count.tolist(),
        )


@dataclass(frozen=True, eq=False)
class _PlanRows:
    """A plan's cells of one :class:`TrendBlock`, scaled and checked (see :meth:`_ColumnPlan.rows`).

    ``plain`` rows have a plain decimal number, finite once scaled and not
    too long for the decoder, in each cell present (the others go cell by
    cell through the decoder); ``full`` rows have a cell in every column.
    """

    scaled: NDArray[np.float64]  # (n, columns)
    usable: NDArray[np.bool_]  # within the signal's plausible range
    present: NDArray[np.bool_] | None  # None: every cell present
    plain: list[bool]
    full: list[bool]
    count: list[int]  # cells present


class TrendColumns:
    """How the columns of one trend export reach the pipeline (see :meth:`Pipeline.feed_row`).

    A column is routed at its first value: to a class's numeric signal
    (fed on arrays), to a mode signal or a refusal worth a log line (fed
    message by message), or refused quietly (counted).
    """

    def __init__(self, topics: Sequence[str]) -> None:
        self.topics = list(topics)
        self.unrouted: list[int] = list(range(len(self.topics)))
        self.by_message: list[int] = []
        self.refused: dict[str, list[int]] = {}
        self.plans: list[_ColumnPlan] = []
        self._columns: dict[str, list[tuple[int, int, int]]] = {}
        self._block: TrendBlock | None = None
        self._rows: dict[_ColumnPlan, _PlanRows] = {}

    def rows(self, plan: _ColumnPlan, block: TrendBlock) -> _PlanRows:
        """Return ``plan.rows(block)``, made once per plan and block."""
        if block is not self._block:
            self._block, self._rows = block, {}
        rows = self._rows.get(plan)
        if rows is None:
            rows = self._rows[plan] = plan.rows(block)
        return rows

    def add(self, name: str, state: _Class, columns: list[tuple[int, int, int]]) -> None:
        """Add numeric columns (position, slot, signal) of class ``name``; rebuild its plan."""
        known = self._columns.setdefault(name, [])
        known += columns
        known.sort()
        index, slots, signals = (np.array(c, dtype=np.intp) for c in zip(*known, strict=True))
        formats = [state.bare_formats[state.signals[q]] for q in signals.tolist()]
        plan = _ColumnPlan(
            state=state,
            index=index,
            topics=[self.topics[i] for i in index.tolist()],
            slots=slots,
            signals=signals,
            scale=np.array([f.scale for f in formats]),
            offset=np.array([f.offset for f in formats]),
            low=np.array([state.ranges[q][0] for q in signals.tolist()], dtype=np.float64),
            high=np.array([state.ranges[q][1] for q in signals.tolist()], dtype=np.float64),
            max_chars=min(f.max_payload_bytes for f in formats),
        )
        self.plans = [p for p in self.plans if p.state is not state] + [plan]


def _collected_rows(learner: LiveBaselineLearner) -> list[float]:
    """Rows ``[t, y, *u, mode index]`` of every sample the learner still holds, in time order.

    The saved series of a learning asset (:meth:`Pipeline.checkpoint`), so
    that a restart gives each mode back what it had collected.
    """
    state = learner.to_state()
    rows = [
        [t, y, *u, float(index)]
        for index, entry in enumerate(state["modes"])
        for t, y, u in zip(entry["t"], entry["y"], entry["u"], strict=True)
    ]
    rows.sort(key=lambda row: row[0])
    return [value for row in rows for value in row]


class Pipeline:
    """Messages in, alert records out, for every asset class of a configuration.

    Parameters
    ----------
    config : Config
        The validated site configuration.
    libraries : mapping, or a callable returning one, optional
        Per asset class that loads baselines from a file, the file's
        content (asset id -> baselines), read by the caller. A callable is
        called once, when the assets are put into the fleets (after any
        :meth:`restore`): the service parses the files then, so the
        parsed objects are freed above the restored state and their memory
        can go back to the OS.

    extra_cells : int, optional
        Samples held per signal beyond what a live feed needs
        (:func:`~arxwatch.daemon.intake.cells_for`). A replay of a trend
        export gives some, so that the grid closes (and the fleet steps)
        every few rows rather than every row: the same rows, in fewer and
        larger steps. Default 0.
    backend : {"python", "compiled", "auto"}, optional
        The fleet monitors' back end (:class:`FleetMonitor`): the same
        records either way; ``"auto"`` compiles the per-row path when numba
        is installed, for long runs such as a replay. Default ``"python"``.

    Raises
    ------
    ValueError
        If a class that loads baselines from a file has no library, or
        ``extra_cells`` is negative.
    """

    def __init__(
        self,
        config: Config,
        libraries: Libraries | Callable[[], Libraries] | None = None,
        *,
        extra_cells: int = 0,
        backend: Backend = "python",
    ) -> None:
        if extra_cells < 0:
            raise ValueError(f"extra_cells must be >= 0, got {extra_cells!r}")
        self.config = config
        self.router: Router = config.router()
        self._libraries = libraries
        self._classes: dict[str, _Class] = {
            c.name: _Class(
                c, from_file=c.baseline.file is not None, extra_cells=extra_cells, backend=backend
            )
            for c in config.asset_classes
        }
        if not callable(libraries):
            self._check_libraries(libraries or {})
        self._admitted = False  # baseline files not yet in the fleets
        self.counts = Counts()
        self.events: list[BaselineEvent] = []
        self._to_fit: deque[tuple[str, int, str | None]] = deque()
        self.last_sample_s: float | None = None
        #: The latest message that could not be used for a reason a person
        #: should hear about, as (topic, why); the service logs and clears it.
        self.last_problem: tuple[str, str] | None = None
        #: Called with every batch of closed rows: (asset class, asset id per
        #: row, the rows, the mode label per row). Baseline fits from history
        #: collect rows through it; None in the service.
        self.on_rows: RowTap | None = None

    # -- messages -------------------------------------------------------------
    def feed(
        self, topic: str, payload: bytes, arrival_s: float, *, bare: bool = False
    ) -> list[dict[str, Any]]:
        """Take one MQTT message; return the data-quality alert records it causes.

        Never raises for bad input: a topic no class claims, an unreadable
        payload or an unusable sample is counted (see :class:`Counts`).
        With ``bare`` the payload is read as a bare number (or mode label)
        sampled at ``arrival_s``, whatever the class's payload format: a
        cell of a trend export (:mod:`arxwatch.daemon.history`); the signal's
        scale and offset still apply.
        """
        if not self._admitted:
            self._admit()
        counts = self.counts
        counts.messages += 1
        route = self.router.route(topic)
        if isinstance(route, Refused):
            counts.refused[route.reason] += 1
            if route.reason in NOTEWORTHY_REFUSALS:
                self.last_problem = (topic, f"topic refused: {route.reason}")
            return []
        state = self._classes[route.asset_class]
        slot = state.slot_of.get(route.asset_id)
        if slot is None:
            slot = state.add(route.asset_id)
        formats = state.bare_formats if bare else state.formats
        sample = decode(payload, arrival_s, formats[route.signal])
        if isinstance(sample, Rejected):
            counts.rejected[sample.reason] += 1
            if sample.reason != "empty":  # empty payloads clear retained messages
                self.last_problem = (topic, f"payload rejected ({sample.reason}): {sample.detail}")
            return []
        if not sample.quality_ok:
            counts.samples["bad_quality_flag"] += 1
            return []
        signal = state.signal_index[route.signal]
        low, high = state.ranges[signal]
        value = sample.value
        # an implausible value raises its data-quality alert but stays out of the model
        usable = isinstance(value, str) or low <= value <= high
        records: list[dict[str, Any]] = []
        if (slot, signal) in state.intake.crowded:  # a burst: close what it can first
            records = self._advance_class(state, arrival_s, slot)
        outcome = state.intake.add(slot, signal, sample.time_s, value, usable=usable)
        counts.samples[outcome] += 1
        if outcome not in ("accepted", "out_of_range"):
            return records
        if self.last_sample_s is None or sample.time_s > self.last_sample_s:
            self.last_sample_s = sample.time_s
        if sample.time_s > state.frontier[slot]:
            state.frontier[slot] = sample.time_s
        taken = self._take_quality(state)
        fleet_slot = int(state.fleet_slot[slot])
        if taken and fleet_slot >= 0:
            quality = state.fleet.quality(fleet_slot, [ev for _, ev in taken], sample.time_s)
            self._count_transitions(quality)
            records += quality
        return records

    def feed_row(
        self, columns: TrendColumns, time_s: float, cells: Sequence[str]
    ) -> list[dict[str, Any]]:
        """Take one row of a trend export; return the data-quality alert records it causes.

        :meth:`feed_block_row` of a block of this one row.

        Parameters
        ----------
        columns : TrendColumns
            Made for the file's header (``TrendColumns(reader.topics)``); it learns each
            column's route at the column's first value.
        time_s : float
            The row time, epoch seconds.
        cells : sequence of str
            The point columns' cells, stripped; ``""`` for no value.
        """
        block = TrendBlock.of_rows([TrendRow(time_s, 0, list(cells))])
        return self.feed_block_row(columns, block, 0)

    def feed_block_row(
        self, columns: TrendColumns, block: TrendBlock, row: int
    ) -> list[dict[str, Any]]:
        """Take row ``row`` of a block of a trend export; return the data-quality alert records.

        The same as :meth:`feed` with ``bare=True`` for each non-empty cell
        in turn (topic from ``columns``, payload the cell, arrival the row
        time): the same counts, state and alert records, possibly in another
        order within the row. Numeric cells of output and input signals go
        through the intake a class at a time (:meth:`IntakeBank.add_many`),
        scaled and checked for the whole block at once; mode labels, and a
        class's cells in a row with one that is not a plain decimal number,
        go through :meth:`feed` cell by cell.

        Parameters
        ----------
        columns : TrendColumns
            Made for the file's header (``TrendColumns(reader.topics)``); it learns each
            column's route at the column's first value.
        block : TrendBlock
            Rows of the file (:meth:`HistoryReader.blocks`).
        row : int
            The row of the block, ``0 <= row < len(block)``.
        """
        if not self._admitted:
            self._admit()
        records: list[dict[str, Any]] = []
        time_s = float(block.time_s[row])
        present = None if block.empty is None else ~block.empty[row]
        if columns.unrouted:
            self._route_columns(columns, present)
        if columns.by_message:
            cells = block.cells(row)
            for i in columns.by_message:
                if cells[i]:
                    records += self.feed(
                        columns.topics[i], cells[i].encode("utf-8"), time_s, bare=True
                    )
        for reason, refused in columns.refused.items():
            given = len(refused) if present is None else int(present[refused].sum())
            self.counts.messages += given
            self.counts.refused[reason] += given
        for plan in columns.plans:
            records += self._feed_plan(plan, time_s, block, row, columns.rows(plan, block))
        return records

    def _route_columns(self, columns: TrendColumns, present: NDArray[np.bool_] | None) -> None:
        """Route the columns that have their first value in a row (``present``: None for all)."""
        new = [i for i in columns.unrouted if present is None or present[i]]
        if not new:
            return
        by_class: dict[str, list[tuple[int, int, int]]] = {}
        for i in new:
            columns.unrouted.remove(i)
            route = self.router.route(columns.topics[i])
            if isinstance(route, Refused):
                if route.reason in NOTEWORTHY_REFUSALS:
                    columns.by_message.append(i)  # feed() names it for the log, each time
                else:
                    columns.refused.setdefault(route.reason, []).append(i)
                continue
            state = self._classes[route.asset_class]
            slot = state.slot_of.get(route.asset_id)
            if slot is None:
                slot = state.add(route.asset_id)
            signal = state.signal_index[route.signal]
            if signal == state.intake.mode_signal:
                columns.by_message.append(i)
            else:
                by_class.setdefault(route.asset_class, []).append((i, slot, signal))
        columns.by_message.sort()
        for name, added in by_class.items():
            columns.add(name, self._classes[name], added)

    def _feed_plan(
        self, plan: _ColumnPlan, time_s: float, block: TrendBlock, row: int, rows: _PlanRows
    ) -> list[dict[str, Any]]:
        """Feed the numeric cells of one class's columns in a row (see :meth:`feed_block_row`)."""
        n = rows.count[row]
        if not n:
            return []
        full = rows.full[row]
        present = None if rows.present is None else rows.present[row]
        if not rows.plain[row]:  # something a decoder must look at: cell by cell
            records: list[dict[str, Any]] = []
            cells = block.cells(row)
            given = range(n) if present is None else np.flatnonzero(present).tolist()
            for i in given:
                column = int(plan.index[i])
                records += self.feed(
                    plan.topics[i], cells[column].encode("utf-8"), time_s, bare=True
                )
            return records
        state = plan.state
        counts = self.counts
        counts.messages += n
        if full:  # the plan's own arrays, not masked copies
            slots, signals = plan.slots, plan.signals
            values, usable = rows.scaled[row], rows.usable[row]
        else:
            slots, signals = plan.slots[present], plan.signals[present]
            values, usable = rows.scaled[row][present], rows.usable[row][present]
        records = []
        crowded = state.intake.crowded
        if crowded and not crowded.isdisjoint(zip(slots.tolist(), signals.tolist(), strict=True)):
            records = self._advance_class(state, time_s)  # a burst: close what it can first
        outcomes = state.intake.add_many(slots, signals, time_s, values, usable)
        for code, many in enumerate(np.bincount(outcomes, minlength=len(OUTCOMES)).tolist()):
            if many:
                counts.samples[OUTCOMES[code]] += many
        taken = (outcomes == _ACCEPTED) | (outcomes == _OUT_OF_RANGE)
        if taken.any():
            if self.last_sample_s is None or time_s > self.last_sample_s:
                self.last_sample_s = time_s
            # one time for all: duplicate slots get the same value (no ufunc.at needed)
            later = slots[taken]
            state.frontier[later] = np.maximum(state.frontier[later], time_s)
        evidence = self._take_quality(state)
        for k in range(0, len(evidence), 3):  # a checked sample's three Evidence
            fleet_slot = int(state.fleet_slot[evidence[k][0]])
            if fleet_slot >= 0:
                quality = state.fleet.quality(
                    fleet_slot, [ev for _, ev in evidence[k : k + 3]], time_s
                )
                self._count_transitions(quality)
                records += quality
        return records

    def _take_quality(self, state: _Class) -> list[tuple[int, Evidence]]:
        """Return the intake's quality evidence since the last take; count the gaps in it."""
        taken = state.intake.take_quality(state.needed)
        self.counts.sample_gaps += sum(1 for _, ev in taken if ev.alarm and ev.detector == "gap")
        return taken

    # -- the grid -------------------------------------------------------------
    def advance(self, now_s: float | None = None) -> list[dict[str, Any]]:
        """Close every grid point up to each asset's frontier (less its lateness); judge the rows.

        Parameters
        ----------
        now_s : float or None
            Wall clock, epoch seconds: the frontier is capped at it (live).
            None for replay: the recorded times alone decide.

        Returns
        -------
        list of dict
            Alert records caused by the rows (and by baselines accepted now).
        """
        if not self._admitted:
            self._admit()
        records: list[dict[str, Any]] = []
        for state in self._classes.values():
            records += self._advance_class(state, now_s)
        self._fit_some()
        return records

    def _advance_class(
        self, state: _Class, now_s: float | None, only: int | None = None
    ) -> list[dict[str, Any]]:
        """Close grid points up to each asset's frontier; judge the rows.

        All assets of the class, or only the slot ``only`` (a crowded asset).
        """
        limits = state.frontier if now_s is None else np.minimum(state.frontier, now_s)
        if only is not None:
            one = np.full_like(limits, -np.inf)
            one[only] = limits[only]
            limits = one
        batch = state.intake.advance(limits)
        self.counts.grid_points_skipped += batch.skipped
        if not len(batch):
            return []
        records: list[dict[str, Any]] = []
        self.counts.rows += len(batch)
        labels: list[str | None]
        if state.intake.mode_signal < 0:  # no mode signal: no label (-1) on any row
            labels = [None] * len(batch)
        else:
            labels = [
                None if code < 0 else state.intake.mode_label(int(code))
                for code in batch.mode.tolist()
            ]
        fleet_slots = state.fleet_slot[batch.slots]
        judged = fleet_slots >= 0
        if judged.any():
            idx = np.flatnonzero(judged)
            skipped = state.fleet.skipped
            records = state.fleet.step(
                fleet_slots[idx].astype(np.intp),
                batch.time_s[idx],
                batch.y[idx],
                batch.u[idx],
                list(labels) if idx.shape[0] == len(labels) else [labels[i] for i in idx.tolist()],
                batch.restart[idx],
            )
            without = state.fleet.skipped - skipped
            self.counts.rows_judged += idx.shape[0] - without
            if without:
                self.counts.rows_not_judged["mode_without_baseline"] += without
            self._count_transitions(records)
        if self.on_rows is not None:
            assets = [state.assets[s] or "" for s in batch.slots.tolist()]
            self.on_rows(state.config.name, assets, batch, labels)
        if state.learners:
            self._learn(state, batch.slots, batch.time_s, batch.y, batch.u, labels, judged)
        not_judged = int((~judged).sum())
        learning = sum(1 for s in batch.slots[~judged].tolist() if s in state.learners)
        if learning:
            self.counts.rows_not_judged["learning"] += learning
        if not_judged - learning:
            self.counts.rows_not_judged["no_baseline"] += not_judged - learning
        return records

    def check_stale(self, now_s: float) -> list[dict[str, Any]]:
        """Check every monitored signal for staleness at ``now_s``; return alert records."""
        records: list[dict[str, Any]] = []
        for state in self._classes.values():
            for slot, evidence in state.intake.stale(now_s, state.needed):
                fleet_slot = int(state.fleet_slot[slot])
                if fleet_slot >= 0:
                    records += state.fleet.quality(fleet_slot, [evidence], now_s)
        self._count_transitions(records)
        return records

    def _count_transitions(self, records: Sequence[dict[str, Any]]) -> None:
        for record in records:
            self.counts.transitions[(record["detector"], record["state"])] += 1

    # -- live baselines -------------------------------------------------------
    def _learn(
        self,
        state: _Class,
        slots: NDArray[np.intp],
        time_s: NDArray[np.float64],
        y: NDArray[np.float64],
        u: NDArray[np.float64],
        labels: list[str | None],
        judged: NDArray[np.bool_],
    ) -> None:
        """Offer the rows of learning assets to their learners; queue full windows for a fit."""
        config = state.learner_config
        if config is None:
            return
        modes = config.modes
        for i, slot in enumerate(slots.tolist()):
            learner = state.learners.get(slot)
            if learner is None:
                continue
            mode = labels[i]
            if mode not in modes:
                continue
            row = [float(time_s[i]), float(y[i]), *(float(v) for v in u[i])]
            outcome = learner.add(row[0], row[1], row[2:], mode)
            if outcome == "ignored":
                continue
            state.window_rows.setdefault(slot, []).extend([*row, float(modes.index(mode))])
            if learner.ready(mode):
                self._to_fit.append((state.config.name, slot, mode))

    def _fit_some(self) -> None:
        """Fit up to FITS_PER_ADVANCE full windows; an accepted mode is judged from now on."""
        for _ in range(min(FITS_PER_ADVANCE, len(self._to_fit))):
            name, slot, mode = self._to_fit.popleft()
            state = self._classes[name]
            learner = state.learners.get(slot)
            asset = state.assets[slot]
            if learner is None or asset is None or not learner.ready(mode):
                continue
            result = learner.finish(mode)
            # fitted or refused, this mode's samples are gone: the saved series
            # is rewritten with what the other modes are still collecting
            state.windows_dropped.add(slot)
            state.window_rows[slot] = _collected_rows(learner)
            baseline = result.baseline
            fit = None if baseline is None else baseline.fit_percent
            self.events.append(
                BaselineEvent(asset, name, mode, baseline is not None, fit, tuple(result.reasons))
            )
            self.counts.baselines["accepted" if baseline is not None else "refused"] += 1
            if baseline is None:
                continue
            state.accepted.setdefault(slot, []).append(baseline.to_dict())
            fleet_slot = int(state.fleet_slot[slot])
            if fleet_slot < 0:
                state.fleet_slot[slot] = state.fleet.add_asset(asset, BaselineSet((baseline,)))
            else:
                state.fleet.add_baseline(asset, baseline)
            config = state.learner_config
            if config is not None and all(learner.baseline(m) is not None for m in config.modes):
                del state.learners[slot]  # every mode judged: nothing more to learn

    # -- read-outs ------------------------------------------------------------
    def classes(self) -> tuple[str, ...]:
        """Return the asset class names, in configuration order."""
        return tuple(self._classes)

    def active(self, asset_class: str, asset_id: str) -> dict[str, str]:
        """Return the raised alerts of an asset (``mode:detector/signal`` -> severity).

        Empty for an asset that is not judged yet.
        """
        fleet = self._classes[asset_class].fleet
        return fleet.active(asset_id) if asset_id in fleet else {}

    def fleet_of(self, asset_class: str) -> FleetMonitor:
        """Return the fleet monitor of an asset class (for tools that pre-warm or inspect it).

        Raises
        ------
        KeyError
            If there is no such class.
        """
        return self._classes[asset_class].fleet

    def class_of(self, asset_id: str) -> str | None:
        """Return the class an asset was discovered under, or None."""
        return self.router.assets.get(asset_id)

    def asset_states(self) -> dict[str, int]:
        """Return how many assets are ``monitoring``, ``learning`` or have ``no_baseline``."""
        out = {"monitoring": 0, "learning": 0, "no_baseline": 0}
        for state in self._classes.values():
            for slot, asset in enumerate(state.assets):
                if asset is None:
                    continue
                if state.fleet_slot[slot] >= 0:
                    out["monitoring"] += 1
                elif slot in state.learners:
                    out["learning"] += 1
                else:
                    out["no_baseline"] += 1
        return out

    def alert_counts(self) -> list[tuple[str, str, int]]:
        """Return (family, severity, count) of the raised alerts of every class."""
        total: Counter[tuple[str, str]] = Counter()
        for state in self._classes.values():
            total.update(state.fleet.alert_counts())
        return [(family, severity, count) for (family, severity), count in sorted(total.items())]

    def top_ratios(self, limit: int) -> list[tuple[str, str, float]]:
        """Return the ``limit`` assets closest to an innovation alarm, over every class."""
        found = [r for state in self._classes.values() for r in state.fleet.top_ratios(limit)]
        found.sort(key=lambda item: -item[2])
        return found[:limit]

    def memory_bytes(self) -> int:
        """Bytes held by the column arrays of every class (alignment and monitor)."""
        return sum(s.intake.memory_bytes() + s.fleet.memory_bytes() for s in self._classes.values())

    # -- checkpoints ----------------------------------------------------------
    def checkpoint(self) -> Checkpoint:
        """Return what a checkpoint must write now; starts the next window chunks.

        Call it between :meth:`feed`/:meth:`advance` calls; the result is
        the whole state at this point.
        """
        entries: dict[str, bytes] = {}
        appended: dict[str, bytes] = {}
        dropped: list[str] = []
        classes: dict[str, Any] = {}
        for name, state in self._classes.items():
            intake = state.intake.to_state()
            entries[f"intake/{name}"] = pack(intake["meta"], intake["arrays"])
            fleet = state.fleet.to_state()
            entries[f"fleet/{name}"] = pack(fleet["meta"], fleet["arrays"])
            n = len(state.assets)
            classes[name] = {
                "frontier": [float(t) if np.isfinite(t) else None for t in state.frontier[:n]],
                "assets": state.assets,
                "fleet_slots": state.fleet_slot[: len(state.assets)].tolist(),
                "learning": sorted(state.learners),
                "accepted": {str(slot): b for slot, b in state.accepted.items()},
            }
            for slot in sorted(state.windows_dropped):
                if state.assets[slot] is not None:
                    dropped.append(state.window_key(slot))
            for slot, rows in state.window_rows.items():
                if rows:
                    appended[state.window_key(slot)] = np.array(rows, dtype=np.float64).tobytes()
            state.windows_dropped.clear()
            state.window_rows.clear()
        meta = {"version": _STATE_VERSION, "classes": classes, "last_sample_s": self.last_sample_s}
        entries["pipeline"] = json.dumps(meta, allow_nan=False).encode("utf-8")
        return Checkpoint(entries, appended, dropped)

    def _check_libraries(self, libraries: Libraries) -> Libraries:
        for name, state in self._classes.items():
            if state.from_file and name not in libraries:
                raise ValueError(
                    f"asset class {name!r} loads its baselines from "
                    f"{state.config.baseline.file}, but no baselines were given for it"
                )
        return libraries

    def _admit(self) -> None:
        """Put the baseline files' assets into the fleets (once; after any restore)."""
        given = self._libraries
        libraries = self._check_libraries(given() if callable(given) else given or {})
        self._libraries = None
        for name, state in self._classes.items():
            if state.from_file:
                state.admit_library(libraries[name])
        self._admitted = True

    def restore(self, entries: Mapping[str, bytes], series: Callable[[str], bytes]) -> None:
        """Restore a state written by :meth:`checkpoint` under the same configuration.

        Parameters
        ----------
        entries : mapping of str to bytes
            The saved checkpoint entries.
        series : callable
            Returns the saved series of a key (``StateStore.series``).

        Raises
        ------
        ValueError
            If the state is from another version or does not fit this
            configuration (a class renamed, signals changed...). The
            pipeline is then unusable: build a new one and start cold.
        """
        blob = entries.get("pipeline")
        if blob is None:
            self._admit()
            return  # nothing saved yet: a first start
        meta = json.loads(blob.decode("utf-8"))
        if meta.get("version") != _STATE_VERSION:
            raise ValueError(
                f"saved pipeline state version {meta.get('version')!r}; this release reads "
                f"version {_STATE_VERSION}"
            )
        saved = meta["classes"]
        missing = sorted(set(saved) - set(self._classes))
        if missing:
            raise ValueError(f"saved state has asset classes the configuration lacks: {missing}")
        for name, state in self._classes.items():
            part = saved.get(name)
            if part is None:
                continue  # a class added to the configuration since: starts empty
            intake_meta, intake_arrays = unpack(entries[f"intake/{name}"])
            state.intake.load_state({"meta": intake_meta, "arrays": intake_arrays})
            fleet_meta, fleet_arrays = unpack(entries[f"fleet/{name}"])
            state.fleet.load_state({"meta": fleet_meta, "arrays": fleet_arrays})
            state.assets = [None if a is None else sys.intern(str(a)) for a in part["assets"]]
            state.slot_of = {a: s for s, a in enumerate(state.assets) if a is not None}
            slots = np.asarray(part["fleet_slots"], dtype=np.int32)
            state.fleet_slot = np.full(max(len(state.assets), 1), -1, dtype=np.int32)
            state.fleet_slot[: slots.shape[0]] = slots
            state.accepted = {int(k): list(v) for k, v in part["accepted"].items()}
            state.frontier = np.full(state.intake.capacity, -np.inf)
            for slot, time_s in enumerate(part["frontier"]):
                if time_s is not None:
                    state.frontier[slot] = float(time_s)
            for asset in state.slot_of:
                self.router.admit(asset, name)
            state.learners = {}
            for slot in part["learning"]:
                learner = self._restore_learner(state, int(slot), series)
                state.learners[int(slot)] = learner
                for mode in learner.config.modes:
                    if learner.ready(mode):  # was waiting for its fit
                        self._to_fit.append((name, int(slot), mode))
        self.last_sample_s = meta.get("last_sample_s")
        self._admit()

    def _restore_learner(
        self, state: _Class, slot: int, series: Callable[[str], bytes]
    ) -> LiveBaselineLearner:
        config = state.learner_config
        if config is None:
            raise ValueError(
                f"asset class {state.config.name!r} no longer learns baselines live, "
                "but the saved state has learners"
            )
        learner = LiveBaselineLearner(config)
        frozen = {b["mode"]: b for b in state.accepted.get(slot, [])}
        learner.load_state(
            {
                "format": LiveBaselineLearner.FORMAT,
                "version": LiveBaselineLearner.VERSION,
                "modes": [
                    {"mode": m, "t": [], "y": [], "u": [], "baseline": frozen.get(m)}
                    for m in config.modes
                ],
            }
        )
        width = 3 + config.n_inputs
        rows = np.frombuffer(series(state.window_key(slot)), dtype=np.float64).reshape(-1, width)
        for row in rows.tolist():
            mode = config.modes[int(row[-1])]
            learner.add(row[0], row[1], row[2:-1], mode)
        return learner
