"""``arxwatch baselines``: commissioning baselines fitted from a recorded file.

A trend export or a capture (:mod:`arxwatch.daemon.history`) goes through
the very intake and alignment ``arxwatch run`` and ``arxwatch replay`` use
(a :class:`~arxwatch.daemon.pipeline.Pipeline`, its rows taken with
:attr:`~arxwatch.daemon.pipeline.Pipeline.on_rows`), so a baseline is fitted
on the rows the live monitor will judge against it. Nothing is judged and
nothing is learned live meanwhile: every class is treated as loading an
empty baseline file.

Per asset, and per operating mode when the class names a mode signal, the
fit takes every gap-free stretch of that mode's rows in the chosen time
range (:func:`~arxwatch.estimators.baseline.fit_baseline` with
``gaps="split"``: each stretch with its own history, none spliced to the
next, which would invent dynamics at the seams; a stretch too short for the
model's history is left out). A mode that runs for half of each day is
thus fitted on all its days, not on its longest stretch alone, and the
table says how many stretches each fit used. The orders come from the
class's ``model``: fixed, or chosen by BIC
over the default search ranges (``model: auto``), with the default
acceptance rule, exactly as a live learner of the class would fit. Accepted
baselines go into baseline files (:mod:`arxwatch.daemon.library`); a
refused fit is reported with its reasons and left out, so that asset is
``no_baseline`` for ``run`` until it is fitted again.
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import IO, Literal

import numpy as np

from arxwatch.daemon.config import (
    AssetClassConfig,
    BaselineConfig,
    Config,
    ConfigError,
    load_config,
)
from arxwatch.daemon.history import (
    BadLinePolicy,
    HistoryError,
    HistoryReader,
    parse_time,
    time_zone,
)
from arxwatch.daemon.intake import RowBatch
from arxwatch.daemon.library import BaselineFileError, read_baselines, write_baselines
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.replay import REPLAY_EXTRA_CELLS, ProgressLine, replay
from arxwatch.estimators.baseline import BaselineResult, BaselineSet, fit_baseline

__all__ = [
    "AssetFit",
    "RowCollector",
    "collect_rows",
    "fit_asset",
    "fit_table",
    "run_baselines",
]

_DASH = "-"


@dataclass
class _Rows:
    """One asset's aligned rows, in time order."""

    time_s: list[float] = field(default_factory=list)
    y: list[float] = field(default_factory=list)
    u: list[list[float]] = field(default_factory=list)
    mode: list[str | None] = field(default_factory=list)


class RowCollector:
    """A :attr:`Pipeline.on_rows` tap keeping every asset's rows within a time range.

    Parameters
    ----------
    start_s, end_s : float
        Grid times kept, inclusive (epoch seconds); ``-inf``/``inf`` for all.

    Attributes
    ----------
    rows : dict
        (asset class, asset id) -> the asset's rows, in time order.
    """

    def __init__(self, start_s: float = -math.inf, end_s: float = math.inf) -> None:
        self.start_s, self.end_s = start_s, end_s
        self.rows: dict[tuple[str, str], _Rows] = {}

    def __call__(
        self, asset_class: str, assets: list[str], batch: RowBatch, modes: list[str | None]
    ) -> None:
        """Keep the rows of one closed batch."""
        times = batch.time_s.tolist()
        ys = batch.y.tolist()
        us = batch.u.tolist()
        for i, asset in enumerate(assets):
            t = times[i]
            if not self.start_s <= t <= self.end_s:
                continue
            rows = self.rows.get((asset_class, asset))
            if rows is None:
                rows = self.rows[(asset_class, asset)] = _Rows()
            rows.time_s.append(t)
            rows.y.append(ys[i])
            rows.u.append(us[i])
            rows.mode.append(modes[i])


class _ReadProgress(ProgressLine):
    """The replay progress line without the alert count (nothing is judged here)."""

    def text(self, values: int, latest_s: float) -> str:
        """Return the progress line."""
        reader = self.reader
        share = ""
        if reader.size and reader.path.suffix != ".gz":
            share = f"{min(100.0, 100.0 * reader.chars_read / reader.size):5.1f} %  "
        return f"reading: {share}{values:,} values  at {_when(latest_s)} UTC"


def _fitting_config(config: Config) -> Config:
    """Return the config with every class loading an (empty) baseline file: no learning, judging."""
    classes = tuple(
        replace(c, baseline=BaselineConfig(learn_for_s=None, file=Path(f"{c.name}.json")))
        for c in config.asset_classes
    )
    return replace(config, asset_classes=classes)


def collect_rows(
    config: Config,
    reader: HistoryReader,
    *,
    start_s: float = -math.inf,
    end_s: float = math.inf,
    progress: ProgressLine | None = None,
) -> RowCollector:
    """Replay the whole file through the pipeline; return the rows in [start_s, end_s].

    The whole file goes through, as ``arxwatch replay`` feeds it (a trend
    export a row at a time), so a row at the start of the range is aligned
    with the samples just before it, as live.

    Parameters
    ----------
    config : Config
        The site configuration (its baseline sources are ignored).
    reader : HistoryReader
        The recorded file.
    start_s, end_s : float, optional
        Grid times kept, epoch seconds, inclusive.
    progress : ProgressLine, optional
        Progress display on a terminal.

    Raises
    ------
    HistoryError
        At an unreadable line of the file, when it stops there.
    """
    fitting = _fitting_config(config)
    trend = reader.kind == "csv"
    pipeline = Pipeline(
        fitting,
        {c.name: {} for c in fitting.asset_classes},
        extra_cells=REPLAY_EXTRA_CELLS if trend else 0,
    )
    collector = RowCollector(start_s, end_s)
    pipeline.on_rows = collector
    replay(pipeline, reader, lambda _: None, capped=not trend, progress=progress)
    return collector


@dataclass(frozen=True)
class AssetFit:
    """The outcome of fitting one asset in one mode.

    Attributes
    ----------
    asset_class, asset : str
        The asset.
    mode : str or None
        Operating mode; None for a class without a mode signal.
    rows : int
        Rows of this mode in the time range, all offered to the fit.
    window : tuple of (float, float, int) or None
        First and last time of those rows and how many the fit used (rows
        of stretches too short for the model's history are left out); None
        without rows.
    result : BaselineResult or None
        The fit; None when it could not be attempted (``problem`` says why).
    problem : str or None
        Why no fit was attempted or why it failed.
    """

    asset_class: str
    asset: str
    mode: str | None
    rows: int
    window: tuple[float, float, int] | None
    result: BaselineResult | None
    problem: str | None = None

    @property
    def accepted(self) -> bool:
        """Whether the fit gave an accepted baseline."""
        return self.result is not None and self.result.baseline is not None

    @property
    def reasons(self) -> tuple[str, ...]:
        """Why the asset has no baseline in this mode; empty when accepted."""
        if self.problem is not None:
            return (self.problem,)
        return () if self.result is None else self.result.reasons


def _modes(asset_class: AssetClassConfig, seen: Sequence[str | None]) -> list[str | None]:
    if asset_class.mode is None:
        return [None]
    if asset_class.mode.values is not None:
        return list(asset_class.mode.values)
    return [*sorted({m for m in seen if m is not None})]


def fit_asset(asset_class: AssetClassConfig, asset: str, rows: _Rows) -> list[AssetFit]:
    """Fit one asset's rows, per mode, as the class's live learner would.

    Returns
    -------
    list of AssetFit
        One per mode of the class (per mode seen when the class lists none).
    """
    period = asset_class.sample_period_s
    t_all = np.asarray(rows.time_s, dtype=np.float64)
    y_all = np.asarray(rows.y, dtype=np.float64)
    u_all = np.asarray(rows.u, dtype=np.float64).reshape(len(rows.time_s), len(asset_class.inputs))
    out: list[AssetFit] = []
    for mode in _modes(asset_class, rows.mode):
        mask = np.array([m == mode for m in rows.mode], dtype=bool)
        n_rows = int(mask.sum())
        name = asset_class.name
        if n_rows == 0:
            out.append(AssetFit(name, asset, mode, 0, None, None, "no complete rows in this mode"))
            continue
        t, y, u = t_all[mask], y_all[mask], u_all[mask]
        window = (float(t[0]), float(t[-1]), n_rows)
        try:
            result = fit_baseline(
                y, u, t, sample_period_s=period, order=asset_class.model.order, mode=mode,
                gaps="split",
            )  # fmt: skip
        except (
            ValueError
        ) as err:  # GridError (irregular step), DimensionError, rank deficiency, NaN
            out.append(AssetFit(name, asset, mode, n_rows, window, None, f"no fit: {err}"))
            continue
        if result.fitted is not None:
            window = (window[0], window[1], result.fitted.n_samples)
        out.append(AssetFit(name, asset, mode, n_rows, window, result))
    return out


# -- the table ------------------------------------------------------------------


def _number(value: float, digits: int = 4) -> str:
    if not math.isfinite(value):
        return _DASH
    return f"{value:.{digits}g}"


def _when(time_s: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.gmtime(time_s))


def _length(seconds: float) -> str:
    hours = seconds / 3600.0
    return f"{hours / 24.0:.1f} d" if hours >= 48.0 else f"{hours:.1f} h"


def _stretches(fit: AssetFit, sample_period_s: float) -> str:
    """Gap-free stretches the fit used and the time their rows cover; those too short."""
    if fit.result is None or fit.window is None:
        return _DASH
    cell = f"{fit.result.n_stretches}"
    if fit.result.fitted is not None:  # window[2] counts the rows used
        cell += f" ({_length(fit.window[2] * sample_period_s)})"
    short = fit.result.n_short_stretches
    return cell + (f" +{short} too short" if short else "")


def fit_table(asset_class: AssetClassConfig, fits: Sequence[AssetFit]) -> list[str]:
    """Plain-text table of one class's fits, with each refusal's reasons under its row."""
    output = asset_class.output
    inputs = ", ".join(f"{s.name} ({s.unit})" for s in asset_class.inputs)
    gain_unit = "/".join(f"{output.unit}/{s.unit}" for s in asset_class.inputs)
    lines = [
        f"asset class {asset_class.name}: output {output.name} ({output.unit}); inputs {inputs}",
        f"model {'auto (BIC)' if asset_class.model.order is None else 'fixed orders'}, "
        f"sample period {asset_class.sample_period_s:g} s",
    ]
    header = (
        "asset", "mode", "na", "nb", "nk", "fit %", f"gain ({gain_unit})", "tau (s)",
        "dead time (s)", f"sigma ({output.unit})", "window (UTC)", "stretches", "result",
    )  # fmt: skip
    table: list[tuple[str, ...]] = [header]
    notes: list[list[str]] = [[]]
    for fit in fits:
        model = None if fit.result is None else fit.result.fitted
        window = _DASH
        if fit.window is not None:
            start, end, count = fit.window
            window = f"{_when(start)} +{_length(end - start + asset_class.sample_period_s)}"
            if count < fit.rows:
                window += f" ({count:,} of {fit.rows:,} rows)"
        if model is None:
            cells = (_DASH,) * 8
        else:
            r, order = model.readout, model.order
            cells = (
                str(order.na),
                ",".join(map(str, order.nb)),
                ",".join(map(str, order.nk)),
                f"{model.fit_percent:.1f}",
                ",".join(_number(g) for g in r.gains),
                _number(r.time_constant_s),
                ",".join(_number(d) for d in r.dead_times_s),
                _number(math.sqrt(model.sigma2)),
            )
        result = "accepted" if fit.accepted else "refused"
        table.append(
            (
                fit.asset,
                fit.mode or _DASH,
                *cells,
                window,
                _stretches(fit, asset_class.sample_period_s),
                result,
            )
        )
        notes.append([f"  - {reason}" for reason in fit.reasons])
    widths = [max(len(row[j]) for row in table) for j in range(len(header))]
    for row, below in zip(table, notes, strict=True):
        lines.append("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())
        lines.extend(below)
    return lines


# -- the command ----------------------------------------------------------------


def _destinations(
    config: Config, output_dir: str | None, write: bool
) -> tuple[dict[str, Path], list[str]]:
    """Where each class's file goes, and notes on classes that get none."""
    places: dict[str, Path] = {}
    notes: list[str] = []
    for asset_class in config.asset_classes:
        if output_dir is not None:
            places[asset_class.name] = Path(output_dir) / f"{asset_class.name}.json"
        elif write:
            if asset_class.baseline.file is None:
                notes.append(
                    f"asset class {asset_class.name}: learns its baseline live "
                    "(baseline.learn_for_s), no file to write; --output-dir DIR writes one"
                )
            else:
                places[asset_class.name] = asset_class.baseline.file
    return places, notes


def _range(text: str | None, zone: str, default: float, option: str) -> float:
    if text is None:
        return default
    try:
        return parse_time(text, time_zone(zone))
    except ValueError as err:
        raise ValueError(f"{option}: {err}") from None


def run_baselines(
    config_path: str,
    input_path: str,
    *,
    start: str | None,
    end: str | None,
    output_dir: str | None,
    write: bool,
    force: bool,
    kind: Literal["auto", "csv", "capture"],
    on_bad_line: BadLinePolicy,
    zone: str,
    out: IO[str],
    err: IO[str],
) -> int:
    """``arxwatch baselines``: return the exit status.

    0 when the fits ran (whether accepted or refused), 2 for a bad config,
    input file or time range, 1 when a baseline file cannot be written or
    exists already without ``force``. The tables go to ``out``; errors and
    the progress line to ``err``. Without ``write`` or ``output_dir`` no
    file is written.
    """
    name = "arxwatch baselines"
    try:
        config = load_config(config_path, baseline_files_exist=False)  # written here
    except ConfigError as error:
        print(f"{name}: {error}", file=err)
        return 2
    try:
        start_s = _range(start, zone, -math.inf, "--from")
        end_s = _range(end, zone, math.inf, "--to")
        if not start_s < end_s:
            raise ValueError(f"--from {start} is not before --to {end}")
        reader = HistoryReader(input_path, kind=kind, on_bad_line=on_bad_line, zone=zone)
    except ValueError as error:
        print(f"{name}: {error}", file=err)
        return 2
    except OSError as error:
        print(f"{name}: {input_path}: {error.strerror}", file=err)
        return 2
    places, notes = _destinations(config, output_dir, write)
    if not force:
        taken = [str(p) for p in places.values() if p.exists()]
        if taken:
            print(f"{name}: will not overwrite {', '.join(taken)} (--force replaces it)", file=err)
            return 1
    progress = _ReadProgress(reader, err, lambda: 0) if err.isatty() else None
    try:
        collector = collect_rows(config, reader, start_s=start_s, end_s=end_s, progress=progress)
    except HistoryError as error:
        print(f"{name}: {error}", file=err)
        print("  (--on-bad-line skip counts such lines and goes on)", file=err)
        return 2
    finally:
        if progress is not None:
            progress.finish()
    if not collector.rows:
        first, last = reader.first_time_s, reader.last_time_s
        held = "; the file holds no data"
        if first is not None and last is not None:
            held = f"; the file holds data from {_iso(first)} to {_iso(last)}"
        print(
            f"{name}: no aligned rows of any configured asset in {input_path} between "
            f"{_iso(start_s)} and {_iso(end_s)}{held}",
            file=err,
        )
        return 2
    return _fit_and_write(config, collector, places, notes, out, err)


def _dropped(path: Path, sets: dict[str, BaselineSet]) -> list[str]:
    """Assets of the existing file at ``path`` that ``sets`` lacks (none if it is unreadable)."""
    if not path.exists():
        return []
    try:
        old = read_baselines(path)
    except BaselineFileError:
        return []
    return sorted(set(old) - set(sets))


def _iso(time_s: float) -> str:
    if not math.isfinite(time_s):
        return "the start" if time_s < 0 else "the end"
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(time_s))


def _fit_and_write(
    config: Config,
    collector: RowCollector,
    places: dict[str, Path],
    notes: list[str],
    out: IO[str],
    err: IO[str],
) -> int:
    status = 0
    for asset_class in config.asset_classes:
        assets = sorted(a for c, a in collector.rows if c == asset_class.name)
        if not assets:
            print(f"asset class {asset_class.name}: no rows in the range\n", file=out)
            continue
        fits = [
            fit
            for asset in assets
            for fit in fit_asset(asset_class, asset, collector.rows[(asset_class.name, asset)])
        ]
        for line in fit_table(asset_class, fits):
            print(line, file=out)
        sets: dict[str, BaselineSet] = {}
        for asset in assets:
            accepted = tuple(
                f.result.baseline
                for f in fits
                if f.asset == asset and f.result is not None and f.result.baseline is not None
            )
            if accepted:
                sets[asset] = BaselineSet(accepted)
        taken = sum(1 for f in fits if f.accepted)
        print(
            f"{taken} of {len(fits)} fits accepted, {len(sets)} of {len(assets)} assets", file=out
        )
        path = places.get(asset_class.name)
        if path is not None and sets:
            dropped = _dropped(path, sets)
            try:
                path.parent.mkdir(parents=True, exist_ok=True)
                write_baselines(path, sets, time.time())
            except OSError as error:
                print(f"arxwatch baselines: {path}: cannot write: {error.strerror}", file=err)
                status = 1
            else:
                print(f"wrote {path} ({len(sets)} assets)", file=out)
                if dropped:
                    shown = ", ".join(dropped[:5]) + (" ..." if len(dropped) > 5 else "")
                    print(
                        f"  {len(dropped)} asset(s) of the file it replaced have no baseline in "
                        f"it now (not fitted or refused this time): {shown}",
                        file=out,
                    )
        elif path is not None:
            print(f"nothing accepted: {path} not written", file=out)
        print(file=out)
    for note in notes:
        print(note, file=out)
    if not places and not notes:
        print(
            "no file written (--write to the config's baseline files, or --output-dir DIR)",
            file=out,
        )
    return status
