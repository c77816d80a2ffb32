"""Packaging: one namespace, every sub-package listed, core free of the shell."""

import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def test_every_source_folder_is_a_listed_package() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(config["packages"])
    found = set()
    for top, name in (("daemon", "arxwatch.daemon"), ("estimators", "arxwatch.estimators")):
        for folder in [ROOT / top, *(p for p in (ROOT / top).rglob("*") if p.is_dir())]:
            if folder.name != "__pycache__" and any(folder.glob("*.py")):
                rel = folder.relative_to(ROOT / top).parts
                found.add(".".join((name, *rel)))
    assert found == listed


def test_importing_the_core_loads_no_service_module() -> None:
    # numpy and scipy load logging and threading themselves, so only the
    # service-side libraries are checked.
    code = (
        "import sys, arxwatch.estimators\n"
        "bad = [m for m in sys.modules if m.startswith(('arxwatch.daemon', 'paho', "
        "'prometheus_client', 'sqlite3', 'yaml'))]\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


PURE_STAGES = (
    "route", "decode", "align", "intake", "monitor", "fleet", "decide", "alert", "pipeline",
    "simulate", "config",
)  # fmt: skip


def test_pure_stages_load_no_adapter_library() -> None:
    # The processing stages of the shell are pure: MQTT, Prometheus and
    # SQLite belong to the adapters (ingest, publish, store, metrics, http).
    # config reads YAML, so yaml is allowed.
    imports = "; ".join(f"import arxwatch.daemon.{name}" for name in PURE_STAGES)
    code = (
        f"import sys; {imports}\n"
        "bad = [m for m in sys.modules if m.startswith(('paho', 'prometheus_client', "
        "'sqlite3', 'arxwatch.daemon.ingest', 'arxwatch.daemon.store', "
        "'arxwatch.daemon.service'))]\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_the_container_copies_every_file_the_build_reads() -> None:
    # The Containerfile builds from a copy of some files only: the readme,
    # the licence files (setuptools refuses a license-files pattern that
    # matches nothing) and the package folders must all be in it.
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())
    needed = {"pyproject.toml", project["project"]["readme"], *project["project"]["license-files"]}
    needed |= set(project["tool"]["setuptools"]["package-dir"].values())
    copied = set()
    for line in (ROOT / "deploy" / "Containerfile").read_text().splitlines():
        words = line.split()
        if words[:1] == ["COPY"] and words[-1].startswith("/src"):
            copied.update(words[1:-1])
    assert needed <= copied, f"deploy/Containerfile does not copy {sorted(needed - copied)}"
    assert all((ROOT / name).exists() for name in needed)
