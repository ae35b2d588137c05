"""Poisson hidden Markov model of binned spike counts.

Each bin's count vector x_t (N units) is Poisson given the hidden state z_t, with
expected counts ``rates_[z_t]`` (counts per bin; divide by the bin size for Hz), and the
states follow a Markov chain with ``initial_probs_`` and ``transition_probs_`` [1]_. Trials are
independent sequences, each starting from ``initial_probs_``. Parameters are fitted by EM
(Baum-Welch) with several restarts; an optional sticky Dirichlet prior on the
self-transitions favours persistent states [2]_, [3]_.

References
----------
.. [1] Rabiner, L. R. (1989). A tutorial on hidden Markov models and selected
   applications in speech recognition. Proceedings of the IEEE 77:257-286.
.. [2] Fox, E. B., Sudderth, E. B., Jordan, M. I. & Willsky, A. S. (2011). A sticky
   HDP-HMM with application to speaker diarization. Annals of Applied Statistics
   5:1020-1056.
.. [3] Li T, La Camera G (2025) A sticky Poisson hidden Markov model for solving the
   problem of over-segmentation and rapid state switching in cortical datasets. PLOS ONE
   20(7): e0325979.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.special import gammaln
from sklearn.base import BaseEstimator
from sklearn.exceptions import ConvergenceWarning
from sklearn.utils.validation import check_is_fitted

from attractorfit._validation import (check_array, check_int, check_nonnegative,
                                      check_positive, check_rng)
from attractorfit.errors import InputError
from attractorfit.states._forward_backward import (forward_backward, forward_loglik,
                                                   row_log_factorial, viterbi)

__all__ = ["PoissonHMM", "check_count_sequences"]

#: Smallest expected count per bin a fitted rate may take (see PoissonHMM Notes).
RATE_FLOOR = 1e-8
#: Rates below this are treated as this value when evaluating log-likelihoods, so that
#: a hand-set zero rate gives probability 0 for positive counts and 1 for zero counts.
_EVAL_FLOOR = 1e-300
#: A state whose summed posterior is below this (in bins) is "empty" in an M-step.
_EMPTY_STATE = 1e-6
#: k-means initialisation runs on at most this many randomly chosen bins.
_INIT_MAX_BINS = 4000
#: k-means++ seedings per k-means initialisation (the lowest inertia is kept).
_KMEANS_N_INIT = 4
#: EM iterations every restart runs before only the best one is continued.
_SCREEN_ITER = 10
#: Width (s.d., bins) of the Gaussian smoothing applied before k-means initialisation.
_INIT_SMOOTH_BINS = 1.5


def check_count_sequences(name: str, value, *, n_units: int | None = None) -> list:
    """Validate spike-count sequences and return them as a list of 2-D arrays.

    ``value`` is one count matrix (T x N), a list/tuple of per-trial matrices
    (T_i x N), or an object with a ``sequences()`` method (e.g. ``BinnedCounts``).
    Every matrix must be 2-D with at least one row and one column, finite,
    non-negative and whole-numbered, and all must have the same number of columns
    (``n_units`` if given). Integer arrays are returned as they are (only their sign
    needs checking), anything else as float64. Raises InputError naming the sequence
    and the first bad element.
    """
    if hasattr(value, "sequences") and callable(value.sequences):
        value = value.sequences()
    if not isinstance(value, (list, tuple)):
        arr = np.asarray(value) if not isinstance(value, np.ndarray) else value
        if arr.ndim == 3:
            raise InputError(f"{name}: got a 3-dimensional array {arr.shape}; pass a list "
                             "of per-trial (bins x units) count matrices instead")
        seqs, labels = [value], [name]
    else:
        if len(value) == 0:
            raise InputError(f"{name}: expected at least one count sequence, got an empty list")
        seqs = list(value)
        labels = [f"{name}[{i}]" for i in range(len(seqs))]
    out = []
    for lab, x in zip(labels, seqs):
        if isinstance(x, np.ndarray) and x.dtype.kind in "ui" and x.ndim == 2:
            _check_shape_units(lab, x, n_units, out)
            if x.dtype.kind == "i" and x.size and x.min() < 0:
                idx = tuple(int(i) for i in np.argwhere(x < 0)[0])
                raise InputError(f"{lab}: element {idx} is {int(x[idx])}; spike counts must "
                                 "be >= 0")
            out.append(x)
            continue
        x = check_array(lab, x, dtype=np.float64)
        _check_shape_units(lab, x, n_units, out)
        neg = x < 0
        if neg.any():
            idx = tuple(int(i) for i in np.argwhere(neg)[0])
            raise InputError(f"{lab}: element {idx} is {float(x[idx])!r}; spike counts must "
                             "be >= 0")
        frac = x != np.floor(x)
        if frac.any():
            idx = tuple(int(i) for i in np.argwhere(frac)[0])
            raise InputError(f"{lab}: element {idx} is {float(x[idx])!r}; spike counts must be "
                             "whole numbers")
        out.append(x)
    return out


def _check_shape_units(lab, x, n_units, previous):
    if x.ndim != 2:
        raise InputError(f"{lab}: expected a 2-dimensional (bins x units) count matrix, "
                         f"got shape {x.shape}")
    if x.shape[0] == 0 or x.shape[1] == 0:
        raise InputError(f"{lab}: expected at least one bin and one unit, got shape "
                         f"{x.shape}")
    expected = n_units if n_units is not None else (previous[0].shape[1] if previous else None)
    if expected is not None and x.shape[1] != expected:
        what = "the fitted model" if n_units is not None else "the first sequence"
        raise InputError(f"{lab}: has {x.shape[1]} units (columns) but {what} has "
                         f"{expected}")


def single_thread():
    """Context pinning BLAS/OpenMP pools to one thread while fitting.

    Fits are small matrix products; on a shared machine extra threads mostly add
    contention, and a fixed thread count keeps results bit-identical between serial
    and parallel (joblib) runs.
    """
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=1)


class _CountData:
    """Validated sequences stacked once for fitting or scoring."""

    def __init__(self, seqs):
        self.seqs = seqs
        self.lengths = np.array([len(x) for x in seqs], dtype=np.int64)
        self.offsets = np.concatenate([[0], np.cumsum(self.lengths)]).astype(np.int64)
        if len(seqs) == 1:
            self.X = np.ascontiguousarray(seqs[0], dtype=np.float64)
        else:
            self.X = np.concatenate(seqs, axis=0, dtype=np.float64)
        self.n_bins = int(self.offsets[-1])
        self.n_units = int(self.X.shape[1])
        self._log_fact = None
        self._smoothed = None

    @property
    def log_fact(self) -> np.ndarray:
        """sum_i log(x_ti!) for every bin (constant in the parameters; computed once)."""
        if self._log_fact is None:
            top = int(self.X.max()) if self.X.size else 0
            if top <= 10_000_000:
                table = gammaln(np.arange(top + 1, dtype=np.float64) + 1.0)
                self._log_fact = row_log_factorial(self.X, table)
            else:  # pragma: no cover - absurd counts; fall back to direct evaluation
                self._log_fact = gammaln(self.X + 1.0).sum(axis=1)
        return self._log_fact

    @property
    def smoothed(self) -> np.ndarray:
        """Square-root counts smoothed within each sequence (computed once)."""
        if self._smoothed is None:
            self._smoothed = _smoothed(self)
        return self._smoothed

    def transition_pairs(self, labels, S) -> np.ndarray:
        """Counts of consecutive label pairs within sequences (S x S)."""
        within = np.ones(max(self.n_bins - 1, 0), dtype=bool)
        within[self.offsets[1:-1] - 1] = False
        idx = labels[:-1][within] * S + labels[1:][within]
        return np.bincount(idx, minlength=S * S).reshape(S, S).astype(float)

    def subset(self, idx) -> "_CountData":
        """The sequences at indices ``idx``, reusing the cached per-bin arrays."""
        idx = np.asarray(idx, dtype=np.int64)
        new = _CountData([self.seqs[i] for i in idx])
        rows = np.concatenate([np.arange(self.offsets[i], self.offsets[i + 1]) for i in idx])
        if self._log_fact is not None:
            new._log_fact = self._log_fact[rows]
        if self._smoothed is not None:
            new._smoothed = self._smoothed[rows]
        return new

    def split(self, arr):
        return [arr[self.offsets[i]:self.offsets[i + 1]] for i in range(len(self.seqs))]


def _log_emissions(data: _CountData, rates: np.ndarray) -> np.ndarray:
    """Poisson log-likelihood of every bin under every state: (T_total x S).

    One matrix product, X @ log(rates).T - rates.sum(1) - log(x!) summed over units.
    """
    log_r = np.log(np.maximum(rates, _EVAL_FLOOR))
    out = data.X @ log_r.T
    out -= rates.sum(axis=1)[None, :]
    out -= data.log_fact[:, None]
    return out


class _CountHMMBase(BaseEstimator):
    """Scoring and decoding shared by the count HMMs.

    Fitted attributes: ``rates_``, ``initial_probs_``, ``transition_probs_``.
    """

    #: names of the (start, transition, rates) attributes of the chain that is scored
    _chain_attrs = ("initial_probs_", "transition_probs_", "rates_")

    def _joint_params(self):
        check_is_fitted(self, list(self._chain_attrs))
        start, trans, rates = (np.asarray(getattr(self, a), dtype=np.float64)
                               for a in self._chain_attrs)
        if rates.ndim != 2:
            raise InputError(f"rates_: expected a 2-D (states x units) array, got shape "
                             f"{rates.shape}")
        S = rates.shape[0]
        if start.shape != (S,):
            raise InputError(f"initial_probs_: expected shape ({S},) to match rates_, got "
                             f"{start.shape}")
        if trans.shape != (S, S):
            raise InputError(f"transition_probs_: expected shape ({S}, {S}) to match rates_, got "
                             f"{trans.shape}")
        for name, arr in zip(self._chain_attrs, (start, trans, rates)):
            if not np.all(np.isfinite(arr)) or np.any(arr < 0):
                raise InputError(f"{name}: expected finite values >= 0")
        if abs(start.sum() - 1.0) > 1e-6:
            raise InputError(f"initial_probs_: expected entries summing to 1, got {start.sum()!r}")
        bad = np.abs(trans.sum(axis=1) - 1.0) > 1e-6
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"transition_probs_: row {i} sums to {trans[i].sum()!r}, expected 1")
        return start, trans, rates

    def _data(self, X, name="X"):
        check_is_fitted(self, list(self._chain_attrs))
        rates = np.asarray(self.rates_)
        n_units = rates.shape[1] if rates.ndim == 2 else None
        return _CountData(check_count_sequences(name, X, n_units=n_units))

    @staticmethod
    def _is_single(X) -> bool:
        return not (isinstance(X, (list, tuple)) or hasattr(X, "sequences"))

    def score(self, X) -> float:
        """Total log-likelihood of ``X`` under the current parameters.

        Parameters
        ----------
        X : array (T x N) of counts, or a list of per-trial arrays
            A list is scored as independent sequences, each starting from
            ``initial_probs_``; the result is the sum over sequences.

        Returns
        -------
        float
        """
        start, trans, rates = self._joint_params()
        data = self._data(X)
        with single_thread():
            log_b = _log_emissions(data, rates)
        return float(forward_loglik(log_b, data.offsets, start, trans))

    def _sequence_logliks(self, data) -> np.ndarray:
        """Log-likelihood of every sequence of ``data`` separately (array, n_seq)."""
        start, trans, rates = self._joint_params()
        log_b = _log_emissions(data, rates)
        return np.array([forward_loglik(log_b, data.offsets[q:q + 2], start, trans)
                         for q in range(len(data.seqs))])

    def _posteriors(self, data):
        start, trans, rates = self._joint_params()
        with single_thread():
            log_b = _log_emissions(data, rates)
        S = rates.shape[0]
        post = np.empty((data.n_bins, S))
        xi = np.empty((S, S))
        s0 = np.empty(S)
        ll = forward_backward(log_b, data.offsets, start, trans, post, xi, s0)
        return ll, post, xi, s0, log_b

    def predict_proba(self, X):
        """Posterior probability of each state in each bin (forward-backward).

        Returns an array (T x S) for one count matrix, or a list of them for a list.
        """
        data = self._data(X)
        _, post, *_ = self._posteriors(data)
        return post if self._is_single(X) else data.split(post)

    def predict(self, X):
        """Most probable state path (Viterbi), one integer state per bin.

        Viterbi (the jointly most probable path), not the per-bin posterior argmax;
        use ``predict_proba(X).argmax(1)`` for the latter. Returns an int array (T,)
        for one count matrix, or a list of them for a list.
        """
        start, trans, rates = self._joint_params()
        data = self._data(X)
        with single_thread():
            log_b = _log_emissions(data, rates)
        path = np.empty(data.n_bins, dtype=np.int64)
        with np.errstate(divide="ignore"):
            viterbi(log_b, data.offsets, np.log(start), np.log(trans), path)
        return path if self._is_single(X) else data.split(path)

    def bic(self, X) -> float:
        """Bayesian information criterion, -2 log L + p log(T), T the total number of bins.

        Lower is better. ``p`` is :meth:`n_parameters`.
        """
        data = self._data(X)
        start, trans, rates = self._joint_params()
        with single_thread():
            ll = forward_loglik(_log_emissions(data, rates), data.offsets, start, trans)
        return float(-2.0 * ll + self.n_parameters() * np.log(data.n_bins))


class PoissonHMM(_CountHMMBase):
    """Hidden Markov model with independent Poisson counts per unit given the state.

    Parameters
    ----------
    n_states : int
        Number of hidden states S (>= 1).
    sticky : float
        Strength of a Dirichlet prior on the self-transitions (MAP estimate). The
        M-step adds ``kappa = sticky * (T - n_seq) / S`` pseudo-counts to every diagonal
        entry of the expected transition counts, where ``T - n_seq`` is the number of
        observed transitions (bins minus trials). So ``sticky`` is the prior's weight
        relative to the data's transitions, independent of recording length: 0 is plain
        maximum likelihood, 0.1 adds pseudo-counts worth 10% of the transitions.
    n_restarts : int
        Number of EM runs from different starting points (>= 1). Every run does 10
        EM iterations; the one with the highest objective then continues to
        convergence and is kept (screening restarts this way costs little
        and rarely changes the winner). Restart 0 starts from k-means (scikit-learn
        ``KMeans``) on Gaussian-smoothed square-root counts; odd restarts from random
        centres (S random smoothed bins, nearest-centre labels), even ones from
        k-means with another seed.
    max_iter : int
        Maximum number of EM iterations per restart (ConvergenceWarning when reached
        by the kept run).
    tol : float
        EM stops when the objective gains less than ``tol`` per bin (log-likelihood
        units per bin) in one iteration.
    init : {"kmeans", "random", "given"}
        Starting point of restart 0: k-means (default), random centres, or the
        current ``initial_probs_``, ``transition_probs_`` and ``rates_`` (set by hand or from a
        previous fit). Restarts beyond the first follow the scheme above.
    rng : None, int or numpy Generator
        Seed for k-means and random restarts.

    Attributes
    ----------
    initial_probs_ : ndarray (S,)
        Probability of each state in the first bin of a trial.
    transition_probs_ : ndarray (S, S)
        transition_probs_[i, j] = P(z_{t+1} = j | z_t = i).
    rates_ : ndarray (S, N)
        Expected count per bin of each unit in each state (divide by the bin size
        for Hz). Floored at ``RATE_FLOOR`` = 1e-8.
    loglik_history_ : ndarray
        Log-likelihood of the training data at each EM iteration of the kept run
        (the first entry is the starting point).
    objective_history_ : ndarray
        Log-likelihood plus log prior (``kappa * sum_i log transition_probs_[i, i]``); equals
        ``loglik_history_`` when ``sticky`` = 0. EM never decreases it.
    n_iter_ : int
        Number of EM updates (M-steps) in the kept run.
    converged_ : bool
    restart_objectives_ : ndarray (n_restarts,)
        Objective of every restart after the screening iterations (final objective
        for the kept one).
    n_units_ : int

    Notes
    -----
    Emission log-likelihoods of all bins are one matrix product,
    ``X @ log(rates).T - rates.sum(1) - sum_i log(x_i!)``; the scaled forward-backward
    recursions are compiled (numba) and accumulate the expected transition counts
    without storing a T x S x S array.

    Rates: a unit that never fires in a state gets rate ``RATE_FLOOR``. A state that
    receives no posterior mass in an M-step (summed posterior below 1e-6 bins) keeps
    its previous rates and transition row, and a state whose rates are all at the
    floor after fitting raises a ``ConvergenceWarning`` naming it (it is a "silent"
    state and its rates are the floor, not an estimate).

    The number of free parameters is (S - 1) + S (S - 1) + S N.

    ``initial_probs_``, ``transition_probs_`` and ``rates_`` may be set by hand (e.g. to evaluate
    given parameters); ``score``, ``predict``, ``predict_proba`` and ``bic`` check
    their shapes and that the probabilities sum to 1.

    References
    ----------
    .. [1] Rabiner, L. R. (1989). A tutorial on hidden Markov models and selected
       applications in speech recognition. Proceedings of the IEEE 77:257-286.
    .. [2] Fox, E. B., Sudderth, E. B., Jordan, M. I. & Willsky, A. S. (2011). A sticky
       HDP-HMM with application to speaker diarization. Annals of Applied Statistics
       5:1020-1056.

    Examples
    --------
    >>> import numpy as np
    >>> from attractorfit.states import PoissonHMM
    >>> rng = np.random.default_rng(0)
    >>> X = [rng.poisson(np.where(np.arange(60)[:, None] < 30, 1.0, 4.0), size=(60, 5))
    ...      for _ in range(10)]
    >>> model = PoissonHMM(n_states=2, rng=0).fit(X)
    >>> np.round(np.sort(model.rates_.mean(axis=1)), 0)
    array([1., 4.])
    """

    def __init__(self, n_states=2, *, sticky=0.0, n_restarts=3, max_iter=100, tol=1e-4,
                 init="kmeans", rng=None):
        self.n_states = n_states
        self.sticky = sticky
        self.n_restarts = n_restarts
        self.max_iter = max_iter
        self.tol = tol
        self.init = init
        self.rng = rng

    # ------------------------------------------------------------------ checks
    def _check_options(self, data):
        S = check_int("n_states", self.n_states, low=1)
        check_nonnegative("sticky", self.sticky)
        check_int("n_restarts", self.n_restarts, low=1)
        check_int("max_iter", self.max_iter, low=1)
        check_positive("tol", self.tol)
        if self.init not in ("kmeans", "random", "given"):
            raise InputError(f"init: expected 'kmeans', 'random' or 'given', got {self.init!r}")
        if S > data.n_bins:
            raise InputError(f"n_states: {S} states need at least {S} bins of data, got "
                             f"{data.n_bins}")
        return S

    def n_parameters(self) -> int:
        """Number of free parameters: (S - 1) + S (S - 1) + S N."""
        check_is_fitted(self, ["rates_"])
        S, N = np.shape(self.rates_)
        return int((S - 1) + S * (S - 1) + S * N)

    # ---------------------------------------------------------------- fitting
    def fit(self, X, y=None):
        """Fit by EM with restarts.

        Parameters
        ----------
        X : array (T x N) of counts, list of per-trial arrays, or BinnedCounts
            Trials are independent sequences, each starting from ``initial_probs_``.
        y : ignored

        Returns
        -------
        self
        """
        with single_thread():
            return self._fit(_CountData(check_count_sequences("X", X)))

    def _fit(self, data):
        S = self._check_options(data)
        rng = check_rng(self.rng)
        kappa = float(self.sticky) * max(data.n_bins - len(data.seqs), 0) / S
        given = None
        if self.init == "given":
            start, trans, rates = self._joint_params()
            if rates.shape != (S, data.n_units):
                raise InputError(f"init='given': rates_ has shape {rates.shape}, expected "
                                 f"({S}, {data.n_units})")
            given = (start.copy(), trans.copy(), np.maximum(rates, RATE_FLOOR))
        best = None
        objectives = []
        seeds = rng.integers(0, 2**31 - 1, size=int(self.n_restarts))
        max_iter, tol = int(self.max_iter), float(self.tol)
        screen = max_iter if self.n_restarts == 1 else min(_SCREEN_ITER, max_iter)
        for r in range(int(self.n_restarts)):
            if r == 0 and given is not None:
                params = given
            else:
                kind = self.init if r == 0 else ("random" if r % 2 else "kmeans")
                params = _initial_params(data, data.smoothed, S, kind, int(seeds[r]))
            res = _em(data, *params, kappa=kappa, max_iter=screen, tol=tol)
            objectives.append(res["objective"][-1])
            if best is None or res["objective"][-1] > best["objective"][-1]:
                best = res
        if not best["converged"] and screen < max_iter:
            more = _em(data, best["start"], best["trans"], best["rates"], kappa=kappa,
                       max_iter=max_iter - screen, tol=tol)
            for key in ("loglik", "objective"):
                more[key] = best[key] + more[key][1:]
            more["n_iter"] += best["n_iter"]
            best = more
            objectives[int(np.argmax(objectives))] = best["objective"][-1]
        self.initial_probs_ = best["start"]
        self.transition_probs_ = best["trans"]
        self.rates_ = best["rates"]
        self.loglik_history_ = np.asarray(best["loglik"])
        self.objective_history_ = np.asarray(best["objective"])
        self.n_iter_ = best["n_iter"]
        self.converged_ = best["converged"]
        self.restart_objectives_ = np.asarray(objectives)
        self.n_units_ = data.n_units
        self._sticky_kappa = kappa
        if not self.converged_:
            warnings.warn(f"PoissonHMM(n_states={S}): EM did not converge in max_iter="
                          f"{self.max_iter} iterations (last gain per bin "
                          f"{_last_gain(best, data):.3g} > tol={self.tol})",
                          ConvergenceWarning, stacklevel=3)
        silent = np.flatnonzero(np.all(self.rates_ <= RATE_FLOOR, axis=1))
        if silent.size:
            warnings.warn(f"PoissonHMM: state(s) {silent.tolist()} have zero counts in every "
                          f"unit; their rates are the floor {RATE_FLOOR:g}, not estimates",
                          ConvergenceWarning, stacklevel=3)
        return self


def _last_gain(res, data):
    obj = res["objective"]
    return (obj[-1] - obj[-2]) / data.n_bins if len(obj) > 1 else np.nan


def _smoothed(data: _CountData) -> np.ndarray:
    """Square-root counts smoothed within each sequence (stacked)."""
    parts = []
    for x in data.split(np.sqrt(data.X)):
        parts.append(gaussian_filter1d(x, _INIT_SMOOTH_BINS, axis=0, mode="nearest")
                     if len(x) > 1 else x)
    return np.concatenate(parts, axis=0)


def _labels_to_params(data, labels, S):
    """Rates, start and transition probabilities from a hard labelling of the bins."""
    counts = np.bincount(labels, minlength=S).astype(float)
    sums = np.eye(S)[labels].T @ data.X
    mean = data.X.mean(axis=0)
    rates = np.where(counts[:, None] > 0, sums / np.maximum(counts, 1)[:, None], mean[None, :])
    rates = np.maximum(rates, RATE_FLOOR)
    trans = 1.0 + data.transition_pairs(labels, S)
    first = labels[data.offsets[:-1]]
    start = np.bincount(first, minlength=S).astype(float) + 1.0
    return start / start.sum(), trans / trans.sum(axis=1, keepdims=True), rates


def _initial_params(data, smooth, S, kind, seed):
    if S == 1:
        return _labels_to_params(data, np.zeros(data.n_bins, dtype=np.int64), 1)
    r = np.random.default_rng(seed)
    if kind == "kmeans":
        from sklearn.cluster import KMeans

        # k-means on at most _INIT_MAX_BINS random bins, then label every bin
        sub = smooth
        if data.n_bins > _INIT_MAX_BINS:
            sub = smooth[np.sort(r.choice(data.n_bins, size=_INIT_MAX_BINS, replace=False))]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # duplicate points with tiny data
            km = KMeans(n_clusters=S, n_init=_KMEANS_N_INIT, max_iter=20,
                        random_state=int(r.integers(2**31 - 1))).fit(sub)
        centres = km.cluster_centers_
    else:
        centres = smooth[r.choice(data.n_bins, size=S, replace=False)]
    d = (centres ** 2).sum(axis=1)[None, :] - 2.0 * smooth @ centres.T
    labels = d.argmin(axis=1).astype(np.int64)
    return _labels_to_params(data, labels, S)


def _em(data, start, trans, rates, *, kappa, max_iter, tol):
    """Baum-Welch (MAP with a sticky diagonal prior when kappa > 0) from one start."""
    S = rates.shape[0]
    start, trans, rates = start.copy(), trans.copy(), rates.copy()
    post = np.empty((data.n_bins, S))
    xi = np.empty((S, S))
    s0 = np.empty(S)
    lls, objs = [], []
    converged = False
    n_iter = 0
    for it in range(max_iter + 1):
        log_b = _log_emissions(data, rates)
        ll = forward_backward(log_b, data.offsets, start, trans, post, xi, s0)
        with np.errstate(divide="ignore"):
            obj = ll + (kappa * np.log(np.diag(trans)).sum() if kappa > 0 else 0.0)
        lls.append(ll)
        objs.append(obj)
        if it > 0 and objs[-1] - objs[-2] < tol * data.n_bins:
            converged = True
            break
        if it == max_iter or not np.isfinite(ll):
            break
        # M-step
        start = s0 / s0.sum()
        occ = post.sum(axis=0)
        counts = xi + kappa * np.eye(S)
        row = counts.sum(axis=1)
        ok = row > 0
        trans[ok] = counts[ok] / row[ok, None]
        full = occ > _EMPTY_STATE
        new_rates = (post.T @ data.X)[full] / occ[full, None]
        rates[full] = np.maximum(new_rates, RATE_FLOOR)
        n_iter += 1
    return {"start": start, "trans": trans, "rates": rates, "loglik": lls,
            "objective": objs, "n_iter": n_iter, "converged": converged}
