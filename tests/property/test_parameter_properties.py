"""The Wald tests give each row the same bits alone or in a batch."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.estimators.arx import ArxOrder
from arxwatch.estimators.detect.parameter import (
    FeatureDrift,
    FeatureDriftConfig,
    wald_distance,
    wald_distances,
)

ORDER = ArxOrder(na=2, nb=(2,), nk=(1,))


@settings(max_examples=60, deadline=None)
@given(st.integers(1, 7), st.integers(0, 2**32 - 1))
def test_batched_distances_equal_single_ones(rows: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    delta = rng.normal(size=(rows, 4))
    root = rng.normal(size=(rows, 4, 4))
    cov = root @ root.transpose(0, 2, 1)
    cov[0, :, 3] = cov[0, 3, :] = 0.0  # one singular covariance
    d2, rank = wald_distances(delta, cov)
    for r in range(rows):
        assert wald_distance(delta[r], cov[r]) == (d2[r], rank[r])


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 6), st.integers(0, 2**32 - 1))
def test_feature_drift_judges_each_row_as_the_scalar_update(rows: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    config = FeatureDriftConfig(ORDER, 60.0, every=1)
    base = np.array([-1.2, 0.36, 0.05, 0.03, 0.4])
    thetas = base + 0.02 * rng.normal(size=(rows, 5))
    thetas[0, :2] = [-2.0, 1.0]  # an integrating model: undefined features
    scale = rng.uniform(1e-6, 1e-3, size=rows)
    covs = np.stack([np.eye(5) * s for s in scale])
    batch = FeatureDrift(config)
    x0, c0 = batch.project(np.repeat(base[None], rows, 0), np.repeat(covs[:1], rows, 0))
    x, cx = batch.project(thetas, covs)
    judged = batch.judge(x0, c0, x, cx)
    for r in range(rows):
        alone = FeatureDrift(config)
        alone.set_baseline(base, covs[0])
        assert alone.update(thetas[r], covs[r]) == judged[r]
