"""Estimator <-> plain data (dicts, lists, numbers), versioned, for checkpoints.

The encoded form holds only JSON types. Floats survive a JSON round trip
exactly (Python writes the shortest repr that reads back to the same double),
so a restored estimator continues bit for bit where the saved one stopped.
"""

from __future__ import annotations

from dataclasses import asdict, fields
from typing import Any

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.rls import RlsConfig

FORMAT = "arxwatch.arx-estimator"
VERSION = 1


class CodecError(ValueError):
    """Encoded data is not a readable estimator; the message says where."""


def encode_order(order: ArxOrder) -> dict[str, Any]:
    """ArxOrder as plain data."""
    return {"na": order.na, "nb": list(order.nb), "nk": list(order.nk), "constant": order.constant}


def decode_order(data: Any, where: str = "order") -> ArxOrder:
    """Read an ArxOrder written by :func:`encode_order`.

    Raises
    ------
    CodecError
        If keys are missing or unknown; OrderError if the orders are impossible.
    """
    expect_keys(data, {"na", "nb", "nk", "constant"}, where)
    return ArxOrder(
        na=data["na"], nb=tuple(data["nb"]), nk=tuple(data["nk"]), constant=bool(data["constant"])
    )


def encode_config(config: RlsConfig) -> dict[str, Any]:
    """RlsConfig as plain data."""
    return asdict(config)


def decode_config(data: Any, where: str = "config") -> RlsConfig:
    """Read an RlsConfig written by :func:`encode_config`.

    Raises
    ------
    CodecError
        If keys are missing or unknown; ValueError if a value is out of range.
    """
    expect_keys(data, {f.name for f in fields(RlsConfig)}, where)
    return RlsConfig(**data)


def encode_estimator(estimator: ArxEstimator) -> dict[str, Any]:
    """Structure, settings and learned state of an estimator as plain data.

    Examples
    --------
    >>> est = ArxEstimator(ArxOrder(1, (1,), (1,)))
    >>> decode_estimator(encode_estimator(est)).to_state() == est.to_state()
    True
    """
    return {
        "format": FORMAT,
        "version": VERSION,
        "order": encode_order(estimator.order),
        "config": encode_config(estimator.config),
        "state": estimator.to_state(),
    }


def decode_estimator(data: Any) -> ArxEstimator:
    """Rebuild an estimator written by :func:`encode_estimator`.

    Raises
    ------
    CodecError
        If the format or version is not this one, or a key is missing.
    """
    expect_keys(data, {"format", "version", "order", "config", "state"}, "estimator")
    if data["format"] != FORMAT:
        raise CodecError(f"estimator.format: expected {FORMAT!r}, got {data['format']!r}")
    if data["version"] != VERSION:
        raise CodecError(
            f"estimator.version: this build reads version {VERSION}, got {data['version']!r}"
        )
    estimator = ArxEstimator(
        decode_order(data["order"], "estimator.order"),
        decode_config(data["config"], "estimator.config"),
    )
    expect_keys(data["state"], {"rls", "history"}, "estimator.state")
    estimator.load_state(data["state"])
    return estimator


def kind_of(value: object) -> str:
    """Name a value's JSON-ish type for an error message ("null" for None)."""
    return "null" if value is None else type(value).__name__


def expect_keys(data: Any, keys: set[str], where: str) -> None:
    """Check that ``data`` is a mapping with exactly ``keys``.

    Raises
    ------
    CodecError
        Naming ``where`` and the missing or unknown keys.
    """
    if not isinstance(data, dict):
        raise CodecError(f"{where}: expected a mapping, got {kind_of(data)}")
    missing = keys - data.keys()
    unknown = data.keys() - keys
    if missing:
        raise CodecError(f"{where}: missing key(s) {sorted(missing)}")
    if unknown:
        raise CodecError(f"{where}: unknown key(s) {sorted(map(str, unknown))}")
