"""Spike-train statistics shared by ``inspect`` and the model-vs-data comparison.

Inter-spike-interval coefficient of variation, Fano factor of counts, refractory
contamination and pairwise count correlations.

References
----------
.. [1] Nawrot, M. P., Boucsein, C., Rodriguez Molina, V., Riehle, A., Aertsen, A. &
   Rotter, S. (2008). Measurement of variability dynamics in cortical spike trains.
   Journal of Neuroscience Methods 169:374-390.
.. [2] Dayan, P. & Abbott, L. F. (2001). Theoretical Neuroscience. MIT Press, ch. 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from attractorfit.recording import REFRACTORY_S, Recording

__all__ = ["isi_cv", "fano_factor", "contamination_fraction", "count_correlations",
           "UnitSummary", "unit_summary"]


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
