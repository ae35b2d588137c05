"""Discreteness test: p-value and verdict rules, null simulator moments, mixture EM,
behaviour on switching and continuous recordings, determinism."""

import numpy as np
import pytest
from scipy import integrate
from sklearn.mixture import GaussianMixture

from attractorfit import bin_spikes
from attractorfit.errors import InputError
from attractorfit.states import discreteness_test, fit_continuous_null
from attractorfit.states._discreteness import (_ar1_latents, _bin_average_corr, _draw_counts,
                                               _gmm_step, discreteness_statistic, p_value,
                                               tied_gmm, verdict)
from attractorfit.synthetic import continuous_latent_recording, switching_recording


@pytest.fixture(scope="module")
def continuous():
    rec, _ = continuous_latent_recording(n_units=30, n_trials=40, trial_duration=2.0,
                                         n_latents=2, n_conditions=2, psth_modulation=0.3,
                                         rng=11)
    return bin_spikes(rec, bin_size=0.05)


def test_p_value_formula():
    # p = (1 + #{T_b >= T}) / (B + 1) (Davison & Hinkley 1997, section 4.2)
    assert p_value(1.0, [0.5, 1.0, 2.0]) == pytest.approx(3 / 4)
    assert p_value(5.0, np.zeros(19)) == pytest.approx(1 / 20)
    assert p_value(-1.0, np.zeros(9)) == pytest.approx(1.0)


def test_verdict_rules():
    assert verdict(0.01) == "discrete"
    assert verdict(0.05) == "discrete"
    assert verdict(0.07) == "inconclusive"
    assert verdict(0.1) == "inconclusive"
    assert verdict(0.11) == "not_discrete"
    assert verdict(0.01, too_short=True) == "inconclusive"
    assert verdict(1 / 10, n_boot=9) == "inconclusive"      # p cannot reach 0.05
    assert verdict(1 / 20, n_boot=19) == "discrete"
    assert verdict(0.15, alpha=0.1) == "inconclusive"       # upper bound 2 alpha = 0.2


def test_bin_average_corr_closed_form():
    # outside check: numerical double integral of exp(-|s - t| / tau) over two bins
    # (scipy.integrate.dblquad), divided by dt^2; tolerance 1e-7
    tau, dt = 0.3, 0.05
    for lag in (0, 1, 3):
        val, _ = integrate.dblquad(lambda s, t: np.exp(-abs(s - t) / tau), 0, dt,
                                   lambda t: lag * dt, lambda t: (lag + 1) * dt)
        assert _bin_average_corr(lag, tau, dt) == pytest.approx(val / dt ** 2, rel=1e-7)


def test_ar1_latents_stationary():
    # closed form: a stationary AR(1) with unit variance has lag-k correlation a^k
    rng = np.random.default_rng(0)
    a = np.array([0.9, 0.3])
    z = _ar1_latents(rng, 4000, 20, a)
    assert np.allclose(z.reshape(-1, 2).var(axis=0), 1.0, atol=0.03)
    for k in (1, 2):
        c = np.mean(z[:, k:] * z[:, :-k], axis=(0, 1))
        np.testing.assert_allclose(c, a ** k, atol=0.02)


@pytest.mark.parametrize("lam,phi", [(0.5, 0.6), (2.3, 0.5), (1.0, 1.0), (0.7, 2.5)])
def test_draw_counts_moments(lam, phi):
    # closed forms: mean lam, variance phi * lam (negative binomial / Poisson exactly;
    # the randomised binomial by construction); tolerance 2%
    x = _draw_counts(np.random.default_rng(1), np.full(200_000, lam), np.full(200_000, phi))
    assert x.mean() == pytest.approx(lam, rel=0.02)
    assert x.var() / x.mean() == pytest.approx(phi, rel=0.02)


def _gmm_step_reference(x, linv, means, logw, const):
    """Plain NumPy E-step (reference for the compiled kernel)."""
    y = (x[:, None, :] - means[None]) @ linv.T
    lp = logw[None] + const - 0.5 * np.sum(y * y, axis=2)
    top = lp.max(axis=1, keepdims=True)
    lse = top[:, 0] + np.log(np.exp(lp - top).sum(axis=1))
    r = np.exp(lp - lse[:, None])
    return lse.sum(), r.sum(axis=0), r.T @ x


def test_gmm_step_matches_reference():
    rng = np.random.default_rng(2)
    x = rng.standard_normal((300, 3))
    chol = np.linalg.cholesky(np.array([[1.0, 0.3, 0.1], [0.3, 2.0, 0.2], [0.1, 0.2, 0.5]]))
    linv = np.linalg.inv(chol)
    means = rng.standard_normal((4, 3))
    logw = np.log(np.array([0.1, 0.2, 0.3, 0.4]))
    got = _gmm_step(x, linv, means, logw, -1.7)
    ref = _gmm_step_reference(x, linv, means, logw, -1.7)
    for g, r in zip(got, ref):
        np.testing.assert_allclose(g, r, rtol=1e-12)


def test_tied_gmm_matches_sklearn():
    # outside check: scikit-learn GaussianMixture(covariance_type="tied") from the same
    # starting means converges to the same log-likelihood (rel. 1e-6)
    rng = np.random.default_rng(3)
    x = np.concatenate([rng.standard_normal((400, 2)) + [3, 0],
                        rng.standard_normal((300, 2)) - [0, 3],
                        rng.standard_normal((300, 2))])
    m0 = x[[0, 500, 900]]
    ll, w, m, cov = tied_gmm(x, 3, means_init=m0, tol=1e-10, max_iter=2000, reg=0.0)
    ref = GaussianMixture(3, covariance_type="tied", means_init=m0, tol=1e-10,
                          max_iter=2000, reg_covar=0.0).fit(x)
    assert ll == pytest.approx(ref.score(x) * len(x), rel=1e-6)
    order = np.argsort(m[:, 0])
    np.testing.assert_allclose(m[order], ref.means_[np.argsort(ref.means_[:, 0])], atol=1e-4)


def test_null_matches_rates_fano_and_correlations(continuous):
    null = fit_continuous_null(continuous, n_dims=2, condition="item")
    x = continuous.stacked()
    sims = np.concatenate([null.simulate(s + 100).stacked() for s in range(16)])
    # per-unit mean rate and Fano factor of bin counts (np.mean / np.var) for units
    # above 1 Hz: every unit within 8% (rates) and 15% (Fano: the slow latent makes the
    # variance of one recording uncertain by several percent), median error below 4%
    keep = x.mean(axis=0) / continuous.bin_size > 1.0
    np.testing.assert_allclose(sims.mean(axis=0)[keep], x.mean(axis=0)[keep], rtol=0.08)
    fano_x = x.var(axis=0) / x.mean(axis=0)
    fano_s = sims.var(axis=0) / sims.mean(axis=0)
    np.testing.assert_allclose(fano_s[keep], fano_x[keep], rtol=0.15)
    assert np.median(np.abs(fano_s[keep] / fano_x[keep] - 1)) < 0.04
    # pairwise count correlations: same structure (correlation of the pair values > 0.8)
    iu = np.triu_indices(x.shape[1], 1)
    cx, cs = np.corrcoef(x.T)[iu], np.corrcoef(sims.T)[iu]
    assert np.corrcoef(cx, cs)[0, 1] > 0.8
    assert abs(np.mean(np.abs(cs)) - np.mean(np.abs(cx))) < 0.02
    assert null.levels == ["0", "1"] and null.psth.shape[0] == 2
    assert "PSTH per level of 'item'" in null.describe()


def test_switching_recording_gives_small_p():
    rec, _ = switching_recording(n_units=30, n_states=3, n_trials=30, trial_duration=2.0,
                                 modulation=0.8, rng=4)
    res = discreteness_test(bin_spikes(rec, bin_size=0.05), n_boot=19, n_dims=2, rng=0)
    assert res.p_value == pytest.approx(1 / 20)
    assert res.verdict == "discrete"
    assert res.statistic > np.max(res.null_statistics)


def test_continuous_recording_not_discrete(continuous):
    res = discreteness_test(continuous, n_boot=19, condition="item", rng=2)
    assert res.verdict != "discrete"
    assert res.p_value >= 0.3
    block = res.summary_block()
    for key in ("p_value", "verdict", "statistic", "null", "n_boot", "assumptions"):
        assert key in block
    assert "not proof" in block["text"]
    assert block["assumptions"]["latent_dims_rule"].startswith("cross-validated")
    assert res.null_statistics.shape == (19,) and res.null_n_components.shape == (19,)


def test_same_result_serial_and_parallel(continuous):
    small = continuous.subset_trials(np.arange(12))
    a = discreteness_test(small, n_boot=3, n_dims=1, rng=7, n_jobs=1)
    b = discreteness_test(small, n_boot=3, n_dims=1, rng=7, n_jobs=2)
    np.testing.assert_array_equal(a.null_statistics, b.null_statistics)
    assert a.statistic == b.statistic and a.p_value == b.p_value


def test_too_short_is_inconclusive():
    rec, _ = switching_recording(n_units=10, n_states=2, n_trials=4, trial_duration=1.0,
                                 modulation=1.0, rng=2)
    with pytest.warns(Warning, match="have no spikes"):
        b = bin_spikes(rec, bin_size=0.05)
    res = discreteness_test(b, n_boot=19, n_dims=1, rng=0)
    assert res.too_short and res.verdict == "inconclusive"


def test_errors(continuous):
    with pytest.raises(InputError, match="binned: expected a BinnedCounts, got list"):
        discreteness_test([np.zeros((3, 2))])
    with pytest.raises(InputError, match="binned: the discreteness test needs at least 2 "
                                         "trials, got 1"):
        discreteness_test(continuous.subset_trials([0]))
    with pytest.raises(InputError, match="condition: label column 'cue' not found"):
        discreteness_test(continuous, condition="cue")
    with pytest.raises(InputError, match="n_boot: expected a whole number >= 1"):
        discreteness_test(continuous, n_boot=0)
    with pytest.raises(InputError, match="alpha: expected a number strictly between 0 and 1"):
        discreteness_test(continuous, alpha=0.0)
    with pytest.raises(InputError, match=r"alpha: expected a number in \[0.0, 1.0\]"):
        discreteness_test(continuous, alpha=1.5)
    with pytest.raises(InputError, match="max_states: expected a whole number >= 2"):
        discreteness_test(continuous, max_states=1)
    with pytest.raises(InputError, match="n_jobs: expected a whole number >= 1"):
        discreteness_test(continuous, n_jobs=0)
    with pytest.raises(InputError, match="smooth_s: expected a finite number >= 0"):
        discreteness_test(continuous, smooth_s=-1.0)
    with pytest.raises(InputError, match="drift_trials: expected a finite number > 0"):
        discreteness_test(continuous, drift_trials=0.0)
    with pytest.raises(InputError, match="n_dims: expected a whole number <= 29"):
        discreteness_test(continuous, n_dims=30)
    with pytest.raises(InputError, match="n_dims: expected a whole number >= 1"):
        discreteness_statistic(continuous, n_dims=0)
    with pytest.raises(InputError, match="psth_smooth_s: expected a finite number >= 0"):
        fit_continuous_null(continuous, psth_smooth_s=-1.0)
    with pytest.raises(InputError, match="psth_smooth_s: expected a finite number >= 0"):
        discreteness_test(continuous, psth_smooth_s=-1.0)
    with pytest.raises(InputError, match="max_states: expected a whole number >= 2"):
        discreteness_statistic(continuous, n_dims=1, max_states=1)
    with pytest.raises(InputError, match="n_dims: expected a whole number <= 29"):
        fit_continuous_null(continuous, n_dims=30)
    with pytest.raises(InputError, match="drift_trials: expected a finite number > 0"):
        fit_continuous_null(continuous, drift_trials=-2.0)
    with pytest.raises(InputError, match="max_lag_s: expected a finite number > 0"):
        fit_continuous_null(continuous, max_lag_s=0.0)
