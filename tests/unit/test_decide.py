"""Alert lifecycle: persistence, hysteresis, severities, no flapping, state."""

import json
from dataclasses import replace

import numpy as np
import pytest

from arxwatch.daemon.decide import AlertPolicy, AlertTracker, TrackerBank
from arxwatch.estimators.detect.evidence import Evidence


def ev(stat: float, threshold: float = 5.0, signal: str = "innovation") -> Evidence:
    return Evidence("innovation_mean", "behaviour", stat, threshold, stat >= threshold, signal)


def run(tracker: AlertTracker, stats: list[float]) -> list[tuple[int, str, str]]:
    out = []
    for k, s in enumerate(stats):
        t = tracker.observe(ev(s), float(k))
        if t is not None:
            out.append((k, t.state, t.severity))
    return out


def test_single_excursion_does_not_raise() -> None:
    assert run(AlertTracker(AlertPolicy()), [1, 9, 1, 1, 9, 1, 1, 1, 1]) == []


def test_raise_after_m_of_n_and_clear_after_quiet_run() -> None:
    policy = AlertPolicy(raise_m=3, raise_n=5, clear_n=4)
    events = run(AlertTracker(policy), [6, 1, 6, 6, 6, 1, 1, 1, 1, 1])
    assert events == [(3, "raised", "warning"), (8, "cleared", "warning")]


def test_inconclusive_quiet_evaluations_do_not_clear() -> None:
    # A quiet statistic that cannot tell "no change" from "cannot tell" (a Wald
    # distance under a reset covariance) neither clears nor counts toward it.
    policy = AlertPolicy(raise_m=3, raise_n=5, clear_n=4)
    tracker = AlertTracker(policy)
    for k, s in enumerate([6, 6, 6]):
        tracker.observe(ev(s), float(k))
    unsure = replace(ev(0.0), conclusive=False)
    assert all(tracker.observe(unsure, 3.0 + k) is None for k in range(50))
    # three conclusive quiet ones, an inconclusive one, then four: the run starts over
    quiet = [tracker.observe(ev(0.0), 60.0 + k) for k in range(3)]
    quiet.append(tracker.observe(unsure, 63.0))
    assert quiet == [None] * 4
    states = [tracker.observe(ev(0.0), 64.0 + k) for k in range(4)]
    assert [t.state if t else None for t in states] == [None, None, None, "cleared"]


def test_escalates_to_critical_once() -> None:
    policy = AlertPolicy(raise_m=2, raise_n=3, critical_ratio=2.0, critical_m=2)
    events = run(AlertTracker(policy), [6, 6, 11, 12, 13, 12])
    assert events == [(1, "raised", "warning"), (3, "raised", "critical")]


def test_first_seen_is_the_first_alarm_of_the_episode() -> None:
    tracker = AlertTracker(AlertPolicy(raise_m=3, raise_n=5))
    transitions = [tracker.observe(ev(s), 100.0 + k) for k, s in enumerate([1, 6, 1, 6, 6])]
    raised = [t for t in transitions if t is not None]
    assert raised[0].first_seen_s == 101.0 and raised[0].sample_time_s == 104.0


def test_noise_at_the_threshold_does_not_flap() -> None:
    # A statistic hovering around its threshold (N(threshold, 10 %)) for a
    # long time: persistence plus hysteresis give one raise and no clears.
    rng = np.random.default_rng(0)
    stats = (5.0 * (1 + 0.1 * rng.normal(size=20_000))).tolist()
    events = run(AlertTracker(AlertPolicy()), stats)
    assert [e[1] for e in events].count("raised") <= 2
    assert [e[1] for e in events].count("cleared") == 0


def test_pairs_are_independent() -> None:
    tracker = AlertTracker(AlertPolicy(raise_m=1, raise_n=1, critical_m=1))
    assert tracker.observe(ev(9, signal="gain_1"), 0.0) is not None
    assert tracker.observe(ev(1, signal="time_constant_s"), 0.0) is None
    assert tracker.active() == {"innovation_mean/gain_1": "warning"}


def test_state_round_trip_continues_identically() -> None:
    policy = AlertPolicy(raise_m=2, raise_n=4, clear_n=3)
    a = AlertTracker(policy)
    run(a, [6, 1, 6, 7])
    b = AlertTracker(policy)
    b.load_state(json.loads(json.dumps(a.to_state())))
    tail = [1, 1, 1, 1, 6, 6]
    assert run(a, tail) == run(b, tail)


def test_off_delay_clears_only_once_the_quiet_run_spans_clear_after_s() -> None:
    # evaluations 1 s apart: raised at t=2; quiet from t=3: four quiet
    # evaluations by t=6, but the run must also span 10 s, so it clears at
    # t=13. A run broken by one evaluation above clear_ratio * threshold (4.5
    # of 5) starts over.
    policy = AlertPolicy(raise_m=3, raise_n=5, clear_n=4, clear_after_s=10.0)
    every = {"innovation_mean": 1.0}
    assert run(AlertTracker(policy, every), [6, 6, 6] + [1] * 12) == [
        (2, "raised", "warning"),
        (13, "cleared", "warning"),
    ]
    broken = [6, 6, 6] + [1] * 5 + [4.5] + [1] * 12
    assert run(AlertTracker(policy, every), broken)[-1] == (19, "cleared", "warning")
    # a detector judged every 10 s needs its clear_n alone; one not named, too
    assert run(AlertTracker(policy, {"innovation_mean": 10.0}), [6, 6, 6] + [1] * 12)[-1] == (
        6,
        "cleared",
        "warning",
    )
    assert run(AlertTracker(policy), [6, 6, 6] + [1] * 12)[-1] == (6, "cleared", "warning")


def test_state_round_trip_in_a_quiet_run_keeps_the_off_delay() -> None:
    policy = AlertPolicy(raise_m=2, raise_n=4, clear_n=2, clear_after_s=5.0)
    every = {"innovation_mean": 1.0}
    a = AlertTracker(policy, every)
    run(a, [6, 6, 1, 1])  # raised at 1, quiet since 2
    b = AlertTracker(policy, every)
    b.load_state(json.loads(json.dumps(a.to_state())))
    tail = [(4.0 + k, 1.0) for k in range(6)]
    got = [[t.sample_time_s for x in tail if (t := tr.observe(ev(x[1]), x[0]))] for tr in (a, b)]
    assert got[0] == got[1] == [7.0]


def test_bank_quiet_runs_saved_wider_load_into_the_smallest_type() -> None:
    policy = AlertPolicy(raise_m=1, raise_n=1, critical_m=1, clear_n=3)
    keys = ("innovation_mean/innovation",)
    bank = TrackerBank(policy, keys, 1)
    assert bank.quiet_run.dtype == np.uint16
    bank.observe_one(0, 0, 9.0, 5.0, True, 0.0)  # raised
    bank.observe_one(0, 0, 1.0, 5.0, False, 1.0)  # quiet run starts
    saved = {k: v.copy() for k, v in bank.arrays().items()}
    saved["quiet_run"] = saved["quiet_run"].astype(np.uint32)  # as earlier versions kept it
    again = TrackerBank(policy, keys, 0)
    again.load_arrays(saved)
    assert again.quiet_run.dtype == np.uint16 and again.quiet_run[0, 0] == 1
    assert again.observe_one(0, 0, 1.0, 5.0, False, 2.0) is None
    cleared = again.observe_one(0, 0, 1.0, 5.0, False, 3.0)
    assert cleared is not None and cleared.state == "cleared"
    # a run that must reach 65,535 counts one past it: that needs the wider type
    long = AlertPolicy(clear_n=3, clear_after_s=65_534.0)
    assert TrackerBank(long, keys, 1, {"innovation_mean": 1.0}).quiet_run.dtype == np.uint32


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"raise_m": 6, "raise_n": 5}, r"raise_m \(6\) cannot exceed raise_n \(5\)"),
        ({"clear_ratio": 1.5}, "clear_ratio must be in"),
        ({"critical_ratio": 0.5}, "critical_ratio must be > 1"),
        ({"clear_n": 0}, "clear_n must be an integer >= 1"),
        ({"raise_n": 100, "raise_m": 3}, "raise_n must be <= 64"),
        ({"clear_after_s": -1.0}, "clear_after_s must be finite and >= 0"),
    ],
)
def test_policy_errors_name_the_setting(kwargs: dict, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        AlertPolicy(**kwargs)


def test_malformed_state_is_refused_with_the_key() -> None:
    tracker = AlertTracker()
    with pytest.raises(ValueError, match="'innovation_mean/x': malformed"):
        tracker.load_state({"innovation_mean/x": {"alarms": 1}})
