"""The replay report: a self-contained page whose numbers are those of the alert file."""

import base64
import contextlib
import json
import os
import re
import shutil
import signal
import struct
import subprocess
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.cli import main
from arxwatch.daemon.fleet import FleetMonitor
from arxwatch.daemon.history import HistoryReader
from arxwatch.daemon.monitor import MonitorConfig
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.replay import replay
from arxwatch.daemon.report import (
    INSTALL_HINT,
    AlertInterval,
    ReportCollector,
    alert_intervals,
    write_report,
)
from arxwatch.daemon.report import _figure as render
from arxwatch.daemon.report import _merged_spans as merged_spans
from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.daemon.trace import FleetTrace
from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.baseline import Baseline, BaselineSet, fit_baseline
from tests.unit.test_pipeline import (
    PERIOD,
    SITE,
    START,
    file_site,
    make_plant,
    write_library,
    write_trend,
)

N = 1100  # grid points: 18 h, past the gain loss of block-a/vav-2 at noon and its read-out alerts
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from a PNG's IHDR chunk (ISO/IEC 15948, section 11.2.2)."""
    assert data[:8] == PNG_SIGNATURE and data[12:16] == b"IHDR"
    width, height = struct.unpack(">II", data[16:24])
    return width, height


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Larkspur Yard's three VAV boxes as a trend export, their baseline file and config."""
    folder = tmp_path_factory.mktemp("site")
    plant = make_plant()
    library = write_library(folder / "vav.json", plant)
    config = folder / "site.yaml"
    config.write_text(SITE.format(baseline=f"{{file: {library}}}", model="auto"))
    trend = write_trend(folder / "trend.csv", plant, N)
    return {"config": config, "trend": trend, "library": library, "folder": folder}


@pytest.fixture(scope="module")
def reported(site: dict[str, Path]) -> dict[str, Path]:
    """Run ``arxwatch replay --alerts --report`` once for the tests that read its output."""
    alerts, report = site["folder"] / "alerts.jsonl", site["folder"] / "report.html"
    code = main(["replay", "--config", str(site["config"]), "--input", str(site["trend"]),
                 "--alerts", str(alerts), "--report", str(report)])  # fmt: skip
    assert code == 0
    return {"alerts": alerts, "report": report}


def test_the_report_holds_the_numbers_of_the_alert_file(reported: dict[str, Path]) -> None:
    # the oracle is the alert file written by the same replay
    records = [json.loads(line) for line in reported["alerts"].read_text().splitlines()]
    page = reported["report"].read_text(encoding="utf-8")
    raised = Counter((r["detector"], r["severity"]) for r in records if r["state"] == "raised")
    assert {d for d, _ in raised} >= {"innovation_mean", "physical_band", "out_of_range"}
    cells = {
        (d, s): int(n.replace(",", ""))
        for d, s, n in re.findall(
            r'data-detector="([a-z_]+)" data-severity="([a-z]+)">([\d,]+)<', page
        )
    }
    assert {k: v for k, v in cells.items() if v} == dict(raised)
    assert f'data-total-raised="{sum(raised.values())}"' in page
    # data quality: 6 out-of-range readings per box (make_plant), as the replay counted them
    assert 'data-count="out_of_range">18<' in page
    assert "2026-01-01 00:00 to 2026-01-01 18:19 UTC" in page
    assert "not a life-safety system" in page and "licensed practice" in page
    # one interval per episode: every raised id once, closed by its cleared record
    episodes = {r["id"] for r in records}
    assert f"Alert intervals ({len(episodes)})" in page
    # one section per alerted asset, each with its plots embedded
    alerted = {r["asset"] for r in records}
    sections = re.findall(r'<section class="asset" id="asset-([\w-]+)"', page)
    assert sorted(sections) == sorted(a.replace("/", "-") for a in alerted)
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(images) == len(alerted)
    width, height = png_size(base64.b64decode(images[0]))
    assert width > 800 and height > 6 * 100  # seven stacked plots
    # the asset with critical behaviour alerts comes first
    assert sections[0] == "block-a-vav-2"
    # self-contained: nothing fetched from anywhere
    text = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "data:", page)
    assert not re.search(r"(https?:|ftp:|//[a-z])", text, re.IGNORECASE)
    assert not re.search(r"<(script|link|iframe)\b", text)
    assert len(re.findall(r'\bsrc="', text)) == len(images)


def test_the_report_changes_no_alert(
    site: dict[str, Path], reported: dict[str, Path], tmp_path: Path
) -> None:
    alerts = tmp_path / "alerts.jsonl"
    code = main(["replay", "--config", str(site["config"]), "--input", str(site["trend"]),
                 "--alerts", str(alerts)])  # fmt: skip
    assert code == 0
    assert alerts.read_text() == reported["alerts"].read_text()


def test_alert_records_pair_into_intervals() -> None:
    def record(id_: str, state: str, severity: str, minute: int) -> dict:
        return {"id": id_, "asset": "block-a/vav-2", "detector": "physical_band",
                "family": "behaviour", "signal": "gain_1", "severity": severity, "state": state,
                "sample_time": f"2026-01-01T12:{minute:02d}:00.000Z", "reading": f"at {minute}",
                "mode": None}  # fmt: skip

    intervals = alert_intervals([
        record("a", "raised", "warning", 1),
        record("b", "raised", "warning", 2),
        record("a", "raised", "critical", 5),  # an escalation: the same episode
        record("a", "cleared", "critical", 9),
    ])  # fmt: skip
    noon = START + 12 * 3600.0
    assert intervals == [
        AlertInterval("block-a/vav-2", "physical_band", "behaviour", "gain_1", "critical",
                      noon + 60.0, noon + 540.0, "at 5", None),
        AlertInterval("block-a/vav-2", "physical_band", "behaviour", "gain_1", "warning",
                      noon + 120.0, None, "at 2", None),
    ]  # fmt: skip
    # shading: the highest severity up at each moment, one span per stretch
    assert merged_spans(intervals, "behaviour", noon + 900.0) == [
        ("critical", noon + 60.0, noon + 540.0),
        ("warning", noon + 540.0, noon + 900.0),
    ]
    assert merged_spans(intervals, "data_quality", noon + 900.0) == []


def test_sections_are_capped_and_a_small_budget_thins_the_plots(
    site: dict[str, Path], tmp_path: Path
) -> None:
    config, libraries = file_site(site["library"])
    reader = HistoryReader(site["trend"])
    pipeline = Pipeline(config, libraries)
    collector = ReportCollector(pipeline, max_bytes=2**17)
    summary = replay(pipeline, reader, collector.add_records, capped=False)
    out = tmp_path / "one.html"
    assert write_report(out, collector, summary=summary, reader=reader, config=config,
                        config_path=site["config"], max_sections=1) == 1  # fmt: skip
    page = out.read_text(encoding="utf-8")
    assert re.findall(r'<section class="asset" id="asset-([\w-]+)"', page) == ["block-a-vav-2"]
    assert "2 of 3 assets are not shown" in page
    trace = collector.traces["vav"]
    assert trace.memory_bytes() <= 2**17 and trace.every > 1
    assert f"one plotted point per {trace.every} judged rows" in page
    with pytest.raises(ValueError, match="max_sections must be >= 0"):
        write_report(out, collector, summary=summary, reader=reader, config=config,
                     config_path=site["config"], max_sections=-1)  # fmt: skip


def test_without_matplotlib_the_command_says_what_to_install_before_replaying(
    site: dict[str, Path], tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture,
) -> None:  # fmt: skip
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # makes `import matplotlib` fail
    alerts, report = tmp_path / "alerts.jsonl", tmp_path / "report.html"
    code = main(["replay", "--config", str(site["config"]), "--input", str(site["trend"]),
                 "--alerts", str(alerts), "--report", str(report)])  # fmt: skip
    err = capsys.readouterr().err
    assert code == 1
    assert "matplotlib" in err and INSTALL_HINT in err and "Traceback" not in err
    assert not alerts.exists() and not report.exists()  # stopped before the replay


def test_a_report_in_a_missing_folder_is_refused_before_replaying(
    site: dict[str, Path], tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    report = tmp_path / "no-such-folder" / "report.html"
    code = main(["replay", "--config", str(site["config"]), "--input", str(site["trend"]),
                 "--report", str(report)])  # fmt: skip
    assert code == 1
    err = capsys.readouterr().err
    assert f"folder {report.parent} does not exist" in err and "Traceback" not in err


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not on PATH")
def test_the_report_renders_in_headless_chromium(reported: dict[str, Path], tmp_path: Path) -> None:
    shot = tmp_path / "report.png"
    command = [
        "chromium", "--headless", "--no-sandbox", "--disable-gpu",
        f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}",
        "--window-size=1400,4000", reported["report"].resolve().as_uri(),
    ]  # fmt: skip
    process = subprocess.Popen(
        command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True
    )
    try:
        process.wait(timeout=120)
    finally:
        # its own session and process group (id = its pid): helpers left behind go too
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signal.SIGKILL)
        process.wait()
    data = shot.read_bytes()
    assert png_size(data) == (1400, 4000)
    assert len(data) > 100_000  # tables and plots, not a blank page (a blank one is about 26 kB)


def test_a_two_input_asset_gets_a_gain_plot_per_input() -> None:
    # An invented air handler at Larkspur Yard: supply-air temperature from a
    # cooling and a heating valve, one baseline per operating mode.
    loop = REFERENCE_LOOPS["first-order+dead-time"]

    def plant(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
        u = np.column_stack([daily_operation(n, PERIOD, seed=seed + i) for i in (0, 50)])
        y = loop.simulate(u[:, 0], seed=seed + 1) + 0.5 * (
            loop.simulate(u[:, 1], seed=seed + 2) - 20
        )
        return y, u

    y, u = plant(2 * 1440, 1)
    fit = fit_baseline(y, u, START - 3 * 86400 + np.arange(len(y)) * PERIOD, sample_period_s=PERIOD)
    assert fit.baseline is not None
    names = SignalNames("supply-air temperature", "degC", ("cooling valve", "heating valve"),
                        ("%", "%"))  # fmt: skip
    fleet = FleetMonitor(names, MonitorConfig())
    per_mode = [Baseline.from_dict({**fit.baseline.to_dict(), "mode": m}) for m in ("day", "night")]
    slot = fleet.add_asset("larkspur/ahu-1", BaselineSet(tuple(per_mode)))
    fleet.trace = trace = FleetTrace()
    y, u = plant(1100, 7)
    for k in range(1100):
        mode = "day" if 6 <= (k // 60) % 24 < 20 else "night"
        fleet.step([slot], [START + k * PERIOD], [float(y[k])], [[float(u[k, 0]), float(u[k, 1])]],
                   [mode], [False])  # fmt: skip
    png, captions = render("larkspur/ahu-1", trace, [], (START, START + 1100 * PERIOD))
    assert png_size(png)[0] > 800
    titles = [re.sub(r"<[^>]+>", "", c).split("(")[0].strip() for c in captions]
    assert titles[3:9] == [
        "Gain of cooling valve on supply-air temperature",
        "Gain of heating valve on supply-air temperature",
        "Time constant of supply-air temperature",
        "Dead time of cooling valve",
        "Dead time of heating valve",
        "Offset of supply-air temperature",
    ]


def test_a_dead_time_that_cannot_move_is_named_not_plotted() -> None:
    # A first-order model with one B coefficient: its step response reads
    # nk * Ts whatever the estimate, so the page states it instead of a flat plot.
    loop = REFERENCE_LOOPS["first-order+dead-time"]
    u = daily_operation(2 * 1440, PERIOD, seed=1)
    order = ArxOrder(na=1, nb=(1,), nk=(2,))
    fit = fit_baseline(loop.simulate(u, seed=2), u[:, None],
                       START - 3 * 86400 + np.arange(len(u)) * PERIOD, sample_period_s=PERIOD,
                       order=order)  # fmt: skip
    assert fit.baseline is not None
    fleet = FleetMonitor(SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",)),
                         MonitorConfig())  # fmt: skip
    slot = fleet.add_asset("larkspur/ahu-2", BaselineSet((fit.baseline,)))
    fleet.trace = trace = FleetTrace()
    u = daily_operation(600, PERIOD, seed=7)
    y = loop.simulate(u, seed=8)
    for k in range(600):
        fleet.step([slot], [START + k * PERIOD], [float(y[k])], [[float(u[k])]], [None], [False])
    _, captions = render("larkspur/ahu-2", trace, [], (START, START + 600 * PERIOD))
    assert not any("Dead time" in c for c in captions)
    assert captions[-1].endswith("dead time of cooling valve: 120 s.")
