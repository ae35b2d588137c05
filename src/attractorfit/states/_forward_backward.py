"""Compiled hidden-Markov kernels: scaled forward-backward, forward only, Viterbi.

All kernels take per-bin emission log-likelihoods ``log_b`` (T_total x S) for several
independent sequences stacked along the rows, with ``offsets`` (n_seq + 1,) marking
where each sequence starts; every sequence starts from ``initial_probs``.

Scaling: each row of ``log_b`` is shifted by its maximum before exponentiation and the
forward variables are renormalised at every step (the scaled recursions of [1]_), so no
value under- or overflows; the log-likelihood is the sum of the log scale factors plus
the row shifts. The expected transition counts (summed xi) are accumulated inside the
kernel without storing a T x S x S array.

The plain (log-sum-exp) reference implementations live only in the tests.

References
----------
.. [1] Rabiner, L. R. (1989). A tutorial on hidden Markov models and selected
   applications in speech recognition. Proceedings of the IEEE 77:257-286.
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["forward_backward", "forward_loglik", "viterbi", "row_log_factorial"]


@njit(cache=True, nogil=True)
def row_log_factorial(X, table):
    """sum_i log(X[t, i]!) for every row t, looking up ``table[k] = log(k!)``.

    ``X`` holds whole numbers 0 <= X < len(table) (float64, any layout).
    """
    T, N = X.shape
    out = np.zeros(T)
    for t in range(T):
        acc = 0.0
        for i in range(N):
            acc += table[int(X[t, i])]
        out[t] = acc
    return out


@njit(cache=True, nogil=True)
def _scaled_emissions(log_b, t0, t1, b):
    """Fill ``b[0:T]`` with exp(log_b - row max); return the sum of row maxima."""
    S = log_b.shape[1]
    shift = 0.0
    for t in range(t1 - t0):
        m = log_b[t0 + t, 0]
        for s in range(1, S):
            if log_b[t0 + t, s] > m:
                m = log_b[t0 + t, s]
        shift += m
        for s in range(S):
            b[t, s] = np.exp(log_b[t0 + t, s] - m)
    return shift


@njit(cache=True, nogil=True)
def forward_backward(log_b, offsets, initial_probs, transition_probs, posteriors, xi_sum,
                     start_sum):
    """Scaled forward-backward over stacked sequences.

    Parameters
    ----------
    log_b : float64 (T_total, S)
        Emission log-likelihoods.
    offsets : int64 (n_seq + 1,)
        Row where each sequence starts; the last entry is T_total.
    initial_probs : float64 (S,)
    transition_probs : float64 (S, S)
    posteriors : float64 (T_total, S), output
        Posterior state probabilities of every bin.
    xi_sum : float64 (S, S), output (overwritten)
        Expected transition counts summed over all bins and sequences.
    start_sum : float64 (S,), output (overwritten)
        Posterior of the first bin summed over sequences.

    Returns
    -------
    float : total log-likelihood (-inf if some sequence has zero probability).
    """
    S = log_b.shape[1]
    n_seq = offsets.shape[0] - 1
    max_len = 0
    for q in range(n_seq):
        if offsets[q + 1] - offsets[q] > max_len:
            max_len = offsets[q + 1] - offsets[q]
    b = np.empty((max_len, S))
    alpha = np.empty((max_len, S))
    scale = np.empty(max_len)
    beta = np.empty(S)
    beta_new = np.empty(S)
    tmp = np.empty(S)
    xi_sum[:, :] = 0.0
    start_sum[:] = 0.0
    total = 0.0
    for q in range(n_seq):
        t0 = offsets[q]
        T = offsets[q + 1] - t0
        total += _scaled_emissions(log_b, t0, t0 + T, b)
        # forward
        c = 0.0
        for s in range(S):
            alpha[0, s] = initial_probs[s] * b[0, s]
            c += alpha[0, s]
        if c <= 0.0:
            return -np.inf
        scale[0] = c
        for s in range(S):
            alpha[0, s] /= c
        for t in range(1, T):
            c = 0.0
            for j in range(S):
                acc = 0.0
                for i in range(S):
                    acc += alpha[t - 1, i] * transition_probs[i, j]
                acc *= b[t, j]
                alpha[t, j] = acc
                c += acc
            if c <= 0.0:
                return -np.inf
            scale[t] = c
            for j in range(S):
                alpha[t, j] /= c
        for t in range(T):
            total += np.log(scale[t])
        # backward, with posteriors and summed xi on the fly
        for s in range(S):
            beta[s] = 1.0
            posteriors[t0 + T - 1, s] = alpha[T - 1, s]
        for t in range(T - 2, -1, -1):
            inv = 1.0 / scale[t + 1]
            for j in range(S):
                tmp[j] = b[t + 1, j] * beta[j] * inv
            norm = 0.0
            for i in range(S):
                acc = 0.0
                ai = alpha[t, i]
                for j in range(S):
                    w = transition_probs[i, j] * tmp[j]
                    acc += w
                    xi_sum[i, j] += ai * w
                beta_new[i] = acc
                g = ai * acc
                posteriors[t0 + t, i] = g
                norm += g
            # norm is 1 up to rounding; renormalise so rows sum to 1 exactly
            for i in range(S):
                posteriors[t0 + t, i] /= norm
                beta[i] = beta_new[i]
        for s in range(S):
            start_sum[s] += posteriors[t0, s]
    return total


@njit(cache=True, nogil=True)
def forward_loglik(log_b, offsets, initial_probs, transition_probs):
    """Total log-likelihood of stacked sequences by the scaled forward pass only."""
    S = log_b.shape[1]
    n_seq = offsets.shape[0] - 1
    alpha = np.empty(S)
    new = np.empty(S)
    b = np.empty(S)
    total = 0.0
    for q in range(n_seq):
        t0 = offsets[q]
        t1 = offsets[q + 1]
        for t in range(t0, t1):
            m = log_b[t, 0]
            for s in range(1, S):
                if log_b[t, s] > m:
                    m = log_b[t, s]
            total += m
            for s in range(S):
                b[s] = np.exp(log_b[t, s] - m)
            c = 0.0
            if t == t0:
                for s in range(S):
                    new[s] = initial_probs[s] * b[s]
                    c += new[s]
            else:
                for j in range(S):
                    acc = 0.0
                    for i in range(S):
                        acc += alpha[i] * transition_probs[i, j]
                    new[j] = acc * b[j]
                    c += new[j]
            if c <= 0.0:
                return -np.inf
            total += np.log(c)
            for s in range(S):
                alpha[s] = new[s] / c
    return total


@njit(cache=True, nogil=True)
def viterbi(log_b, offsets, log_initial_probs, log_transition_probs, path):
    """Most probable state path of each stacked sequence (written into ``path``).

    Returns the sum over sequences of the log joint probability of the best paths.
    Ties are broken towards the lower state index.
    """
    S = log_b.shape[1]
    n_seq = offsets.shape[0] - 1
    max_len = 0
    for q in range(n_seq):
        if offsets[q + 1] - offsets[q] > max_len:
            max_len = offsets[q + 1] - offsets[q]
    delta = np.empty(S)
    new = np.empty(S)
    back = np.empty((max_len, S), dtype=np.int64)
    total = 0.0
    for q in range(n_seq):
        t0 = offsets[q]
        T = offsets[q + 1] - t0
        for s in range(S):
            delta[s] = log_initial_probs[s] + log_b[t0, s]
        for t in range(1, T):
            for j in range(S):
                best = -np.inf
                arg = 0
                for i in range(S):
                    v = delta[i] + log_transition_probs[i, j]
                    if v > best:
                        best = v
                        arg = i
                new[j] = best + log_b[t0 + t, j]
                back[t, j] = arg
            for j in range(S):
                delta[j] = new[j]
        best = -np.inf
        arg = 0
        for s in range(S):
            if delta[s] > best:
                best = delta[s]
                arg = s
        total += best
        path[t0 + T - 1] = arg
        for t in range(T - 1, 0, -1):
            arg = back[t, arg]
            path[t0 + t - 1] = arg
    return total
