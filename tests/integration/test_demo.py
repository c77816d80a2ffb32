"""``arxwatch demo`` as a new user runs it: its own process, its own broker, a bounded run.

Each run is a child process (the installed command's module) with a
wall-clock timeout; it must exit 0, report every scheduled fault of
Larkspur Yard as caught, raise nothing unexplained, and leave behind
neither its broker process nor its working directory. Speed and duration
are chosen so that a run takes well under a minute on two cores.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from arxwatch.daemon.building import FAULT_SCHEDULE

from .conftest import MOSQUITTO

pytestmark = pytest.mark.integration

TIMEOUT_S = 90.0
#: The last scheduled fault plus 90 simulated minutes to catch it.
DURATION = "810m"


def _demo(*args: str) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, "-m", "arxwatch.daemon.cli", "demo", *args],
        stdin=subprocess.DEVNULL,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )


def _finish(process: subprocess.Popen[str]) -> tuple[int, str]:
    try:
        out, _ = process.communicate(timeout=TIMEOUT_S)
    except subprocess.TimeoutExpired:
        process.kill()
        out, _ = process.communicate()
        pytest.fail(f"the demo did not finish in {TIMEOUT_S} s:\n{out}")
    return process.returncode, out


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def _check_clean_exit(out: str) -> None:
    work = re.search(r"^working files: (\S+)", out, flags=re.M)
    assert work is not None, out
    assert not Path(work.group(1)).exists(), "the working directory was left behind"
    pid = re.search(r"^broker: mosquitto on 127\.0\.0\.1:\d+, pid (\d+)$", out, flags=re.M)
    if pid is not None:
        assert not _alive(int(pid.group(1))), "the broker process was left behind"
    assert "Traceback" not in out
    assert "not a safety function" in out  # the caution closes every run


@pytest.mark.parametrize("broker", ["mosquitto", "embedded"])
def test_demo_catches_every_scheduled_fault_and_cleans_up(broker: str) -> None:
    if broker == "mosquitto" and MOSQUITTO is None:
        pytest.skip("mosquitto is not installed (Debian: apt-get install mosquitto)")
    code, out = _finish(_demo("--broker", broker, "--speed", "6000", "--duration", DURATION))
    assert code == 0, out
    assert re.search(rf"^broker: {broker}", out, flags=re.M), out
    caught = re.findall(r"^      caught by (\w+) \((\w+),", out, flags=re.M)
    assert [family for _, family in caught] == [f.family for f in FAULT_SCHEDULE], out
    assert "other alerts raised (assets without a fault, or before it): 0" in out, out
    # the alerts came live over MQTT, one line each, with the simulated time
    assert re.search(r"^  \w{3} \d\d \w{3} \d\d:\d\d  RAISED  warning  block-c/ahu-2 ", out, re.M)
    assert re.search(r"^  \w{3} \d\d \w{3} \d\d:\d\d  cleared .* block-d/ahu-1 .*stale", out, re.M)
    _check_clean_exit(out)


def test_sigint_stops_the_demo_early_and_cleanly() -> None:
    if MOSQUITTO is None:
        pytest.skip("mosquitto is not installed (Debian: apt-get install mosquitto)")
    process = _demo("--broker", "mosquitto", "--speed", "1200")
    assert process.stdout is not None
    lines = []
    deadline = time.monotonic() + TIMEOUT_S
    for line in process.stdout:  # read until the building is live
        lines.append(line)
        if "go-live" in line or time.monotonic() > deadline:
            break
    process.send_signal(signal.SIGINT)
    code, rest = _finish(process)
    out = "".join(lines) + rest
    assert code == 0, out
    assert re.search(r"^stopped at ", out, flags=re.M), out
    assert out.count("not reached: the demo stopped before") == len(FAULT_SCHEDULE), out
    _check_clean_exit(out)
