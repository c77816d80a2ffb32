"""Deployment files: the systemd unit verifies, and every command they run exists."""

import json
import shlex
import shutil
import subprocess
from pathlib import Path

import pytest

from arxwatch.daemon.cli import build_parser

ROOT = Path(__file__).resolve().parents[2]
UNIT = ROOT / "deploy" / "arxwatch.service"
CONTAINER = ROOT / "deploy" / "Containerfile"


def test_the_unit_runs_the_service_as_notify_with_a_watchdog() -> None:
    text = UNIT.read_text()
    lines = dict(
        line.split("=", 1) for line in text.splitlines() if "=" in line and not line.startswith("#")
    )
    assert lines["Type"] == "notify"  # READY=1 after restore and first CONNACK
    assert "WatchdogSec" in lines and lines["Restart"] == "on-failure"
    assert lines["DynamicUser"] == "yes" and lines["StateDirectory"] == "arxwatch"
    args = shlex.split(lines["ExecStart"])[1:]
    parsed = build_parser().parse_args(args)
    assert parsed.command == "run" and parsed.config == "/etc/arxwatch/site.yaml"


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="systemd-analyze not installed")
def test_systemd_analyze_verifies_the_unit(tmp_path: Path) -> None:
    # systemd-analyze verify (systemd-analyze(1)) checks every directive; the
    # install path of the binary is swapped for one that exists here.
    executable = shutil.which("arxwatch") or shutil.which("true")
    assert executable is not None
    unit = tmp_path / "arxwatch.service"
    unit.write_text(UNIT.read_text().replace("/opt/arxwatch/bin/arxwatch", executable))
    done = subprocess.run(
        ["systemd-analyze", "verify", "--man=no", str(unit)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 0, done.stderr
    assert "arxwatch.service" not in done.stderr, done.stderr


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="systemd-analyze not installed")
def test_the_units_exposure_stays_low() -> None:
    # systemd-analyze security (systemd-analyze(1), systemd >= 250 for
    # --offline and --threshold, which counts in tenths: 15 = "1.5"). The unit
    # scored 1.1 on its last review; what is left open is explained in it
    # (network access, W^X for the optional compiler). 1.5 is our own
    # ceiling, no source: a change that weakens the sandbox must say why.
    done = subprocess.run(
        ["systemd-analyze", "security", "--offline=true", "--threshold=15", str(UNIT)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 0, done.stdout + done.stderr


def test_the_container_entrypoint_is_the_run_command() -> None:
    entry = next(
        line for line in CONTAINER.read_text().splitlines() if line.startswith("ENTRYPOINT")
    )
    argv = json.loads(entry.split(" ", 1)[1])  # the exec form is a JSON array
    assert argv[0] == "arxwatch"
    parsed = build_parser().parse_args(argv[1:])
    assert parsed.command == "run"
