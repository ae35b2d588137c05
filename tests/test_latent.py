"""Latent space: factor analysis / PCA against scikit-learn, varimax, dimensionality."""

import numpy as np
import pytest
from sklearn.decomposition import PCA, FactorAnalysis

from attractorfit import bin_spikes
from attractorfit.errors import InputError
from attractorfit.latent import (LatentModel, fa_from_covariance, varimax,
                                 varimax_criterion)
from attractorfit.synthetic import continuous_latent_recording


def _factor_data(n_units=20, k=3, n_trials=40, n_bins=30, seed=0):
    rng = np.random.default_rng(seed)
    W = rng.standard_normal((n_units, k))
    psi = rng.uniform(0.5, 1.5, n_units)
    mu = rng.uniform(-1, 1, n_units)
    seqs = [mu + rng.standard_normal((n_bins, k)) @ W.T
            + rng.standard_normal((n_bins, n_units)) * np.sqrt(psi) for _ in range(n_trials)]
    return seqs, W, psi


def test_fa_matches_sklearn_covariance():
    # outside check: scikit-learn FactorAnalysis (ML by SVD-based iterations) must
    # reach the same maximum-likelihood covariance W W^T + Psi; tolerance 1e-3 relative
    # when both are run to tight convergence (1e-12 per row / 1e-10); the estimator's
    # default stopping rule (1e-8 per row) reaches it within 2e-2 (a flat optimum)
    seqs, _, _ = _factor_data()
    x = np.concatenate(seqs)
    ref = FactorAnalysis(3, tol=1e-10, max_iter=20000, svd_method="lapack").fit(x)
    W, psi, _ = fa_from_covariance(np.cov(x.T, bias=True), 3, tol=1e-12, max_iter=100000)
    np.testing.assert_allclose(W @ W.T + np.diag(psi), ref.get_covariance(), rtol=1e-4,
                               atol=1e-4)
    ours = LatentModel("fa", n_dims=3).fit(seqs).result_
    np.testing.assert_allclose(ours.covariance, ref.get_covariance(), atol=2e-2)
    np.testing.assert_allclose(ours.mean, ref.mean_, atol=1e-12)
    # posterior means (the trajectories) equal sklearn's transform up to the
    # rotational ambiguity of the factors: compare W z, which is rotation invariant
    z_ours = np.concatenate(ours.trajectories) @ ours.loadings.T
    z_ref = ref.transform(x) @ ref.components_
    np.testing.assert_allclose(z_ours, z_ref, atol=2e-2)


def test_fa_em_loglik_never_decreases():
    # invariant: EM never lowers the likelihood (tolerance 1e-10 per row)
    seqs, _, _ = _factor_data(k=2, seed=1)
    x = np.concatenate(seqs)
    cov = np.cov(x.T, bias=True)
    with pytest.warns(Warning, match="factor analysis EM reached max_iter=300"):
        _, _, lls = fa_from_covariance(cov, 4, max_iter=300, tol=0.0)
    assert lls.size > 10
    assert np.all(np.diff(lls) >= -1e-10)


def test_fa_loglik_matches_sklearn_score():
    # outside check: held-out Gaussian log-likelihood equals sklearn's score for the
    # same parameters (sklearn's FactorAnalysis.score, rel. 1e-10)
    from attractorfit.latent import _gauss_loglik_cov

    seqs, _, _ = _factor_data(seed=2)
    xtr, xte = np.concatenate(seqs[:30]), np.concatenate(seqs[30:])
    ref = FactorAnalysis(2, tol=1e-8, max_iter=5000).fit(xtr)
    r = xte - ref.mean_
    ll = _gauss_loglik_cov(r.T @ r / len(r), ref.components_.T, ref.noise_variance_)
    assert ll == pytest.approx(ref.score(xte), rel=1e-10)


def test_pca_matches_sklearn():
    # outside check: scikit-learn PCA axes and variances (1e-8), and its probabilistic
    # PCA held-out score (Tipping & Bishop 1999) against our held-out curve (1e-8)
    from attractorfit.latent import _fit_cov, _gauss_loglik_cov

    seqs, _, _ = _factor_data(seed=3)
    x = np.concatenate(seqs)
    ours = LatentModel("pca", n_dims=3).fit(seqs).result_
    ref = PCA(3, svd_solver="full").fit(x)
    ref_w = ref.components_.T * np.sqrt(ref.explained_variance_ * (len(x) - 1) / len(x))
    for k in range(3):
        s = np.sign(ours.loadings[:, k] @ ref_w[:, k])
        np.testing.assert_allclose(ours.loadings[:, k] * s, ref_w[:, k], rtol=1e-8, atol=1e-8)
    xtr, xte = np.concatenate(seqs[:30]), np.concatenate(seqs[30:])
    ref = PCA(4, svd_solver="full").fit(xtr)
    cov_tr = np.cov(xtr.T, bias=False)  # sklearn PCA uses the n - 1 convention
    W, psi = _fit_cov(cov_tr, 4, "pca")
    r = xte - xtr.mean(axis=0)
    assert _gauss_loglik_cov(r.T @ r / len(r), W, psi) == pytest.approx(ref.score(xte),
                                                                         rel=1e-8)


def test_varimax_orthogonal_and_criterion_increases():
    rng = np.random.default_rng(4)
    L = rng.standard_normal((15, 3))
    rot, R = varimax(L)
    np.testing.assert_allclose(R @ R.T, np.eye(3), atol=1e-10)
    np.testing.assert_allclose(rot, L @ R, atol=1e-12)
    assert varimax_criterion(rot) >= varimax_criterion(L) - 1e-12


def test_varimax_recovers_simple_structure():
    # closed-form check: a loading matrix where each unit loads on one factor only is
    # the varimax optimum; an arbitrary rotation of it must be undone (up to column
    # permutation and sign), tolerance 1e-6
    simple = np.zeros((12, 3))
    for i in range(12):
        simple[i, i % 3] = 1.0 + 0.1 * i
    th = 0.7
    q1 = np.array([[np.cos(th), -np.sin(th), 0], [np.sin(th), np.cos(th), 0], [0, 0, 1]])
    q2 = np.array([[1, 0, 0], [0, np.cos(1.1), -np.sin(1.1)], [0, np.sin(1.1), np.cos(1.1)]])
    rot, _ = varimax(simple @ q1 @ q2)
    for k in range(3):
        col = rot[:, k]
        j = int(np.argmax(np.abs(simple.T @ col)))
        s = np.sign(simple[:, j] @ col)
        np.testing.assert_allclose(col * s, simple[:, j], atol=1e-6)


def test_varimax_matches_sklearn_rotation():
    # outside check: scikit-learn's FactorAnalysis(rotation="varimax") rotates the same
    # unrotated loadings; columns agree up to permutation and sign (tolerance 1e-3:
    # scikit-learn stops its rotation at tol 1e-6 / 100 iterations)
    seqs, _, _ = _factor_data(seed=5)
    x = np.concatenate(seqs)
    plain = FactorAnalysis(3, tol=1e-10, max_iter=20000, svd_method="lapack",
                           rotation=None).fit(x)
    rotated = FactorAnalysis(3, tol=1e-10, max_iter=20000, svd_method="lapack",
                             rotation="varimax").fit(x)
    ours, _ = varimax(plain.components_.T)
    ref = rotated.components_.T
    for k in range(3):
        j = int(np.argmax(np.abs(ref.T @ ours[:, k])))
        s = np.sign(ref[:, j] @ ours[:, k])
        np.testing.assert_allclose(ours[:, k] * s, ref[:, j], atol=1e-3)


@pytest.mark.parametrize("method,criterion", [("fa", "cv_loglik"), ("fa", "loo_error"),
                                              ("pca", "loo_error")])
def test_cv_dimension_recovers_truth(method, criterion):
    seqs, _, _ = _factor_data(n_units=25, k=3, n_trials=40, seed=6)
    fit = LatentModel(method, max_dims=6, criterion=criterion, rng=0).fit(seqs).result_
    assert fit.n_dims == 3
    assert fit.criterion == criterion
    assert list(fit.dims_tested) == list(range(7))
    assert fit.cv_loglik.shape == (7,) and fit.loo_error.shape == (7,)


def test_fit_on_binned_and_project():
    rec, _ = continuous_latent_recording(n_units=12, n_trials=8, trial_duration=1.0, rng=0)
    b = bin_spikes(rec, bin_size=0.05)
    m = LatentModel(max_dims=3, rotation="varimax", smooth_s=0.05, rng=1).fit(b)
    fit = m.result_
    assert len(fit.trajectories) == 8
    assert fit.trajectories[0].shape == (20, fit.n_dims)
    proj = m.transform(b)
    for a, c in zip(proj, fit.trajectories):
        np.testing.assert_allclose(a, c)
    assert fit.explained_variance_ratio.sum() < 1.0
    # same seed, same result
    again = LatentModel(max_dims=3, rotation="varimax", smooth_s=0.05, rng=1).fit(b).result_
    np.testing.assert_array_equal(again.cv_loglik, fit.cv_loglik)


def test_zero_dimensions_when_independent():
    rng = np.random.default_rng(7)
    seqs = [rng.standard_normal((30, 10)) for _ in range(30)]
    fit = LatentModel(max_dims=3, rng=0).fit(seqs).result_
    assert fit.n_dims == 0
    assert fit.trajectories[0].shape == (30, 0)


@pytest.mark.parametrize("kwargs,match", [
    ({"method": "ica"}, "method: expected one of"),
    ({"criterion": "aic"}, "criterion: expected one of"),
    ({"rotation": "promax"}, "rotation: expected None or 'varimax'"),
    ({"max_dims": 0}, "max_dims: expected a whole number >= 1"),
    ({"n_folds": 1}, "n_folds: expected a whole number >= 2"),
    ({"smooth_s": -1.0}, "smooth_s: expected a finite number >= 0"),
    ({"n_dims": -1}, "n_dims: expected a whole number >= 0"),
    ({"n_dims": 5}, r"n_dims: expected fewer dimensions than units \(5\)"),
])
def test_bad_options(kwargs, match):
    rng = np.random.default_rng(0)
    seqs = [rng.standard_normal((10, 5)) for _ in range(4)]
    with pytest.raises(InputError, match=match):
        LatentModel(**kwargs).fit(seqs)


def test_bad_data():
    rng = np.random.default_rng(0)
    with pytest.raises(InputError, match="data: expected a BinnedCounts or a non-empty list"):
        LatentModel().fit([])
    with pytest.raises(InputError, match=r"data: trial 1 has shape \(10,\)"):
        LatentModel().fit([rng.standard_normal((10, 3)), np.zeros(10)])
    bad = rng.standard_normal((10, 3))
    bad[2, 1] = np.nan
    with pytest.raises(InputError, match="data: trial 0 holds a non-finite value"):
        LatentModel().fit([bad])
    with pytest.raises(InputError, match="data: trial 1 has 4 units, trial 0 has 3"):
        LatentModel().fit([rng.standard_normal((10, 3)), rng.standard_normal((10, 4))])
    with pytest.raises(InputError, match="data: expected at least 2 units, got 1"):
        LatentModel(n_dims=0).fit([rng.standard_normal((10, 1))])
    with pytest.raises(InputError, match="choosing n_dims needs at least 2 trials"):
        LatentModel().fit([rng.standard_normal((10, 3))])
    with pytest.raises(InputError, match="LatentModel: call fit before transform"):
        LatentModel().transform([rng.standard_normal((10, 3))])
    m = LatentModel(n_dims=1).fit([rng.standard_normal((10, 3)) for _ in range(3)])
    with pytest.raises(InputError, match="data: trial 0 has 4 units; the latent model "
                                         "was fitted on 3"):
        m.transform([rng.standard_normal((10, 4))])
