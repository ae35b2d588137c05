"""Speed of the Poisson HMM against hmmlearn's PoissonHMM (same parameters).

50,000 bins x 100 units x 6 states (100 trials of 500 bins), Poisson counts from a
random 6-state chain. Times ``score`` and one EM iteration (ours: ``fit`` with
``init="given"``, ``max_iter=1``, one restart; hmmlearn: ``fit`` with ``n_iter=1``,
``init_params=""``, parameters set by hand), best of ``--repeats`` runs, and checks
that the log-likelihoods agree (relative 1e-6).

Run: ``python benchmarks/bench_hmm.py [--repeats 3]``
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
from hmmlearn import hmm
from sklearn.exceptions import ConvergenceWarning

from attractorfit.states import PoissonHMM


def best_time(fn, repeats):
    times, out = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return min(times), out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    rng = np.random.default_rng(0)
    S, N, n_trials, T = 6, 100, 100, 500
    start = np.full(S, 1.0 / S)
    trans = np.full((S, S), 0.02 / (S - 1))
    np.fill_diagonal(trans, 0.98)
    rates = rng.gamma(2.0, 0.5, size=(S, N))
    seqs = []
    for _ in range(n_trials):
        z = np.empty(T, dtype=int)
        z[0] = rng.integers(S)
        for t in range(1, T):
            z[t] = rng.choice(S, p=trans[z[t - 1]])
        seqs.append(rng.poisson(rates[z]))
    X = np.concatenate(seqs)
    lengths = [T] * n_trials
    # perturbed starting parameters for the EM step
    rates0 = rates * rng.uniform(0.7, 1.3, size=rates.shape)
    print(f"data: {X.shape[0]} bins x {N} units, {S} states, {n_trials} sequences")

    ours = PoissonHMM(S, init="given", n_restarts=1, max_iter=1)
    ours.initial_probs_, ours.transition_probs_, ours.rates_ = start, trans, rates0
    ref = hmm.PoissonHMM(n_components=S, n_iter=1, init_params="", params="stl",
                         implementation="log")
    ref.startprob_, ref.transmat_, ref.lambdas_ = start, trans, rates0
    ref.n_features = N

    # warm-up (numba compilation is cached on disk; first call loads it)
    ours.score(seqs[:2])

    t_ours, ll_ours = best_time(lambda: ours.score(seqs), args.repeats)
    t_ref, ll_ref = best_time(lambda: ref.score(X, lengths), args.repeats)
    print(f"score      ours {t_ours * 1e3:8.1f} ms   hmmlearn {t_ref * 1e3:8.1f} ms   "
          f"speed-up {t_ref / t_ours:6.1f}x   rel. diff {abs(ll_ours - ll_ref) / abs(ll_ref):.2e}")
    for impl in ("scaling",):
        ref_s = hmm.PoissonHMM(n_components=S, implementation=impl)
        ref_s.startprob_, ref_s.transmat_, ref_s.lambdas_ = start, trans, rates0
        ref_s.n_features = N
        t_s, ll_s = best_time(lambda: ref_s.score(X, lengths), args.repeats)
        print(f"score      (hmmlearn implementation={impl!r}: {t_s * 1e3:.1f} ms, "
              f"speed-up {t_s / t_ours:.1f}x, rel. diff {abs(ll_ours - ll_s) / abs(ll_s):.2e})")

    def em_ours():
        m = PoissonHMM(S, init="given", n_restarts=1, max_iter=1, tol=1e-300)
        m.initial_probs_, m.transition_probs_, m.rates_ = start, trans, rates0
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            m.fit(seqs)
        return m

    def em_ref():
        m = hmm.PoissonHMM(n_components=S, n_iter=1, init_params="", params="stl",
                           implementation="log", tol=-np.inf)
        m.startprob_, m.transmat_, m.lambdas_ = start.copy(), trans.copy(), rates0.copy()
        m.n_features = N
        m.fit(X, lengths)
        return m

    t_ours, m_ours = best_time(em_ours, args.repeats)
    t_ref, m_ref = best_time(em_ref, args.repeats)
    ll0_ours = m_ours.loglik_history_[0]
    ll0_ref = m_ref.monitor_.history[0]
    rdiff = np.abs(m_ours.rates_ - m_ref.lambdas_).max() / m_ref.lambdas_.max()
    print(f"EM step    ours {t_ours * 1e3:8.1f} ms   hmmlearn {t_ref * 1e3:8.1f} ms   "
          f"speed-up {t_ref / t_ours:6.1f}x   rel. diff of E-step log-lik "
          f"{abs(ll0_ours - ll0_ref) / abs(ll0_ref):.2e}; max rel. diff of updated rates "
          f"{rdiff:.2e}")
    print("(ours' EM step includes validation, log-factorial table, one E-step, one M-step "
          "and the E-step of the new parameters)")


if __name__ == "__main__":
    main()
