"""Tests of the binary-feature (hypercube) state model."""

import itertools
import warnings

import numpy as np
import pytest
from scipy.stats import poisson
from sklearn.exceptions import ConvergenceWarning

from attractorfit.errors import InputError
from attractorfit.states import (BinaryFeatureHMM, PoissonHMM, compare_cube_vs_free,
                                 vertex_codes)


def cube_data(seed=0, K=2, N=30, n_trials=40, T=100):
    """Counts from an additive log-rate model on the K-cube, one 2x2 chain per feature."""
    rng = np.random.default_rng(seed)
    b = np.log(rng.uniform(0.2, 1.5, N))
    W = rng.normal(0, 0.5, (N, K))
    A = np.array([[[0.95, 0.05], [0.08, 0.92]], [[0.9, 0.1], [0.05, 0.95]]])[:K]
    seqs = []
    for _ in range(n_trials):
        bits = np.zeros((T, K), dtype=int)
        for k in range(K):
            bits[0, k] = rng.integers(2)
            for t in range(1, T):
                bits[t, k] = rng.choice(2, p=A[k][bits[t - 1, k]])
        seqs.append(rng.poisson(np.exp(b + (2 * bits - 1) @ W.T)))
    return seqs, b, W, A


def test_vertex_codes_order_matches_kron():
    # closed form: kron(A0, A1)[2a+b, 2c+d] = A0[a, c] A1[b, d]
    codes = vertex_codes(2)
    np.testing.assert_array_equal(codes, [[-1, -1], [-1, 1], [1, -1], [1, 1]])
    assert vertex_codes(3).shape == (8, 3)
    assert len({tuple(c) for c in vertex_codes(5)}) == 32


def test_recovers_weights_up_to_permutation_and_sign():
    # synthetic truth from the additive model itself (our generator in this file)
    seqs, b, W, A = cube_data()
    m = BinaryFeatureHMM(2, rng=0).fit(seqs)
    best = np.inf
    for perm in itertools.permutations(range(2)):
        for signs in itertools.product([-1, 1], repeat=2):
            err = np.abs(m.weights_[:, perm] * np.array(signs) - W).max()
            if err < best:
                best, bp, bs = err, perm, signs
    assert best < 0.12
    # the base rate absorbs the sign flips: b' = b (centre of the cube is invariant)
    np.testing.assert_allclose(m.log_base_, b, atol=0.1)
    # feature chains recovered (matched by the same permutation; a sign flip swaps states)
    for k_true, k_fit in enumerate(bp):
        A_fit = m.feature_transition_probs_[k_fit]
        if bs[k_true] < 0:
            A_fit = A_fit[::-1, ::-1]
        np.testing.assert_allclose(A_fit, A[k_true], atol=0.03)
    h = m.loglik_history_
    assert np.all(np.diff(h) >= -1e-9 * np.abs(h[1:]))   # generalised EM never decreases
    assert m.n_parameters() == 30 * 3 + 6


def test_score_consistent_with_free_hmm_and_bruteforce():
    seqs, *_ = cube_data(1, n_trials=8, T=50)
    m = BinaryFeatureHMM(2, rng=0, n_restarts=1).fit(seqs)
    # consistency: a free PoissonHMM given the joint rates and kron transition matrix scores the same
    free = PoissonHMM(4)
    free.initial_probs_ = np.kron(m.feature_initial_probs_[0], m.feature_initial_probs_[1])
    free.transition_probs_ = np.kron(m.feature_transition_probs_[0],
                                     m.feature_transition_probs_[1])
    free.rates_ = np.exp(m.log_base_[None, :] + m.codes_ @ m.weights_.T)
    np.testing.assert_allclose(free.transition_probs_, m.transition_probs_, rtol=1e-14)
    assert m.score(seqs) == pytest.approx(free.score(seqs), rel=1e-12)
    np.testing.assert_allclose(m.predict_proba(seqs[0]), free.predict_proba(seqs[0]),
                               atol=1e-12)
    # closed form: brute-force sum over all 4^3 joint paths of a 3-bin sequence, with
    # scipy.stats.poisson.pmf emissions and the per-feature chains multiplied out
    x = seqs[0][:3]
    total = 0.0
    for path in itertools.product(range(4), repeat=3):
        bits = [(m.codes_[j] > 0).astype(int) for j in path]
        p = np.prod([m.feature_initial_probs_[k, bits[0][k]] for k in range(2)])
        for t in (1, 2):
            p *= np.prod([m.feature_transition_probs_[k, bits[t - 1][k], bits[t][k]]
                          for k in range(2)])
        for t, j in enumerate(path):
            lam = np.exp(m.log_base_ + m.codes_[j] @ m.weights_.T)
            p *= np.prod(poisson.pmf(x[t], lam))
        total += p
    assert m.score(x) == pytest.approx(np.log(total), rel=1e-10)


def test_compare_prefers_cube_on_cube_data_and_free_otherwise():
    seqs, *_ = cube_data(2, n_trials=30, T=80)
    c = compare_cube_vs_free(seqs, 2, n_folds=3, rng=0)
    assert c.n_states == 4 and c.n_folds == 3
    assert c.preferred_bic == "cube"
    assert c.n_parameters_cube < c.n_parameters_free
    assert c.heldout_per_bin_cube == pytest.approx(c.heldout_loglik_cube / (30 * 80))
    # four states with independent random rates (not additive): the free model wins
    rng = np.random.default_rng(3)
    rates = np.exp(rng.normal(0, 1.0, (4, 30))) * 0.8
    seqs2 = []
    for _ in range(30):
        z = np.repeat(rng.integers(4, size=8), 10)
        seqs2.append(rng.poisson(rates[z]))
    c2 = compare_cube_vs_free(seqs2, 2, n_folds=3, rng=0)
    assert c2.preferred_heldout == "free" and c2.preferred_bic == "free"
    assert c2.heldout_loglik_free - c2.heldout_loglik_cube > 3 * c2.heldout_se_diff


def test_deterministic():
    seqs, *_ = cube_data(4, n_trials=10, T=40)
    a = BinaryFeatureHMM(2, rng=3, n_restarts=2).fit(seqs)
    b = BinaryFeatureHMM(2, rng=3, n_restarts=2).fit(seqs)
    np.testing.assert_array_equal(a.weights_, b.weights_)


def test_input_errors():
    seqs, *_ = cube_data(5, n_trials=3, T=20)
    with pytest.raises(InputError, match="n_features: expected a whole number <= 8"):
        BinaryFeatureHMM(9).fit(seqs)
    with pytest.raises(InputError, match="n_features: expected a whole number >= 1"):
        BinaryFeatureHMM(0).fit(seqs)
    with pytest.raises(InputError, match="n_features: expected a whole number <= 8"):
        vertex_codes(12)
    with pytest.raises(InputError, match=r"n_features: 6 features \(64 joint states\) need "
                                         "at least 64 bins"):
        BinaryFeatureHMM(6).fit(seqs[0][:10])
    with pytest.raises(InputError, match="newton_steps: expected a whole number >= 1"):
        BinaryFeatureHMM(2, newton_steps=0).fit(seqs)
    with pytest.raises(InputError, match="n_restarts: expected a whole number >= 1"):
        BinaryFeatureHMM(2, n_restarts=0).fit(seqs)
    with pytest.raises(InputError, match="max_iter: expected a whole number >= 1"):
        BinaryFeatureHMM(2, max_iter=0).fit(seqs)
    with pytest.raises(InputError, match="tol: expected a finite number > 0"):
        BinaryFeatureHMM(2, tol=-1.0).fit(seqs)
    with pytest.raises(InputError, match=r"sequences\[0\]: element \(0, 0\) is -1.0"):
        compare_cube_vs_free([-np.ones((5, 2))] * 3, 1)
    with pytest.raises(InputError, match="n_folds: 5 folds need at least 5 trials, got 3"):
        compare_cube_vs_free(seqs, 1, n_folds=5)
    with pytest.raises(InputError, match="cross-validation over trials needs at least 2 "
                                         "trials, got 1"):
        compare_cube_vs_free(seqs[:1], 1)
    with pytest.raises(InputError, match="n_states: expected a whole number >= 1"):
        compare_cube_vs_free(seqs, 1, n_states=0)
    m = BinaryFeatureHMM(1, rng=0).fit(seqs)
    with pytest.raises(InputError, match=r"X: has 2 units \(columns\) but the fitted model"):
        m.score(np.ones((4, 2)))
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        with pytest.raises(ConvergenceWarning, match="did not converge"):
            BinaryFeatureHMM(2, max_iter=1, tol=1e-12, rng=0).fit(seqs)
