"""``arxwatch baselines``: fits from a trend export, the table, the files, and bad input."""

import contextlib
import csv
import io
import json
import re
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from arxwatch.daemon.cli import main
from arxwatch.daemon.config import load_config
from arxwatch.daemon.history import HistoryReader
from arxwatch.daemon.library import read_site_baselines
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.replay import replay
from arxwatch.daemon.simulate import Fault, daily_operation
from tests.unit.test_pipeline import LOOP, PER_DAY, PERIOD, SITE, START

FIT_END = "2026-01-03T00:00:00Z"  # two fault-free days to fit on
FAULT_S = 2.5 * 86400.0  # block-a/vav-2 loses 40 % of its valve gain at noon of day 3
# LOOP: gain -0.11 degC/%, time constant 600 s, dead time 120 s, sensor noise 0.03 degC

ASSETS = {
    "block-a/vav-1": (LOOP, ()),
    "block-a/vav-2": (LOOP, (Fault("gain_loss", start_s=FAULT_S, magnitude=0.4),)),
    # a sensor this noisy (2 degC) hides the valve's effect: the fit must be refused
    "block-b/vav-9": (replace(LOOP, noise_std=2.0), ()),
}


@pytest.fixture(scope="module")
def trend(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Three days of the three boxes at Larkspur Yard as a wide trend export."""
    n = 3 * PER_DAY
    columns: list[tuple[str, np.ndarray]] = []
    for k, (asset, (loop, faults)) in enumerate(ASSETS.items()):
        u = daily_operation(n, PERIOD, seed=10 + k)
        y = loop.simulate(u, faults, seed=20 + k)
        building, box = asset.split("/")
        columns.append((f"larkspur/{building}/vav/{box}/zone-temp", y))
        columns.append((f"larkspur/{building}/vav/{box}/valve", u))
    path = tmp_path_factory.mktemp("trend") / "larkspur-yard.csv"
    with path.open("w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(["time", *(topic for topic, _ in columns)])
        for i in range(n):
            out.writerow([f"{START + i * PERIOD:.0f}", *(f"{v[i]:.4f}" for _, v in columns)])
    return path


def write_site(folder: Path, baseline: str) -> Path:
    path = folder / "site.yaml"
    path.write_text(SITE.format(baseline=baseline, model="auto"), encoding="utf-8")
    return path


def table_rows(text: str) -> dict[str, list[str]]:
    """Rows of the printed table by asset: cells are separated by two or more spaces."""
    rows = {}
    for line in text.splitlines():
        cells = re.split(r"\s{2,}", line.strip())
        if cells[0] in ASSETS:
            rows[cells[0]] = cells
    return rows


@pytest.fixture(scope="module")
def fitted(trend: Path, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """Run the command on the first two days; return the output folder and the printed text.

    Module-scoped (the fit takes seconds), so output is captured by hand, not with capsys.
    """
    folder = tmp_path_factory.mktemp("fit")
    config = write_site(folder, "{learn_for_s: 86400}")
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(["baselines", "--config", str(config), "--input", str(trend),
                     "--to", FIT_END, "--output-dir", str(folder / "baselines")])  # fmt: skip
    assert code == 0, err.getvalue()
    return folder / "baselines", out.getvalue()


def test_the_table_reports_the_simulated_loop(fitted: tuple[Path, str]) -> None:
    _, text = fitted
    rows = table_rows(text)
    assert set(rows) == set(ASSETS)
    for asset in ("block-a/vav-1", "block-a/vav-2"):
        cells = rows[asset]
        # asset, mode, na, nb, nk, fit %, gain, tau, dead time, sigma, window, result
        assert cells[1] == "-" and cells[-1] == "accepted"
        assert cells[4] == "2"  # two samples of transport delay
        assert float(cells[5]) > 90.0
        # Tolerances, from the fits themselves: over two days at 60 s the baseline's own
        # standard errors (delta method on Cov(theta0)) are about 0.0003 degC/% on the gain
        # and 10 s on tau. The sensor noise is white on the output, so the ARX equation
        # error is coloured and least squares is slightly biased (tau comes out 1-3 % short
        # on these seeds). Gain within 2 % (about 7 standard errors), tau within 5 % (30 s,
        # three standard errors plus that bias). The dead time is read from the fitted
        # model's step response (two-point rule), which carries the same bias: within 5 %.
        assert float(cells[6]) == pytest.approx(LOOP.gain, rel=0.02)
        assert float(cells[7]) == pytest.approx(LOOP.time_constant_s, rel=0.05)
        assert float(cells[8]) == pytest.approx(LOOP.dead_time_s, rel=0.05)
        # innovation sigma: at least the sensor noise, and not much more (coloured by the model)
        assert LOOP.noise_std * 0.9 < float(cells[9]) < LOOP.noise_std * 1.5
        assert cells[10] == "2026-01-01 00:00 +2.0 d"
    assert "2 of 3 fits accepted, 2 of 3 assets" in text


def test_a_too_noisy_asset_is_refused_with_its_reason(fitted: tuple[Path, str]) -> None:
    _, text = fitted
    assert table_rows(text)["block-b/vav-9"][-1] == "refused"
    below = text.split("block-b/vav-9", 1)[1].splitlines()[1]
    assert below.startswith("  - fit on held-back data") and "below the 70 % needed" in below


def test_written_files_load_and_replay_judges_with_them(
    fitted: tuple[Path, str], trend: Path, tmp_path: Path
) -> None:
    folder, text = fitted
    library = folder / "vav.json"
    assert f"wrote {library} (2 assets)" in text
    assert "/tmp/" not in library.read_text()  # portable: no host paths inside
    config = load_config(write_site(tmp_path, f"{{file: {library}}}"))
    libraries = read_site_baselines(config)
    assert set(libraries["vav"]) == {"block-a/vav-1", "block-a/vav-2"}  # the refused one is not
    # the third day: fault-free for vav-1 throughout, for vav-2 until noon
    records: list[dict] = []
    later = (v for v in HistoryReader(trend) if v.time_s >= START + 2 * 86400.0)
    replay(Pipeline(config, libraries), later, records.extend, capped=False)
    raised = [r for r in records if r["state"] == "raised"]
    assert not [r for r in raised if r["asset"] == "block-a/vav-1"]
    faulty = [r for r in raised if r["asset"] == "block-a/vav-2"]
    assert faulty and all(r["family"] == "behaviour" for r in faulty)
    first = min(r["sample_time"] for r in faulty)
    assert first >= "2026-01-03T12:00:00"  # nothing before the fault began


def test_files_are_not_overwritten_without_force(
    fitted: tuple[Path, str], trend: Path, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    folder, _ = fitted
    library = folder / "vav.json"
    config = write_site(tmp_path, f"{{file: {library}}}")
    before = library.read_bytes()
    args = ["baselines", "--config", str(config), "--input", str(trend), "--to", FIT_END, "--write"]
    assert main(args) == 1
    assert f"will not overwrite {library} (--force replaces it)" in capsys.readouterr().err
    assert library.read_bytes() == before
    copy = tmp_path / "copy.json"
    document = json.loads(before)
    document["assets"]["block-z/vav-0"] = document["assets"]["block-a/vav-1"]  # not in the CSV
    copy.write_text(json.dumps(document))
    write_site(tmp_path, f"{{file: {copy}}}")
    assert main([*args, "--force"]) == 0
    out = capsys.readouterr().out
    assert f"wrote {copy} (2 assets)" in out
    assert "1 asset(s) of the file it replaced have no baseline in it now" in out
    assert out.rstrip().endswith("block-z/vav-0")


def test_without_a_destination_nothing_is_written(
    trend: Path, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    config = write_site(tmp_path, "{learn_for_s: 86400}")
    assert main(["baselines", "--config", str(config), "--input", str(trend),
                 "--from", "2026-01-02", "--to", FIT_END]) == 0  # fmt: skip
    out = capsys.readouterr().out
    assert "2026-01-02 00:00 +24.0 h" in out and "no file written (--write" in out
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.yaml"]


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--from", "yesterday"], "--from: time 'yesterday' is neither epoch seconds nor ISO"),
        (["--from", FIT_END, "--to", "2026-01-02"], f"--from {FIT_END} is not before --to"),
        (
            ["--from", "2027-01-01"],
            "no aligned rows of any configured asset in {trend} between 2027-01-01T00:00:00Z "
            "and the end; the file holds data from 2026-01-01T00:00:00Z to 2026-01-03T23:59:00Z",
        ),
        (["--zone", "Mars/Olympus"], "unknown time zone 'Mars/Olympus'"),
    ],
)
def test_bad_time_ranges_exit_2_with_a_clear_message(
    trend: Path, tmp_path: Path, capsys: pytest.CaptureFixture, extra: list[str], message: str
) -> None:
    config = write_site(tmp_path, "{learn_for_s: 86400}")
    assert main(["baselines", "--config", str(config), "--input", str(trend), *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith("arxwatch baselines: ") and message.format(trend=trend) in err
    assert "Traceback" not in err


def test_missing_or_bad_files_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    config = write_site(tmp_path, "{learn_for_s: 86400}")
    missing = tmp_path / "none.csv"
    assert main(["baselines", "--config", str(config), "--input", str(missing)]) == 2
    assert f"arxwatch baselines: {missing}: No such file or directory" in capsys.readouterr().err
    bad = tmp_path / "bad.csv"
    bad.write_text("time,larkspur/a/vav/v1/zone-temp\n1767225600,21\nnoon,22\n")
    assert main(["baselines", "--config", str(config), "--input", str(bad)]) == 2
    assert f"{bad}:3: first column: time 'noon'" in capsys.readouterr().err


def test_the_first_fit_writes_the_baseline_file_the_config_names(
    trend: Path, tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # A new site: the config points at a baseline file that does not exist yet.
    library = tmp_path / "vav.json"
    config = write_site(tmp_path, f"{{file: {library}}}")
    assert main(["check", "--config", str(config)]) == 2  # run and replay need the file
    assert "does not exist; 'arxwatch baselines --config FILE" in capsys.readouterr().err
    args = ["baselines", "--config", str(config), "--input", str(trend), "--to", FIT_END]
    assert main([*args, "--write"]) == 0
    assert f"wrote {library}" in capsys.readouterr().out
    assert main(["check", "--config", str(config)]) == 0


def test_a_class_with_a_mode_signal_gets_a_baseline_per_mode(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    # Occupied 07:00-19:00 UTC with the reference loop; unoccupied with less than half
    # its valve effect (invented: a smaller reheat demand at night), for two days.
    n = 2 * PER_DAY
    u = daily_operation(n, PERIOD, seed=5)
    night = replace(LOOP, gain=-0.05, offset=22.0)
    hour = (np.arange(n) * PERIOD / 3600.0) % 24.0
    occupied = (hour >= 7.0) & (hour < 19.0)
    y = np.where(occupied, LOOP.simulate(u, seed=6), night.simulate(u, seed=7))
    trend = tmp_path / "modes.csv"
    with trend.open("w", newline="", encoding="utf-8") as handle:
        out = csv.writer(handle)
        out.writerow(["time", *(f"larkspur/block-c/vav/vav-3/{s}" for s in
                                ("zone-temp", "valve", "occupancy"))])  # fmt: skip
        for i in range(n):
            mode = "occupied" if occupied[i] else "unoccupied"
            out.writerow([f"{START + i * PERIOD:.0f}", f"{y[i]:.4f}", f"{u[i]:.3f}", mode])
    config = write_site(tmp_path, f"{{file: {tmp_path / 'vav.json'}}}")
    (tmp_path / "vav.json").write_text(
        '{"format": "arxwatch.baselines", "version": 1, "assets": {}}'
    )
    text = config.read_text().replace(
        "    model: auto", "    mode: {signal: occupancy, values: [occupied, unoccupied]}\n"
        "    model: auto"
    )  # fmt: skip
    config.write_text(text)
    assert main(["baselines", "--config", str(config), "--input", str(trend),
                 "--write", "--force"]) == 0  # fmt: skip
    out = capsys.readouterr().out
    rows = {
        tuple(cells[:2]): cells
        for cells in (re.split(r"\s{2,}", line.strip()) for line in out.splitlines())
        if cells[0] == "block-c/vav-3"
    }
    assert set(rows) == {("block-c/vav-3", "occupied"), ("block-c/vav-3", "unoccupied")}
    # every stretch of each mode is fitted: 24 h of rows each, half the two days of the
    # fits above, so their tolerance grown by sqrt(2) (standard errors grow as one over
    # the square root of the samples); occupied runs in two stretches, unoccupied in
    # three (00:00-07:00, 19:00-07:00, 19:00-24:00)
    occupied, unoccupied = (
        rows[("block-c/vav-3", "occupied")],
        rows[("block-c/vav-3", "unoccupied")],
    )
    assert float(occupied[6]) == pytest.approx(LOOP.gain, rel=0.03)
    assert float(unoccupied[6]) == pytest.approx(night.gain, rel=0.03)
    assert (occupied[10], occupied[11]) == ("2026-01-01 07:00 +36.0 h", "2 (24.0 h)")
    assert (unoccupied[10], unoccupied[11]) == ("2026-01-01 00:00 +48.0 h", "3 (24.0 h)")
    assert occupied[12] == unoccupied[12] == "accepted"
    library = read_site_baselines(load_config(config))["vav"]
    assert library["block-c/vav-3"].modes == ("occupied", "unoccupied")
