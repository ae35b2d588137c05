"""Spike-train statistics shared by ``inspect`` and the model-vs-data comparison.

Inter-spike-interval coefficient of variation, Fano factor of counts, refractory
contamination, pairwise count correlations, and drift of unit rates across a session.

References
----------
.. [1] Nawrot, M. P., Boucsein, C., Rodriguez Molina, V., Riehle, A., Aertsen, A. &
   Rotter, S. (2008). Measurement of variability dynamics in cortical spike trains.
   Journal of Neuroscience Methods 169:374-390.
.. [2] Dayan, P. & Abbott, L. F. (2001). Theoretical Neuroscience. MIT Press, ch. 1.
.. [3] Spearman, C. (1904). The proof and measurement of association between two
   things. American Journal of Psychology 15:72-101.
.. [4] Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a
   practical and powerful approach to multiple testing. Journal of the Royal
   Statistical Society B 57:289-300.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from attractorfit.errors import InputError
from attractorfit.recording import REFRACTORY_S, Recording

__all__ = ["isi_cv", "fano_factor", "contamination_fraction", "count_correlations",
           "UnitSummary", "unit_summary", "spearman_trend", "benjamini_hochberg",
           "UnitDrift", "unit_drift"]


def isi_cv(spike_times, *, windows=None) -> float:
    """Coefficient of variation of the inter-spike intervals of one spike train.

    Parameters
    ----------
    spike_times : ndarray
        Sorted spike times (s).
    windows : ndarray (M, 2), optional
        Only intervals whose both spikes lie in the same window count (e.g. trials),
        so gaps between trials do not inflate the CV.

    Returns
    -------
    float
        s.d./mean of the intervals (NaN with fewer than 3 spikes). A Poisson process
        has CV 1; a gamma renewal process of order k has CV 1/sqrt(k) [1]_.
    """
    t = np.asarray(spike_times, dtype=float)
    if windows is None:
        isi = np.diff(t)
    else:
        w = np.asarray(windows, dtype=float)
        k = np.searchsorted(w[:, 0], t, side="right") - 1
        inside = (k >= 0) & (t < w[np.clip(k, 0, None), 1])
        same = inside[1:] & inside[:-1] & (k[1:] == k[:-1])
        isi = np.diff(t)[same]
    if isi.size < 2:
        return float("nan")
    m = isi.mean()
    return float(isi.std(ddof=1) / m) if m > 0 else float("nan")


def fano_factor(counts, *, ddof: int = 1) -> float:
    """Fano factor (variance/mean) of spike counts in equal windows.

    1 for a Poisson process; 1/k in long windows for a gamma process of order k [1]_.
    NaN when the mean count is 0 or fewer than 2 windows. ``ddof=1`` (default) uses
    the unbiased variance; ``ddof=0`` the plain one.
    """
    c = np.asarray(counts, dtype=float).ravel()
    if c.size < 2:
        return float("nan")
    m = c.mean()
    return float(c.var(ddof=ddof) / m) if m > 0 else float("nan")


def contamination_fraction(spike_times, *, refractory_s: float = REFRACTORY_S) -> float:
    """Fraction of inter-spike intervals shorter than ``refractory_s`` (common practice)."""
    t = np.asarray(spike_times, dtype=float)
    if t.size < 2:
        return float("nan")
    return float(np.mean(np.diff(t) < refractory_s))


def count_correlations(counts) -> np.ndarray:
    """Pairwise Pearson correlations of counts (columns = units), upper triangle.

    Units with zero variance are left out. Cost O(T N^2) for N units: this is the
    quantity asked for (all pairs), computed once as one matrix product.
    """
    x = np.asarray(counts, dtype=float)
    sd = x.std(axis=0)
    x = x[:, sd > 0]
    if x.shape[1] < 2:
        return np.zeros(0)
    c = np.corrcoef(x, rowvar=False)
    iu = np.triu_indices(c.shape[0], k=1)
    return c[iu]


@dataclass
class UnitSummary:
    """Per-unit statistics printed by ``attractorfit inspect``.

    Attributes (arrays, one entry per unit): ``unit_ids``, ``n_spikes``, ``rate_hz``
    (over the recording's duration, or over the trials when there are trials),
    ``isi_cv`` (within trials when there are trials), ``fano`` (of whole-trial counts;
    NaN without trials), ``contamination`` (fraction of ISIs under 1.5 ms).
    """

    unit_ids: list
    n_spikes: np.ndarray
    rate_hz: np.ndarray
    isi_cv: np.ndarray
    fano: np.ndarray
    contamination: np.ndarray


def unit_summary(recording: Recording) -> UnitSummary:
    """Compute :class:`UnitSummary` for every unit of ``recording``."""
    n = recording.n_units
    n_spikes = np.array([len(t) for t in recording.spike_times])
    rate = np.full(n, np.nan)
    cv = np.full(n, np.nan)
    fano = np.full(n, np.nan)
    cont = np.array([contamination_fraction(t) for t in recording.spike_times])
    if recording.n_trials:
        w = np.column_stack([recording.trials["start"], recording.trials["stop"]])
        total = float(np.sum(w[:, 1] - w[:, 0]))
        for i, t in enumerate(recording.spike_times):
            lo = np.searchsorted(t, w[:, 0])
            hi = np.searchsorted(t, w[:, 1])
            c = hi - lo
            rate[i] = c.sum() / total
            fano[i] = fano_factor(c)
            cv[i] = isi_cv(t, windows=w)
    else:
        dur = max(recording.duration, 1e-12)
        rate = n_spikes / dur
        cv = np.array([isi_cv(t) for t in recording.spike_times])
    return UnitSummary(list(recording.unit_ids), n_spikes, rate, cv, fano, cont)


# --------------------------------------------------------------------------- drift
def spearman_trend(values) -> tuple:
    """Spearman rank correlation of each column with the row order, and its p-value.

    Parameters
    ----------
    values : ndarray (T, N)
        One row per trial in session order, one column per unit (e.g. rates in Hz).

    Returns
    -------
    rho : ndarray (N,)
        Spearman's rho [3]_ between the trial index and each column (ties in the column
        get average ranks); NaN for a constant column.
    p_value : ndarray (N,)
        Two-sided p-value from the t approximation
        t = rho sqrt((T - 2) / (1 - rho^2)) with T - 2 degrees of freedom (the same
        approximation as ``scipy.stats.spearmanr``); NaN for a constant column.
    """
    from scipy.stats import rankdata, t as t_dist

    x = np.asarray(values, dtype=float)
    if x.ndim != 2 or x.shape[0] < 3:
        raise InputError(f"values: expected (trials x units) with at least 3 trials, got "
                         f"shape {x.shape}")
    n = x.shape[0]
    r_y = rankdata(x, axis=0)
    r_x = np.arange(1, n + 1, dtype=float)
    cy = r_y - r_y.mean(axis=0)
    cx = r_x - r_x.mean()
    sy = np.sqrt(np.sum(cy ** 2, axis=0))
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = (cx @ cy) / (np.sqrt(np.sum(cx ** 2)) * sy)
        rho = np.clip(rho, -1.0, 1.0)
        tt = rho * np.sqrt((n - 2) / np.maximum(1.0 - rho ** 2, 1e-300))
    p = 2.0 * t_dist.sf(np.abs(tt), n - 2)
    p = np.where(np.isfinite(rho), p, np.nan)
    return rho, p


def benjamini_hochberg(p_values) -> np.ndarray:
    """Benjamini-Hochberg adjusted p-values (q-values) [4]_.

    q_(i) = min over j >= i of p_(j) m / j (p sorted ascending, m finite p-values),
    capped at 1. NaN entries stay NaN and do not count in m. A unit is a discovery at
    false discovery rate alpha when q <= alpha.
    """
    p = np.asarray(p_values, dtype=float).ravel()
    q = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return q
    order = ok[np.argsort(p[ok], kind="stable")]
    scaled = p[order] * m / np.arange(1, m + 1)
    q[order] = np.minimum(np.minimum.accumulate(scaled[::-1])[::-1], 1.0)
    return q


@dataclass
class UnitDrift:
    """Drift of each unit's rate across the trials of a session.

    Attributes
    ----------
    unit_ids : list of str
    rate_hz : ndarray (T, N)
        Rate of each unit in each trial's analysis window, trials in session order.
    rho : ndarray (N,)
        Spearman correlation of the rate with the trial index [3]_.
    p_value : ndarray (N,)
    q_value : ndarray (N,)
        Benjamini-Hochberg adjusted p-values across units [4]_.
    drifting : ndarray of bool (N,)
        ``q_value <= alpha``.
    relative_change : ndarray (N,)
        Least-squares slope of rate on trial index times (T - 1), over the unit's mean
        rate: the fitted change from the first to the last trial, as a fraction.
    alpha : float
        False discovery rate.
    """

    unit_ids: list
    rate_hz: np.ndarray
    rho: np.ndarray
    p_value: np.ndarray
    q_value: np.ndarray
    drifting: np.ndarray
    relative_change: np.ndarray
    alpha: float

    @property
    def fraction_drifting(self) -> float:
        """Fraction of units with a significant monotonic trend (at FDR ``alpha``)."""
        return float(np.mean(self.drifting)) if self.drifting.size else float("nan")

    def summary_block(self) -> dict:
        """Plain numbers for summary.json."""
        d = self.drifting
        return {"n_units": int(d.size), "n_drifting": int(d.sum()),
                "fraction_drifting": self.fraction_drifting, "alpha_fdr": float(self.alpha),
                "median_abs_relative_change_drifting":
                    float(np.median(np.abs(self.relative_change[d]))) if d.any()
                    else float("nan")}

    def rows(self) -> list:
        """Rows ``(unit, rho, p_value, q_value, drifting, relative_change)``."""
        return [[u, float(r), float(p), float(q), "yes" if dr else "no", float(c)]
                for u, r, p, q, dr, c in zip(self.unit_ids, self.rho, self.p_value,
                                             self.q_value, self.drifting,
                                             self.relative_change)]


def unit_drift(rate_hz, *, unit_ids=None, alpha: float = 0.05) -> UnitDrift:
    """Test every unit's rate for a monotonic trend across the session.

    Each unit's per-trial rate is rank-correlated with the trial index (Spearman [3]_,
    which catches any monotonic drift, not only a linear one); the p-values are
    adjusted across units by Benjamini-Hochberg [4]_ and units with q <= ``alpha``
    are called drifting.

    Parameters
    ----------
    rate_hz : ndarray (T, N)
        Rate of each unit (column) in each trial (row), trials in session order.
    unit_ids : list of str, optional
    alpha : float
        False discovery rate (default 0.05).

    Returns
    -------
    UnitDrift

    Notes
    -----
    Assumes trials are exchangeable apart from the trend: a slow oscillation or a
    condition order that changes across the session can also produce a trend.

    Examples
    --------
    >>> import numpy as np
    >>> from attractorfit.stats import unit_drift
    >>> rate = np.column_stack([np.linspace(5, 10, 40), np.tile([5.0, 6.0], 20)])
    >>> unit_drift(rate).drifting.tolist()
    [True, False]
    """
    from attractorfit._validation import check_fraction

    x = np.asarray(rate_hz, dtype=float)
    alpha = check_fraction("drift.alpha", alpha, low=0.0, high=1.0)
    rho, p = spearman_trend(x)
    q = benjamini_hochberg(p)
    n = x.shape[0]
    tt = np.arange(n, dtype=float) - (n - 1) / 2.0
    mean = x.mean(axis=0)
    slope = (tt @ (x - mean)) / np.sum(tt ** 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.where(mean > 0, slope * (n - 1) / mean, np.nan)
    ids = [str(i) for i in range(x.shape[1])] if unit_ids is None else list(unit_ids)
    return UnitDrift(unit_ids=ids, rate_hz=x, rho=rho, p_value=p, q_value=q,
                     drifting=np.nan_to_num(q, nan=1.0) <= alpha, relative_change=rel,
                     alpha=float(alpha))
