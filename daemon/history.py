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
"""

from __future__ import annotations

import base64
import binascii
import csv
import gzip
import io
import json
import math
import os
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime, tzinfo
from pathlib import Path
from typing import IO, Any, Final, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from arxwatch.daemon.route import validate_topic

__all__ = [
    "BAD_LINE_POLICIES",
    "BadLinePolicy",
    "CaptureWriter",
    "HistoryError",
    "HistoryReader",
    "Recorded",
    "TrendRow",
    "parse_time",
    "time_zone",
]

BadLinePolicy = Literal["stop", "skip"]
#: What a reader does with a line it cannot read.
BAD_LINE_POLICIES: Final[tuple[str, ...]] = ("stop", "skip")


class HistoryError(ValueError):
    """A recorded file cannot be read; the message names the file and line."""

    def __init__(self, path: str | Path, line: int, message: str) -> None:
        super().__init__(f"{path}:{line}: {message}")
        self.path = str(path)
        self.line = line
        self.reason = message


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

    def _counted(self, handle: IO[str]) -> Iterator[str]:
        try:
            for line in handle:
                self.chars_read += len(line)
                yield line
        except (EOFError, gzip.BadGzipFile, zlib.error) as err:
            # a compressed file cut short (a capture killed mid-write) or damaged
            self._bad(self.lines + 1, f"compressed data ends or breaks here: {err}")

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
    def _csv(self, lines: Iterator[str]) -> Iterator[TrendRow]:
        rows = csv.reader(lines, strict=True)
        try:
            header = next(rows)
        except StopIteration:
            raise HistoryError(self.path, 1, "empty file: expected a header row") from None
        except csv.Error as err:
            raise HistoryError(self.path, rows.line_num, f"header: {err}") from None
        self.lines = rows.line_num
        self.topics = self._topics(header, rows.line_num)
        width = len(header)
        while True:
            try:
                row = next(rows)
            except StopIteration:
                return
            except csv.Error as err:
                self.lines = rows.line_num
                self._bad(rows.line_num, f"not CSV: {err}")
                continue
            line = rows.line_num
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
