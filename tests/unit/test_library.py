"""Baseline files: round trip, and errors that name the file and the key."""

import json
from pathlib import Path

import numpy as np
import pytest

from arxwatch.daemon.library import BaselineFileError, read_baselines, write_baselines
from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.estimators.baseline import BaselineSet, fit_baseline


@pytest.fixture(scope="module")
def baselines() -> dict[str, BaselineSet]:
    loop = REFERENCE_LOOPS["first-order+dead-time"]
    u = daily_operation(2880, 60.0, seed=1)
    t = 1.7e9 + 60.0 * np.arange(len(u))
    base = fit_baseline(loop.simulate(u, seed=2), u[:, None], t, sample_period_s=60.0).baseline
    assert base is not None
    return {"block-c/ahu-2": BaselineSet((base,)), "block-a/vav-3-14": BaselineSet((base,))}


def test_round_trip(tmp_path: Path, baselines: dict[str, BaselineSet]) -> None:
    path = tmp_path / "site.json"
    write_baselines(path, baselines, 1.7e9)
    again = read_baselines(path)
    assert {a: b.to_dict() for a, b in again.items()} == {
        a: b.to_dict() for a, b in baselines.items()
    }
    assert json.loads(path.read_text())["written"] == "2023-11-14T22:13:20.000Z"


def test_errors_name_the_file_and_the_key(
    tmp_path: Path, baselines: dict[str, BaselineSet]
) -> None:
    path = tmp_path / "site.json"
    with pytest.raises(BaselineFileError, match="site.json: cannot read the file"):
        read_baselines(path)
    path.write_text("{")
    with pytest.raises(BaselineFileError, match="site.json: line 1: not JSON"):
        read_baselines(path)
    path.write_text(json.dumps({"format": "other", "version": 1, "assets": {}}))
    with pytest.raises(BaselineFileError, match="format is 'other', expected 'arxwatch.baselines'"):
        read_baselines(path)
    write_baselines(path, baselines, 1.7e9)
    document = json.loads(path.read_text())
    document["version"] = 2
    path.write_text(json.dumps(document))
    with pytest.raises(BaselineFileError, match="version 2; this release reads version 1"):
        read_baselines(path)
    document["version"] = 1
    del document["assets"]["block-c/ahu-2"]["baselines"][0]["sigma2"]
    path.write_text(json.dumps(document))
    with pytest.raises(BaselineFileError, match=r"assets\['block-c/ahu-2'\]"):
        read_baselines(path)
