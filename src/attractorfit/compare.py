"""Model versus data: the same analysis on the data and on surrogates, with tests.

Stage 7 of the flow (surrogates -> **compare** -> report). :func:`compare` takes the
data's counts, surrogate recordings of the fitted network (and optionally null
surrogates), runs exactly the same analysis on each, and judges every statistic
against what sampling alone produces.

The analysis of one dataset (data or surrogate, on the held-out trials)
------------------------------------------------------------------------
* states decoded with the data's fitted state model (``state_fit.decode``), and
  optionally refitted (a new state model with the data's state count fitted to the
  dataset itself; its states are matched to the data's by their rates, Hungarian
  assignment on squared log-rate differences);
* occupancy (fraction of assigned time per state), dwell-time segments with
  censoring at trial edges, Kaplan-Meier restricted mean dwell time per state,
  transition counts between consecutive assigned segments;
* per-unit x per-state rates (Hz, over the bins assigned to the state) and per-unit
  mean rates over all bins;
* per-unit Fano factor: across trials of the same condition, in windows of
  ``count_window_s`` (whole bins) at the same time of the analysis window, as the
  ratio sum(var) / sum(mean) over (condition, window) cells with at least 2 trials
  (1 for a Poisson process with a trial-locked rate [3]_);
* pairwise Pearson correlations of the counts in the same windows (all trials);
* per-unit ISI CV inside the analysis windows (only when spike times are given);
* per level of each trial label: the fraction of delay time (all bins) in each
  state and unassigned.

The statistics (data vs the model ensemble of B surrogates)
-----------------------------------------------------------
``occupancy_tvd``
    Total variation distance 0.5 sum_s |occ_data - mean_b occ_b|.
``dwell_logrank``
    Sum over states of the log-rank chi-square [1]_ of the data's dwell segments
    against the pooled segments of the ensemble (censored segments as censored);
    per-state chi-square and asymptotic p-values are reported too (they assume
    independent segments; the reference rule below does not).
``dwell_logratio``
    Mean over states of |log(mean dwell data / mean over b of mean dwell b)|;
    ``dwell_ratio`` per state is reported beside it.
``transition_distance``
    Mean total variation distance between the rows of the data's transition
    probabilities and the ensemble's (pooled counts), rows weighted by the data's
    jumps out of each state (0 by construction with 2 states).
``rate_r2`` (a similarity)
    R^2 of the data's per-unit x per-state rates by the ensemble's mean, both
    centred per unit (mean over states removed): how well the model reproduces the
    state modulation of each unit, not the trivial spread of mean rates across units.
``mean_rate_r2`` (a similarity, for information)
    Plain R^2 of the per-unit mean rates.
``fano_ks``, ``isi_cv_ks``, ``correlation_ks``
    Two-sample Kolmogorov-Smirnov statistic between the data's per-unit (per-pair)
    values and the ensemble's pooled values; scipy's ``ks_2samp`` p-value is
    reported for the data (it ignores that pooled values repeat units).
``condition_tvd[label]``
    Mean over levels of the total variation distance between the data's and the
    ensemble's (pooled) state-and-unassigned fractions of delay time; the cue-matching
    state of each level is the data's most occupied state for that level.

Judgement (Amendment 5 of the design)
-------------------------------------
Two recordings of one process differ by sampling alone, so each statistic is judged
against its *reference distribution*: the same statistic with each model surrogate b
in the data's place and the other B - 1 surrogates as the ensemble (leave one out).
A distance is **consistent with the model** when it is <= the 95th percentile of its
reference (``<name>_ref95``); a similarity (R^2) when it is >= the 5th percentile
(``<name>_ref05``). The percentile is the Monte Carlo critical value (the
ceil(0.95 (B + 1))-th smallest of the B reference values, see
:func:`reference_quantile`), so that data exchangeable with the surrogates are flagged
at most 5% of the time; the rule then agrees with the Monte Carlo p-value
(1 + #{reference as extreme}) / (B + 1) > 0.05 [2]_ for B >= 19. All of this runs on
the held-out trials (the data's trials not used to fit the network) and the
surrogates' trials at the same positions, so data and each surrogate have the same
size. The confidence interval of each statistic resamples
the B surrogates with replacement (``n_boot`` times): it shows the Monte Carlo
uncertainty of the ensemble, not the data's sampling error (that is what the
reference distribution measures).

Nulls: is the network better than a null?
-----------------------------------------
For a null with surrogates N_1..N_C and a statistic d (a distance; 1 - R^2 for
R^2), define for any dataset x the score T(x) = d(x, null ensemble) - d(x, model
ensemble): positive when x is closer to the model. Under the hypothesis that the data
come from the null, T(data) is exchangeable with T(N_c) (each null surrogate scored
against the other C - 1), so

    p_network_better = (1 + #{T(N_c) >= T(data)}) / (C + 1)

is a parametric-bootstrap test of the null as a separate family [4]_ [2]_, oriented
towards the network. Symmetrically, under the hypothesis that the data come from the
network, p_null_better = (1 + #{T(M_b) <= T(data)}) / (B + 1). Verdicts:
``network_better`` (p_network_better <= alpha < p_null_better), ``null_better`` (the
reverse), ``both_differ`` (both <= alpha: the data lie apart from both),
``indistinguishable`` (neither) and ``inconclusive`` (fewer surrogates than
1 / alpha - 1 on either side, so p cannot reach alpha). The overall verdict per null
uses the sum over statistics of T / s, s the median reference distance of the
statistic; left out of that sum are statistics the null cannot produce (ISI CV for
count-level nulls), the log-rank statistic (it grows with the pool size) and unit mean
rates (every null keeps them). Left out of a null's comparison altogether are the
statistics each known null keeps by construction -- ``poisson``: mean rates;
``shuffle``: mean rates, Fano factors and ISI CVs (each unit's trains are the data's);
``dither``: everything but the ISI CV (the dithered trains keep the data's states and
counts on time scales above the dither); ``continuous``: mean rates. Refitted states
are not used for nulls. The null surrogates are built from all the data's trials, the
held-out ones included, which favours the null.

These are statistical statements about models of the recording, not proof about the
brain.

References
----------
.. [1] Mantel, N. (1966). Evaluation of survival data and two new rank order
   statistics arising in its consideration. Cancer Chemotherapy Reports 50:163-170.
.. [2] Davison, A. C. & Hinkley, D. V. (1997). Bootstrap Methods and their
   Application. Cambridge University Press (sections 4.2 and 5.2).
.. [3] Nawrot, M. P. et al. (2008). Measurement of variability dynamics in cortical
   spike trains. Journal of Neuroscience Methods 169:374-390.
.. [4] Cox, D. R. (1962). Further results on tests of separate families of
   hypotheses. Journal of the Royal Statistical Society B 24:406-424.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats as sps

from attractorfit._validation import (check_fraction, check_int, check_positive, check_rng,
                                      warn_input)
from attractorfit.binning import BinnedCounts
from attractorfit.errors import InputError
from attractorfit.recording import Recording
from attractorfit.stats import isi_cv
from attractorfit.surrogates import bin_like, spawn_streams, trial_groups

__all__ = ["Comparison", "MetricResult", "NullResult", "LogRankResult", "compare",
           "logrank_test", "ks_statistic", "total_variation", "centred_rate_r2",
           "reference_quantile"]

#: Relative tolerance under which two statistics count as equal (floating-point rounding).
_TIE = 1e-10
#: Fewest surrogates for which the reference percentiles are trusted.
MIN_SURROGATES = 20
CAUTION = ("These are statistical statements about models of the recording, not proof "
           "about the brain.")

_MULTI_UNIT_CAUTION = ("A multi-unit is not a single cell: ISI statistics of multi-units "
                       "are compared with caution.")

_DISTANCE, _SIMILARITY = "distance", "similarity"
_WORDS = {
    "occupancy_tvd": "state occupancy",
    "dwell_logrank": "dwell-time distributions",
    "dwell_logratio": "mean dwell times",
    "transition_distance": "transition probabilities",
    "rate_r2": "state modulation of unit rates",
    "mean_rate_r2": "unit mean rates",
    "fano_ks": "Fano factors",
    "isi_cv_ks": "ISI CVs",
    "correlation_ks": "pairwise count correlations",
}
_NULL_WORDS = {
    "poisson": "rate-matched Poisson surrogates",
    "dither": "spike-dithered surrogates",
    "shuffle": "trial-shuffled surrogates",
    "continuous": "continuous-latent surrogates",
}
#: Statistics left out of the overall null score (log-rank grows with pool size;
#: mean rates are matched by every null by construction).
_NOT_IN_NULL_SCORE = ("dwell_logrank", "mean_rate_r2")


def _words(name):
    if name.startswith("condition_tvd["):
        return f"state use per level of {name[len('condition_tvd['):-1]!r}"
    return _WORDS.get(name, name)


# --------------------------------------------------------------------------- primitives
def total_variation(p, q) -> float:
    """Total variation distance 0.5 sum |p - q| (NaN entries of either left out)."""
    p = np.asarray(p, dtype=float)
    q = np.asarray(q, dtype=float)
    ok = np.isfinite(p) & np.isfinite(q)
    if not ok.any():
        return float("nan")
    return float(0.5 * np.sum(np.abs(p[ok] - q[ok])))


def ks_statistic(a, b) -> float:
    """Two-sample Kolmogorov-Smirnov statistic sup |F_a - F_b| (finite values only)."""
    a = np.sort(np.asarray(a, dtype=float)[np.isfinite(a)])
    b = np.sort(np.asarray(b, dtype=float)[np.isfinite(b)])
    if a.size == 0 or b.size == 0:
        return float("nan")
    x = np.concatenate([a, b])
    fa = np.searchsorted(a, x, side="right") / a.size
    fb = np.searchsorted(b, x, side="right") / b.size
    return float(np.max(np.abs(fa - fb)))


@dataclass
class LogRankResult:
    """Two-sample log-rank test.

    Attributes
    ----------
    statistic : float
        Chi-square (O - E)^2 / V with 1 degree of freedom.
    p_value : float
        Asymptotic p-value (chi-square, 1 df).
    observed_minus_expected : float
        O - E for the first sample (> 0: its durations end sooner).
    variance : float
        Hypergeometric variance V (ties allowed).
    """

    statistic: float
    p_value: float
    observed_minus_expected: float
    variance: float


def logrank_test(durations_a, observed_a, durations_b, observed_b) -> LogRankResult:
    """Log-rank test of two samples of right-censored durations [1]_.

    At every distinct time t_j with at least one complete duration, with n_j
    durations at risk (>= t_j), n_aj of them from sample a, and d_j complete
    durations ending at t_j (d_aj from a):

        O - E = sum_j d_aj - d_j n_aj / n_j
        V     = sum_j d_j (n_aj / n_j) (1 - n_aj / n_j) (n_j - d_j) / (n_j - 1)

    and chi^2 = (O - E)^2 / V with one degree of freedom.

    Parameters
    ----------
    durations_a, durations_b : array_like of float (>= 0)
    observed_a, observed_b : array_like of bool
        True for complete durations, False for censored ones.

    Returns
    -------
    LogRankResult
        NaN statistic when either sample is empty or V = 0.
    """
    da = np.asarray(durations_a, dtype=float).ravel()
    db = np.asarray(durations_b, dtype=float).ravel()
    oa = np.asarray(observed_a, dtype=bool).ravel()
    ob = np.asarray(observed_b, dtype=bool).ravel()
    if da.shape != oa.shape or db.shape != ob.shape:
        raise InputError("observed: expected one flag per duration in each sample")
    nan = LogRankResult(float("nan"), float("nan"), float("nan"), float("nan"))
    if da.size == 0 or db.size == 0:
        return nan
    times = np.unique(np.concatenate([da[oa], db[ob]]))
    if times.size == 0:
        return nan
    n_a, d_a = _at_risk_and_events(da, oa, times)
    n_b, d_b = _at_risk_and_events(db, ob, times)
    return _logrank_from_counts(n_a, d_a, n_b, d_b)


def _at_risk_and_events(d, o, times):
    """Durations >= t (at risk) and complete durations == t, at each of ``times``."""
    sd, ed = np.sort(d), np.sort(d[o])
    at_risk = d.size - np.searchsorted(sd, times, side="left")
    events = np.searchsorted(ed, times, side="right") - np.searchsorted(ed, times, side="left")
    return at_risk, events


def _logrank_from_counts(n_a, d_a, n_b, d_b) -> LogRankResult:
    """Log-rank chi-square from at-risk and event counts at the distinct event times."""
    n = np.asarray(n_a + n_b, dtype=float)
    d = np.asarray(d_a + d_b, dtype=float)
    keep = n > 0
    n, d = n[keep], d[keep]
    n_a, d_a = np.asarray(n_a, dtype=float)[keep], np.asarray(d_a, dtype=float)[keep]
    frac = n_a / n
    o_e = float(np.sum(d_a - d * frac))
    with np.errstate(invalid="ignore", divide="ignore"):
        v_j = np.where(n > 1, d * frac * (1 - frac) * (n - d) / (n - 1), 0.0)
    var = float(np.sum(v_j))
    if var <= 0:
        return LogRankResult(float("nan"), float("nan"), o_e, var)
    chi2 = o_e * o_e / var
    return LogRankResult(float(chi2), float(sps.chi2.sf(chi2, 1)), o_e, var)


class _PooledDurations:
    """Durations of B surrogates (one state), pooled under integer weights.

    Cumulative counts on the grid of distinct durations are stored per surrogate
    (B x G), so a weighted pool costs one matrix-vector product, not a concatenation.
    The counts are stored as float64 so the product runs in BLAS (integer products do
    not); they are whole numbers far below 2**53, so the product is exact.
    """

    def __init__(self, durations, observed):
        self.grid = np.unique(np.concatenate(durations)) if durations else np.zeros(0)
        g = self.grid
        self.le = np.array([np.searchsorted(np.sort(d), g, side="right") for d in durations],
                           dtype=np.float64).reshape(len(durations), g.size)
        self.ev = np.array([_at_risk_and_events(d, o, g)[1] for d, o in
                            zip(durations, observed)],
                           dtype=np.float64).reshape(len(durations), g.size)
        self.n = np.array([len(d) for d in durations], dtype=np.int64)
        self.durations, self.observed = durations, observed

    def arrays(self, w):
        wi = np.asarray(w, dtype=np.int64)
        return (np.concatenate([np.tile(d, k) for d, k in zip(self.durations, wi)]),
                np.concatenate([np.tile(o, k) for o, k in zip(self.observed, wi)]))

    def logrank(self, w, d_t, o_t) -> LogRankResult:
        """Log-rank test of durations (d_t, o_t) against the weighted pool."""
        nan = LogRankResult(float("nan"), float("nan"), float("nan"), float("nan"))
        d_t = np.asarray(d_t, dtype=float)
        o_t = np.asarray(o_t, dtype=bool)
        w = np.asarray(w, dtype=np.int64)
        total = int(w @ self.n)
        if d_t.size == 0 or total == 0:
            return nan
        wf = w.astype(np.float64)
        le = np.rint(wf @ self.le).astype(np.int64)    # exact: whole numbers < 2**53
        ev = np.rint(wf @ self.ev).astype(np.int64)
        times = np.unique(np.concatenate([self.grid[ev > 0], d_t[o_t]]))
        if times.size == 0:
            return nan
        j = np.searchsorted(self.grid, times, side="left")        # first grid >= t
        below = np.where(j > 0, le[np.clip(j - 1, 0, None)], 0)    # pool durations < t
        on = (j < self.grid.size) & (self.grid[np.clip(j, 0, self.grid.size - 1)] == times)
        n_b = total - below
        d_b = np.where(on, ev[np.clip(j, 0, self.grid.size - 1)], 0)
        n_a, d_a = _at_risk_and_events(d_t, o_t, times)
        return _logrank_from_counts(n_a, d_a, n_b, d_b)


class _PooledValues:
    """Values (Fano, ISI CV, correlations) of B surrogates, pooled under weights."""

    def __init__(self, values):
        vals = [np.asarray(v, dtype=float) for v in values]
        vals = [v[np.isfinite(v)] for v in vals]
        self.values = vals
        self.grid = np.unique(np.concatenate(vals)) if vals else np.zeros(0)
        # float64 so the weighted sum runs in BLAS; whole numbers, so it stays exact
        self.le = np.array([np.searchsorted(np.sort(v), self.grid, side="right")
                            for v in vals], dtype=np.float64).reshape(len(vals),
                                                                       self.grid.size)
        self.n = np.array([v.size for v in vals], dtype=np.int64)
        self._target = {}

    def _prepare(self, target):
        """Per-target quantities that do not depend on the weights (cached)."""
        hit = self._target.get(id(target))
        if hit is not None and hit[0] is target:
            return hit[1]
        t = np.sort(np.asarray(target, dtype=float)[np.isfinite(target)])
        prep = (t.size, np.searchsorted(t, self.grid, side="right") / max(t.size, 1),
                np.searchsorted(self.grid, t, side="right") - 1,
                np.searchsorted(t, t, side="right") / max(t.size, 1))
        self._target[id(target)] = (target, prep)
        return prep

    def arrays(self, w):
        wi = np.asarray(w, dtype=np.int64)
        return np.concatenate([np.tile(v, k) for v, k in zip(self.values, wi)])

    def ks(self, w, target) -> float:
        """Kolmogorov-Smirnov statistic of ``target`` against the weighted pool."""
        n_t, f_t_grid, j, f_t = self._prepare(target)    # j: last grid point <= t
        w = np.asarray(w, dtype=np.int64)
        total = int(w @ self.n)
        if n_t == 0 or total == 0:
            return float("nan")
        f_pool = np.rint(w.astype(np.float64) @ self.le) / total     # at grid points
        f_pool_t = np.where(j >= 0, f_pool[np.clip(j, 0, None)], 0.0)
        return float(max(np.max(np.abs(f_t_grid - f_pool)) if self.grid.size else 0.0,
                         np.max(np.abs(f_t - f_pool_t))))


# --------------------------------------------------------------------------- summaries
@dataclass
class _Summary:
    """What the analysis extracts from one dataset (see the module notes)."""

    trial_counts: np.ndarray      # (trials, S) assigned bins per state
    n_bins: np.ndarray            # (trials,) bins per trial
    occupancy: np.ndarray         # (S,)
    seg_dur: list                 # per state, durations (s)
    seg_obs: list                 # per state, complete (not censored)
    mean_dwell: np.ndarray        # (S,)
    trans: np.ndarray             # (S, S) counts
    state_rates: np.ndarray       # (S, N) Hz
    mean_rates: np.ndarray        # (N,) Hz
    fano: np.ndarray              # (N,)
    corr: np.ndarray              # (P,)
    cv: np.ndarray | None         # (N,) or None
    cond: dict                    # label -> (L, S + 1) bins per level (states, unassigned)


def _state_part(x, bin_states, segments, trans, S):
    """Occupancy, dwell, transitions and per-state rates from decoded bins."""
    from attractorfit.states._segments import kaplan_meier

    seqs = x.sequences()
    n_units = x.n_units
    trial_counts = np.zeros((len(seqs), S))
    sums = np.zeros((S, n_units))
    for i, (c, lab) in enumerate(zip(seqs, bin_states)):
        lab = np.asarray(lab, dtype=np.int64)
        ok = lab >= 0
        trial_counts[i] = np.bincount(lab[ok], minlength=S)[:S]
        if ok.any():
            onehot = (lab[:, None] == np.arange(S)[None, :]).astype(float)
            sums += onehot.T @ c.astype(float)
    bins = trial_counts.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rates = np.where(bins[:, None] > 0, sums / (bins[:, None] * x.bin_size), np.nan)
    tot = bins.sum()
    occ = bins / tot if tot > 0 else np.full(S, np.nan)
    dur = segments.stop - segments.start
    seg_dur, seg_obs, mdw = [], [], np.full(S, np.nan)
    for s in range(S):
        m = segments.state == s
        seg_dur.append(dur[m].astype(float))
        seg_obs.append(~np.asarray(segments.censored[m], dtype=bool))
        if m.any():
            mdw[s] = kaplan_meier(seg_dur[-1], seg_obs[-1]).restricted_mean
    return trial_counts, occ, seg_dur, seg_obs, mdw, np.asarray(trans, dtype=float), rates


def _relabel(decoding, perm):
    """bin_states, segments and transition counts with states renamed old -> perm[old]."""
    from dataclasses import replace

    perm = np.asarray(perm, dtype=np.int64)
    lut = np.concatenate([perm, [-1]])           # index -1 maps to -1
    bin_states = [lut[np.asarray(b, dtype=np.int64)] for b in decoding.bin_states]
    seg = replace(decoding.segments, state=lut[np.asarray(decoding.segments.state)])
    old = np.asarray(decoding.transition_counts)
    new = np.zeros_like(old)
    new[np.ix_(perm, perm)] = old
    return bin_states, seg, new


def _count_windows(x, k):
    """Counts summed in windows of k bins: array (trials, windows, units), NaN padded."""
    nw = np.asarray(x.n_valid) // k
    w_max = int(nw.max()) if nw.size else 0
    out = np.full((x.n_trials, max(w_max, 0), x.n_units), np.nan)
    for i, c in enumerate(x.sequences()):
        m = int(nw[i])
        if m:
            out[i, :m] = c[: m * k].astype(float).reshape(m, k, -1).sum(axis=1)
    return out


def _fano_and_corr(x, groups, n_groups, k):
    w = _count_windows(x, k)
    n_units = x.n_units
    var_sum = np.zeros(n_units)
    mean_sum = np.zeros(n_units)
    for g in range(n_groups):
        sub = w[groups == g]                       # trials x windows x units
        if sub.shape[0] < 2 or sub.shape[1] == 0:
            continue
        n_ok = np.sum(np.isfinite(sub[:, :, 0]), axis=0)
        cells = n_ok >= 2
        if not cells.any():
            continue
        s = sub[:, cells]
        mean = np.nanmean(s, axis=0)
        var = np.nanvar(s, axis=0, ddof=1)
        var_sum += var.sum(axis=0)
        mean_sum += mean.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        fano = np.where(mean_sum > 0, var_sum / mean_sum, np.nan)
    flat = w.reshape(-1, n_units)
    flat = flat[np.isfinite(flat[:, 0])]
    iu = np.triu_indices(n_units, k=1)
    if flat.shape[0] < 2:
        return fano, np.full(iu[0].size, np.nan)
    sd = flat.std(axis=0)
    z = np.where(sd > 0, (flat - flat.mean(axis=0)) / np.where(sd > 0, sd, 1.0), 0.0)
    c = z.T @ z / flat.shape[0]
    c[sd == 0, :] = np.nan
    c[:, sd == 0] = np.nan
    return fano, c[iu]


def _cv(recording, x, unit_pos):
    """Per-unit ISI CV inside the analysis windows of ``x`` (or None)."""
    if recording is None:
        return None
    start = np.asarray(x.window_start, dtype=float)
    stop = start + np.asarray(x.n_valid) * x.bin_size
    order = np.argsort(start, kind="stable")
    w = np.column_stack([start[order], stop[order]])
    return np.array([isi_cv(recording.spike_times[j], windows=w) for j in unit_pos])


def _cond_part(x, bin_states, cond_specs, S):
    out = {}
    for label, levels in cond_specs:
        pos = {v: j for j, v in enumerate(levels)}
        tab = np.zeros((len(levels), S + 1))
        vals = [str(v) for v in np.asarray(x.labels.get(label, [None] * x.n_trials)).tolist()]
        for i, lab in enumerate(bin_states):
            j = pos.get(vals[i])
            if j is None:
                continue
            lab = np.asarray(lab, dtype=np.int64)
            tab[j, :S] += np.bincount(lab[lab >= 0], minlength=S)[:S]
            tab[j, S] += np.sum(lab < 0)
        out[label] = tab
    return out


def _summarise(x, decoding, *, S, perm, shared, cond_specs):
    if perm is None:
        bin_states, seg, trans = decoding.bin_states, decoding.segments, \
            decoding.transition_counts
    else:
        bin_states, seg, trans = _relabel(decoding, perm)
    tc, occ, sd, so, mdw, tr, rates = _state_part(x, bin_states, seg, trans, S)
    total = np.zeros(x.n_units)
    for c in x.sequences():
        total += c.sum(axis=0, dtype=np.float64)
    mean_rates = total / (x.total_bins * x.bin_size)
    fano, corr, cv = shared
    return _Summary(trial_counts=tc, n_bins=np.asarray(x.n_valid, dtype=float),
                    occupancy=occ, seg_dur=sd, seg_obs=so, mean_dwell=mdw, trans=tr,
                    state_rates=rates, mean_rates=mean_rates, fano=fano, corr=corr, cv=cv,
                    cond=_cond_part(x, bin_states, cond_specs, S))


# --------------------------------------------------------------------------- ensembles
class _Ensemble:
    """Stacked summaries of B surrogates, aggregated under integer weights."""

    def __init__(self, summaries):
        self.items = list(summaries)
        self.B = len(self.items)
        it = self.items
        self.occ = np.array([s.occupancy for s in it])
        self.mdw = np.array([s.mean_dwell for s in it])
        self.trans = np.array([s.trans for s in it])
        self.rates = np.array([s.state_rates for s in it])
        self.mrates = np.array([s.mean_rates for s in it])
        S = self.occ.shape[1]
        self.seg = [_PooledDurations([s.seg_dur[st] for s in it],
                                     [s.seg_obs[st] for s in it]) for st in range(S)]
        self.pooled = {}
        for key in ("fano", "corr", "cv"):
            vals = [getattr(s, key) for s in it]
            self.pooled[key] = None if any(v is None for v in vals) else _PooledValues(vals)
        self.cond = {k: np.array([s.cond[k] for s in it]) for k in it[0].cond}

    def aggregate(self, w):
        """The ensemble under weights w (B,) of non-negative integers."""
        w = np.asarray(w, dtype=float)
        agg = {}

        def wmean(a):
            ww = np.broadcast_to(w.reshape((-1,) + (1,) * (a.ndim - 1)), a.shape)
            ok = np.isfinite(a) & (ww > 0)
            num = np.sum(np.where(ok, a * ww, 0.0), axis=0)
            den = np.sum(np.where(ok, ww, 0.0), axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                return np.where(den > 0, num / den, np.nan)

        agg["occ"] = wmean(self.occ)
        agg["mdw"] = wmean(self.mdw)
        agg["rates"] = wmean(self.rates)
        agg["mrates"] = wmean(self.mrates)
        agg["trans"] = np.tensordot(w, self.trans, axes=1)
        agg["w"] = w.astype(np.int64)
        agg["seg"] = self.seg
        for key, val in self.pooled.items():
            agg[key] = val
        agg["cond"] = {k: np.tensordot(w, v, axes=1) for k, v in self.cond.items()}
        return agg

    def full(self):
        return self.aggregate(np.ones(self.B))

    def leave_out(self, b):
        w = np.ones(self.B)
        w[b] = 0
        return self.aggregate(w)


def _row_normalise(m):
    m = np.asarray(m, dtype=float)
    tot = m.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(tot > 0, m / np.where(tot > 0, tot, 1.0), np.nan)


def _r2(d, m):
    ok = np.isfinite(d) & np.isfinite(m)
    if ok.sum() < 2:
        return float("nan")
    d, m = d[ok], m[ok]
    ss = np.sum((d - d.mean()) ** 2)
    return float(1 - np.sum((d - m) ** 2) / ss) if ss > 0 else float("nan")


def centred_rate_r2(rates_data, rates_model) -> float:
    """R^2 of per-unit x per-state rates, both centred per unit (Amendment 5).

    Parameters
    ----------
    rates_data, rates_model : ndarray (S, N)
        Rates (Hz); NaN for states without bins. For each unit, the states finite in
        both are kept and each matrix's mean over them removed; units with fewer
        than two such states are left out.

    Returns
    -------
    float
        1 - sum (c_data - c_model)^2 / sum c_data^2 (NaN when undefined).
    """
    d = np.asarray(rates_data, dtype=float)
    m = np.asarray(rates_model, dtype=float)
    ok = np.isfinite(d) & np.isfinite(m)
    use = ok.sum(axis=0) >= 2
    if not use.any():
        return float("nan")
    d, m, ok = d[:, use], m[:, use], ok[:, use]
    n = ok.sum(axis=0)
    cd = np.where(ok, d - np.where(ok, d, 0).sum(axis=0) / n, 0.0)
    cm = np.where(ok, m - np.where(ok, m, 0).sum(axis=0) / n, 0.0)
    ss = np.sum(cd * cd)
    return float(1 - np.sum((cd - cm) ** 2) / ss) if ss > 0 else float("nan")


def _stat(name, t, agg):
    """Statistic ``name`` of the target summary t against the aggregate ensemble."""
    if name == "occupancy_tvd":
        return total_variation(t.occupancy, agg["occ"])
    if name == "dwell_logrank":
        tot, used = 0.0, 0
        for s, pool in enumerate(agg["seg"]):
            r = pool.logrank(agg["w"], t.seg_dur[s], t.seg_obs[s])
            if np.isfinite(r.statistic):
                tot += r.statistic
                used += 1
        return tot if used else float("nan")
    if name == "dwell_logratio":
        with np.errstate(invalid="ignore", divide="ignore"):
            lr = np.abs(np.log(t.mean_dwell / agg["mdw"]))
        lr = lr[np.isfinite(lr)]
        return float(lr.mean()) if lr.size else float("nan")
    if name == "transition_distance":
        pt, pa = _row_normalise(t.trans), _row_normalise(agg["trans"])
        w = t.trans.sum(axis=1)
        ok = (w > 0) & np.all(np.isfinite(pa), axis=1)
        if not ok.any():
            return float("nan")
        rows = 0.5 * np.sum(np.abs(pt[ok] - pa[ok]), axis=1)
        return float(np.sum(rows * w[ok]) / np.sum(w[ok]))
    if name == "rate_r2":
        return centred_rate_r2(t.state_rates, agg["rates"])
    if name == "mean_rate_r2":
        return _r2(t.mean_rates, agg["mrates"])
    if name in ("fano_ks", "isi_cv_ks", "correlation_ks"):
        key = {"fano_ks": "fano", "isi_cv_ks": "cv", "correlation_ks": "corr"}[name]
        a, b = getattr(t, key), agg[key]
        if a is None or b is None:
            return float("nan")
        return b.ks(agg["w"], a)
    if name.startswith("condition_tvd["):
        label = name[len("condition_tvd["):-1]
        ft, fa = _row_normalise(t.cond[label]), _row_normalise(agg["cond"][label])
        ok = np.all(np.isfinite(ft), axis=1) & np.all(np.isfinite(fa), axis=1)
        if not ok.any():
            return float("nan")
        return float(np.mean(0.5 * np.sum(np.abs(ft[ok] - fa[ok]), axis=1)))
    raise KeyError(name)


def _kind(name):
    return _SIMILARITY if name in ("rate_r2", "mean_rate_r2") else _DISTANCE


def _as_distance(name, value):
    return 1.0 - value if _kind(name) == _SIMILARITY else value


# --------------------------------------------------------------------------- results
@dataclass
class MetricResult:
    """One comparison statistic, judged against its reference distribution.

    Attributes
    ----------
    name : str
    kind : str
        ``"distance"`` (smaller is closer) or ``"similarity"`` (R^2: larger is closer).
    value : float
        Data against the ensemble of all B model surrogates.
    reference : ndarray (B,)
        The statistic with each surrogate in the data's place (leave one out).
    ref : float
        95th percentile of ``reference`` for a distance (``<name>_ref95``), 5th
        percentile for a similarity (``<name>_ref05``), as Monte Carlo critical values
        (:func:`reference_quantile`).
    ci : ndarray (2,)
        2.5 and 97.5 percentiles of the statistic over bootstrap resamples of the
        surrogates.
    p_value : float
        (1 + #{reference at least as far from the model as the data}) / (B + 1).
    consistent : bool or None
        Within the reference rule (None when undefined).
    text : str
        The judgement in plain words.
    """

    name: str
    kind: str
    value: float
    reference: np.ndarray
    ref: float
    ci: np.ndarray
    p_value: float
    consistent: bool | None
    text: str

    @property
    def ref_suffix(self) -> str:
        return "ref95" if self.kind == _DISTANCE else "ref05"


def reference_quantile(reference, *, upper: bool = True, level: float = 0.95) -> float:
    """The Monte Carlo critical value of a reference sample (the ``_ref95`` rule).

    For B exchangeable reference values, the k-th smallest with
    k = ceil(level (B + 1)) is exceeded by one more exchangeable value with probability
    at most 1 - level [2]_; with B = 20 that is the largest value, with B = 99 the
    95th smallest (a plain interpolated percentile of 20 values is exceeded about 10% of
    the time). ``upper=False`` gives the k-th largest (for similarities). With fewer
    than 1 / (1 - level) - 1 values k is clipped to B: the rule then only flags values
    beyond every reference value (a looser test; :func:`compare` warns).
    """
    r = np.sort(np.asarray(reference, dtype=float)[np.isfinite(reference)])
    if r.size == 0:
        return float("nan")
    k = min(int(math.ceil(level * (r.size + 1) - 1e-9)), r.size)
    return float(r[k - 1]) if upper else float(r[r.size - k])


def _judge(name, value, reference, boots):
    ref_ok = reference[np.isfinite(reference)]
    dist = _kind(name) == _DISTANCE
    ref = reference_quantile(ref_ok, upper=dist)
    b_ok = boots[np.isfinite(boots)]
    ci = np.quantile(b_ok, [0.025, 0.975]) if b_ok.size else np.full(2, np.nan)
    if np.isfinite(value) and ref_ok.size:
        tol = _TIE * max(1.0, abs(value))            # rounding of equal statistics
        worse = np.sum(ref_ok >= value - tol) if dist else np.sum(ref_ok <= value + tol)
        p = float((1 + worse) / (ref_ok.size + 1))
        consistent = bool(value <= ref + tol) if dist else bool(value >= ref - tol)
    else:
        p, consistent = float("nan"), None
    what = _words(name)
    if consistent is None:
        text = f"{what}: not defined for these data ({name} = {value:.3g})."
    else:
        rule = "<=" if dist else ">="
        pct = "95th" if dist else "5th"
        verdict = "consistent with the model" if consistent else \
            "NOT consistent with the model"
        text = (f"{what}: {name} = {value:.3g} {rule if consistent else 'vs'} {ref:.3g}, the "
                f"{pct} percentile between model surrogates of the data's size "
                f"(B = {ref_ok.size}); {verdict} (p = {p:.3g}).")
    if name == "isi_cv_ks":
        text += " " + _MULTI_UNIT_CAUTION
    return MetricResult(name=name, kind=_kind(name), value=float(value),
                        reference=np.asarray(reference, dtype=float), ref=ref,
                        ci=np.asarray(ci, dtype=float), p_value=p, consistent=consistent,
                        text=text)


@dataclass
class NullResult:
    """Is the network closer to the data than a null? (see the module notes)

    Attributes
    ----------
    name : str
    description : str
    n_surrogates : int
    scores : dict of str to dict
        Per statistic: ``d_model``, ``d_null`` (data to each ensemble), ``score``
        T(data), ``p_network_better``, ``p_null_better``, ``verdict``, ``text``.
    score : float
        Overall T(data) (sum of T / s over the statistics used).
    p_network_better, p_null_better : float
    verdict : str
        ``network_better``, ``null_better``, ``both_differ`` or ``indistinguishable``.
    used : list of str
        Statistics in the overall score.
    skipped : list of str
        Statistics the null keeps by construction (not compared).
    text : str
    occupancy : ndarray (S,)
        Mean occupancy of the null surrogates (data's state model), for figures.
    occupancy_ci : ndarray (S, 2)
        2.5 and 97.5 percentiles over single null surrogates.
    mean_dwell_s : ndarray (S,)
        Mean over null surrogates of the Kaplan-Meier mean dwell times.
    samples : dict of str to ndarray or None
        ``fano`` (C, N), ``isi_cv`` (C, N) or None, ``correlation`` (C, P).
    """

    name: str
    description: str
    n_surrogates: int
    scores: dict
    score: float
    p_network_better: float
    p_null_better: float
    verdict: str
    used: list
    skipped: list
    text: str
    occupancy: np.ndarray = None
    occupancy_ci: np.ndarray = None
    mean_dwell_s: np.ndarray = None
    samples: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"description": self.description, "n_surrogates": self.n_surrogates,
                "verdict": self.verdict, "score": self.score,
                "p_network_better": self.p_network_better,
                "p_null_better": self.p_null_better, "statistics": list(self.used),
                "not_compared": list(self.skipped),
                "occupancy": [float(v) for v in self.occupancy],
                "mean_dwell_s": [float(v) for v in self.mean_dwell_s],
                "text": self.text,
                "per_statistic": {k: dict(v) for k, v in self.scores.items()}}


def _null_verdict(p_net, p_null, alpha, n_null, n_model):
    if not (np.isfinite(p_net) and np.isfinite(p_null)):
        return "inconclusive"
    if 1.0 / (n_null + 1) > alpha or 1.0 / (n_model + 1) > alpha:
        return "inconclusive"
    if p_net <= alpha and p_null > alpha:
        return "network_better"
    if p_null <= alpha and p_net > alpha:
        return "null_better"
    if p_net <= alpha and p_null <= alpha:
        return "both_differ"
    return "indistinguishable"


def _null_text(what, null_words, verdict, p_net, p_null, n_null, n_model, alpha):
    ps = (f"p = {p_net:.3g} under the null, {p_null:.3g} under the network; "
          f"{n_null} null and {n_model} network surrogates")
    if verdict == "network_better":
        return f"The network reproduces {what} better than {null_words} ({ps})."
    if verdict == "null_better":
        return f"The {null_words} reproduce {what} better than the network ({ps})."
    if verdict == "both_differ":
        subject = ("The data, on " + what) if what.startswith("the combined") else \
            f"The data's {what}"
        return f"{subject}, differ from both the network and the {null_words} ({ps})." \
            if what.startswith("the combined") else \
            f"{subject} differ from both the network and the {null_words} ({ps})."
    if verdict == "inconclusive":
        need = int(math.ceil(1.0 / alpha - 1.0 - 1e-9))
        if not (np.isfinite(p_net) and np.isfinite(p_null)):
            return f"Network vs {null_words} on {what}: not defined for these data."
        return (f"Network vs {null_words} on {what}: inconclusive, too few surrogates for "
                f"p to reach alpha = {alpha:g} (at least {need} of each needed; {ps}).")
    return f"The data do not separate the network from the {null_words} on {what} ({ps})."


#: Statistics each known null keeps by construction: comparing on them says nothing
#: about the network, so they are left out of that null's comparison.
_STATE_STATS = ("occupancy_tvd", "dwell_logrank", "dwell_logratio", "transition_distance",
                "rate_r2", "condition_tvd[")
_PRESERVED = {
    "poisson": ("mean_rate_r2",),
    "shuffle": ("mean_rate_r2", "fano_ks", "isi_cv_ks"),
    "dither": _STATE_STATS + ("mean_rate_r2", "fano_ks", "correlation_ks"),
    "continuous": ("mean_rate_r2",),
}


def _preserved(null_name, stat_name) -> bool:
    keep = _PRESERVED.get(null_name, ())
    return any(stat_name == k or (k.endswith("[") and stat_name.startswith(k)) for k in keep)


@dataclass
class Comparison:
    """Model versus data: every number the report and figures need.

    Attributes
    ----------
    n_states, n_units, n_trials : int
        ``n_trials`` counts the compared (held-out) trials.
    n_surrogates : int
    held_out : bool
        True when ``trials`` named held-out trials; False when all trials were used
        (training trials included, which flatters the model).
    trials : ndarray of int
        Positions of the compared trials in the data.
    bin_size : float
    metrics : dict of str to MetricResult
        Decoded-state analysis (the data's state model applied to every dataset).
    refit_metrics : dict of str to MetricResult
        Refitted-state analysis (empty when ``refit`` was off).
    occupancy_data : ndarray (S,)
    occupancy_data_ci : ndarray (S, 2)
        Trial-bootstrap 95% interval of the data's occupancy.
    occupancy_model : ndarray (S,)
        Mean over surrogates.
    occupancy_model_ci : ndarray (S, 2)
        2.5 and 97.5 percentiles over single surrogates.
    occupancy_surrogates : ndarray (B, S)
    occupancy_refit_data, occupancy_refit_model : ndarray (S,) or None
    survival_data, survival_model : list of SurvivalCurve
        Kaplan-Meier dwell survival per state (model: pooled surrogate segments).
    censored_data, censored_model : list of ndarray
        Durations of censored segments per state (for the figure's ticks).
    mean_dwell_data, mean_dwell_model, dwell_ratio : ndarray (S,)
    dwell_logrank_chi2, dwell_logrank_p : ndarray (S,)
        Per-state log-rank test, data against pooled surrogate segments.
    transitions_data, transitions_model : ndarray (S, S)
        Row-normalised transition probabilities between consecutive assigned
        segments (model: pooled counts).
    state_rates_data, state_rates_model : ndarray (S, N) Hz
    mean_rates_data, mean_rates_model : ndarray (N,) Hz
    fano_data : ndarray (N,), fano_model : ndarray (B, N)
    isi_cv_data : ndarray (N,) or None, isi_cv_model : ndarray (B, N) or None
    correlation_data : ndarray (P,), correlation_model : ndarray (B, P)
    ks_p_values : dict of str to float
        scipy ``ks_2samp`` p-values of the data against the pooled surrogates.
    conditions : dict of str to dict
        Per label: ``levels``, ``fraction_data`` (L, S), ``fraction_model`` (L, S),
        ``unassigned_data``/``unassigned_model`` (L,), ``matching_state`` (L,): the
        cue-matching state of each level (the state model's ``label_to_state`` when it
        names one, else the level's most occupied state in the data),
        ``matching_data``/``matching_model`` (L,): fractions of all delay time (assigned
        or not) in it.
    nulls : dict of str to NullResult
    alpha : float
    unit_ids : list of str
    text : list of str
        Plain-words sentences, ending with the caution.
    multi_units : list of str
        Compared units that the recording's metadata marks as multi-units
        (:meth:`~attractorfit.recording.Recording.multi_units`), named in the ISI
        caution; empty when none is marked or nothing says.
    multi_unit_column : str or None
        The unit metadata column that told them apart (None: no such column).
    """

    n_states: int
    n_units: int
    n_trials: int
    n_surrogates: int
    held_out: bool
    trials: np.ndarray
    bin_size: float
    metrics: dict
    refit_metrics: dict
    occupancy_data: np.ndarray
    occupancy_data_ci: np.ndarray
    occupancy_model: np.ndarray
    occupancy_model_ci: np.ndarray
    occupancy_surrogates: np.ndarray
    occupancy_refit_data: np.ndarray | None
    occupancy_refit_model: np.ndarray | None
    survival_data: list
    survival_model: list
    censored_data: list
    censored_model: list
    mean_dwell_data: np.ndarray
    mean_dwell_model: np.ndarray
    dwell_ratio: np.ndarray
    dwell_logrank_chi2: np.ndarray
    dwell_logrank_p: np.ndarray
    transitions_data: np.ndarray
    transitions_model: np.ndarray
    state_rates_data: np.ndarray
    state_rates_model: np.ndarray
    mean_rates_data: np.ndarray
    mean_rates_model: np.ndarray
    fano_data: np.ndarray
    fano_model: np.ndarray
    isi_cv_data: np.ndarray | None
    isi_cv_model: np.ndarray | None
    correlation_data: np.ndarray
    correlation_model: np.ndarray
    ks_p_values: dict
    conditions: dict
    nulls: dict
    alpha: float
    unit_ids: list = field(default_factory=list)
    text: list = field(default_factory=list)
    multi_units: list = field(default_factory=list)
    multi_unit_column: str | None = None

    # ------------------------------------------------------------- figures
    def survival_for_plot(self) -> tuple:
        """``(data, model)`` dicts {state: (times, survival, censored_times)}."""
        def pack(curves, cens):
            return {s: (c.times, c.survival, cens[s]) for s, c in enumerate(curves)
                    if c.n > 0}
        return pack(self.survival_data, self.censored_data), \
            pack(self.survival_model, self.censored_model)

    def centred_rates(self) -> tuple:
        """Per-unit x per-state rates centred per unit: (data, model, state of each)."""
        d, m = self.state_rates_data, self.state_rates_model
        ok = np.isfinite(d) & np.isfinite(m)
        n = np.maximum(ok.sum(axis=0), 1)
        cd = d - np.where(ok, d, 0).sum(axis=0) / n
        cm = m - np.where(ok, m, 0).sum(axis=0) / n
        use = ok & (ok.sum(axis=0) >= 2)[None, :]
        states = np.broadcast_to(np.arange(d.shape[0])[:, None], d.shape)
        return cd[use], cm[use], states[use]

    # ------------------------------------------------------------- summary
    def summary_block(self) -> dict:
        """The ``comparison`` block of summary.json (non-finite numbers stay NaN).

        Keys: every statistic ``<name>`` with ``<name>_ref95`` (distances) or
        ``<name>_ref05`` (R^2, where the rule is value >= 5th percentile),
        ``<name>_ci``, ``<name>_p`` (Monte Carlo p against the reference) and
        ``<name>_consistent``; per state ``dwell_logrank_p_per_state`` (asymptotic
        log-rank p-values), ``dwell_logrank_chi2_per_state`` and ``dwell_ratio``;
        ``n_surrogates``, ``n_trials``, ``held_out``;
        ``refit`` (the same for refitted states); ``nulls`` (per null: verdict,
        p-values, text); ``text`` and ``caution``.
        """
        def block(metrics):
            out = {}
            for name, m in metrics.items():
                out[name] = m.value
                out[f"{name}_{m.ref_suffix}"] = m.ref
                out[f"{name}_ci"] = [float(v) for v in m.ci]
                out[f"{name}_p"] = m.p_value
                out[f"{name}_consistent"] = m.consistent
            return out

        out = block(self.metrics)
        out.update({
            "n_surrogates": self.n_surrogates, "n_trials": self.n_trials,
            "held_out": self.held_out, "n_states": self.n_states,
            "dwell_logrank_p_per_state": [float(v) for v in self.dwell_logrank_p],
            "dwell_logrank_chi2_per_state": [float(v) for v in self.dwell_logrank_chi2],
            "dwell_ratio": [float(v) for v in self.dwell_ratio],
            "mean_dwell_model_s": [float(v) for v in self.mean_dwell_model],
            "occupancy_model": [float(v) for v in self.occupancy_model],
            "ks_p_values": dict(self.ks_p_values),
            "consistent_all": all(m.consistent for m in self.metrics.values()
                                  if m.consistent is not None),
            "refit": block(self.refit_metrics),
            "conditions": {label: {"levels": list(t["levels"]),
                                   "matching_state": [int(v) for v in t["matching_state"]],
                                   "matching_data": [float(v) for v in t["matching_data"]],
                                   "matching_model": [float(v) for v in t["matching_model"]]}
                           for label, t in self.conditions.items()},
            "nulls": {k: v.to_dict() for k, v in self.nulls.items()},
            "text": " ".join(self.text), "caution": CAUTION,
            "isi_cv_multi_units": list(self.multi_units),
            "multi_unit_column": self.multi_unit_column,
            "reference_rule": ("distance consistent when <= 95th percentile (_ref95), R^2 "
                               "when >= 5th percentile (_ref05), of the statistic with "
                               "each model surrogate in the data's place (leave one out); "
                               "percentiles as Monte Carlo critical values, the "
                               "ceil(0.95 (B + 1))-th of B values"),
        })
        return out


# --------------------------------------------------------------------------- checks
def _check_like(x, data, name):
    if abs(x.bin_size - data.bin_size) > 1e-12 * max(1.0, data.bin_size):
        raise InputError(f"{name}: bin_size {x.bin_size:g} s differs from the data's "
                         f"{data.bin_size:g} s; bin surrogates exactly like the data")
    if list(x.unit_ids) != list(data.unit_ids):
        if x.n_units != data.n_units:
            raise InputError(f"{name}: has {x.n_units} units, the data {data.n_units}; "
                             "expected the data's unit ids")
        j = next(i for i, (a, b) in enumerate(zip(x.unit_ids, data.unit_ids)) if a != b)
        raise InputError(f"{name}: unit ids differ from the data's (column {j}: "
                         f"{x.unit_ids[j]!r} vs {data.unit_ids[j]!r})")
    if x.n_trials != data.n_trials:
        raise InputError(f"{name}: has {x.n_trials} trials, the data {data.n_trials}; "
                         "expected one surrogate trial per data trial")
    if not np.array_equal(np.asarray(x.n_valid), np.asarray(data.n_valid)):
        i = int(np.flatnonzero(np.asarray(x.n_valid) != np.asarray(data.n_valid))[0])
        raise InputError(f"{name}: trial {i} has {int(x.n_valid[i])} bins, the data "
                         f"{int(data.n_valid[i])}; expected the data's trial lengths")


def _prepare(items, data, name, min_n):
    """Surrogates as (BinnedCounts, Recording or None) pairs binned like the data."""
    if isinstance(items, (BinnedCounts, Recording)) or not hasattr(items, "__len__"):
        raise InputError(f"{name}: expected a list of surrogate recordings or counts, got "
                         f"{type(items).__name__}")
    items = list(items)
    if len(items) < min_n:
        raise InputError(f"{name}: expected at least {min_n} surrogates, got {len(items)}")
    out = []
    for i, s in enumerate(items):
        label = f"{name}[{i}]"
        if isinstance(s, Recording):
            try:
                b = bin_like(s, data)
            except InputError as exc:
                raise InputError(f"{label}: {exc}") from None
            out.append((b, s))
        elif isinstance(s, BinnedCounts):
            _check_like(s, data, label)
            out.append((s, None))
        else:
            raise InputError(f"{label}: expected a Recording or BinnedCounts, got "
                             f"{type(s).__name__}")
    return out


def _check_trials(trials, n):
    if trials is None:
        return np.arange(n), False
    t = np.asarray(trials)
    if t.dtype == bool:
        if t.shape != (n,):
            raise InputError(f"trials: a boolean mask needs {n} entries, got {t.size}")
        t = np.flatnonzero(t)
    else:
        try:
            t = np.asarray(trials, dtype=np.int64).ravel()
        except (TypeError, ValueError):
            raise InputError("trials: expected trial positions (whole numbers) or a "
                             "boolean mask") from None
        if not np.array_equal(t, np.asarray(trials).ravel()):
            raise InputError("trials: expected whole-number trial positions")
    if t.size and (t.min() < 0 or t.max() >= n):
        bad = int(t[(t < 0) | (t >= n)][0])
        raise InputError(f"trials: position {bad} is outside 0..{n - 1} (the data's trials)")
    if np.unique(t).size != t.size:
        raise InputError("trials: positions repeat; expected distinct held-out trials")
    if t.size < 2:
        raise InputError(f"trials: expected at least 2 held-out trials, got {t.size}")
    return np.sort(t), True


def _state_count(state_fit, n_units):
    if not callable(getattr(state_fit, "decode", None)):
        raise InputError(f"state_fit: expected a fitted state model with decode(binned), "
                         f"got {type(state_fit).__name__}")
    rates = getattr(state_fit, "rates_hz", None)
    if rates is None:
        raise InputError("state_fit: has no rates_hz (states x units); expected the "
                         "result of analyse_states")
    rates = np.asarray(rates, dtype=float)
    if rates.ndim != 2 or rates.shape[1] != n_units:
        raise InputError(f"state_fit: rates_hz has shape {rates.shape}; expected (states, "
                         f"{n_units}) for the data's {n_units} units")
    return rates.shape[0], rates


def _match_states(ref_rates, fit_rates):
    """perm[fit_state] = ref_state by Hungarian assignment on log-rate distances."""
    from scipy.optimize import linear_sum_assignment

    a = np.log(np.maximum(np.asarray(ref_rates, dtype=float), 1e-3))
    b = np.log(np.maximum(np.asarray(fit_rates, dtype=float), 1e-3))
    cost = np.sum((a[:, None, :] - b[None, :, :]) ** 2, axis=2)
    rows, cols = linear_sum_assignment(cost)
    perm = np.empty(b.shape[0], dtype=np.int64)
    perm[cols] = rows
    return perm


def _refit_options(state_fit) -> dict:
    """The data's state-analysis settings, reused when refitting surrogates."""
    opts = {}
    for key in ("posterior_threshold", "min_segment_s"):
        v = getattr(state_fit, key, None)
        if v is not None:
            opts[key] = v
    try:
        n_dims = int(state_fit.n_dims)
        if n_dims > 0:
            opts["latent_dims"] = n_dims
    except (AttributeError, TypeError, ValueError):
        pass
    model = getattr(state_fit, "model", None)
    for key in ("sticky", "n_restarts"):
        v = getattr(model, key, None)
        if v is not None:
            opts[key] = v
    return opts


class _DefaultRefit:
    """analyse_states with the data's state count and settings."""

    def __init__(self, options):
        self.options = options

    def __call__(self, binned, n_states, rng):
        from attractorfit.states import analyse_states

        return analyse_states(binned, n_states=n_states, rng=rng, **self.options)


# --------------------------------------------------------------------------- the work
def _analyse(x, rec, unit_pos, state_fit, refit, S, ref_rates, seed, opts):
    """Summaries (decoded, refitted or None) of one dataset."""
    groups, n_groups, k, cond_specs = opts
    g = _dataset_groups(x, groups)
    fano, corr = _fano_and_corr(x, g, n_groups, k)
    cv = _cv(rec, x, unit_pos)
    shared = (fano, corr, cv)
    dec = _summarise(x, state_fit.decode(x), S=S, perm=None, shared=shared,
                     cond_specs=cond_specs)
    ref = None
    if refit is not None:
        fit = refit(x, S, np.random.default_rng(seed))
        fr = np.asarray(getattr(fit, "rates_hz"), dtype=float)
        if fr.shape != (S, x.n_units):
            raise InputError(f"refit: returned rates_hz of shape {fr.shape}; expected "
                             f"({S}, {x.n_units})")
        perm = _match_states(ref_rates, fr)
        ref = _summarise(x, fit.decode(x), S=S, perm=perm, shared=shared, cond_specs=[])
    return dec, ref


def _dataset_groups(x, groups):
    """Condition group of every trial of dataset x from its own labels."""
    label, levels = groups
    if label is None:
        return np.zeros(x.n_trials, dtype=np.int64)
    pos = {v: j for j, v in enumerate(levels)}
    vals = [str(v) for v in np.asarray(x.labels[label]).tolist()] if label in x.labels \
        else [None] * x.n_trials
    return np.array([pos.get(v, -1) for v in vals], dtype=np.int64)


def _metric_names(cond_specs, has_cv):
    names = ["occupancy_tvd", "dwell_logrank", "dwell_logratio", "transition_distance",
             "rate_r2", "mean_rate_r2", "fano_ks", "correlation_ks"]
    if has_cv:
        names.append("isi_cv_ks")
    names += [f"condition_tvd[{label}]" for label, _ in cond_specs]
    return names


def _judge_all(names, target, ens, n_boot, rng):
    full = ens.full()
    loo = [ens.leave_out(b) for b in range(ens.B)]
    boots_w = [np.bincount(rng.integers(ens.B, size=ens.B), minlength=ens.B)
               for _ in range(n_boot)]
    boots = [ens.aggregate(w) for w in boots_w]
    out = {}
    for name in names:
        value = _stat(name, target, full)
        reference = np.array([_stat(name, ens.items[b], loo[b]) for b in range(ens.B)])
        bvals = np.array([_stat(name, target, a) for a in boots])
        out[name] = _judge(name, value, reference, bvals)
    return out, full, loo


def _compare_null(null_name, null_sums, data_sum, model_ens, model_loo, model_full,
                  metrics, names, alpha):
    ens = _Ensemble(null_sums)
    full = ens.full()
    null_loo = [ens.leave_out(c) for c in range(ens.B)]
    words = _NULL_WORDS.get(null_name, f"'{null_name}' surrogates")
    n_null, n_model = ens.B, model_ens.B
    scores = {}
    t_data, t_null, t_model, scales = {}, {}, {}, {}
    skipped = [n for n in names if _preserved(null_name, n)]
    for name in names:
        if name in skipped:
            continue

        def dist(t, agg, name=name):
            return _as_distance(name, _stat(name, t, agg))

        d_m = dist(data_sum, model_full)
        d_n = dist(data_sum, full)
        td = d_n - d_m
        if not np.isfinite(td):
            continue
        tn = np.array([dist(ens.items[c], null_loo[c]) - dist(ens.items[c], model_full)
                       for c in range(ens.B)])
        tm = np.array([dist(model_ens.items[b], full) - dist(model_ens.items[b],
                                                               model_loo[b])
                       for b in range(model_ens.B)])
        tn_ok, tm_ok = tn[np.isfinite(tn)], tm[np.isfinite(tm)]
        if tn_ok.size == 0 or tm_ok.size == 0:
            continue
        p_net = float((1 + np.sum(tn_ok >= td)) / (tn_ok.size + 1))
        p_null = float((1 + np.sum(tm_ok <= td)) / (tm_ok.size + 1))
        v = _null_verdict(p_net, p_null, alpha, tn_ok.size, tm_ok.size)
        scores[name] = {"d_model": float(d_m), "d_null": float(d_n), "score": float(td),
                        "p_network_better": p_net, "p_null_better": p_null, "verdict": v,
                        "text": _null_text(_words(name), words, v, p_net, p_null,
                                           tn_ok.size, tm_ok.size, alpha)}
        ref = _as_distance(name, metrics[name].reference)
        ref = ref[np.isfinite(ref)]
        scale = float(np.median(ref)) if ref.size else float("nan")
        if name not in _NOT_IN_NULL_SCORE and np.isfinite(scale) and scale > 0:
            t_data[name], t_null[name], t_model[name], scales[name] = td, tn, tm, scale
    used = sorted(t_data)
    if used:
        score = float(sum(t_data[n] / scales[n] for n in used))
        tn = np.sum([np.nan_to_num(t_null[n], nan=0.0) / scales[n] for n in used], axis=0)
        tm = np.sum([np.nan_to_num(t_model[n], nan=0.0) / scales[n] for n in used], axis=0)
        p_net = float((1 + np.sum(tn >= score)) / (tn.size + 1))
        p_null = float((1 + np.sum(tm <= score)) / (tm.size + 1))
    else:
        score, p_net, p_null = float("nan"), float("nan"), float("nan")
    verdict = _null_verdict(p_net, p_null, alpha, n_null, n_model)
    what = ("the combined statistics (" + ", ".join(_words(n) for n in used) + ")") \
        if used else "any statistic (none left to compare)"
    text = _null_text(what, words, verdict, p_net, p_null, n_null, n_model, alpha)
    if skipped:
        text += (" Not compared, because the null keeps them by construction: "
                 + ", ".join(_words(n) for n in skipped) + ".")
    text += " " + CAUTION
    cv = None if any(x.cv is None for x in ens.items) else \
        np.array([x.cv for x in ens.items])
    samples = {"fano": np.array([x.fano for x in ens.items]), "isi_cv": cv,
               "correlation": np.array([x.corr for x in ens.items])}
    return NullResult(name=null_name, description=words, n_surrogates=ens.B, scores=scores,
                      score=score, p_network_better=p_net, p_null_better=p_null,
                      verdict=verdict, used=used, skipped=skipped, text=text,
                      occupancy=full["occ"],
                      occupancy_ci=np.nanquantile(ens.occ, [0.025, 0.975], axis=0).T,
                      mean_dwell_s=full["mdw"], samples=samples)


def compare(data, surrogates, state_fit, *, recording=None, nulls=None, trials=None,
            refit=True, condition=None, count_window_s: float = 0.1, n_boot: int = 500,
            alpha: float = 0.05, rng=None, n_jobs: int = 1,
            multi_unit_column: str = "auto") -> Comparison:
    """Run the same analysis on the data and on each surrogate; judge every statistic.

    Parameters
    ----------
    data : BinnedCounts
        The data's counts (all trials).
    surrogates : list of Recording or BinnedCounts
        At least 2 (20 or more for trustworthy percentiles; a warning below 20)
        independent surrogate recordings of the fitted network, one trial per data
        trial. Recordings are binned like the data (:func:`~attractorfit.surrogates.
        bin_like`) and give ISI statistics; BinnedCounts must be binned exactly alike.
    state_fit : StateFit
        The data's fitted state model: ``decode(binned) -> StateDecoding`` and
        ``rates_hz`` (states x units).
    recording : Recording, optional
        The data's spike times, for the ISI CV comparison (kept units matched by id).
    nulls : dict of str to list, optional
        Null surrogates per name (``"poisson"``, ``"dither"``, ``"shuffle"``,
        ``"continuous"`` or any name), each a list of at least 2 Recordings or
        BinnedCounts, e.g. from :func:`~attractorfit.surrogates.null_surrogates`.
    trials : array of int or bool mask, optional
        Held-out trials (positions in ``data``; the network was fitted on the others).
        Default: all trials (then ``held_out`` is False and the report must say so).
    refit : bool or callable
        Also refit the state model on every dataset (data and surrogates) with the
        data's state count and report the same state statistics. True uses
        :func:`attractorfit.states.analyse_states` with the data's posterior threshold,
        minimum segment, latent dimension, sticky prior and restarts; a callable
        ``refit(binned, n_states, rng)`` returning an object with ``rates_hz`` and
        ``decode`` may replace it; False skips it.
    condition : str, optional
        Label column grouping trials for the Fano factor and naming the condition
        table. None: Fano across all trials, and condition tables for every label
        column with 2 to 20 levels.
    count_window_s : float
        Window (whole bins, at least one) of the counts for Fano factors and
        correlations (default 100 ms).
    n_boot : int
        Bootstrap resamples of the surrogates for the confidence intervals.
    alpha : float
        Level of the null verdicts.
    rng : int or Generator, optional
    n_jobs : int
        Parallel workers for the per-dataset analysis (joblib); the result does not
        depend on it.
    multi_unit_column : str
        Unit metadata column of ``recording`` that marks multi-units (see
        :meth:`~attractorfit.recording.Recording.multi_units`; ``"auto"`` finds one,
        ``""`` none). The ISI statistic's text names the compared multi-units.

    Returns
    -------
    Comparison

    Raises
    ------
    InputError
        Not BinnedCounts, fewer than 2 surrogates (or null surrogates), surrogates
        with other units, bin sizes or trial lengths, bad ``trials``, a state model
        without ``decode``/``rates_hz``, unknown condition column.
    """
    if not isinstance(data, BinnedCounts):
        raise InputError(f"data: expected the data's BinnedCounts, got "
                         f"{type(data).__name__}")
    rng = check_rng(rng)
    n_boot = check_int("n_boot", n_boot, low=1)
    n_jobs = check_int("n_jobs", n_jobs, low=1)
    alpha = check_fraction("alpha", alpha)
    if not 0 < alpha < 1:
        raise InputError(f"alpha: expected a number strictly between 0 and 1, got {alpha!r}")
    count_window_s = check_positive("count_window_s", count_window_s)
    S, ref_rates = _state_count(state_fit, data.n_units)
    model = _prepare(surrogates, data, "surrogates", 2)
    if nulls is not None and not isinstance(nulls, dict):
        raise InputError(f"nulls: expected a dict {{name: list of surrogates}}, got "
                         f"{type(nulls).__name__}")
    null_sets = {str(k): _prepare(v, data, f"nulls[{k!r}]", 2)
                 for k, v in (nulls or {}).items()}
    if recording is not None and not isinstance(recording, Recording):
        raise InputError(f"recording: expected the data's Recording, got "
                         f"{type(recording).__name__}")
    pos, held_out = _check_trials(trials, data.n_trials)
    if refit is True:
        refit_fn = _DefaultRefit(_refit_options(state_fit))
    elif refit is False or refit is None:
        refit_fn = None
    elif callable(refit):
        refit_fn = refit
    else:
        raise InputError(f"refit: expected True, False or a callable, got {refit!r}")

    # trial groups and condition tables, defined on the data
    group_spec = (condition, trial_groups(data, condition)[1])
    if condition is not None:
        cond_specs = [(condition, group_spec[1])]
    else:
        cond_specs = []
        for label, vals in data.labels.items():
            levels = sorted({str(v) for v in np.asarray(vals).tolist()})
            if 2 <= len(levels) <= 20:
                cond_specs.append((label, levels))
    k = max(1, int(round(count_window_s / data.bin_size)))
    opts = (group_spec, len(group_spec[1]), k, cond_specs)

    # unit positions in every recording, by id
    unit_pos = {}

    def positions(rec, name):
        if rec is None:
            return
        idx = {u: i for i, u in enumerate(rec.unit_ids)}
        miss = [u for u in data.unit_ids if u not in idx]
        if miss:
            raise InputError(f"{name}: unit {miss[0]!r} of the data's counts is missing")
        unit_pos[id(rec)] = [idx[u] for u in data.unit_ids]

    positions(recording, "recording")
    for i, (_, rec) in enumerate(model):
        positions(rec, f"surrogates[{i}]")
    for nm, items in null_sets.items():
        for i, (_, rec) in enumerate(items):
            positions(rec, f"nulls[{nm!r}][{i}]")
    has_cv = recording is not None and all(rec is not None for _, rec in model)
    if len(model) < MIN_SURROGATES:
        warn_input(f"surrogates: {len(model)} surrogates; the reference percentiles need "
                   f"at least {MIN_SURROGATES} to be trusted")

    jobs = [(data, recording if has_cv else None, True)]
    jobs += [(b, rec if has_cv else None, True) for b, rec in model]
    for items in null_sets.values():
        jobs += [(b, rec if has_cv else None, False) for b, rec in items]
    seeds = spawn_streams(rng, len(jobs) + 1)
    boot_rng = np.random.default_rng(seeds[-1])

    def task(j):
        x, rec, do_refit = jobs[j]
        up = unit_pos.get(id(rec)) if rec is not None else None
        return _analyse(x.subset_trials(pos), rec, up, state_fit,
                        refit_fn if do_refit else None, S, ref_rates, seeds[j], opts)

    if n_jobs == 1:
        results = [task(j) for j in range(len(jobs))]
    else:
        from joblib import Parallel, delayed

        results = Parallel(n_jobs=n_jobs, backend="threading")(
            delayed(task)(j) for j in range(len(jobs)))
    data_sum, data_refit = results[0]
    B = len(model)
    model_sums = [r[0] for r in results[1:1 + B]]
    model_refit = [r[1] for r in results[1:1 + B]]
    null_sums, at = {}, 1 + B
    for nm, items in null_sets.items():
        null_sums[nm] = [r[0] for r in results[at:at + len(items)]]
        at += len(items)

    names = _metric_names(cond_specs, has_cv)
    ens = _Ensemble(model_sums)
    metrics, full, loo = _judge_all(names, data_sum, ens, n_boot, boot_rng)
    multi = _note_multi_units(metrics, recording, data.unit_ids, multi_unit_column)
    refit_metrics = {}
    if refit_fn is not None:
        r_names = ["occupancy_tvd", "dwell_logrank", "dwell_logratio", "transition_distance",
                   "rate_r2"]
        refit_metrics, _, _ = _judge_all(r_names, data_refit, _Ensemble(model_refit),
                                         n_boot, boot_rng)
    nres = {nm: _compare_null(nm, sums, data_sum, ens, loo, full, metrics, names, alpha)
            for nm, sums in null_sums.items()}
    out = _assemble(data, pos, held_out, S, data_sum, ens, full, metrics, refit_metrics,
                    data_refit, model_refit, nres, cond_specs, alpha, n_boot, boot_rng,
                    getattr(state_fit, "label_to_state", None))
    out.multi_unit_column, out.multi_units = multi
    return out


def _note_multi_units(metrics, recording, unit_ids, column) -> tuple:
    """Which compared units are multi-units; said in the ISI statistic's text.

    Returns ``(column or None, ids)``. The generic caution stays when the metadata
    does not say; with a marking column the text names the multi-units (or says
    that none of the compared units is one).
    """
    if recording is None:
        return None, []
    column, ids = recording.multi_units(column)
    ids = [u for u in unit_ids if u in set(ids)]
    m = metrics.get("isi_cv_ks")
    if m is not None and column is not None:
        if ids:
            shown = ", ".join(repr(u) for u in ids[:12]) + (", ..." if len(ids) > 12 else "")
            note = (f"A multi-unit is not a single cell: {len(ids)} of the {len(unit_ids)} "
                    f"units compared are multi-units by their {column} ({shown}); their "
                    "ISI statistics are compared with caution.")
        else:
            note = (f"None of the {len(unit_ids)} units compared is a multi-unit by its "
                    f"{column}.")
        m.text = m.text.replace(_MULTI_UNIT_CAUTION, note)
    return column, ids


def _assemble(data, pos, held_out, S, ds, ens, full, metrics, refit_metrics, data_refit,
              model_refit, nres, cond_specs, alpha, n_boot, rng, label_to_state):
    from attractorfit.states._segments import kaplan_meier

    # data occupancy: trial bootstrap
    tc = ds.trial_counts
    boots = []
    for _ in range(n_boot):
        c = tc[rng.integers(tc.shape[0], size=tc.shape[0])].sum(axis=0)
        boots.append(c / c.sum() if c.sum() > 0 else np.full(S, np.nan))
    boots = np.array(boots)
    occ_ci = np.nanquantile(boots, [0.025, 0.975], axis=0).T if np.isfinite(boots).any() \
        else np.full((S, 2), np.nan)
    occ_ci = np.asarray(occ_ci)
    occ_model_ci = np.nanquantile(ens.occ, [0.025, 0.975], axis=0).T
    surv_d = [kaplan_meier(ds.seg_dur[s], ds.seg_obs[s]) for s in range(S)]
    pooled = [full["seg"][s].arrays(full["w"]) for s in range(S)]
    surv_m = [kaplan_meier(*pooled[s]) for s in range(S)]
    cens_d = [ds.seg_dur[s][~ds.seg_obs[s]] for s in range(S)]
    cens_m = [pooled[s][0][~pooled[s][1]] for s in range(S)]
    lr = [logrank_test(ds.seg_dur[s], ds.seg_obs[s], *pooled[s]) for s in range(S)]
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = ds.mean_dwell / full["mdw"]
    ks_p = {}
    for name, key in (("fano_ks", "fano"), ("correlation_ks", "corr"), ("isi_cv_ks", "cv")):
        a, b = getattr(ds, key), full.get(key)
        if a is None or b is None:
            continue
        b = b.arrays(full["w"])
        a, b = a[np.isfinite(a)], b[np.isfinite(b)]
        ks_p[name] = float(sps.ks_2samp(a, b).pvalue) if a.size and b.size else float("nan")
    conditions = {}
    for label, levels in cond_specs:
        td, tm = ds.cond[label], full["cond"][label]
        fd, fm = _row_normalise(td), _row_normalise(tm)
        assigned = td[:, :S].sum(axis=1)
        match = np.where(assigned > 0, np.argmax(td[:, :S], axis=1), -1)
        given = {str(k): v for k, v in (label_to_state or {}).get(label, {}).items()}
        for j, lev in enumerate(levels):
            if lev in given and -1 <= int(given[lev]) < S:
                match[j] = int(given[lev])
        idx = np.arange(len(levels))
        pick = np.clip(match, 0, None)
        conditions[label] = {
            "levels": list(levels), "fraction_data": fd[:, :S], "fraction_model": fm[:, :S],
            "unassigned_data": fd[:, S], "unassigned_model": fm[:, S],
            "matching_state": match,
            "matching_data": np.where(match >= 0, fd[idx, pick], np.nan),
            "matching_model": np.where(match >= 0, fm[idx, pick], np.nan)}
    stack = lambda key: None if ens.items[0].cv is None and key == "cv" else \
        np.array([getattr(s, key) for s in ens.items])   # noqa: E731
    text = [m.text for m in metrics.values()]
    if not held_out:
        text.append("All trials were compared, including those used to fit the network; "
                    "held-out trials give a fairer test.")
    text += [v.text for v in nres.values()]
    text.append(CAUTION)
    refit_occ_m = None
    if model_refit and model_refit[0] is not None:
        refit_occ_m = np.nanmean(np.array([s.occupancy for s in model_refit]), axis=0)
    return Comparison(
        n_states=S, n_units=data.n_units, n_trials=int(pos.size), n_surrogates=ens.B,
        held_out=held_out, trials=pos, bin_size=data.bin_size, metrics=metrics,
        refit_metrics=refit_metrics, occupancy_data=ds.occupancy, occupancy_data_ci=occ_ci,
        occupancy_model=full["occ"], occupancy_model_ci=np.asarray(occ_model_ci),
        occupancy_surrogates=ens.occ,
        occupancy_refit_data=None if data_refit is None else data_refit.occupancy,
        occupancy_refit_model=refit_occ_m, survival_data=surv_d, survival_model=surv_m,
        censored_data=cens_d, censored_model=cens_m, mean_dwell_data=ds.mean_dwell,
        mean_dwell_model=full["mdw"], dwell_ratio=ratio,
        dwell_logrank_chi2=np.array([r.statistic for r in lr]),
        dwell_logrank_p=np.array([r.p_value for r in lr]),
        transitions_data=_row_normalise(ds.trans), transitions_model=_row_normalise(
            full["trans"]),
        state_rates_data=ds.state_rates, state_rates_model=full["rates"],
        mean_rates_data=ds.mean_rates, mean_rates_model=full["mrates"],
        fano_data=ds.fano, fano_model=stack("fano"), isi_cv_data=ds.cv,
        isi_cv_model=stack("cv"), correlation_data=ds.corr, correlation_model=stack("corr"),
        ks_p_values=ks_p, conditions=conditions, nulls=nres, alpha=alpha,
        unit_ids=list(data.unit_ids), text=text)
