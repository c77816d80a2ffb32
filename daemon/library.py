"""Baseline files: the accepted baselines of many assets in one versioned JSON file.

A site's commissioning baselines are fitted once (from a trend export, a
capture, or live) and then loaded by ``arxwatch run`` and ``arxwatch
replay`` on any machine: the file is plain JSON, independent of the state
store, so replicas can share it. Layout::

    {
      "format": "arxwatch.baselines",
      "version": 1,
      "written": "2026-12-02T05:20:48.000Z",
      "assets": {
        "block-c/ahu-2": {<a BaselineSet, format "arxwatch.baseline-set">},
        ...
      }
    }

Each entry is :meth:`arxwatch.estimators.baseline.BaselineSet.to_dict`: the
model order, theta0 and its covariance, innovation variance, fit on
held-back data, physical read-out and the window it came from, per
operating mode (the keys, types and units of its versions 1 and 2 are
listed in :mod:`arxwatch.estimators.baseline`; version 2 adds the number of
gap-free stretches a baseline was fitted on). Undefined numbers are written as
``null``. ``written`` is the UTC time the file was made.

``arxwatch baselines`` writes these files (:mod:`arxwatch.daemon.commission`),
one per asset class. They are portable between machines and replicas: asset
ids, epoch times and numbers only, no path, host name or state-store
reference; floats are written in the shortest form that reads back to the
same double, so every replica judges against the same model bit for bit.
A reader refuses a file of another ``format`` or ``version`` (a newer
writer must bump the version) and names the file and key path of any
faulty entry.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from arxwatch.daemon.alert import iso_utc
from arxwatch.daemon.config import Config
from arxwatch.daemon.store import write_atomically
from arxwatch.estimators.baseline import BaselineSet
from arxwatch.estimators.codec import CodecError

__all__ = [
    "FORMAT",
    "VERSION",
    "BaselineFileError",
    "decode_library",
    "encode_library",
    "read_baselines",
    "read_site_baselines",
    "write_baselines",
]

FORMAT = "arxwatch.baselines"
VERSION = 1


class BaselineFileError(ValueError):
    """A baseline file cannot be read; the message names the file and the key path."""


def encode_library(baselines: Mapping[str, BaselineSet], now_s: float) -> dict[str, Any]:
    """Return the JSON-ready document for ``baselines`` (asset id -> set), written at ``now_s``."""
    return {
        "format": FORMAT,
        "version": VERSION,
        "written": iso_utc(now_s),
        "assets": {asset: baselines[asset].to_dict() for asset in sorted(baselines)},
    }


def decode_library(document: Any, source: str) -> dict[str, BaselineSet]:
    """Read a document made by :func:`encode_library`.

    Raises
    ------
    BaselineFileError
        If the format, version or an entry is wrong; the message names
        ``source`` and the key path.
    """
    if not isinstance(document, dict):
        raise BaselineFileError(f"{source}: expected a JSON object at the top")
    if document.get("format") != FORMAT:
        raise BaselineFileError(
            f"{source}: format is {document.get('format')!r}, expected {FORMAT!r} "
            "(a file written by 'arxwatch baselines')"
        )
    if document.get("version") != VERSION:
        raise BaselineFileError(
            f"{source}: version {document.get('version')!r}; this release reads version {VERSION}"
        )
    unknown = set(document) - {"format", "version", "written", "assets"}
    if unknown:
        raise BaselineFileError(f"{source}: unknown keys {sorted(unknown)}")
    assets = document.get("assets")
    if not isinstance(assets, dict):
        raise BaselineFileError(f"{source}: assets: expected an object of asset id -> baselines")
    out: dict[str, BaselineSet] = {}
    for asset, entry in assets.items():
        if not asset:
            raise BaselineFileError(f"{source}: assets: an empty asset id")
        try:
            out[asset] = BaselineSet.from_dict(entry, where=f"assets[{asset!r}]")
        except (CodecError, ValueError) as err:
            raise BaselineFileError(f"{source}: {err}") from None
    return out


def read_baselines(path: str | Path) -> dict[str, BaselineSet]:
    """Read a baseline file.

    Raises
    ------
    BaselineFileError
        If the file cannot be read, is not JSON, or an entry is wrong.
    """
    source = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as err:
        raise BaselineFileError(f"{source}: cannot read the file: {err.strerror}") from None
    except UnicodeDecodeError:
        raise BaselineFileError(f"{source}: is not UTF-8 text") from None
    try:
        document = json.loads(text)
    except json.JSONDecodeError as err:
        raise BaselineFileError(f"{source}: line {err.lineno}: not JSON ({err.msg})") from None
    return decode_library(document, source)


def read_site_baselines(config: Config) -> dict[str, dict[str, BaselineSet]]:
    """Read the baseline file of every asset class that names one (``baseline.file``).

    Returns
    -------
    dict
        Asset class name -> asset id -> baselines.

    Raises
    ------
    BaselineFileError
        If a file cannot be read; the message names the class and the file.
    """
    out: dict[str, dict[str, BaselineSet]] = {}
    for asset_class in config.asset_classes:
        path = asset_class.baseline.file
        if path is None:
            continue
        try:
            out[asset_class.name] = read_baselines(path)
        except BaselineFileError as err:
            raise BaselineFileError(f"asset class {asset_class.name!r}: {err}") from None
    return out


def write_baselines(path: str | Path, baselines: Mapping[str, BaselineSet], now_s: float) -> None:
    """Write a baseline file atomically (a reader never sees half a file).

    Raises
    ------
    OSError
        If the file cannot be written.
    """
    text = json.dumps(encode_library(baselines, now_s), indent=1, allow_nan=False)
    write_atomically(path, (text + "\n").encode("utf-8"))
