"""Tests of the choice of the number of states."""

import itertools

import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment
from scipy.stats import poisson

from attractorfit.binning import bin_spikes
from attractorfit.errors import InputError
from attractorfit.states import PoissonHMM, choose_n_states
from attractorfit.states._hmm import _CountData
from attractorfit.states._select import _loglik_and_entropy, _one_se
from attractorfit.synthetic import continuous_latent_recording, switching_recording


@pytest.fixture(scope="module")
def switching():
    # synthetic truth (our generator): 4 states, gamma-renewal spiking of order 2,
    # 40 units, 60 trials of 3 s, 0.3 s mean dwell, 50 ms bins
    rec, truth = switching_recording(n_units=40, n_states=4, n_trials=60, gamma_order=2.0,
                                     rng=7)
    return bin_spikes(rec, bin_size=0.05), truth


def test_default_rule_recovers_states(switching):
    b, truth = switching
    c = choose_n_states(b, candidates=range(1, 7), n_folds=3, rng=0)
    assert c.rule == "bic" and c.sticky > 0          # the documented default
    assert c.chosen == 4
    assert c.model is c.models[4]
    # >= 90% of bins decoded to the matched true state (linear_sum_assignment matching)
    centres = b.bin_times() + b.bin_size / 2
    true = np.concatenate([truth.state_at(i, centres[:b.n_valid[i]])
                           for i in range(b.n_trials)])
    pred = np.concatenate(c.model.predict(b))
    C = np.zeros((4, 4))
    np.add.at(C, (true, pred), 1)
    r, k = linear_sum_assignment(-C)
    assert C[r, k].sum() / C.sum() >= 0.90
    # bookkeeping: BIC from the stored log-likelihood (closed form), held-out sums
    seqs = b.sequences()
    for i, S in enumerate(c.candidates):
        m = c.models[S]
        assert c.loglik[i] == pytest.approx(m.score(seqs), rel=1e-10)
        assert c.bic[i] == pytest.approx(-2 * c.loglik[i] + m.n_parameters()
                                         * np.log(b.total_bins), rel=1e-12)
        assert c.icl[i] >= c.bic[i]
    np.testing.assert_allclose(c.heldout_loglik, c.heldout_per_trial.sum(1), rtol=1e-12)
    np.testing.assert_allclose(c.heldout_per_bin, c.heldout_loglik / b.total_bins)
    assert set(c.choices) == {"bic", "icl", "heldout", "heldout_1se"}


def test_fast_path_recovers_states(switching):
    b, _ = switching
    c = choose_n_states(b, candidates=range(1, 7), fast=True, rng=1)
    assert c.chosen == 4 and c.n_folds is None
    assert np.all(np.isnan(c.heldout_loglik))


def test_continuous_latent_is_split_into_states():
    # Documented behaviour, not a claim of discreteness: a continuous 1-D latent is
    # cut into several states by the count rule (DESIGN Amendment 4 measured 5 by BIC),
    # which is why the separate discreteness test exists.
    rec, _ = continuous_latent_recording(n_units=40, n_latents=1, n_trials=40,
                                         gamma_order=2.0, rng=3)
    b = bin_spikes(rec, bin_size=0.05)
    c = choose_n_states(b, candidates=range(1, 7), fast=True, rng=0)
    assert c.chosen >= 3


def test_deterministic_and_serial_equals_parallel():
    rec, _ = switching_recording(n_units=12, n_states=2, n_trials=8, trial_duration=1.0,
                                 rng=2)
    b = bin_spikes(rec, bin_size=0.05)
    kw = dict(candidates=[1, 2, 3], n_folds=2, n_restarts=2, max_iter=20)
    a = choose_n_states(b, rng=5, n_jobs=1, **kw)
    a2 = choose_n_states(b, rng=np.random.default_rng(5), n_jobs=1, **kw)
    p = choose_n_states(b, rng=5, n_jobs=2, **kw)
    for other in (a2, p):
        assert other.chosen == a.chosen and other.choices == a.choices
        np.testing.assert_array_equal(other.loglik, a.loglik)
        np.testing.assert_array_equal(other.heldout_per_trial, a.heldout_per_trial)
        np.testing.assert_array_equal(other.models[3].rates_, a.models[3].rates_)


def test_path_entropy_equals_bruteforce():
    # closed form: H = -sum_z p(z|x) log p(z|x) by enumerating all 3^4 paths, with
    # scipy.stats.poisson emissions; two sequences (entropies add)
    rng = np.random.default_rng(0)
    m = PoissonHMM(3)
    m.initial_probs_ = np.array([0.5, 0.3, 0.2])
    m.transition_probs_ = np.array([[0.8, 0.1, 0.1], [0.2, 0.7, 0.1], [0.0, 0.3, 0.7]])
    m.rates_ = rng.gamma(2, 1, size=(3, 3))
    seqs = [rng.poisson(1.5, size=(4, 3)), rng.poisson(1.5, size=(3, 3))]
    ll, H = _loglik_and_entropy(m, _CountData(seqs))
    H_ref, ll_ref = 0.0, 0.0
    for x in seqs:
        joint = []
        for path in itertools.product(range(3), repeat=len(x)):
            p = m.initial_probs_[path[0]]
            for t in range(1, len(x)):
                p *= m.transition_probs_[path[t - 1], path[t]]
            for t, z in enumerate(path):
                p *= np.prod(poisson.pmf(x[t], m.rates_[z]))
            joint.append(p)
        joint = np.array(joint)
        px = joint.sum()
        post = joint[joint > 0] / px
        H_ref += -(post * np.log(post)).sum()
        ll_ref += np.log(px)
    assert ll == pytest.approx(ll_ref, rel=1e-10)
    assert H == pytest.approx(H_ref, rel=1e-8)


def test_one_se_rule_closed_form():
    # hand-made per-trial held-out scores: S index 2 is best; index 1 is 2 below it in
    # total with per-trial differences s.d. 1 over 4 trials (SE = 2): within 1 SE
    per_trial = np.array([[0.0, 0.0, 0.0, 0.0],
                          [9.0, 11.0, 9.0, 11.0],
                          [10.0, 11.5, 10.5, 10.0]])
    d = per_trial[2] - per_trial[1]
    assert d.sum() == pytest.approx(2.0)
    idx, se = _one_se(per_trial)
    assert se[1] == pytest.approx(2.0 * np.std(d, ddof=1))
    assert idx == (1 if d.sum() <= se[1] else 2)
    assert idx == 1
    assert se[2] == 0.0


def test_input_errors():
    seqs = [np.ones((10, 3)) + (np.arange(10)[:, None] % 2) for _ in range(4)]
    with pytest.raises(InputError, match="rule: expected one of bic, icl, heldout, "
                                         "heldout_1se, got 'aic'"):
        choose_n_states(seqs, rule="aic")
    with pytest.raises(InputError, match="candidates: expected at least one"):
        choose_n_states(seqs, candidates=[])
    with pytest.raises(InputError, match="candidates: expected whole numbers"):
        choose_n_states(seqs, candidates=["a"])
    with pytest.raises(InputError, match="candidates: expected a whole number >= 1, got 0"):
        choose_n_states(seqs, candidates=[0, 1])
    with pytest.raises(InputError, match="candidates: expected a whole number, got 1.5"):
        choose_n_states(seqs, candidates=[1.5])
    with pytest.raises(InputError, match=r"candidates: expected distinct numbers of states, "
                                         r"got \[2, 2\]"):
        choose_n_states(seqs, candidates=[2, 2])
    with pytest.raises(InputError, match="candidates: 50 states need at least 50 bins, got 40"):
        choose_n_states(seqs, candidates=[1, 50])
    with pytest.raises(InputError, match="n_folds: rule 'heldout' needs held-out trials"):
        choose_n_states(seqs, rule="heldout", n_folds=None)
    with pytest.raises(InputError, match="n_folds: 5 folds need at least 5 trials, got 4"):
        choose_n_states(seqs, n_folds=5)
    with pytest.raises(InputError, match="n_folds: expected a whole number >= 2"):
        choose_n_states(seqs, n_folds=1)
    with pytest.raises(InputError, match="n_jobs: expected a whole number >= 1"):
        choose_n_states(seqs, n_jobs=0)
    with pytest.raises(InputError, match="sticky: expected a finite number >= 0"):
        choose_n_states(seqs, sticky=-0.1)
    with pytest.raises(InputError, match="n_restarts: expected a whole number >= 1"):
        choose_n_states(seqs, n_restarts=0)
    with pytest.raises(InputError, match="needs at least 2 trials, got 1"):
        choose_n_states(seqs[:1], candidates=[1, 2])
    with pytest.raises(InputError, match=r"sequences\[1\]: has 2 units"):
        choose_n_states([seqs[0], np.ones((5, 2))])
