"""Larkspur Yard: the simulated building behind ``arxwatch demo``.

Larkspur Yard is an invented site: two blocks, three air handlers and six
VAV zones, each a control loop of :mod:`arxwatch.daemon.simulate` (a lag
with dead time from one actuator to one measured temperature, sampled every
60 s) driven by a daily operating pattern. Every point is published as its
own MQTT message, ``larkspur/<block>/<ahu|vav>/<asset>/<signal>`` with a JSON
payload ``{"value": ..., "ts": <epoch s>}``, as many building controllers
do.

After the site goes live, a schedule of faults is injected
(:data:`FAULT_SCHEDULE`): a throttled chilled-water supply, a stuck reheat
valve, a drifting zone sensor and a point that stops publishing for a while.
Each names the alert family that should catch it, so the demo can say
whether it was caught. The first fault comes nine hours after go-live: the
drift monitor takes its first eight hours of live residuals as the
reference of their own correlation (the prewhitening stretch, 480 samples
at 60 s) and takes that stretch as fault-free.

Pure: grid times in, (topic, value) pairs out; no MQTT client, no clock.
The building is stepped in time order, once per sample period; the same run
first produces the fault-free history that the commissioning baselines are
fitted on, then continues live, so history and live data join without a
seam. Everything here is invented demo data, not a model of a real plant.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Literal

from arxwatch.daemon.simulate import DailyLoad, Fault, Loop, LoopRun, OperationRun

__all__ = [
    "ASSETS",
    "CLASSES",
    "FAULT_SCHEDULE",
    "HOUR_S",
    "SAMPLE_PERIOD_S",
    "SITE",
    "TOPIC_ROOT",
    "AssetKind",
    "AssetSpec",
    "Building",
    "ClassSpec",
    "ScheduledFault",
    "payload",
]

SITE = "Larkspur Yard"
TOPIC_ROOT = "larkspur"
SAMPLE_PERIOD_S = 60.0
HOUR_S = 3600.0

AssetKind = Literal["ahu", "vav"]


@dataclass(frozen=True)
class ClassSpec:
    """The points of one kind of asset, as named on site.

    Parameters
    ----------
    kind : {"ahu", "vav"}
        Topic level and asset class name.
    output, output_name, output_unit : str
        Measured output: topic signal level, site name, unit.
    output_range : (float, float)
        Plausible range of the output.
    actuator, actuator_name : str
        The actuator (model input, 0..100 %): topic signal level, site name.
    """

    kind: AssetKind
    output: str
    output_name: str
    output_unit: str
    output_range: tuple[float, float]
    actuator: str
    actuator_name: str


CLASSES: dict[AssetKind, ClassSpec] = {
    "ahu": ClassSpec(
        "ahu", "sat", "supply-air temperature", "degC", (-10.0, 60.0), "chw-valve", "cooling valve"
    ),
    "vav": ClassSpec(
        "vav", "zone-temp", "zone temperature", "degC", (5.0, 40.0), "reheat-valve", "reheat valve"
    ),
}

#: Cooling follows the afternoon load; reheat is highest in the morning warm-up.
COOLING = DailyLoad(mean=45.0, swing=25.0, peak_hour=15.0)
REHEAT = DailyLoad(mean=40.0, swing=20.0, peak_hour=7.0)


@dataclass(frozen=True)
class AssetSpec:
    """One simulated asset: where it is, its plant and its daily pattern."""

    kind: AssetKind
    block: str
    name: str
    loop: Loop
    load: DailyLoad

    @property
    def asset_id(self) -> str:
        """Asset id as the daemon derives it from the topic: ``<block>/<name>``."""
        return f"{self.block}/{self.name}"

    def topic(self, signal: str) -> str:
        """Topic of one of the asset's points."""
        return f"{TOPIC_ROOT}/{self.block}/{self.kind}/{self.name}/{signal}"


def _ahu(block: str, name: str, gain: float, tau: float, dead: float, mixed: float) -> AssetSpec:
    """Make an air handler: cooling valve % -> supply-air temperature, mixed air at ``mixed``."""
    loop = Loop(gain, tau, dead, SAMPLE_PERIOD_S, offset=mixed, noise_std=0.03)
    return AssetSpec("ahu", block, name, loop, COOLING)


def _vav(block: str, name: str, gain: float, tau: float, lag: float, base: float) -> AssetSpec:
    """Make a VAV zone: reheat valve % -> zone temperature (coil, then room: second order)."""
    loop = Loop(
        gain,
        tau,
        SAMPLE_PERIOD_S,
        SAMPLE_PERIOD_S,
        offset=base,
        noise_std=0.02,
        second_time_constant_s=lag,
    )
    return AssetSpec("vav", block, name, loop, REHEAT)


ASSETS: tuple[AssetSpec, ...] = (
    _ahu("block-c", "ahu-1", gain=-0.11, tau=480.0, dead=120.0, mixed=24.0),
    _ahu("block-c", "ahu-2", gain=-0.12, tau=600.0, dead=60.0, mixed=25.0),
    _ahu("block-d", "ahu-1", gain=-0.10, tau=420.0, dead=120.0, mixed=23.5),
    _vav("block-c", "vav-2-01", gain=0.060, tau=900.0, lag=240.0, base=19.5),
    _vav("block-c", "vav-2-02", gain=0.055, tau=840.0, lag=180.0, base=19.8),
    _vav("block-c", "vav-3-01", gain=0.065, tau=960.0, lag=240.0, base=19.2),
    _vav("block-c", "vav-3-02", gain=0.060, tau=900.0, lag=200.0, base=19.6),
    _vav("block-d", "vav-1-03", gain=0.050, tau=780.0, lag=180.0, base=20.0),
    _vav("block-d", "vav-1-04", gain=0.058, tau=900.0, lag=240.0, base=19.4),
)


@dataclass(frozen=True)
class ScheduledFault:
    """A fault injected after go-live, and the alert family that should catch it.

    Parameters
    ----------
    asset : str
        Asset id.
    title : str
        What happens, in plain words.
    after_s : float
        Seconds after go-live.
    fault : Fault or None
        The physical or sensor fault (its ``start_s`` counts from go-live);
        None when the point only stops publishing.
    silent_signal : str or None
        Signal that stops publishing from ``after_s`` for ``silent_for_s``.
    silent_for_s : float
        How long the point stays silent.
    family : {"behaviour", "data_quality"}
        Alert family that names this fault.
    """

    asset: str
    title: str
    after_s: float
    fault: Fault | None = None
    silent_signal: str | None = None
    silent_for_s: float = 0.0
    family: Literal["behaviour", "data_quality"] = "behaviour"

    def __post_init__(self) -> None:
        if (self.fault is None) == (self.silent_signal is None):
            raise ValueError(f"{self.asset}: give either a fault or a silent signal")
        if self.fault is not None and self.fault.start_s != self.after_s:
            raise ValueError(
                f"{self.asset}: the fault starts at {self.fault.start_s} s, "
                f"but after_s is {self.after_s} s"
            )
        if self.silent_signal is not None and self.silent_for_s <= 0.0:
            raise ValueError(f"{self.asset}: silent_for_s must be > 0, got {self.silent_for_s}")


FAULT_SCHEDULE: tuple[ScheduledFault, ...] = (
    ScheduledFault(
        "block-c/ahu-2",
        "chilled-water supply throttled: the cooling valve has half its effect",
        9 * HOUR_S,
        Fault("gain_loss", 9 * HOUR_S, magnitude=0.5),
    ),
    ScheduledFault(
        "block-c/vav-3-02",
        "reheat valve stuck where it stood",
        10 * HOUR_S,
        Fault("stuck_actuator", 10 * HOUR_S),
    ),
    ScheduledFault(
        "block-d/vav-1-04",
        "zone temperature sensor drifting upwards, +1.5 K over an hour",
        11 * HOUR_S,
        Fault("sensor_bias", 11 * HOUR_S, magnitude=1.5, ramp_s=HOUR_S),
    ),
    ScheduledFault(
        "block-d/ahu-1",
        "supply-air temperature point stops publishing for 20 min",
        12 * HOUR_S,
        silent_signal="sat",
        silent_for_s=1200.0,
        family="data_quality",
    ),
)


@dataclass
class _Running:
    spec: AssetSpec
    plant: LoopRun
    actuator: OperationRun
    silences: list[tuple[str, float, float]] = field(default_factory=list)


class Building:
    """The site, stepped along absolute time.

    Parameters
    ----------
    live_s : float
        Go-live time, epoch seconds: the schedule's ``after_s`` count from it.
    seed : int
        Seed of the actuator moves and the sensor noise.
    assets : tuple of AssetSpec
        The site's assets.
    schedule : tuple of ScheduledFault
        Faults after go-live.

    Raises
    ------
    ValueError
        If a scheduled fault names an asset the site does not have.
    """

    def __init__(
        self,
        live_s: float,
        seed: int = 7,
        assets: tuple[AssetSpec, ...] = ASSETS,
        schedule: tuple[ScheduledFault, ...] = FAULT_SCHEDULE,
    ) -> None:
        self.live_s = live_s
        self.assets = assets
        self.schedule = schedule
        known = {a.asset_id for a in assets}
        for item in schedule:
            if item.asset not in known:
                raise ValueError(f"scheduled fault for unknown asset {item.asset!r}")
        self._running: list[_Running] = []
        for i, spec in enumerate(assets):
            faults = tuple(
                Fault(
                    item.fault.kind,
                    live_s + item.fault.start_s,
                    item.fault.magnitude,
                    item.fault.ramp_s,
                )
                for item in schedule
                if item.asset == spec.asset_id and item.fault is not None
            )
            silences = [
                (
                    item.silent_signal,
                    live_s + item.after_s,
                    live_s + item.after_s + item.silent_for_s,
                )
                for item in schedule
                if item.asset == spec.asset_id and item.silent_signal is not None
            ]
            self._running.append(
                _Running(
                    spec,
                    LoopRun(spec.loop, faults, seed=seed * 1000 + 2 * i),
                    OperationRun(spec.load, seed=seed * 1000 + 2 * i + 1),
                    silences,
                )
            )
        self._last_s: float | None = None

    def step(self, t_s: float) -> list[tuple[AssetSpec, str, float]]:
        """Advance every asset to grid time ``t_s``; return the points published then.

        Returns
        -------
        list of (AssetSpec, str, float)
            Asset, signal and value of each point published at ``t_s``: the
            actuator command and the measured output, less any point that is
            silent at ``t_s``.

        Raises
        ------
        ValueError
            If ``t_s`` is not one sample period after the previous step.
        """
        if self._last_s is not None and abs(t_s - self._last_s - SAMPLE_PERIOD_S) > 1e-6:
            raise ValueError(
                f"the building steps one sample period at a time: {self._last_s} then {t_s}"
            )
        self._last_s = t_s
        out: list[tuple[AssetSpec, str, float]] = []
        for running in self._running:
            spec, names = running.spec, CLASSES[running.spec.kind]
            u = running.actuator.step(t_s)
            y = running.plant.step(t_s, u)
            for signal, value in ((names.actuator, u), (names.output, y)):
                if not any(s == signal and a <= t_s < b for s, a, b in running.silences):
                    out.append((spec, signal, value))
        return out


def payload(value: float, t_s: float) -> bytes:
    """Return the JSON payload of one point: ``{"value": ..., "ts": ...}``."""
    return json.dumps({"value": round(value, 4), "ts": t_s}).encode("ascii")
