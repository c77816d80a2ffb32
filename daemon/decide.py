"""Alert lifecycle: persistence before raising, hysteresis before clearing.

Pure: evidence and sample times in, alert records out; no clock, no I/O.
Each (detector, signal) pair of an asset has its own episode state:

* **quiet -> raised** when at least ``raise_m`` of the last ``raise_n``
  evaluations were alarms (m-of-n persistence filters single excursions);
* **raised -> raised (severity up)** when ``critical_m`` of the last
  ``raise_n`` evaluations reached ``critical_ratio`` times the threshold;
* **raised -> cleared** after ``clear_n`` consecutive evaluations below
  ``clear_ratio`` times the threshold (hysteresis: a statistic hovering at
  the threshold neither clears nor re-raises).

A statistic that wanders around its threshold therefore produces one raised
record and, once it has settled clearly below, one cleared record, not a
stream of flips.

References
----------
D. C. Montgomery, *Introduction to Statistical Quality Control*, 6th ed.,
Wiley, 2009, section 5.3.6 (supplementary run rules: k of m points beyond a
limit) — the m-of-n rule here is that idea applied to detector alarms.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

from arxwatch.estimators.detect.evidence import Evidence

Severity = Literal["warning", "critical"]
State = Literal["raised", "cleared"]


@dataclass(frozen=True)
class AlertPolicy:
    """Persistence, hysteresis and severity settings (immutable).

    Parameters
    ----------
    raise_m, raise_n : int
        Raise when ``raise_m`` of the last ``raise_n`` evaluations alarm.
    critical_ratio : float
        Statistic / threshold at which an evaluation counts as critical.
    critical_m : int
        Critical evaluations (of the last ``raise_n``) that make a raised
        alert critical.
    clear_ratio : float
        Evaluations below ``clear_ratio * threshold`` count toward clearing.
    clear_n : int
        Consecutive such evaluations needed to clear.

    Raises
    ------
    ValueError
        If a setting is inconsistent; the message names it.
    """

    raise_m: int = 3
    raise_n: int = 5
    critical_ratio: float = 2.0
    critical_m: int = 3
    clear_ratio: float = 0.8
    clear_n: int = 10

    def __post_init__(self) -> None:
        for name in ("raise_m", "raise_n", "critical_m", "clear_n"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"{name} must be an integer >= 1, got {value!r}")
        if self.raise_m > self.raise_n:
            raise ValueError(f"raise_m ({self.raise_m}) cannot exceed raise_n ({self.raise_n})")
        if self.critical_m > self.raise_n:
            raise ValueError(
                f"critical_m ({self.critical_m}) cannot exceed raise_n ({self.raise_n})"
            )
        if self.raise_n > 64:
            raise ValueError(f"raise_n must be <= 64, got {self.raise_n}")
        if not 0.0 < self.clear_ratio <= 1.0:
            raise ValueError(f"clear_ratio must be in (0, 1], got {self.clear_ratio!r}")
        if not self.critical_ratio > 1.0:
            raise ValueError(f"critical_ratio must be > 1, got {self.critical_ratio!r}")


@dataclass(frozen=True)
class Transition:
    """A change of an alert's state or severity, with the evidence behind it.

    Attributes
    ----------
    key : str
        ``detector/signal``, unique per asset.
    state : str
        ``"raised"`` or ``"cleared"``.
    severity : str
        ``"warning"`` or ``"critical"`` (for a cleared alert: its last one).
    sample_time_s : float
        Time of the sample whose evaluation caused the transition.
    first_seen_s : float
        Time of the first alarm evaluation of this episode.
    evidence : Evidence
        The evaluation that caused the transition.
    """

    key: str
    state: State
    severity: Severity
    sample_time_s: float
    first_seen_s: float
    evidence: Evidence


@dataclass
class _Episode:
    alarms: int = 0  # bit i = evaluation i back was an alarm
    criticals: int = 0
    evaluations: int = 0
    quiet_run: int = 0
    raised: bool = False
    severity: Severity = "warning"
    first_seen_s: float | None = None


@dataclass
class AlertTracker:
    """Episode state of every (detector, signal) pair of one asset.

    Parameters
    ----------
    policy : AlertPolicy
        Settings shared by all pairs.

    Examples
    --------
    >>> from arxwatch.estimators.detect.evidence import Evidence
    >>> tracker = AlertTracker(AlertPolicy(raise_m=2, raise_n=3, clear_n=2))
    >>> def ev(stat):
    ...     return Evidence("innovation_mean", "behaviour", stat, 5.0, stat >= 5.0, "innovation")
    >>> [t.state for k, s in enumerate([6, 7, 1, 1]) for t in [tracker.observe(ev(s), k)] if t]
    ['raised', 'cleared']
    """

    policy: AlertPolicy = field(default_factory=AlertPolicy)
    _episodes: dict[str, _Episode] = field(default_factory=dict)

    def observe(self, evidence: Evidence, sample_time_s: float) -> Transition | None:
        """Account one evaluation; return the transition it causes, if any."""
        policy = self.policy
        key = f"{evidence.detector}/{evidence.signal}"
        episode = self._episodes.get(key)
        if episode is None:
            episode = self._episodes[key] = _Episode()
        window = (1 << policy.raise_n) - 1
        critical = evidence.alarm and evidence.ratio >= policy.critical_ratio
        episode.alarms = ((episode.alarms << 1) | int(evidence.alarm)) & window
        episode.criticals = ((episode.criticals << 1) | int(critical)) & window
        episode.evaluations += 1
        if evidence.alarm and episode.first_seen_s is None:
            episode.first_seen_s = sample_time_s
        quiet = evidence.statistic < policy.clear_ratio * evidence.threshold and not evidence.alarm
        episode.quiet_run = episode.quiet_run + 1 if quiet else 0

        if not episode.raised:
            if episode.alarms.bit_count() >= policy.raise_m:
                episode.raised = True
                severe = episode.criticals.bit_count() >= policy.critical_m
                episode.severity = "critical" if severe else "warning"
                return self._transition(key, "raised", episode, sample_time_s, evidence)
            if not episode.alarms:
                episode.first_seen_s = None  # an isolated excursion has passed
            return None
        if episode.severity == "warning" and episode.criticals.bit_count() >= policy.critical_m:
            episode.severity = "critical"
            return self._transition(key, "raised", episode, sample_time_s, evidence)
        if episode.quiet_run >= policy.clear_n:
            transition = self._transition(key, "cleared", episode, sample_time_s, evidence)
            self._episodes[key] = _Episode()
            return transition
        return None

    @staticmethod
    def _transition(
        key: str, state: State, episode: _Episode, time_s: float, evidence: Evidence
    ) -> Transition:
        first = episode.first_seen_s if episode.first_seen_s is not None else time_s
        return Transition(key, state, episode.severity, time_s, first, evidence)

    def active(self) -> dict[str, Severity]:
        """Return the raised alerts by key, with their severity."""
        return {k: e.severity for k, e in self._episodes.items() if e.raised}

    def to_state(self) -> dict[str, Any]:
        """Episode state as plain data, for checkpoints."""
        return {
            key: {
                "alarms": e.alarms,
                "criticals": e.criticals,
                "evaluations": e.evaluations,
                "quiet_run": e.quiet_run,
                "raised": e.raised,
                "severity": e.severity,
                "first_seen_s": e.first_seen_s,
            }
            for key, e in self._episodes.items()
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Restore episode state saved by :meth:`to_state`.

        Raises
        ------
        ValueError
            If an entry is malformed; the message names the key.
        """
        episodes: dict[str, _Episode] = {}
        for key, raw in state.items():
            try:
                severity = raw["severity"]
                if severity not in ("warning", "critical"):
                    raise ValueError(f"severity {severity!r}")
                first = raw["first_seen_s"]
                episodes[key] = _Episode(
                    alarms=int(raw["alarms"]),
                    criticals=int(raw["criticals"]),
                    evaluations=int(raw["evaluations"]),
                    quiet_run=int(raw["quiet_run"]),
                    raised=bool(raw["raised"]),
                    severity=severity,
                    first_seen_s=None if first is None else float(first),
                )
            except (KeyError, TypeError, ValueError) as exc:
                raise ValueError(f"alert state {key!r}: malformed entry ({exc})") from None
        self._episodes = episodes
