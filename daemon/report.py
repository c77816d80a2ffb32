"""The replay report: one self-contained HTML file of what a replay judged and raised.

``arxwatch replay --report OUT.html`` attaches a
:class:`~arxwatch.daemon.trace.FleetTrace` to the fleet monitor of every
asset class (:class:`ReportCollector`), gathers the alert records as they
are written, and after the replay renders (:func:`write_report`):

- the caution, what was replayed (files, time span, counts), a summary table
  (assets by state, alerts raised by detector and severity, data quality
  and sample counts) and the list of alert intervals with their readings;
- one section per asset, alerted assets first and at most ``max_sections``
  of them, with stacked plots on one UTC time axis: measured output against
  the commissioning model's one-step prediction, the normalised innovation,
  the CUSUM with its threshold, and the physical read-out (gain per input,
  time constant, dead time, offset) against the baseline and its tolerance
  band, then the Wald distance; alert intervals shaded on every plot.

Plots are PNG images made with matplotlib's Agg canvas (no pyplot, no
global state) and embedded as base64; the CSS is inline; the file loads
nothing from anywhere. matplotlib is the optional extra ``report``;
:func:`check_report` says so before a replay starts. Each plotted series is
reduced to at most :data:`PLOT_POINTS` points by a min/max envelope, so a
month of one-minute rows renders as fast as a day.
"""

from __future__ import annotations

import base64
import html
import importlib
import io
import math
import os
import textwrap
import time
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np
from numpy.typing import NDArray

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.config import Config
from arxwatch.daemon.store import write_atomically
from arxwatch.daemon.trace import DEFAULT_MAX_BYTES, FleetTrace, attach_traces

if TYPE_CHECKING:
    from matplotlib.axes import Axes

    from arxwatch.daemon.history import HistoryReader
    from arxwatch.daemon.pipeline import Counts, Pipeline

__all__ = [
    "INSTALL_HINT",
    "MAX_SECTIONS",
    "PLOT_POINTS",
    "AlertInterval",
    "ReportCollector",
    "ReplayFacts",
    "ReportError",
    "alert_intervals",
    "check_report",
    "write_report",
]

#: What to run when the plotting library is missing.
INSTALL_HINT = "pip install 'arxwatch[report]'"
#: Asset sections shown by default; the others are counted, not drawn.
MAX_SECTIONS = 50
#: Alert intervals listed at the top; the alert file has them all.
MAX_LISTED = 300
#: Points per plotted series at most (a min/max envelope beyond that).
PLOT_POINTS = 1600
#: Evaluations up to which each is marked with a dot (beyond, the dots merge into a smear).
_DOTTED = 200

CAUTION_HTML = (
    "<strong>Advisory only.</strong> arxwatch gives maintenance information. It is "
    "<strong>not a life-safety system</strong> and must not be used for smoke control, "
    "fire or smoke dampers, stair pressurisation, refrigerant or combustion safety. "
    "Verify on site before acting; any work on equipment follows local codes, the "
    "manufacturer's instructions and licensed practice."
)

_SHADE = {  # (family, severity) -> colour of the alert shading
    ("behaviour", "warning"): "#f5a623",
    ("behaviour", "critical"): "#d0021b",
    ("data_quality", "warning"): "#8e8e8e",
    ("data_quality", "critical"): "#4a4a4a",
}
_DETECTOR_WORDS = {
    "innovation_mean": "steady offset of the prediction error (CUSUM)",
    "innovation_variance": "change of the prediction-error spread",
    "innovation_whiteness": "correlated prediction errors (unmodelled dynamics)",
    "parameter_drift": "model coefficients moved (Wald distance)",
    "feature_drift": "physical read-out moved (Wald distance)",
    "physical_band": "read-out outside its tolerance band",
    "stale": "no fresh samples",
    "stuck": "flat-lined signal",
    "out_of_range": "value outside its valid range",
    "gap": "gaps in the data",
}


class ReplayFacts(Protocol):
    """What the report reads of a finished replay (a ``ReplaySummary``)."""

    values: int
    first_time_s: float | None
    last_time_s: float | None
    counts: Counts
    assets: dict[str, int]
    elapsed_s: float


class ReportError(RuntimeError):
    """The report cannot be made: plotting library missing, output folder unusable."""


def check_report(path: str | Path) -> None:
    """Check, before a replay, that the report at ``path`` can be made.

    Raises
    ------
    ReportError
        If matplotlib cannot be imported (the message says how to install
        it), or the folder of ``path`` is missing or not writable.
    """
    try:
        importlib.import_module("matplotlib")
    except ImportError as error:
        raise ReportError(
            f"--report needs the plotting library matplotlib, which is not installed "
            f"({error}); install the optional extra: {INSTALL_HINT}"
        ) from None
    folder = Path(path).parent
    if not folder.is_dir():
        raise ReportError(f"{path}: cannot write the report: folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise ReportError(f"{path}: cannot write the report: folder {folder} is not writable")


@dataclass(frozen=True)
class AlertInterval:
    """One alert episode: from its first raised record to its cleared one.

    Attributes
    ----------
    asset, detector, family, signal : str
        As in the alert records.
    severity : str
        The highest severity the episode reached.
    raised_s : float
        Sample time of the first raised record (epoch seconds).
    cleared_s : float or None
        Sample time of the cleared record; None if still raised at the end.
    reading : str
        The plain-language reading of the last raised record.
    mode : str or None
        Operating mode of the baseline it was judged against.
    """

    asset: str
    detector: str
    family: str
    signal: str
    severity: str
    raised_s: float
    cleared_s: float | None
    reading: str
    mode: str | None


def _epoch(iso: str) -> float:
    return datetime.fromisoformat(iso.replace("Z", "+00:00")).timestamp()


def alert_intervals(records: Iterable[Mapping[str, Any]]) -> list[AlertInterval]:
    """Pair raised and cleared alert records (schema ``arxwatch.alert/1``) by their id.

    An escalation (a second raised record of the same id) raises the
    severity of the episode; episodes never cleared end open (``cleared_s``
    None). Returned in order of their raised time.
    """
    collector = _Intervals()
    collector.add(records)
    return collector.all()


class _Intervals:
    """Alert episodes built record by record."""

    def __init__(self) -> None:
        self.open: dict[str, AlertInterval] = {}
        self.closed: list[AlertInterval] = []
        self.raised: Counter[tuple[str, str, str]] = Counter()  # (family, detector, severity)
        self.cleared: Counter[tuple[str, str]] = Counter()  # (family, detector)

    def add(self, records: Iterable[Mapping[str, Any]]) -> None:
        for r in records:
            key, t = str(r["id"]), _epoch(r["sample_time"])
            if r["state"] == "raised":
                self.raised[(r["family"], r["detector"], r["severity"])] += 1
                before = self.open.get(key)
                severity = r["severity"]
                if before is not None and before.severity == "critical":
                    severity = "critical"
                self.open[key] = AlertInterval(
                    asset=r["asset"],
                    detector=r["detector"],
                    family=r["family"],
                    signal=r["signal"],
                    severity=severity,
                    raised_s=t if before is None else before.raised_s,
                    cleared_s=None,
                    reading=r["reading"],
                    mode=r.get("mode"),
                )
            else:
                self.cleared[(r["family"], r["detector"])] += 1
                episode = self.open.pop(key, None)
                if episode is not None:
                    self.closed.append(
                        AlertInterval(**{**episode.__dict__, "cleared_s": t})  # frozen copy
                    )

    def all(self) -> list[AlertInterval]:
        return sorted([*self.closed, *self.open.values()], key=lambda i: (i.raised_s, i.asset))


class ReportCollector:
    """What the report needs, gathered during a replay.

    Attaches a trace to the fleet monitor of every asset class of
    ``pipeline`` and keeps the alert episodes of the records handed to
    :meth:`add_records`.

    Parameters
    ----------
    pipeline : Pipeline
        The replay's pipeline, before the replay starts.
    max_bytes : int
        Memory budget of all the traces together (shared equally among the
        asset classes); beyond it the traces thin their rows.
    """

    def __init__(self, pipeline: Pipeline, *, max_bytes: int = DEFAULT_MAX_BYTES) -> None:
        self.pipeline = pipeline
        self.traces: dict[str, FleetTrace] = attach_traces(pipeline, max_bytes=max_bytes)
        self._intervals = _Intervals()

    def add_records(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Take alert records as the replay writes them."""
        self._intervals.add(records)

    def intervals(self) -> list[AlertInterval]:
        """Return the alert episodes so far, in order of their raised time."""
        return self._intervals.all()


# -- the page -------------------------------------------------------------------


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def _iso(t: float | None) -> str:
    if t is None or not math.isfinite(t):
        return "-"
    return time.strftime("%Y-%m-%d %H:%M", time.gmtime(t))


def _n(value: int) -> str:
    return f"{value:,}"


_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:0;color:#1d1d1d;
background:#fafafa;line-height:1.4}
main{max-width:1240px;margin:0 auto;padding:16px 24px 48px}
h1{font-size:1.5em;margin:0.4em 0}h2{font-size:1.2em;margin:1.4em 0 0.4em;
border-bottom:2px solid #ddd;padding-bottom:4px}h3{font-size:1.05em;margin:1em 0 0.3em}
.caution{background:#fff4e5;border:1px solid #f5a623;border-left:6px solid #f5a623;
padding:10px 14px;margin:10px 0 16px}
table{border-collapse:collapse;margin:6px 0 12px;font-size:0.9em;background:#fff}
th,td{border:1px solid #ddd;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#f0f0f0}td.nw{white-space:nowrap}td.num{text-align:right;font-variant-numeric:tabular-nums}
.grid{display:flex;flex-wrap:wrap;gap:24px}.grid>div{flex:0 1 auto}
section.asset{background:#fff;border:1px solid #ddd;padding:8px 16px 16px;margin:18px 0}
.plot{width:100%;max-width:1200px;height:auto;display:block;margin:8px 0}
.note{color:#555;font-size:0.9em}ol.panels{font-size:0.9em;color:#333;padding-left:1.4em}
.sev-critical{color:#b00015;font-weight:600}.sev-warning{color:#a86500;font-weight:600}
.swatch{display:inline-block;width:14px;height:10px;margin:0 4px 0 10px;opacity:0.5}
nav a{margin-right:10px;white-space:nowrap}
"""


@dataclass(frozen=True)
class _AssetInfo:
    """One asset as the report shows it."""

    asset: str
    asset_class: str | None
    trace: FleetTrace | None
    intervals: tuple[AlertInterval, ...]
    closeness: float  # largest statistic / threshold seen (0 when not traced)

    @property
    def rank(self) -> tuple[float, ...]:
        behaviour = [i for i in self.intervals if i.family == "behaviour"]
        critical = sum(i.severity == "critical" for i in behaviour)
        return (-critical, -len(behaviour), -len(self.intervals), -self.closeness)


def _closeness(trace: FleetTrace, asset: str) -> float:
    """How near the asset came to an alarm: the largest CUSUM or Wald ratio to its limit."""
    rows = trace.rows(asset)
    best = 0.0
    h = trace.cusum_threshold
    if len(rows) and h > 0:
        peak = np.nanmax(np.fmax(rows.cusum_high, rows.cusum_low), initial=0.0)
        best = float(peak) / h
    ev = trace.evaluations(asset)
    if len(ev):
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = ev.distance / ev.distance_limit
        best = max(best, float(np.nanmax(ratio, initial=0.0)))
    return best


def _signal_names(config: Config) -> dict[str, dict[str, str]]:
    """Site names of each class's signals by their topic key (for data-quality alerts)."""
    out: dict[str, dict[str, str]] = {}
    for c in config.asset_classes:
        names = {s.signal: f"{s.name} ({s.unit})" for s in (c.output, *c.inputs)}
        if c.mode is not None:
            names[c.mode.signal] = f"{c.mode.signal} (operating mode)"
        out[c.name] = names
    return out


def _feature_label(feature: str, names: SignalNames | None) -> str:
    """Name a read-out feature or alert signal in the site's words."""
    if names is None:
        return feature
    if feature.startswith("gain_") and feature[5:].isdigit():
        i = int(feature[5:]) - 1
        if i < len(names.inputs):
            return f"gain of {names.inputs[i]} on {names.output}"
    if feature.startswith("dead_time_") and feature.endswith("_s"):
        i = int(feature[10:-2]) - 1
        if i < len(names.inputs):
            return f"dead time of {names.inputs[i]}"
    return {
        "time_constant_s": f"time constant of {names.output}",
        "offset": f"offset of {names.output}",
        "features": "physical read-out",
        "parameters": "model coefficients",
        "innovation": f"prediction error of {names.output}",
    }.get(feature, feature)


def write_report(
    path: str | Path,
    collector: ReportCollector,
    *,
    summary: ReplayFacts,
    reader: HistoryReader,
    config: Config,
    config_path: str | Path,
    max_sections: int = MAX_SECTIONS,
) -> int:
    """Render the report of a finished replay to ``path``; return the asset sections drawn.

    Parameters
    ----------
    path : str or Path
        The HTML file, replaced atomically.
    collector : ReportCollector
        Attached to the replay's pipeline before the replay.
    summary : ReplayFacts
        What :func:`~arxwatch.daemon.replay.replay` returned (a ``ReplaySummary``).
    reader : HistoryReader
        The replayed file (path, format, lines read).
    config : Config
        The site configuration (signal names of data-quality alerts).
    config_path : str or Path
        Where the configuration came from (shown).
    max_sections : int
        Asset sections drawn at most; the rest are counted.

    Raises
    ------
    ReportError
        If matplotlib is missing.
    OSError
        If the file cannot be written (a ``StoreError`` names it).
    """
    check_report(path)
    if max_sections < 0:
        raise ValueError(f"max_sections must be >= 0, got {max_sections!r}")
    intervals = collector.intervals()
    by_asset: dict[str, list[AlertInterval]] = {}
    for interval in intervals:
        by_asset.setdefault(interval.asset, []).append(interval)
    infos: dict[str, _AssetInfo] = {}
    for name, trace in collector.traces.items():
        for asset in trace.assets():
            infos[asset] = _AssetInfo(
                asset, name, trace, tuple(by_asset.get(asset, ())), 0.0
            )  # closeness filled below for the assets that compete for a place
    for asset, found in by_asset.items():
        if asset not in infos:
            infos[asset] = _AssetInfo(
                asset, collector.pipeline.class_of(asset), None, tuple(found), 0.0
            )
    alerted = sorted((i for i in infos.values() if i.intervals), key=lambda i: (i.rank, i.asset))
    quiet = [i for i in infos.values() if not i.intervals]
    if len(alerted) < max_sections and quiet:
        quiet = [
            _AssetInfo(i.asset, i.asset_class, i.trace, (), _closeness(i.trace, i.asset))
            if i.trace is not None
            else i
            for i in quiet
        ]
        quiet.sort(key=lambda i: (i.rank, i.asset))
    chosen = [*alerted, *quiet][:max_sections]
    left_out = len(infos) - len(chosen)
    words = _Words(config, collector)
    first = summary.first_time_s if summary.first_time_s is not None else 0.0
    span = (first, summary.last_time_s if summary.last_time_s is not None else first)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>arxwatch replay report: {_e(Path(reader.path).name)}</title>",
        f"<style>{_CSS}</style></head><body><main>",
        f"<h1>arxwatch replay report: {_e(Path(reader.path).name)}</h1>",
        f'<div class="caution">{CAUTION_HTML}</div>',
        _header(summary, reader, config_path, collector),
        _summary_tables(summary, collector),
        _interval_table(intervals, words),
        _contents(chosen, left_out, len(infos)),
    ]
    for info in chosen:
        parts.append(_section(info, words, span))
    parts.append(
        '<p class="note">Made by <code>arxwatch replay --report</code> at '
        f"{_e(time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime()))}. Times are UTC.</p>"
    )
    parts.append("</main></body></html>\n")
    write_atomically(path, "\n".join(parts).encode("utf-8"))
    return len(chosen)


def _header(
    summary: ReplayFacts, reader: HistoryReader, config_path: str | Path, c: ReportCollector
) -> str:
    """Describe what was replayed: files, time span, counts, plot resolution."""
    counts = summary.counts
    rows = [
        ("input file", f"{reader.path} ({'capture' if reader.kind == 'capture' else 'CSV'})"),
        ("configuration", str(config_path)),
        ("data from", f"{_iso(summary.first_time_s)} to {_iso(summary.last_time_s)} UTC"),
        (
            "values read",
            f"{_n(summary.values)} from {_n(reader.lines)} lines"
            + (f", {_n(reader.bad_lines)} unreadable lines skipped" if reader.bad_lines else ""),
        ),
        (
            "rows",
            f"{_n(counts.rows)} aligned rows (one per asset and sample time), "
            f"{_n(counts.rows_judged)} judged by the detectors",
        ),
    ]
    every = max((t.every for t in c.traces.values()), default=1)
    if every > 1:
        rows.append(
            ("plot resolution", f"one plotted point per {every} judged rows (peaks are kept)")
        )
    rows.append(("replayed in", f"{summary.elapsed_s:.1f} s"))
    body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows)
    return f"<h2>What was replayed</h2><table>{body}</table>"


def _tally_rows(counter: Mapping[str, int], explain: Mapping[str, str] | None = None) -> str:
    items = sorted((k, v) for k, v in counter.items() if v)
    if not items:
        return '<tr><td colspan="2">none</td></tr>'
    words = explain or {}
    return "".join(
        f"<tr><td>{_e(words.get(k, k.replace('_', ' ')))}</td>"
        f'<td class="num" data-count="{_e(k)}">{_n(v)}</td></tr>'
        for k, v in items
    )


def _summary_tables(summary: ReplayFacts, c: ReportCollector) -> str:
    """Assets by state, alerts by detector and severity, data quality and sample counts."""
    counts = summary.counts
    raised, cleared = c._intervals.raised, c._intervals.cleared
    detectors = sorted({(f, d) for f, d, _ in raised} | set(cleared))
    still = Counter((i.family, i.detector) for i in c._intervals.open.values())
    alert_rows = []
    for family, detector in detectors:
        cells = "".join(
            f'<td class="num" data-detector="{_e(detector)}" data-severity="{s}">'
            f"{_n(raised[(family, detector, s)])}</td>"
            for s in ("warning", "critical")
        )
        alert_rows.append(
            f"<tr><td>{_e(detector)}</td><td>{_e(_DETECTOR_WORDS.get(detector, ''))}</td>"
            f"<td>{_e(family.replace('_', ' '))}</td>{cells}"
            f'<td class="num">{_n(cleared[(family, detector)])}</td>'
            f'<td class="num">{_n(still[(family, detector)])}</td></tr>'
        )
    total = sum(raised.values())
    alerts = (
        "<table><tr><th>detector</th><th>what it watches</th><th>family</th>"
        "<th>raised, warning</th><th>raised, critical</th><th>cleared</th>"
        "<th>still raised at the end</th></tr>"
        + ("".join(alert_rows) or '<tr><td colspan="7">no alerts</td></tr>')
        + "</table>"
        f'<p class="note"><span data-total-raised="{total}">{_n(total)}</span> raised records '
        "(an escalation from warning to critical is a second raised record), "
        f"{_n(sum(cleared.values()))} cleared.</p>"
    )
    quality = dict(counts.samples)
    quality.update({f"payload rejected: {k}": v for k, v in counts.rejected.items()})
    quality.update({f"topic refused: {k}": v for k, v in counts.refused.items()})
    quality["grid points without a complete row"] = counts.grid_points_skipped
    quality["gaps in a checked signal's samples"] = counts.sample_gaps
    judged = {"judged": counts.rows_judged, **dict(counts.rows_not_judged)}
    return (
        "<h2>Summary</h2>"
        "<h3>Alerts raised, by detector and severity</h3>"
        f"{alerts}"
        '<div class="grid">'
        f"<div><h3>Assets</h3><table>{_tally_rows(summary.assets)}</table></div>"
        f"<div><h3>Rows</h3><table>{_tally_rows(judged)}</table></div>"
        f"<div><h3>Samples and data quality</h3><table>{_tally_rows(quality)}</table></div>"
        "</div>"
    )


class _Words:
    """The site's words for alert signals: names of data-quality signals and read-outs."""

    def __init__(self, config: Config, collector: ReportCollector) -> None:
        self.quality = _signal_names(config)
        self.class_of = collector.pipeline.class_of
        self.names = {name: trace.names for name, trace in collector.traces.items()}

    def signal(self, i: AlertInterval) -> str:
        """Name the alert's signal as people on site call it."""
        cls = self.class_of(i.asset)
        if cls is None:
            return i.signal
        if i.family == "data_quality":
            return self.quality.get(cls, {}).get(i.signal, i.signal)
        return _feature_label(i.signal, self.names.get(cls))


def _interval_rows(intervals: Sequence[AlertInterval], words: _Words, *, with_asset: bool) -> str:
    rows = []
    for i in intervals:
        link = f'<td class="nw"><a href="#{_anchor(i.asset)}">{_e(i.asset)}</a></td>'
        asset = link if with_asset else ""
        cleared = _iso(i.cleared_s) if i.cleared_s is not None else "still raised"
        mode = f" (mode {_e(i.mode)})" if i.mode else ""
        rows.append(
            f"<tr>{asset}<td>{_e(i.detector)}</td><td>{_e(words.signal(i))}{mode}</td>"
            f'<td class="sev-{_e(i.severity)}">{_e(i.severity)}</td>'
            f'<td class="nw">{_iso(i.raised_s)}</td><td class="nw">{_e(cleared)}</td>'
            f"<td>{_e(i.reading)}</td></tr>"
        )
    head = "<th>asset</th>" if with_asset else ""
    return (
        f"<table><tr>{head}<th>detector</th><th>signal</th><th>severity</th>"
        f"<th>raised (UTC)</th><th>cleared (UTC)</th><th>what it means</th></tr>"
        + "".join(rows)
        + "</table>"
    )


def _interval_table(intervals: Sequence[AlertInterval], words: _Words) -> str:
    """Every alert episode (up to MAX_LISTED), in order of its raised time."""
    if not intervals:
        return "<h2>Alert intervals</h2><p>No alert was raised.</p>"
    shown = intervals[:MAX_LISTED]
    more = ""
    if len(intervals) > len(shown):
        more = (
            f'<p class="note">{_n(len(intervals) - len(shown))} more intervals are not listed '
            "here; <code>--alerts FILE</code> keeps every record.</p>"
        )
    return (
        f"<h2>Alert intervals ({_n(len(intervals))})</h2>"
        '<p class="note">From the first raised record of an alert to its cleared record; '
        "the severity is the highest it reached.</p>"
        + _interval_rows(shown, words, with_asset=True)
        + more
    )


def _anchor(asset: str) -> str:
    return "asset-" + "".join(ch if ch.isalnum() else "-" for ch in asset)


def _contents(chosen: Sequence[_AssetInfo], left_out: int, total: int) -> str:
    """Links to the asset sections, and how many assets were left out."""
    links = " ".join(f'<a href="#{_anchor(i.asset)}">{_e(i.asset)}</a>' for i in chosen)
    note = (
        f'<p class="note">{_n(left_out)} of {_n(total)} assets are not shown: sections go to '
        "assets with alerts first (most critical first), then to those that came closest to "
        "an alarm.</p>"
        if left_out
        else ""
    )
    return f"<h2>Assets ({_n(len(chosen))} shown)</h2><nav>{links}</nav>{note}"


# -- one asset ------------------------------------------------------------------


def _section(info: _AssetInfo, words: _Words, span: tuple[float, float]) -> str:
    """One asset: its alerts, its plots and what each plot shows."""
    trace = info.trace
    head = (
        f'<section class="asset" id="{_anchor(info.asset)}"><h2>{_e(info.asset)}</h2>'
        f'<p class="note">asset class {_e(info.asset_class or "-")}'
    )
    alerts = (
        _interval_rows(info.intervals, words, with_asset=False)
        if info.intervals
        else '<p class="note">No alert for this asset.</p>'
    )
    if trace is None or trace.names is None or info.asset not in trace:
        return (
            f"{head}. This asset was never judged in this replay (no baseline for it, or "
            f"still learning one), so there is nothing to plot.</p>{alerts}</section>"
        )
    rows = trace.rows(info.asset)
    modes = sorted({m for m in trace.evaluations(info.asset).mode if m is not None})
    note = f"; {_n(len(rows))} plotted rows"
    if rows.every > 1:
        note += f", one per {rows.every} judged rows"
    if modes:
        note += "; operating modes " + ", ".join(_e(m) for m in modes)
    png, captions = _figure(info.asset, trace, info.intervals, span)
    return (
        f"{head}{note}.</p>{alerts}"
        f'<img class="plot" alt="plots of {_e(info.asset)}" '
        f'src="data:image/png;base64,{base64.b64encode(png).decode("ascii")}">'
        '<ol class="panels">' + "".join(f"<li>{c}</li>" for c in captions) + "</ol></section>"
    )


# -- plots ----------------------------------------------------------------------

Series = NDArray[np.float64]


def _with_gaps(t: Series, *series: NDArray[Any]) -> tuple[Series, ...]:
    """Insert a ``nan`` point where the samples pause, so lines do not bridge gaps."""
    values = tuple(np.asarray(s, dtype=np.float64) for s in series)
    if t.shape[0] < 3:
        return (t, *values)
    step = np.diff(t)
    usual = float(np.median(step))
    cut = np.flatnonzero(step > 5.0 * usual) + 1
    if not cut.shape[0]:
        return (t, *values)
    filled = [np.insert(t, cut, t[cut - 1] + usual)]
    filled += [np.insert(v, cut, np.nan, axis=0) for v in values]
    return tuple(filled)


def _envelope(t: Series, v: Series, points: int = PLOT_POINTS) -> tuple[Series, Series]:
    """At most ``points`` points: each bucket's minimum and maximum, so peaks stay visible."""
    n = t.shape[0]
    if n <= points:
        return t, v
    size = math.ceil(n / (points // 2))
    starts = np.arange(0, n, size)
    out_t = np.empty(2 * starts.shape[0])
    out_v = np.empty(2 * starts.shape[0])
    out_t[0::2] = t[starts]
    out_t[1::2] = t[np.minimum(starts + size // 2, n - 1)]
    with np.errstate(invalid="ignore"):
        out_v[0::2] = np.fmin.reduceat(v, starts)
        out_v[1::2] = np.fmax.reduceat(v, starts)
    return out_t, out_v


def _days(t_s: Series) -> Series:
    """Epoch seconds as matplotlib date numbers (days since its epoch, UTC)."""
    from matplotlib import rcParams

    epoch = np.datetime64(str(rcParams["date.epoch"]))  # what matplotlib counts days from
    zero = float((np.datetime64(0, "s") - epoch) / np.timedelta64(1, "D"))
    days: Series = t_s / 86400.0 + zero
    return days


def _robust_limits(*arrays: NDArray[Any], margin: float = 0.08) -> tuple[float, float] | None:
    """Axis limits holding the bulk (0.5 to 99.5 %) of the finite values, with a margin."""
    finite = [np.asarray(a, dtype=np.float64) for a in arrays]
    joined = np.concatenate([a[np.isfinite(a)].ravel() for a in finite])
    if not joined.shape[0]:
        return None
    low, high = (float(x) for x in np.percentile(joined, [0.5, 99.5]))
    pad = (high - low) * margin or max(abs(high) * 0.05, 1e-6)
    return low - pad, high + pad


def _figure(
    asset: str, trace: FleetTrace, intervals: Sequence[AlertInterval], span: tuple[float, float]
) -> tuple[bytes, list[str]]:
    """Draw one asset's stacked plots; return the PNG and one caption per plot."""
    from matplotlib import dates
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch
    from matplotlib.ticker import MaxNLocator, NullLocator

    names = trace.names
    assert names is not None  # a bound trace has them
    out, unit = names.output, names.output_unit
    rows = trace.rows(asset)
    ev = trace.evaluations(asset)
    h = trace.cusum_threshold
    panels: list[tuple[str, Any]] = []  # (caption, draw(ax) -> legend handles)
    captions: list[str] = []
    t, y, p, z, c_high, c_low = _with_gaps(
        rows.time_s, rows.output, rows.prediction, rows.innovation, rows.cusum_high, rows.cusum_low
    )
    td = _days(t)

    def line(ax: Axes, x: Series, v: Series, **style: Any) -> None:
        ex, ev_ = _envelope(x, v)
        ax.plot(ex, ev_, **style)

    def draw_output(ax: Axes) -> None:
        line(ax, td, y, color="#222222", lw=0.9, label=f"measured {out}")
        line(ax, td, p, color="#1f77b4", lw=0.9, alpha=0.85, label="predicted one step ahead")
        ax.set_ylabel(_axis_label(out, unit))
        limits = _robust_limits(y, p)
        if limits is not None:
            ax.set_ylim(*limits)

    panels.append(("output", draw_output))
    captions.append(
        f"<b>Measured {_e(out)} and its one-step prediction.</b> The commissioning model "
        "predicts each sample from the samples before it. While the equipment behaves as at "
        "commissioning the two lines lie on top of each other; a lasting gap means it changed."
    )

    def draw_innovation(ax: Axes) -> None:
        ex, ez = _envelope(td, z)
        ax.plot(ex, ez, ".", ms=1.6, color="#1f77b4", label="normalised innovation")
        for level in (-3.0, 3.0):
            ax.axhline(level, color="#555555", lw=0.8, ls=":")
        ax.plot([], [], color="#555555", lw=0.8, ls=":", label="±3 (rare when healthy)")
        ax.set_ylabel("prediction error\n(in sigmas)")
        limits = _robust_limits(z, margin=0.05) or (-4.0, 4.0)
        ax.set_ylim(min(limits[0], -4.0), max(limits[1], 4.0))

    panels.append(("innovation", draw_innovation))
    captions.append(
        "<b>Normalised innovation:</b> the prediction error divided by the spread expected "
        "at commissioning. Healthy: scattered around 0, mostly within ±3. A shift away from 0 "
        "is a steady offset; a wider scatter is more noise."
    )

    def draw_cusum(ax: Axes) -> None:
        line(ax, td, c_high, color="#d62728", lw=0.9, label="CUSUM upward (C+)")
        line(ax, td, -c_low, color="#2ca02c", lw=0.9, label="CUSUM downward (−C−)")
        ax.axhline(h, color="#000000", lw=0.9, ls="--")
        ax.axhline(-h, color="#000000", lw=0.9, ls="--", label=f"threshold ±h = {h:g}")
        ax.set_ylabel("CUSUM\n(in sigmas)")
        # past 3 h the size no longer matters, the crossing does: clip and say how far
        high = float(np.nanmax(c_high, initial=0.0))
        low = float(np.nanmax(c_low, initial=0.0))
        ax.set_ylim(-min(max(1.3 * h, 1.1 * low), 3 * h), min(max(1.3 * h, 1.1 * high), 3 * h))
        beyond = [
            f"{name} up to {peak:,.0f}"
            for name, peak in (("C+", high), ("C−", low))
            if peak > 3 * h
        ]
        if beyond:
            ax.text(
                0.005,
                0.96,
                "off the scale: " + ", ".join(beyond),
                transform=ax.transAxes,
                va="top",
                fontsize=7.5,
                bbox={"facecolor": "white", "alpha": 0.85, "lw": 0},
            )

    panels.append(("cusum", draw_cusum))
    captions.append(
        "<b>CUSUM of the prediction error</b> (cumulative sum: small errors of the same sign "
        "add up, those of alternating sign cancel). Upward and downward sums are drawn on "
        f"either side of 0; reaching the dashed threshold h = {h:g} raises the "
        "<code>innovation_mean</code> alert. The axis stops at 3 h (a note gives the peak); "
        "the sums start once the healthy error pattern has been learned."
    )
    fixed: list[str] = []
    if len(ev):
        et = _days(ev.time_s)
        features = ev.features
        columns = _with_gaps(
            ev.time_s, ev.value, ev.baseline, ev.lower, ev.upper, ev.distance, ev.distance_limit
        )
        ets, value, base, lower, upper, dist, limit = columns
        et = _days(ets)
        for j, feature in enumerate(features):
            v, b = value[:, j], base[:, j]
            if not np.isfinite(v).any() and not np.isfinite(b).any():
                continue  # e.g. no offset in a model without a constant
            # a first-order model with one B coefficient reads nk * Ts whatever
            # its estimate: no panel for a dead time that cannot move
            if feature.startswith("dead_time_") and np.allclose(
                v, b, rtol=1e-9, atol=0.0, equal_nan=True
            ):
                label = _feature_label(feature, names)
                finite = b[np.isfinite(b)]
                fixed.append(f"{label}: {float(finite[0]):g} s" if finite.shape[0] else label)
                continue
            scale, shown_unit = 1.0, unit
            if feature.startswith("gain_"):
                shown_unit = f"{unit} per {names.input_units[int(feature[5:]) - 1]}"
            elif feature.endswith("_s"):
                minutes = float(np.nanmedian(np.abs(b))) >= 300.0 if np.isfinite(b).any() else False
                scale, shown_unit = (1 / 60.0, "min") if minutes else (1.0, "s")
            label = _feature_label(feature, names)
            panels.append(
                (
                    feature,
                    _band_drawer(
                        et,
                        v * scale,
                        b * scale,
                        lower[:, j] * scale,
                        upper[:, j] * scale,
                        label,
                        shown_unit,
                    ),
                )
            )
            captions.append(_band_caption(feature, label, shown_unit))

        dots: dict[str, Any] = {"marker": ".", "ms": 2.5} if et.shape[0] <= _DOTTED else {}

        def draw_distance(ax: Axes) -> None:
            ax.plot(et, dist, color="#9467bd", lw=0.9, label="Wald distance", **dots)
            ax.step(et, limit, where="post", color="#000000", lw=0.9, ls="--", label="limit")
            if float(np.nanmax(dist, initial=0.0)) > 20 * float(np.nanmax(limit, initial=1.0)):
                ax.set_yscale("symlog", linthresh=float(np.nanmax(limit, initial=1.0)))
            ax.set_ylabel("distance\n(chi-square)")

        panels.append(("distance", draw_distance))
        captions.append(
            "<b>Distance of the whole read-out from the baseline</b> (Wald distance: each change "
            "weighed by how uncertain that read-out is). Above the dashed limit the "
            "<code>feature_drift</code> alert is raised."
        )
    # the figure
    height = 1.55 * len(panels) + 0.9
    fig = Figure(figsize=(11.5, height), dpi=100)
    FigureCanvasAgg(fig)
    # no shared x axis: ticks are costly to make, so only the bottom plot has them
    axes = fig.subplots(len(panels), 1)
    axes_list: list[Axes] = list(np.atleast_1d(axes))
    fig.subplots_adjust(
        left=0.085, right=0.765, top=1 - 0.45 / height, bottom=0.55 / height, hspace=0.32
    )
    first, last = span
    lo, hi = _days(np.array([first, last]))
    if not hi > lo:
        lo, hi = lo - 0.01, hi + 0.01
    spans = [
        (family, severity, *_days(np.array([a, b])))
        for family in ("behaviour", "data_quality")
        for severity, a, b in _merged_spans(intervals, family, last)
    ]
    used = dict.fromkeys((family, severity) for family, severity, _, _ in spans)
    for ax, (key, draw) in zip(axes_list, panels, strict=True):
        draw(ax)
        for family, severity, a, b in spans:
            if family == "behaviour":
                ax.axvspan(a, b, color=_SHADE[(family, severity)], alpha=0.16, lw=0, zorder=0)
            else:  # a strip along the bottom: it must not hide the behaviour shading
                ax.axvspan(
                    a,
                    b,
                    ymin=0,
                    ymax=0.07,
                    color=_SHADE[(family, severity)],
                    alpha=0.8,
                    lw=0,
                    zorder=0,
                )
        ax.set_xlim(lo, hi)
        ax.grid(True, axis="y", color="#e4e4e4", lw=0.6)
        if ax.get_yscale() == "linear":
            ax.yaxis.set_major_locator(MaxNLocator(nbins=4))
        ax.tick_params(labelsize=8)
        ax.yaxis.label.set_fontsize(8.5)
        handles, labels = ax.get_legend_handles_labels()
        if key == "output":
            for family, severity in used:
                handles.append(
                    Patch(
                        color=_SHADE[(family, severity)],
                        alpha=0.3 if family == "behaviour" else 0.8,
                        lw=0,
                        label=f"{family.replace('_', ' ')} alert, {severity}",
                    )
                )
                labels.append(handles[-1].get_label())
        ax.legend(
            handles,
            labels,
            loc="upper left",
            bbox_to_anchor=(1.01, 1.0),
            fontsize=7.5,
            frameon=False,
            borderaxespad=0.0,
        )
    bottom = axes_list[-1]
    # (matplotlib's date helpers carry no type hints)
    locator = dates.AutoDateLocator(tz="UTC", minticks=5, maxticks=12)  # type: ignore[no-untyped-call]
    bottom.xaxis.set_major_locator(locator)
    bottom.xaxis.set_major_formatter(dates.ConciseDateFormatter(locator, tz="UTC"))  # type: ignore[no-untyped-call]
    times = bottom.xaxis.get_majorticklocs()
    for ax in axes_list:
        if ax is not bottom:  # the bottom plot's time grid, without tick objects
            ax.xaxis.set_major_locator(NullLocator())
        ax.vlines(
            times, 0, 1, transform=ax.get_xaxis_transform(), colors="#e4e4e4", lw=0.6, zorder=0.5
        )
    bottom.set_xlabel("time (UTC)", fontsize=8.5)
    fig.suptitle(asset, x=0.085, ha="left", fontsize=10, fontweight="bold")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=100)
    if fixed:
        captions.append(
            "Not drawn, fixed by the model structure (the live model keeps the commissioning "
            "delay): " + "; ".join(_e(f) for f in fixed) + "."
        )
    if not len(ev):
        captions.append(
            "No read-out plots: the live model had not settled yet, so the physical read-out "
            "was never evaluated."
        )
    return buffer.getvalue(), captions


def _merged_spans(
    intervals: Sequence[AlertInterval], family: str, end_s: float
) -> list[tuple[str, float, float]]:
    """Return (severity, start, end) spans of ``family``: the highest severity raised at each time.

    Overlapping alerts make one span, so the shading does not darken where
    several alerts are up at once; intervals still raised end at ``end_s``.
    """
    events: list[tuple[float, int, str]] = []  # (time, +1 raised / -1 cleared, severity)
    for i in intervals:
        if i.family == family:
            start, end = _bounds(i, end_s)
            events += [(start, 1, i.severity), (end, -1, i.severity)]
    events.sort(key=lambda e: e[0])
    up = Counter[str]()
    spans: list[tuple[str, float, float]] = []
    for k, (t, change, severity) in enumerate(events):
        up[severity] += change
        following = events[k + 1][0] if k + 1 < len(events) else t
        level = "critical" if up["critical"] else "warning" if up["warning"] else None
        if level is None or following <= t:
            continue
        if spans and spans[-1][0] == level and spans[-1][2] == t:
            spans[-1] = (level, spans[-1][1], following)
        else:
            spans.append((level, t, following))
    return spans


def _bounds(i: AlertInterval, end_s: float) -> tuple[float, float]:
    """Return the shaded span of an alert: at least one minute, open ones to ``end_s``."""
    end = i.cleared_s if i.cleared_s is not None else end_s
    return i.raised_s, max(end, i.raised_s + 60.0)


def _axis_label(name: str, unit: str) -> str:
    """Return an axis label that fits beside a plot: the name on two lines at most, the unit."""
    return "\n".join([*textwrap.wrap(name, 22, max_lines=2, placeholder="…"), f"({unit})"])


def _band_drawer(
    t: Series, value: Series, base: Series, lower: Series, upper: Series, label: str, unit: str
) -> Any:
    """Return a function drawing one read-out against its baseline and band."""

    def draw(ax: Axes) -> None:
        if np.isfinite(lower).any():
            ax.fill_between(
                t,
                lower,
                upper,
                step="post",
                color="#2ca02c",
                alpha=0.13,
                lw=0,
                label="tolerance band",
            )
        ax.step(t, base, where="post", color="#2ca02c", lw=1.0, ls="--", label="baseline")
        dots: dict[str, Any] = {"marker": ".", "ms": 2.5} if t.shape[0] <= _DOTTED else {}
        ax.plot(t, value, color="#ff7f0e", lw=1.0, label="live model", **dots)
        # "gain of reheat valve on zone temperature" -> "reheat valve gain"
        quantity, _, rest = label.partition(" of ")
        short = f"{rest.split(' on ')[0]} gain" if quantity == "gain" else quantity
        ax.set_ylabel(_axis_label(short, unit))
        limits = _robust_limits(value, base, lower, upper)
        if limits is not None:
            ax.set_ylim(*limits)

    return draw


def _band_caption(feature: str, label: str, unit: str) -> str:
    """Say what a read-out plot shows."""
    what = {
        "time_constant_s": "how quickly the output follows a change (63 % of the way)",
        "offset": "the steady level the output settles at with all inputs at zero",
    }
    meaning = (
        "how much the output moves per unit of this input once settled"
        if feature.startswith("gain_")
        else what.get(feature, "a physical property read from the live model")
    )
    return (
        f"<b>{_e(label[0].upper() + label[1:])}</b> ({_e(unit)}): {meaning}. Orange: the live "
        "model re-estimated as the data come in; dashed green: the commissioning baseline; "
        "green band: its tolerance, outside which the <code>physical_band</code> alert is raised."
    )
