"""The column-wise alert lifecycle decides exactly as the per-asset one."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.daemon.decide import AlertPolicy, AlertTracker, TrackerBank
from arxwatch.estimators.detect.evidence import Evidence

KEYS = ("innovation_mean/innovation", "band/gain_1")

policies = st.builds(
    AlertPolicy,
    raise_m=st.integers(1, 3),
    raise_n=st.sampled_from([3, 5, 9, 17, 40, 64]),
    critical_ratio=st.sampled_from([1.5, 2.0]),
    critical_m=st.integers(1, 3),
    clear_ratio=st.sampled_from([0.5, 0.8, 1.0]),
    clear_n=st.integers(1, 6),
    clear_after_s=st.sampled_from([0.0, 2.0, 7.0]),
)
# statistic / threshold pairs around the decision levels, with zero thresholds,
# and whether the evaluation is conclusive (Evidence.conclusive)
evaluations = st.tuples(
    st.sampled_from([0.0, 0.3, 0.79, 0.8, 0.95, 1.0, 1.7, 2.0, 3.5, 1e9]),
    st.sampled_from([1.0, 0.0, 2.5]),
    st.sampled_from([True, True, False]),
)


@settings(max_examples=200, deadline=None)
@given(
    policies,
    st.lists(
        # up to 12 rows a step: a few busy episodes go one by one, more as arrays
        st.lists(st.tuples(st.integers(0, 1), evaluations), min_size=1, max_size=12),
        min_size=1,
        max_size=60,
    ),
)
def test_bank_transitions_equal_per_asset_tracker(
    policy: AlertPolicy, steps: list[list[tuple[int, tuple[float, float, bool]]]]
) -> None:
    if policy.raise_m > policy.raise_n or policy.critical_m > policy.raise_n:
        return
    rows = 12
    every = {"innovation_mean": 1.0, "band": 3.0}  # two keys, two off-delay counts
    trackers = [AlertTracker(policy, every) for _ in range(rows)]
    bank = TrackerBank(policy, KEYS, capacity=2, intervals=every)
    bank.resize(rows)
    scalar = TrackerBank(policy, KEYS, capacity=rows, intervals=every)
    for t, step in enumerate(steps):
        for key_index in (0, 1):
            chosen = {row: ev for row, (k, ev) in enumerate(step) if k == key_index}
            if not chosen:
                continue
            idx = np.array(sorted(chosen), dtype=np.intp)
            stat = np.array([chosen[r][0] * chosen[r][1] for r in idx.tolist()])
            limit = np.array([chosen[r][1] for r in idx.tolist()])
            alarm = stat >= limit
            conclusive = np.array([chosen[r][2] for r in idx.tolist()])
            got = bank.observe(idx, key_index, stat, limit, alarm, float(t), conclusive)
            expected = []
            for pos, row in enumerate(idx.tolist()):
                detector, signal = KEYS[key_index].split("/")
                ev = Evidence(
                    detector,
                    "behaviour",
                    float(stat[pos]),
                    float(limit[pos]),
                    bool(alarm[pos]),
                    signal,
                    conclusive=bool(conclusive[pos]),
                )
                tr = trackers[row].observe(ev, float(t))
                if tr is not None:
                    expected.append((pos, tr.state, tr.severity, tr.first_seen_s))
            assert [(b.position, b.state, b.severity, b.first_seen_s) for b in got] == expected
            one = [
                (pos, b.state, b.severity, b.first_seen_s)
                for pos, row in enumerate(idx.tolist())
                if (
                    b := scalar.observe_one(
                        row,
                        key_index,
                        float(stat[pos]),
                        float(limit[pos]),
                        bool(alarm[pos]),
                        float(t),
                        bool(conclusive[pos]),
                    )
                )
                is not None
            ]
            assert one == expected
        for row in range(rows):
            assert bank.active(row) == trackers[row].active() == scalar.active(row)
