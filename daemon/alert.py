"""Alert records (schema ``arxwatch.alert/1``) and their plain-language readings.

Pure: a :class:`~arxwatch.daemon.decide.Transition` plus the asset's names
and read-outs in, a JSON-ready record out. The schema is
``daemon/alert.schema.json`` (JSON Schema 2020-12), shipped with the package;
every field is described there. In short:

``schema``, ``id`` (stable per episode), ``asset``, ``detector``, ``family``
(behaviour or data_quality), ``signal``, ``severity`` (warning or critical),
``state`` (raised or cleared), ``sample_time`` and ``first_seen`` (ISO 8601
UTC), ``statistic`` and ``threshold``, ``evidence`` (the detector's numbers),
``baseline`` and ``current`` (physical read-out: gains, time constant,
offset, noise), ``reading`` (what changed, in words), ``caution``, ``mode``.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from importlib.resources import files
from typing import Any

from arxwatch.daemon.decide import Transition
from arxwatch.estimators.detect.evidence import Evidence

SCHEMA = "arxwatch.alert/1"
CAUTION = (
    "Advisory maintenance information, not a safety function. Verify on site before "
    "acting; work on equipment follows local codes, the manufacturer's instructions "
    "and licensed practice."
)


def load_schema() -> dict[str, Any]:
    """Return the JSON Schema of alert records, as shipped with the package."""
    text = files("arxwatch.daemon").joinpath("alert.schema.json").read_text(encoding="utf-8")
    schema: dict[str, Any] = json.loads(text)
    return schema


@dataclass(frozen=True)
class SignalNames:
    """How the people on site call an asset's signals.

    Parameters
    ----------
    output : str
        Output point, e.g. ``"supply-air temperature"``.
    output_unit : str
        Its unit, e.g. ``"degC"``.
    inputs : tuple of str
        Input points in model order, e.g. ``("cooling valve",)``.
    input_units : tuple of str
        Their units, e.g. ``("%",)``.
    points : tuple of str, optional
        The signals as the topics name them (``"sat"``, ``"chw-valve"``),
        output then inputs, so that data-quality readings can give the site
        name beside it; empty: readings give the topic's name alone.
    """

    output: str
    output_unit: str
    inputs: tuple[str, ...]
    input_units: tuple[str, ...]
    points: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if len(self.inputs) != len(self.input_units):
            raise ValueError(
                f"inputs and input_units need one entry each, got {len(self.inputs)} "
                f"and {len(self.input_units)}"
            )
        if self.points and len(self.points) != 1 + len(self.inputs):
            raise ValueError(
                f"points need one entry for the output and each input, got {len(self.points)} "
                f"for {1 + len(self.inputs)} signals"
            )

    def describe(self, point: str) -> str:
        """Return ``"site name (point)"`` for a known point, else the point itself."""
        if point in self.points:
            name = (self.output, *self.inputs)[self.points.index(point)]
            return f"{name} ({point})"
        return point


def iso_utc(time_s: float) -> str:
    """Epoch seconds as ISO 8601 UTC with a ``Z`` suffix (millisecond precision)."""
    moment = datetime.fromtimestamp(time_s, tz=UTC)
    return moment.isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _finite(values: Mapping[str, float]) -> dict[str, float]:
    # JSON has no NaN or infinity: undefined values are left out.
    return {k: float(v) for k, v in values.items() if math.isfinite(v)}


def _pct(change: float) -> str:
    return f"{abs(change) * 100:.0f} %"


def reading(evidence: Evidence, names: SignalNames, sigma: float) -> str:
    """Describe in words what the evidence says changed, and what may cause it.

    Parameters
    ----------
    evidence : Evidence
        The evaluation behind the alert.
    names : SignalNames
        Site names and units of the asset's signals.
    sigma : float
        Baseline innovation standard deviation, in output units.
    """
    v, out, unit = evidence.values, names.output, names.output_unit
    kind, side = evidence.detector, evidence.detail
    if kind == "innovation_mean":
        # the CUSUM's shift is in units of its input, which a noisier sensor widened
        shift = v["shift_sigma"] * v.get("noise_scale", 1.0)
        where = "above" if shift > 0 else "below"
        return (
            f"{out} runs about {abs(shift):.1f} sigma ({abs(shift) * sigma:.3g} {unit}) "
            f"{where} what the commissioning model predicts: a steady offset such as "
            f"sensor bias, a leaking valve or an added load is likely."
        )
    if kind == "innovation_variance":
        ratio = v["sigma_ratio"]
        if side == "low":
            return (
                f"variation of {out} around the model fell to {ratio:.2f} times the "
                f"commissioning level: a frozen or heavily filtered reading is possible."
            )
        return (
            f"variation of {out} around the model is {ratio:.1f} times the commissioning "
            f"level: a failing or loose sensor, a hunting loop or unsteady flow is likely."
        )
    if kind == "innovation_whiteness":
        return (
            f"prediction errors of {out} are correlated (largest autocorrelation "
            f"{v['max_abs_autocorrelation']:.2f}): the asset shows dynamics the "
            f"commissioning model does not have, e.g. a retuned loop or a mechanical change."
        )
    if kind in ("parameter_drift", "feature_drift"):
        what = "model coefficients" if kind == "parameter_drift" else "physical read-out"
        return (
            f"the {what} moved away from the commissioning baseline by more than their "
            f"uncertainty (distance {evidence.statistic:.1f}, limit {evidence.threshold:.1f}); "
            f"the gain and time-constant readings say what changed."
        )
    if kind == "physical_band":
        return _band_reading(evidence, names)
    return _quality_reading(evidence, names)


def _band_reading(evidence: Evidence, names: SignalNames) -> str:
    v, feature, out, unit = evidence.values, evidence.signal, names.output, names.output_unit
    # dead_time_<i>_s: the input whose delay it is
    dead = feature.startswith("dead_time_")
    source = names.inputs[int(feature.split("_")[2]) - 1] if dead else ""
    if evidence.detail == "undefined" and dead:
        return (
            f"the dead time of {source} can no longer be read from the model of {out}: "
            f"{source} no longer moves {out} measurably, or the response became integrating "
            f"or unstable; check the actuator and its linkage."
        )
    if evidence.detail == "undefined":
        return (
            f"{feature} can no longer be read from the model of {out} (integrating or "
            f"unstable behaviour): check for a saturated actuator or an open loop."
        )
    change = v["change"]
    lower = change < 0
    if feature.startswith("gain_"):
        # Gains can be negative (more cooling valve, lower temperature): what
        # matters on site is the size of the effect, so compare magnitudes.
        change = (abs(v["current"]) - abs(v["baseline"])) / abs(v["baseline"])
        lower = change < 0
        i = int(feature.split("_")[1]) - 1
        source, per = names.inputs[i], names.input_units[i]
        cause = (
            "the actuator has less effect than at commissioning: coil fouling, a valve "
            "or pump problem, or low supply flow is likely"
            if lower
            else "the actuator has more effect than at commissioning: a changed "
            "operating point, sensor scaling or a bypass is likely"
        )
        return (
            f"{source} gain on {out} is {_pct(change)} {'below' if lower else 'above'} "
            f"baseline ({v['current']:.3g} vs {v['baseline']:.3g} {unit} per {per}): "
            f"{cause}; verify on site."
        )
    if feature == "time_constant_s":
        cause = (
            "reduced mass, a relocated sensor or higher flow"
            if lower
            else "fouling, reduced flow or a slower actuator"
        )
        return (
            f"{out} responds {_pct(change)} {'faster' if lower else 'slower'} than at "
            f"commissioning ({v['current']:.0f} s vs {v['baseline']:.0f} s): {cause} "
            f"is likely."
        )
    if dead:
        cause = (
            "a relocated sensor, higher flow or a changed control sequence is likely"
            if lower
            else "a slower or sticking actuator, lower flow through a longer path or a "
            "relocated sensor is likely"
        )
        return (
            f"{out} starts to answer {source} {_pct(change)} "
            f"{'sooner' if lower else 'later'} than at commissioning "
            f"({v['current']:.0f} s vs {v['baseline']:.0f} s dead time): {cause}; verify on site."
        )
    if feature == "offset":
        return (
            f"the steady level of {out} shifted by {v['current'] - v['baseline']:+.3g} {unit}: "
            f"sensor bias or calibration, a leaking valve or a changed load is likely."
        )
    return (
        f"{feature} of {out} changed by {_pct(change)} ({v['current']:.3g} vs {v['baseline']:.3g})."
    )


def _quality_reading(evidence: Evidence, names: SignalNames) -> str:
    v, signal, kind = evidence.values, names.describe(evidence.signal), evidence.detector
    if kind == "stale":
        return (
            f"{signal}: no sample for {v['age_s']:.0f} s: check the controller, the "
            f"network path and the broker."
        )
    if kind == "stuck":
        return (
            f"{signal} has not changed for {v['flat_s'] / 60:.0f} min although it "
            f"normally moves: a stuck sensor or a frozen controller value is likely."
        )
    if kind == "out_of_range":
        low, high = v.get("minimum", -math.inf), v.get("maximum", math.inf)
        return (
            f"{signal} reads {v['value']:.4g}, outside its valid range [{low:.4g}, "
            f"{high:.4g}]: a failed sensor, wiring fault or wrong scaling is likely."
        )
    if kind == "gap":
        return (
            f"{signal}: {v['gap_count']:.0f} gap(s) in the data, {v['gap_total_s']:.0f} s "
            f"in all (last interval {v['interval_s']:.0f} s): estimation skipped them."
        )
    raise ValueError(f"no reading for detector {kind!r}")


def build_record(
    asset: str,
    transition: Transition,
    names: SignalNames,
    sigma: float,
    baseline: Mapping[str, float],
    current: Mapping[str, float],
    mode: str | None = None,
) -> dict[str, Any]:
    """One alert record, as a JSON-ready dict following ``arxwatch.alert/1``.

    Parameters
    ----------
    asset : str
        Asset id.
    transition : Transition
        What the alert lifecycle decided.
    names : SignalNames
        Site names and units.
    sigma : float
        Baseline innovation standard deviation (output units).
    baseline, current : mapping of str to float
        Physical read-out at commissioning and now (non-finite values are
        left out).
    mode : str or None
        Operating mode of the baseline.
    """
    ev = transition.evidence
    return {
        "schema": SCHEMA,
        "id": f"{asset}/{transition.key}/{transition.first_seen_s:.0f}",
        "asset": asset,
        "detector": ev.detector,
        "family": ev.family,
        "signal": ev.signal,
        "severity": transition.severity,
        "state": transition.state,
        "sample_time": iso_utc(transition.sample_time_s),
        "first_seen": iso_utc(transition.first_seen_s),
        "statistic": ev.statistic if math.isfinite(ev.statistic) else 1e308,
        "threshold": ev.threshold if math.isfinite(ev.threshold) else 1e308,
        "evidence": _finite(ev.values),
        "baseline": _finite(baseline),
        "current": _finite(current),
        "reading": reading(ev, names, sigma)
        if transition.state == "raised"
        else (
            f"back within its limit ({ev.detector} {ev.statistic:.3g}, limit "
            f"{ev.threshold:.3g}) since this sample; the alert raised at "
            f"{iso_utc(transition.first_seen_s)} is cleared."
        ),
        "caution": CAUTION,
        "mode": mode,
    }
