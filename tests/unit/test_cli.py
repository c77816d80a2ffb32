"""Command line: bad arguments give argparse errors (the demo runs in tests/integration)."""

import pytest

from arxwatch.daemon.cli import main


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--duration", "zero"], "expected a number with a unit m, h or d (e.g. 14h), got 'zero'"),
        (["--duration", "0h"], "expected a duration > 0, got '0h'"),
        (["--speed", "fast"], "expected a number, got 'fast'"),
        (["--speed", "0"], "expected a speed from 1 to 100000, got '0'"),
        (["--broker", "other"], "invalid choice: 'other'"),
    ],
)
def test_bad_option_value_is_refused(
    args: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    with pytest.raises(SystemExit) as stop:
        main(["demo", *args])
    assert stop.value.code == 2
    assert message in capsys.readouterr().err
