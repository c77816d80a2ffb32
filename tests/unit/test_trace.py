"""The fleet's trace: same records with it on, the readable twin's numbers, bounded memory."""

import numpy as np
import pytest

from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.fleet import FleetMonitor
from arxwatch.daemon.monitor import AssetMonitor, MonitorConfig
from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault, daily_operation
from arxwatch.daemon.trace import FleetTrace, readout_features
from arxwatch.estimators.baseline import Baseline, BaselineSet, fit_baseline
from arxwatch.estimators.detect.cusum import CusumConfig
from arxwatch.estimators.native import available

PERIOD = 60.0
PER_DAY = 1440
START = 1_767_225_600.0  # 2026-01-01T00:00:00Z
NAMES = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))
LOOP = REFERENCE_LOOPS["first-order+dead-time"]


def _baseline(mode: str | None = None, seed: int = 1) -> Baseline:
    u = daily_operation(2 * PER_DAY, PERIOD, seed=seed)
    t = START - 3 * 86400.0 + np.arange(len(u)) * PERIOD
    result = fit_baseline(
        LOOP.simulate(u, seed=seed + 1), u[:, None], t, sample_period_s=PERIOD, mode=mode
    )
    assert result.baseline is not None, result.reasons
    return result.baseline


@pytest.fixture(scope="module")
def baseline() -> Baseline:
    return _baseline()


@pytest.fixture(scope="module")
def plant() -> dict[str, tuple[np.ndarray, np.ndarray, list[str | None]]]:
    """Larkspur Yard, three air handlers: a healthy one, a gain loss, an offset with two modes."""
    n = int(1.6 * PER_DAY)
    out = {}
    plan = [
        ("larkspur/ahu-1", ()),
        ("larkspur/ahu-2", (Fault("gain_loss", start_s=0.5 * 86400, magnitude=0.5),)),
        ("larkspur/ahu-3", (Fault("offset", start_s=0.6 * 86400, magnitude=0.4),)),
    ]
    for k, (asset, faults) in enumerate(plan):
        u = daily_operation(n, PERIOD, seed=70 + k)
        y = LOOP.simulate(u, faults, seed=80 + k)
        y[200 + 30 * k] += 5.0  # a spike each
        modes: list[str | None] = [None] * n
        if k == 2:
            modes = ["day" if 6 <= (i // 60) % 24 < 20 else "night" for i in range(n)]
        out[asset] = (y, u, modes)
    return out


def _fleet(
    baseline: Baseline, config: MonitorConfig, plant: dict, backend: str = "python"
) -> FleetMonitor:
    fleet = FleetMonitor(NAMES, config, backend=backend)  # type: ignore[arg-type]
    for asset, (_, _, modes) in plant.items():
        if modes[0] is None:
            fleet.add_asset(asset, BaselineSet((baseline,)))
        else:
            night = Baseline.from_dict({**baseline.to_dict(), "mode": "night"})
            day = Baseline.from_dict({**baseline.to_dict(), "mode": "day"})
            fleet.add_asset(asset, BaselineSet((day, night)))
    return fleet


def _drive(fleet: FleetMonitor, plant: dict, hi: int | None = None) -> list[dict]:
    """Feed every asset's rows, several sample times per call (waves inside the fleet)."""
    names = list(plant)
    n = len(plant[names[0]][0]) if hi is None else hi
    records: list[dict] = []
    k = 0
    while k < n:
        upto = min(n, k + 1 + (k // 11) % 4)
        rows = [(j, a) for j in range(k, upto) for a in range(len(names)) if (j + a) % 97]
        records += fleet.step(
            [a for _, a in rows],
            [START + j * PERIOD for j, _ in rows],
            [float(plant[names[a]][0][j]) for j, a in rows],
            [[float(plant[names[a]][1][j])] for j, a in rows],
            [plant[names[a]][2][j] for j, a in rows],
            [(j + a) % 97 == 1 for j, a in rows],
        )
        k = upto
    return records


@pytest.mark.parametrize(
    "config",
    [MonitorConfig(), MonitorConfig(cusum=CusumConfig(h=5.0, after_alarm="restart"))],
    ids=["defaults", "restart-cusum"],
)
def test_records_are_the_same_with_the_trace_on(
    baseline: Baseline, plant: dict, config: MonitorConfig
) -> None:
    off = _drive(_fleet(baseline, config, plant), plant)
    fleet = _fleet(baseline, config, plant)
    trace = FleetTrace()
    fleet.trace = trace
    on = _drive(fleet, plant)
    assert on == off
    assert len(off) > 4 and {"innovation_mean", "physical_band"} <= {r["detector"] for r in off}
    assert set(trace.assets()) == set(plant)
    rows = trace.rows("larkspur/ahu-2")
    assert 0.95 * len(plant["larkspur/ahu-2"][0]) < len(rows) < len(plant["larkspur/ahu-2"][0])
    assert bool(np.all(np.diff(rows.time_s) > 0))
    assert trace.evaluations("larkspur/ahu-3").mode[-3:] != ()
    assert set(trace.evaluations("larkspur/ahu-3").mode) == {"day", "night"}


@pytest.mark.skipif(not available(), reason="numba is not installed (pip install '.[fast]')")
def test_the_compiled_backend_traces_the_same_numbers(baseline: Baseline, plant: dict) -> None:
    traces = []
    for backend in ("python", "compiled"):
        fleet = _fleet(baseline, MonitorConfig(), plant, backend)
        fleet.trace = trace = FleetTrace()
        _drive(fleet, plant)
        traces.append(trace)
    python, compiled = traces
    for asset in plant:
        for kind in ("rows", "evaluations"):
            ours, theirs = getattr(python, kind)(asset), getattr(compiled, kind)(asset)
            for name, value in vars(ours).items():
                other = vars(theirs)[name]
                if isinstance(value, np.ndarray):
                    assert value.tobytes() == other.tobytes(), (asset, kind, name)
                else:
                    assert value == other, (asset, kind, name)


def test_trace_holds_the_readable_twins_numbers(baseline: Baseline, plant: dict) -> None:
    # The oracle is the readable twin, AssetMonitor: the evidence its mode
    # monitor returns for every row (CUSUM, Wald distance, bands), and the
    # baseline's own residual for the prediction and the normalised innovation.
    config = MonitorConfig()
    y, u, _ = plant["larkspur/ahu-2"]
    fleet = FleetMonitor(NAMES, config)
    slot = fleet.add_asset("larkspur/ahu-2", BaselineSet((baseline,)))
    fleet.trace = trace = FleetTrace()
    monitor = AssetMonitor("larkspur/ahu-2", BaselineSet((baseline,)), NAMES, config)
    twin = monitor._modes[None]
    seen: list = []
    judge = twin.step

    def step_and_keep(time_s: float, y: float, u: list[float]) -> list:
        seen[:] = judge(time_s, y, u)
        return list(seen)

    twin.step = step_and_keep  # type: ignore[method-assign]
    expected: dict[str, list[float]] = {"prediction": [], "innovation": [], "high": [], "low": []}
    evaluations: list[tuple[float, dict[str, tuple[float, float, bool]], float, float]] = []
    n = len(y)
    for k in range(n):
        t = START + k * PERIOD
        prediction = innovation = float("nan")
        if twin.history.ready:
            e, innovation = baseline.residual(twin.history.regressor([float(u[k])]), float(y[k]))
            prediction = float(y[k]) - e
        monitor.step(t, float(y[k]), [float(u[k])])
        evidence = list(seen)
        cusum = [ev for ev in evidence if ev.detector == "innovation_mean"]
        expected["prediction"].append(prediction)
        expected["innovation"].append(innovation)
        expected["high"].append(cusum[0].values["c_high"] if cusum else float("nan"))
        expected["low"].append(cusum[0].values["c_low"] if cusum else float("nan"))
        bands = {
            ev.signal: (ev.values["current"], ev.values["baseline"], ev.alarm)
            for ev in evidence
            if ev.detector == "physical_band" and "current" in ev.values
        }
        drift = [ev for ev in evidence if ev.detector == "feature_drift"]
        if drift:
            evaluations.append((t, bands, drift[0].statistic, drift[0].threshold))
        fleet.step([slot], [t], [float(y[k])], [[float(u[k])]], [None], [False])
    rows = trace.rows("larkspur/ahu-2")
    assert len(rows) == n
    assert rows.time_s.tolist() == [START + k * PERIOD for k in range(n)]
    assert rows.output.tolist() == y.astype(np.float32).tolist()
    for name, got in (
        ("prediction", rows.prediction),
        ("innovation", rows.innovation),
        ("high", rows.cusum_high),
        ("low", rows.cusum_low),
    ):
        want = np.array(expected[name])
        assert np.array_equal(np.isnan(got), np.isnan(want)), name
        np.testing.assert_allclose(got, want, rtol=1e-6, atol=1e-5, equal_nan=True, err_msg=name)
    assert trace.cusum_threshold == config.cusum.h
    # evaluations: one per evaluation period once settled, the twin's numbers
    ev = trace.evaluations("larkspur/ahu-2")
    assert ev.features == readout_features(1)
    assert ev.time_s.tolist() == [t for t, _, _, _ in evaluations]
    np.testing.assert_allclose(ev.distance, [d for _, _, d, _ in evaluations], rtol=1e-6)
    np.testing.assert_allclose(ev.distance_limit, [h for _, _, _, h in evaluations], rtol=1e-6)
    alarms = 0
    for i, (_, bands, _, _) in enumerate(evaluations):
        for feature, (current, base, alarm) in bands.items():
            j = ev.features.index(feature)
            np.testing.assert_allclose(ev.value[i, j], current, rtol=1e-6)
            np.testing.assert_allclose(ev.baseline[i, j], base, rtol=1e-6)
            inside = ev.lower[i, j] < ev.value[i, j] < ev.upper[i, j]
            margin = min(abs(ev.value[i, j] - ev.lower[i, j]), abs(ev.value[i, j] - ev.upper[i, j]))
            if margin > 1e-5 * abs(base):
                assert inside == (not alarm), (i, feature)
            alarms += alarm
    assert alarms > 0  # the gain loss leaves its band: the check saw both sides
    # dead time is read from each step response: the baseline's stays put,
    # the live one moves with the estimate
    dead = ev.features.index("dead_time_1_s")
    np.testing.assert_allclose(ev.baseline[:, dead], baseline.readout.dead_times_s[0], rtol=1e-6)
    assert len(set(ev.value[:, dead].tolist())) > 1


def test_memory_stays_within_the_budget_and_keeps_peaks(baseline: Baseline, plant: dict) -> None:
    full = _fleet(baseline, MonitorConfig(), plant)
    full.trace = whole = FleetTrace()
    _drive(full, plant)
    small = _fleet(baseline, MonitorConfig(), plant)
    small.trace = thin = FleetTrace(max_bytes=2**16)
    _drive(small, plant)
    assert thin.memory_bytes() <= 2**16 < whole.memory_bytes()
    assert thin.every >= 4 and whole.every == 1
    assert thin.rows_seen == whole.rows_seen
    for asset in plant:
        a, b = whole.rows(asset), thin.rows(asset)
        assert len(a) / b.every <= len(b) <= len(a) / b.every + 2
        assert b.time_s[-1] == a.time_s[-1] and bool(np.all(np.diff(b.time_s) > 0))
        # merged rows keep the largest CUSUM values and the largest innovation
        assert np.nanmax(b.cusum_high) == np.nanmax(a.cusum_high)
        assert np.nanmax(b.cusum_low) == np.nanmax(a.cusum_low)
        assert np.nanmax(np.abs(b.innovation)) == np.nanmax(np.abs(a.innovation))
        assert len(thin.evaluations(asset)) >= 1


def test_decimation_from_the_start_and_a_chosen_set_of_assets(
    baseline: Baseline, plant: dict
) -> None:
    fleet = _fleet(baseline, MonitorConfig(), plant)
    fleet.trace = trace = FleetTrace(every=10, assets={"larkspur/ahu-2"})
    _drive(fleet, plant, hi=600)
    assert trace.assets() == ("larkspur/ahu-2",)
    assert "larkspur/ahu-1" not in trace
    rows = trace.rows("larkspur/ahu-2")
    assert len(rows) == -(-trace.rows_seen // 10)  # the last block, still open, included
    with pytest.raises(KeyError):
        trace.rows("larkspur/ahu-1")


def test_a_trace_records_one_fleet_and_survives_a_restore(baseline: Baseline, plant: dict) -> None:
    with pytest.raises(ValueError, match="every must be an integer >= 1"):
        FleetTrace(every=0)
    with pytest.raises(ValueError, match="max_bytes must be an integer >= 65536"):
        FleetTrace(max_bytes=100)
    first = _fleet(baseline, MonitorConfig(), plant)
    first.trace = trace = FleetTrace()
    with pytest.raises(ValueError, match="already records another fleet"):
        _fleet(baseline, MonitorConfig(), plant).trace = trace
    _drive(first, plant, hi=300)
    saved = first.to_state()
    first.load_state(saved)
    assert first.trace is trace
    # a freed slot taken by another asset starts another series
    first.remove_asset("larkspur/ahu-1")
    slot = first.add_asset("larkspur/ahu-9", BaselineSet((baseline,)))
    first.step([slot], [START + 400 * PERIOD], [14.0], [[40.0]], [None], [False])
    assert len(trace.rows("larkspur/ahu-9")) == 1
    before = len(trace.rows("larkspur/ahu-1"))
    assert before > 250
    # restoring the earlier state puts ahu-1 back in that slot: its rows go to ahu-1 again
    first.load_state(saved)
    assert first.slot("larkspur/ahu-1") == slot
    first.step([slot], [START + 401 * PERIOD], [15.0], [[40.0]], [None], [False])
    assert len(trace.rows("larkspur/ahu-9")) == 1
    assert len(trace.rows("larkspur/ahu-1")) == before + 1
    assert trace.rows("larkspur/ahu-1").output[-1] == 15.0
