"""From state posteriors to segments, occupancy, dwell times, transitions and
per-condition tables.

A bin is *assigned* to a state when that state's posterior exceeds a threshold
(default 0.8, a common choice in the metastable-state literature, from memory: [1]_);
runs of one assigned state shorter than a minimum duration are unassigned (state -1).
Every trial is tiled by segments: maximal runs of one state (or of unassigned bins).

Dwell times: a segment that touches either edge of its trial's analysis window is
*censored* (the state may have begun before, or lasted after, what was observed);
the dwell-time survival function of each state is the Kaplan-Meier estimate [2]_
with censored segments as right-censored observations, and the mean dwell time is
the Kaplan-Meier restricted mean up to the longest observed segment of that state
[3]_. Segments bordered by unassigned bins count as complete (the evidence for the
state fell below the threshold there).

References
----------
.. [1] Mazzucato, L., Fontanini, A. & La Camera, G. (2015). Dynamics of multistable
   states during ongoing and evoked cortical activity. Journal of Neuroscience
   35:8214-8231.
.. [2] Kaplan, E. L. & Meier, P. (1958). Nonparametric estimation from incomplete
   observations. Journal of the American Statistical Association 53:457-481.
.. [3] Klein, J. P. & Moeschberger, M. L. (2003). Survival Analysis: Techniques for
   Censored and Truncated Data, 2nd ed. Springer (section 4.5, restricted mean).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from attractorfit._validation import check_fraction, check_int, check_nonnegative, check_positive
from attractorfit.errors import InputError

__all__ = ["Segments", "SurvivalCurve", "ConditionTable", "StateDecoding", "assign_bins",
           "find_segments", "kaplan_meier", "decode_posteriors"]


# --------------------------------------------------------------------------- survival
@dataclass
class SurvivalCurve:
    """Kaplan-Meier estimate of a dwell-time survival function.

    Attributes
    ----------
    times : ndarray
        Distinct durations at which at least one segment ended (complete segments).
    survival : ndarray
        S(t) just after each of ``times`` (right-continuous step function; S = 1
        before the first time).
    at_risk : ndarray of int
        Segments still running just before each time (censored at t count as at risk).
    events : ndarray of int
        Complete segments ending at each time.
    n : int
        Number of segments (complete and censored).
    n_censored : int
    max_time : float
        Longest observed duration (complete or censored): the restriction time of
        :attr:`restricted_mean`.
    restricted_mean : float
        Integral of S(t) from 0 to ``max_time`` (NaN without segments).
    """

    times: np.ndarray
    survival: np.ndarray
    at_risk: np.ndarray
    events: np.ndarray
    n: int
    n_censored: int
    max_time: float
    restricted_mean: float

    def __call__(self, t) -> np.ndarray:
        """S(t) at the given durations."""
        t = np.asarray(t, dtype=float)
        k = np.searchsorted(self.times, t, side="right")
        s = np.concatenate([[1.0], self.survival])
        return s[k]


def kaplan_meier(durations, observed) -> SurvivalCurve:
    """Kaplan-Meier survival estimate with right censoring [2]_.

    S(t) = prod over event times t_j <= t of (1 - d_j / n_j), with d_j complete
    durations equal to t_j and n_j durations (complete or censored) >= t_j.
    The restricted mean is the area under S from 0 to the longest observed duration
    (complete or censored) [3]_.

    Parameters
    ----------
    durations : array_like of float (>= 0)
    observed : array_like of bool
        True for a complete duration, False for a censored one.

    Returns
    -------
    SurvivalCurve

    Examples
    --------
    >>> from attractorfit.states import kaplan_meier
    >>> km = kaplan_meier([0.1, 0.2, 0.2, 0.3], [True, True, False, True])
    >>> km.survival.round(3).tolist()
    [0.75, 0.5, 0.0]
    >>> round(km.restricted_mean, 3)
    0.225
    """
    d = np.asarray(durations, dtype=float).ravel()
    o = np.asarray(observed, dtype=bool).ravel()
    if d.shape != o.shape:
        raise InputError(f"observed: expected one flag per duration ({d.size}), got {o.size}")
    if d.size and (not np.all(np.isfinite(d)) or d.min() < 0):
        raise InputError("durations: expected finite numbers >= 0")
    if d.size == 0:
        return SurvivalCurve(np.zeros(0), np.zeros(0), np.zeros(0, int), np.zeros(0, int),
                             0, 0, float("nan"), float("nan"))
    times = np.unique(d[o])
    at_risk = np.array([int(np.sum(d >= t)) for t in times], dtype=np.int64)
    events = np.array([int(np.sum(o & (d == t))) for t in times], dtype=np.int64)
    surv = np.cumprod(1.0 - events / at_risk)
    tmax = float(d.max())
    # area under the step function: 1 on [0, t_1), surv[j] on [t_j, t_{j+1}), up to tmax
    knots = np.concatenate([[0.0], times[times < tmax], [tmax]])
    levels = np.concatenate([[1.0], surv[times < tmax]])
    rmean = float(np.sum(levels * np.diff(knots)))
    return SurvivalCurve(times=times, survival=surv, at_risk=at_risk, events=events,
                         n=int(d.size), n_censored=int((~o).sum()), max_time=tmax,
                         restricted_mean=rmean)


# --------------------------------------------------------------------------- segments
@dataclass
class Segments:
    """Decoded segments, one entry per segment (arrays of equal length).

    Attributes
    ----------
    trial : ndarray of int
        Row of the trials table (sorted by start) the segment belongs to.
    trial_pos : ndarray of int
        Position of the trial in the analysed data (0 .. n_trials - 1).
    start, stop : ndarray of float
        Half-open interval in seconds from the start of the trial's analysis window.
    start_bin, stop_bin : ndarray of int
        The same in bins.
    state : ndarray of int
        0-based state id, -1 for unassigned.
    censored : ndarray of bool
        True when the segment touches the first or last bin of its trial.
    """

    trial: np.ndarray
    trial_pos: np.ndarray
    start: np.ndarray
    stop: np.ndarray
    start_bin: np.ndarray
    stop_bin: np.ndarray
    state: np.ndarray
    censored: np.ndarray

    def __len__(self) -> int:
        return int(self.state.size)

    @property
    def duration(self) -> np.ndarray:
        return self.stop - self.start

    def rows(self, vertex_text=None) -> list:
        """Rows ``(trial, start, stop, state, vertex)`` for ``states.csv``.

        ``vertex_text`` is a list with one code text per state (e.g. ``"HLH"``);
        unassigned rows get ``""``.
        """
        out = []
        for t, a, b, s in zip(self.trial, self.start, self.stop, self.state):
            v = "" if (s < 0 or vertex_text is None) else vertex_text[int(s)]
            out.append((int(t), float(a), float(b), int(s), v))
        return out


def _check_posteriors(posteriors, n_states=None) -> list:
    if isinstance(posteriors, np.ndarray) and posteriors.ndim == 2:
        posteriors = [posteriors]
    if not isinstance(posteriors, (list, tuple)) or len(posteriors) == 0:
        raise InputError("posteriors: expected a non-empty list of (bins x states) arrays")
    out = []
    for i, p in enumerate(posteriors):
        p = np.asarray(p, dtype=float)
        if p.ndim != 2:
            raise InputError(f"posteriors: trial {i} has shape {p.shape}; expected "
                             "(bins x states)")
        if n_states is None:
            n_states = p.shape[1]
        if p.shape[1] != n_states:
            raise InputError(f"posteriors: trial {i} has {p.shape[1]} states, expected "
                             f"{n_states}")
        if p.size and (not np.all(np.isfinite(p)) or p.min() < -1e-9
                       or np.max(np.abs(p.sum(axis=1) - 1)) > 1e-6):
            raise InputError(f"posteriors: trial {i} is not a probability table (finite, "
                             ">= 0, rows summing to 1)")
        out.append(p)
    return out


def assign_bins(posteriors, *, threshold: float = 0.8, min_bins: int = 1) -> list:
    """State of each bin: the state whose posterior exceeds ``threshold``, else -1.

    Runs of one state shorter than ``min_bins`` bins become -1.

    Parameters
    ----------
    posteriors : list of ndarray (T_i x S)
    threshold : float
        In [0.5, 1): above 0.5 at most one state can pass.
    min_bins : int

    Returns
    -------
    list of ndarray of int (T_i,)
    """
    threshold = check_fraction("posterior_threshold", threshold, low=0.5, high=1.0)
    if threshold >= 1.0:
        raise InputError("posterior_threshold: expected a number in [0.5, 1), got 1.0")
    min_bins = check_int("min_bins", min_bins, low=1)
    out = []
    for p in _check_posteriors(posteriors):
        if p.shape[0] == 0:
            out.append(np.zeros(0, dtype=np.int64))
            continue
        best = np.argmax(p, axis=1)
        lab = np.where(p[np.arange(len(p)), best] > threshold, best, -1).astype(np.int64)
        if min_bins > 1:
            starts, stops = _runs(lab)
            for a, b in zip(starts, stops):
                if lab[a] >= 0 and b - a < min_bins:
                    lab[a:b] = -1
        out.append(lab)
    return out


def _runs(lab):
    """Start and stop (exclusive) indices of the maximal constant runs of ``lab``."""
    if lab.size == 0:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    change = np.flatnonzero(np.diff(lab)) + 1
    starts = np.concatenate([[0], change])
    stops = np.concatenate([change, [lab.size]])
    return starts, stops


def find_segments(bin_states, *, bin_size: float, trial_index=None) -> Segments:
    """Tile each trial by maximal runs of one state (or of unassigned bins).

    Parameters
    ----------
    bin_states : list of ndarray of int
        Per trial, state of each bin (-1 unassigned), e.g. from :func:`assign_bins`.
    bin_size : float
        Seconds per bin.
    trial_index : array of int, optional
        Trials-table row of each trial (default 0, 1, 2, ...).

    Returns
    -------
    Segments
    """
    bin_size = check_positive("bin_size", bin_size)
    n = len(bin_states)
    tidx = np.arange(n) if trial_index is None else np.asarray(trial_index, dtype=np.int64)
    if tidx.shape != (n,):
        raise InputError(f"trial_index: expected {n} entries (one per trial), got "
                         f"{tidx.size}")
    cols = {k: [] for k in ("trial", "pos", "a", "b", "s", "c")}
    for i, lab in enumerate(bin_states):
        lab = np.asarray(lab, dtype=np.int64)
        starts, stops = _runs(lab)
        cols["trial"].append(np.full(starts.size, tidx[i]))
        cols["pos"].append(np.full(starts.size, i))
        cols["a"].append(starts)
        cols["b"].append(stops)
        cols["s"].append(lab[starts])
        cols["c"].append((starts == 0) | (stops == lab.size))
    cat = {k: (np.concatenate(v) if v else np.zeros(0)) for k, v in cols.items()}
    a = cat["a"].astype(np.int64)
    b = cat["b"].astype(np.int64)
    return Segments(trial=cat["trial"].astype(np.int64), trial_pos=cat["pos"].astype(np.int64),
                    start=np.round(a * bin_size, 12), stop=np.round(b * bin_size, 12),
                    start_bin=a, stop_bin=b,
                    state=cat["s"].astype(np.int64), censored=cat["c"].astype(bool))


# --------------------------------------------------------------------------- conditions
@dataclass
class ConditionTable:
    """State use by the levels of one trial label (e.g. the remembered item).

    Attributes
    ----------
    label : str
        Label column.
    levels : list
        Distinct label values (trials with a missing value are left out).
    n_trials : ndarray of int (L,)
    state_fraction : ndarray (L, S)
        Fraction of the assigned time of the level's trials spent in each state.
    unassigned_fraction : ndarray (L,)
    mapping : ndarray of int (L,)
        State matched to each level: given, or inferred as the level's most
        occupied state (two levels may then share a state).
    mapping_inferred : bool
    matching_fraction : ndarray (L,)
        Fraction of assigned time in the matched state, per level.
    matching_fraction_overall : float
        The same over all trials with a level (time-weighted).
    switches_per_trial : ndarray (L,)
        Mean number of transitions per trial, per level.
    end_state_accuracy : float
        Leave-one-trial-out accuracy of predicting the level from the last assigned
        state of the trial (the most common level among the other trials ending in
        the same state; the overall most common level when none or unassigned).
    chance : float
        Proportion of the most common level (accuracy of always guessing it).
    """

    label: str
    levels: list
    n_trials: np.ndarray
    state_fraction: np.ndarray
    unassigned_fraction: np.ndarray
    mapping: np.ndarray
    mapping_inferred: bool
    matching_fraction: np.ndarray
    matching_fraction_overall: float
    switches_per_trial: np.ndarray
    end_state_accuracy: float
    chance: float

    def to_dict(self) -> dict:
        """Plain lists and numbers (for JSON)."""
        return {"label": self.label, "levels": [_plain(v) for v in self.levels],
                "n_trials": self.n_trials.tolist(),
                "state_fraction": self.state_fraction.tolist(),
                "unassigned_fraction": self.unassigned_fraction.tolist(),
                "mapping": self.mapping.tolist(), "mapping_inferred": self.mapping_inferred,
                "matching_fraction": self.matching_fraction.tolist(),
                "matching_fraction_overall": self.matching_fraction_overall,
                "switches_per_trial": self.switches_per_trial.tolist(),
                "end_state_accuracy": self.end_state_accuracy, "chance": self.chance}


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


def _is_missing(v) -> bool:
    if v is None:
        return True
    try:
        return isinstance(v, (float, np.floating)) and math.isnan(v)
    except TypeError:
        return False


def _condition_table(name, values, bin_states, switches, end_state, n_states, mapping):
    vals = list(values)
    ok = [i for i, v in enumerate(vals) if not _is_missing(v)]
    levels = sorted({_plain(vals[i]) for i in ok}, key=lambda v: (str(type(v)), v))
    L = len(levels)
    pos = {v: j for j, v in enumerate(levels)}
    lev = np.full(len(vals), -1, dtype=np.int64)
    for i in ok:
        lev[i] = pos[_plain(vals[i])]
    occ = np.zeros((L, n_states))
    unassigned = np.zeros(L)
    total = np.zeros(L)
    n_tr = np.zeros(L, dtype=np.int64)
    sw = np.zeros(L)
    for i, lab in enumerate(bin_states):
        j = lev[i]
        if j < 0:
            continue
        n_tr[j] += 1
        sw[j] += switches[i]
        a = lab[lab >= 0]
        occ[j] += np.bincount(a, minlength=n_states)[:n_states]
        unassigned[j] += np.sum(lab < 0)
        total[j] += lab.size
    assigned = occ.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = occ / assigned[:, None]
        unf = unassigned / total
        swm = sw / n_tr
    inferred = mapping is None
    if inferred:
        mp = np.where(assigned > 0, np.argmax(occ, axis=1), -1)
    else:
        mp = np.array([int(mapping.get(v, -1)) for v in levels], dtype=np.int64)
        bad = [v for v, s in zip(levels, mp) if not -1 <= s < n_states]
        if bad:
            raise InputError(f"label_to_state: label {name!r} level {bad[0]!r} maps to a "
                             f"state outside 0..{n_states - 1}")
    match = np.array([occ[j, mp[j]] if mp[j] >= 0 else 0.0 for j in range(L)])
    with np.errstate(invalid="ignore", divide="ignore"):
        match_frac = match / assigned
    overall = float(match.sum() / assigned.sum()) if assigned.sum() > 0 else float("nan")
    # leave-one-trial-out decoding of the level from the end state
    idx = np.flatnonzero(lev >= 0)
    correct = 0
    for i in idx:
        others = idx[idx != i]
        if others.size == 0:
            continue
        same = others[end_state[others] == end_state[i]] if end_state[i] >= 0 else others[:0]
        pool = same if same.size else others
        counts = np.bincount(lev[pool], minlength=L)
        correct += int(np.argmax(counts) == lev[i])
    acc = correct / idx.size if idx.size else float("nan")
    chance = float(n_tr.max() / n_tr.sum()) if n_tr.sum() else float("nan")
    return ConditionTable(label=name, levels=levels, n_trials=n_tr, state_fraction=frac,
                          unassigned_fraction=unf, mapping=mp.astype(np.int64),
                          mapping_inferred=inferred, matching_fraction=match_frac,
                          matching_fraction_overall=overall, switches_per_trial=swm,
                          end_state_accuracy=float(acc), chance=chance)


# --------------------------------------------------------------------------- decoding
@dataclass
class StateDecoding:
    """Everything derived from per-bin state posteriors of a set of trials.

    Attributes
    ----------
    n_states : int
    bin_size : float
    posteriors : list of ndarray (T_i x S)
    bin_states : list of ndarray of int (T_i,)
        Assigned state of each bin (-1 unassigned).
    segments : Segments
    occupancy : ndarray (S,)
        Fraction of assigned time in each state (unassigned time left out).
    unassigned_fraction : float
        Fraction of all bins left unassigned.
    survival : list of SurvivalCurve
        Kaplan-Meier dwell-time survival of each state.
    mean_dwell_s : ndarray (S,)
        Kaplan-Meier restricted mean dwell time of each state (NaN if never visited).
    transition_counts : ndarray of int (S, S)
        Jumps from state a (row) to state b (column) between consecutive assigned
        segments of a trial (unassigned stretches skipped); re-entering the same
        state after an unassigned stretch is not a jump (diagonal is 0).
    transition_probs : ndarray (S, S)
        Row-normalised ``transition_counts`` (NaN rows for states never left).
    switches_per_trial : ndarray of int (n_trials,)
    end_state : ndarray of int (n_trials,)
        Last assigned state of each trial (-1 if none).
    conditions : dict of str to ConditionTable
    threshold : float
    min_bins : int
    """

    n_states: int
    bin_size: float
    posteriors: list
    bin_states: list
    segments: Segments
    occupancy: np.ndarray
    unassigned_fraction: float
    survival: list
    mean_dwell_s: np.ndarray
    transition_counts: np.ndarray
    transition_probs: np.ndarray
    switches_per_trial: np.ndarray
    end_state: np.ndarray
    conditions: dict = field(default_factory=dict)
    threshold: float = 0.8
    min_bins: int = 1


def min_segment_bins(min_segment_s: float, bin_size: float) -> int:
    """Fewest bins a kept segment spans: ceil(min_segment_s / bin_size), at least 1."""
    return max(1, int(math.ceil(min_segment_s / bin_size - 1e-9)))


def decode_posteriors(posteriors, *, bin_size: float, n_states=None, trial_index=None,
                      labels=None, threshold: float = 0.8, min_segment_s: float = 0.05,
                      label_to_state=None) -> StateDecoding:
    """Segments, occupancy, dwell times, transitions and condition tables.

    Parameters
    ----------
    posteriors : list of ndarray (T_i x S)
        Per-bin state posteriors of each trial.
    bin_size : float
        Seconds per bin.
    n_states : int, optional
        Number of states (default: columns of the posteriors).
    trial_index : array of int, optional
        Trials-table row of each trial (``BinnedCounts.trial_index``).
    labels : dict of str to array, optional
        Trial label columns (``BinnedCounts.labels``), one value per trial.
    threshold : float
        Posterior above which a bin is assigned (default 0.8, see module notes).
    min_segment_s : float
        Runs of one state shorter than this are unassigned; the minimum in bins is
        ``ceil(min_segment_s / bin_size)`` and at least 1 (default 50 ms: 3 bins at
        20 ms, 2 at 25 ms, 1 at 50 ms).
    label_to_state : dict, optional
        ``{label: {level: state}}``: the state matching each level; labels not given
        get the level's most occupied state.

    Returns
    -------
    StateDecoding
    """
    if n_states is not None:
        n_states = check_int("n_states", n_states, low=1)
    post = _check_posteriors(posteriors, n_states)
    s_count = post[0].shape[1] if n_states is None else n_states
    bin_size = check_positive("bin_size", bin_size)
    min_segment_s = check_nonnegative("min_segment_s", min_segment_s)
    mb = min_segment_bins(min_segment_s, bin_size)
    bin_states = assign_bins(post, threshold=threshold, min_bins=mb)
    seg = find_segments(bin_states, bin_size=bin_size, trial_index=trial_index)
    n_tr = len(post)
    counts = np.zeros(s_count)
    n_unassigned = 0
    n_total = 0
    for lab in bin_states:
        counts += np.bincount(lab[lab >= 0], minlength=s_count)[:s_count]
        n_unassigned += int(np.sum(lab < 0))
        n_total += lab.size
    occupancy = counts / counts.sum() if counts.sum() > 0 else np.full(s_count, np.nan)
    unassigned = n_unassigned / n_total if n_total else float("nan")
    dur = seg.duration
    survival = []
    for s in range(s_count):
        m = seg.state == s
        survival.append(kaplan_meier(dur[m], ~seg.censored[m]))
    mean_dwell = np.array([c.restricted_mean for c in survival])
    trans = np.zeros((s_count, s_count), dtype=np.int64)
    switches = np.zeros(n_tr, dtype=np.int64)
    end_state = np.full(n_tr, -1, dtype=np.int64)
    assigned_seg = seg.state >= 0
    for i in range(n_tr):
        st = seg.state[(seg.trial_pos == i) & assigned_seg]
        if st.size:
            end_state[i] = st[-1]
        if st.size > 1:
            a, b = st[:-1], st[1:]
            jump = a != b
            np.add.at(trans, (a[jump], b[jump]), 1)
            switches[i] = int(jump.sum())
    with np.errstate(invalid="ignore", divide="ignore"):
        probs = trans / trans.sum(axis=1, keepdims=True)
    conditions = {}
    for name, values in (labels or {}).items():
        values = np.asarray(values)
        if values.shape != (n_tr,):
            raise InputError(f"labels: column {name!r} has {values.size} values for "
                             f"{n_tr} trials")
        mp = None if label_to_state is None else label_to_state.get(name)
        conditions[name] = _condition_table(name, values, bin_states, switches, end_state,
                                            s_count, mp)
    return StateDecoding(n_states=s_count, bin_size=bin_size, posteriors=post,
                         bin_states=bin_states, segments=seg, occupancy=occupancy,
                         unassigned_fraction=float(unassigned), survival=survival,
                         mean_dwell_s=mean_dwell, transition_counts=trans,
                         transition_probs=probs, switches_per_trial=switches,
                         end_state=end_state, conditions=conditions, threshold=threshold,
                         min_bins=mb)
