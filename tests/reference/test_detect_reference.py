"""Reference checks of the detectors against published tables, scipy and statsmodels.

Each check names its source in a comment. Monte Carlo checks use seeded
streams and allow 4 standard errors computed from the simulated sample:
common practice, no source.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy.stats import chi2
from statsmodels.stats.diagnostic import acorr_ljungbox  # type: ignore[import-untyped]

from arxwatch.estimators.detect import (
    Cusum,
    CusumConfig,
    ParameterDrift,
    ParameterDriftConfig,
    VarianceChange,
    VarianceConfig,
    Whiteness,
    WhitenessConfig,
    ljung_box,
    wald_distance,
)


def cusum_run_lengths(
    z: NDArray[np.float64], k: float, h: float
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.int64]]:
    """Vectorised two-sided tabular CUSUM over streams z[:, t] from zero.

    Returns, per stream, the 1-based index of the first sample at which the
    two-sided scheme, the upper side alone and the lower side alone signal
    (0 where the stream ended first). The sides do not interact, so the
    two-sided run length is the smaller of the one-sided ones.
    """
    m, n = z.shape
    c_plus = np.zeros(m)
    c_minus = np.zeros(m)
    first_plus = np.zeros(m, dtype=np.int64)
    first_minus = np.zeros(m, dtype=np.int64)
    for t in range(n):
        c_plus = np.maximum(0.0, c_plus + z[:, t] - k)
        c_minus = np.maximum(0.0, c_minus - z[:, t] - k)
        first_plus[(first_plus == 0) & (c_plus >= h)] = t + 1
        first_minus[(first_minus == 0) & (c_minus >= h)] = t + 1
    both = np.where(
        (first_plus > 0) & (first_minus > 0),
        np.minimum(first_plus, first_minus),
        np.maximum(first_plus, first_minus),
    )
    return both, first_plus, first_minus


def two_sided_arl_mc(k: float, h: float, shift: float, m: int, seed: int) -> NDArray[np.int64]:
    """Run lengths of m streams N(shift, 1) until each signals (active set shrinks)."""
    rng = np.random.default_rng(seed)
    c_plus = np.zeros(m)
    c_minus = np.zeros(m)
    active = np.arange(m)
    out = np.zeros(m, dtype=np.int64)
    t = 0
    while active.size:
        t += 1
        z = rng.standard_normal(active.size) + shift
        c_plus = np.maximum(0.0, c_plus + z - k)
        c_minus = np.maximum(0.0, c_minus - z - k)
        hit = (c_plus >= h) | (c_minus >= h)
        out[active[hit]] = t
        keep = ~hit
        active, c_plus, c_minus = active[keep], c_plus[keep], c_minus[keep]
    return out


def test_vectorised_recursion_equals_the_class_on_identical_streams() -> None:
    # The Monte Carlo below uses the vectorised recursion; this ties it to Cusum.
    rng = np.random.default_rng(100)
    z = rng.standard_normal((200, 600)) + 0.5
    both, _, _ = cusum_run_lengths(z, 0.5, 4.0)
    for i in range(z.shape[0]):
        det = Cusum(CusumConfig(k=0.5, h=4.0))
        first = next((t + 1 for t in range(z.shape[1]) if det.update(float(z[i, t])).alarm), 0)
        assert first == both[i]


# D. C. Montgomery, Introduction to Statistical Quality Control, 6th ed., 2009,
# table 9.3 "ARL performance of the tabular CUSUM with k = 1/2 and h = 4 or
# h = 5" (values from memory): h = 4: ARL0 = 168, ARL(1 sigma) = 8.38;
# h = 5: ARL0 = 465, ARL(1 sigma) = 10.4.
#
# Which scheme do they describe? Siegmund's approximation for one side,
# ARL = (exp(-2 D b) + 2 D b - 1) / (2 D^2) with D = shift - k and
# b = h + 1.166 (Siegmund, Sequential Analysis, 1985; as quoted by
# Montgomery, from memory), gives one-sided ARL0 = 338 (h = 4) and 938 (h = 5):
# twice the tabulated 168 and 465. By the Lucas-Crosier relation
# 1/ARL_two = 1/ARL_plus + 1/ARL_minus (J. M. Lucas and R. B. Crosier, Fast
# initial response for CUSUM quality-control schemes, Technometrics 24 (1982),
# 199-205), two equal sides halve it, so the table's ARL0 is that of the
# two-sided scheme. Under a 1-sigma shift the lower side almost never
# signals and two-sided ARL = one-sided ARL = 10.3 (Siegmund), matching 10.4.
# Hence the class (two-sided) is checked against the table as printed.
MONTGOMERY_TWO_SIDED_ARL = [
    (4.0, 0.0, 168.0),
    (4.0, 1.0, 8.38),
    (5.0, 0.0, 465.0),
    (5.0, 1.0, 10.4),
]


@pytest.mark.parametrize(("h", "shift", "arl"), MONTGOMERY_TWO_SIDED_ARL)
def test_two_sided_cusum_arl_matches_montgomery_table(h: float, shift: float, arl: float) -> None:
    run_lengths = two_sided_arl_mc(0.5, h, shift, m=20000, seed=int(10 * h + shift))
    se = float(run_lengths.std(ddof=1)) / math.sqrt(run_lengths.size)
    # 4 SE of Monte Carlo error plus half a unit in the table's third digit.
    assert abs(float(run_lengths.mean()) - arl) <= 4.0 * se + 0.005 * arl


def renewal_arl(config: CusumConfig, z: NDArray[np.float64]) -> tuple[float, float]:
    """Mean gap between alarms of the restarting class on one stream, and its SE."""
    det = Cusum(config)
    alarms = [t for t, v in enumerate(z.tolist()) if det.update(v).alarm]
    gaps = np.diff(np.array([-1, *alarms]))
    return float(gaps.mean()), float(gaps.std(ddof=1)) / math.sqrt(gaps.size)


def test_class_arl_under_one_sigma_shift_by_renewal_after_restart() -> None:
    # With after_alarm="restart" both sides return to zero at a signal, so the
    # gaps between alarms on one long stream are independent run lengths.
    # Source: Montgomery (2009), table 9.3, h = 5, 1 sigma: ARL = 10.4 (from memory).
    rng = np.random.default_rng(7)
    arl, se = renewal_arl(CusumConfig(), rng.standard_normal(60000) + 1.0)
    assert abs(arl - 10.4) <= 4.0 * se + 0.05


def noise_levels(det: Cusum, z: NDArray[np.float64]) -> NDArray[np.float64]:
    """Return the CUSUM's successive-difference noise level after each of ``z``."""
    levels = np.empty(z.shape[0])
    for t, v in enumerate(z.tolist()):
        det.update(v)
        levels[t] = det.to_state()["noise"]
    return levels


def test_noise_level_is_an_exponentially_weighted_mean_of_half_squared_differences() -> None:
    # v_k = (1 - lam) v_{k-1} + lam (z_k - z_{k-1})^2 / 2 from v_0 = 1, the first
    # sample having no difference: a first-order recursive filter, computed
    # here by scipy.signal.lfilter as the oracle.
    from scipy.signal import lfilter

    lam = 0.02
    z = np.random.default_rng(40).standard_normal(3000) * 1.7
    half_sq = 0.5 * np.diff(z) ** 2
    expected, _ = lfilter([lam], [1.0, -(1.0 - lam)], half_sq, zi=[1.0 - lam])
    levels = noise_levels(Cusum(CusumConfig(noise_lam=lam)), z)
    assert levels[0] == 1.0
    np.testing.assert_allclose(levels[1:], expected, rtol=1e-12)


def test_noise_level_tends_to_the_variance_of_white_data() -> None:
    # J. von Neumann et al., The mean square successive difference, Ann. Math.
    # Statist. 12 (1941): for independent z of variance s^2, E[(z_k - z_{k-1})^2]
    # = 2 s^2, so the level's mean is s^2 (here 4). A mean shift cancels in
    # the differences: a stream that steps up by 1.5 sigma halfway has the same. Error:
    # 4 standard errors of 40 batch means (common practice, no source).
    rng = np.random.default_rng(41)
    z = 2.0 * rng.standard_normal(200_000)
    step = np.where(np.arange(z.size) >= z.size // 2, 3.0, 0.0)
    for shifted in (z, z + step):
        levels = noise_levels(Cusum(CusumConfig(noise_lam=0.02)), shifted)[1000:]
        batches = levels[: levels.size // 40 * 40].reshape(40, -1).mean(axis=1)
        se = float(batches.std(ddof=1)) / math.sqrt(batches.size)
        assert abs(float(levels.mean()) - 4.0) <= 4.0 * se


def test_noise_scaling_keeps_the_tabulated_in_control_arl_as_a_floor() -> None:
    # Dividing by max(1, level) only widens the scheme: on N(0, 1) data its
    # in-control ARL is at least Montgomery's 465 (table 9.3, h = 5, from memory).
    z = np.random.default_rng(42).standard_normal(400_000)
    arl, se = renewal_arl(CusumConfig(h=5.0, noise_lam=0.02), z)
    assert arl >= 465.0 - 4.0 * se


def test_noise_scaling_restores_the_tabulated_arls_on_a_noisier_stream() -> None:
    # On N(0, 2^2) data the scheme sees z / 2 once the level has settled:
    # a shift of one (new) sigma, 2.0, is signalled after about Montgomery's
    # 10.4 samples (table 9.3, h = 5, from memory); the plain scheme would
    # take about 4. Without a shift the scaled scheme signals far less often
    # than the plain one (ARL about 14 on this stream); it stays below the
    # table's 465 because the level's own error (about 17 % with lam = 0.02)
    # narrows it half the time: two-thirds of 465 is our bound, no source.
    rng = np.random.default_rng(43)
    scaled = CusumConfig(h=5.0, noise_lam=0.02)
    arl, se = renewal_arl(scaled, 2.0 * rng.standard_normal(60_000) + 2.0)
    assert abs(arl - 10.4) <= 4.0 * se + 0.05
    arl, se = renewal_arl(scaled, 2.0 * rng.standard_normal(400_000))
    assert arl >= 2.0 / 3.0 * 465.0 - 4.0 * se


def test_one_sided_arl0_is_twice_the_tabulated_two_sided() -> None:
    # Lucas and Crosier (1982): 1/ARL_two = 1/ARL_plus + 1/ARL_minus; by
    # symmetry ARL_plus = ARL_minus, so the one-sided ARL0 for h = 4 should be
    # 2 * 168 = 336 (Montgomery 2009, table 9.3, from memory; Siegmund's
    # approximation, from memory, gives 338).
    rng = np.random.default_rng(11)
    _, plus, minus = cusum_run_lengths(rng.standard_normal((4000, 4000)), 0.5, 4.0)
    # P(no signal within 4000 samples) ~ exp(-4000 / 336) ~ 7e-6: all finish.
    assert (plus > 0).all() and (minus > 0).all()
    one_sided = np.concatenate((plus, minus))
    se = float(one_sided.std(ddof=1)) / math.sqrt(one_sided.size)
    assert abs(float(one_sided.mean()) - 336.0) <= 4.0 * se + 0.005 * 336.0


@pytest.mark.parametrize("alpha", [0.05, 0.01, 0.001])
def test_thresholds_equal_scipy_chi2_ppf(alpha: float) -> None:
    # Source: scipy.stats.chi2.ppf, the chi-square quantile function.
    lam = 0.1
    nu = (2.0 - lam) / lam
    variance = VarianceConfig(lam=lam, alpha=alpha)
    assert variance.upper_limit == chi2.ppf(1.0 - alpha, nu) / nu
    assert variance.lower_limit == chi2.ppf(alpha, nu) / nu
    assert WhitenessConfig(lags=7, alpha=alpha).threshold == chi2.ppf(1.0 - alpha, 7)
    det = ParameterDrift(ParameterDriftConfig(alpha=alpha))
    det.set_baseline(np.zeros(4), np.eye(4))
    ev = det.update(np.ones(4), np.eye(4))
    assert ev is not None and ev.threshold == chi2.ppf(1.0 - alpha, 4)
    assert ev.values["p_value"] == chi2.sf(2.0, 4)


def test_ewmv_moments_and_tail_of_the_chi_square_approximation() -> None:
    # Source: MacGregor and Harris (1993): stationary E[S] = 1 and
    # Var[S] = 2 lambda / (2 - lambda) for N(0, 1) innovations (closed form
    # of an EWMA of iid chi-square(1) terms), S ~ chi2(nu)/nu approximately.
    lam, alpha, m = 0.05, 0.01, 20000
    rng = np.random.default_rng(3)
    s = np.ones(m)
    for _ in range(600):  # (1 - lam)^600 ~ 4e-14: the start is forgotten
        s = (1.0 - lam) * s + lam * rng.standard_normal(m) ** 2
    assert abs(float(s.mean()) - 1.0) <= 4.0 * math.sqrt(2.0 * lam / (2.0 - lam) / m)
    assert float(s.var()) == pytest.approx(2.0 * lam / (2.0 - lam), rel=0.05)
    # The approximation is a two-moment fit, so only rough in the tail: at
    # alpha = 0.01 the stationary exceedance lies within a factor 1.5.
    exceed = float((s >= VarianceConfig(lam=lam, alpha=alpha).upper_limit).mean())
    assert alpha / 1.5 < exceed < 1.5 * alpha
    # The class runs the same recursion.
    det = VarianceChange(VarianceConfig(lam=lam))
    z = rng.standard_normal(50)
    ref = 1.0
    for v in z:
        ref = (1.0 - lam) * ref + lam * float(v) ** 2
        assert det.update(float(v)).statistic == pytest.approx(ref, rel=1e-14)


@pytest.mark.parametrize(("seed", "n", "lags"), [(1, 240, 10), (2, 100, 3), (3, 500, 24)])
def test_ljung_box_equals_statsmodels(seed: int, n: int, lags: int) -> None:
    # Source: statsmodels.stats.diagnostic.acorr_ljungbox (Ljung and Box 1978).
    rng = np.random.default_rng(seed)
    e = rng.standard_normal(n + 1)
    x = e[1:] + 0.3 * e[:-1] + 0.7  # MA(1) with a mean: demeaning matters
    table = acorr_ljungbox(x, lags=[lags])
    q_ref = float(table["lb_stat"].iloc[0])
    p_ref = float(table["lb_pvalue"].iloc[0])
    assert ljung_box(x, lags) == pytest.approx(q_ref, rel=1e-10, abs=1e-10)
    det = Whiteness(WhitenessConfig(window=n, lags=lags))
    for v in rng.standard_normal(n):  # one whole block before: the sums must restart cleanly
        det.update(float(v))
    ev = None
    for v in x:
        ev = det.update(float(v))
    assert ev is not None
    # Running sums instead of the demeaned series: rounding differs slightly.
    assert ev.statistic == pytest.approx(q_ref, rel=1e-9, abs=1e-10)
    assert ev.values["p_value"] == pytest.approx(p_ref, rel=1e-7, abs=1e-12)


def test_a_block_cut_short_by_its_period_equals_statsmodels_with_its_own_n() -> None:
    # Source: statsmodels.stats.diagnostic.acorr_ljungbox on the samples the
    # block holds: a block its period cut short is tested with its own n.
    rng = np.random.default_rng(5)
    e = rng.standard_normal(171)
    x = e[1:] + 0.4 * e[:-1]
    det = Whiteness(WhitenessConfig(window=240, lags=6))
    det.enter_period(0)
    for v in x:
        assert det.update(float(v)) is None
    ev = det.enter_period(1)
    assert ev is not None and ev.values["samples"] == 170.0
    table = acorr_ljungbox(x, lags=[6])
    assert ev.statistic == pytest.approx(float(table["lb_stat"].iloc[0]), rel=1e-9)
    assert ev.values["p_value"] == pytest.approx(float(table["lb_pvalue"].iloc[0]), rel=1e-7)


def test_wald_distance_equals_direct_numpy() -> None:
    # Source: the definition d2 = delta' S^-1 delta, computed by numpy.linalg.solve.
    rng = np.random.default_rng(4)
    a = rng.standard_normal((5, 5))
    s = a @ a.T + 0.1 * np.eye(5)
    delta = rng.standard_normal(5)
    d2, rank = wald_distance(delta, s)
    assert rank == 5
    assert d2 == pytest.approx(float(delta @ np.linalg.solve(s, delta)), rel=1e-10)
    # Singular S: numpy.linalg.pinv with the same cut-off, on S in units of
    # each entry's spread (D^-1/2 S D^-1/2, the module notes) ...
    b = rng.standard_normal((5, 3))
    s_low = b @ b.T
    d2, rank = wald_distance(delta, s_low)
    assert rank == 3
    spread = np.sqrt(np.diag(s_low))
    unit = s_low / np.outer(spread, spread)
    z = delta / spread
    assert d2 == pytest.approx(float(z @ np.linalg.pinv(unit, rcond=1e-10) @ z), rel=1e-8)
    # ... which for a difference in the range of S is delta' S^+ delta, as
    # any generalized inverse gives (Rao and Mitra 1971, quadratic forms).
    in_range = s_low @ rng.standard_normal(5)
    d2, rank = wald_distance(in_range, s_low)
    expected = float(in_range @ np.linalg.pinv(s_low, rcond=1e-10) @ in_range)
    assert d2 == pytest.approx(expected, rel=1e-8)


def test_false_alarm_rate_is_alpha_for_a_linear_gaussian_model() -> None:
    # Source: for OLS with known noise sigma, theta_hat ~ N(theta, sigma^2
    # (X'X)^-1) exactly (e.g. Casella and Berger, Statistical Inference,
    # 2nd ed., 2002, section 11.3); two independent fits give a difference
    # with covariance the sum, and d2 ~ chi2(p): the alarm rate is alpha.
    rng = np.random.default_rng(5)
    n, p, sigma, alpha, trials = 60, 3, 0.5, 0.05, 4000
    theta = np.array([1.0, -0.5, 0.25])
    alarms = 0
    for _ in range(trials):
        fits = []
        for _ in range(2):
            x = rng.standard_normal((n, p))
            y = x @ theta + sigma * rng.standard_normal(n)
            xtx = x.T @ x
            fits.append((np.linalg.solve(xtx, x.T @ y), sigma**2 * np.linalg.inv(xtx)))
        det = ParameterDrift(ParameterDriftConfig(alpha=alpha, every=1))
        det.set_baseline(*fits[0])
        ev = det.update(*fits[1])
        assert ev is not None
        alarms += ev.alarm
    rate = alarms / trials
    assert abs(rate - alpha) <= 4.0 * math.sqrt(alpha * (1.0 - alpha) / trials)
