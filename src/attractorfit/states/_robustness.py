"""Does the state analysis depend on its settings, and does state use drift across the
session?

Robustness panel. The state analysis is rerun with the number of states one below and
one above the chosen one, with the bin size halved and doubled, and decoded again with
a lower and a higher posterior threshold. Every rerun fixes its number of states (no
new choice, no discreteness test) and the latent dimension of the vertex codes, so its
cost is a few HMM fits (vertex codes are fitted in the chosen analysis's latent space).
The states of each setting are matched to the chosen ones by
the Hungarian algorithm [1]_ on the Euclidean distance between state rate vectors (Hz;
``scipy.optimize.linear_sum_assignment``; with unequal counts some states stay
unmatched), and the panel tabulates, per setting: occupancy and mean dwell of each
matched state, the unassigned fraction, cube R^2, how similar the matched states' rate
modulations are (Pearson r of the rates centred per unit), the occupancy total
variation distance to the chosen setting, and the fraction of time both settings
assign to the same (matched) state.

Drift of state use. The trials are split, in session order, into ``n_blocks`` blocks
(thirds by default) and the assigned bins of each block are counted per state. The
Pearson chi-square statistic of homogeneity [2]_ of this block x state table is
reported with its asymptotic p-value, which treats bins as independent: they are not
(a state lasts many bins), so that p-value is far too small. The p-value we rely on
comes from permuting whole trials across blocks (block sizes kept), which keeps the
dependence within trials: p = (1 + b) / (B + 1). When a condition (the remembered item)
is given, the chi-square is summed over its levels and trials are permuted within each
level, so a changing mix of conditions across the session is not taken for drift.

References
----------
.. [1] Kuhn, H. W. (1955). The Hungarian method for the assignment problem. Naval
   Research Logistics Quarterly 2:83-97.
.. [2] Pearson, K. (1900). On the criterion that a given system of deviations from the
   probable in the case of a correlated system of variables is such that it can be
   reasonably supposed to have arisen from random sampling. Philosophical Magazine
   50:157-175.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from attractorfit._validation import check_int, check_rng
from attractorfit.errors import InputError

__all__ = ["match_states", "RobustnessSetting", "RobustnessPanel", "state_robustness",
           "chi_square_homogeneity", "StateDrift", "state_drift"]


# --------------------------------------------------------------------------- matching
def match_states(rates_ref, rates_other, *, centre=None) -> tuple:
    """Match the states of another fit to reference states by their rate vectors.

    Parameters
    ----------
    rates_ref : ndarray (S, N)
        Reference state rates (Hz), one row per state.
    rates_other : ndarray (S', N)
        Rates of the other fit's states over the same units.
    centre : ndarray (N,), optional
        Per-unit rate subtracted before computing the modulation correlation
        (default: the mean of ``rates_ref`` over states).

    Returns
    -------
    match : ndarray of int (S',)
        Reference state of each other state (-1 when unmatched because S' > S).
    r : ndarray (S',)
        Pearson correlation across units of the centred rates of each matched pair
        (NaN when unmatched).

    Notes
    -----
    The assignment minimises the summed Euclidean distance between matched rate
    vectors (Hungarian algorithm, ``scipy.optimize.linear_sum_assignment``).
    """
    from scipy.optimize import linear_sum_assignment
    from scipy.spatial.distance import cdist

    a = np.asarray(rates_ref, dtype=float)
    b = np.asarray(rates_other, dtype=float)
    if a.ndim != 2 or b.ndim != 2 or a.shape[1] != b.shape[1]:
        raise InputError(f"rates: expected two (states x units) arrays over the same units, "
                         f"got shapes {a.shape} and {b.shape}")
    rows, cols = linear_sum_assignment(cdist(b, a))
    match = np.full(b.shape[0], -1, dtype=np.int64)
    match[rows] = cols
    c = a.mean(axis=0) if centre is None else np.asarray(centre, dtype=float)
    r = np.full(b.shape[0], np.nan)
    for i, j in zip(rows, cols):
        u, v = b[i] - c, a[j] - c
        if u.std() > 0 and v.std() > 0:
            r[i] = float(np.corrcoef(u, v)[0, 1])
    return match, r


# --------------------------------------------------------------------------- panel
#: Rate-modulation correlation from which a matched state counts as found again.
SIMILAR_R = 0.8


@dataclass
class RobustnessSetting:
    """The state analysis under one alternative setting.

    Attributes
    ----------
    name : str
        ``chosen``, ``states_minus_1``, ``states_plus_1`` (``states_plus_2``...),
        ``bin_halved``, ``bin_doubled`` (``bin_times_1p5`` for other factors),
        ``threshold_low`` or ``threshold_high``: plain names, usable as JSON keys.
    n_states : int
    bin_size : float
        Seconds.
    posterior_threshold : float
    occupancy : ndarray (S',)
    mean_dwell_s : ndarray (S',)
    unassigned_fraction : float
    cube_r2 : float
    rates_hz : ndarray (S', N)
    match : ndarray of int (S',)
        Chosen-setting state each state is matched to (-1 unmatched).
    match_r : ndarray (S',)
        Correlation of the centred rates with the matched chosen state.
    occupancy_tvd : float
        Total variation distance between this setting's occupancy and the chosen one,
        states identified through ``match`` (unmatched states count as states of
        their own).
    agreement : float
        Of the time both this setting and the chosen one assign to a state, the
        fraction where they assign matched states (compared at the centres of the
        chosen setting's bins).
    """

    name: str
    n_states: int
    bin_size: float
    posterior_threshold: float
    occupancy: np.ndarray
    mean_dwell_s: np.ndarray
    unassigned_fraction: float
    cube_r2: float
    rates_hz: np.ndarray
    match: np.ndarray
    match_r: np.ndarray
    occupancy_tvd: float
    agreement: float

    @property
    def similar(self) -> np.ndarray:
        """Bool (S',): matched to a chosen state with rate-modulation correlation
        >= ``SIMILAR_R``."""
        return (self.match >= 0) & (np.nan_to_num(self.match_r) >= SIMILAR_R)

    @property
    def n_matched_similar(self) -> int:
        """Chosen states found again with rate-modulation correlation >= ``SIMILAR_R``."""
        return int(np.sum(self.similar))


@dataclass
class RobustnessPanel:
    """The state analysis under the chosen and alternative settings.

    Attributes
    ----------
    settings : list of RobustnessSetting
        The chosen setting first.
    n_states : int
        Number of states of the chosen setting.
    """

    settings: list
    n_states: int

    def table(self) -> tuple:
        """``(header, rows)`` of ``tables/robustness.csv``: one row per setting."""
        header = ["setting", "n_states", "bin_size_s", "posterior_threshold",
                  "unassigned_fraction", "cube_r2", "states_found_again", "mean_match_r",
                  "occupancy_tvd", "agreement"]
        rows = []
        for s in self.settings:
            rows.append([s.name, int(s.n_states), float(s.bin_size),
                         float(s.posterior_threshold), float(s.unassigned_fraction),
                         float(s.cube_r2), s.n_matched_similar,
                         float(np.nanmean(s.match_r)) if np.any(np.isfinite(s.match_r))
                         else float("nan"), float(s.occupancy_tvd), float(s.agreement)])
        return header, rows

    def state_table(self) -> tuple:
        """``(header, rows)`` of ``tables/robustness_states.csv``: one row per state."""
        header = ["setting", "state", "matched_state", "match_r", "occupancy",
                  "mean_dwell_s"]
        rows = []
        for s in self.settings:
            for k in range(s.n_states):
                rows.append([s.name, k, int(s.match[k]), float(s.match_r[k]),
                             float(s.occupancy[k]), float(s.mean_dwell_s[k])])
        return header, rows

    def by_chosen_state(self, attribute: str) -> np.ndarray:
        """(settings x chosen states) array of ``occupancy`` or ``mean_dwell_s`` of the
        state matched to each chosen state (NaN where none is)."""
        out = np.full((len(self.settings), self.n_states), np.nan)
        for i, s in enumerate(self.settings):
            vals = np.asarray(getattr(s, attribute), dtype=float)
            for k, j in enumerate(s.match):
                if j >= 0:
                    out[i, j] = vals[k]
        return out

    def summary_block(self) -> dict:
        """Plain numbers for summary.json."""
        return {s.name: {"n_states": int(s.n_states), "bin_size_s": float(s.bin_size),
                         "posterior_threshold": float(s.posterior_threshold),
                         "occupancy": s.occupancy.tolist(),
                         "mean_dwell_s": s.mean_dwell_s.tolist(),
                         "unassigned_fraction": float(s.unassigned_fraction),
                         "cube_r2": float(s.cube_r2), "match": s.match.tolist(),
                         "match_r": s.match_r.tolist(),
                         "occupancy_tvd": float(s.occupancy_tvd),
                         "agreement": float(s.agreement)}
                for s in self.settings}


def _occupancy_tvd(occ_ref, occ, match) -> float:
    s_ref = occ_ref.size
    p = np.concatenate([np.nan_to_num(occ_ref), np.zeros(int(np.sum(match < 0)))])
    q = np.zeros_like(p)
    extra = s_ref
    for k, j in enumerate(match):
        if j >= 0:
            q[j] += occ[k]
        else:
            q[extra] += occ[k]
            extra += 1
    return float(0.5 * np.sum(np.abs(p - np.nan_to_num(q))))


def _agreement(ref_states, ref_bin, other_states, other_bin, match) -> float:
    """Fraction of jointly assigned time where the matched states agree."""
    both = same = 0
    lut = np.concatenate([match, [-1]])  # index -1 (unassigned) maps to -1
    for a, b in zip(ref_states, other_states):
        if a.size == 0 or b.size == 0:
            continue
        centre = (np.arange(a.size) + 0.5) * ref_bin
        k = np.floor(centre / other_bin + 1e-9).astype(np.int64)
        ok = k < b.size
        sa = a[ok]
        sb = lut[b[k[ok]]]
        m = (sa >= 0) & (sb >= 0)
        both += int(m.sum())
        same += int(np.sum(sa[m] == sb[m]))
    return same / both if both else float("nan")


def _setting(name, sf_ref, dec, *, rates_hz, cube_r2, bin_size, threshold, unit_cols,
             centre):
    """Compare one alternative decoding with the chosen one."""
    ref_rates = sf_ref.rates_hz[:, unit_cols[0]]
    match, r = match_states(ref_rates, rates_hz[:, unit_cols[1]], centre=centre)
    ref_dec = sf_ref.decoding
    return RobustnessSetting(
        name=name, n_states=int(rates_hz.shape[0]), bin_size=float(bin_size),
        posterior_threshold=float(threshold), occupancy=np.asarray(dec.occupancy, float),
        mean_dwell_s=np.asarray(dec.mean_dwell_s, float),
        unassigned_fraction=float(dec.unassigned_fraction), cube_r2=float(cube_r2),
        rates_hz=np.asarray(rates_hz, float), match=match, match_r=r,
        occupancy_tvd=_occupancy_tvd(np.asarray(ref_dec.occupancy, float),
                                     np.asarray(dec.occupancy, float), match),
        agreement=_agreement(ref_dec.bin_states, sf_ref.bin_size, dec.bin_states, bin_size,
                             match))


def state_robustness(binned, state_fit, *, state_steps=(-1, 1), rebinned=None,
                     thresholds=(0.6, 0.95), n_restarts: int = 3, rng=None) -> RobustnessPanel:
    """Rerun the state analysis around the chosen settings and match the states.

    Parameters
    ----------
    binned : BinnedCounts
        The counts ``state_fit`` was fitted on.
    state_fit : StateFit
        The chosen analysis.
    state_steps : sequence of int
        Changes of the number of states to refit (default -1 and +1; counts below 1
        are skipped).
    rebinned : dict of str to BinnedCounts, optional
        The same trials binned at other bin sizes, keyed by the setting's name (e.g.
        ``{"bin_halved": ..., "bin_doubled": ...}``); each is refitted with the chosen number of
        states. Binning stays with the caller (``pipeline.run_states``).
    thresholds : sequence of float
        Posterior thresholds in (0.5, 1) to decode the chosen model with again (no
        refit). The lower one is named ``threshold_low``, a higher one
        ``threshold_high``.
    n_restarts : int
        EM restarts of every refit.
    rng : int or Generator, optional

    Returns
    -------
    RobustnessPanel

    Raises
    ------
    InputError
        A threshold outside (0.5, 1), or rebinned counts of other trials.

    Notes
    -----
    The refits keep the chosen fit's posterior threshold and minimum segment duration
    (in seconds), and their vertex codes are fitted in the chosen fit's latent space
    (state rates converted to counts per chosen bin), so cube R^2 differs only through
    the states; the cost is one Poisson HMM fit with a fixed state count per refitted
    setting (no latent refit, no choice of the state count, no discreteness test).
    """
    from attractorfit.states._analysis import _decode
    from attractorfit.states._hmm import PoissonHMM
    from attractorfit.states._vertices import assign_vertex_codes

    rng = check_rng(rng)
    n_restarts = check_int("robustness.n_restarts", n_restarts, low=1)
    sf = state_fit
    s0 = int(sf.n_states)
    centre = sf.rates_hz.mean(axis=0)
    all_cols = (np.arange(len(sf.unit_ids)),) * 2
    settings = [_setting("chosen", sf, sf.decoding, rates_hz=sf.rates_hz, cube_r2=sf.cube_r2,
                         bin_size=sf.bin_size, threshold=sf.posterior_threshold,
                         unit_cols=all_cols, centre=centre)]
    jobs = [(f"states_{'minus' if d < 0 else 'plus'}_{abs(int(d))}", binned, s0 + int(d))
            for d in state_steps if s0 + int(d) >= 1]
    jobs += [(name, b, s0) for name, b in (rebinned or {}).items()]
    seeds = np.random.SeedSequence(int(rng.integers(2 ** 63 - 1))).spawn(len(jobs))
    for (name, b, s), seed in zip(jobs, seeds):
        if not np.array_equal(b.trial_index, binned.trial_index):
            raise InputError(f"rebinned[{name!r}]: holds other trials than the chosen "
                             "analysis; expected the same trials at another bin size")
        hmm_seed, code_seed = seed.spawn(2)
        model = PoissonHMM(s, n_restarts=n_restarts, rng=np.random.default_rng(hmm_seed))
        model.fit(b.sequences(dtype=np.float64))
        rates_hz = np.asarray(model.rates_, dtype=float) / b.bin_size
        same_units = list(b.unit_ids) == list(sf.unit_ids)
        # codes in the chosen analysis's latent space (rates as counts per chosen bin),
        # so cube R^2 is comparable across settings; log-rate codes if units differ
        codes = assign_vertex_codes(rates_hz * sf.bin_size if same_units else rates_hz,
                                    latent=sf.latent if same_units else None,
                                    rng=np.random.default_rng(code_seed))
        dec = _decode(model, b, n_states=s, threshold=sf.posterior_threshold,
                      min_segment_s=sf.min_segment_s, label_to_state=None)
        ids = {u: i for i, u in enumerate(b.unit_ids)}
        shared = [i for i, u in enumerate(sf.unit_ids) if u in ids]
        cols = (np.asarray(shared, dtype=np.int64),
                np.asarray([ids[sf.unit_ids[i]] for i in shared], dtype=np.int64))
        settings.append(_setting(name, sf, dec, rates_hz=rates_hz, cube_r2=codes.cube_r2,
                                 bin_size=b.bin_size, threshold=sf.posterior_threshold,
                                 unit_cols=cols, centre=centre[cols[0]]))
    for t in thresholds:
        t = float(t)
        if not 0.5 < t < 1.0:
            raise InputError(f"robustness.thresholds: expected numbers in (0.5, 1), got {t!r}")
        name = ("threshold_low" if t < sf.posterior_threshold else
                "threshold_high" if t > sf.posterior_threshold else "threshold_same")
        dec = _decode(sf.model, binned, n_states=s0, threshold=t,
                      min_segment_s=sf.min_segment_s, label_to_state=None)
        settings.append(_setting(name, sf, dec, rates_hz=sf.rates_hz, cube_r2=sf.cube_r2,
                                 bin_size=sf.bin_size, threshold=t, unit_cols=all_cols,
                                 centre=centre))
    return RobustnessPanel(settings=settings, n_states=s0)


# --------------------------------------------------------------------------- drift
def chi_square_homogeneity(table) -> tuple:
    """Pearson chi-square statistic of homogeneity of a contingency table [2]_.

    Columns with a zero total are dropped (they carry no information and would give
    zero expected counts).

    Parameters
    ----------
    table : ndarray (R, C) of counts

    Returns
    -------
    statistic : float
        Sum over cells of (observed - expected)^2 / expected, expected = row total x
        column total / grand total (no continuity correction).
    dof : int
        (R' - 1)(C' - 1) over the rows and columns with non-zero totals.
    p_value : float
        Asymptotic chi-square p-value (valid for independent counts only).
    """
    from scipy.stats import chi2

    t = np.asarray(table, dtype=float)
    t = t[:, t.sum(axis=0) > 0]
    t = t[t.sum(axis=1) > 0]
    if t.ndim != 2 or min(t.shape) < 2:
        return 0.0, 0, float("nan")
    e = np.outer(t.sum(axis=1), t.sum(axis=0)) / t.sum()
    stat = float(np.sum((t - e) ** 2 / e))
    dof = (t.shape[0] - 1) * (t.shape[1] - 1)
    return stat, int(dof), float(chi2.sf(stat, dof))


@dataclass
class StateDrift:
    """State use in consecutive blocks of trials.

    Attributes
    ----------
    n_blocks : int
    block_trials : list of ndarray of int
        Trial positions (in the analysed data) of each block, in session order.
    counts : ndarray of int (n_blocks, S)
        Assigned bins per block and state.
    occupancy : ndarray (n_blocks, S)
        Row-normalised ``counts``.
    statistic : float
        Pearson chi-square of homogeneity of ``counts``.
    dof : int
    p_asymptotic : float
        Chi-square p-value treating bins as independent (too small: bins within a
        dwell are not independent).
    p_value : float
        Trial-permutation p-value (1 + b) / (B + 1): trials shuffled across blocks.
    cramers_v : float
        sqrt(statistic / (n (min(R, C) - 1))), an effect size in [0, 1] (bins as n).
    n_permutations : int
    stratified_by : str or None
        Name of the condition the test was stratified by (set by the caller).
    """

    n_blocks: int
    block_trials: list
    counts: np.ndarray
    occupancy: np.ndarray
    statistic: float
    dof: int
    p_asymptotic: float
    p_value: float
    cramers_v: float
    n_permutations: int
    stratified_by: str | None = None

    def summary_block(self) -> dict:
        """Plain numbers for summary.json."""
        return {"n_blocks": int(self.n_blocks), "occupancy": self.occupancy.tolist(),
                "chi_square": float(self.statistic), "dof": int(self.dof),
                "p_asymptotic_bins_independent": float(self.p_asymptotic),
                "p_value": float(self.p_value), "cramers_v": float(self.cramers_v),
                "n_permutations": int(self.n_permutations),
                "stratified_by": self.stratified_by}

    def table(self) -> tuple:
        """``(header, rows)``: one row per block, occupancy per state."""
        s = self.counts.shape[1]
        header = ["block", "first_trial_pos", "last_trial_pos", "n_trials", "assigned_bins"] + \
                 [f"occupancy_state{k}" for k in range(s)]
        rows = []
        for i, tr in enumerate(self.block_trials):
            rows.append([i, int(tr.min()), int(tr.max()), int(tr.size),
                         int(self.counts[i].sum())] + [float(v) for v in self.occupancy[i]])
        return header, rows


def state_drift(decoding, *, n_blocks: int = 3, n_permutations: int = 199,
                trial_order=None, condition=None, rng=None) -> StateDrift:
    """Test whether state occupancy changes across consecutive blocks of trials.

    Without ``condition`` the statistic is the chi-square of homogeneity of the
    block x state table of assigned bins. With it (e.g. the remembered item, whose
    mix may differ between blocks and would otherwise pass for drift) the statistic
    is the sum over the condition's levels of the chi-square of each level's own
    block x state table, and the permutations shuffle block membership within each
    level only, so a changing mix of conditions alone does not make the test fire.

    Parameters
    ----------
    decoding : StateDecoding
        Assigned states of every bin (``StateFit.decoding``).
    n_blocks : int
        Blocks of consecutive trials (default 3: thirds of the session); block sizes
        differ by at most one trial.
    n_permutations : int
        Random reassignments of whole trials to blocks for the p-value.
    trial_order : array of int, optional
        Session order key of each trial (default ``decoding.segments`` trial rows,
        i.e. the trials table sorted by start).
    condition : array (n_trials,), optional
        Level of each trial (missing values form a level of their own).
    rng : int or Generator, optional

    Returns
    -------
    StateDrift

    Raises
    ------
    InputError
        Fewer trials than blocks, or bad options.
    """
    rng = check_rng(rng)
    n_blocks = check_int("drift.n_blocks", n_blocks, low=2)
    n_permutations = check_int("drift.n_permutations", n_permutations, low=1)
    bs = decoding.bin_states
    n = len(bs)
    if n < n_blocks:
        raise InputError(f"drift.n_blocks = {n_blocks}: only {n} trials; expected at most one "
                         "block per trial")
    s = int(decoding.n_states)
    per_trial = np.zeros((n, s), dtype=np.int64)
    for i, lab in enumerate(bs):
        per_trial[i] = np.bincount(lab[lab >= 0], minlength=s)[:s]
    if trial_order is None:
        seg = decoding.segments
        key = np.zeros(n, dtype=np.int64)
        key[seg.trial_pos] = seg.trial
        trial_order = key
    order = np.argsort(np.asarray(trial_order), kind="stable")
    blocks = [np.sort(b) for b in np.array_split(order, n_blocks)]
    member = np.empty(n, dtype=np.int64)
    for j, b in enumerate(blocks):
        member[b] = j
    counts = np.stack([per_trial[b].sum(axis=0) for b in blocks])
    if condition is None:
        groups = [np.arange(n)]
    else:
        cond = np.asarray([str(v) for v in np.asarray(condition, dtype=object)])
        if cond.shape != (n,):
            raise InputError(f"condition: expected {n} values (one per trial), got "
                             f"{cond.size}")
        groups = [np.flatnonzero(cond == lv) for lv in np.unique(cond)]
    eye = np.eye(n_blocks, dtype=np.int64)

    def statistic(memb):
        tot, df = 0.0, 0
        for g in groups:
            st, d, _ = chi_square_homogeneity(eye[memb[g]].T @ per_trial[g])
            tot, df = tot + st, df + d
        return tot, df

    from scipy.stats import chi2

    stat, dof = statistic(member)
    p_asym = float(chi2.sf(stat, dof)) if dof > 0 else float("nan")
    null = np.empty(n_permutations)
    for k in range(n_permutations):
        perm = member.copy()
        for g in groups:
            perm[g] = rng.permutation(member[g])
        null[k] = statistic(perm)[0]
    p = (1 + int(np.sum(null >= stat - 1e-9))) / (n_permutations + 1)
    total = counts.sum()
    k = min(int(np.sum(counts.sum(axis=1) > 0)), int(np.sum(counts.sum(axis=0) > 0)))
    with np.errstate(invalid="ignore", divide="ignore"):
        occ = counts / counts.sum(axis=1, keepdims=True)
        v = float(np.sqrt(stat / (total * (k - 1)))) if total and k > 1 else float("nan")
    return StateDrift(n_blocks=n_blocks, block_trials=blocks, counts=counts, occupancy=occ,
                      statistic=stat, dof=dof, p_asymptotic=p_asym, p_value=float(p),
                      cramers_v=v, n_permutations=n_permutations)
