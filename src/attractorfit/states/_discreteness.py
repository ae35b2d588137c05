"""Discreteness test: is delay activity better described by discrete states than by a
continuous latent with the same rates, variability and timescales?

The question (DESIGN.md, Amendment 4) is whether population activity *switches within
trials* among discrete states beyond what is explained by

(i) condition-specific time-varying means (a PSTH per level of a trial label, e.g. the
    remembered item),
(ii) a continuous shared latent (Ornstein-Uhlenbeck factors), and
(iii) slow drift of every unit's rate across trials.

The null model
--------------
A latent-Gaussian (log-normal) Poisson-like count model fitted by moment matching:
for trial r (condition c_r), bin t and unit i, the expected count is

    lambda = m_{c_r, t, i} * g_{r, i} * exp(w_i . z_{r, t} - |w_i|^2 / 2)

with m the smoothed condition PSTH, g a per-trial gain smoothed across trials (drift),
z K independent unit-variance Ornstein-Uhlenbeck processes (AR(1) on the bins, one
timescale per factor, stationary at the trial start) and W (N x K) loadings. Given
lambda, the count has mean lambda and variance phi_i lambda: negative binomial
(gamma-Poisson) for phi_i > 1, Poisson for phi_i = 1, and for phi_i < 1 (regular
spiking) a binomial with success probability lambda / n and n one of the two whole
numbers around lambda / (1 - phi_i), drawn so that the variance is phi_i lambda (when
lambda < 1 - phi_i no count with mean lambda is that regular; Bernoulli(lambda) is
used). Under this model, with mu = m g,

    E[(x_i - mu_i)(x_j - mu_j)] = mu_i mu_j (exp(w_i . w_j) - 1)          (i != j)
    E[(x_i - mu_i)^2]           = phi_i mu_i + mu_i^2 (exp(|w_i|^2) - 1)

so the latent covariance is read from the count covariance through
Sigma_ij = log(1 + C_ij / M_ij) [1]_, M_ij the bin-average of mu_i mu_j. W is the
rank-K fit of the off-diagonal Sigma (iterated principal axes), phi_i then matches
each unit's residual variance (and is corrected once by simulation so that each unit's
total count variance, hence its Fano factor, matches), and the factor timescales come
from the lagged count covariances transformed the same way, in the rotation that
makes the factors uncorrelated at lag one.

The statistic
-------------
Every evaluation (on the data and on each surrogate) runs the same steps:

1. square-root counts; subtract the condition PSTH (smoothed) and each trial's
   drift offset (trial means smoothed across trials);
2. factor analysis with K factors (K fixed from the data for all evaluations) and
   the posterior-mean latent trajectory of every bin, smoothed within trials;
3. Gaussian mixtures with a shared (tied) covariance and S = 1 .. S_max
   components (EM from k-means++ starts);
4. the statistic is the log-likelihood gain per bin, over one Gaussian, of the
   mixture with S >= 2 components that BIC [3]_ prefers (S is re-chosen in every
   surrogate; restricting the choice to S >= 2 keeps the statistic continuous, so
   ties at zero cannot make p-values lumpy).

One Gaussian with a full covariance describes exactly the second-order structure
that the null matches by construction; the gain measures how much better clusters
(discrete states visited for a while) describe the latent trajectory. Distinct
states visited within trials make it large; a continuous Gaussian latent does not,
whatever its dimension and timescales. The p-value is the parametric bootstrap
p = (1 + #{T_b >= T}) / (B + 1) [2]_.

Verdict rule: ``"discrete"`` when p <= alpha; ``"not_discrete"`` when p > 2 alpha
(and at least 0.1); ``"inconclusive"`` in between, when the data are too short
(fewer than 10 trials or 500 bins), or when B is too small for p to reach alpha.
A verdict is statistical evidence about these models of the data, not proof about
the brain.

Measured behaviour (``benchmarks/bench_discreteness.py``; 40 units, 60 trials of 2 s,
50 ms bins, B = 39; one run): false-positive rate 0.015 over 200 datasets of the
nominal null family (conservative: the p-values are not uniform, they gather at
intermediate values because the null is fitted to the same data); 0.05 with regular
(gamma-2) spiking and a 2-D latent, 0.025 with strong drift (1 log unit), 0 with a
softplus link, but 0.10 with bursty
(gamma-0.5) spiking and 0.35 with a heavy-tailed (non-Gaussian, unimodal) latent: the
mixture statistic reads strong non-Gaussianity of the latent as clustering. Power 1.0
on 4-state switching recordings (0.3 s dwells, log-rate modulation s.d. 0.6), but only
0.125 at modulation s.d. 0.3.

References
----------
.. [1] Macke, J. H., Berens, P., Ecker, A. S., Tolias, A. S. & Bethge, M. (2009).
   Generating spike trains with specified correlation coefficients. Neural
   Computation 21:397-423.
.. [2] Davison, A. C. & Hinkley, D. V. (1997). Bootstrap Methods and their
   Application. Cambridge University Press (section 4.2, Monte Carlo p-values).
.. [3] Schwarz, G. (1978). Estimating the dimension of a model. Annals of
   Statistics 6:461-464.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from numba import njit
from scipy.ndimage import gaussian_filter1d

from attractorfit._validation import (check_fraction, check_int, check_nonnegative,
                                      check_positive, check_rng)
from attractorfit.errors import InputError

__all__ = ["ContinuousNull", "DiscretenessResult", "fit_continuous_null",
           "discreteness_statistic", "discreteness_test", "p_value", "verdict"]

#: Fewest trials and bins for a conclusive verdict.
MIN_TRIALS = 10
MIN_BINS = 500


# --------------------------------------------------------------------------- helpers
def p_value(statistic: float, null_statistics) -> float:
    """Parametric-bootstrap p-value (1 + #{T_b >= T}) / (B + 1) [2]_.

    Examples
    --------
    >>> p_value(1.0, [0.5, 1.0, 2.0])
    0.75
    """
    t = np.asarray(null_statistics, dtype=float)
    return float((1 + np.sum(t >= statistic)) / (t.size + 1))


def verdict(p: float, *, alpha: float = 0.05, n_boot: int | None = None,
            too_short: bool = False) -> str:
    """Plain verdict from a p-value (rule in the module notes).

    ``discrete`` when p <= alpha; ``not_discrete`` when p > max(2 alpha, 0.1);
    ``inconclusive`` otherwise, or when ``too_short``, or when the smallest
    attainable p-value 1 / (n_boot + 1) exceeds alpha.
    """
    if too_short or (n_boot is not None and 1.0 / (n_boot + 1) > alpha):
        return "inconclusive"
    if p <= alpha:
        return "discrete"
    if p > max(2 * alpha, 0.1):
        return "not_discrete"
    return "inconclusive"


def _smooth_masked(x, mask, sigma, axis):
    """Normalised Gaussian smoothing of x along ``axis`` over entries where mask."""
    if sigma <= 0:
        num, den = x * mask, mask.astype(float)
    else:
        num = gaussian_filter1d(x * mask, sigma, axis=axis, mode="constant")
        den = gaussian_filter1d(mask.astype(float), sigma, axis=axis, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        out = num / den
    return np.where(den > 1e-12, out, 0.0)


def _conditions(binned, condition):
    """Condition index of every trial and the level names."""
    if condition is None:
        return np.zeros(binned.n_trials, dtype=np.int64), ["all"]
    if condition not in binned.labels:
        raise InputError(f"condition: label column {condition!r} not found; available: "
                         f"{sorted(binned.labels)}")
    vals = [str(v) for v in np.asarray(binned.labels[condition]).tolist()]
    levels = sorted(set(vals))
    pos = {v: k for k, v in enumerate(levels)}
    return np.array([pos[v] for v in vals], dtype=np.int64), levels


def _valid_mask(n_valid, n_bins):
    return np.arange(n_bins)[None, :] < np.asarray(n_valid)[:, None]


def _means(x, mask, cond, n_cond, psth_bins, drift_trials, multiplicative):
    """Condition PSTH and per-trial drift of x (trials x bins x units).

    Returns (psth (n_cond, bins, units), drift (trials, units)); the expected value is
    psth[cond] * drift (multiplicative) or psth[cond] + drift (additive).
    """
    m3 = mask[:, :, None].astype(float)
    n_tr, n_b, n_u = x.shape
    drift = np.ones((n_tr, n_u)) if multiplicative else np.zeros((n_tr, n_u))
    for _ in range(2 if drift_trials else 1):
        adj = x / drift[:, None, :] if multiplicative else x - drift[:, None, :]
        psth = np.zeros((n_cond, n_b, n_u))
        for c in range(n_cond):
            sel = cond == c
            s = (adj[sel] * m3[sel]).sum(axis=0)
            n = m3[sel].sum(axis=0)
            psth[c] = _smooth_masked(np.where(n > 0, s / np.maximum(n, 1), 0.0), n > 0,
                                     psth_bins, axis=0)
        if not drift_trials:
            break
        base = psth[cond]
        if multiplicative:
            num = (x * m3).sum(axis=1)
            den = (base * m3).sum(axis=1)
            ok = den > 0
            ratio = np.where(ok, num / np.where(ok, den, 1.0), 1.0)
            sm = _smooth_masked(ratio, ok, drift_trials, axis=0)
            sm = np.where(sm > 0, sm, 1.0)
            drift = sm / np.maximum(sm.mean(axis=0, keepdims=True), 1e-12)
        else:
            nb = m3.sum(axis=1)
            off = ((x - base) * m3).sum(axis=1) / np.maximum(nb, 1)
            drift = _smooth_masked(off, np.ones_like(off, dtype=bool), drift_trials, axis=0)
    return psth, drift


def _low_rank_offdiag(sig, k, n_iter=200, tol=1e-8):
    """Rank-k W with W W^T fitting the off-diagonal of sig (iterated principal axes)."""
    n = sig.shape[0]
    if k == 0:
        return np.zeros((n, 0))
    a = sig.copy()
    off = np.abs(sig - np.diag(np.diag(sig)))
    diag = off.max(axis=1)
    W = np.zeros((n, k))
    for _ in range(n_iter):
        np.fill_diagonal(a, diag)
        evals, evecs = np.linalg.eigh(a)
        order = np.argsort(evals)[::-1][:k]
        W = evecs[:, order] * np.sqrt(np.maximum(evals[order], 0.0))[None, :]
        new = np.sum(W * W, axis=1)
        if np.max(np.abs(new - diag)) < tol:
            break
        diag = new
    return W


def _log_cov_transform(c, m):
    """Sigma = log(1 + C / M), with the argument floored at 0.2 (noise guard)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.where(m > 0, c / np.where(m > 0, m, 1.0), 0.0)
    return np.log(np.maximum(1.0 + r, 0.2))


def _ar1_latents(rng, n_trials, n_bins, a):
    """Unit-variance AR(1) latents (trials x bins x K), stationary at bin 0."""
    k = a.size
    z = np.empty((n_trials, n_bins, k))
    noise = rng.standard_normal((n_trials, n_bins, k))
    z[:, 0] = noise[:, 0]
    s = np.sqrt(1.0 - a * a)
    for t in range(1, n_bins):
        z[:, t] = a * z[:, t - 1] + s * noise[:, t]
    return z


def _draw_counts(rng, lam, phi):
    """Counts with mean lam and variance about phi * lam (phi per unit, last axis)."""
    phi = np.broadcast_to(phi, lam.shape)
    out = np.empty(lam.shape, dtype=np.int64)
    over = phi > 1.0 + 1e-9
    under = phi < 1.0 - 1e-9
    pois = ~(over | under)
    if pois.any():
        out[pois] = rng.poisson(lam[pois])
    if over.any():
        l, p = lam[over], phi[over]
        shape = l / (p - 1.0)
        g = rng.gamma(np.maximum(shape, 1e-12), p - 1.0)
        out[over] = rng.poisson(np.where(shape > 0, g, 0.0))
    if under.any():
        l, p = lam[under], phi[under]
        # binomial(n, l / n) has variance l (1 - l / n); a random n in {n0, n0 + 1}
        # with E[1 / n] = (1 - phi) / l gives variance phi * l exactly when
        # l / (1 - phi) >= 1 (else Bernoulli(l), the least variable count with mean l)
        nstar = np.maximum(l / (1.0 - p), 1.0)
        n0 = np.floor(nstar)
        with np.errstate(invalid="ignore", divide="ignore"):
            pi = np.where(nstar > n0, (1.0 / nstar - 1.0 / (n0 + 1)) / (1.0 / n0 - 1.0 / (n0 + 1)),
                          1.0)
        n = np.where(rng.random(l.shape) < pi, n0, n0 + 1)
        q = np.clip(l / n, 0.0, 1.0)
        out[under] = rng.binomial(n.astype(np.int64), q)
    return out


# --------------------------------------------------------------------------- null model
@dataclass
class ContinuousNull:
    """Continuous-latent null model fitted to binned counts (see the module notes).

    Attributes
    ----------
    bin_size : float
    n_valid : ndarray of int (trials,)
        Bins per trial (the surrogates keep the data's trial structure).
    condition : str or None
        Label column whose levels have their own PSTH (None: one PSTH).
    levels : list of str
    trial_condition : ndarray of int (trials,)
    psth : ndarray (levels, bins, units)
        Smoothed condition PSTHs (expected counts per bin, drift removed).
    gain : ndarray (trials, units)
        Slow multiplicative drift of each unit across trials (mean 1).
    loadings : ndarray (units, K)
        Loadings of the log-rate on the latent factors (continuous-time latents; the
        bin-level covariance they imply is smaller by the bin-averaged
        autocorrelation of each factor, see :func:`_bin_average_corr`).
    timescales_s : ndarray (K,)
        Ornstein-Uhlenbeck timescale of each factor.
    dispersion : ndarray (units,)
        Private variance-to-mean ratio phi of the counts given the rate.
    psth_smooth_s : float
    drift_trials : float
    n_substeps : int
        Latent steps per bin in :meth:`simulate` (the rate is averaged over them).
    trial_index, window_start, unit_ids, labels :
        Copied from the data, so surrogates are BinnedCounts like it.
    """

    bin_size: float
    n_valid: np.ndarray
    condition: str | None
    levels: list
    trial_condition: np.ndarray
    psth: np.ndarray
    gain: np.ndarray
    loadings: np.ndarray
    timescales_s: np.ndarray
    dispersion: np.ndarray
    psth_smooth_s: float
    drift_trials: float
    n_substeps: int = 5
    trial_index: np.ndarray = field(repr=False, default=None)
    window_start: np.ndarray = field(repr=False, default=None)
    unit_ids: list = field(repr=False, default_factory=list)
    labels: dict = field(repr=False, default_factory=dict)

    @property
    def n_dims(self) -> int:
        return int(self.loadings.shape[1])

    def expected_counts(self) -> np.ndarray:
        """mu = PSTH x drift gain, (trials, bins, units)."""
        return self.psth[self.trial_condition] * self.gain[:, None, :]

    def simulate(self, rng=None):
        """One surrogate recording's counts, as a BinnedCounts like the data.

        Parameters
        ----------
        rng : int or Generator, optional

        Returns
        -------
        BinnedCounts
        """
        from attractorfit.binning import BinnedCounts

        rng = check_rng(rng)
        mu = self.expected_counts()
        n_tr, n_b, _ = mu.shape
        if self.n_dims:
            sub = int(self.n_substeps)
            a = np.exp(-self.bin_size / (sub * self.timescales_s))
            z = _ar1_latents(rng, n_tr, n_b * sub, a)
            w = self.loadings
            g = np.exp(z @ w.T - 0.5 * np.sum(w * w, axis=1))
            g = g.reshape(n_tr, n_b, sub, -1).mean(axis=2)   # rate averaged over the bin
            lam = mu * g
        else:
            lam = mu
        counts = _draw_counts(rng, lam, self.dispersion)
        counts[~_valid_mask(self.n_valid, n_b)] = 0
        top = int(counts.max()) if counts.size else 0
        dtype = np.uint8 if top < 256 else (np.uint16 if top < 65536 else np.uint32)
        return BinnedCounts(counts=counts.astype(dtype), n_valid=self.n_valid.copy(),
                            bin_size=self.bin_size, unit_ids=list(self.unit_ids),
                            unit_index=np.arange(len(self.unit_ids)),
                            trial_index=np.asarray(self.trial_index).copy(),
                            window_start=np.asarray(self.window_start).copy(),
                            labels={k: np.asarray(v).copy() for k, v in self.labels.items()})

    def describe(self) -> str:
        """One paragraph naming the null model and its fitted ingredients."""
        cond = (f"a PSTH per level of {self.condition!r} ({len(self.levels)} levels)"
                if self.condition else "one PSTH for all trials")
        drift = (f"slow drift across trials (Gaussian smoothing over {self.drift_trials:g} "
                 "trials)" if self.drift_trials else "no drift")
        ts = ", ".join(f"{t:.3g}" for t in self.timescales_s) or "none"
        return (f"Continuous-latent null: {cond}, smoothed over {self.psth_smooth_s:g} s; "
                f"{drift}; {self.n_dims} Ornstein-Uhlenbeck latent factor(s) with "
                f"timescales {ts} s acting on log-rates (log-normal rates); count "
                "variability given the rate matched to each unit's Fano factor, pairwise "
                "count correlations matched through the latent covariance.")


def _check_binned(binned):
    from attractorfit.binning import BinnedCounts

    if not isinstance(binned, BinnedCounts):
        raise InputError(f"binned: expected a BinnedCounts, got {type(binned).__name__}")
    if binned.n_trials < 2:
        raise InputError(f"binned: the discreteness test needs at least 2 trials, got "
                         f"{binned.n_trials}")
    return binned


def fit_continuous_null(binned, *, n_dims: int = 3, condition=None,
                        psth_smooth_s: float = 0.1, drift_trials: float | None = 10.0,
                        max_lag_s: float = 0.5) -> ContinuousNull:
    """Fit the continuous-latent null to binned counts by moment matching.

    Parameters
    ----------
    binned : BinnedCounts
    n_dims : int
        Number of latent factors K (>= 0, < units).
    condition : str, optional
        Label column with one PSTH per level (e.g. the remembered item).
    psth_smooth_s : float
        Gaussian smoothing (s.d., seconds) of the PSTHs.
    drift_trials : float or None
        Gaussian smoothing (s.d., in trials) of the per-trial gains; None: no drift.
    max_lag_s : float
        Longest lag used to fit the factor timescales.

    Returns
    -------
    ContinuousNull
    """
    binned = _check_binned(binned)
    psth_smooth_s = check_nonnegative("psth_smooth_s", psth_smooth_s)
    max_lag_s = check_positive("max_lag_s", max_lag_s)
    if drift_trials is not None:
        drift_trials = check_positive("drift_trials", drift_trials)
    n_units = binned.n_units
    k = check_int("n_dims", n_dims, low=0, high=n_units - 1)
    cond, levels = _conditions(binned, condition)
    dt = binned.bin_size
    x = binned.counts.astype(float)
    mask = _valid_mask(binned.n_valid, binned.n_bins)
    x[~mask] = 0.0
    psth, gain = _means(x, mask, cond, len(levels), psth_smooth_s / dt, drift_trials, True)
    mu = psth[cond] * gain[:, None, :]
    mu[~mask] = 0.0
    r = (x - mu)[mask]
    mflat = mu[mask]
    nb = r.shape[0]
    c0 = r.T @ r / nb
    m0 = mflat.T @ mflat / nb
    sig = _log_cov_transform(c0, m0)
    W = _low_rank_offdiag(sig, k)
    mean_mu = mflat.mean(axis=0)
    shared = np.diag(m0) * (np.exp(np.sum(W * W, axis=1)) - 1.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        phi = np.where(mean_mu > 0,
                       (np.diag(c0) - shared) / np.where(mean_mu > 0, mean_mu, 1), 1.0)
    phi = np.clip(phi, 0.05, 50.0)
    tau = np.zeros(k)
    if k:
        W, tau = _fit_timescales(x, mu, mask, W, dt, max_lag_s)
    null = ContinuousNull(bin_size=dt, n_valid=binned.n_valid.copy(), condition=condition,
                          levels=levels, trial_condition=cond, psth=psth, gain=gain,
                          loadings=W, timescales_s=tau, dispersion=phi,
                          psth_smooth_s=psth_smooth_s, drift_trials=drift_trials or 0.0,
                          trial_index=binned.trial_index.copy(),
                          window_start=binned.window_start.copy(),
                          unit_ids=list(binned.unit_ids),
                          labels={kk: np.asarray(v).copy() for kk, v in binned.labels.items()})
    _calibrate_dispersion(null, x[mask], mask)
    return null


def _calibrate_dispersion(null, x_valid, mask, n_sims: int = 8, seed: int = 0):
    """Correct phi so that every unit's total count variance matches the data's.

    The moment equations hold for rates constant within a bin; the simulated rates
    are averaged over sub-steps and the PSTH and drift are estimates, so each unit's
    simulated variance (over all bins, like np.var) is measured on ``n_sims``
    surrogates (fixed seed: the fit stays deterministic) and the difference moved
    into the private term: phi += (var_data - var_sim) / mean.
    """
    target = x_valid.var(axis=0)
    mean = x_valid.mean(axis=0)
    rng = np.random.default_rng(seed)
    sims = np.concatenate([null.simulate(rng).counts[mask].astype(float)
                           for _ in range(n_sims)])
    with np.errstate(invalid="ignore", divide="ignore"):
        step = np.where(mean > 0, (target - sims.var(axis=0)) / np.where(mean > 0, mean, 1), 0)
    null.dispersion = np.clip(null.dispersion + step, 0.05, 50.0)


def _fit_timescales(x, mu, mask, W, dt, max_lag_s):
    """Rotate W to factors uncorrelated at lag 1 and fit each factor's OU timescale."""
    from scipy.optimize import minimize_scalar

    n_b = x.shape[1]
    n_units, k = W.shape
    max_lag = int(max(1, min(round(max_lag_s / dt), n_b - 1)))
    if max_lag < 1 or n_b < 2:
        return W, np.full(k, dt)
    off = ~np.eye(n_units, dtype=bool)
    pinv = np.linalg.pinv(W)
    gs = []
    for lag in range(1, max_lag + 1):
        ok = mask[:, :-lag] & mask[:, lag:]
        if ok.sum() < 10:
            break
        a = (x[:, :-lag] - mu[:, :-lag])[ok]
        b = (x[:, lag:] - mu[:, lag:])[ok]
        ma, mb = mu[:, :-lag][ok], mu[:, lag:][ok]
        c = (a.T @ b + b.T @ a) / (2 * len(a))
        m = (ma.T @ mb + mb.T @ ma) / (2 * len(a))
        sig = _log_cov_transform(c, m)
        # least-squares G with W G W^T fitting the off-diagonal of sig: start from the
        # projection and refine the diagonal part with a few fixed-point steps
        s = sig.copy()
        g = pinv @ s @ pinv.T
        for _ in range(20):
            np.fill_diagonal(s, np.diag(W @ g @ W.T))
            g_new = pinv @ s @ pinv.T
            if np.max(np.abs(g_new - g)) < 1e-10:
                g = g_new
                break
            g = g_new
        gs.append((g + g.T) / 2)
    if not gs:
        return W, np.full(k, dt)
    # pinv(W) W = I, so the factors have identity covariance at lag 0 and any
    # rotation keeps it; the eigenvectors of lag-1 G make them uncorrelated at lag 1
    _, R = np.linalg.eigh(gs[0])
    W_new = W @ R
    rho = np.array([np.diag(R.T @ g @ R) for g in gs])     # lags x K
    lags = np.arange(1, rho.shape[0] + 1)
    tau = np.empty(k)
    for j in range(k):
        y = rho[:, j]

        def loss(log_tau, y=y):
            t = np.exp(log_tau)
            return float(np.sum((y - _bin_average_corr(lags, t, dt)
                                 / _bin_average_corr(0, t, dt)) ** 2))

        res = minimize_scalar(loss, bounds=(np.log(dt / 4), np.log(60.0)), method="bounded")
        tau[j] = float(np.exp(res.x))
    # continuous-time loadings: bin averaging shrank each factor's variance
    W_new = W_new / np.sqrt(_bin_average_corr(0, tau, dt))[None, :]
    return W_new, tau


def _bin_average_corr(lag, tau, dt):
    """Correlation of bin averages of a unit-variance OU process, ``lag`` bins apart.

    For an exponential autocorrelation exp(-|u| / tau) and bins of width dt:
    lag 0: 2 (tau/dt)^2 (dt/tau - 1 + exp(-dt/tau));
    lag l >= 1: exp(-l dt/tau) 2 (tau/dt)^2 (cosh(dt/tau) - 1).
    """
    lag = np.asarray(lag, dtype=float)
    tau = np.asarray(tau, dtype=float)
    r = dt / tau
    zero = 2.0 / r ** 2 * (r - 1.0 + np.exp(-r))
    other = np.exp(-lag * r) * 2.0 / r ** 2 * (np.cosh(r) - 1.0)
    return np.where(lag == 0, zero, other)


# --------------------------------------------------------------------------- statistic
def _kmeanspp(x, s, rng):
    idx = [int(rng.integers(len(x)))]
    d2 = np.sum((x - x[idx[0]]) ** 2, axis=1)
    for _ in range(1, s):
        tot = d2.sum()
        j = int(rng.integers(len(x))) if tot <= 0 else int(rng.choice(len(x), p=d2 / tot))
        idx.append(j)
        d2 = np.minimum(d2, np.sum((x - x[j]) ** 2, axis=1))
    return x[idx].copy()


@njit(cache=True, nogil=True)
def _gmm_step(x, linv, means, logw, const):  # pragma: no cover - compiled
    """One E-step of a tied-covariance mixture, accumulating M-step sums.

    Returns the total log-likelihood, the summed responsibilities (S,) and the
    responsibility-weighted sums of rows (S x D).
    """
    n, d = x.shape
    s = means.shape[0]
    nk = np.zeros(s)
    sx = np.zeros((s, d))
    lp = np.empty(s)
    v = np.empty(d)
    ll = 0.0
    for t in range(n):
        top = -np.inf
        for k in range(s):
            q = 0.0
            for a in range(d):
                acc = 0.0
                for b in range(a + 1):
                    acc += linv[a, b] * (x[t, b] - means[k, b])
                v[a] = acc
                q += acc * acc
            lp[k] = logw[k] + const - 0.5 * q
            if lp[k] > top:
                top = lp[k]
        tot = 0.0
        for k in range(s):
            lp[k] = np.exp(lp[k] - top)
            tot += lp[k]
        ll += top + np.log(tot)
        for k in range(s):
            r = lp[k] / tot
            nk[k] += r
            for a in range(d):
                sx[k, a] += r * x[t, a]
    return ll, nk, sx


def tied_gmm(x, n_components, *, means_init=None, rng=None, max_iter=100, tol=5e-4,
             reg=1e-6):
    """Gaussian mixture with one shared (tied) covariance, by EM.

    Parameters
    ----------
    x : ndarray (T, D)
    n_components : int
    means_init : ndarray (S, D), optional
        Starting means (default: k-means++ seeding with ``rng``).
    rng : int or Generator, optional
    max_iter : int
    tol : float
        Stop when the log-likelihood per row gains less than this.
    reg : float
        Added to the covariance diagonal (times the data's mean variance).

    Returns
    -------
    loglik : float
        Total log-likelihood of the returned parameters.
    weights, means, cov : the fitted parameters.

    Notes
    -----
    The E-step is compiled (numba); the tests check it against a plain NumPy
    implementation and the fit against scikit-learn's ``GaussianMixture``.
    """
    rng = check_rng(rng)
    x = np.ascontiguousarray(x, dtype=np.float64)
    n, d = x.shape
    s = int(n_components)
    means = _kmeanspp(x, s, rng) if means_init is None else np.array(means_init, float)
    scale = float(np.mean(np.var(x, axis=0))) or 1.0
    cov = np.cov(x.T, bias=True).reshape(d, d) + reg * scale * np.eye(d)
    weights = np.full(s, 1.0 / s)
    xtx = x.T @ x
    ll_old = -np.inf
    ll = -np.inf
    params = (weights, means, cov)
    for _ in range(max_iter + 1):
        chol = np.linalg.cholesky(cov)
        linv = np.ascontiguousarray(np.linalg.inv(chol))
        const = -np.sum(np.log(np.diag(chol))) - 0.5 * d * np.log(2 * np.pi)
        ll, nk, sx = _gmm_step(x, linv, np.ascontiguousarray(means),
                               np.log(np.maximum(weights, 1e-300)), const)
        params = (weights, means, cov)
        if ll - ll_old < tol * n:
            break
        ll_old = ll
        nk = nk + 1e-12
        weights = nk / n
        means = sx / nk[:, None]
        cov = (xtx - (means.T * nk) @ means) / n
        cov = (cov + cov.T) / 2 + reg * scale * np.eye(d)
    return float(ll), *params


@dataclass
class _StatisticValue:
    value: float
    n_components: int
    loglik: np.ndarray
    bic: np.ndarray


def _statistic(binned_counts, n_valid, cond, n_cond, bin_size, *, n_dims, max_states,
               psth_smooth_s, drift_trials, smooth_s, rng):
    """The discreteness statistic (module notes, steps 1-4)."""
    x = np.sqrt(binned_counts.astype(float))
    mask = _valid_mask(n_valid, x.shape[1])
    x[~mask] = 0.0
    psth, off = _means(x, mask, cond, n_cond, psth_smooth_s / bin_size, drift_trials, False)
    e = x - psth[cond] - off[:, None, :]
    e[~mask] = 0.0
    flat = e[mask]
    cov = np.cov(flat.T, bias=True)
    from attractorfit.latent import _fa_projector, fa_from_covariance

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        W, psi, _ = fa_from_covariance(cov, n_dims, max_iter=500, tol=1e-6)
    z = e @ _fa_projector(W, psi)                       # trials x bins x K
    if smooth_s > 0:
        z = _smooth_masked(z, np.broadcast_to(mask[:, :, None], z.shape),
                           smooth_s / bin_size, axis=1)
    zf = z[mask]
    n = zf.shape[0]
    d = zf.shape[1]
    lls = np.empty(max_states)
    bics = np.empty(max_states)
    for s in range(1, max_states + 1):
        ll, *_ = tied_gmm(zf, s, rng=rng)
        n_par = (s - 1) + s * d + d * (d + 1) / 2
        lls[s - 1] = ll
        bics[s - 1] = -2 * ll + n_par * np.log(n)
    best = int(np.argmin(bics[1:])) + 1            # the BIC-best mixture with S >= 2
    return _StatisticValue(value=float((lls[best] - lls[0]) / n),
                           n_components=int(np.argmin(bics)) + 1,
                           loglik=lls, bic=bics)


def discreteness_statistic(binned, *, n_dims: int = 3, condition=None, max_states: int = 8,
                           psth_smooth_s: float = 0.1, drift_trials: float | None = 10.0,
                           smooth_s: float = 0.0, rng=None) -> float:
    """The test statistic on one BinnedCounts (see the module notes).

    Returns the log-likelihood gain per bin, over one Gaussian, of the BIC-preferred
    tied Gaussian mixture with at least two components, on the factor-analysis
    trajectories of residual square-root counts. Same options as
    :func:`discreteness_test`.
    """
    binned = _check_binned(binned)
    cond, levels = _conditions(binned, condition)
    k = check_int("n_dims", n_dims, low=1, high=binned.n_units - 1)
    s = check_int("max_states", max_states, low=2)
    return _statistic(binned.counts, binned.n_valid, cond, len(levels), binned.bin_size,
                      n_dims=k, max_states=s, psth_smooth_s=psth_smooth_s,
                      drift_trials=drift_trials, smooth_s=smooth_s,
                      rng=check_rng(rng)).value


# --------------------------------------------------------------------------- result
@dataclass
class DiscretenessResult:
    """Outcome of :func:`discreteness_test`.

    Attributes
    ----------
    statistic : float
        Log-likelihood gain per bin of the BIC-preferred mixture with at least two
        components over one Gaussian (data).
    n_components : int
        Number of mixture components (states of the latent trajectory) chosen by BIC
        over 1..max_states on the data (not the Poisson HMM's number of states).
    null_statistics : ndarray (n_boot,)
    null_n_components : ndarray of int (n_boot,)
        Components chosen in each surrogate.
    p_value : float
    verdict : str
        ``"discrete"``, ``"not_discrete"`` or ``"inconclusive"``.
    alpha : float
    n_boot : int
    null : ContinuousNull
        The fitted null model.
    description : str
        The null the data were tested against, in words.
    assumptions : dict
        Bin size, latent dimension, how the number of states was chosen, B, ...
    too_short : bool
    """

    statistic: float
    n_components: int
    null_statistics: np.ndarray
    null_n_components: np.ndarray
    p_value: float
    verdict: str
    alpha: float
    n_boot: int
    null: ContinuousNull
    description: str
    assumptions: dict
    too_short: bool = False

    def text(self) -> str:
        """The verdict in plain words with its assumptions."""
        head = {"discrete": "Evidence for discrete states switching within trials",
                "not_discrete": "No evidence for discrete states beyond the continuous null",
                "inconclusive": "Inconclusive"}[self.verdict]
        return (f"{head} (p = {self.p_value:.3g}, B = {self.n_boot}, alpha = {self.alpha:g}). "
                f"Tested against: {self.description} This is statistical evidence about "
                "these models of the recording, not proof about the brain.")

    def summary_block(self) -> dict:
        """The ``discreteness`` block of summary.json."""
        return {"p_value": self.p_value, "verdict": self.verdict, "statistic": self.statistic,
                "statistic_name": "mixture log-likelihood gain per bin over one Gaussian "
                                  "(latent trajectories of residual square-root counts)",
                "mixture_components": self.n_components, "alpha": self.alpha,
                "n_boot": self.n_boot,
                "null": self.description,
                "null_statistic_mean": float(np.mean(self.null_statistics))
                if self.null_statistics.size else float("nan"),
                "null_statistic_q95": float(np.quantile(self.null_statistics, 0.95))
                if self.null_statistics.size else float("nan"),
                "assumptions": dict(self.assumptions), "text": self.text()}


def _replicate(null, seed, opts):
    rng = np.random.default_rng(seed)
    sim = null.simulate(rng)
    st = _statistic(sim.counts, sim.n_valid, null.trial_condition, len(null.levels),
                    null.bin_size, rng=rng, **opts)
    return st.value, st.n_components


def discreteness_test(binned, *, n_boot: int = 199, alpha: float = 0.05, condition=None,
                      n_dims=None, max_states: int = 8, psth_smooth_s: float = 0.1,
                      drift_trials: float | None = 10.0, smooth_s: float = 0.0,
                      rng=None, n_jobs: int = 1, progress: bool = False
                      ) -> DiscretenessResult:
    """Parametric-bootstrap test of discrete states against a continuous-latent null.

    Parameters
    ----------
    binned : BinnedCounts
        Delay-period counts (trials x bins x units).
    n_boot : int
        Surrogates B (>= 1); p-values are multiples of 1 / (B + 1).
    alpha : float
        Level of the test (0 < alpha < 1).
    condition : str, optional
        Trial label with its own PSTH (the remembered item); None: one PSTH.
    n_dims : int, optional
        Latent factors K of the null and of the statistic. Default: chosen on the data
        by cross-validated factor analysis of residual square-root counts
        (:class:`~attractorfit.latent.LatentModel`, 1 to 6), then fixed.
    max_states : int
        Largest number of mixture components (states) tried; the number is chosen by
        BIC [3]_ in the data and in every surrogate.
    psth_smooth_s : float
        PSTH smoothing (s.d., seconds).
    drift_trials : float or None
        Drift smoothing across trials (s.d., trials); None: no drift term.
    smooth_s : float
        Smoothing of the latent trajectories within trials (s.d., seconds).
    rng : int or Generator, optional
    n_jobs : int
        Parallel surrogates (joblib threads; BLAS limited to one thread each);
        surrogates use streams spawned from one ``SeedSequence``, so the result does
        not depend on ``n_jobs``.
    progress : bool
        Show a progress bar (tqdm).

    Returns
    -------
    DiscretenessResult

    Raises
    ------
    InputError
        Not a BinnedCounts, fewer than 2 trials, unknown condition column, bad options.
    """
    binned = _check_binned(binned)
    n_boot = check_int("n_boot", n_boot, low=1)
    alpha = check_fraction("alpha", alpha)
    if not 0 < alpha < 1:
        raise InputError(f"alpha: expected a number strictly between 0 and 1, got {alpha!r}")
    max_states = check_int("max_states", max_states, low=2)
    n_jobs = check_int("n_jobs", n_jobs, low=1)
    smooth_s = check_nonnegative("smooth_s", smooth_s)
    psth_smooth_s = check_nonnegative("psth_smooth_s", psth_smooth_s)
    if drift_trials is not None:
        drift_trials = check_positive("drift_trials", drift_trials)
    rng = check_rng(rng)
    cond, levels = _conditions(binned, condition)
    dim_rule = "fixed by the caller"
    if n_dims is None:
        n_dims = _choose_dims(binned, cond, len(levels), psth_smooth_s, drift_trials, rng)
        dim_rule = "cross-validated factor analysis of residual square-root counts (1-6)"
    n_dims = check_int("n_dims", n_dims, low=1, high=binned.n_units - 1)
    null = fit_continuous_null(binned, n_dims=n_dims, condition=condition,
                               psth_smooth_s=psth_smooth_s, drift_trials=drift_trials)
    opts = dict(n_dims=n_dims, max_states=max_states, psth_smooth_s=psth_smooth_s,
                drift_trials=drift_trials, smooth_s=smooth_s)
    root = np.random.SeedSequence(int(rng.integers(2 ** 63 - 1)))
    data_seed, *seeds = root.spawn(n_boot + 1)
    obs = _statistic(binned.counts, binned.n_valid, cond, len(levels), binned.bin_size,
                     rng=np.random.default_rng(data_seed), **opts)
    from threadpoolctl import threadpool_limits

    # one BLAS thread per replicate: no oversubscription, same numbers serial or parallel
    with threadpool_limits(limits=1, user_api="blas"):
        if n_jobs == 1:
            it = seeds
            if progress:
                from tqdm import tqdm
                it = tqdm(seeds, desc="discreteness surrogates")
            res = [_replicate(null, s, opts) for s in it]
        else:
            # threads: the compiled mixture EM releases the GIL and NumPy's kernels
            # do too; no process start-up and no copying of the null model
            from joblib import Parallel, delayed

            res = Parallel(n_jobs=n_jobs, prefer="threads", verbose=10 if progress else 0)(
                delayed(_replicate)(null, s, opts) for s in seeds)
    null_t = np.array([r[0] for r in res])
    null_s = np.array([r[1] for r in res], dtype=np.int64)
    p = p_value(obs.value, null_t)
    too_short = binned.n_trials < MIN_TRIALS or binned.total_bins < MIN_BINS
    v = verdict(p, alpha=alpha, n_boot=n_boot, too_short=too_short)
    assumptions = {
        "bin_size_s": binned.bin_size, "n_trials": binned.n_trials,
        "n_bins": binned.total_bins, "n_units": binned.n_units,
        "latent_dims": n_dims, "latent_dims_rule": dim_rule,
        "state_count_rule": f"BIC over 1..{max_states} tied-covariance mixture components, "
                            "re-chosen in every surrogate",
        "n_boot": n_boot, "condition": condition, "psth_smooth_s": psth_smooth_s,
        "drift_trials": drift_trials, "trajectory_smooth_s": smooth_s,
        "null_timescales_s": null.timescales_s.tolist(),
        "verdict_rule": f"discrete if p <= {alpha:g}; not_discrete if p > "
                        f"{max(2 * alpha, 0.1):g}; inconclusive otherwise, or with fewer "
                        f"than {MIN_TRIALS} trials or {MIN_BINS} bins",
    }
    return DiscretenessResult(statistic=obs.value, n_components=obs.n_components,
                              null_statistics=null_t, null_n_components=null_s, p_value=p,
                              verdict=v, alpha=alpha, n_boot=n_boot, null=null,
                              description=null.describe(), assumptions=assumptions,
                              too_short=bool(too_short))


def _choose_dims(binned, cond, n_cond, psth_smooth_s, drift_trials, rng):
    """K for the null and the statistic: CV factor analysis of residual sqrt counts."""
    from attractorfit.latent import LatentModel

    x = np.sqrt(binned.counts.astype(float))
    mask = _valid_mask(binned.n_valid, binned.n_bins)
    x[~mask] = 0.0
    psth, off = _means(x, mask, cond, n_cond, psth_smooth_s / binned.bin_size,
                       drift_trials, False)
    e = x - psth[cond] - off[:, None, :]
    seqs = [e[i, : int(binned.n_valid[i])] for i in range(binned.n_trials)]
    fit = LatentModel("fa", max_dims=min(6, binned.n_units - 1), rng=rng).fit(seqs).result_
    return int(min(max(fit.n_dims, 1), 6))
