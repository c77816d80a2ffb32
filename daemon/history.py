"""Recorded data for replay and baseline fits: wide CSV trend exports and JSON Lines captures.

Two formats, both read as a stream of :class:`Recorded` values in file order:

**Trend export (CSV).** What a building controller's trend log exports: a
header row, then one row per time. The first column holds the time, either
epoch seconds or ISO 8601 (``2026-03-01T12:00:00Z``, ``2026-03-01 12:00``;
a time without a zone is read in the zone given, UTC by default); its header
text is free. Every other column is one point, and its header is the point's
MQTT topic name (``larkspur/block-c/ahu/ahu-2/sat``), so the site config
routes it exactly as it routes live messages. A cell holds the point's value
as a decimal number, or a label for a mode signal; an empty cell means no
value at that time. Cells are read as a bare-number payload of that signal
would be: the signal's ``scale`` and ``offset`` apply.

**Capture (JSON Lines).** What ``arxwatch capture`` writes: one MQTT message
per line, ``{"ts": <arrival, epoch seconds>, "topic": "...", "payload":
"<text>"}``, with ``"payload_b64"`` (base64) instead of ``"payload"`` for a
payload that is not UTF-8. :class:`CaptureWriter` writes it, plain or
gzip. Payloads are decoded by the class's payload format with the recorded
arrival time, exactly as live.

A line that cannot be read stops the reading with a :class:`HistoryError`
naming the file and line (``on_bad_line="stop"``, the default), or is
counted and skipped (``"skip"``). A bad header is always an error: without
it no line can be read. Files ending in ``.gz`` are read through gzip.

A trend export is also read in blocks of rows (:meth:`HistoryReader.blocks`,
what replay uses): a few hundred lines split at once and their cells
converted into one array of numbers, the rows, values and errors being those
of the row by row reading. A block with a quote or a NUL character hands the
rest of the file to the ``csv`` module. A second process can read the blocks
ahead of the one that uses them.
"""

from __future__ import annotations

import base64
import binascii
import csv
import gzip
import io
import itertools
import json
import math
import os
import pickle
import subprocess
import sys
import zlib
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from datetime import datetime, tzinfo
from pathlib import Path
from typing import IO, Any, Final, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.decode import DECIMAL_CHARS
from arxwatch.daemon.route import validate_topic

__all__ = [
    "BAD_LINE_POLICIES",
    "BadLinePolicy",
    "CaptureWriter",
    "HistoryError",
    "HistoryReader",
    "Recorded",
    "TrendBlock",
    "TrendRow",
    "parse_time",
    "time_zone",
]

BadLinePolicy = Literal["stop", "skip"]
#: What a reader does with a line it cannot read.
BAD_LINE_POLICIES: Final[tuple[str, ...]] = ("stop", "skip")
#: Lines of a trend export read into one :class:`TrendBlock`.
BLOCK_LINES: Final = 512
#: Characters :meth:`str.strip` removes from an ASCII cell, but for the line ends.
_ASCII_BLANKS: Final = " \t\x0b\x0c\x1c\x1d\x1e\x1f"


class HistoryError(ValueError):
    """A recorded file cannot be read; the message names the file and line."""

    def __init__(self, path: str | Path, line: int, message: str) -> None:
        super().__init__(f"{path}:{line}: {message}")
        self.path = str(path)
        self.line = line
        self.reason = message

    def __reduce__(self) -> tuple[type[HistoryError], tuple[str, int, str]]:
        """Pickle by the arguments (a reader reading ahead sends it to its parent)."""
        return HistoryError, (self.path, self.line, self.reason)


class _Broken(Exception):
    """Compressed data breaks off at ``line``; raised for a reader in blocks to apply its policy."""

    def __init__(self, line: int, reason: str) -> None:
        super().__init__(reason)
        self.line = line
        self.reason = reason


@dataclass(frozen=True, slots=True)
class Recorded:
    """One value of a recorded file, ready for :meth:`Pipeline.feed`.

    Attributes
    ----------
    time_s : float
        The arrival time of a captured message, or the row time of a trend
        export cell (epoch seconds).
    topic : str
        MQTT topic name.
    payload : bytes
        The message payload, or the cell's text.
    bare : bool
        True for a trend export cell: decode the payload as a bare number
        (or label) at ``time_s``, whatever the class's payload format.
    line : int
        Line of the file it came from (1-based).
    """

    time_s: float
    topic: str
    payload: bytes
    bare: bool
    line: int


@dataclass(frozen=True, slots=True)
class TrendRow:
    """One row of a trend export.

    Attributes
    ----------
    time_s : float
        The row time, epoch seconds.
    line : int
        Line of the file (1-based).
    cells : list of str
        The point columns' cells, stripped, in the order of
        :attr:`HistoryReader.topics`; ``""`` for no value.
    """

    time_s: float
    line: int
    cells: list[str]


@dataclass(frozen=True, eq=False)
class TrendBlock:
    """Consecutive rows of a trend export, their plain numbers as one array.

    Attributes
    ----------
    time_s : ndarray of float64, shape (n,)
        Row times, epoch seconds.
    line : ndarray of int64, shape (n,)
        Line of each row in the file (1-based).
    values : ndarray of float64, shape (n, k)
        Each point cell's number where the cell is a plain decimal (the
        characters of ``DECIMAL_CHARS`` only) that ``float`` reads as
        finite, as the decoder reads a bare number; NaN where the cell is
        empty or anything else (a label, ``nan``, ``1e999``...).
    empty : ndarray of bool, shape (n, k), or None
        Where a cell is empty; None when none is.
    longest : int
        Characters of the longest point cell.
    texts : list of str
        Per row, its line (a block split by the fast path) or, joined by
        NUL (never in such a line), its stripped cells (a block read
        by the ``csv`` module); :meth:`cells` gives them back.
    split : bool
        Whether ``texts`` are lines (True) or joined cells.
    """

    time_s: NDArray[np.float64]
    line: NDArray[np.int64]
    values: NDArray[np.float64]
    empty: NDArray[np.bool_] | None
    longest: int
    texts: list[str]
    split: bool

    def __len__(self) -> int:
        return int(self.time_s.shape[0])

    def cells(self, row: int) -> list[str]:
        """Return the stripped point cells of one row, as :attr:`TrendRow.cells`."""
        if not self.split:
            return self.texts[row].split("\x00")
        return [cell.strip() for cell in self.texts[row].rstrip("\r\n").split(",")[1:]]

    @classmethod
    def of_rows(cls, rows: Sequence[TrendRow]) -> TrendBlock:
        """Return the block of rows read one by one (their cells already stripped)."""
        width = len(rows[0].cells) if rows else 0
        texts = ["\x00".join(row.cells) for row in rows]
        plain_text = all(text.isascii() and "_" not in text for text in texts)
        cells = [c for row in rows for c in row.cells]
        values, empty, longest = _numbers(cells, width, plain_text=plain_text)
        return cls(
            time_s=np.array([row.time_s for row in rows], dtype=np.float64),
            line=np.array([row.line for row in rows], dtype=np.int64),
            values=values,
            empty=empty,
            longest=longest,
            texts=texts,
            split=False,
        )


def _numbers(
    cells: list[str], width: int, *, plain_text: bool
) -> tuple[NDArray[np.float64], NDArray[np.bool_] | None, int]:
    """Convert stripped cells, row after row ``width`` a row, to (values, empty, longest).

    All at once where every cell reads as a number; else a column at a time:
    one ``float`` per cell where every cell of the column reads; cell by
    cell, with the decoder's test of a plain decimal, where one does not.
    ``plain_text=False`` says the cells may hold characters ``float`` takes
    beyond a plain decimal's (``_``, non-ASCII digits): every column is then
    read cell by cell.
    """
    n = len(cells) // width if width else 0
    if not n:
        return np.empty((0, width)), None, 0
    if plain_text:
        try:  # the usual block, a number in every cell: all at once, in memory order
            values = np.array([float(cell) for cell in cells], dtype=np.float64).reshape(n, width)
        except ValueError:
            pass
        else:
            values[~np.isfinite(values)] = math.nan
            return values, None, max(map(len, cells))
    columns: list[list[float]] = []
    empty: NDArray[np.bool_] | None = None
    for j in range(width):
        column = cells[j::width]
        if plain_text:
            try:
                columns.append([float(cell) for cell in column])
                continue
            except ValueError:
                pass
        columns.append([_plain_number(cell) for cell in column])
        if "" in column:
            if empty is None:
                empty = np.zeros((n, width), dtype=np.bool_)
            empty[:, j] = [not cell for cell in column]
    values = np.array(columns, dtype=np.float64).T
    # "nan", "inf", "1e999": not plain finite decimals, left to the decoder as the text they are
    values[~np.isfinite(values)] = math.nan
    return values, empty, max(map(len, cells))


def _plain_number(cell: str) -> float:
    """Return the cell's number if it is a plain decimal ``float`` reads, else NaN (as decode)."""
    if not cell or cell.strip(DECIMAL_CHARS):
        return math.nan
    try:
        return float(cell)
    except ValueError:
        return math.nan


def parse_time(text: str, zone: tzinfo) -> float:
    """Parse epoch seconds or an ISO 8601 time; return epoch seconds.

    Parameters
    ----------
    text : str
        ``"1767225600"``, ``"1767225600.5"``, ``"2026-01-01T00:00:00Z"``,
        ``"2026-01-01 01:00:00+01:00"`` or ``"2026-01-01 00:00"``.
    zone : tzinfo
        Zone of an ISO time that carries none.

    Raises
    ------
    ValueError
        If the text is neither; the message quotes it.

    Examples
    --------
    >>> from datetime import timezone
    >>> parse_time("2026-01-01T00:00:00Z", timezone.utc)
    1767225600.0
    >>> parse_time("1767225600.5", timezone.utc)
    1767225600.5
    """
    stripped = text.strip()
    try:
        value = float(stripped)
    except ValueError:
        pass
    else:
        if not math.isfinite(value):
            raise ValueError(f"time {text!r} is not finite")
        return value
    try:
        moment = datetime.fromisoformat(stripped)
    except ValueError:
        raise ValueError(
            f"time {text[:40]!r} is neither epoch seconds nor ISO 8601 (e.g. 2026-03-01T12:00:00Z)"
        ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=zone)
    return moment.timestamp()


def time_zone(name: str) -> tzinfo:
    """Return the IANA zone ``name``; raise ValueError naming it when unknown."""
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"unknown time zone {name!r}; expected an IANA name such as 'UTC' or 'Europe/Dublin'"
        ) from None


#: What a reader has counted so far, as the child reading ahead sends it.
_TALLIES = (
    "topics",
    "lines",
    "bad_lines",
    "first_problem",
    "first_time_s",
    "last_time_s",
    "backwards",
    "chars_read",
)


class HistoryReader:
    """Iterate over the values of a trend export or a capture, in file order.

    Parameters
    ----------
    path : str or Path
        The file (``.gz`` is decompressed).
    kind : {"auto", "csv", "capture"}, optional
        The format; ``"auto"`` goes by the extension (``.csv``; ``.jsonl``,
        ``.ndjson``) and otherwise by the first character (``{``: capture).
    on_bad_line : {"stop", "skip"}, optional
        Raise :class:`HistoryError` at the first unreadable line, or count it
        in :attr:`bad_lines` and go on.
    zone : str, optional
        IANA zone of trend export times written without one (default UTC).

    Attributes
    ----------
    kind : str
        ``"csv"`` or ``"capture"``, once known.
    lines : int
        Lines read so far.
    bad_lines : int
        Lines skipped as unreadable.
    first_problem : str or None
        The first skipped line's error (``file:line: why``).
    first_time_s, last_time_s : float or None
        Earliest and latest time read.
    backwards : int
        Rows or messages earlier than one before them (they are aligned as
        late samples would be live).
    chars_read : int
        Characters read so far (for progress; the file size is :attr:`size`).
    size : int
        Size of the file in bytes (compressed size for ``.gz``).

    Raises
    ------
    ValueError
        If ``kind``, ``on_bad_line`` or ``zone`` is unknown.
    OSError
        If the file cannot be opened.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        kind: Literal["auto", "csv", "capture"] = "auto",
        on_bad_line: BadLinePolicy = "stop",
        zone: str = "UTC",
    ) -> None:
        if kind not in ("auto", "csv", "capture"):
            raise ValueError(f"kind must be 'auto', 'csv' or 'capture', got {kind!r}")
        if on_bad_line not in BAD_LINE_POLICIES:
            raise ValueError(f"on_bad_line must be one of {BAD_LINE_POLICIES}, got {on_bad_line!r}")
        self.path = Path(path)
        self._zone = time_zone(zone)
        self._zone_name = zone
        self.on_bad_line = on_bad_line
        self.size = self.path.stat().st_size
        self.kind = self._kind(kind)
        self.lines = 0
        self.bad_lines = 0
        self.first_problem: str | None = None
        self.first_time_s: float | None = None
        self.last_time_s: float | None = None
        self.backwards = 0
        self.chars_read = 0
        self._handed = 0  # physical lines read from the file
        #: MQTT topics of a trend export's point columns, once its header is read.
        self.topics: list[str] = []
        self._latest = -math.inf

    def _open(self) -> IO[str]:
        if self.path.suffix == ".gz":
            return io.TextIOWrapper(gzip.open(self.path, "rb"), encoding="utf-8", newline="")
        return self.path.open(encoding="utf-8", newline="")

    def _kind(self, kind: str) -> str:
        if kind != "auto":
            return kind
        suffixes = [s.lower() for s in self.path.suffixes if s.lower() != ".gz"]
        last = suffixes[-1] if suffixes else ""
        if last == ".csv":
            return "csv"
        if last in (".jsonl", ".ndjson"):
            return "capture"
        with self._open() as handle:
            for line in handle:
                if line.strip():
                    return "capture" if line.lstrip().startswith("{") else "csv"
        return "csv"

    def __iter__(self) -> Iterator[Recorded]:
        with self._open() as handle:
            lines = self._counted(handle)
            if self.kind == "csv":
                for row in self._csv(lines):
                    for topic, cell in zip(self.topics, row.cells, strict=True):
                        if cell:
                            yield Recorded(row.time_s, topic, cell.encode("utf-8"), True, row.line)
            else:
                yield from self._capture(lines)

    def rows(self) -> Iterator[TrendRow]:
        """Iterate over the rows of a trend export (all its cells at once, for speed).

        The same values as iterating over the reader, grouped by row; the
        point columns' topics are :attr:`topics` once the header is read.

        Raises
        ------
        ValueError
            If the file is a capture.
        HistoryError
            As iterating over the reader.
        """
        if self.kind != "csv":
            raise ValueError(f"{self.path} is a capture, not a trend export: it has no rows")
        with self._open() as handle:
            yield from self._csv(self._counted(handle))

    def blocks(self, *, ahead: bool = False) -> Iterator[TrendBlock]:
        """Iterate over the rows of a trend export in blocks (see :class:`TrendBlock`).

        The rows of :meth:`rows`, a few hundred at a time, with the same bad
        lines: at an unreadable line that stops the reading, the rows before
        it come as a block first, then the :class:`HistoryError`. With
        ``ahead``, a child process reads and converts the blocks while the
        caller works on the one before (a second core); the reader's
        tallies (:attr:`lines`, :attr:`chars_read`...) are the child's as of
        the block last handed out.

        Raises
        ------
        ValueError
            If the file is a capture.
        HistoryError
            As :meth:`rows`.
        """
        if self.kind != "csv":
            raise ValueError(f"{self.path} is a capture, not a trend export: it has no rows")
        if ahead:
            yield from self._blocks_ahead()
            return
        with self._open() as handle:
            yield from self._blocks(self._counted(handle, defer=True))

    def _state(self) -> tuple[Any, ...]:
        """Return the tallies a reader reading ahead sends its parent with each block."""
        return tuple(getattr(self, name) for name in _TALLIES)

    def _take_state(self, state: tuple[Any, ...]) -> None:
        """Take the tallies of :meth:`_state` (from the child reading ahead)."""
        for name, value in zip(_TALLIES, state, strict=True):
            setattr(self, name, value)

    def _blocks_ahead(self) -> Iterator[TrendBlock]:
        """:meth:`blocks` read by a child process, a block or so ahead.

        The child (this module run by the same interpreter) reads the file
        as :meth:`blocks` does and writes each block, pickled, with the
        reader's tallies to its standard output; an exception it meets comes
        after the blocks before it and is raised here. The pipe holds it
        back once it is ahead. The child is ended and waited for however
        the iteration ends.
        """
        command = [
            sys.executable,
            "-c",
            _AHEAD_MAIN,
            json.dumps([sys.path, str(self.path), self.on_bad_line, self._zone_name]),
        ]
        child = subprocess.Popen(command, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE)
        pipe: IO[bytes] = child.stdout  # type: ignore[assignment]  # stdout=PIPE: never None
        try:
            while True:
                try:
                    kind, item, state = pickle.load(pipe)
                except EOFError:
                    raise OSError(
                        f"the process reading {self.path} ended (exit code {child.wait()})"
                    ) from None
                self._take_state(state)
                if kind == "block":
                    yield item
                elif kind == "raise":
                    raise item
                else:
                    return
        finally:
            pipe.close()
            if child.poll() is None:
                child.terminate()
            child.wait()

    def _counted(self, handle: IO[str], *, defer: bool = False) -> Iterator[str]:
        """Hand out the lines, counted; stop or count a break in compressed data.

        With ``defer`` a break raises :class:`_Broken` whatever the policy:
        the caller reads the lines before it first, then calls :meth:`_bad`.
        """
        try:
            for line in handle:
                self.chars_read += len(line)
                self._handed += 1
                yield line
        except (EOFError, gzip.BadGzipFile, zlib.error) as err:
            # a compressed file cut short (a capture killed mid-write) or damaged
            message = f"compressed data ends or breaks here: {err}"
            if defer:
                raise _Broken(self._handed + 1, message) from None
            self._bad(self._handed + 1, message)

    def _bad(self, line: int, message: str) -> None:
        """Stop or count an unreadable line."""
        error = HistoryError(self.path, line, message)
        if self.on_bad_line == "stop":
            raise error
        self.bad_lines += 1
        if self.first_problem is None:
            self.first_problem = str(error)

    def _seen(self, time_s: float) -> None:
        if time_s < self._latest:
            self.backwards += 1
        else:
            self._latest = time_s
        if self.first_time_s is None or time_s < self.first_time_s:
            self.first_time_s = time_s
        if self.last_time_s is None or time_s > self.last_time_s:
            self.last_time_s = time_s

    # -- trend export ---------------------------------------------------------
    def _blocks(self, lines: Iterator[str]) -> Iterator[TrendBlock]:
        rows = csv.reader(lines, strict=True)
        try:
            width = self._header(rows)  # the csv module reads no further than the header's lines
        except _Broken as err:
            self._bad(err.line, err.reason)
            width = self._header(rows)  # the file ends within the header: as rows() reads it
        limit = csv.field_size_limit()
        while True:
            chunk: list[str] = []
            broken: _Broken | None = None
            try:
                chunk.extend(itertools.islice(lines, BLOCK_LINES))
            except _Broken as err:  # compressed data breaks off: the file ends there
                broken = err
            if any('"' in line or "\x00" in line or len(line) > limit for line in chunk):
                # quoted cells (a line break may be in one), NUL, huge fields: the csv module
                rest = iter(()) if broken is not None else lines
                yield from self._csv_blocks(itertools.chain(chunk, rest), width, self.lines)
            elif chunk:
                yield from self._chunk(chunk, width)
                if broken is None:
                    continue
            if broken is not None:
                self._bad(broken.line, broken.reason)
            return

    def _csv_blocks(self, lines: Iterable[str], width: int, before: int) -> Iterator[TrendBlock]:
        """Blocks of the rows the csv module reads from ``lines`` (line ``before + 1`` on)."""
        rows: list[TrendRow] = []
        try:
            for row in self._csv_rows(csv.reader(lines, strict=True), width, before):
                rows.append(row)
                if len(rows) == BLOCK_LINES:
                    yield TrendBlock.of_rows(rows)
                    rows = []
        except (HistoryError, _Broken) as err:
            if rows:  # the rows before the line that stops the reading come first
                yield TrendBlock.of_rows(rows)
            if isinstance(err, _Broken):  # compressed data breaks off: the file ends there
                self._bad(err.line, err.reason)
                return
            raise
        if rows:
            yield TrendBlock.of_rows(rows)

    def _chunk(self, chunk: list[str], width: int) -> Iterator[TrendBlock]:
        """Read lines without quotes or NUL (each a row) into a block, as ``_csv_rows`` would."""
        before = self.lines
        commas = width - 1
        problems: list[tuple[int, str]] = []
        if all(line.count(",") == commas for line in chunk):
            kept, numbers = chunk, list(range(before + 1, before + 1 + len(chunk)))
        else:
            kept, numbers = [], []
            for number, line in enumerate(chunk, start=before + 1):
                fields = line.count(",") + 1
                if fields == width:
                    kept.append(line)
                    numbers.append(number)
                elif fields > 1 or line.strip():  # a line of blanks is a blank line
                    problems.append((number, f"{fields} fields, the header has {width}"))
        body = ",".join(line.rstrip("\r\n") for line in kept)
        cells = body.split(",") if kept else []
        if any(blank in body for blank in _ASCII_BLANKS) or not body.isascii():
            cells = [cell.strip() for cell in cells]
        times = cells[::width]
        del cells[::width]
        try:
            time_s = [float(text) for text in times]
            timed = all(map(math.isfinite, time_s))
        except ValueError:
            timed = False
        if not timed:  # ISO 8601 times, or bad ones: one at a time
            time_s = []
            for number, text in zip(numbers, times, strict=True):
                try:
                    time_s.append(parse_time(text, self._zone))
                except ValueError as err:
                    problems.append((number, f"first column: {err}"))
                    time_s.append(math.nan)
        good = list(range(len(kept)))
        end = before + len(chunk)
        if problems:
            problems.sort()
            if self.on_bad_line == "stop":  # the rows before the first, then the error
                end = problems[0][0]
                problems = problems[:1]
            bad = {number for number, _ in problems}
            good = [i for i in good if numbers[i] <= end and numbers[i] not in bad]
        if good:
            values, empty, longest = _numbers(
                cells, width - 1, plain_text=body.isascii() and "_" not in body
            )
            if len(good) < len(kept):
                values = values[good]
                empty = None if empty is None else empty[good]
                if empty is not None and not empty.any():
                    empty = None
            times_kept = np.array(time_s, dtype=np.float64)[good]
            self._seen_many(times_kept)
            self.lines = end
            yield TrendBlock(
                time_s=times_kept,
                line=np.array(numbers, dtype=np.int64)[good],
                values=values,
                empty=empty,
                longest=longest,
                texts=[kept[i] for i in good],
                split=True,
            )
        self.lines = end
        for number, message in problems:
            self._bad(number, message)

    def _seen_many(self, times: NDArray[np.float64]) -> None:
        """:meth:`_seen` for each of ``times`` in turn."""
        if not times.shape[0]:
            return
        running = np.maximum.accumulate(np.concatenate(([self._latest], times)))
        self.backwards += int(np.count_nonzero(times < running[:-1]))
        self._latest = float(running[-1])
        low, high = float(times.min()), float(times.max())
        if self.first_time_s is None or low < self.first_time_s:
            self.first_time_s = low
        if self.last_time_s is None or high > self.last_time_s:
            self.last_time_s = high

    def _csv(self, lines: Iterator[str]) -> Iterator[TrendRow]:
        rows = csv.reader(lines, strict=True)
        yield from self._csv_rows(rows, self._header(rows), 0)

    def _header(self, rows: Any) -> int:
        """Read the header row from a ``csv.reader``; set :attr:`topics`; return its width."""
        try:
            header = next(rows)
        except StopIteration:
            raise HistoryError(self.path, 1, "empty file: expected a header row") from None
        except csv.Error as err:
            raise HistoryError(self.path, rows.line_num, f"header: {err}") from None
        self.lines = rows.line_num
        self.topics = self._topics(header, rows.line_num)
        return len(header)

    def _csv_rows(self, rows: Any, width: int, before: int) -> Iterator[TrendRow]:
        """Read the rows of a ``csv.reader`` whose first line is line ``before + 1`` of the file."""
        while True:
            try:
                row = next(rows)
            except StopIteration:
                return
            except csv.Error as err:
                self.lines = before + rows.line_num
                self._bad(self.lines, f"not CSV: {err}")
                continue
            line = before + rows.line_num
            self.lines = line
            if not row or (len(row) == 1 and not row[0].strip()):
                continue  # a blank line
            if len(row) != width:
                self._bad(line, f"{len(row)} fields, the header has {width}")
                continue
            try:
                time_s = parse_time(row[0], self._zone)
            except ValueError as err:
                self._bad(line, f"first column: {err}")
                continue
            self._seen(time_s)
            yield TrendRow(time_s, line, [cell.strip() for cell in row[1:]])

    def _topics(self, header: list[str], line: int) -> list[str]:
        if len(header) < 2:
            raise HistoryError(
                self.path,
                line,
                "header: expected a time column and at least one point column whose header "
                f"is its MQTT topic, got {len(header)} column(s)",
            )
        topics = [name.strip() for name in header[1:]]
        seen: set[str] = set()
        for index, topic in enumerate(topics, start=2):
            try:
                validate_topic(topic)
            except ValueError as err:
                raise HistoryError(
                    self.path, line, f"header column {index}: not an MQTT topic name: {err}"
                ) from None
            if topic in seen:
                raise HistoryError(
                    self.path, line, f"header column {index}: topic {topic!r} appears twice"
                )
            seen.add(topic)
        return topics

    # -- capture --------------------------------------------------------------
    def _capture(self, lines: Iterator[str]) -> Iterator[Recorded]:
        for number, text in enumerate(lines, start=1):
            self.lines = number
            if not text.strip():
                continue
            try:
                item = _captured(text)
            except ValueError as err:
                self._bad(number, str(err))
                continue
            time_s, topic, payload = item
            self._seen(time_s)
            yield Recorded(time_s, topic, payload, False, number)


def _read_ahead(path: str, on_bad_line: BadLinePolicy, zone: str) -> None:
    """Child process of :meth:`HistoryReader.blocks` with ``ahead``: read, write, end."""
    out = sys.stdout.buffer
    reader = HistoryReader(path, kind="csv", on_bad_line=on_bad_line, zone=zone)
    try:
        for block in reader.blocks():
            pickle.dump(("block", block, reader._state()), out, pickle.HIGHEST_PROTOCOL)
    except BrokenPipeError:
        return  # the parent stopped reading
    except Exception as err:  # what stops the reading stops the parent's
        message: tuple[str, Any, tuple[Any, ...]] = ("raise", err, reader._state())
    else:
        message = ("end", None, reader._state())
    pickle.dump(message, out, pickle.HIGHEST_PROTOCOL)
    out.flush()


#: What the child process of :meth:`HistoryReader.blocks` with ``ahead`` runs: the parent's
#: import path first (the package may be importable only through it), then the reading.
_AHEAD_MAIN: Final = (
    "import json, sys\n"
    "arguments = json.loads(sys.argv[1])\n"
    "sys.path[:] = arguments[0]\n"
    "from arxwatch.daemon.history import _read_ahead\n"
    "_read_ahead(*arguments[1:])\n"
)


def _captured(text: str) -> tuple[float, str, bytes]:
    """Read one capture line; raise ValueError saying what is wrong."""
    try:
        doc: Any = json.loads(text)
    except ValueError as err:
        raise ValueError(f"not a JSON object: {err}") from None
    if type(doc) is not dict:
        raise ValueError("not a JSON object")
    ts: Any = doc.get("ts")
    if type(ts) not in (int, float) or not math.isfinite(ts):
        raise ValueError(f'"ts" must be epoch seconds (a number), got {ts!r:.40}')
    topic = doc.get("topic")
    if not isinstance(topic, str):
        raise ValueError(f'"topic" must be a string, got {topic!r:.40}')
    try:
        validate_topic(topic)
    except ValueError as err:
        raise ValueError(f'"topic": {err}') from None
    if "payload" in doc and "payload_b64" in doc:
        raise ValueError('give "payload" or "payload_b64", not both')
    if "payload" in doc:
        payload = doc["payload"]
        if not isinstance(payload, str):
            raise ValueError(f'"payload" must be a string, got {type(payload).__name__}')
        return float(ts), topic, payload.encode("utf-8")
    encoded = doc.get("payload_b64")
    if not isinstance(encoded, str):
        raise ValueError('expected "payload" (text) or "payload_b64" (base64)')
    try:
        return float(ts), topic, base64.b64decode(encoded, validate=True)
    except (binascii.Error, ValueError):
        raise ValueError('"payload_b64" is not base64') from None


class CaptureWriter:
    """Append MQTT messages to a capture file, one JSON line each.

    The file is opened for appending, so a capture interrupted and started
    again keeps what it had; a ``.gz`` file gets one more gzip member per
    run, which readers take as one stream. :meth:`write` returns once the
    line is handed to the operating system (flushed; with ``flush=False``,
    at the next :meth:`flush`), so a message acknowledged after that is not
    lost if the process dies.

    Parameters
    ----------
    path : str or Path
        The capture file (``.jsonl``, or ``.jsonl.gz`` compressed).

    Raises
    ------
    OSError
        If the file cannot be opened for appending.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._raw: IO[bytes] | None = None
        if self.path.suffix == ".gz":
            self._raw = self.path.open("ab")
            packed = gzip.GzipFile(fileobj=self._raw, mode="ab")
            self._handle: IO[str] = io.TextIOWrapper(packed, encoding="utf-8")
        else:
            self._handle = self.path.open("a", encoding="utf-8")
        self.written = 0

    def write(self, arrival_s: float, topic: str, payload: bytes, *, flush: bool = True) -> None:
        """Append one message; flush unless told not to."""
        doc: dict[str, Any] = {"ts": round(arrival_s, 6), "topic": topic}
        try:
            doc["payload"] = payload.decode("utf-8")
        except UnicodeDecodeError:
            doc["payload_b64"] = base64.b64encode(payload).decode("ascii")
        self._handle.write(json.dumps(doc, ensure_ascii=False, separators=(",", ":")) + "\n")
        if flush:
            self._handle.flush()
        self.written += 1

    def flush(self) -> None:
        """Hand every line written so far to the operating system (a gzip sync flush)."""
        self._handle.flush()

    def close(self) -> None:
        """Flush, end the gzip member, sync to disk and close."""
        if self._handle.closed:
            return
        if self._raw is None:
            self._handle.flush()
            os.fsync(self._handle.fileno())
            self._handle.close()
            return
        self._handle.close()  # writes the gzip trailer; the file itself stays open
        self._raw.flush()
        os.fsync(self._raw.fileno())
        self._raw.close()

    def __enter__(self) -> CaptureWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
