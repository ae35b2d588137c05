"""Binary-feature (hypercube) state model: a factorial Poisson hidden Markov model.

K binary latent features x_k in {-1, +1}, each following its own two-state Markov
chain; each unit's log-rate is additive in them,
``log r_i(x) = b_i + sum_k w_ik x_k``, so the 2^K joint states are the vertices of a
hypercube and share structure [1]_. Inference is exact over the 2^K joint states
(K <= 8) with the compiled forward-backward of the free model and the joint transition
matrix kron(A_0, ..., A_{K-1}). The M-step is exact for the chains and a few
damped Newton steps of a Poisson GLM on expected counts for (b, w) (a generalised EM
step: it never decreases the likelihood).

References
----------
.. [1] Ghahramani, Z. & Jordan, M. I. (1997). Factorial hidden Markov models.
   Machine Learning 29:245-273.
.. [2] Dempster, A. P., Laird, N. M. & Rubin, D. B. (1977). Maximum likelihood from
   incomplete data via the EM algorithm. Journal of the Royal Statistical Society B
   39:1-38.
"""

from __future__ import annotations

import itertools
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linear_sum_assignment
from sklearn.exceptions import ConvergenceWarning
from sklearn.utils.validation import check_is_fitted

from attractorfit._validation import check_int, check_positive, check_rng
from attractorfit.errors import InputError
from attractorfit.states._forward_backward import forward_backward
from attractorfit.states._hmm import (RATE_FLOOR, PoissonHMM, _CountData, _CountHMMBase,
                                      _log_emissions, check_count_sequences,
                                      single_thread)

__all__ = ["BinaryFeatureHMM", "CubeComparison", "compare_cube_vs_free", "vertex_codes"]

#: Largest number of binary features (2^8 = 256 joint states).
MAX_FEATURES = 8
_LOG_FLOOR = np.log(RATE_FLOOR)


def vertex_codes(n_features: int) -> np.ndarray:
    """All 2^K vertices of {-1, +1}^K in the order used by :class:`BinaryFeatureHMM`.

    Row j is the binary expansion of j with feature 0 as the most significant bit,
    0 -> -1 and 1 -> +1; e.g. K = 2 gives (-,-), (-,+), (+,-), (+,+). This is the
    order of ``numpy.kron(A_0, A_1, ..., A_{K-1})``.
    """
    K = check_int("n_features", n_features, low=1, high=MAX_FEATURES)
    j = np.arange(2 ** K)[:, None]
    bits = (j >> (K - 1 - np.arange(K))[None, :]) & 1
    return (2 * bits - 1).astype(np.int64)


def _kron_all(mats):
    out = np.ones((1, 1)) if mats[0].ndim == 2 else np.ones(1)
    for m in mats:
        out = np.kron(out, m)
    return out


class BinaryFeatureHMM(_CountHMMBase):
    """Factorial Poisson HMM with K binary features and additive log-rates.

    Parameters
    ----------
    n_features : int
        Number of binary features K (1 to 8); the model has 2^K joint states.
    n_restarts : int
        EM runs from different starting points (>= 1); the best likelihood is kept.
        Restart 0 starts from k-means (2^K clusters of smoothed square-root counts)
        with clusters assigned to vertices by alternating least squares and
        Hungarian assignment; later restarts alternate random additive weights and
        k-means with another seed.
    max_iter : int
        Maximum EM iterations per restart (ConvergenceWarning when reached).
    tol : float
        Stop when the log-likelihood gains less than ``tol`` per bin.
    newton_steps : int
        Damped Newton steps of the emission M-step per EM iteration.
    rng : None, int or numpy Generator

    Attributes
    ----------
    codes_ : ndarray (2^K, K) of +-1
        Vertex of every joint state; order of :func:`vertex_codes` (feature 0 is the
        most significant bit, -1 before +1).
    log_base_ : ndarray (N,)
        b_i, the log expected count per bin of unit i at the centre of the cube.
    weights_ : ndarray (N, K)
        w_ik; ``log rates_[j, i] = log_base_[i] + codes_[j] @ weights_[i]``.
    rates_ : ndarray (2^K, N)
        Expected count per bin of each unit at each vertex (floored at 1e-8).
    feature_transition_probs_ : ndarray (K, 2, 2)
        Two-state chain of each feature (state 0 is -1, state 1 is +1).
    feature_initial_probs_ : ndarray (K, 2)
    transition_probs_ : ndarray (2^K, 2^K)
        Joint transition matrix, kron(A_0, ..., A_{K-1}).
    initial_probs_ : ndarray (2^K,)
        Joint start probabilities (product of the features').
    loglik_history_, n_iter_, converged_, restart_logliks_ :
        As for :class:`PoissonHMM`.

    Notes
    -----
    Number of free parameters: N (K + 1) weights and offsets, 2K transition and K
    start probabilities. ``score``, ``predict``, ``predict_proba`` and ``bic`` work on
    the joint chain exactly as in :class:`PoissonHMM`, so a free PoissonHMM given
    ``initial_probs_``, ``transition_probs_`` and ``rates_`` scores the same.

    References
    ----------
    .. [1] Ghahramani, Z. & Jordan, M. I. (1997). Factorial hidden Markov models.
       Machine Learning 29:245-273.

    Examples
    --------
    >>> import numpy as np
    >>> from attractorfit.states import BinaryFeatureHMM
    >>> rng = np.random.default_rng(1)
    >>> w = np.array([1.0, -1.0, 0.5, 0.0, 0.8, -0.6])       # one feature, 6 units
    >>> x = np.repeat(rng.choice([-1, 1], size=(20, 8)), 10, axis=1)   # 20 trials
    >>> X = [rng.poisson(np.exp(np.outer(xi, w))) for xi in x]
    >>> m = BinaryFeatureHMM(1, rng=0).fit(X)
    >>> bool(np.allclose(np.abs(m.weights_[:, 0]), np.abs(w), atol=0.2))  # up to sign
    True
    """

    def __init__(self, n_features=2, *, n_restarts=3, max_iter=100, tol=1e-4,
                 newton_steps=2, rng=None):
        self.n_features = n_features
        self.n_restarts = n_restarts
        self.max_iter = max_iter
        self.tol = tol
        self.newton_steps = newton_steps
        self.rng = rng

    def n_parameters(self) -> int:
        """N (K + 1) + 3 K free parameters."""
        check_is_fitted(self, ["weights_"])
        N, K = np.shape(self.weights_)
        return int(N * (K + 1) + 3 * K)

    def fit(self, X, y=None):
        """Fit by (generalised) EM with restarts; see the class docstring.

        Parameters
        ----------
        X : array (T x N) of counts, list of per-trial arrays, or BinnedCounts
        y : ignored

        Returns
        -------
        self
        """
        with single_thread():
            return self._fit(_CountData(check_count_sequences("X", X)))

    def _fit(self, data):
        K = check_int("n_features", self.n_features, low=1, high=MAX_FEATURES)
        check_int("n_restarts", self.n_restarts, low=1)
        check_int("max_iter", self.max_iter, low=1)
        check_int("newton_steps", self.newton_steps, low=1)
        check_positive("tol", self.tol)
        if 2 ** K > data.n_bins:
            raise InputError(f"n_features: {K} features ({2 ** K} joint states) need at least "
                             f"{2 ** K} bins of data, got {data.n_bins}")
        rng = check_rng(self.rng)
        codes = vertex_codes(K)
        seeds = rng.integers(0, 2**31 - 1, size=int(self.n_restarts))
        smooth = data.smoothed
        best, logliks = None, []
        for r in range(int(self.n_restarts)):
            kind = "kmeans" if r % 2 == 0 else "random"
            params = _initial_cube(data, smooth, codes, kind, int(seeds[r]))
            res = _cube_em(data, codes, *params, max_iter=int(self.max_iter),
                           tol=float(self.tol), newton_steps=int(self.newton_steps))
            logliks.append(res["loglik"][-1])
            if best is None or res["loglik"][-1] > best["loglik"][-1]:
                best = res
        self.codes_ = codes
        self.log_base_ = best["theta"][:, 0].copy()
        self.weights_ = best["theta"][:, 1:].copy()
        self.rates_ = _cube_rates(codes, best["theta"])
        self.feature_initial_probs_ = best["p"]
        self.feature_transition_probs_ = best["A"]
        self.initial_probs_ = _kron_all(list(best["p"]))
        self.transition_probs_ = _kron_all(list(best["A"]))
        self.loglik_history_ = np.asarray(best["loglik"])
        self.n_iter_ = best["n_iter"]
        self.converged_ = best["converged"]
        self.restart_logliks_ = np.asarray(logliks)
        self.n_units_ = data.n_units
        if not self.converged_:
            warnings.warn(f"BinaryFeatureHMM(n_features={K}): EM did not converge in "
                          f"max_iter={self.max_iter} iterations", ConvergenceWarning,
                          stacklevel=3)
        return self


def _design(codes):
    return np.hstack([np.ones((codes.shape[0], 1)), codes.astype(float)])


def _cube_rates(codes, theta):
    eta = _design(codes) @ theta.T
    return np.maximum(np.exp(eta), RATE_FLOOR)


def _glm_objective(theta, Z, G, Y):
    eta = theta @ Z.T                      # (N, V)
    return (Y.T * eta).sum(axis=1) - (G[None, :] * np.exp(eta)).sum(axis=1)


def _newton_glm(theta, Z, G, Y, n_steps):
    """Damped Newton ascent of sum_j Y_ji eta_ji - G_j exp(eta_ji), per unit i.

    Each unit's step is halved until its objective does not decrease (so the
    M-step is a generalised EM step). Returns the new theta (N x (K+1)).
    """
    N, P = theta.shape
    f = _glm_objective(theta, Z, G, Y)
    ridge = 1e-9 * np.eye(P)
    for _ in range(n_steps):
        mu = G[None, :] * np.exp(theta @ Z.T)                   # (N, V)
        grad = (Y.T - mu) @ Z                                   # (N, P)
        H = np.einsum("nv,va,vb->nab", mu, Z, Z) + ridge        # minus the Hessian
        step = np.linalg.solve(H, grad[:, :, None])[:, :, 0]
        scale = np.ones(N)
        new = theta + step
        f_new = _glm_objective(new, Z, G, Y)
        for _ in range(30):
            bad = ~(f_new >= f)
            if not bad.any():
                break
            scale[bad] *= 0.5
            new[bad] = theta[bad] + scale[bad, None] * step[bad]
            f_new[bad] = _glm_objective(new[bad], Z, G, Y[:, bad])
        keep = f_new >= f
        theta = np.where(keep[:, None], new, theta)
        f = np.where(keep, f_new, f)
        # keep log-rates above the floor's log so rates_ stays representable
        theta[:, 0] = np.maximum(theta[:, 0], _LOG_FLOOR - np.abs(theta[:, 1:]).sum(axis=1))
    return theta


def _feature_indicators(codes):
    """B[k] (V x 2): indicator of feature k being -1 (column 0) or +1 (column 1)."""
    V, K = codes.shape
    B = np.zeros((K, V, 2))
    for k in range(K):
        B[k, np.arange(V), (codes[:, k] > 0).astype(int)] = 1.0
    return B


def _cube_em(data, codes, theta, p, A, *, max_iter, tol, newton_steps):
    V, K = codes.shape
    Z = _design(codes)
    B = _feature_indicators(codes)
    theta, p, A = theta.copy(), p.copy(), A.copy()
    post = np.empty((data.n_bins, V))
    xi = np.empty((V, V))
    s0 = np.empty(V)
    lls = []
    converged, n_iter = False, 0
    for it in range(max_iter + 1):
        rates = _cube_rates(codes, theta)
        log_b = _log_emissions(data, rates)
        ll = forward_backward(log_b, data.offsets, _kron_all(list(p)), _kron_all(list(A)),
                              post, xi, s0)
        lls.append(ll)
        if it > 0 and lls[-1] - lls[-2] < tol * data.n_bins:
            converged = True
            break
        if it == max_iter or not np.isfinite(ll):
            break
        for k in range(K):
            m = s0 @ B[k]
            p[k] = m / m.sum()
            c = B[k].T @ xi @ B[k]
            row = c.sum(axis=1)
            ok = row > 0
            A[k][ok] = c[ok] / row[ok, None]
        G = post.sum(axis=0)
        Y = post.T @ data.X
        theta = _newton_glm(theta, Z, G, Y, newton_steps)
        n_iter += 1
    return {"theta": theta, "p": p, "A": A, "loglik": lls, "n_iter": n_iter,
            "converged": converged}


def _assign_to_vertices(L, w, codes, rng, n_starts=20):
    """Assign cluster log-rate rows L (V x N) to cube vertices.

    Alternates a weighted least-squares fit of the additive model given the
    assignment with a Hungarian reassignment of clusters to vertices; several random
    starts (all permutations when V <= 4), keeps the smallest residual.
    Returns (perm, theta): cluster ``c`` sits at vertex ``perm[c]``.
    """
    V = L.shape[0]
    Z = _design(codes)
    if V <= 4:
        starts = [np.array(q) for q in itertools.permutations(range(V))]
    else:
        starts = [rng.permutation(V) for _ in range(n_starts)]
    best = (np.inf, None, None)
    sw = np.sqrt(w)[:, None]
    for perm in starts:
        for _ in range(50):
            theta = np.linalg.lstsq(sw * Z[perm], sw * L, rcond=None)[0].T   # (N, P)
            fitted = Z @ theta.T                                             # (V, N)
            cost = w[:, None] * ((L[:, None, :] - fitted[None, :, :]) ** 2).sum(axis=2)
            _, new = linear_sum_assignment(cost)
            if np.array_equal(new, perm):
                break
            perm = new
        res = cost[np.arange(V), perm].sum()
        if res < best[0]:
            best = (res, perm.copy(), theta)
    return best[1], best[2]


def _initial_cube(data, smooth, codes, kind, seed):
    V, K = codes.shape
    r = np.random.default_rng(seed)
    mean = np.maximum(data.X.mean(axis=0), RATE_FLOOR)
    sticky_chain = np.array([[0.9, 0.1], [0.1, 0.9]])
    if kind == "random":
        theta = np.hstack([np.log(mean)[:, None], 0.3 * r.standard_normal((data.n_units, K))])
        return theta, np.full((K, 2), 0.5), np.repeat(sticky_chain[None], K, axis=0)
    from sklearn.cluster import KMeans

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        labels = KMeans(n_clusters=V, n_init=1, random_state=seed).fit(smooth).labels_
    counts = np.bincount(labels, minlength=V).astype(float)
    sums = np.eye(V)[labels].T @ data.X
    rates = np.where(counts[:, None] > 0, sums / np.maximum(counts, 1)[:, None], mean)
    L = np.log(np.maximum(rates, 0.01 * mean[None, :]))
    perm, theta = _assign_to_vertices(L, np.maximum(counts, 1.0), codes, r)
    vert = perm[labels]                     # vertex index of every bin
    bits = (codes[vert] > 0).astype(int)    # (T, K)
    p = np.ones((K, 2))
    A = np.ones((K, 2, 2))
    for k in range(K):
        p[k] += np.bincount(bits[data.offsets[:-1], k], minlength=2)
        A[k] += data.transition_pairs(bits[:, k], 2)
    return theta, p / p.sum(axis=1, keepdims=True), A / A.sum(axis=2, keepdims=True)


# --------------------------------------------------------------------------- compare
@dataclass
class CubeComparison:
    """Binary-feature (hypercube) model vs a free Poisson HMM on the same data.

    Attributes
    ----------
    n_features : int
        K of the cube model (2^K joint states).
    n_states : int
        S of the free model.
    heldout_loglik_cube, heldout_loglik_free : float
        Log-likelihood of held-out trials summed over the k folds (each trial is
        held out once), higher is better.
    heldout_per_bin_cube, heldout_per_bin_free : float
        The same divided by the total number of bins.
    heldout_se_diff : float
        Standard error of the cube-minus-free held-out difference, from the spread
        of the per-trial differences (sqrt(n) x s.d.).
    bic_cube, bic_free : float
        BIC of the models fitted on all trials (lower is better).
    n_parameters_cube, n_parameters_free : int
    preferred_heldout, preferred_bic : str
        ``"cube"`` or ``"free"``.
    cube_model : BinaryFeatureHMM
    free_model : PoissonHMM
        Both fitted on all trials.
    n_folds : int
    """

    n_features: int
    n_states: int
    heldout_loglik_cube: float
    heldout_loglik_free: float
    heldout_per_bin_cube: float
    heldout_per_bin_free: float
    heldout_se_diff: float
    bic_cube: float
    bic_free: float
    n_parameters_cube: int
    n_parameters_free: int
    preferred_heldout: str
    preferred_bic: str
    cube_model: BinaryFeatureHMM
    free_model: PoissonHMM
    n_folds: int


def compare_cube_vs_free(sequences, n_features, n_states=None, *, n_folds=5, sticky=0.0,
                         n_restarts=3, max_iter=100, tol=1e-4, rng=None) -> CubeComparison:
    """Does a hypercube of binary features explain the states as well as free states?

    Fits a :class:`BinaryFeatureHMM` with ``n_features`` features and a free
    :class:`PoissonHMM` with ``n_states`` states (default 2^K), compares the
    log-likelihood of held-out trials (k-fold over whole trials, the same folds for
    both) and BIC on all trials. With as many free states as vertices the free model
    nests the cube model, so the held-out comparison asks whether the cube's
    constraint (additive log-rates, independent feature chains) costs predictive
    power; BIC trades the fit against the parameter counts.

    Parameters
    ----------
    sequences : list of count arrays (T_i x N), or BinnedCounts
    n_features : int
        K (1 to 8).
    n_states : int, optional
        States of the free model (default 2^K).
    n_folds : int
        Folds over trials (2 <= n_folds <= number of trials).
    sticky : float
        Sticky prior of the free model (see :class:`PoissonHMM`).
    n_restarts, max_iter, tol :
        Passed to both models.
    rng : None, int or Generator

    Returns
    -------
    CubeComparison
    """
    from attractorfit.states._select import _heldout_per_trial, _trial_folds

    K = check_int("n_features", n_features, low=1, high=MAX_FEATURES)
    S = 2 ** K if n_states is None else check_int("n_states", n_states, low=1)
    seqs = check_count_sequences("sequences", sequences)
    rng = check_rng(rng)
    folds = _trial_folds(len(seqs), n_folds, rng)
    data = _CountData(seqs)
    s_cube, s_free, s_all_c, s_all_f = np.random.SeedSequence(
        int(rng.integers(2**63 - 1))).spawn(4)

    def make_cube(seed):
        return BinaryFeatureHMM(K, n_restarts=n_restarts, max_iter=max_iter, tol=tol,
                                rng=np.random.default_rng(seed))

    def make_free(seed):
        return PoissonHMM(S, sticky=sticky, n_restarts=n_restarts, max_iter=max_iter,
                          tol=tol, rng=np.random.default_rng(seed))

    with warnings.catch_warnings(), single_thread():
        warnings.simplefilter("ignore", ConvergenceWarning)
        ll_c = _heldout_per_trial(data, folds, make_cube, s_cube)
        ll_f = _heldout_per_trial(data, folds, make_free, s_free)
        cube = make_cube(s_all_c)._fit(data)
        free = make_free(s_all_f)._fit(data)
    n_bins = sum(len(x) for x in seqs)
    diff = ll_c - ll_f
    se = float(np.sqrt(len(diff)) * diff.std(ddof=1)) if len(diff) > 1 else np.nan
    bic_c, bic_f = cube.bic(seqs), free.bic(seqs)
    return CubeComparison(
        n_features=K, n_states=S, heldout_loglik_cube=float(ll_c.sum()),
        heldout_loglik_free=float(ll_f.sum()), heldout_per_bin_cube=float(ll_c.sum() / n_bins),
        heldout_per_bin_free=float(ll_f.sum() / n_bins), heldout_se_diff=se,
        bic_cube=bic_c, bic_free=bic_f, n_parameters_cube=cube.n_parameters(),
        n_parameters_free=free.n_parameters(),
        preferred_heldout="cube" if ll_c.sum() >= ll_f.sum() else "free",
        preferred_bic="cube" if bic_c <= bic_f else "free", cube_model=cube, free_model=free,
        n_folds=len(folds))
