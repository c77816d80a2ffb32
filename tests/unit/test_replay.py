"""Replay: a capture and the same data as a trend export give the alerts live processing gives."""

import json
from pathlib import Path

import pytest

from arxwatch.daemon import replay as replay_module
from arxwatch.daemon.cli import main
from arxwatch.daemon.history import CaptureWriter, HistoryReader
from arxwatch.daemon.pipeline import Pipeline
from arxwatch.daemon.replay import replay
from tests.unit.test_pipeline import (
    SITE,
    file_site,
    make_plant,
    messages,
    run,
    write_library,
    write_trend,
)

N = 900  # grid points: 15 h, past the gain loss of block-a/vav-2 at noon


def key(record: dict) -> str:
    return json.dumps(record, sort_keys=True)


@pytest.fixture(scope="module")
def plant() -> dict:
    """Three VAV boxes, one losing valve gain at noon (as in the pipeline tests)."""
    return make_plant()


@pytest.fixture(scope="module")
def library_file(tmp_path_factory: pytest.TempPathFactory, plant: dict) -> Path:
    """Write the baseline file of the three boxes."""
    return write_library(tmp_path_factory.mktemp("baselines") / "vav.json", plant)


@pytest.fixture(scope="module")
def recorded(tmp_path_factory: pytest.TempPathFactory, plant: dict) -> dict[str, Path]:
    """Write the plant's first N grid points as a capture and as a wide trend export."""
    folder = tmp_path_factory.mktemp("recorded")
    capture = folder / "site.jsonl"
    with CaptureWriter(capture) as writer:
        for topic, payload, arrival, _ in messages(plant, 0, N):
            writer.write(arrival, topic, payload)
    trend = write_trend(folder / "trend.csv", plant, N)
    return {"capture": capture, "csv": trend}


def replayed(config, libraries, path: Path) -> list[dict]:
    records: list[dict] = []
    reader = HistoryReader(path)
    summary = replay(Pipeline(config, libraries), reader, records.extend,
                     capped=reader.kind == "capture")  # fmt: skip
    assert summary.values > 0 and summary.counts.rejected == {}
    return records


def test_capture_csv_and_live_give_the_same_alerts(
    plant: dict, library_file: Path, recorded: dict[str, Path]
) -> None:
    config, libraries = file_site(library_file)
    live = run(Pipeline(config, libraries), plant, 0, N)  # as `arxwatch run` feeds it
    from_capture = replayed(config, libraries, recorded["capture"])
    from_csv = replayed(config, libraries, recorded["csv"])
    assert any(r["asset"] == "block-a/vav-2" and r["family"] == "behaviour" for r in live)
    assert sorted(map(key, from_capture)) == sorted(map(key, live))
    assert sorted(map(key, from_csv)) == sorted(map(key, live))


def test_a_trend_export_read_ahead_by_a_second_process_gives_the_same_records(
    library_file: Path, recorded: dict[str, Path], monkeypatch: pytest.MonkeyPatch
) -> None:
    config, libraries = file_site(library_file)
    here = replayed(config, libraries, recorded["csv"])
    monkeypatch.setattr(replay_module, "READ_AHEAD_BYTES", 0)
    monkeypatch.setattr(replay_module.os, "cpu_count", lambda: 2)
    assert replayed(config, libraries, recorded["csv"]) == here  # the same, in the same order


def test_replay_command_writes_alert_lines_and_a_summary(
    tmp_path: Path, library_file: Path, recorded: dict[str, Path], capsys: pytest.CaptureFixture
) -> None:
    config = tmp_path / "site.yaml"
    config.write_text(SITE.format(baseline=f"{{file: {library_file}}}", model="auto"))
    alerts = tmp_path / "alerts.jsonl"
    code = main(["replay", "--config", str(config), "--input", str(recorded["csv"]),
                 "--alerts", str(alerts)])  # fmt: skip
    out = capsys.readouterr().out
    assert code == 0
    lines = [json.loads(line) for line in alerts.read_text().splitlines()]
    assert lines and all(r["schema"] == "arxwatch.alert/1" for r in lines)
    assert f"{len(lines):,} alert records written to {alerts}" in out
    assert "data from 2026-01-01T00:00:00Z to 2026-01-01T14:59:00Z" in out
    # 3 boxes x 899 closed grid points; each box's 6 out-of-range readings stay out of
    # the model: the last good value carries 2 of them (staleness 2 periods), 4 are skipped
    assert "rows 2,685, judged 2,685; grid points without a complete row 12" in out
    assert "samples: accepted 5,382, out_of_range 18" in out


def test_replay_command_names_bad_input(
    tmp_path: Path,
    library_file: Path,
    capsys: pytest.CaptureFixture,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    config = tmp_path / "site.yaml"
    config.write_text(SITE.format(baseline=f"{{file: {library_file}}}", model="auto"))
    trend = tmp_path / "trend.csv"
    trend.write_text("time,larkspur/a/vav/v1/zone-temp\n1767225600,21\nnoon,22\n1767225720,x\n")
    assert main(["replay", "--config", str(config), "--input", str(trend)]) == 2
    err = capsys.readouterr().err
    assert f"{trend}:3: first column: time 'noon'" in err and "--on-bad-line skip" in err
    with monkeypatch.context() as patch:  # read ahead by a second process: the same error
        patch.setattr(replay_module, "READ_AHEAD_BYTES", 0)
        patch.setattr(replay_module.os, "cpu_count", lambda: 2)
        assert main(["replay", "--config", str(config), "--input", str(trend)]) == 2
        assert f"{trend}:3: first column: time 'noon'" in capsys.readouterr().err
    assert main(["replay", "--config", str(config), "--input", str(trend),
                 "--on-bad-line", "skip"]) == 0  # fmt: skip
    out = capsys.readouterr().out
    assert "1 unreadable lines skipped" in out and "payloads rejected: not_a_number 1" in out
    assert main(["replay", "--config", str(config), "--input", str(tmp_path / "none.csv")]) == 2
    assert "none.csv: No such file or directory" in capsys.readouterr().err
    with monkeypatch.context() as patch:  # the file (or the read-ahead process) fails mid-way

        def failing(*args: object, **kwargs: object) -> None:
            raise OSError(5, "Input/output error")

        patch.setattr(replay_module, "replay", failing)
        assert main(["replay", "--config", str(config), "--input", str(trend)]) == 2
        err = capsys.readouterr().err
        assert f"{trend}: cannot read on: [Errno 5] Input/output error" in err
        assert "Traceback" not in err
    garbage = tmp_path / "b.json"
    garbage.write_text("{not json")
    config.write_text(SITE.format(baseline=f"{{file: {garbage}}}", model="auto"))
    assert main(["replay", "--config", str(config), "--input", str(trend)]) == 2
    assert f"asset class 'vav': {garbage}: line 1: not JSON" in capsys.readouterr().err
