"""Unit tests of arxwatch.estimators.baseline.

Simulated processes, thresholds and sizes are illustrative: common practice,
no source, unless a comment names one.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import copy
import dataclasses
import json
import math
from typing import Any

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy.signal import lfilter

from arxwatch.daemon.simulate import REFERENCE_LOOPS, daily_operation
from arxwatch.estimators.arx import ArxOrder, regression_matrix
from arxwatch.estimators.baseline import (
    DEFAULT_ACCEPTANCE,
    GAP_FACTOR,
    AcceptanceRule,
    Baseline,
    BaselineResult,
    BaselineSet,
    GridError,
    LearnerConfig,
    LiveBaselineLearner,
    SearchRanges,
    fit_baseline,
)
from arxwatch.estimators.codec import CodecError
from arxwatch.estimators.errors import DimensionError, OrderError
from arxwatch.estimators.identify import fit_lasso, split_series
from arxwatch.estimators.readout import feature_vector, read_out

TS = 60.0
T0 = 1_700_000_000.0
FIRST_ORDER = ArxOrder(na=1, nb=(1,), nk=(1,))


def valve_moves(rng: np.random.Generator, n: int, low: float = 10.0, high: float = 90.0) -> Any:
    holds = rng.integers(5, 30, size=n)
    return np.repeat(rng.uniform(low, high, size=n), holds)[:n]


def process(
    u: NDArray[np.float64],
    rng: np.random.Generator,
    *,
    a: float = 0.9,
    b: float = -0.02,
    delay: int = 0,
    noise: float = 0.02,
    offset: float = 1.5,
) -> NDArray[np.float64]:
    """y(k) = a y(k-1) + b u(k-1-delay) + offset + e(k): an ARX model (Ljung 1999, 4.2)."""
    numerator = np.zeros(delay + 2)
    numerator[-1] = b
    e = rng.normal(0.0, noise, size=(u.shape[0],))
    y = lfilter(numerator, [1.0, -a], u) + lfilter([1.0], [1.0, -a], e + offset)
    return np.asarray(y, dtype=np.float64)


def record(
    seed: int = 0, n: int = 600, **kwargs: Any
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    rng = np.random.default_rng(seed)
    u = valve_moves(rng, n + 100)
    y = process(u, rng, **kwargs)
    t = np.asarray(T0 + TS * np.arange(n + 100), dtype=np.float64)
    return y[100:], u[100:], t[100:]


@pytest.fixture(scope="module")
def accepted() -> Baseline:
    y, u, t = record()
    result = fit_baseline(y, u, t, sample_period_s=TS, mode="cooling")
    assert result.accepted, result.reasons
    assert result.baseline is not None
    return result.baseline


# --- fit_baseline: acceptance and refusals ------------------------------------


def test_well_excited_window_is_accepted(accepted: Baseline) -> None:
    assert accepted.mode == "cooling"
    assert accepted.order == FIRST_ORDER
    assert accepted.criterion == "bic"
    assert accepted.candidates[0].order == accepted.order
    assert accepted.window_start_s == T0 + 100 * TS
    assert accepted.window_end_s == T0 + 699 * TS
    assert accepted.n_samples == 600
    assert accepted.fit_percent > DEFAULT_ACCEPTANCE.min_fit_percent


def test_given_order_skips_the_search() -> None:
    y, u, t = record()
    result = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER)
    assert result.accepted and result.baseline is not None
    assert result.baseline.criterion is None
    assert result.baseline.candidates == () and result.candidates == ()
    assert result.fitted is result.baseline


def test_constant_input_is_refused_with_the_excitation_reason() -> None:
    y, _, t = record()
    u = np.full_like(y, 50.0)
    result = fit_baseline(y, u, t, sample_period_s=TS)
    assert not result.accepted and result.baseline is None and result.fitted is None
    assert len(result.reasons) == 1
    assert result.reasons[0].startswith("input 1 stayed at 50 for the whole estimation part")
    assert "cannot be measured" in result.reasons[0]


def test_valve_that_hardly_moved_is_refused_by_gain_uncertainty() -> None:
    rng = np.random.default_rng(4)
    u = np.full(700, 40.0)
    u[300:] = 40.1  # one nudge of a tenth of a percent in seven hundred samples
    y = process(u, rng, noise=0.05)[100:]
    t = T0 + TS * np.arange(600)
    result = fit_baseline(y, u[100:], t, sample_period_s=TS, order=FIRST_ORDER)
    assert not result.accepted
    assert any(
        r.startswith("the gain of input 1 is uncertain") and "hardly moved" in r
        for r in result.reasons
    )
    assert result.fitted is not None  # the judged model is kept for display


def test_poor_fit_is_refused() -> None:
    rng = np.random.default_rng(5)
    u = valve_moves(rng, 600)
    y = 0.02 * np.roll(u, 1) + 1.5 * rng.standard_normal(600)  # mostly noise
    t = T0 + TS * np.arange(600)
    result = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER)
    assert not result.accepted
    fit = [r for r in result.reasons if r.startswith("fit on held-back data")]
    assert len(fit) == 1
    assert "is below the 70 % needed: the model does not explain the output" in fit[0]


def test_unstable_model_is_refused() -> None:
    y, u, t = record(n=300, a=1.01, b=0.02, noise=0.05)
    result = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER)
    assert not result.accepted
    assert any(
        r.startswith("the fitted model is unstable (pole modulus 1.0") for r in result.reasons
    )


def test_unstable_model_passes_when_stability_is_not_required() -> None:
    y, u, t = record(n=300, a=1.01, b=0.02, noise=0.05)
    rule = AcceptanceRule(require_stable=False)
    result = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER, acceptance=rule)
    assert result.accepted, result.reasons


def test_noise_free_output_is_refused() -> None:
    y, u, t = record(noise=0.0)
    result = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER)
    assert result.reasons == (
        "the model reproduces the output exactly, with no noise left: the output is likely "
        "computed from the input or stuck, not a measurement",
    )


def test_constant_output_is_refused() -> None:
    _, u, t = record()
    result = fit_baseline(np.full(600, 21.0), u, t, sample_period_s=TS)
    assert result.reasons[0].startswith("the output stayed at 21 for the whole estimation part")


def test_inputs_moving_together_are_refused() -> None:
    y, u, t = record()
    result = fit_baseline(y, np.column_stack([u, 2.0 * u + 1.0]), t, sample_period_s=TS)
    assert any("moved in step with each other" in r for r in result.reasons)


def test_too_short_window_is_refused_with_the_numbers() -> None:
    y, u, t = record(n=60)
    result = fit_baseline(y, u, t, sample_period_s=TS)
    assert len(result.reasons) == 1
    # Grid defaults: depth 7, largest candidate 5 parameters, 10 per parameter.
    assert result.reasons[0].startswith(
        "the window holds 60 samples: after 30 % held back for validation and 7 for the "
        "model's history, 35 remain to fit up to 5 parameters, but 50 (10 per parameter)"
    )


def test_rule_thresholds_are_applied() -> None:
    y, u, t = record()
    strict = AcceptanceRule(min_fit_percent=99.99, max_relative_se=1e-6)
    result = fit_baseline(y, u, t, sample_period_s=TS, acceptance=strict)
    assert not result.accepted
    assert [r.split(" ")[0] for r in result.reasons] == ["fit", "the"]
    assert "at most 0 % is allowed" in result.reasons[1]


# --- fit_baseline: grid and options ------------------------------------------


def test_gap_is_reported_with_its_location() -> None:
    y, u, t = record()
    t = t.copy()
    t[50:] += 2 * TS  # two samples lost before sample 50
    with pytest.raises(GridError, match=r"^t: gap of 180 s between sample 49 \(t=") as info:
        fit_baseline(y, u, t, sample_period_s=TS)
    assert info.value.index == 50
    assert f"more than {GAP_FACTOR} sample periods (90 s): give a gap-free window" in str(
        info.value
    )


def test_duplicate_timestamp_is_not_a_grid() -> None:
    y, u, t = record()
    t = t.copy()
    t[10:] -= TS
    with pytest.raises(GridError, match=r"samples 9 .* and 10 .* are 0 s apart, less than half"):
        fit_baseline(y, u, t, sample_period_s=TS)


def test_grid_error_is_a_value_error() -> None:
    # Source: STYLE.md "Errors": exceptions subclass builtins.
    assert issubclass(GridError, ValueError)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"alpha": 1.0}, r"alpha applies to ridge and lasso only, not to method='ols'"),
        ({"method": "ridge"}, r"method='ridge' needs a penalty weight alpha"),
        ({"method": "svd"}, r"method must be one of"),
        ({"criterion": "hq"}, r"criterion must be one of"),
        ({"validation_fraction": 0.0}, r"validation_fraction must be in \(0, 0.9\]"),
        ({"order": FIRST_ORDER, "search": SearchRanges()}, r"either order or search"),
        ({"sample_period_s": -1.0}, r"sample_period_s: expected a finite number > 0"),
    ],
)
def test_bad_options_are_refused_early(kwargs: dict[str, Any], message: str) -> None:
    y, u, t = record()
    options: dict[str, Any] = {"sample_period_s": TS, **kwargs}
    with pytest.raises(ValueError, match=message):
        fit_baseline(y, u, t, **options)


def test_shape_errors_name_the_argument() -> None:
    y, u, t = record()
    with pytest.raises(DimensionError, match=r"t must have shape \(N=600,\)"):
        fit_baseline(y, u, t[:-1], sample_period_s=TS)
    with pytest.raises(DimensionError, match=r"order names 2 input\(s\) but there are 1"):
        fit_baseline(y, u, t, sample_period_s=TS, order=ArxOrder(1, (1, 1), (1, 1)))
    bad = y.copy()
    bad[7] = np.nan
    with pytest.raises(ValueError, match=r"y must hold finite values, found nan at index 7"):
        fit_baseline(bad, u, t, sample_period_s=TS)


def test_ridge_and_lad_baselines_carry_their_own_covariance() -> None:
    y, u, t = record()
    ridge = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER, method="ridge", alpha=1.0)
    lad = fit_baseline(y, u, t, sample_period_s=TS, order=FIRST_ORDER, method="lad")
    assert ridge.baseline is not None and lad.baseline is not None
    assert (ridge.baseline.method, ridge.baseline.alpha) == ("ridge", 1.0)
    assert (lad.baseline.method, lad.baseline.alpha) == ("lad", 0.0)


def test_lasso_covariance_is_least_squares_on_the_active_set() -> None:
    # Source: J. D. Lee et al., "Exact post-selection inference, with application
    # to the lasso", Annals of Statistics 44(3), 2016: given the active set A and
    # the signs, theta_A = (Phi_A' Phi_A)^-1 (Phi_A' y - N alpha s_A), whose
    # covariance is sigma2 (Phi_A' Phi_A)^-1.
    y, u, t = record()
    order = ArxOrder(na=1, nb=(2,), nk=(1,))  # the true b1_2 is zero
    result = fit_baseline(y, u, t, sample_period_s=TS, order=order, method="lasso", alpha=0.005)
    assert result.fitted is not None
    baseline = result.fitted
    y_est, u_est, _, _ = split_series(y, u, 0.3)
    phi, target = regression_matrix(order, y_est, u_est)
    mask = np.array([True, True, True, False])
    reference = fit_lasso(phi, target, alpha=0.005, penalize_mask=mask)
    np.testing.assert_array_equal(baseline.theta, reference.theta)
    active = np.flatnonzero(reference.theta != 0.0)
    assert active.tolist() == [0, 1, 3]
    inactive = 2
    assert not baseline.covariance[inactive].any() and not baseline.covariance[:, inactive].any()
    sub = phi[:, active]
    expected = reference.sigma2 * np.linalg.inv(sub.T @ sub)
    np.testing.assert_allclose(baseline.covariance[np.ix_(active, active)], expected, rtol=1e-7)


# --- Baseline -------------------------------------------------------------


def test_residual_matches_the_closed_form(accepted: Baseline) -> None:
    # Source: Ljung 1999, chapter 9: prediction-error variance of the
    # estimated model, sigma2 + phi' Cov(theta0) phi.
    phi = [-1.2, 45.0, 1.0]
    e, z = accepted.residual(phi, 0.9)
    vector = np.array(phi)
    expected_e = 0.9 - float(vector @ accepted.theta)
    expected_z = expected_e / math.sqrt(
        accepted.sigma2 + float(vector @ accepted.covariance @ vector)
    )
    assert e == pytest.approx(expected_e, rel=1e-12)
    assert z == pytest.approx(expected_z, rel=1e-12)


def test_residual_checks_the_regressor_length(accepted: Baseline) -> None:
    with pytest.raises(DimensionError, match="phi has 2 entries but the baseline has 3"):
        accepted.residual([1.0, 2.0], 0.0)


def test_features_are_the_readout_feature_vector(accepted: Baseline) -> None:
    expected = feature_vector(read_out(accepted.order, accepted.theta, TS))
    np.testing.assert_array_equal(accepted.features(), expected)
    assert accepted.feature_covariance().shape == (3, 3)


def test_arrays_are_read_only(accepted: Baseline) -> None:
    with pytest.raises(ValueError, match="read-only"):
        accepted.theta[0] = 0.0
    with pytest.raises(dataclasses.FrozenInstanceError):
        accepted.sigma2 = 1.0  # type: ignore[misc]


def test_construction_checks_name_the_field(accepted: Baseline) -> None:
    with pytest.raises(ValueError, match=r"^sigma2: expected a finite number > 0"):
        dataclasses.replace(accepted, sigma2=0.0)
    with pytest.raises(DimensionError, match=r"^theta: expected shape \(3,\), got \(2,\)"):
        dataclasses.replace(accepted, theta=np.zeros(2))
    with pytest.raises(ValueError, match=r"^window_end_s: .* is before window_start_s"):
        dataclasses.replace(accepted, window_end_s=0.0)


def test_to_dict_round_trips_through_json_exactly(accepted: Baseline) -> None:
    # Source: Python json writes float repr, the shortest string that reads back
    # to the same double (Python docs, "Floating Point Arithmetic", repr).
    text = json.dumps(accepted.to_dict(), allow_nan=False)  # strict JSON: no NaN tokens
    restored = Baseline.from_dict(json.loads(text))
    assert restored.to_dict() == accepted.to_dict()
    assert restored.theta.tobytes() == accepted.theta.tobytes()
    assert restored.covariance.tobytes() == accepted.covariance.tobytes()
    assert restored.readout.poles == accepted.readout.poles
    assert math.isnan(restored.readout.damping_ratio)  # real dominant pole: undefined
    assert restored.residual([-1.0, 40.0, 1.0], 1.0) == accepted.residual([-1.0, 40.0, 1.0], 1.0)


def test_to_dict_has_the_documented_keys(accepted: Baseline) -> None:
    data = accepted.to_dict()
    assert (data["format"], data["version"]) == ("arxwatch.baseline", 1)
    assert set(data) == {
        "format", "version", "mode", "order", "sample_period_s", "method", "alpha", "theta",
        "covariance", "sigma2", "fit_percent", "window_start_s", "window_end_s", "n_samples",
        "criterion", "candidates", "readout",
    }  # fmt: skip
    assert data["readout"]["natural_frequency_rad_s"] is None


def _broken(accepted: Baseline, path: tuple[Any, ...], value: Any) -> dict[str, Any]:
    data = copy.deepcopy(accepted.to_dict())
    target = data
    for key in path[:-1]:
        target = target[key]
    if value is KeyError:
        del target[path[-1]]
    else:
        target[path[-1]] = value
    return data


@pytest.mark.parametrize(
    ("path", "value", "message"),
    [
        (("theta",), [0.1, 0.2], r"^baseline\.theta: expected 3 numbers, got 2$"),
        (("theta", 1), "x", r"^baseline\.theta\[1\]: expected a number, got 'x'$"),
        (("covariance", 2), [0.0], r"^baseline\.covariance\[2\]: expected 3 numbers, got 1$"),
        (("sigma2",), -1.0, r"^baseline\.sigma2: expected a finite number > 0, got -1.0$"),
        (("sigma2",), KeyError, r"^baseline: missing key\(s\) \['sigma2'\]$"),
        (("extra",), 1, r"^baseline: unknown key\(s\) \['extra'\]$"),
        (("version",), 3, r"^baseline\.version: this build reads versions 1 and 2, got 3$"),
        (("version",), 2, r"^baseline: missing key\(s\) \['n_stretches'\]$"),
        (("format",), "x", r"^baseline\.format: expected 'arxwatch.baseline', got 'x'$"),
        (("order", "nb"), [0], r"^baseline\.order: nb\[0\] must be in \[1, 240\], got 0$"),
        (("order", "constant"), "yes", r"^baseline\.order\.constant: expected true or false"),
        (("criterion",), "hq", r"^baseline\.criterion: expected one of"),
        (("readout", "gains"), ["a"], r"^baseline\.readout\.gains\[0\]: expected a number or null"),
        (("readout", "poles"), [], r"^baseline\.readout\.poles: expected 1 entries, got 0$"),
        (("candidates", 0, "aic"), None, r"^baseline\.candidates\[0\]\.aic: expected a number"),
        (("method",), "svd", r"^baseline\.method: expected one of"),
        (("n_samples",), 1.5, r"^baseline\.n_samples: expected an integer, got 1.5$"),
    ],
)
def test_from_dict_errors_name_the_key_path(
    accepted: Baseline, path: tuple[Any, ...], value: Any, message: str
) -> None:
    with pytest.raises(CodecError, match=message):
        Baseline.from_dict(_broken(accepted, path, value))


def test_from_dict_refuses_a_non_mapping() -> None:
    with pytest.raises(CodecError, match=r"^baseline: expected a mapping, got list$"):
        Baseline.from_dict([])


# --- BaselineResult, AcceptanceRule, SearchRanges ---------------------------------


def test_result_fields_must_agree(accepted: Baseline) -> None:
    with pytest.raises(ValueError, match="an accepted result needs a baseline and no reasons"):
        BaselineResult(baseline=None, accepted=True, reasons=())
    with pytest.raises(ValueError, match="an accepted result needs"):
        BaselineResult(baseline=accepted, accepted=True, reasons=("x",), fitted=accepted)
    with pytest.raises(ValueError, match="fitted must be the accepted baseline"):
        BaselineResult(baseline=accepted, accepted=True, reasons=())


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"min_fit_percent": 101.0}, "min_fit_percent must be a finite number <= 100"),
        ({"min_samples_per_param": 0}, "min_samples_per_param must be an integer >= 1"),
        ({"max_relative_se": 0.0}, "max_relative_se must be a finite number > 0"),
        ({"require_stable": 1}, "require_stable must be a bool"),
    ],
)
def test_acceptance_rule_validates(kwargs: dict[str, Any], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        AcceptanceRule(**kwargs)


def test_acceptance_defaults() -> None:
    # Common practice, no source (documented on AcceptanceRule).
    assert DEFAULT_ACCEPTANCE == AcceptanceRule(70.0, True, 10, 0.25)


def test_search_ranges_defaults_and_validation() -> None:
    grid = SearchRanges()
    assert (grid.na, grid.nb, grid.nk) == ((1, 2), (1, 2), (0, 1, 2, 3, 4, 5, 6))
    assert grid.depth == 7 and grid.largest_n_params(2) == 7
    assert SearchRanges(na=(2, 0, 1, 1)).na == (0, 1, 2)
    with pytest.raises(OrderError, match=r"nb values must be in \[1, 240\], got 0"):
        SearchRanges(nb=(0,))
    with pytest.raises(OrderError, match="nk is empty"):
        SearchRanges(nk=())


# --- BaselineSet --------------------------------------------------------------


def _with_mode(baseline: Baseline, mode: str | None) -> Baseline:
    return dataclasses.replace(baseline, mode=mode)


def test_baseline_set_looks_up_by_mode(accepted: Baseline) -> None:
    heating = _with_mode(accepted, "heating")
    baselines = BaselineSet((accepted, heating))
    assert baselines.modes == ("cooling", "heating")
    assert baselines.for_mode("heating") is heating
    assert baselines.for_mode("economizer") is None
    assert baselines.for_mode(None) is None
    only = BaselineSet((_with_mode(accepted, None),))
    assert only.for_mode(None) is only.baselines[0]


def test_baseline_set_refuses_duplicates_and_mixed_none(accepted: Baseline) -> None:
    with pytest.raises(ValueError, match=r"baselines\[1\]: a second baseline for mode 'cooling'"):
        BaselineSet((accepted, accepted))
    with pytest.raises(ValueError, match=r"mode None\) must be the only one"):
        BaselineSet((accepted, _with_mode(accepted, None)))


def test_baseline_set_round_trips_and_names_paths(accepted: Baseline) -> None:
    baselines = BaselineSet((accepted, _with_mode(accepted, "heating")))
    data = json.loads(json.dumps(baselines.to_dict(), allow_nan=False))
    assert BaselineSet.from_dict(data).to_dict() == baselines.to_dict()
    data["baselines"][1]["theta"] = [1.0]
    with pytest.raises(CodecError, match=r"^baseline_set\.baselines\[1\]\.theta: expected 3"):
        BaselineSet.from_dict(data)
    data["baselines"][1] = data["baselines"][0]
    with pytest.raises(CodecError, match=r"^baseline_set\.baselines\[1\]: a second baseline"):
        BaselineSet.from_dict(data)


# --- LiveBaselineLearner --------------------------------------------------------

SPAN_S = 6 * 3600.0  # 361 samples at 60 s


def learner_config(**kwargs: Any) -> LearnerConfig:
    options: dict[str, Any] = {
        "sample_period_s": TS,
        "span_s": SPAN_S,
        "modes": ("heating", "cooling"),
        "order": FIRST_ORDER,
        **kwargs,
    }
    return LearnerConfig(**options)


def feed(learner: LiveBaselineLearner, y: Any, u: Any, t: Any, mode: str | None) -> list[str]:
    samples = zip(t, y, u, strict=True)
    return [learner.add(float(tk), float(yk), [float(uk)], mode) for tk, yk, uk in samples]


def test_learner_collects_per_mode_and_ignores_unknown_modes() -> None:
    learner = LiveBaselineLearner(learner_config())
    y, u, t = record(n=400)
    outcomes = feed(learner, y[:30], u[:30], t[:30], "economizer")
    assert set(outcomes) == {"ignored"}
    outcomes = feed(learner, y, u, t, "heating")
    assert outcomes[:30] == ["collected"] * 30  # the economizer stretch left no trace
    assert outcomes[361:] == ["ignored"] * 39  # the window is full
    assert learner.ready("heating") and not learner.ready("cooling")
    assert learner.coverage_s("heating") == SPAN_S
    result = learner.finish("heating")
    reference = fit_baseline(
        y[:361], u[:361], t[:361], sample_period_s=TS, order=FIRST_ORDER, mode="heating"
    )
    assert result.accepted and result.baseline is not None and reference.baseline is not None
    assert result.baseline.to_dict() == reference.baseline.to_dict()
    assert learner.baseline("heating") is result.baseline
    assert learner.baseline("cooling") is None
    assert learner.add(float(t[-1]) + TS, 1.0, [50.0], "heating") == "ignored"  # frozen
    assert learner.baselines().modes == ("heating",)


def test_learner_gap_starts_a_stretch_and_keeps_the_samples() -> None:
    learner = LiveBaselineLearner(learner_config())
    y, u, t = record(n=400)
    feed(learner, y[:100], u[:100], t[:100], "cooling")
    # Two samples lost: more than GAP_FACTOR periods, a new stretch; the first is kept.
    assert learner.add(float(t[102]), float(y[102]), [float(u[102])], "cooling") == "collected"
    assert learner.coverage_s("cooling") == 99 * TS  # the new stretch covers nothing yet
    assert learner.add(float(t[102]), 0.0, [0.0], "cooling") == "ignored"  # duplicate
    assert learner.add(float(t[103]), math.nan, [0.0], "cooling") == "ignored"
    assert learner.add(float(t[104]), float(y[104]), [float(u[104])], "cooling") == "collected"
    assert learner.coverage_s("cooling") == 99 * TS  # t[102] alone: a stretch of one sample
    assert learner.add(float(t[105]), float(y[105]), [float(u[105])], "cooling") == "collected"
    assert learner.coverage_s("cooling") == 100 * TS
    assert len(learner.to_state()["modes"][1]["t"]) == 103


def test_learner_refusal_starts_afresh() -> None:
    learner = LiveBaselineLearner(learner_config())
    _, _, t = record(n=400)
    feed(learner, np.full(361, 20.0), np.full(361, 30.0), t[:361], "cooling")
    result = learner.finish("cooling")
    assert not result.accepted
    assert result.reasons[0].startswith("input 1 stayed at 30")
    assert learner.coverage_s("cooling") == 0.0 and learner.baseline("cooling") is None
    assert learner.add(float(t[361]), 20.0, [30.0], "cooling") == "collected"


def test_learner_finish_and_lookups_refuse_misuse() -> None:
    learner = LiveBaselineLearner(learner_config())
    learner.add(T0, 1.0, [2.0], "heating")
    with pytest.raises(ValueError, match=r"mode 'heating' is not ready: its window covers 0 s of"):
        learner.finish("heating")
    with pytest.raises(ValueError, match=r"mode 'x' is not learned; learned modes"):
        learner.ready("x")
    with pytest.raises(DimensionError, match=r"u has 2 value\(s\), the learner expects 1"):
        learner.add(T0 + TS, 1.0, [2.0, 3.0], "heating")


def test_learner_reset_learns_a_frozen_mode_again() -> None:
    learner = LiveBaselineLearner(learner_config())
    y, u, t = record(n=400)
    feed(learner, y, u, t, "heating")
    learner.finish("heating")
    with pytest.raises(ValueError, match="frozen; reset it to learn again"):
        learner.finish("heating")
    learner.reset("heating")
    assert learner.baseline("heating") is None
    assert learner.add(float(t[0]), float(y[0]), [float(u[0])], "heating") == "collected"


def test_learner_state_round_trips_through_json() -> None:
    learner = LiveBaselineLearner(learner_config())
    y, u, t = record(n=400)
    feed(learner, y, u, t, "heating")
    learner.finish("heating")
    feed(learner, y[:200], u[:200], t[:200], "cooling")
    state = json.loads(json.dumps(learner.to_state(), allow_nan=False))
    restored = LiveBaselineLearner(learner_config())
    restored.load_state(state)
    assert restored.to_state() == learner.to_state()
    feed(learner, y[200:], u[200:], t[200:], "cooling")
    feed(restored, y[200:], u[200:], t[200:], "cooling")
    assert restored.finish("cooling").fitted is not None
    assert restored.to_state() == _finish_state(learner)


def _finish_state(learner: LiveBaselineLearner) -> dict[str, Any]:
    learner.finish("cooling")
    return learner.to_state()


def test_learner_load_state_errors_name_the_path() -> None:
    learner = LiveBaselineLearner(learner_config())
    learner.add(T0, 1.0, [2.0], "heating")
    state = learner.to_state()
    bad = copy.deepcopy(state)
    bad["modes"][0]["u"] = [[1.0, 2.0]]
    with pytest.raises(CodecError, match=r"^learner\.modes\[0\]\.u\[0\]: expected 1 numbers"):
        learner.load_state(bad)
    bad = copy.deepcopy(state)
    bad["modes"][1]["mode"] = "heating"
    with pytest.raises(CodecError, match=r"^learner\.modes\[1\]\.mode: expected one of"):
        learner.load_state(bad)
    bad = copy.deepcopy(state)
    bad["modes"][0]["y"] = []
    with pytest.raises(CodecError, match=r"^learner\.modes\[0\]\.y: expected 1 numbers, got 0"):
        learner.load_state(bad)
    assert learner.to_state() == state  # nothing changed


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"span_s": 1800.0}, r"span_s=1800 s gives 31 samples at 60 s, but .* at least"),
        ({"max_samples": 100}, r"max_samples must be an integer >= 361"),
        ({"modes": (None, "heating")}, r"mode None \(no mode signal\) cannot be mixed"),
        ({"modes": ("a", "a")}, r"modes must not repeat"),
        ({"n_inputs": 2}, r"order names 1 input\(s\) but there are 2"),
    ],
)
def test_learner_config_validates(kwargs: dict[str, Any], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        learner_config(**kwargs)


def test_learner_without_modes_uses_mode_none() -> None:
    learner = LiveBaselineLearner(learner_config(modes=(None,), order=None))
    y, u, t = record(n=400)
    feed(learner, y, u, t, None)
    result = learner.finish()
    assert result.accepted and result.baseline is not None
    assert result.baseline.mode is None and result.baseline.criterion == "bic"
    assert learner.baselines().for_mode(None) is result.baseline


# --- several gap-free stretches -----------------------------------------------


def test_split_on_a_gap_free_window_is_the_default_fit() -> None:
    y, u, t = record()
    default = fit_baseline(y, u, t, sample_period_s=TS)
    split = fit_baseline(y, u, t, sample_period_s=TS, gaps="split")
    assert default.baseline is not None and split.baseline is not None
    assert split.baseline.to_dict() == default.baseline.to_dict()
    assert (split.n_stretches, split.n_short_stretches) == (1, 0)
    assert split.baseline.to_dict()["version"] == 1  # one stretch: readable by older releases


def test_split_fits_across_gaps_and_counts_short_stretches() -> None:
    y, u, t = record(n=900)
    # stretches of 300, 4 (shorter than the grid's history of 7: left out), 200, 396 samples
    keep = np.r_[0:300, 310:314, 330:530, 535:900]
    with pytest.raises(GridError, match=r"between sample 299 .* fit across the gaps with gaps="):
        fit_baseline(y[keep], u[keep], t[keep], sample_period_s=TS)
    result = fit_baseline(y[keep], u[keep], t[keep], sample_period_s=TS, gaps="split")
    assert result.accepted and result.baseline is not None
    assert (result.n_stretches, result.n_short_stretches) == (3, 1)
    b = result.baseline
    assert (b.n_stretches, b.n_samples) == (3, 300 + 200 + 365)
    assert (b.window_start_s, b.window_end_s) == (float(t[0]), float(t[899]))
    assert b.readout.gains[0] == pytest.approx(-0.02 / (1 - 0.9), rel=0.05)  # process()
    data = json.loads(json.dumps(b.to_dict()))
    assert (data["version"], data["n_stretches"]) == (2, 3)
    assert Baseline.from_dict(data).to_dict() == data


def test_split_refuses_when_every_stretch_is_too_short() -> None:
    y, u, t = record(n=400)
    keep = np.concatenate([np.arange(k, k + 5) for k in range(0, 400, 10)])
    result = fit_baseline(y[keep], u[keep], t[keep], sample_period_s=TS, gaps="split")
    assert not result.accepted and (result.n_stretches, result.n_short_stretches) == (0, 40)
    assert result.reasons[0].startswith("none of the 40 gap-free stretches of the window")


def test_split_counts_rows_not_samples_for_the_acceptance_rule() -> None:
    # 40 stretches of 8 samples: 320 samples, enough as one window, but each stretch
    # loses the grid's 7 samples of history, so the 224 estimation samples give 28 rows
    y, u, t = record(n=1300)
    keep = np.concatenate([np.arange(k, k + 8) for k in range(0, 1280, 32)])
    assert fit_baseline(y[:320], u[:320], t[:320], sample_period_s=TS).accepted
    result = fit_baseline(y[keep], u[keep], t[keep], sample_period_s=TS, gaps="split")
    assert not result.accepted and result.fitted is None
    assert result.reasons == (
        "the window holds 320 samples in 40 stretches: after 30 % held back for validation "
        "and 7 per stretch for the model's history, 28 remain to fit up to 5 parameters, but "
        "50 (10 per parameter) are needed: record a longer window",
    )


def test_split_refuses_an_unknown_gaps_option() -> None:
    y, u, t = record()
    with pytest.raises(ValueError, match=r"gaps must be one of \['refuse', 'split'\], got 'skip'"):
        fit_baseline(y, u, t, sample_period_s=TS, gaps="skip")  # type: ignore[arg-type]


# --- the learner on an air handler switching modes every 12 h -------------------

DAY = 1440  # samples at 60 s
AHU_SPAN_S = 2 * 86400.0


def ahu_days(days: int) -> tuple[NDArray[np.float64], ...]:
    """Simulate an air handler occupied 00:00-12:00 and unoccupied 12:00-24:00, every day.

    Its coil loops are two of the simulator's reference loops (invented plants): the
    first-order one while occupied, the second-order one while unoccupied.
    """
    n = days * DAY
    u = daily_operation(n, TS, seed=7)
    occupied = (np.arange(n) % DAY) < DAY // 2
    y = np.where(
        occupied,
        REFERENCE_LOOPS["first-order+dead-time"].simulate(u, seed=8),
        REFERENCE_LOOPS["second-order"].simulate(u, seed=9),
    )
    return y, u, T0 + TS * np.arange(n), occupied


def ahu_learner() -> LiveBaselineLearner:
    # as the config makes it (AssetClassConfig.learner_config): max_samples = span / Ts + 1
    return LiveBaselineLearner(
        LearnerConfig(
            sample_period_s=TS,
            span_s=AHU_SPAN_S,
            max_samples=2 * DAY + 1,
            modes=("occupied", "unoccupied"),
        )
    )


def feed_ahu(
    learner: LiveBaselineLearner, data: tuple[NDArray[np.float64], ...], lo: int, hi: int
) -> dict[str, int]:
    """Offer samples lo..hi-1; finish a mode as soon as it is ready, return when it was."""
    y, u, t, occupied = data
    ready: dict[str, int] = {}
    for k in range(lo, hi):
        mode = "occupied" if occupied[k] else "unoccupied"
        learner.add(float(t[k]), float(y[k]), [float(u[k])], mode)
        if learner.ready(mode):
            ready[mode] = k
            learner.finish(mode)
    return ready


def test_learner_gets_a_baseline_per_mode_from_daily_stretches() -> None:
    data = ahu_days(5)
    y, u, t, occupied = data
    # By construction the old rule (one uninterrupted window covering span_s) can never
    # be met: no mode runs longer than 12 h, a quarter of the span, and one gap-free
    # window is all fit_baseline takes by default.
    longest_s = (DAY // 2 - 1) * TS
    assert longest_s < AHU_SPAN_S / 4
    with pytest.raises(GridError, match="gap of 43260 s"):
        fit_baseline(y[occupied], u[occupied], t[occupied], sample_period_s=TS)
    learner = ahu_learner()
    ready = feed_ahu(learner, data, 0, 5 * DAY)
    # max_samples (2 days + 1 sample, as the config sets it) fills first: four 12 h
    # stretches hold 2880 samples, so a mode is ready at the first sample of its fifth
    # stretch, day 4 for occupied, day 4.5 for unoccupied; that lone sample gives no
    # regression row and is left out
    assert ready == {"occupied": 4 * DAY, "unoccupied": 4 * DAY + DAY // 2}
    for mode in ("occupied", "unoccupied"):
        b = learner.baseline(mode)
        assert b is not None and (b.n_stretches, b.n_samples) == (4, 2 * DAY)
        # Source: REFERENCE_LOOPS, both coil loops have a gain of -0.11 degC/%
        assert b.readout.gains[0] == pytest.approx(-0.11, rel=0.05)
    occupied_b = learner.baseline("occupied")
    assert occupied_b is not None and occupied_b.window_start_s == float(t[0])
    assert occupied_b.window_end_s == float(t[3 * DAY + DAY // 2 - 1])


def test_learner_checkpoint_mid_collection_round_trips() -> None:
    data = ahu_days(5)
    learner = ahu_learner()
    feed_ahu(learner, data, 0, 2 * DAY + 300)  # two and a half stretches per mode so far
    state = json.loads(json.dumps(learner.to_state(), allow_nan=False))
    assert state["version"] == 2
    restored = ahu_learner()
    restored.load_state(state)
    assert restored.to_state() == state
    for mode in ("occupied", "unoccupied"):
        assert restored.coverage_s(mode) == learner.coverage_s(mode)
    assert feed_ahu(restored, data, 2 * DAY + 300, 5 * DAY) == feed_ahu(
        learner, data, 2 * DAY + 300, 5 * DAY
    )
    assert restored.baselines().to_dict() == learner.baselines().to_dict()


def test_learner_reads_version_1_state() -> None:
    # Version 1 states never held a gap (a gap restarted the window): read as one stretch.
    learner = LiveBaselineLearner(learner_config())
    y, u, t = record(n=400)
    feed(learner, y[:200], u[:200], t[:200], "cooling")
    state = learner.to_state()
    restored = LiveBaselineLearner(learner_config())
    restored.load_state({**state, "version": 1})
    assert restored.coverage_s("cooling") == learner.coverage_s("cooling") == 199 * TS
    with pytest.raises(CodecError, match=r"^learner\.version: this build reads versions 1 and 2"):
        restored.load_state({**state, "version": 3})
