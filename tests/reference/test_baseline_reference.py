"""Reference checks of commissioning baselines against a known process and statsmodels.

Each check names its source in a comment. The simulated process (gain, time
constant, dead time, noise level, valve moves, record length) is typical of a
cooling coil's discharge air temperature against its valve: common practice,
no source.
"""

# Test names say what each check is; docstrings would only repeat them.

from __future__ import annotations

import math

import numpy as np
import pytest
import statsmodels.api as sm  # type: ignore[import-untyped]
from numpy.typing import NDArray
from scipy import stats
from scipy.signal import lfilter

from arxwatch.estimators.arx import regression_matrix
from arxwatch.estimators.baseline import Baseline, fit_baseline
from arxwatch.estimators.identify import split_series

TS = 60.0  # s
GAIN = -0.25  # degC per % valve
TAU_S = 900.0
DELAY_SAMPLES = 2  # pure transport delay, whole samples
NOISE_SD = 0.03  # degC
OFFSET = 14.0  # degC, the ARX constant c
N_SAMPLES = 1440  # one day at 60 s
BURN_IN = 200
T0 = 1_700_000_000.0

# Significance level of each statistical check: common practice, no source.
ALPHA = 0.001


def simulate(seed: int) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """First-order-plus-dead-time process under zero-order hold, with equation noise.

    Source: K. J. Åström and B. Wittenmark, Computer-Controlled Systems, 3rd ed.,
    1997, chapter 2: K e^{-sL} / (tau s + 1) sampled with a zero-order hold and
    L = d Ts gives y(k) = a y(k-1) + b u(k-d-1) with a = exp(-Ts/tau) and
    b = K (1 - a), i.e. an ARX model with nk = d + 1 (Ljung 1999, section 4.2).
    """
    rng = np.random.default_rng(seed)
    n = N_SAMPLES + BURN_IN
    holds = rng.integers(5, 30, size=n)
    levels = rng.uniform(10.0, 90.0, size=n)
    u = np.repeat(levels, holds)[:n]
    a = math.exp(-TS / TAU_S)
    b = GAIN * (1.0 - a)
    numerator = np.zeros(DELAY_SAMPLES + 2)
    numerator[-1] = b
    noise = NOISE_SD * rng.standard_normal(n)
    y = lfilter(numerator, [1.0, -a], u) + lfilter([1.0], [1.0, -a], noise + OFFSET)
    t = T0 + TS * np.arange(n)
    return (
        np.asarray(y[BURN_IN:], dtype=np.float64),
        np.asarray(u[BURN_IN:], dtype=np.float64),
        np.asarray(t[BURN_IN:], dtype=np.float64),
    )


@pytest.fixture(scope="module")
def baseline() -> Baseline:
    y, u, t = simulate(seed=11)
    result = fit_baseline(y, u, t, sample_period_s=TS)
    assert result.accepted, result.reasons
    assert result.baseline is not None
    return result.baseline


def test_recovers_gain_and_time_constant_within_five_standard_errors(baseline: Baseline) -> None:
    # Source: delta method, Cov(f) = J Cov(theta) J' (G. Casella and R. L. Berger,
    # Statistical Inference, 2nd ed., 2002, section 5.5.4); true values from the
    # zero-order-hold map above. Five standard errors: common practice, no source.
    features = baseline.features()
    se = np.sqrt(np.diag(baseline.feature_covariance()))
    assert abs(features[0] - GAIN) < 5.0 * se[0]
    assert abs(features[1] - TAU_S) < 5.0 * se[1]
    assert se[0] < 0.05 * abs(GAIN)  # the check above is not vacuous


def test_recovers_dead_time_exactly(baseline: Baseline) -> None:
    # Source: Åström and Wittenmark 1997, chapter 2: a delay of d whole samples
    # under zero-order hold gives nk = d + 1, read out as nk * Ts (a first-order
    # model, so the two-point reading of its step response is exact whatever
    # the fitted a and b; Smith's rule, see test_readout_reference.py).
    assert baseline.order.nk == (DELAY_SAMPLES + 1,)
    assert baseline.readout.dead_times_s == pytest.approx(((DELAY_SAMPLES + 1) * TS,), rel=1e-12)


def test_covariance_equals_statsmodels_ols_cov_params(baseline: Baseline) -> None:
    # Source: statsmodels OLS on the same regression: params, cov_params() =
    # scale (X'X)^-1 with scale = RSS / (N - n) (Ljung 1999, section 7.3).
    y, u, _ = simulate(seed=11)
    y_est, u_est, _, _ = split_series(y, u, 0.3)
    phi, target = regression_matrix(baseline.order, y_est, u_est)
    ref = sm.OLS(target, phi).fit()
    np.testing.assert_allclose(baseline.theta, ref.params, rtol=1e-9)
    np.testing.assert_allclose(baseline.covariance, ref.cov_params(), rtol=1e-8, atol=1e-18)
    assert baseline.sigma2 == pytest.approx(ref.scale, rel=1e-10)


def test_residual_on_fresh_data_is_standard_normal(baseline: Baseline) -> None:
    y, u, _ = simulate(seed=12)
    phi, target = regression_matrix(baseline.order, y, u)
    z = np.array(
        [baseline.residual(row.tolist(), float(v))[1] for row, v in zip(phi, target, strict=True)]
    )
    m = z.shape[0]
    # Mean: two-sided normal test at ALPHA. The estimation error of theta0 is
    # shared by every fresh sample, so the mean of z has variance
    # 1/M + mbar' Cov(theta0) mbar / sigma2 (mbar the mean regressor), not
    # 1/M (Ljung 1999, chapter 9: the covariance of the estimate carried into
    # the predictions).
    mbar = phi.mean(axis=0)
    sd_mean = math.sqrt(1.0 / m + float(mbar @ baseline.covariance @ mbar) / baseline.sigma2)
    assert abs(z.mean()) < stats.norm.ppf(1.0 - ALPHA / 2.0) * sd_mean
    # Variance: mean(z^2) is the ratio of a fresh chi-square variance estimate
    # (M degrees of freedom) to the baseline's sigma2 (N_est - n degrees of
    # freedom), so it follows F(M, N_est - n); two-sided test at ALPHA.
    # Source: G. Casella and R. L. Berger, Statistical Inference, 2nd ed., 2002,
    # section 5.3.2 (the F distribution of a ratio of variance estimates).
    dof = round(0.7 * N_SAMPLES) - baseline.order.depth - baseline.order.n_params
    low = stats.f.ppf(ALPHA / 2.0, m, dof)
    high = stats.f.ppf(1.0 - ALPHA / 2.0, m, dof)
    assert low < float(np.mean(z**2)) < high


def test_residual_matches_statsmodels_prediction(baseline: Baseline) -> None:
    # Source: statsmodels OLSResults.predict on the same regressors.
    y, u, _ = simulate(seed=11)
    y_est, u_est, _, _ = split_series(y, u, 0.3)
    phi, target = regression_matrix(baseline.order, y_est, u_est)
    ref = sm.OLS(target, phi).fit()
    y_fresh, u_fresh, _ = simulate(seed=13)
    fresh_phi, fresh_target = regression_matrix(baseline.order, y_fresh[:60], u_fresh[:60])
    expected = fresh_target - ref.predict(fresh_phi)
    got = [
        baseline.residual(row.tolist(), float(v))[0]
        for row, v in zip(fresh_phi, fresh_target, strict=True)
    ]
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-9)
