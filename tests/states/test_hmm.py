"""Tests of the Poisson HMM: against hmmlearn, a numpy log-space reference, EM
invariants and recovery of a synthetic switching recording."""

import warnings

import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment
from scipy.special import gammaln, logsumexp
from sklearn.base import clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import KFold, cross_val_score

from attractorfit.binning import bin_spikes
from attractorfit.errors import InputError
from attractorfit.states import PoissonHMM
from attractorfit.states._forward_backward import forward_backward, forward_loglik, viterbi
from attractorfit.synthetic import switching_recording

hmm = pytest.importorskip("hmmlearn.hmm")


def random_params(rng, S, N, *, tiny=False):
    start = rng.dirichlet(np.ones(S))
    trans = rng.dirichlet(np.ones(S) * 0.5, size=S) + np.eye(S) * 2
    trans /= trans.sum(axis=1, keepdims=True)
    rates = rng.gamma(2.0, 1.0, size=(S, N))
    if tiny:
        rates[0, :3] = 1e-12
        rates[-1, -2:] = 1e-9
    return start, trans, rates


def sample(rng, start, trans, rates, T):
    S = len(start)
    z = np.empty(T, dtype=int)
    z[0] = rng.choice(S, p=start)
    for t in range(1, T):
        z[t] = rng.choice(S, p=trans[z[t - 1]])
    return rng.poisson(rates[z]), z


def set_model(start, trans, rates):
    m = PoissonHMM(n_states=len(start))
    m.initial_probs_, m.transition_probs_, m.rates_ = start, trans, rates
    return m


def hmmlearn_model(start, trans, rates):
    ref = hmm.PoissonHMM(n_components=len(start), implementation="log")
    ref.startprob_, ref.transmat_, ref.lambdas_ = start, trans, rates
    ref.n_features = rates.shape[1]
    return ref


# --------------------------------------------------------------- hmmlearn checks
@pytest.mark.parametrize("seed,S,N,tiny", [(0, 3, 5, False), (1, 6, 20, False),
                                           (2, 4, 8, True), (3, 1, 4, False)])
def test_score_equals_hmmlearn(seed, S, N, tiny):
    # outside check: hmmlearn 0.3 PoissonHMM.score on the same parameters, rel 1e-8
    rng = np.random.default_rng(seed)
    start, trans, rates = random_params(rng, S, N, tiny=tiny)
    seqs = [sample(rng, start, trans, rates, T)[0] for T in (40, 1, 75)]
    ours = set_model(start, trans, rates)
    ref = hmmlearn_model(start, trans, rates)
    lengths = [len(x) for x in seqs]
    expected = ref.score(np.concatenate(seqs), lengths)
    assert ours.score(seqs) == pytest.approx(expected, rel=1e-8)
    assert ours.score(seqs[0]) == pytest.approx(ref.score(seqs[0]), rel=1e-8)


@pytest.mark.parametrize("seed,tiny", [(4, False), (5, True)])
def test_posteriors_and_viterbi_equal_hmmlearn(seed, tiny):
    # outside check: hmmlearn 0.3 predict_proba (abs 1e-8) and decode(algorithm="viterbi")
    rng = np.random.default_rng(seed)
    start, trans, rates = random_params(rng, 4, 6, tiny=tiny)
    seqs = [sample(rng, start, trans, rates, T)[0] for T in (60, 33)]
    ours = set_model(start, trans, rates)
    ref = hmmlearn_model(start, trans, rates)
    X, lengths = np.concatenate(seqs), [len(x) for x in seqs]
    post = ours.predict_proba(seqs)
    assert isinstance(post, list) and [len(p) for p in post] == lengths
    np.testing.assert_allclose(np.concatenate(post), ref.predict_proba(X, lengths),
                               rtol=0, atol=1e-8)
    _, path = ref.decode(X, lengths, algorithm="viterbi")
    np.testing.assert_array_equal(np.concatenate(ours.predict(seqs)), path)
    np.testing.assert_array_equal(ours.predict(seqs[0]), ref.decode(seqs[0])[1])


def test_bic_formula():
    # closed form: BIC = -2 log L + p log T with p = (S-1) + S(S-1) + S N
    rng = np.random.default_rng(6)
    start, trans, rates = random_params(rng, 3, 7)
    X = sample(rng, start, trans, rates, 50)[0]
    m = set_model(start, trans, rates)
    assert m.n_parameters() == 2 + 6 + 21
    assert m.bic(X) == pytest.approx(-2 * m.score(X) + 29 * np.log(50), rel=1e-12)


# ------------------------------------------------- compiled kernel vs reference
def reference_forward_backward(log_b, lengths, start, trans):
    """Plain numpy log-space forward-backward (test-only reference)."""
    S = log_b.shape[1]
    with np.errstate(divide="ignore"):
        ls, lA = np.log(start), np.log(trans)
    post, xi_sum, s0, total = [], np.zeros((S, S)), np.zeros(S), 0.0
    t0 = 0
    for T in lengths:
        lb = log_b[t0:t0 + T]
        la = np.empty((T, S))
        lbeta = np.zeros((T, S))
        la[0] = ls + lb[0]
        for t in range(1, T):
            la[t] = logsumexp(la[t - 1][:, None] + lA, axis=0) + lb[t]
        for t in range(T - 2, -1, -1):
            lbeta[t] = logsumexp(lA + (lb[t + 1] + lbeta[t + 1])[None, :], axis=1)
        ll = logsumexp(la[-1])
        total += ll
        g = np.exp(la + lbeta - ll)
        post.append(g)
        s0 += g[0]
        for t in range(T - 1):
            xi_sum += np.exp(la[t][:, None] + lA + (lb[t + 1] + lbeta[t + 1])[None, :] - ll)
        t0 += T
    return total, np.concatenate(post), xi_sum, s0


def reference_viterbi(log_b, start, trans):
    with np.errstate(divide="ignore"):
        ls, lA = np.log(start), np.log(trans)
    T, S = log_b.shape
    d = ls + log_b[0]
    back = np.zeros((T, S), dtype=int)
    for t in range(1, T):
        v = d[:, None] + lA
        back[t] = v.argmax(axis=0)
        d = v.max(axis=0) + log_b[t]
    path = [int(d.argmax())]
    for t in range(T - 1, 0, -1):
        path.append(back[t, path[-1]])
    return d.max(), np.array(path[::-1])


@pytest.mark.parametrize("seed,S", [(7, 1), (8, 3), (9, 5)])
def test_kernels_equal_reference(seed, S):
    # outside check: the plain log-sum-exp recursions written out in this file
    rng = np.random.default_rng(seed)
    start, trans, rates = random_params(rng, S, 4)
    if S > 1:
        trans[0, -1] = 0.0  # a forbidden transition
    trans /= trans.sum(axis=1, keepdims=True)
    lengths = [30, 1, 12]
    X = np.concatenate([sample(rng, start, trans, rates, T)[0] for T in lengths])
    log_b = X @ np.log(rates).T - rates.sum(1) - gammaln(X + 1).sum(1)[:, None]
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    post = np.empty((len(X), S))
    xi, s0 = np.empty((S, S)), np.empty(S)
    ll = forward_backward(log_b, offsets, start, trans, post, xi, s0)
    rll, rpost, rxi, rs0 = reference_forward_backward(log_b, lengths, start, trans)
    assert ll == pytest.approx(rll, rel=1e-10)
    assert forward_loglik(log_b, offsets, start, trans) == pytest.approx(rll, rel=1e-10)
    np.testing.assert_allclose(post, rpost, rtol=0, atol=1e-10)
    np.testing.assert_allclose(xi, rxi, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(s0, rs0, rtol=0, atol=1e-10)
    # xi sums over targets to the posterior of the source bins (identity)
    assert xi.sum() == pytest.approx(len(X) - len(lengths), rel=1e-10)
    path = np.empty(len(X), dtype=np.int64)
    with np.errstate(divide="ignore"):
        vit = viterbi(log_b, offsets, np.log(start), np.log(trans), path)
    t0, rtot = 0, 0.0
    for T in lengths:
        v, p = reference_viterbi(log_b[t0:t0 + T], start, trans)
        np.testing.assert_array_equal(path[t0:t0 + T], p)
        rtot += v
        t0 += T
    assert vit == pytest.approx(rtot, rel=1e-10)


def test_emission_matrix_equals_scipy_logpmf():
    # outside check: scipy.stats.poisson.logpmf summed over units, per state
    from scipy.stats import poisson

    from attractorfit.states._hmm import _CountData, _log_emissions

    rng = np.random.default_rng(10)
    rates = rng.gamma(2.0, 1.0, size=(3, 6))
    X = rng.poisson(2.0, size=(25, 6)).astype(float)
    ref = np.stack([poisson.logpmf(X, r).sum(1) for r in rates], axis=1)
    for data in (_CountData([X]), _CountData([X[:10].astype(np.uint8),
                                              X[10:].astype(np.int64)])):
        got = _log_emissions(data, rates)
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-10)


# ---------------------------------------------------------------- EM invariants
def _toy(seed=11, n_seq=8, T=80):
    rng = np.random.default_rng(seed)
    start, trans, rates = random_params(rng, 3, 10)
    return [sample(rng, start, trans, rates, T)[0] for _ in range(n_seq)]


def test_em_loglik_never_decreases():
    # invariant: EM (Baum-Welch) never decreases the likelihood (Rabiner 1989)
    seqs = _toy()
    for init in ("kmeans", "random"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            m = PoissonHMM(4, init=init, n_restarts=1, max_iter=60, tol=1e-12, rng=3).fit(seqs)
        h = m.loglik_history_
        assert len(h) > 5
        assert np.all(np.diff(h) >= -1e-9 * np.abs(h[1:]))
        np.testing.assert_array_equal(h, m.objective_history_)
        assert m.score(seqs) == pytest.approx(h[-1], rel=1e-12)


def test_sticky_map_objective_never_decreases():
    # invariant: MAP-EM never decreases log L + kappa * sum log A_ii
    seqs = _toy(12)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        m = PoissonHMM(4, sticky=0.5, n_restarts=1, max_iter=60, tol=1e-12, rng=1).fit(seqs)
    h = m.objective_history_
    assert np.all(np.diff(h) >= -1e-9 * np.abs(h[1:]))
    kappa = 0.5 * (8 * 80 - 8) / 4
    expected = m.score(seqs) + kappa * np.log(np.diag(m.transition_probs_)).sum()
    assert h[-1] == pytest.approx(expected, rel=1e-10)
    plain = PoissonHMM(4, n_restarts=1, rng=1).fit(seqs)
    # the prior raises the self-transition probabilities
    assert np.diag(m.transition_probs_).mean() > np.diag(plain.transition_probs_).mean()


def test_fit_is_deterministic_and_rows_are_distributions():
    seqs = _toy(13)
    a = PoissonHMM(3, rng=5).fit(seqs)
    b = PoissonHMM(3, rng=np.random.default_rng(5)).fit(seqs)
    np.testing.assert_array_equal(a.rates_, b.rates_)
    np.testing.assert_allclose(a.transition_probs_.sum(1), 1, atol=1e-12)
    assert a.initial_probs_.sum() == pytest.approx(1, abs=1e-12)
    assert len(a.restart_objectives_) == 3
    assert a.objective_history_[-1] == pytest.approx(a.restart_objectives_.max())


def test_single_state_is_the_mean():
    # closed form: with one state the ML rates are the mean counts
    seqs = _toy(14)
    m = PoissonHMM(1, rng=0).fit(seqs)
    np.testing.assert_allclose(m.rates_[0], np.concatenate(seqs).mean(0), rtol=1e-12)
    assert m.transition_probs_[0, 0] == 1.0


def test_init_given_continues_from_parameters():
    seqs = _toy(15)
    m = PoissonHMM(3, rng=0, n_restarts=1, max_iter=5, tol=1e-12)
    start, trans, rates = random_params(np.random.default_rng(0), 3, 10)
    m.set_params(init="given")
    m.initial_probs_, m.transition_probs_, m.rates_ = start, trans, rates
    before = set_model(start, trans, rates).score(seqs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        m.fit(seqs)
    assert m.loglik_history_[0] == pytest.approx(before, rel=1e-12)
    assert m.n_iter_ == 5


def test_convergence_warning_and_silent_state():
    seqs = _toy(16)
    with pytest.warns(ConvergenceWarning, match="did not converge"):
        PoissonHMM(3, max_iter=1, tol=1e-12, n_restarts=1, rng=0).fit(seqs)
    rng = np.random.default_rng(0)
    silent = [np.vstack([np.zeros((20, 4)), rng.poisson(3.0, (20, 4))]) for _ in range(5)]
    with pytest.warns(ConvergenceWarning, match="zero counts in every unit"):
        m = PoissonHMM(2, rng=0).fit(silent)
    assert m.rates_.min() > 0


def test_works_with_sklearn_clone_and_cross_validation():
    seqs = _toy(17, n_seq=6)
    m = PoissonHMM(3, n_restarts=1, rng=0)
    c = clone(m)
    assert c.get_params() == m.get_params()
    scores = cross_val_score(m, seqs, cv=KFold(3))
    assert scores.shape == (3,) and np.all(np.isfinite(scores))


def test_unfitted_model_raises_not_fitted():
    from sklearn.exceptions import NotFittedError

    for method in ("score", "predict", "predict_proba", "bic"):
        with pytest.raises(NotFittedError):
            getattr(PoissonHMM(2), method)(np.ones((3, 2)))


def test_binned_counts_accepted_and_list_outputs():
    rec, _ = switching_recording(n_units=5, n_states=2, n_trials=3, rng=0)
    b = bin_spikes(rec, bin_size=0.1)
    m = PoissonHMM(2, rng=0).fit(b)
    assert m.score(b) == pytest.approx(m.score(b.sequences()), rel=1e-12)
    assert isinstance(m.predict(b), list) and len(m.predict(b)) == 3


# ------------------------------------------------------------ recovery of truth
def test_recovers_states_of_switching_recording():
    # synthetic truth (our generator): gamma-renewal spiking (order 2), 4 states,
    # semi-Markov dwell 0.3 s; >= 90% of bins decoded to the matched true state
    rec, truth = switching_recording(n_units=40, n_states=4, n_trials=60, gamma_order=2.0,
                                     rng=21)
    b = bin_spikes(rec, bin_size=0.05)
    m = PoissonHMM(4, rng=0).fit(b)
    centres = b.bin_times() + b.bin_size / 2
    true = np.concatenate([truth.state_at(i, centres[:b.n_valid[i]])
                           for i in range(b.n_trials)])
    pred = np.concatenate(m.predict(b))
    C = np.zeros((4, 4))
    np.add.at(C, (true, pred), 1)
    r, c = linear_sum_assignment(-C)
    assert C[r, c].sum() / C.sum() >= 0.90
    # matched state rates close to the truth (counts per bin = Hz x bin size)
    err = np.abs(m.rates_[c] - truth.state_rates_hz[r] * 0.05)
    assert np.median(err / (truth.state_rates_hz[r] * 0.05)) < 0.15


# ------------------------------------------------------------------ bad input
def test_input_errors():
    X = np.ones((10, 3))
    with pytest.raises(InputError, match="n_states: expected a whole number >= 1"):
        PoissonHMM(0).fit(X)
    with pytest.raises(InputError, match="n_states: 20 states need at least 20 bins"):
        PoissonHMM(20).fit(X)
    with pytest.raises(InputError, match="sticky: expected a finite number >= 0"):
        PoissonHMM(2, sticky=-1).fit(X)
    with pytest.raises(InputError, match="n_restarts: expected a whole number >= 1"):
        PoissonHMM(2, n_restarts=0).fit(X)
    with pytest.raises(InputError, match="max_iter: expected a whole number >= 1"):
        PoissonHMM(2, max_iter=0).fit(X)
    with pytest.raises(InputError, match="tol: expected a finite number > 0"):
        PoissonHMM(2, tol=0).fit(X)
    with pytest.raises(InputError, match="init: expected 'kmeans', 'random' or 'given'"):
        PoissonHMM(2, init="pca").fit(X)
    with pytest.raises(InputError, match=r"X\[0\]: element \(1, 2\) is -1.0; spike counts "
                                         "must be >= 0"):
        bad = X.copy()
        bad[1, 2] = -1
        PoissonHMM(2).fit([bad])
    with pytest.raises(InputError, match=r"X\[1\]: element \(2, 0\) is -3; spike counts "
                                         "must be >= 0"):
        bad = np.ones((4, 3), dtype=np.int32)
        bad[2, 0] = -3
        PoissonHMM(2).fit([np.ones((4, 3), dtype=np.int64), bad])
    with pytest.raises(InputError, match=r"element \(0, 1\) is 0.5; spike counts must be "
                                         "whole numbers"):
        bad = X.copy()
        bad[0, 1] = 0.5
        PoissonHMM(2).fit(bad)
    with pytest.raises(InputError, match="X: element 3 is .*nan.*, expected a finite number"):
        PoissonHMM(2).fit(np.array([1, 2, 3, np.nan]))
    with pytest.raises(InputError, match="X: expected a 2-dimensional"):
        PoissonHMM(2).fit(np.ones(5))
    with pytest.raises(InputError, match="X: got a 3-dimensional array"):
        PoissonHMM(2).fit(np.ones((2, 5, 3)))
    with pytest.raises(InputError, match="X: expected at least one count sequence"):
        PoissonHMM(2).fit([])
    with pytest.raises(InputError, match=r"X\[1\]: expected at least one bin"):
        PoissonHMM(2).fit([X, np.ones((0, 3))])
    with pytest.raises(InputError, match=r"X\[1\]: has 4 units \(columns\) but the first "
                                         "sequence has 3"):
        PoissonHMM(2).fit([X, np.ones((5, 4))])
    m = PoissonHMM(2, rng=0).fit(X + np.arange(10)[:, None] % 2)
    with pytest.raises(InputError, match=r"X: has 4 units \(columns\) but the fitted model "
                                         "has 3"):
        m.score(np.ones((5, 4)))
    with pytest.raises(InputError, match=r"transition_probs_: row 0 sums to"):
        set_model(np.array([0.5, 0.5]), np.array([[0.5, 0.6], [0.5, 0.5]]),
                  np.ones((2, 3))).score(X)
    with pytest.raises(InputError, match=r"initial_probs_: expected entries summing to 1"):
        set_model(np.array([0.5, 0.6]), np.eye(2), np.ones((2, 3))).score(X)
    with pytest.raises(InputError, match=r"initial_probs_: expected shape \(2,\)"):
        set_model(np.ones(3) / 3, np.eye(2), np.ones((2, 3))).score(X)
    with pytest.raises(InputError, match=r"transition_probs_: expected shape \(2, 2\)"):
        set_model(np.ones(2) / 2, np.eye(3), np.ones((2, 3))).score(X)
    with pytest.raises(InputError, match=r"rates_: expected a 2-D"):
        set_model(np.ones(2) / 2, np.eye(2), np.ones(3)).score(X)
    with pytest.raises(InputError, match=r"rates_: expected finite values >= 0"):
        set_model(np.ones(2) / 2, np.eye(2), -np.ones((2, 3))).score(X)
    m2 = PoissonHMM(3, init="given")
    m2.initial_probs_, m2.transition_probs_ = np.ones(3) / 3, np.eye(3)
    m2.rates_ = np.ones((3, 2))
    with pytest.raises(InputError, match=r"init='given': rates_ has shape \(3, 2\), "
                                         r"expected \(3, 3\)"):
        m2.fit(X)
