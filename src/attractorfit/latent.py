"""Latent space of population activity: factor analysis and PCA on square-root counts.

(Factor analysis is fitted by EM on the covariance matrix and PCA by its
eigen-decomposition; the tests compare both with scikit-learn.)

Stage 3a of the flow (binning -> **latent** / states -> network). Takes a
:class:`~attractorfit.binning.BinnedCounts` (or per-trial float arrays), returns a
:class:`LatentFit` with loadings, per-trial latent trajectories, explained variance and
the dimensionality curves the number of latent dimensions was chosen from.

Dimensionality is chosen over whole trials (never over bins of one trial, which are
correlated in time):

- ``"cv_loglik"``: the held-out Gaussian log-likelihood per bin of factor analysis
  (or probabilistic PCA), averaged over trial folds; the dimension with the largest
  value is chosen;
- ``"loo_error"``: leave-one-unit-out prediction error [1]_: on held-out trials each
  unit is predicted from the latent state inferred from all *other* units; the
  dimension with the smallest summed squared error is chosen.

References
----------
.. [1] Yu, B. M., Cunningham, J. P., Santhanam, G., Ryu, S. I., Shenoy, K. V. &
   Sahani, M. (2009). Gaussian-process factor analysis for low-dimensional single-trial
   analysis of neural population activity. Journal of Neurophysiology 102:614-635.
.. [2] Kaiser, H. F. (1958). The varimax criterion for analytic rotation in factor
   analysis. Psychometrika 23:187-200.
.. [3] Tipping, M. E. & Bishop, C. M. (1999). Probabilistic principal component
   analysis. Journal of the Royal Statistical Society B 61:611-622.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from attractorfit.binning import trial_folds

from attractorfit._validation import check_int, check_nonnegative, check_rng
from attractorfit.errors import InputError

__all__ = ["LatentFit", "LatentModel", "varimax", "varimax_criterion", "fa_from_covariance"]

_METHODS = ("fa", "pca")
_CRITERIA = ("cv_loglik", "loo_error")


# --------------------------------------------------------------------------- rotation
def varimax_criterion(loadings) -> float:
    """Raw varimax criterion of a loading matrix (N x K) [2]_.

    ``sum_k [ mean_i L_ik^4 - (mean_i L_ik^2)^2 ]``: the summed variance of the
    squared loadings of each column; larger means simpler structure.
    """
    sq = np.asarray(loadings, dtype=float) ** 2
    return float(np.sum(np.mean(sq ** 2, axis=0) - np.mean(sq, axis=0) ** 2))


def varimax(loadings, *, max_iter: int = 500, tol: float = 1e-10):
    """Orthogonal varimax rotation of a loading matrix [2]_.

    Maximises :func:`varimax_criterion` over orthogonal rotations ``R`` (K x K) of
    ``L`` (N x K) by the usual iteration of singular value decompositions (each
    step is the rotation closest to the criterion's gradient).

    Parameters
    ----------
    loadings : ndarray (N, K)
    max_iter : int
    tol : float
        Stop when the relative increase of the criterion's gradient norm is below.

    Returns
    -------
    rotated : ndarray (N, K)
        ``loadings @ rotation``.
    rotation : ndarray (K, K)
        Orthogonal matrix.
    """
    L = np.asarray(loadings, dtype=float)
    n, k = L.shape
    R = np.eye(k)
    if k < 2:
        return L.copy(), R
    d = 0.0
    for _ in range(max_iter):
        lam = L @ R
        grad = L.T @ (lam ** 3 - lam @ np.diag(np.sum(lam ** 2, axis=0)) / n)
        u, s, vt = np.linalg.svd(grad)
        R = u @ vt
        d_old, d = d, float(np.sum(s))
        if d_old != 0 and d < d_old * (1 + tol):
            break
    return L @ R, R


# --------------------------------------------------------------------------- result
@dataclass
class LatentFit:
    """A fitted latent model of square-root spike counts.

    Attributes
    ----------
    method : str
        ``"fa"`` (factor analysis) or ``"pca"``.
    n_dims : int
        Number of latent dimensions K kept (0 means no shared structure).
    loadings : ndarray (N, K)
        Loading of each unit on each latent dimension (after rotation, if any).
        Factor analysis: the model is ``x = mean + loadings @ z + e``,
        ``z ~ N(0, I)``, ``e ~ N(0, diag(noise_variance))``. PCA: orthonormal
        principal axes scaled by the square root of their variances (so
        ``loadings @ loadings.T`` is the PCA covariance part, as in probabilistic
        PCA with zero noise).
    mean : ndarray (N,)
    noise_variance : ndarray (N,)
        Private variance of each unit (FA: the fitted uniquenesses; PCA: the
        probabilistic-PCA isotropic noise variance repeated [3]_).
    explained_variance : ndarray (K,)
        Shared variance carried by each latent dimension (squared column norms of
        ``loadings``).
    explained_variance_ratio : ndarray (K,)
        ``explained_variance`` divided by the total variance of the data.
    rotation : str or None
        ``"varimax"`` or None.
    rotation_matrix : ndarray (K, K)
        Orthogonal matrix applied to the unrotated loadings (identity if none).
    trajectories : list of ndarray
        Per trial, latent coordinates of every bin (T_i x K): the FA posterior mean,
        or the PCA projection, in the rotated frame.
    dims_tested : ndarray of int
        Candidate dimensions of the curves below (empty when ``n_dims`` was fixed).
    cv_loglik : ndarray
        Held-out log-likelihood per bin for each candidate (mean over trial folds).
    loo_error : ndarray
        Leave-one-unit-out squared prediction error per bin and unit on held-out
        trials, for each candidate.
    criterion : str
        Curve the dimension was chosen from (``"cv_loglik"``, ``"loo_error"``,
        or ``"fixed"``).
    sqrt : bool
        Whether counts were square-root transformed before fitting.
    smooth_s : float
        Gaussian smoothing (s.d., seconds) applied before fitting.
    """

    method: str
    n_dims: int
    loadings: np.ndarray
    mean: np.ndarray
    noise_variance: np.ndarray
    explained_variance: np.ndarray
    explained_variance_ratio: np.ndarray
    rotation: str | None
    rotation_matrix: np.ndarray
    trajectories: list = field(default_factory=list)
    dims_tested: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=int))
    cv_loglik: np.ndarray = field(default_factory=lambda: np.zeros(0))
    loo_error: np.ndarray = field(default_factory=lambda: np.zeros(0))
    criterion: str = "fixed"
    sqrt: bool = True
    smooth_s: float = 0.0

    @property
    def covariance(self) -> np.ndarray:
        """Model covariance ``loadings @ loadings.T + diag(noise_variance)``."""
        return self.loadings @ self.loadings.T + np.diag(self.noise_variance)

    def project(self, data) -> list:
        """Latent coordinates of new data, per trial.

        Parameters
        ----------
        data : BinnedCounts, ndarray (T x N) or list of ndarray
            A BinnedCounts is transformed as at fit time (square root, smoothing);
            arrays are taken as already transformed.

        Returns
        -------
        list of ndarray (T_i x K)
        """
        seqs = _as_sequences(data, sqrt=self.sqrt, smooth_s=self.smooth_s,
                             n_units=self.mean.size)
        proj = self._projector()
        return [(x - self.mean) @ proj for x in seqs]

    def _projector(self) -> np.ndarray:
        """Matrix P (N x K) with latent = (x - mean) @ P."""
        W = self.loadings
        k = W.shape[1]
        if k == 0:
            return np.zeros((self.mean.size, 0))
        if self.method == "fa":
            return _fa_projector(W, self.noise_variance)
        # PCA: least-squares coordinates on the (rotated) loadings, i.e. principal
        # component scores divided by each axis's s.d. (before rotation)
        return np.linalg.pinv(W).T


def _fa_projector(W, psi):
    """Posterior-mean map of factor analysis: (x - mu) @ P = E[z | x]."""
    k = W.shape[1]
    wp = W / psi[:, None]
    m = np.eye(k) + W.T @ wp
    return wp @ np.linalg.inv(m)


# --------------------------------------------------------------------------- helpers
def _as_sequences(data, *, sqrt: bool, smooth_s: float, n_units=None) -> list:
    from attractorfit.binning import BinnedCounts

    if isinstance(data, BinnedCounts):
        seqs = data.transformed(sqrt=sqrt, smooth_s=smooth_s)
    else:
        if isinstance(data, np.ndarray) and data.ndim == 2:
            data = [data]
        if not isinstance(data, (list, tuple)) or len(data) == 0:
            raise InputError("data: expected a BinnedCounts or a non-empty list of "
                             f"(bins x units) arrays, got {type(data).__name__}")
        seqs = []
        for i, x in enumerate(data):
            arr = np.asarray(x, dtype=float)
            if arr.ndim != 2:
                raise InputError(f"data: trial {i} has shape {arr.shape}; expected a "
                                 "(bins x units) array")
            if not np.all(np.isfinite(arr)):
                raise InputError(f"data: trial {i} holds a non-finite value")
            seqs.append(arr)
    if n_units is not None:
        for i, x in enumerate(seqs):
            if x.shape[1] != n_units:
                raise InputError(f"data: trial {i} has {x.shape[1]} units; the latent "
                                 f"model was fitted on {n_units}")
    return seqs


def _moments(x):
    """Sufficient statistics of rows of x: (count, sum, sum of outer products)."""
    return x.shape[0], x.sum(axis=0), x.T @ x


def _cov_from(n, s, ss, mean=None):
    """Second moment about ``mean`` (default: the sample mean) from sufficient stats."""
    m = s / n if mean is None else mean
    c = ss / n - np.outer(s / n, m) - np.outer(m, s / n) + np.outer(m, m)
    return (c + c.T) / 2


def fa_from_covariance(cov, n_dims: int, *, max_iter: int = 5000, tol: float = 1e-8,
                       min_var: float = 1e-6):
    """Maximum-likelihood factor analysis of a covariance matrix by EM.

    EM for factor analysis from the sample covariance alone [4]_: with
    ``beta = W^T (W W^T + Psi)^-1``,
    ``W <- C beta^T (I - beta W + beta C beta^T)^-1`` and
    ``Psi <- diag(C - W beta C)``. Each step costs O(N^2 K) whatever the number of
    bins, and the log-likelihood never decreases.

    Parameters
    ----------
    cov : ndarray (N, N)
        Sample covariance (divided by n, the maximum-likelihood convention).
    n_dims : int
        Number of factors K (>= 1).
    max_iter : int
    tol : float
        Stop when the per-row log-likelihood changes by less than ``tol``.
    min_var : float
        Floor of the private variances.

    Returns
    -------
    W : ndarray (N, K)
    psi : ndarray (N,)
    logliks : ndarray
        Per-row log-likelihood after each iteration.

    References
    ----------
    .. [4] Rubin, D. B. & Thayer, D. T. (1982). EM algorithms for ML factor
       analysis. Psychometrika 47:69-76.
    """
    C = np.asarray(cov, dtype=float)
    n = C.shape[0]
    k = int(n_dims)
    var = np.maximum(np.diag(C), min_var)
    # start from principal axes of the covariance
    evals, evecs = np.linalg.eigh(C)
    order = np.argsort(evals)[::-1][:k]
    W = evecs[:, order] * np.sqrt(np.maximum(evals[order] - 0.5 * var.mean(), 1e-3 * var.mean()))
    psi = np.maximum(var - np.sum(W * W, axis=1), 0.1 * var)
    lls = []
    ll_old = -np.inf
    for _ in range(max_iter):
        wp = W / psi[:, None]
        minv = np.linalg.inv(np.eye(k) + W.T @ wp)
        # Sigma^-1 = Psi^-1 - Psi^-1 W M^-1 W^T Psi^-1 (Woodbury)
        beta = minv @ wp.T                        # K x N  (= W^T Sigma^-1)
        sinv_c = C / psi[:, None] - wp @ (minv @ (wp.T @ C))
        logdet = np.sum(np.log(psi)) - np.linalg.slogdet(minv)[1]
        ll = -0.5 * (n * np.log(2 * np.pi) + logdet + np.trace(sinv_c))
        lls.append(ll)
        if abs(ll - ll_old) < tol:
            break
        ll_old = ll
        cb = C @ beta.T                           # N x K
        ezz = np.eye(k) - beta @ W + beta @ cb
        W = np.linalg.solve(ezz.T, cb.T).T
        psi = np.maximum(np.diag(C) - np.sum(W * cb, axis=1), min_var)
    else:
        from sklearn.exceptions import ConvergenceWarning
        warnings.warn(f"factor analysis EM reached max_iter={max_iter} before the "
                      f"log-likelihood change fell below tol={tol:g}", ConvergenceWarning,
                      stacklevel=2)
    return W, psi, np.asarray(lls)


def _pca_from_covariance(cov, n_dims):
    """Principal axes scaled by sqrt(variance), and the probabilistic-PCA noise [3]_."""
    evals, evecs = np.linalg.eigh(cov)
    order = np.argsort(evals)[::-1]
    evals, evecs = np.maximum(evals[order], 0.0), evecs[:, order]
    k = int(n_dims)
    n = cov.shape[0]
    sigma2 = float(np.mean(evals[k:])) if k < n else 0.0
    W = evecs[:, :k] * np.sqrt(evals[:k])[None, :]
    # fix the sign: largest-magnitude loading of each axis positive (deterministic)
    idx = np.argmax(np.abs(W), axis=0)
    W = W * np.sign(W[idx, np.arange(k)])[None, :] if k else W
    return W, np.full(n, max(sigma2, 1e-6)), evals


def _fit_cov(cov, k, method, *, quiet: bool = False):
    """Loadings and private variances of a K-dimensional model of ``cov``.

    ``quiet``: cross-validation candidates; at most 1000 EM steps, tolerance 1e-6 and no
    ConvergenceWarning (over-sized candidates converge slowly towards boundary
    solutions with a private variance at its floor, and change the held-out curve
    by far less than the differences between candidates).
    """
    n = cov.shape[0]
    if k == 0:
        return np.zeros((n, 0)), np.maximum(np.diag(cov).copy(), 1e-6)
    if method == "fa":
        if quiet:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                W, psi, _ = fa_from_covariance(cov, k, max_iter=1000, tol=1e-6)
        else:
            W, psi, _ = fa_from_covariance(cov, k)
        return W, psi
    W, psi, _ = _pca_from_covariance(cov, k)
    if method == "pca":
        # probabilistic PCA with noise sigma^2: loadings shrink by sigma^2 [3]
        evals = np.sum(W * W, axis=0)
        W = W * np.sqrt(np.maximum(evals - psi[0], 0.0) / np.maximum(evals, 1e-300))[None, :]
    return W, psi


def _gauss_loglik_cov(cov_about_mean, W, psi):
    """Per-row Gaussian log-likelihood given the test second moment about the mean."""
    n = cov_about_mean.shape[0]
    sigma = W @ W.T + np.diag(psi)
    logdet = np.linalg.slogdet(sigma)[1]
    tr = np.trace(np.linalg.solve(sigma, cov_about_mean))
    return float(-0.5 * (n * np.log(2 * np.pi) + logdet + tr))


def _loo_unit_error_cov(m2, W, psi, method):
    """Summed squared leave-one-unit-out error from the test second moment ``m2``.

    ``m2`` is sum over test rows of r r^T with r = x - training mean. The error of
    unit i is a^T m2 a with a_i = 1 and a_{-i} = -P_{-i} w_i [1]_.
    """
    n, k = W.shape
    if k == 0:
        return float(np.trace(m2))
    total = 0.0
    idx = np.arange(n)
    for i in range(n):
        keep = idx != i
        Wk = W[keep]
        P = _fa_projector(Wk, psi[keep]) if method == "fa" else np.linalg.pinv(Wk).T
        a = np.empty(n)
        a[i] = 1.0
        a[keep] = -(P @ W[i])
        total += float(a @ m2 @ a)
    return total


# --------------------------------------------------------------------------- estimator
class LatentModel:
    """Factor analysis or PCA of square-root spike counts, with chosen dimensionality.

    Parameters
    ----------
    method : {"fa", "pca"}
        Factor analysis (maximum likelihood, EM on the covariance, see
        :func:`fa_from_covariance`; the tests check it against scikit-learn's
        ``FactorAnalysis``) or PCA (eigen-decomposition of the covariance; checked
        against scikit-learn's ``PCA``). Both work from per-trial sufficient
        statistics, so cross-validation costs O(N^2) per fold, not O(bins).
    n_dims : int or None
        Fixed number of latent dimensions; None chooses it by ``criterion``.
    max_dims : int
        Largest dimension tried when choosing (capped at units - 1).
    criterion : {"cv_loglik", "loo_error"} or None
        Curve the dimension is chosen from (both are always computed when choosing).
        None: ``"cv_loglik"`` for factor analysis, ``"loo_error"`` for PCA (the
        probabilistic-PCA likelihood, with one noise variance for all units, keeps
        rising with the dimension when private variances differ between units [1]_).
    n_folds : int
        Trial folds for cross-validation (capped at the number of trials).
    rotation : None or "varimax"
        Orthogonal rotation of the loadings after fitting.
    sqrt : bool
        Square-root transform counts (variance stabilising) before fitting.
    smooth_s : float
        Gaussian smoothing s.d. in seconds applied within trials before fitting.
    rng : int or Generator, optional
        Fold assignment.

    Attributes
    ----------
    result_ : LatentFit
    loadings_, mean_, noise_variance_, n_dims_, trajectories_ :
        Shortcuts to the fields of ``result_``.

    Notes
    -----
    Candidate dimensions are ``0 .. max_dims``; dimension 0 is the independent
    Gaussian (no shared structure). Folds are whole trials; a unit that never fires
    in a training fold gets a variance floor of 1e-6 (FA in scikit-learn floors
    noise variances likewise).

    References
    ----------
    .. [1] Yu, B. M. et al. (2009). Gaussian-process factor analysis for
       low-dimensional single-trial analysis of neural population activity.
       Journal of Neurophysiology 102:614-635.
    .. [2] Kaiser, H. F. (1958). The varimax criterion for analytic rotation in
       factor analysis. Psychometrika 23:187-200.

    Examples
    --------
    >>> import numpy as np
    >>> from attractorfit.latent import LatentModel
    >>> rng = np.random.default_rng(0)
    >>> z = rng.standard_normal((20, 50, 1))
    >>> x = [zi @ np.ones((1, 8)) + rng.standard_normal((50, 8)) for zi in z]
    >>> LatentModel(max_dims=3, rng=0).fit(x).n_dims_
    1
    """

    def __init__(self, method: str = "fa", *, n_dims=None, max_dims: int = 10,
                 criterion=None, n_folds: int = 5, rotation=None,
                 sqrt: bool = True, smooth_s: float = 0.0, rng=None):
        self.method = method
        self.n_dims = n_dims
        self.max_dims = max_dims
        self.criterion = criterion
        self.n_folds = n_folds
        self.rotation = rotation
        self.sqrt = sqrt
        self.smooth_s = smooth_s
        self.rng = rng

    def _check(self):
        if self.method not in _METHODS:
            raise InputError(f"method: expected one of {_METHODS}, got {self.method!r}")
        if self.criterion is not None and self.criterion not in _CRITERIA:
            raise InputError(f"criterion: expected one of {_CRITERIA}, got "
                             f"{self.criterion!r}")
        if self.rotation not in (None, "varimax"):
            raise InputError(f"rotation: expected None or 'varimax', got {self.rotation!r}")
        check_int("max_dims", self.max_dims, low=1)
        check_int("n_folds", self.n_folds, low=2)
        check_nonnegative("smooth_s", self.smooth_s)
        if self.n_dims is not None:
            check_int("n_dims", self.n_dims, low=0)

    def fit(self, data, y=None):
        """Fit the latent model.

        Parameters
        ----------
        data : BinnedCounts or list of ndarray (T_i x N)
            Counts (BinnedCounts; transformed here) or already transformed trials.
        y : ignored

        Returns
        -------
        self

        Raises
        ------
        InputError
            Bad options, fewer than 2 trials when choosing the dimension, or a fixed
            ``n_dims`` not below the number of units.
        """
        self._check()
        rng = check_rng(self.rng)
        seqs = _as_sequences(data, sqrt=self.sqrt, smooth_s=float(self.smooth_s))
        n_units = seqs[0].shape[1]
        for i, x in enumerate(seqs):
            if x.shape[1] != n_units:
                raise InputError(f"data: trial {i} has {x.shape[1]} units, trial 0 has "
                                 f"{n_units}")
        if n_units < 2:
            raise InputError(f"data: expected at least 2 units, got {n_units}")
        stats = [_moments(x) for x in seqs]
        n_all = sum(st[0] for st in stats)
        s_all = sum(st[1] for st in stats)
        ss_all = sum(st[2] for st in stats)
        mu = s_all / n_all
        cov_all = _cov_from(n_all, s_all, ss_all)
        dims = np.zeros(0, dtype=int)
        cv = np.zeros(0)
        loo = np.zeros(0)
        if self.n_dims is None:
            if len(seqs) < 2:
                raise InputError(f"data: choosing n_dims needs at least 2 trials for "
                                 f"cross-validation, got {len(seqs)}")
            kmax = min(int(self.max_dims), n_units - 1)
            dims = np.arange(kmax + 1)
            folds = trial_folds(len(seqs), min(int(self.n_folds), len(seqs)), rng)
            cv = np.zeros(dims.size)
            loo = np.zeros(dims.size)
            for test in folds:
                n_te = sum(stats[i][0] for i in test)
                s_te = sum(stats[i][1] for i in test)
                ss_te = sum(stats[i][2] for i in test)
                n_tr, s_tr, ss_tr = n_all - n_te, s_all - s_te, ss_all - ss_te
                mu_tr = s_tr / n_tr
                c_tr = _cov_from(n_tr, s_tr, ss_tr)
                c_te = _cov_from(n_te, s_te, ss_te, mean=mu_tr)
                for j, k in enumerate(dims):
                    W, psi = _fit_cov(c_tr, int(k), self.method, quiet=True)
                    psi = np.maximum(psi, 1e-6)
                    cv[j] += _gauss_loglik_cov(c_te, W, psi) * n_te
                    loo[j] += _loo_unit_error_cov(c_te * n_te, W, psi, self.method)
            cv /= n_all
            loo /= n_all * n_units
            criterion = self.criterion or ("cv_loglik" if self.method == "fa"
                                           else "loo_error")
            k_best = int(dims[np.argmax(cv)] if criterion == "cv_loglik"
                         else dims[np.argmin(loo)])
        else:
            k_best = int(self.n_dims)
            if k_best >= n_units:
                raise InputError(f"n_dims: expected fewer dimensions than units "
                                 f"({n_units}), got {k_best}")
            criterion = "fixed"
        W, psi = _fit_cov(cov_all, k_best, self.method)
        if self.method == "pca":
            # report the principal axes themselves (not the probabilistic shrinkage)
            W, psi, _ = _pca_from_covariance(cov_all, k_best)
        R = np.eye(k_best)
        if self.rotation == "varimax" and k_best >= 2:
            W, R = varimax(W)
        ev = np.sum(W * W, axis=0)
        total = float(np.trace(cov_all))
        fit = LatentFit(method=self.method, n_dims=k_best, loadings=W, mean=mu,
                        noise_variance=psi, explained_variance=ev,
                        explained_variance_ratio=ev / total if total > 0 else ev * np.nan,
                        rotation=self.rotation, rotation_matrix=R, dims_tested=dims,
                        cv_loglik=cv, loo_error=loo, criterion=criterion,
                        sqrt=bool(self.sqrt), smooth_s=float(self.smooth_s))
        fit.trajectories = fit.project(seqs)
        self.result_ = fit
        self.loadings_ = fit.loadings
        self.mean_ = fit.mean
        self.noise_variance_ = fit.noise_variance
        self.n_dims_ = fit.n_dims
        self.trajectories_ = fit.trajectories
        return self

    def transform(self, data) -> list:
        """Latent coordinates of ``data`` per trial (see :meth:`LatentFit.project`)."""
        if not hasattr(self, "result_"):
            raise InputError("LatentModel: call fit before transform")
        return self.result_.project(data)
