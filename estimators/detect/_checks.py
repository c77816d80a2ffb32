"""Validation shared by the detectors: settings at construction, saved state on load.

Every message names the setting or state key, the value found and what was
expected, so a bad YAML entry or a corrupt checkpoint says where it went wrong.
"""

from __future__ import annotations

import math
from collections.abc import Collection, Mapping
from numbers import Integral, Real
from typing import Any


def is_real(value: object) -> bool:
    """Tell whether ``value`` is a finite real number (not a bool)."""
    return not isinstance(value, bool) and isinstance(value, Real) and math.isfinite(float(value))


def is_int(value: object) -> bool:
    """Tell whether ``value`` is an integer (not a bool)."""
    return not isinstance(value, bool) and isinstance(value, Integral)


def check_setting(owner: str, name: str, value: object, ok: bool, expected: str) -> None:
    """Raise ValueError naming ``owner.name``, the value and the expectation unless ``ok``.

    Raises
    ------
    ValueError
        If ``ok`` is false.
    """
    if not ok:
        raise ValueError(f"{owner}.{name} must be {expected}, got {value!r}")


def check_probability(owner: str, name: str, value: float) -> None:
    """Require a number strictly between 0 and 1.

    Raises
    ------
    ValueError
        If ``value`` is not a real number in (0, 1).
    """
    ok = is_real(value) and 0.0 < float(value) < 1.0
    check_setting(owner, name, value, ok, "a number strictly between 0 and 1")


def expect_state(state: object, detector: str, keys: Collection[str]) -> Mapping[str, Any]:
    """Check that ``state`` is a dict saved by ``detector`` holding exactly ``keys``.

    Raises
    ------
    ValueError
        If it is not a mapping, was saved by another detector, or has missing
        or unknown keys.
    """
    if not isinstance(state, Mapping):
        raise ValueError(f"{detector} state must be a dict, got {type(state).__name__}")
    saved_by = state.get("detector")
    if saved_by != detector:
        raise ValueError(f"state was saved by detector {saved_by!r}, not {detector!r}")
    expected = set(keys) | {"detector"}
    missing = sorted(expected - set(state))
    unknown = sorted(set(state) - expected)
    if missing or unknown:
        raise ValueError(f"{detector} state: missing keys {missing}, unknown keys {unknown}")
    return state


def state_float(
    state: Mapping[str, Any], detector: str, key: str, *, minimum: float | None = None
) -> float:
    """Read a finite float (optionally ``>= minimum``) from saved state.

    Raises
    ------
    ValueError
        If the entry is not a finite number or lies below ``minimum``.
    """
    value = state[key]
    ok = is_real(value) and (minimum is None or float(value) >= minimum)
    if not ok:
        bound = "" if minimum is None else f" >= {minimum}"
        raise ValueError(f"{detector} state: {key} must be a finite number{bound}, got {value!r}")
    return float(value)


def state_int(state: Mapping[str, Any], detector: str, key: str, *, minimum: int = 0) -> int:
    """Read an integer ``>= minimum`` from saved state.

    Raises
    ------
    ValueError
        If the entry is not an integer or lies below ``minimum``.
    """
    value = state[key]
    if not is_int(value) or int(value) < minimum:
        raise ValueError(f"{detector} state: {key} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def state_floats(
    state: Mapping[str, Any], detector: str, key: str, length: int | None = None
) -> list[float]:
    """Read a list of finite floats (of a given length) from saved state.

    Raises
    ------
    ValueError
        If the entry is not a list of finite numbers of the expected length.
    """
    value = state[key]
    if not isinstance(value, list) or not all(is_real(v) for v in value):
        raise ValueError(f"{detector} state: {key} must be a list of finite numbers")
    if length is not None and len(value) != length:
        raise ValueError(
            f"{detector} state: {key} has {len(value)} entries, this configuration needs {length}"
        )
    return [float(v) for v in value]
