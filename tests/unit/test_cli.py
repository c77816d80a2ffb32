"""Command line: demo runs, bad arguments give argparse errors."""

import re

import pytest

from arxwatch.daemon.cli import main


def test_demo_runs_and_tracks_the_simulated_fouling(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["demo", "--days", "4"]) == 0
    out = capsys.readouterr().out
    assert "fictional site" in out and "not a life-safety system" in out
    rows = re.findall(r"day (\d) \d\d:00 .*?([+-]\d+\.\d) %", out)
    assert rows, out
    # The simulated coil ends at 60 % of its commissioned gain: the live
    # read-out must end about 40 % lower in magnitude (demo data, own truth).
    assert -50.0 < float(rows[-1][1]) < -30.0
    # Before the fault (days 1-2) the gain stays within 5 % of the baseline.
    assert all(abs(float(change)) < 5.0 for day, change in rows if int(day) <= 2)


def test_bad_option_value_is_refused(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["demo", "--days", "zero"])
    assert stop.value.code == 2
    assert "expected a number, got 'zero'" in capsys.readouterr().err
