"""What every detector reports: a statistic against a threshold, with context.

Detectors differ in what they consume (normalised innovations, parameter
vectors, physical read-outs, raw samples) but all answer with
:class:`Evidence`, so the alert lifecycle can treat them alike.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal

#: Alert families: model behaviour versus the data feeding the model.
Family = Literal["behaviour", "data_quality"]


@dataclass(frozen=True)
class Evidence:
    """One evaluation of one detector.

    Attributes
    ----------
    detector : str
        Detector kind, e.g. ``"innovation_mean"`` (snake_case, stable: used in
        alert records and metric labels).
    family : str
        ``"behaviour"`` or ``"data_quality"``.
    statistic : float
        Value of the test statistic at this evaluation.
    threshold : float
        Level at or above which the statistic counts as an alarm.
    alarm : bool
        Whether ``statistic >= threshold`` (or the detector's own rule).
    signal : str
        What the evidence is about: ``"innovation"``, ``"parameters"``, a
        physical feature such as ``"gain_1"``, or a signal name.
    values : Mapping[str, float]
        Baseline and current values behind the statistic, e.g.
        ``{"baseline": 0.11, "current": 0.068}``.
    detail : str
        Short machine-readable qualifier, e.g. ``"high"``/``"low"`` for the
        side of a CUSUM, ``"stale"`` for a data-quality check; may be empty.
    conclusive : bool
        Whether a quiet statistic here means "no change" rather than "cannot
        tell". A Wald distance taken while the live estimate's covariance is
        being reset is small because the estimate is uncertain, not because
        it is back at the baseline: such an evaluation may raise an alert but
        must not count toward clearing one.
    """

    detector: str
    family: Family
    statistic: float
    threshold: float
    alarm: bool
    signal: str
    values: Mapping[str, float] = field(default_factory=dict)
    detail: str = ""
    conclusive: bool = True

    @property
    def ratio(self) -> float:
        """``statistic / threshold``: 1 at the threshold (inf if threshold is 0)."""
        if self.threshold == 0.0:
            return float("inf") if self.statistic > 0.0 else 0.0
        return self.statistic / self.threshold
