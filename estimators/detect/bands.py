"""Physical bands: gains, time constant, dead time and offset against tolerances.

The statistical tests of :mod:`~arxwatch.estimators.detect.parameter` say
whether a change is real; a band says whether it is big enough to matter to
a technician. Each feature of a
:class:`~arxwatch.estimators.readout.PhysicalReadout` is compared with its
baseline value:

* static gains, the dominant time constant and dead times by their relative
  change ``(current - baseline) / |baseline|`` against a relative tolerance
  (dead times as :attr:`~arxwatch.estimators.readout.PhysicalReadout.dead_times_s`
  reads them from the step response: they follow a delay change best within
  the lags the model's B polynomial covers);
* the offset (steady-state output with all inputs zero, in output units) by
  its absolute change against an absolute tolerance, given directly or as a
  multiple of an output standard deviation supplied with the baseline.

A feature whose baseline value is undefined (``nan``) or, for a relative
band, zero has no meaningful band and is not monitored. A monitored feature
that becomes undefined (an integrating or unstable live model) is reported as
an alarm with detail ``"undefined"``. Default tolerances are engineering
judgement, not a standard: common practice, no source.

References
----------
K. J. Åström and T. Hägglund, *Advanced PID Control*, ISA, 2006, chapter 2
(process models by static gain, time constant and dead time; how changes of
each affect loop behaviour).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from arxwatch.estimators.detect._checks import (
    check_setting,
    expect_state,
    is_real,
)
from arxwatch.estimators.detect.evidence import Evidence
from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.readout import PhysicalReadout

__all__ = ["BandsConfig", "PhysicalBands"]

_NAME = "physical_band"


@dataclass(frozen=True)
class BandsConfig:
    """Tolerances of the physical bands.

    Attributes
    ----------
    gain_tolerance : float
        Relative tolerance of each static gain, > 0. Default 0.25 (25 %).
    time_constant_tolerance : float
        Relative tolerance of the dominant time constant, > 0. Default 0.5.
    dead_time_tolerance : float
        Relative tolerance of each dead time, > 0. Default 0.5.
    offset_tolerance : float or None
        Absolute tolerance of the offset in output units, > 0; None derives
        it from ``offset_sigmas`` and the output sigma given with the
        baseline. Default None.
    offset_sigmas : float
        Offset tolerance in output standard deviations when
        ``offset_tolerance`` is None, > 0. Default 3.0.
    """

    gain_tolerance: float = 0.25
    time_constant_tolerance: float = 0.5
    dead_time_tolerance: float = 0.5
    offset_tolerance: float | None = None
    offset_sigmas: float = 3.0

    def __post_init__(self) -> None:
        owner = type(self).__name__
        for name in (
            "gain_tolerance",
            "time_constant_tolerance",
            "dead_time_tolerance",
            "offset_sigmas",
        ):
            value = getattr(self, name)
            check_setting(owner, name, value, is_real(value) and value > 0.0, "a finite number > 0")
        tol = self.offset_tolerance
        check_setting(
            owner,
            "offset_tolerance",
            tol,
            tol is None or (is_real(tol) and tol > 0.0),
            "None or a finite number > 0 (output units)",
        )


def _features(readout: PhysicalReadout) -> dict[str, float]:
    """Banded features of a reading by name."""
    out = {f"gain_{i + 1}": g for i, g in enumerate(readout.gains)}
    out["time_constant_s"] = readout.time_constant_s
    out.update((f"dead_time_{i + 1}_s", d) for i, d in enumerate(readout.dead_times_s))
    if readout.offset is not None:
        out["offset"] = readout.offset
    return out


class PhysicalBands:
    """Tolerance bands on the physical reading against its baseline.

    Parameters
    ----------
    config : BandsConfig, optional
        Tolerances; defaults gain 25 %, time constant 50 %, dead time 50 %,
        offset 3 output sigmas.

    Examples
    --------
    >>> from arxwatch.estimators.arx import ArxOrder
    >>> from arxwatch.estimators.readout import read_out
    >>> order = ArxOrder(na=1, nb=(1,), nk=(1,), constant=False)
    >>> bands = PhysicalBands()
    >>> bands.set_baseline(read_out(order, [-0.8, 0.4], 60.0))   # gain 2
    >>> gain = bands.update(read_out(order, [-0.8, 0.6], 60.0))[0]  # gain 3
    >>> gain.signal, round(gain.values["change"], 9), gain.alarm, gain.detail
    ('gain_1', 0.5, True, 'high')

    References
    ----------
    K. J. Åström and T. Hägglund, *Advanced PID Control*, ISA, 2006,
    chapter 2.
    """

    __slots__ = ("config", "_baseline", "_shape", "_state")

    def __init__(self, config: BandsConfig | None = None) -> None:
        self.config = config if config is not None else BandsConfig()
        self._baseline: list[tuple[str, float, bool, float]] = []
        self._shape: tuple[int, bool] | None = None
        self._state: dict[str, Any] | None = None

    @property
    def features(self) -> tuple[str, ...]:
        """Names of the monitored features (empty before a baseline)."""
        return tuple(entry[0] for entry in self._baseline)

    def set_baseline(self, readout: PhysicalReadout, *, output_sigma: float | None = None) -> None:
        """Store the baseline reading.

        Parameters
        ----------
        readout : PhysicalReadout
            Reading of the baseline model.
        output_sigma : float, optional
            Output standard deviation in output units (> 0), needed when the
            model has an offset and ``config.offset_tolerance`` is None.

        Raises
        ------
        ValueError
            If ``output_sigma`` is needed but missing, or not finite and > 0.
        """
        if output_sigma is not None and not (is_real(output_sigma) and output_sigma > 0.0):
            raise ValueError(f"output_sigma must be a finite number > 0, got {output_sigma!r}")
        offset_tolerance = self.config.offset_tolerance
        if readout.offset is not None and offset_tolerance is None:
            if output_sigma is None:
                raise ValueError(
                    "output_sigma is needed: the model has an offset and "
                    "BandsConfig.offset_tolerance is None"
                )
            offset_tolerance = self.config.offset_sigmas * float(output_sigma)
        self._install(
            [float(g) for g in readout.gains],
            float(readout.time_constant_s),
            [float(d) for d in readout.dead_times_s],
            None if readout.offset is None else float(readout.offset),
            None if readout.offset is None else offset_tolerance,
        )

    def _install(
        self,
        gains: list[float],
        time_constant_s: float,
        dead_times_s: list[float],
        offset: float | None,
        offset_tolerance: float | None,
    ) -> None:
        config = self.config
        gain_tol = float(config.gain_tolerance)
        dead_tol = float(config.dead_time_tolerance)
        # (name, baseline value, relative band?, tolerance)
        monitored = [(f"gain_{i + 1}", g, True, gain_tol) for i, g in enumerate(gains)]
        monitored.append(
            ("time_constant_s", time_constant_s, True, float(config.time_constant_tolerance))
        )
        monitored.extend(
            (f"dead_time_{i + 1}_s", d, True, dead_tol) for i, d in enumerate(dead_times_s)
        )
        if offset is not None and offset_tolerance is not None:
            monitored.append(("offset", offset, False, offset_tolerance))
        self._baseline = [
            entry
            for entry in monitored
            if math.isfinite(entry[1]) and not (entry[2] and entry[1] == 0.0)
        ]
        self._shape = (len(gains), offset is not None)
        self._state = {
            "gains": [_plain(g) for g in gains],
            "time_constant_s": _plain(time_constant_s),
            "dead_times_s": [_plain(d) for d in dead_times_s],
            "offset": None if offset is None else _plain(offset),
            "has_offset": offset is not None,
            "offset_tolerance": offset_tolerance,
        }

    def update(self, readout: PhysicalReadout) -> list[Evidence]:
        """Compare a live reading with the baseline, one Evidence per monitored feature.

        Parameters
        ----------
        readout : PhysicalReadout
            Reading of the live model, same structure as the baseline.

        Returns
        -------
        list of Evidence
            In the order of :attr:`features`. ``statistic`` is |change|,
            ``threshold`` the tolerance (relative, or output units for the
            offset), ``detail`` ``"high"``/``"low"`` by the sign of the
            change; ``values``: ``baseline``, ``current`` and ``change``
            (relative for gains, time constant and dead times, absolute for
            the offset). A feature undefined in the live reading has
            ``statistic`` inf, ``detail`` ``"undefined"``, ``values`` with
            ``baseline`` only, and is an alarm.

        Raises
        ------
        RuntimeError
            If no baseline is set.
        DimensionError
            If the reading has another number of inputs or lacks or gains an
            offset compared with the baseline.
        """
        if self._shape is None:
            raise RuntimeError(f"{_NAME}: no baseline; call set_baseline first")
        shape = (len(readout.gains), readout.offset is not None)
        if shape != self._shape:
            raise DimensionError(
                f"reading has {shape[0]} inputs and offset={shape[1]}, the baseline "
                f"{self._shape[0]} inputs and offset={self._shape[1]}"
            )
        current = _features(readout)
        out = []
        for name, base, relative, tol in self._baseline:
            value = current[name]
            if not math.isfinite(value):
                out.append(
                    Evidence(
                        detector=_NAME,
                        family="behaviour",
                        statistic=math.inf,
                        threshold=tol,
                        alarm=True,
                        signal=name,
                        values={"baseline": base},
                        detail="undefined",
                    )
                )
                continue
            change = (value - base) / abs(base) if relative else value - base
            statistic = abs(change)
            out.append(
                Evidence(
                    detector=_NAME,
                    family="behaviour",
                    statistic=statistic,
                    threshold=tol,
                    alarm=statistic >= tol,
                    signal=name,
                    values={"baseline": base, "current": value, "change": change},
                    detail="high" if change >= 0.0 else "low",
                )
            )
        return out

    def reset(self) -> None:
        """Forget the baseline."""
        self._baseline = []
        self._shape = None
        self._state = None

    def clone(self) -> PhysicalBands:
        """Return a twin with the same tolerances and no baseline."""
        return PhysicalBands(self.config)

    def to_state(self) -> dict[str, Any]:
        """Baseline as plain JSON-safe data (undefined values as None)."""
        baseline = None if self._state is None else dict(self._state)
        return {"detector": _NAME, "baseline": baseline}

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If the state was saved by another detector, or its baseline has
            missing, unknown or malformed entries.
        """
        data = expect_state(state, _NAME, ("baseline",))
        raw = data["baseline"]
        if raw is None:
            self.reset()
            return
        keys = {
            "gains",
            "time_constant_s",
            "dead_times_s",
            "offset",
            "has_offset",
            "offset_tolerance",
        }
        if not isinstance(raw, dict) or set(raw) != keys:
            raise ValueError(
                f"{_NAME} state: baseline must be null or a dict with keys {sorted(keys)}"
            )
        gains = _list_or_nan(raw["gains"], "baseline.gains")
        dead_times = _list_or_nan(raw["dead_times_s"], "baseline.dead_times_s")
        if len(gains) != len(dead_times):
            raise ValueError(
                f"{_NAME} state: baseline.gains and baseline.dead_times_s differ in length"
            )
        tau = _value_or_nan(raw["time_constant_s"], "baseline.time_constant_s")
        has_offset = raw["has_offset"]
        if not isinstance(has_offset, bool):
            raise ValueError(f"{_NAME} state: baseline.has_offset must be a bool")
        offset: float | None = None
        tolerance: float | None = None
        if has_offset:
            offset = _value_or_nan(raw["offset"], "baseline.offset")
            tolerance = raw["offset_tolerance"]
            if not (is_real(tolerance) and float(tolerance) > 0.0):
                raise ValueError(
                    f"{_NAME} state: baseline.offset_tolerance must be a finite "
                    f"number > 0, got {tolerance!r}"
                )
            tolerance = float(tolerance)
        elif raw["offset"] is not None or raw["offset_tolerance"] is not None:
            raise ValueError(f"{_NAME} state: baseline without offset holds an offset")
        self._install(gains, tau, dead_times, offset, tolerance)


def _plain(v: float) -> float | None:
    return v if math.isfinite(v) else None


def _value_or_nan(v: Any, key: str) -> float:
    if v is None:
        return math.nan
    if not is_real(v):
        raise ValueError(f"{_NAME} state: {key} must be a finite number or null, got {v!r}")
    return float(v)


def _list_or_nan(v: Any, key: str) -> list[float]:
    if not isinstance(v, list):
        raise ValueError(f"{_NAME} state: {key} must be a list, got {type(v).__name__}")
    return [_value_or_nan(x, key) for x in v]
