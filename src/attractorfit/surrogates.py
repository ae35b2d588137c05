"""Surrogate recordings: from the fitted network, and null surrogates for comparison.

Stage 6 of the flow (fit -> **surrogates** -> compare). Every surrogate keeps the
data's trial structure: the same analysis windows, the trials table with its label
columns, and the data's kept unit ids, so that :func:`bin_like` bins it exactly like
the data and :func:`attractorfit.compare.compare` runs the same analysis on both.

Surrogates
----------
``network``
    Independent recordings simulated from the fitted network
    (:func:`network_surrogates`, one stream per surrogate from
    ``SeedSequence.spawn``).
``poisson``
    Rate-matched inhomogeneous Poisson spike trains: every unit fires as a Poisson
    process whose rate is its smoothed PSTH in the analysis window, one PSTH per
    level of a trial label (the remembered item). Keeps each unit's time-varying mean
    rate per condition; removes spike-timing regularity (ISI CV and Fano factor go to
    1 [2]_), trial-to-trial variability beyond Poisson and every coordination between
    units beyond the shared PSTH. (:func:`poisson_surrogate`)
``dither``
    Each spike moved by a uniform random amount in [-d, +d] (default d = 25 ms) [1]_:
    keeps every unit's spike count exactly and its rate profile on time scales longer
    than d; destroys fine timing and synchrony below d. A spike inside a trial stays
    inside it (the dither interval is cut at the trial edges; outside trials at 0).
    (:func:`dither_surrogate`)
``shuffle``
    Trial shuffling per condition: within each level of the trial label, every unit's
    spike train (relative to the start of the analysis window) is moved to another
    trial by an independent random permutation per unit [3]_. Keeps each unit's
    per-condition PSTH exactly (the sum over trials is unchanged) and its within-trial
    spike statistics; destroys the within-trial coordination between units that
    switching among shared states creates. (:func:`shuffle_surrogate`)
``continuous``
    The continuous-latent null of the discreteness test
    (:func:`attractorfit.states._discreteness.fit_continuous_null`): count-level
    surrogates with condition PSTHs, a continuous shared latent and slow drift, matched
    to each unit's Fano factor and the pairwise count correlations. Returns
    :class:`~attractorfit.binning.BinnedCounts`, not spike times.
    (:func:`continuous_surrogates`)

References
----------
.. [1] Louis, S., Gerstein, G. L., Grün, S. & Diesmann, M. (2010). Surrogate spike
   train generation through dithering in operational time. Frontiers in Computational
   Neuroscience 4:127.
.. [2] Dayan, P. & Abbott, L. F. (2001). Theoretical Neuroscience. MIT Press, ch. 1
   (inhomogeneous Poisson process: ISI CV 1 for a constant rate, Fano factor 1).
.. [3] Perkel, D. H., Gerstein, G. L. & Moore, G. P. (1967). Neuronal spike trains and
   stochastic point processes. II. Simultaneous spike trains. Biophysical Journal
   7:419-440 (the shuffle predictor).
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy.ndimage import gaussian_filter1d

from attractorfit._validation import check_int, check_nonnegative, check_positive, check_rng
from attractorfit.binning import BinnedCounts, analysis_windows, bin_spikes
from attractorfit.errors import InputError, InputWarning
from attractorfit.recording import Recording

__all__ = ["NULL_KINDS", "network_surrogates", "poisson_surrogate", "dither_surrogate",
           "shuffle_surrogate", "continuous_surrogates", "null_surrogates", "bin_like",
           "trial_groups"]

#: Names of the null surrogates :func:`null_surrogates` knows.
NULL_KINDS = ("poisson", "dither", "shuffle", "continuous")


# --------------------------------------------------------------------------- helpers
def spawn_streams(rng, n: int) -> list:
    """``n`` independent SeedSequences derived from ``rng`` (int, Generator or None)."""
    rng = check_rng(rng)
    root = np.random.SeedSequence(int(rng.integers(2 ** 63 - 1)))
    return root.spawn(int(n))


def _check_recording(recording, name="recording") -> Recording:
    if not isinstance(recording, Recording):
        raise InputError(f"{name}: expected a Recording, got {type(recording).__name__}")
    return recording


def _check_binned(binned, name="binned") -> BinnedCounts:
    if not isinstance(binned, BinnedCounts):
        raise InputError(f"{name}: expected a BinnedCounts, got {type(binned).__name__}")
    return binned


def _check_pair(recording, binned):
    """The recording and the counts binned from it; return the recording unit indices."""
    _check_recording(recording)
    _check_binned(binned)
    idx = np.asarray(binned.unit_index, dtype=np.int64)
    ok = idx.size == binned.n_units and np.all((idx >= 0) & (idx < recording.n_units))
    if ok:
        ids = [recording.unit_ids[i] for i in idx]
        ok = ids == list(binned.unit_ids)
    if not ok:
        raise InputError(f"binned: its units {list(binned.unit_ids)[:5]}... do not match the "
                         f"units of {recording.source!r}; pass the counts binned from this "
                         "recording")
    return idx


def trial_groups(binned, condition) -> tuple:
    """Group index of every trial of ``binned`` and the group names.

    ``condition`` is a label column of ``binned.labels`` (levels compared as text) or
    None (one group holding every trial).
    """
    from attractorfit.states._discreteness import _conditions

    return _conditions(binned, condition)


def _window_edges(binned):
    """Absolute start and stop of every trial's analysis window (whole bins)."""
    start = np.asarray(binned.window_start, dtype=np.float64)
    return start, start + np.asarray(binned.n_valid) * binned.bin_size


def _make_recording(recording, binned, trains, kind, options) -> Recording:
    trials = None
    if recording.trials is not None:
        trials = {k: np.array(v, copy=True) for k, v in recording.trials.items()}
    meta = {"source": f"surrogate-{kind}", "surrogate": kind,
            "surrogate_options": dict(options), "data_source": recording.source}
    return Recording(unit_ids=list(binned.unit_ids),
                     spike_times=[np.sort(np.asarray(t, dtype=np.float64)) for t in trains],
                     trials=trials, metadata=meta)


def _window_spikes(times, start, stop):
    """Per window, the spike times (relative to the window start) inside it."""
    lo = np.searchsorted(times, start)
    hi = np.searchsorted(times, stop)
    return [times[a:b] - s for a, b, s in zip(lo, hi, start)]


# --------------------------------------------------------------------------- network
def _simulate_one(network_fit, seed):
    return network_fit.simulate_recording(rng=np.random.default_rng(seed))


def network_surrogates(network_fit, n: int, *, rng=None, n_jobs: int = 1) -> list:
    """``n`` independent surrogate recordings simulated from a fitted network.

    Parameters
    ----------
    network_fit : NetworkFit
        Any object with ``simulate_recording(*, rng) -> Recording`` (one surrogate
        trial per data trial, the data's durations, labels and kept unit ids).
    n : int
        Number of surrogates (>= 1).
    rng : int or Generator, optional
    n_jobs : int
        Parallel workers (joblib). Each surrogate has its own stream from
        ``SeedSequence.spawn``, so the result does not depend on ``n_jobs``.

    Returns
    -------
    list of Recording

    Raises
    ------
    InputError
        ``network_fit`` cannot simulate, or bad ``n`` / ``n_jobs``.
    """
    if not callable(getattr(network_fit, "simulate_recording", None)):
        raise InputError(f"network_fit: expected a fitted network with a "
                         f"simulate_recording(rng=...) method, got "
                         f"{type(network_fit).__name__}")
    n = check_int("n", n, low=1)
    n_jobs = check_int("n_jobs", n_jobs, low=1)
    seeds = spawn_streams(rng, n)
    if n_jobs == 1:
        out = [_simulate_one(network_fit, s) for s in seeds]
    else:
        from joblib import Parallel, delayed

        out = Parallel(n_jobs=n_jobs)(delayed(_simulate_one)(network_fit, s) for s in seeds)
    for i, rec in enumerate(out):
        if not isinstance(rec, Recording):
            raise InputError(f"network_fit: simulate_recording returned "
                             f"{type(rec).__name__} for surrogate {i}; expected a Recording")
    return out


# --------------------------------------------------------------------------- poisson
def condition_psth(recording, binned, *, condition=None, smooth_s: float = 0.05,
                   resolution_s: float = 0.001) -> tuple:
    """Smoothed PSTH (Hz) of every kept unit per condition, on a fine time grid.

    The PSTH at time t of the analysis window averages the trials whose window covers
    t; Gaussian smoothing (s.d. ``smooth_s``) is normalised by the same coverage, so
    the ends of the window and trials of unequal length are not biased towards 0.

    Returns
    -------
    rate_hz : ndarray (groups, fine bins, units)
    groups : ndarray of int (trials,)
    levels : list of str
    """
    unit_idx = _check_pair(recording, binned)
    smooth_s = check_nonnegative("smooth_s", smooth_s)
    r = check_positive("resolution_s", resolution_s)
    groups, levels = trial_groups(binned, condition)
    start, stop = _window_edges(binned)
    length = stop - start
    n_fine = np.ceil(length / r - 1e-9).astype(np.int64)
    nf = int(n_fine.max())
    n_units = binned.n_units
    hist = np.zeros((len(levels), nf, n_units))
    cover = np.zeros((len(levels), nf))
    for i in range(binned.n_trials):
        width = np.clip(length[i] - np.arange(nf) * r, 0.0, r)   # covered part of each bin
        cover[groups[i]] += width
    for u, k in enumerate(unit_idx):
        for i, rel in enumerate(_window_spikes(recording.spike_times[k], start, stop)):
            if rel.size:
                f = np.minimum((rel / r).astype(np.int64), n_fine[i] - 1)
                hist[groups[i], :, u] += np.bincount(f, minlength=nf)
    sigma = smooth_s / r
    if sigma > 0:
        num = gaussian_filter1d(hist, sigma, axis=1, mode="constant")
        den = gaussian_filter1d(cover, sigma, axis=1, mode="constant")
    else:
        num, den = hist, cover
    with np.errstate(invalid="ignore", divide="ignore"):
        rate = np.where(den[:, :, None] > 1e-12, num / den[:, :, None], 0.0)
    return rate, groups, levels


def poisson_surrogate(recording, binned, *, condition=None, smooth_s: float = 0.05,
                      resolution_s: float = 0.001, rng=None) -> Recording:
    """Rate-matched inhomogeneous Poisson surrogate from condition PSTHs.

    Every kept unit fires, in every trial's analysis window, as an inhomogeneous
    Poisson process whose rate is the unit's smoothed PSTH for the trial's condition
    (see :func:`condition_psth`); the rate is piecewise constant on the fine grid and
    spikes are uniform within each fine bin (exact for a piecewise-constant rate [2]_).

    Parameters
    ----------
    recording : Recording
        The data.
    binned : BinnedCounts
        The data binned from ``recording``: gives the analysis windows and kept units.
    condition : str, optional
        Trial label with one PSTH per level (e.g. the remembered item); None: one PSTH.
    smooth_s : float
        Gaussian smoothing of the PSTH (s.d., seconds; default 50 ms).
    resolution_s : float
        Fine time grid of the PSTH (default 1 ms).
    rng : int or Generator, optional

    Returns
    -------
    Recording
        The data's trials table and kept unit ids; spikes only inside the analysis
        windows.
    """
    rng = check_rng(rng)
    rate, groups, levels = condition_psth(recording, binned, condition=condition,
                                          smooth_s=smooth_s, resolution_s=resolution_s)
    r = float(resolution_s)
    start, stop = _window_edges(binned)
    n_units = binned.n_units
    parts = [[] for _ in range(n_units)]
    for i in range(binned.n_trials):
        nf = int(np.ceil((stop[i] - start[i]) / r - 1e-9))
        edges = start[i] + np.minimum(np.arange(nf + 1) * r, stop[i] - start[i])
        width = np.diff(edges)
        counts = rng.poisson(rate[groups[i], :nf, :] * width[:, None])
        for u in range(n_units):
            k = counts[:, u]
            tot = int(k.sum())
            if tot:
                b = np.repeat(np.arange(nf), k)
                parts[u].append(edges[b] + rng.random(tot) * width[b])
    trains = []
    for p in parts:
        t = np.concatenate(p) if p else np.zeros(0)
        trains.append(t[t >= 0])
    return _make_recording(recording, binned, trains, "poisson",
                           {"condition": condition, "smooth_s": smooth_s,
                            "resolution_s": r})


# --------------------------------------------------------------------------- dither
def dither_surrogate(recording, binned, *, dither_s: float = 0.025, rng=None) -> Recording:
    """Spike dithering: every spike moved uniformly within +-``dither_s`` [1]_.

    A spike inside a trial is dithered uniformly within
    ``[max(t - d, start), min(t + d, stop))`` of its trial, so trials keep their
    spike counts; a spike outside every trial within ``[max(t - d, 0), t + d)``.
    No spike moves by more than ``d``; each unit keeps its exact spike count.

    Parameters
    ----------
    recording : Recording
    binned : BinnedCounts
        The data binned from ``recording`` (the surrogate keeps its kept units).
    dither_s : float
        Half-width d of the dither interval in seconds (default 25 ms).
    rng : int or Generator, optional

    Returns
    -------
    Recording
    """
    unit_idx = _check_pair(recording, binned)
    d = check_positive("dither_s", dither_s)
    rng = check_rng(rng)
    if recording.trials is not None and recording.n_trials:
        t_start = np.asarray(recording.trials["start"], dtype=np.float64)
        t_stop = np.asarray(recording.trials["stop"], dtype=np.float64)
    else:
        t_start = t_stop = np.zeros(0)
    trains = []
    for k in unit_idx:
        t = recording.spike_times[k]
        j = np.searchsorted(t_start, t, side="right") - 1
        inside = (j >= 0) & (t < t_stop[np.clip(j, 0, None)]) if t_start.size else \
            np.zeros(t.size, dtype=bool)
        jj = np.clip(j, 0, None)
        b_lo = np.where(inside, t_start[jj] if t_start.size else 0.0, 0.0)
        b_hi = np.where(inside, t_stop[jj] if t_stop.size else np.inf, np.inf)
        lo = np.maximum(t - d, b_lo)
        hi = np.minimum(t + d, b_hi)
        trains.append(lo + rng.random(t.size) * (hi - lo))
    return _make_recording(recording, binned, trains, "dither", {"dither_s": d})


# --------------------------------------------------------------------------- shuffle
def shuffle_surrogate(recording, binned, *, condition=None, rng=None) -> Recording:
    """Trial shuffling per condition: each unit's spike train from another trial.

    For every kept unit and every level of ``condition``, an independent uniform
    random permutation of that level's trials assigns to trial p the unit's spikes
    from trial perm[p] (times relative to the start of the analysis window) [3]_.
    Each unit's per-condition PSTH (sum over the level's trials) is kept exactly when
    the level's analysis windows have equal length; spikes of a longer source window
    that fall beyond the end of a shorter target window are dropped. Spikes outside
    the analysis windows are not kept.

    Parameters
    ----------
    recording : Recording
    binned : BinnedCounts
        The data binned from ``recording`` (analysis windows, kept units, labels).
    condition : str, optional
        Label column whose levels are shuffled separately; None: all trials together.
    rng : int or Generator, optional

    Returns
    -------
    Recording
    """
    unit_idx = _check_pair(recording, binned)
    rng = check_rng(rng)
    groups, levels = trial_groups(binned, condition)
    start, stop = _window_edges(binned)
    length = stop - start
    members = [np.flatnonzero(groups == g) for g in range(len(levels))]
    trains = []
    for k in unit_idx:
        rel = _window_spikes(recording.spike_times[k], start, stop)
        out = []
        for m in members:
            perm = m[rng.permutation(m.size)]
            for tgt, src in zip(m, perm):
                x = rel[src]
                out.append(start[tgt] + x[x < length[tgt]])
        t = np.concatenate(out) if out else np.zeros(0)
        trains.append(t[t >= 0])
    return _make_recording(recording, binned, trains, "shuffle", {"condition": condition})


# --------------------------------------------------------------------------- continuous
def continuous_surrogates(binned, n: int, *, n_dims: int = 3, condition=None, rng=None,
                          **null_options) -> list:
    """``n`` count-level surrogates from the continuous-latent null fitted to ``binned``.

    Parameters
    ----------
    binned : BinnedCounts
    n : int
    n_dims : int
        Latent factors of the null.
    condition : str, optional
        Label column with its own PSTH.
    rng : int or Generator, optional
    **null_options
        Passed to :func:`attractorfit.states._discreteness.fit_continuous_null`
        (``psth_smooth_s``, ``drift_trials``, ``max_lag_s``).

    Returns
    -------
    list of BinnedCounts
        Binned like the data (same trials, bins, units and labels).
    """
    from attractorfit.states._discreteness import fit_continuous_null

    _check_binned(binned)
    n = check_int("n", n, low=1)
    null = fit_continuous_null(binned, n_dims=n_dims, condition=condition, **null_options)
    out = []
    for seed in spawn_streams(rng, n):
        sim = null.simulate(np.random.default_rng(seed))
        sim.unit_index = np.asarray(binned.unit_index).copy()
        sim.window, sim.align = binned.window, binned.align
        sim.pseudo_trials = binned.pseudo_trials
        out.append(sim)
    return out


# --------------------------------------------------------------------------- dispatch
def _one_null(kind, recording, binned, seed, opts):
    rng = np.random.default_rng(seed)
    if kind == "poisson":
        return poisson_surrogate(recording, binned, condition=opts["condition"],
                                 smooth_s=opts["smooth_s"], rng=rng)
    if kind == "dither":
        return dither_surrogate(recording, binned, dither_s=opts["dither_s"], rng=rng)
    return shuffle_surrogate(recording, binned, condition=opts["condition"], rng=rng)


def null_surrogates(recording, binned, kinds, n: int, *, condition=None,
                    dither_s: float = 0.025, smooth_s: float = 0.05, n_dims: int = 3,
                    rng=None, n_jobs: int = 1) -> dict:
    """Null surrogates of several kinds, ``n`` of each, as ``{kind: list}``.

    Parameters
    ----------
    recording : Recording
        The data (not needed for ``"continuous"`` alone; pass None then).
    binned : BinnedCounts
        The data binned from ``recording``.
    kinds : str or sequence of str
        Any of :data:`NULL_KINDS`.
    n : int
        Surrogates per kind (>= 1).
    condition : str, optional
        Trial label for PSTHs (poisson, continuous) and shuffling groups (shuffle).
    dither_s, smooth_s, n_dims :
        Options of :func:`dither_surrogate`, :func:`poisson_surrogate` and
        :func:`continuous_surrogates`.
    rng : int or Generator, optional
    n_jobs : int
        Parallel workers (joblib) for the spike-level kinds; streams come from
        ``SeedSequence.spawn`` so the result does not depend on ``n_jobs``.

    Returns
    -------
    dict of str to list
        Recordings for ``poisson``, ``dither``, ``shuffle``; BinnedCounts for
        ``continuous``.

    Raises
    ------
    InputError
        Unknown kind, bad ``n``, mismatched recording and counts.
    """
    kinds = [kinds] if isinstance(kinds, str) else list(kinds)
    for k in kinds:
        if k not in NULL_KINDS:
            raise InputError(f"nulls: unknown null surrogate {k!r}; expected any of "
                             f"{list(NULL_KINDS)}")
    n = check_int("n", n, low=1)
    n_jobs = check_int("n_jobs", n_jobs, low=1)
    _check_binned(binned)
    streams = spawn_streams(rng, len(kinds))
    opts = {"condition": condition, "dither_s": dither_s, "smooth_s": smooth_s}
    out = {}
    for kind, stream in zip(kinds, streams):
        if kind == "continuous":
            out[kind] = continuous_surrogates(binned, n, n_dims=n_dims, condition=condition,
                                              rng=np.random.default_rng(stream))
            continue
        _check_pair(recording, binned)
        seeds = stream.spawn(n)
        if n_jobs == 1:
            out[kind] = [_one_null(kind, recording, binned, s, opts) for s in seeds]
        else:
            from joblib import Parallel, delayed

            out[kind] = Parallel(n_jobs=n_jobs)(
                delayed(_one_null)(kind, recording, binned, s, opts) for s in seeds)
    return out


# --------------------------------------------------------------------------- binning
def bin_like(recording, like) -> BinnedCounts:
    """Bin a surrogate recording exactly like the data's counts ``like``.

    Same bin size, same analysis windows (window and alignment column of ``like``,
    evaluated on the surrogate's trials table), same trials (rows
    ``like.trial_index``, or the first ``like.n_trials`` rows when the surrogate
    holds only the analysed trials), the same number of bins per trial and the same
    units, selected by id, in the same order.

    Parameters
    ----------
    recording : Recording
        A surrogate (or the data itself: the result then equals ``like``).
    like : BinnedCounts
        The data's counts.

    Returns
    -------
    BinnedCounts
        ``window_start`` holds the surrogate's own window starts and ``unit_index`` the
        units' positions in ``recording`` (a surrogate may hold only the data's kept
        units); trial index, labels, window and alignment are the data's.

    Raises
    ------
    InputError
        A unit of the data is missing, the surrogate lacks trials, or one of its
        analysis windows is shorter than the data's.
    """
    _check_recording(recording)
    _check_binned(like, "like")
    pos = {u: i for i, u in enumerate(recording.unit_ids)}
    missing = [u for u in like.unit_ids if u not in pos]
    if missing:
        raise InputError(f"{recording.source}: unit {missing[0]!r} of the data is missing "
                         f"from the surrogate ({len(missing)} missing); expected the data's "
                         "unit ids")
    idx = [pos[u] for u in like.unit_ids]
    bin_size = like.bin_size
    n_valid = np.asarray(like.n_valid, dtype=np.int64)
    if recording.trials is None or recording.n_trials == 0:
        start = np.asarray(like.window_start, dtype=np.float64)
        avail = np.full(like.n_trials, np.inf)
    else:
        n_rows = recording.n_trials
        if like.pseudo_trials:
            rows = np.arange(like.n_trials)
            if n_rows < like.n_trials:
                raise InputError(f"{recording.source}: has {n_rows} trials; expected at "
                                 f"least {like.n_trials} like the data")
            st = np.asarray(recording.trials["start"], dtype=np.float64)
            sp = np.asarray(recording.trials["stop"], dtype=np.float64)
            start, avail = st[rows], sp[rows] - st[rows]
        else:
            rows = np.asarray(like.trial_index, dtype=np.int64)
            if n_rows <= int(rows.max()) and n_rows == like.n_trials:
                rows = np.arange(like.n_trials)
            elif n_rows <= int(rows.max()):
                raise InputError(f"{recording.source}: has {n_rows} trials; the data's "
                                 f"counts use trial row {int(rows.max())}")
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", InputWarning)
                ws, we, widx, _ = analysis_windows(recording, window=like.window,
                                                   align=like.align)
            where = {int(r): j for j, r in enumerate(widx)}
            lost = [int(r) for r in rows if int(r) not in where]
            if lost:
                raise InputError(f"{recording.source}: trial {lost[0]} has no analysis "
                                 f"window for window={like.window}, align={like.align!r}")
            j = np.array([where[int(r)] for r in rows], dtype=np.int64)
            start, avail = ws[j], we[j] - ws[j]
    short = np.flatnonzero(np.floor(avail / bin_size + 1e-9) < n_valid)
    if short.size:
        i = int(short[0])
        raise InputError(f"{recording.source}: trial {i} has an analysis window of "
                         f"{avail[i]:g} s; expected at least {n_valid[i] * bin_size:g} s "
                         "like the data")
    windows = Recording(unit_ids=[like.unit_ids[k] for k in range(len(idx))],
                        spike_times=[recording.spike_times[i] for i in idx],
                        trials={"start": start, "stop": start + n_valid * bin_size},
                        metadata={"source": recording.source})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        out = bin_spikes(windows, bin_size=bin_size, drop_silent=False)
    counts = out.counts
    if counts.shape[1] < like.n_bins:
        pad = np.zeros((counts.shape[0], like.n_bins - counts.shape[1], counts.shape[2]),
                       dtype=counts.dtype)
        counts = np.concatenate([counts, pad], axis=1)
    if not np.array_equal(out.n_valid, n_valid):   # guards the rounding of the windows
        raise InputError(f"{recording.source}: binning gave {out.n_valid.tolist()[:5]}... "
                         f"bins per trial; expected {n_valid.tolist()[:5]}...")
    return BinnedCounts(counts=counts, n_valid=n_valid.copy(), bin_size=bin_size,
                        unit_ids=list(like.unit_ids),
                        unit_index=np.asarray(idx, dtype=np.int64),
                        trial_index=np.asarray(like.trial_index).copy(),
                        window_start=np.asarray(start, dtype=np.float64).copy(),
                        labels={k: np.asarray(v).copy() for k, v in like.labels.items()},
                        window=like.window, align=like.align,
                        pseudo_trials=like.pseudo_trials)
