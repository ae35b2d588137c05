"""Vertex codes and the additive (hypercube) R^2 of state log-rates."""

import numpy as np
import pytest
from sklearn.linear_model import LinearRegression
from sklearn.metrics import r2_score

from attractorfit.errors import InputError
from attractorfit.latent import LatentModel
from attractorfit.states._vertices import (assign_vertex_codes, codes_from_feature_model,
                                           codes_to_text, cube_r2, hypercube_vertices)


def _additive_states(k, s, n_units=30, seed=0):
    rng = np.random.default_rng(seed)
    codes = hypercube_vertices(k)[rng.choice(2 ** k, size=s, replace=False)]
    effects = 0.5 * rng.standard_normal((k, n_units))
    base = rng.uniform(0.5, 3.0, n_units)
    return np.exp(base + codes @ effects), codes


def _same_up_to_axes(found, true):
    # each found axis equals one true axis up to sign, and the map is one-to-one
    m = np.abs(found.T @ true) / found.shape[0]
    return np.allclose(np.sort(m.max(axis=1)), 1.0) and len(set(m.argmax(axis=1))) == true.shape[1]


@pytest.mark.parametrize("k,s", [(1, 2), (2, 3), (2, 4), (3, 6), (3, 8), (4, 11)])
def test_additive_states_recovered(k, s):
    rates, true = _additive_states(k, s, seed=k * 10 + s)
    vc = assign_vertex_codes(rates, rng=0)
    assert vc.n_dims == k
    assert vc.cube_r2 == pytest.approx(1.0, abs=1e-10)
    if s == 2 ** k:
        # a full cube is identified up to its symmetries (axis permutation and sign);
        # a partial one may have other exact (affinely equivalent) codings
        assert _same_up_to_axes(vc.codes, true)
    assert len({tuple(r) for r in vc.codes}) == s
    assert vc.exhaustive == (k <= 3)


def test_non_additive_rates_below_one():
    rng = np.random.default_rng(1)
    for s in (4, 6, 8):
        vc = assign_vertex_codes(rng.uniform(1.0, 20.0, (s, 40)), rng=0)
        assert vc.cube_r2 < 0.95


def test_cube_r2_against_sklearn():
    # outside check: scikit-learn least squares with an intercept per unit, R^2 pooled
    # over units ("variance_weighted" = 1 - sum SS_res / sum SS_tot); tolerance 1e-10
    rng = np.random.default_rng(2)
    rates = rng.uniform(0.5, 10.0, (6, 15))
    codes = hypercube_vertices(3)[[0, 1, 2, 4, 6, 7]]
    logr = np.log(rates)
    pred = LinearRegression().fit(codes, logr).predict(codes)
    ref = r2_score(logr, pred, multioutput="variance_weighted")
    assert cube_r2(rates, codes) == pytest.approx(ref, abs=1e-10)


def test_orientation_and_text():
    rates, true = _additive_states(2, 4, seed=3)
    vc = assign_vertex_codes(rates)
    # +1 is the side with the higher mean log-rate; axes ordered by effect size
    assert np.all(vc.axis_effects.mean(axis=1) > 0)
    norms = np.linalg.norm(vc.axis_effects, axis=1)
    assert norms[0] >= norms[1]
    assert vc.text() == codes_to_text(vc.codes)
    assert codes_to_text(np.array([[1, -1, 1], [-1, -1, -1]])) == ["HLH", "LLL"]


def test_one_state_and_forced_dims():
    vc = assign_vertex_codes(np.array([[1.0, 2.0, 3.0]]))
    assert vc.codes.tolist() == [[1]]
    vc = assign_vertex_codes(np.random.default_rng(0).uniform(1, 5, (3, 10)), n_dims=3)
    assert vc.codes.shape == (3, 3)
    assert vc.cube_r2 == pytest.approx(1.0)  # S <= K + 1: exact by counting


def test_codes_in_latent_space():
    rng = np.random.default_rng(4)
    true_rates, _ = _additive_states(2, 4, n_units=12, seed=5)
    seqs = []
    for _ in range(20):
        st = rng.integers(4, size=40)
        seqs.append(np.sqrt(rng.poisson(true_rates[st])))
    latent = LatentModel(n_dims=3).fit(seqs).result_
    vc = assign_vertex_codes(true_rates, latent=latent)
    assert vc.space == "latent"
    assert vc.axis_effects.shape == (2, 3)
    assert len({tuple(r) for r in vc.codes}) == 4


class _FakeFeatureModel:
    def __init__(self):
        self.codes_ = hypercube_vertices(2)
        self.rates_ = np.exp(0.3 + self.codes_ @ np.array([[0.5, -0.2, 0.1], [0.3, 0.4, -0.6]]))


def test_codes_from_feature_model():
    vc = codes_from_feature_model(_FakeFeatureModel())
    assert vc.space == "feature_model"
    assert vc.cube_r2 == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(vc.axis_effects, [[0.5, -0.2, 0.1], [0.3, 0.4, -0.6]],
                               atol=1e-12)


def test_errors():
    with pytest.raises(InputError, match="state_rates: expected rates >= 0"):
        assign_vertex_codes(np.array([[1.0, -1.0], [2.0, 2.0]]))
    with pytest.raises(InputError, match="state_rates: expected rates >= 0"):
        cube_r2(np.array([[1.0, -1.0], [2.0, 2.0]]), np.array([[1], [-1]]))
    with pytest.raises(InputError, match="state_rates: expected a 2-dimensional array"):
        assign_vertex_codes(np.ones(3))
    with pytest.raises(InputError, match=r"codes: expected shape \(2, K\)"):
        cube_r2(np.ones((2, 3)), np.ones((3, 1)))
    with pytest.raises(InputError, match="n_dims: expected a whole number >= 2"):
        assign_vertex_codes(np.ones((4, 3)), n_dims=1)
    with pytest.raises(InputError, match="n_dims: expected a whole number <= 8"):
        assign_vertex_codes(np.ones((4, 3)), n_dims=9)
    with pytest.raises(InputError, match="codes: expected a 2-dimensional array"):
        codes_to_text(np.ones(3))
    rng = np.random.default_rng(0)
    latent = LatentModel(n_dims=1).fit([rng.random((10, 4)) for _ in range(3)]).result_
    with pytest.raises(InputError, match="state_rates: 3 units, the latent model has 4"):
        assign_vertex_codes(np.ones((2, 3)), latent=latent)
