"""AR prewhitening of correlated residuals."""

import json

import numpy as np
import pytest
from statsmodels.regression.linear_model import yule_walker

from arxwatch.estimators.detect.prewhiten import PrewhitenConfig, Prewhitener


def test_coefficients_match_statsmodels_yule_walker() -> None:
    # statsmodels yule_walker(method="mle") uses the same biased (1/n)
    # autocovariances with the mean removed.
    rng = np.random.default_rng(1)
    v = rng.normal(size=5000)
    x = v[2:] - 0.6 * v[1:-1] + 0.3 * v[:-2]
    f = Prewhitener(PrewhitenConfig(ar_order=4, reference_samples=len(x)))
    for value in x:
        f.update(float(value))
    rho, sigma = yule_walker(x, order=4, method="mle", result_object=False)
    state = f.to_state()
    np.testing.assert_allclose(state["phi"], rho, rtol=1e-10)
    assert state["scale"] == pytest.approx(sigma, rel=1e-10)


def test_output_is_white_and_unit_variance_under_the_reference() -> None:
    rng = np.random.default_rng(2)
    v = rng.normal(size=20_000)
    z = v[1:] - 0.7 * v[:-1]
    f = Prewhitener(PrewhitenConfig(ar_order=8, reference_samples=5000))
    out = np.array([e for e in (f.update(float(x)) for x in z) if e is not None])
    assert abs(out.var() - 1.0) < 0.05
    assert abs(np.corrcoef(out[1:], out[:-1])[0, 1]) < 0.05


def test_state_round_trip_and_errors() -> None:
    cfg = PrewhitenConfig(ar_order=2, reference_samples=50)
    a = Prewhitener(cfg)
    rng = np.random.default_rng(3)
    for x in rng.normal(size=70):
        a.update(float(x))
    b = Prewhitener(cfg)
    b.load_state(json.loads(json.dumps(a.to_state())))
    tail = rng.normal(size=20).tolist()
    assert [a.update(x) for x in tail] == [b.update(x) for x in tail]
    assert not a.clone().fitted
    with pytest.raises(ValueError, match="reference_samples must exceed"):
        PrewhitenConfig(ar_order=6, reference_samples=30)
    with pytest.raises(ValueError, match="z must be finite"):
        a.update(float("nan"))
    with pytest.raises(ValueError, match="sums has 4 entries, order 3 needs 5"):
        Prewhitener(PrewhitenConfig(ar_order=3, reference_samples=50)).load_state(a.to_state())
    with pytest.raises(ValueError, match="state version must be 2, got None"):
        b.load_state({"phi": None})


def test_mid_reference_round_trip_matches_uninterrupted_run() -> None:
    # Checkpoint while the reference is still being collected: the sums,
    # head and past must carry the whole reference forward.
    cfg = PrewhitenConfig(ar_order=3, reference_samples=60)
    rng = np.random.default_rng(4)
    data = rng.normal(size=100).tolist()
    whole = Prewhitener(cfg)
    expected = [whole.update(x) for x in data]
    first = Prewhitener(cfg)
    for x in data[:25]:
        first.update(x)
    second = Prewhitener(cfg)
    second.load_state(json.loads(json.dumps(first.to_state())))
    assert [second.update(x) for x in data[25:]] == expected[25:]
