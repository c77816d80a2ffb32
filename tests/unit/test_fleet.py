"""The column-wise fleet monitor gives the per-asset monitor's records, bit for bit."""

import io
import json
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

from arxwatch.daemon import fleet as fleet_module
from arxwatch.daemon import fleetnative
from arxwatch.daemon.alert import SignalNames
from arxwatch.daemon.fleet import FleetMonitor
from arxwatch.daemon.monitor import AssetMonitor, MonitorConfig
from arxwatch.daemon.simulate import REFERENCE_LOOPS, Fault, daily_operation
from arxwatch.estimators.baseline import Baseline, BaselineSet, fit_baseline
from arxwatch.estimators.detect.cusum import CusumConfig
from arxwatch.estimators.detect.prewhiten import PrewhitenConfig
from arxwatch.estimators.detect.quality import QualityConfig, SignalQuality
from arxwatch.estimators.detect.whiteness import WhitenessConfig
from arxwatch.estimators.native import available

LOOPS = ("first-order+dead-time", "second-order")
SAMPLE_PERIOD_S = 60.0
PER_DAY = 1440
START_S = 1_767_225_600.0  # 2026-01-01T00:00:00Z
NAMES = SignalNames("supply-air temperature", "degC", ("cooling valve",), ("%",))
#: Both back ends of FleetMonitor; the compiled one needs the optional numba.
BACKENDS = [
    "python",
    pytest.param(
        "compiled",
        marks=pytest.mark.skipif(
            not available(), reason="numba is not installed (pip install '.[fast]')"
        ),
    ),
]


def _baseline(loop: str, mode: str | None, seed: int) -> Baseline:
    plant = REFERENCE_LOOPS[loop]
    u = daily_operation(2 * PER_DAY, SAMPLE_PERIOD_S, seed=seed)
    y = plant.simulate(u, seed=seed + 1)
    t = START_S - 3 * 86400.0 + np.arange(len(u)) * SAMPLE_PERIOD_S
    result = fit_baseline(y, u[:, None], t, sample_period_s=SAMPLE_PERIOD_S, mode=mode)
    assert result.baseline is not None, result.reasons
    return result.baseline


@pytest.fixture(scope="module")
def assets() -> dict[str, tuple[BaselineSet, np.ndarray, np.ndarray, list[str | None]]]:
    """Six assets: two loops, faults of several kinds, one asset with two modes."""
    days = 2.5
    n = int(days * PER_DAY)
    t = START_S + np.arange(n) * SAMPLE_PERIOD_S
    plan: list[tuple[str, str, tuple[Fault, ...]]] = [
        ("block-a/ahu-1", LOOPS[0], ()),
        ("block-a/ahu-2", LOOPS[0], (Fault("gain_loss", start_s=0.6 * 86400, magnitude=0.4),)),
        ("block-b/ahu-1", LOOPS[1], (Fault("offset", start_s=0.5 * 86400, magnitude=0.3),)),
        ("block-b/ahu-2", LOOPS[1], (Fault("noise_increase", start_s=0.4 * 86400, magnitude=2.0),)),
        ("block-c/ahu-1", LOOPS[0], (Fault("slow_response", start_s=0.7 * 86400, magnitude=2.0),)),
    ]
    out = {}
    for k, (asset, loop, faults) in enumerate(plan):
        u = daily_operation(n, SAMPLE_PERIOD_S, seed=10 + k)
        y = REFERENCE_LOOPS[loop].simulate(u, faults, seed=20 + k)
        y[300 + 37 * k] += 6.0  # one spike each
        out[asset] = (BaselineSet((_baseline(loop, None, 1),)), y, u, [None] * n)
    # an asset with two modes (each with its own baseline) and a third, unmonitored mode
    u = daily_operation(n, SAMPLE_PERIOD_S, seed=40)
    y = REFERENCE_LOOPS[LOOPS[1]].simulate(
        u, (Fault("gain_loss", start_s=1.2 * 86400, magnitude=0.5),), seed=41
    )
    modes: list[str | None] = []
    for k in range(n):
        hour = (k // 60) % 24
        modes.append("occupied" if 6 <= hour < 18 else "unoccupied" if hour < 22 else "purge")
    both = BaselineSet((_baseline(LOOPS[1], "occupied", 1), _baseline(LOOPS[0], "unoccupied", 5)))
    out["block-d/ahu-9"] = (both, y, u, modes)
    assert t.shape[0] == n
    return out


def _rows(n: int, count: int, seed: int) -> list[list[tuple[int, bool]]]:
    """Per step, which assets have a row, and whether it follows a gap."""
    rng = np.random.default_rng(seed)
    missing = rng.random((n, count)) < 0.01
    steps = []
    gap = [False] * count
    for k in range(n):
        step = []
        for a in range(count):
            if missing[k, a]:
                gap[a] = True
                continue
            step.append((a, gap[a] and rng.random() < 0.5))
            gap[a] = False
        steps.append(step)
    return steps


def _run_both(
    assets: dict[str, tuple[BaselineSet, np.ndarray, np.ndarray, list[str | None]]],
    config: MonitorConfig,
    batch: Callable[[int], int],
    backend: str = "python",
) -> tuple[dict[str, list[dict]], dict[str, list[dict]], FleetMonitor]:
    names = list(assets)
    n = len(next(iter(assets.values()))[1])
    scalar = {a: AssetMonitor(a, assets[a][0], NAMES, config) for a in names}
    fleet = FleetMonitor(NAMES, config, backend=backend)
    slots = {a: fleet.add_asset(a, assets[a][0]) for a in names}
    expected: dict[str, list[dict]] = {a: [] for a in names}
    got: dict[str, list[dict]] = {a: [] for a in names}
    steps = _rows(n, len(names), seed=3)
    k = 0
    while k < n:
        # several sample times per call: the fleet must take them in time order
        upto = min(n, k + batch(k))
        rows = [(j, a, restart) for j in range(k, upto) for a, restart in steps[j]]
        for j, a, restart in rows:
            asset = names[a]
            _, y, u, modes = assets[asset]
            if restart:
                scalar[asset].restart()
            expected[asset] += scalar[asset].step(
                START_S + j * SAMPLE_PERIOD_S, float(y[j]), [float(u[j])], modes[j]
            )
        if rows:
            records = fleet.step(
                [slots[names[a]] for _, a, _ in rows],
                [START_S + j * SAMPLE_PERIOD_S for j, _, _ in rows],
                [float(assets[names[a]][1][j]) for j, a, _ in rows],
                [[float(assets[names[a]][2][j])] for j, a, _ in rows],
                [assets[names[a]][3][j] for j, a, _ in rows],
                [r for _, _, r in rows],
            )
            for record in records:
                got[record["asset"]].append(record)
        k = upto
    return expected, got, fleet


@pytest.mark.parametrize(
    "config",
    [
        MonitorConfig(),
        MonitorConfig(cusum=CusumConfig(h=5.0, after_alarm="restart"), evaluate_every=7),
        # short whiteness blocks at a loose alpha: many raise and clear, and
        # the missing rows cut blocks short (tested with their own n or dropped)
        MonitorConfig(whiteness=WhitenessConfig(window=30, lags=3, alpha=0.3)),
    ],
    ids=["defaults", "restart-cusum", "busy-whiteness"],
)
@pytest.mark.parametrize("backend", BACKENDS)
def test_records_equal_per_asset_monitors(
    assets: dict, config: MonitorConfig, backend: str
) -> None:
    expected, got, fleet = _run_both(assets, config, lambda k: 1 + (k // 7) % 5, backend)
    total = sum(len(v) for v in expected.values())
    assert total > 10  # the faults raise and clear alerts: the comparison is not vacuous
    kinds = {r["detector"] for v in expected.values() for r in v}
    assert {"innovation_mean", "physical_band"} <= kinds
    if config.whiteness.window == 30:
        short = [
            r
            for v in expected.values()
            for r in v
            if r["detector"] == "innovation_whiteness" and r["evidence"]["samples"] < 30
        ]
        assert short  # a block cut short by its period raised or cleared an alert
    for asset in expected:
        assert got[asset] == expected[asset], asset
    for asset in expected:
        scalar_monitor = AssetMonitor(asset, assets[asset][0], NAMES, config)
        assert set(fleet.active(asset)) <= {
            f"{m}:{k}" for m in scalar_monitor._modes for k in fleet._groups[0].keys
        } | {f"{m}:{k}" for m in scalar_monitor._modes for k in fleet._groups[-1].keys}


@pytest.mark.parametrize("schedule", ["one-mode", "site-schedule"])
@pytest.mark.parametrize("backend", BACKENDS)
def test_steps_from_the_same_assets_reuse_their_route(
    assets: dict, schedule: str, backend: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # One sample time per call, every asset in the same mode: the fleet
    # reuses the last step's routing (FleetMonitor._Route). The records must
    # stay those of per-asset monitors through what drops or changes a route:
    # a missing row (1 % of rows), a restart after it, a site-wide mode
    # switch, and a mode without a baseline ("purge").
    if schedule == "one-mode":
        chosen = {a: v for a, v in assets.items() if v[0].baselines[0].mode is None}
    else:
        modes = assets["block-d/ahu-9"][3]
        chosen = {}
        for k, (asset, (_, y, u, _)) in enumerate(assets.items()):
            both = BaselineSet(
                (
                    _baseline(LOOPS[k % 2], "occupied", 1),
                    _baseline(LOOPS[1 - k % 2], "unoccupied", 5),
                )
            )
            chosen[asset] = (both, y, u, modes)
    routed = 0
    original = FleetMonitor._wave_routed

    def counting(self: FleetMonitor, *args: object) -> list:
        nonlocal routed
        routed += 1
        return original(self, *args)  # type: ignore[arg-type]

    monkeypatch.setattr(FleetMonitor, "_wave_routed", counting)
    expected, got, _ = _run_both(chosen, MonitorConfig(), lambda k: 1, backend)
    n = len(next(iter(chosen.values()))[1])
    assert n // 2 < routed < n  # most steps took the route, not all
    assert sum(len(v) for v in expected.values()) > 5
    for asset in expected:
        assert got[asset] == expected[asset], asset


@pytest.mark.skipif(not available(), reason="numba is not installed (pip install '.[fast]')")
@pytest.mark.parametrize("largest", [None, 5], ids=["compiled", "mixed"])
def test_compiled_backend_leaves_the_same_state_bit_for_bit(
    assets: dict, largest: int | None, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The records agree (above); so must every state array, nan included,
    # for a checkpoint of one back end to continue on the other. "mixed":
    # waves of all six assets go the numpy way, smaller ones compiled.
    if largest is not None:
        monkeypatch.setattr(fleet_module, "COMPILED_ROWS", largest)
    config = MonitorConfig(cusum=CusumConfig(h=5.0, after_alarm="restart"))
    states = []
    for backend in ("python", "compiled"):
        fleet = _run_both(assets, config, lambda k: 1 + k % 3, backend)[2]
        states.append(fleet.to_state())
    python, compiled = states
    assert python["meta"] == compiled["meta"]
    assert python["arrays"].keys() == compiled["arrays"].keys()
    for name, array in python["arrays"].items():
        assert array.tobytes() == compiled["arrays"][name].tobytes(), name


def test_backend_is_checked() -> None:
    with pytest.raises(ValueError, match="backend must be one of"):
        FleetMonitor(NAMES, backend="fortran")  # type: ignore[arg-type]


def test_quality_records_equal_per_asset_monitor(assets: dict) -> None:
    asset = "block-a/ahu-2"
    baselines, y, u, _ = assets[asset]
    quality = {"sat": QualityConfig(minimum=-10.0, maximum=19.0, stuck_window_s=600.0)}
    scalar = AssetMonitor(asset, baselines, NAMES, quality=quality)
    fleet = FleetMonitor(NAMES, quality_signals=("sat",))
    slot = fleet.add_asset(asset, baselines)
    check = SignalQuality("sat", quality["sat"])
    expected, got = [], []
    values = y.copy()
    values[500:530] = values[499]  # frozen sensor
    for k in range(1500):
        if 900 <= k < 960 or (1000 <= k < 1100 and k % 5):
            continue  # silent sensor (stale), then samples every 5 min (gaps)
        t = START_S + k * SAMPLE_PERIOD_S
        expected += scalar.signal_sample("sat", t, float(values[k]))
        got += fleet.quality(slot, check.update(t, float(values[k])), t)
        expected += scalar.check_stale(t + 30.0)
        got += fleet.quality(slot, [check.check(t + 30.0)], t + 30.0)
        expected += scalar.step(t, float(y[k]), [float(u[k])])
        got += fleet.step([slot], [t], [float(y[k])], [[float(u[k])]], [None], [False])
    assert {r["detector"] for r in expected} >= {"out_of_range", "stuck", "gap"}
    assert got == expected
    assert fleet.active(asset) == scalar.active()


def test_one_quality_check_is_busy_exactly_when_the_batch_says_so(assets: dict) -> None:
    # A live message asks about one (slot, signal) and gets its answer from
    # that slot's episodes alone; a batch of checks first looks at the whole
    # bank. Both must agree, before and after one signal's alert is raised.
    quality = QualityConfig(minimum=-10.0, maximum=19.0)
    fleet = FleetMonitor(NAMES, quality_signals=("sat", "valve"))
    names = ["block-a/ahu-1", "block-a/ahu-2", "block-d/ahu-9"]
    slots = [fleet.add_asset(a, assets[a][0]) for a in names]
    check = SignalQuality("valve", quality)
    pairs = np.array([(s, q) for s in slots for q in (0, 1)])

    def agree() -> list[bool]:
        batch = fleet.quality_busy(pairs[:, 0], pairs[:, 1]).tolist()
        ones = [
            bool(fleet.quality_busy(pairs[i : i + 1, 0], pairs[i : i + 1, 1])[0])
            for i in range(len(pairs))
        ]
        assert ones == batch
        assert fleet.quality_busy(pairs[:0, 0], pairs[:0, 1]).shape == (0,)  # none asked
        return ones

    assert agree() == [False] * 6
    for k in range(4):  # out of range, again and again: raised on the third
        t = START_S + k * SAMPLE_PERIOD_S
        fleet.quality(slots[1], check.update(t, 50.0), t)
    assert agree() == [False, False, False, True, False, False]


def test_errors_name_what_is_wrong(assets: dict) -> None:
    fleet = FleetMonitor(NAMES)
    baselines = assets["block-a/ahu-1"][0]
    slot = fleet.add_asset("block-a/ahu-1", baselines)
    with pytest.raises(ValueError, match="'block-a/ahu-1' is already monitored"):
        fleet.add_asset("block-a/ahu-1", baselines)
    with pytest.raises(ValueError, match="the baseline set is empty"):
        fleet.add_asset("block-a/ahu-3", BaselineSet(()))
    with pytest.raises(ValueError, match="two rows with the same sample time"):
        fleet.step(
            [slot, slot],
            [START_S, START_S],
            [1.0, 1.0],
            [[1.0], [1.0]],
            [None, None],
            [False, False],
        )
    with pytest.raises(ValueError, match="rows disagree in length"):
        fleet.step([slot], [START_S, START_S], [1.0], [[1.0]], [None], [False])
    with pytest.raises(KeyError, match="no baseline for mode 'purge'"):
        fleet.readout("block-a/ahu-1", "purge")
    fleet.remove_asset("block-a/ahu-1")
    assert "block-a/ahu-1" not in fleet and len(fleet) == 0
    with pytest.raises(ValueError, match=f"slot {slot} holds no asset"):
        fleet.step([slot], [START_S], [1.0], [[1.0]], [None], [False])
    assert fleet.add_asset("block-a/ahu-3", baselines) == slot  # the slot is reused


TWO_ASSETS = ["block-a/ahu-2", "block-d/ahu-9"]


def two_asset_rows(fleet: FleetMonitor, assets: dict, ks: range) -> list[dict]:
    """Step TWO_ASSETS (slots 0 and 1) through samples ``ks``; return the records."""
    out = []
    for k in ks:
        out += fleet.step(
            [0, 1],
            [START_S + k * SAMPLE_PERIOD_S] * 2,
            [float(assets[a][1][k]) for a in TWO_ASSETS],
            [[float(assets[a][2][k])] for a in TWO_ASSETS],
            [assets[a][3][k] for a in TWO_ASSETS],
            [False, False],
        )
    return out


def test_checkpoint_through_npz_continues_identically(assets: dict) -> None:
    # Split the run at a sample, save through numpy's npz (no pickle) and
    # JSON, restore into a new monitor: the records after the split are the
    # uninterrupted run's.
    names = TWO_ASSETS
    n = len(assets[names[0]][1])
    split = int(0.9 * PER_DAY)
    whole = FleetMonitor(NAMES)
    for a in names:
        whole.add_asset(a, assets[a][0])
    expected = two_asset_rows(whole, assets, range(n))
    first = FleetMonitor(NAMES)
    for a in names:
        first.add_asset(a, assets[a][0])
    before = two_asset_rows(first, assets, range(split))
    state = first.to_state()
    buffer = io.BytesIO()
    np.savez(buffer, **state["arrays"])
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as saved:
        arrays = {k: saved[k] for k in saved.files}
    second = FleetMonitor(NAMES)
    second.load_state({"meta": json.loads(json.dumps(state["meta"])), "arrays": arrays})
    after = two_asset_rows(second, assets, range(split, n))
    assert len(expected) > 4
    assert before + after == expected
    assert second.active("block-d/ahu-9") == whole.active("block-d/ahu-9")


def test_a_checkpoint_saved_before_the_cusum_noise_level_still_loads(assets: dict) -> None:
    # A checkpoint from before the CUSUM's noise scaling lacks its two arrays.
    # It loads as the same state with the level started afresh (no last
    # input, level 1), which is what AssetMonitor.load_state does with a
    # CUSUM state that lacks the keys.
    fleet = FleetMonitor(NAMES)
    for a in TWO_ASSETS:
        fleet.add_asset(a, assets[a][0])
    two_asset_rows(fleet, assets, range(int(0.9 * PER_DAY)))
    state = fleet.to_state()
    assert np.all(state["arrays"]["g0.cu_noise"] != 1.0)  # the level has moved
    older = {k: v for k, v in state["arrays"].items() if ".cu_" not in k}
    afresh = dict(state["arrays"])
    afresh["g0.cu_previous"] = np.full_like(afresh["g0.cu_previous"], np.nan)
    afresh["g0.cu_noise"] = np.ones_like(afresh["g0.cu_noise"])
    loaded = []
    for arrays in (older, afresh):
        twin = FleetMonitor(NAMES)
        twin.load_state({"meta": state["meta"], "arrays": arrays})
        loaded.append(twin.to_state()["arrays"])
    assert loaded[0].keys() == loaded[1].keys()
    for name in loaded[0]:
        np.testing.assert_array_equal(loaded[0][name], loaded[1][name], err_msg=name)


@pytest.mark.parametrize(("ar_order", "samples"), [(6, 300), (6, int(0.9 * PER_DAY)), (4, 600)])
def test_a_checkpoint_with_separate_reference_and_whiteness_sums_still_loads(
    assets: dict, ar_order: int, samples: int
) -> None:
    # Before the prewhitening reference and the whiteness blocks shared one
    # array, a checkpoint held both. Each channel used one of them: the
    # reference's until its filter was fitted (480 samples), then the
    # block's; the other is not read. Saved while the reference is being
    # collected (300) and after, the older layout loads as the same state;
    # with a shorter filter (4) the reference's sums are the shorter ones.
    config = MonitorConfig(prewhiten=PrewhitenConfig(ar_order=ar_order))
    fleet = FleetMonitor(NAMES, config)
    for a in TWO_ASSETS:
        fleet.add_asset(a, assets[a][0])
    two_asset_rows(fleet, assets, range(samples))
    state = fleet.to_state()
    sums = state["arrays"]["g0.sums"]
    assert np.any(sums != 0.0)
    fitted = state["arrays"]["g0.pw_count"] >= config.prewhiten.reference_samples
    # of the three channels (the two assets' modes), none is fitted at 300,
    # one at 600 (a mix of both layouts) and all at 0.9 day
    assert fitted.sum() == {300: 0, 600: 1}.get(samples, 3)
    p, lags = ar_order, config.whiteness.lags
    assert sums.shape[0] == max(p, lags) + 2
    stale = np.random.default_rng(3).normal(size=(p + 2, sums.shape[1]))  # never read
    older = {k: v for k, v in state["arrays"].items() if k != "g0.sums"}
    older["g0.pw_sums"] = np.where(fitted, stale, sums[: p + 2])
    older["g0.wh_sums"] = np.where(fitted, sums[: lags + 2], 0.0)
    twin = FleetMonitor(NAMES, config)
    twin.load_state({"meta": state["meta"], "arrays": older})
    loaded = twin.to_state()["arrays"]
    assert loaded.keys() == state["arrays"].keys()
    for name in loaded:
        np.testing.assert_array_equal(loaded[name], state["arrays"][name], err_msg=name)
    # older arrays that do not fit together are refused by name, the monitor left as it was
    older["g0.wh_sums"] = older["g0.wh_sums"][:, :1]
    with pytest.raises(ValueError, match="'pw_sums' .* and 'pw_count' .* do not fit together"):
        twin.load_state({"meta": state["meta"], "arrays": older})
    assert len(twin) == len(TWO_ASSETS)


def test_state_from_other_settings_is_refused(assets: dict) -> None:
    fleet = FleetMonitor(NAMES)
    fleet.add_asset("block-a/ahu-1", assets["block-a/ahu-1"][0])
    state = fleet.to_state()
    other = FleetMonitor(NAMES, MonitorConfig(prewhiten=PrewhitenConfig(ar_order=4)))
    with pytest.raises(ValueError, match="'pw_head' has shape"):
        other.load_state(state)
    assert len(other) == 0  # left as it was
    with pytest.raises(ValueError, match="this release reads 'arxwatch.fleet' version 2"):
        fleet.load_state({"meta": {**state["meta"], "version": 9}, "arrays": state["arrays"]})
    with pytest.raises(ValueError, match="saved monitor checks quality of"):
        FleetMonitor(NAMES, quality_signals=("sat",)).load_state(state)


def test_memory_per_asset_is_a_few_hundred_floats(assets: dict) -> None:
    # The point of the fleet: arrays, not objects. One mode, one input.
    fleet = FleetMonitor(NAMES, quality_signals=("sat", "valve"))
    baselines = assets["block-a/ahu-1"][0]
    for k in range(1000):
        fleet.add_asset(f"block-a/vav-{k}", baselines)
    per_asset = fleet.memory_bytes() / len(fleet)
    assert per_asset < 2048, per_asset


def test_a_mode_added_later_judges_as_if_given_at_start(assets: dict) -> None:
    asset = "block-d/ahu-9"
    both, y, u, modes = assets[asset]
    occupied, unoccupied = both.baselines
    fleet = FleetMonitor(NAMES)
    slot = fleet.add_asset(asset, BaselineSet((occupied,)))
    fleet.add_baseline(asset, unoccupied)
    scalar = AssetMonitor(asset, both, NAMES)
    expected, got = [], []
    for k in range(int(1.5 * PER_DAY)):
        t = START_S + k * SAMPLE_PERIOD_S
        expected += scalar.step(t, float(y[k]), [float(u[k])], modes[k])
        got += fleet.step([slot], [t], [float(y[k])], [[float(u[k])]], [modes[k]], [False])
    assert got == expected
    with pytest.raises(ValueError, match="cannot add mode 'occupied'"):
        fleet.add_baseline(asset, occupied)
    with pytest.raises(KeyError):
        fleet.add_baseline("block-z/none", occupied)


@pytest.mark.skipif(not available(), reason="numba is not installed (pip install '.[fast]')")
def test_compiled_live_estimate_without_a_writable_cache_folder(
    assets: dict, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A read-only install: the generated module cannot be written, so it is
    # compiled in memory, with the same records as the numpy path.
    blocked = tmp_path / "not-a-folder"
    blocked.write_text("")
    monkeypatch.setattr(fleetnative, "_generated_folder", lambda: blocked)
    fleetnative.group_kernels.cache_clear()
    try:
        asset = "block-a/ahu-2"
        got = []
        for backend in ("python", "compiled"):
            fleet = FleetMonitor(NAMES, backend=backend)  # type: ignore[arg-type]
            slot = fleet.add_asset(asset, assets[asset][0])
            _, y, u, _ = assets[asset]
            records = []
            for k in range(PER_DAY):
                t = START_S + k * SAMPLE_PERIOD_S
                records += fleet.step([slot], [t], [float(y[k])], [[float(u[k])]], [None], [False])
            got.append((records, fleet.to_state()["arrays"]["g0.rls"].tobytes()))
        assert got[0] == got[1]
        assert not list(tmp_path.glob("**/*.py"))
    finally:
        fleetnative.group_kernels.cache_clear()


@pytest.mark.parametrize("backend", BACKENDS)
def test_whiteness_blocks_of_assets_started_apart_end_at_the_same_sample(backend: str) -> None:
    # Assets started minutes apart, one with a gap: their blocks are periods
    # of sample time (MonitorConfig.block_period), so after the first
    # period boundary every block holds the samples since that boundary.
    config = MonitorConfig(whiteness=WhitenessConfig(window=120, lags=6, alpha=1e-5))
    baseline = BaselineSet((_baseline(LOOPS[0], None, 1),))
    fleet = FleetMonitor(NAMES, config, backend=backend)
    count = 5
    for a in range(count):
        fleet.add_asset(f"site/vav-{a}", baseline)
    n = 2 * PER_DAY + 45
    u = daily_operation(n, SAMPLE_PERIOD_S, seed=3)
    y = REFERENCE_LOOPS[LOOPS[0]].simulate(u, seed=4)
    starts = [0, 17, 53, 90, 131]
    for k in range(n):
        slots = [a for a in range(count) if k >= starts[a] and not (a == 2 and 700 <= k < 740)]
        fleet.step(
            slots,
            [START_S + k * SAMPLE_PERIOD_S] * len(slots),
            [float(y[k - starts[a]]) for a in slots],
            [[float(u[k - starts[a]])] for a in slots],
            [None] * len(slots),
            [False] * len(slots),
        )
    group = fleet._groups[0]
    since_boundary = n % 120  # 45: START_S is a multiple of 120 sample periods
    assert group.arrays["wh_count"][:count].tolist() == [since_boundary] * count
    period = config.block_period(START_S + (n - 1) * SAMPLE_PERIOD_S, SAMPLE_PERIOD_S)
    assert group.arrays["wh_period"][:count].tolist() == [period] * count
