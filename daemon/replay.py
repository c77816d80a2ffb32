"""Replay: a recorded file through the live pipeline, alerts out as JSON Lines.

:func:`replay` feeds every value of a :class:`~arxwatch.daemon.history.HistoryReader`
to the very :class:`~arxwatch.daemon.pipeline.Pipeline` that ``arxwatch run``
uses; only the source of the samples differs. Grid points close by event
time, so the rows, detectors and alert records are those the live service
gives for the same samples, provided each signal arrived within the class's
``lateness_s`` (a message the live service found late is, in a capture, late
here too only if it was recorded late as well).

The clock a replay goes by is the data's own: a capture's recorded arrival
times (the live service's wall clock, which also caps each asset's
frontier), or a trend export's row times. Staleness is checked every
``stale_every_s`` of that time, as the live loop does every 10 s.
"""

from __future__ import annotations

import json
import math
import os
import sys
import time
from collections import Counter
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import IO, Any, Literal

from arxwatch.daemon.config import ConfigError, load_config
from arxwatch.daemon.history import BadLinePolicy, HistoryError, HistoryReader, Recorded
from arxwatch.daemon.library import BaselineFileError, read_site_baselines
from arxwatch.daemon.pipeline import Counts, Pipeline, TrendColumns
from arxwatch.daemon.report import ReportCollector, ReportError, check_report, write_report

__all__ = [
    "ProgressLine",
    "ReplaySummary",
    "describe",
    "replay",
    "run_replay",
    "write_records",
]

#: Values fed between two closings of the grid (crowded assets close sooner).
ADVANCE_EVERY = 2000
#: Samples held per signal beyond a live feed's, for a replay of a trend export: the grid
#: closes every dozen rows or so instead of every row (same rows, fewer and larger steps).
REPLAY_EXTRA_CELLS = 12
#: Trend export rows between two progress reports.
PROGRESS_ROWS = 64
#: Trend exports of at least this size are read and converted by a second process, a block
#: ahead of the one being judged (:meth:`HistoryReader.blocks`), where there is a second core.
READ_AHEAD_BYTES = 4 * 2**20
#: Alert records printed when they are not written to a file.
SHOWN_RECORDS = 40


@dataclass
class ReplaySummary:
    """What a replay saw and did.

    Attributes
    ----------
    values : int
        Values fed (messages of a capture, non-empty cells of a trend export).
    first_time_s, last_time_s : float or None
        Time range of the data.
    counts : Counts
        The pipeline's tallies (samples by outcome, rejects, rows...).
    transitions : Counter
        Alert records written, by (family, severity, state).
    assets : dict
        Assets by state (``monitoring``, ``learning``, ``no_baseline``).
    elapsed_s : float
        Wall time of the replay.
    """

    values: int = 0
    first_time_s: float | None = None
    last_time_s: float | None = None
    counts: Counts = field(default_factory=Counts)
    transitions: Counter[tuple[str, str, str]] = field(default_factory=Counter)
    assets: dict[str, int] = field(default_factory=dict)
    elapsed_s: float = 0.0


def replay(
    pipeline: Pipeline,
    source: Iterable[Recorded],
    on_records: Callable[[list[dict[str, Any]]], None],
    *,
    capped: bool,
    stale_every_s: float = 10.0,
    progress: Callable[[int, float], None] | None = None,
) -> ReplaySummary:
    """Feed ``source`` through ``pipeline``; hand every batch of alert records to ``on_records``.

    Parameters
    ----------
    pipeline : Pipeline
        A fresh pipeline for the site config (its baselines loaded).
    source : iterable of Recorded
        The recorded values in file order (a :class:`HistoryReader`).
    on_records : callable
        Called with each non-empty list of alert records, in order.
    capped : bool
        Whether times are arrival times that cap each asset's frontier, as
        the wall clock does live (a capture); False for a trend export.
    stale_every_s : float, optional
        Data time between staleness checks, > 0.
    progress : callable, optional
        Called now and then with (values so far, latest data time).

    Returns
    -------
    ReplaySummary

    Raises
    ------
    HistoryError
        From the source, at an unreadable line when it stops there.
    """
    if not stale_every_s > 0:
        raise ValueError(f"stale_every_s must be > 0, got {stale_every_s!r}")
    started = time.monotonic()
    summary = ReplaySummary(counts=pipeline.counts)
    latest = earliest = -math.inf
    last_stale = -math.inf

    def emit(records: list[dict[str, Any]]) -> None:
        if records:
            for record in records:
                summary.transitions[(record["family"], record["severity"], record["state"])] += 1
            on_records(records)

    if isinstance(source, HistoryReader) and source.kind == "csv":
        messages = pipeline.counts.messages
        latest, earliest = _replay_rows(pipeline, source, emit, stale_every_s, progress)
        summary.values = pipeline.counts.messages - messages
    else:
        for n, value in enumerate(source, start=1):
            if value.time_s > latest:
                latest = value.time_s
            if value.time_s < earliest or n == 1:
                earliest = value.time_s
            emit(pipeline.feed(value.topic, value.payload, value.time_s, bare=value.bare))
            if n % ADVANCE_EVERY == 0:
                emit(pipeline.advance(latest if capped else None))
                if progress is not None:
                    progress(n, latest)
            if latest - last_stale >= stale_every_s:
                emit(pipeline.advance(latest if capped else None))
                emit(pipeline.check_stale(latest))
                last_stale = latest
            summary.values = n
    emit(pipeline.advance(latest if capped else None))
    if summary.values:
        summary.first_time_s, summary.last_time_s = earliest, latest
    summary.assets = pipeline.asset_states()
    summary.elapsed_s = time.monotonic() - started
    return summary


def _replay_rows(
    pipeline: Pipeline,
    reader: HistoryReader,
    emit: Callable[[list[dict[str, Any]]], None],
    stale_every_s: float,
    progress: Callable[[int, float], None] | None,
) -> tuple[float, float]:
    """Feed a trend export a row at a time (:meth:`Pipeline.feed_block_row`).

    Returns (latest, earliest) row time.

    The clock is the row time: before a row whose time is ``stale_every_s``
    past the last check, staleness is checked at that time, as the live
    loop's clock would before the row's samples arrive. The grid closes
    whenever an asset's held samples fill up (``IntakeBank.crowded``), so a
    pipeline made with :data:`REPLAY_EXTRA_CELLS` steps its fleet every
    few rows. A file of :data:`READ_AHEAD_BYTES` or more is read ahead by
    a second process.
    """
    latest, earliest, last_stale = -math.inf, math.inf, -math.inf
    columns: TrendColumns | None = None
    n = 0
    ahead = reader.size >= READ_AHEAD_BYTES and (os.cpu_count() or 1) > 1
    for block in reader.blocks(ahead=ahead):
        if columns is None:
            columns = TrendColumns(reader.topics)
        for row, time_s in enumerate(block.time_s.tolist()):
            earliest = min(earliest, time_s)
            if time_s > latest:
                latest = time_s
                if latest - last_stale >= stale_every_s:
                    emit(pipeline.check_stale(latest))
                    last_stale = latest
            emit(pipeline.feed_block_row(columns, block, row))
            n += 1
            if progress is not None and n % PROGRESS_ROWS == 0:
                progress(pipeline.counts.messages, latest)
    return latest, earliest


def write_records(out: IO[str], records: list[dict[str, Any]]) -> None:
    """Write alert records as JSON Lines (schema ``arxwatch.alert/1``), one per line."""
    for record in records:
        out.write(json.dumps(record, ensure_ascii=False, separators=(",", ":")) + "\n")


class ProgressLine:
    """A one-line progress display on a terminal: percentage, values, alerts, data time.

    Parameters
    ----------
    reader : HistoryReader
        For the share of the file read.
    out : text stream
        A terminal (stderr); the line is redrawn in place.
    alerts : callable
        Returns the number of alert records so far.
    """

    def __init__(self, reader: HistoryReader, out: IO[str], alerts: Callable[[], int]) -> None:
        self.reader, self.out, self.alerts = reader, out, alerts
        self._last = 0.0

    def __call__(self, values: int, latest_s: float) -> None:
        """Redraw, at most five times a second."""
        now = time.monotonic()
        if now - self._last < 0.2:
            return
        self._last = now
        self.out.write("\r" + self.text(values, latest_s))
        self.out.flush()

    def text(self, values: int, latest_s: float) -> str:
        """Return the progress line."""
        reader = self.reader
        share = ""
        if reader.size and reader.path.suffix != ".gz":
            share = f"{min(100.0, 100.0 * reader.chars_read / reader.size):5.1f} %  "
        stamp = time.strftime("%Y-%m-%d %H:%M", time.gmtime(latest_s))
        return f"replay: {share}{values:,} values  {self.alerts():,} alert records  at {stamp} UTC"

    def finish(self) -> None:
        """End the line so that later output starts on a fresh one."""
        self.out.write("\n")
        self.out.flush()


def describe(summary: ReplaySummary, reader: HistoryReader) -> list[str]:
    """Plain lines summing up a replay, for the terminal."""
    counts = summary.counts
    lines = [
        f"read {reader.path} ({reader.kind}): {summary.values:,} values, {reader.lines:,} lines"
        + (f", {reader.bad_lines:,} unreadable lines skipped" if reader.bad_lines else ""),
    ]
    if summary.first_time_s is not None and summary.last_time_s is not None:
        lines.append(f"data from {_iso(summary.first_time_s)} to {_iso(summary.last_time_s)}")
    if reader.first_problem:
        lines.append(f"first unreadable line: {reader.first_problem}")
    if reader.backwards:
        lines.append(f"{reader.backwards:,} values earlier than one before them (aligned as late)")
    lines.append(
        f"rows {counts.rows:,}, judged {counts.rows_judged:,}; grid points without a complete "
        f"row {counts.grid_points_skipped:,}"
    )
    lines.append("samples: " + _tally(counts.samples))
    if counts.sample_gaps:
        lines.append(f"gaps in the samples of checked signals: {counts.sample_gaps:,}")
    if counts.rejected:
        lines.append("payloads rejected: " + _tally(counts.rejected))
    if counts.refused:
        lines.append("topics refused: " + _tally(counts.refused))
    lines.append("assets: " + _tally(summary.assets))
    raised: Counter[str] = Counter()
    for (family, severity, state), n in summary.transitions.items():
        if state == "raised":
            raised[f"{family} {severity}"] += n
    lines.append("alerts raised: " + (_tally(raised) if raised else "none"))
    lines.append(f"replayed in {summary.elapsed_s:.1f} s")
    return lines


def _tally(counter: Mapping[str, int]) -> str:
    items = [(k, v) for k, v in counter.items() if v]
    return ", ".join(f"{k} {v:,}" for k, v in sorted(items)) or "none"


def _iso(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


def run_replay(
    config_path: str,
    input_path: str,
    *,
    alerts_path: str | None,
    kind: Literal["auto", "csv", "capture"],
    on_bad_line: BadLinePolicy,
    zone: str,
    out: IO[str],
    err: IO[str],
    report_path: str | None = None,
) -> int:
    """``arxwatch replay``: return the exit status (0 done, 2 bad input, 1 cannot write).

    Alerts go to ``alerts_path`` as JSON Lines (``-`` for ``out``); the
    summary to ``out``; errors and the progress line to ``err``; the HTML
    report (:mod:`arxwatch.daemon.report`) to ``report_path``, checked
    before the replay starts (1 when matplotlib is missing).
    """
    try:
        config = load_config(config_path)
    except ConfigError as error:
        print(f"arxwatch replay: {error}", file=err)
        return 2
    if report_path is not None:
        try:
            check_report(report_path)
        except ReportError as error:
            print(f"arxwatch replay: {error}", file=err)
            return 1
    try:
        libraries = read_site_baselines(config)
        reader = HistoryReader(input_path, kind=kind, on_bad_line=on_bad_line, zone=zone)
    except (BaselineFileError, ValueError) as error:
        print(f"arxwatch replay: {error}", file=err)
        return 2
    except OSError as error:
        print(f"arxwatch replay: {input_path}: {error.strerror}", file=err)
        return 2
    try:
        sink = sys.stdout if alerts_path == "-" else _open_alerts(alerts_path)
    except OSError as error:
        print(f"arxwatch replay: {alerts_path}: cannot write: {error.strerror}", file=err)
        return 1
    written = 0
    shown: list[str] = []

    def on_records(records: list[dict[str, Any]]) -> None:
        nonlocal written
        written += len(records)
        if collector is not None:
            collector.add_records(records)
        if sink is not None:
            write_records(sink, records)
        else:
            shown.extend(_line(record) for record in records)

    progress = ProgressLine(reader, err, lambda: written) if err.isatty() else None
    extra = REPLAY_EXTRA_CELLS if reader.kind == "csv" else 0
    pipeline = Pipeline(config, libraries, extra_cells=extra, backend="auto")
    collector = ReportCollector(pipeline) if report_path is not None else None
    try:
        summary = replay(
            pipeline, reader, on_records, capped=reader.kind == "capture", progress=progress
        )
    except HistoryError as error:
        if progress is not None:
            progress.finish()
        print(f"arxwatch replay: {error}", file=err)
        print("  (--on-bad-line skip counts such lines and goes on)", file=err)
        return 2
    except OSError as error:  # the file, or the process reading ahead, failed mid-way
        if progress is not None:
            progress.finish()
        print(f"arxwatch replay: {input_path}: cannot read on: {error}", file=err)
        print(f"  ({written:,} alert records were given out before it)", file=err)
        return 2
    finally:
        if sink is not None and sink is not sys.stdout:
            sink.close()
    if progress is not None:
        progress.finish()
    report = err if alerts_path == "-" else out  # stdout carries the records then
    for line in shown[:SHOWN_RECORDS]:
        print(line, file=report)
    if len(shown) > SHOWN_RECORDS:
        more = len(shown) - SHOWN_RECORDS
        print(f"... {more:,} more (--alerts FILE keeps them all)", file=report)
    for line in describe(summary, reader):
        print(line, file=report)
    if alerts_path not in (None, "-"):
        print(f"{written:,} alert records written to {alerts_path}", file=report)
    if collector is not None and report_path is not None:
        try:
            sections = write_report(
                report_path,
                collector,
                summary=summary,
                reader=reader,
                config=config,
                config_path=config_path,
            )
        except (ReportError, OSError) as error:  # a StoreError (OSError) names the file
            print(f"arxwatch replay: {error}", file=err)
            return 1
        print(f"report with {sections:,} asset sections written to {report_path}", file=report)
    return 0


def _line(record: dict[str, Any]) -> str:
    """One alert record in one plain line."""
    return (
        f"{record['sample_time']}  {record['asset']}  {record['state']} ({record['severity']}) "
        f"{record['detector']}/{record['signal']}: {record['reading']}"
    )


def _open_alerts(path: str | None) -> IO[str] | None:
    return None if path is None else open(path, "w", encoding="utf-8")  # noqa: SIM115
