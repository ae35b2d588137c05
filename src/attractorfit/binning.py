"""Analysis windows, spike counts in bins, transforms and unit selection.

Stage 2 of the flow (io -> **binning** -> latent/states -> ...). Takes a
:class:`~attractorfit.recording.Recording`, returns :class:`BinnedCounts`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from attractorfit._validation import check_nonnegative, check_positive, warn_input
from attractorfit.errors import InputError
from attractorfit.recording import Recording

__all__ = ["BinnedCounts", "bin_spikes", "analysis_windows", "trial_folds"]


def trial_folds(n_trials: int, n_folds: int, rng) -> list:
    """Random partition of trial indices into ``n_folds`` test sets (sorted arrays).

    One permutation from ``rng``; fold f holds every n_folds-th trial of it from f on.
    Used wherever cross-validation runs over whole trials (latent space, state count).
    """
    order = rng.permutation(n_trials)
    return [np.sort(order[f::n_folds]) for f in range(n_folds)]


@dataclass
class BinnedCounts:
    """Spike counts of every kept unit in every bin of every trial's analysis window.

    Attributes
    ----------
    counts : ndarray, shape (n_trials, n_bins, n_units), unsigned integer
        Counts; trials shorter than the longest are padded with zeros beyond
        ``n_valid[i]`` bins. The dtype is the smallest unsigned type that holds them.
    n_valid : ndarray of int, shape (n_trials,)
        Number of real bins in each trial.
    bin_size : float
        Bin width in seconds.
    unit_ids : list of str
        Ids of the kept units (columns of ``counts``).
    unit_index : ndarray of int
        Index of each kept unit in the source recording.
    trial_index : ndarray of int
        Row of the recording's (start-sorted) trials table for each trial; for a
        recording without trials, the index of the continuous window.
    window_start : ndarray of float, shape (n_trials,)
        Absolute time (s) of the left edge of each trial's first bin.
    labels : dict of str to ndarray
        Trial label columns for the kept trials.
    window : tuple of float
        The analysis window (start offset, stop offset) in seconds relative to
        ``align`` (``None`` offsets mean the trial's own start/stop).
    align : str or None
        Trials-table column the window is relative to (``None``: trial start).
    pseudo_trials : bool
        True when the recording had no trials and fixed-length windows stand in.
    left_out : dict of str to list
        Units of the recording left out, by reason: ``selection`` (not matched by the
        ``units`` selection), ``silent`` (no spike in the windows), ``below_min_rate``;
        only reasons that left a unit out appear.
    """

    counts: np.ndarray
    n_valid: np.ndarray
    bin_size: float
    unit_ids: list
    unit_index: np.ndarray
    trial_index: np.ndarray
    window_start: np.ndarray
    labels: dict = field(default_factory=dict)
    window: tuple = (None, None)
    align: str | None = None
    pseudo_trials: bool = False
    left_out: dict = field(default_factory=dict)

    @property
    def n_trials(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_bins(self) -> int:
        return int(self.counts.shape[1])

    @property
    def n_units(self) -> int:
        return int(self.counts.shape[2])

    @property
    def total_bins(self) -> int:
        return int(np.sum(self.n_valid))

    def bin_times(self) -> np.ndarray:
        """Left edges of the bins in seconds from the start of the analysis window."""
        return np.arange(self.n_bins) * self.bin_size

    def sequences(self, *, dtype=None) -> list:
        """List of per-trial count matrices (n_valid[i] x n_units), views where possible."""
        out = []
        for i in range(self.n_trials):
            x = self.counts[i, : int(self.n_valid[i])]
            out.append(x if dtype is None else x.astype(dtype))
        return out

    def stacked(self, *, dtype=np.float64) -> np.ndarray:
        """All valid bins of all trials stacked: (total_bins x n_units)."""
        return np.concatenate(self.sequences(dtype=dtype), axis=0)

    def mean_rate_hz(self) -> np.ndarray:
        """Mean rate of each kept unit (Hz) over all valid bins."""
        total = np.zeros(self.n_units)
        for x in self.sequences():
            total += x.sum(axis=0, dtype=np.float64)
        return total / (self.total_bins * self.bin_size)

    def transformed(self, *, sqrt: bool = True, smooth_s: float = 0.0) -> list:
        """Per-trial float arrays: square-root counts and optional Gaussian smoothing.

        Parameters
        ----------
        sqrt : bool
            Apply the square-root (variance-stabilising) transform.
        smooth_s : float
            Standard deviation of a Gaussian kernel in seconds (0: none). Smoothing
            stays within each trial.
        """
        from scipy.ndimage import gaussian_filter1d

        smooth_s = check_nonnegative("smooth_s", smooth_s)
        out = []
        for x in self.sequences(dtype=np.float64):
            y = np.sqrt(x) if sqrt else x
            if smooth_s > 0 and len(y) > 1:
                y = gaussian_filter1d(y, smooth_s / self.bin_size, axis=0, mode="nearest")
            out.append(y)
        return out

    def subset_trials(self, keep) -> "BinnedCounts":
        """A new BinnedCounts with only the trials at indices (or mask) ``keep``."""
        idx = np.arange(self.n_trials)[np.asarray(keep)]
        return BinnedCounts(
            counts=self.counts[idx], n_valid=self.n_valid[idx], bin_size=self.bin_size,
            unit_ids=list(self.unit_ids), unit_index=self.unit_index.copy(),
            trial_index=self.trial_index[idx], window_start=self.window_start[idx],
            labels={k: v[idx] for k, v in self.labels.items()}, window=self.window,
            align=self.align, pseudo_trials=self.pseudo_trials,
            left_out={k: list(v) for k, v in self.left_out.items()})


def analysis_windows(recording: Recording, *, window=(None, None), align=None,
                     continuous_window_s: float = 10.0):
    """Absolute (start, stop) of each trial's analysis window.

    Parameters
    ----------
    recording : Recording
    window : tuple (start_offset, stop_offset)
        Offsets in seconds relative to ``align``. ``None`` as the start offset means
        the trial start; ``None`` as the stop offset means the trial stop.
    align : str, optional
        Trials-table column holding the alignment time of each trial (seconds,
        absolute), e.g. ``"delay_start"``. Default: the trial start.
    continuous_window_s : float
        Length of the fixed windows that stand in for trials when the recording has
        none (a warning says so).

    Returns
    -------
    start, stop : ndarray of float
    trial_index : ndarray of int
    pseudo : bool
        True when fixed windows stood in for trials.
    """
    src = recording.source
    if recording.trials is None or recording.n_trials == 0:
        length = check_positive("continuous_window_s", continuous_window_s)
        t0, t1 = recording.t_start, recording.t_stop
        n = int(np.floor((t1 - t0) / length + 1e-9))
        if n < 2:
            n, length = 2, (t1 - t0) / 2.0
        warn_input(f"{src}: no trials table; analysing the recording as one continuous "
                   f"epoch cut into {n} windows of {length:g} s that stand in for trials")
        start = t0 + np.arange(n) * length
        return start, start + length, np.arange(n), True
    trials = recording.trials
    if align is None:
        ref = trials["start"]
    else:
        if align not in trials:
            raise InputError(f"{src}: align column {align!r} not in the trials table; "
                             f"available columns: {sorted(trials)}")
        try:
            ref = np.asarray(trials[align], dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(f"{src}: align column {align!r} does not hold times in "
                             "seconds") from None
    lo, hi = window
    start = trials["start"].astype(float) if lo is None else ref + float(lo)
    stop = trials["stop"].astype(float) if hi is None else ref + float(hi)
    keep = np.isfinite(start) & np.isfinite(stop) & (stop > start)
    if not keep.all():
        warn_input(f"{src}: {int((~keep).sum())} trial(s) have no analysis window "
                   f"(missing {align!r} or empty window); left out")
    idx = np.flatnonzero(keep)
    if idx.size == 0:
        raise InputError(f"{src}: no trial has a non-empty analysis window for window="
                         f"{window}, align={align!r}")
    return start[idx], stop[idx], idx, False


def bin_spikes(recording: Recording, *, bin_size: float = 0.02, window=(None, None),
               align=None, min_rate_hz: float = 0.0, continuous_window_s: float = 10.0,
               drop_silent: bool = True, units=None) -> BinnedCounts:
    """Count spikes of each unit in bins of each trial's analysis window.

    Parameters
    ----------
    recording : Recording
        Validated recording.
    bin_size : float
        Bin width in seconds (default 20 ms).
    window : tuple (start_offset, stop_offset)
        Analysis window relative to ``align`` (see :func:`analysis_windows`).
    align : str, optional
        Trials-table column to align on (default: trial start).
    min_rate_hz : float
        Units whose mean rate inside the analysis windows is below this are dropped
        (with an InputWarning). Units without any spike inside the windows are always
        dropped (with an InputWarning), whatever ``min_rate_hz``: a unit that never
        fires has no rate for a state model to estimate. Dropped units are absent from
        ``unit_ids`` / ``unit_index`` and so from every later stage.
    drop_silent : bool
        ``False`` keeps units without spikes (used to bin surrogate recordings unit for
        unit like the data); the default drops them as described above.
    continuous_window_s : float
        Window length standing in for trials when there are none.
    units : dict of str to list, optional
        Unit selection by metadata (:meth:`Recording.match_units`, e.g.
        ``{"unit_type": ["SU"]}``): the other units are left out like silent ones
        (absent from ``unit_ids``, listed in ``left_out["selection"]``).

    Returns
    -------
    BinnedCounts

    Raises
    ------
    InputError
        Non-positive bin size, a window shorter than one bin, a selection naming a
        column or value the recording's units do not have, fewer than two units
        selected, or fewer than two units left after dropping silent and slow units.

    Notes
    -----
    Memory is one unsigned-integer array trials x bins x units (1 byte per count when
    every count is below 256): 500 units over 2 hours in 20 ms bins take 180 MB.
    Bins are half-open ``[t, t + bin_size)``; a trailing partial bin is dropped.
    """
    bin_size = check_positive("bin_size", bin_size)
    min_rate_hz = check_nonnegative("min_rate_hz", min_rate_hz)
    selected = _selected_units(recording, units)
    start, stop, tidx, pseudo = analysis_windows(
        recording, window=window, align=align, continuous_window_s=continuous_window_s)
    n_valid = np.floor((stop - start) / bin_size + 1e-9).astype(np.int64)
    if n_valid.max() < 1:
        raise InputError(f"bin_size: {bin_size:g} s is longer than every analysis window "
                         f"(longest {float(np.max(stop - start)):g} s)")
    n_trials, n_bins, n_units = len(start), int(n_valid.max()), recording.n_units
    # flat bin index of each (trial, bin); windows are disjoint or may overlap, so
    # count per trial through searchsorted on each unit's sorted times.
    counts = np.zeros((n_trials, n_bins, n_units), dtype=np.uint8)
    offsets = np.arange(n_bins + 1) * bin_size
    for u, t in enumerate(recording.spike_times):
        if len(t) == 0:
            continue
        lo = np.searchsorted(t, start)
        hi = np.searchsorted(t, start + n_valid * bin_size)
        for i in np.flatnonzero(hi > lo):
            rel = t[lo[i]:hi[i]] - start[i]
            b = np.minimum((rel / bin_size).astype(np.int64), n_valid[i] - 1)
            c = np.bincount(b, minlength=n_bins)
            cmax = c.max()
            if cmax > np.iinfo(counts.dtype).max:
                counts = counts.astype(np.uint16 if cmax < 65536 else np.uint32)
            counts[i, :, u] = c
    del offsets
    labels = {}
    if not pseudo:
        labels = {c: recording.trials[c][tidx] for c in recording.label_columns}
    rate = counts.sum(axis=(0, 1), dtype=np.float64) / (n_valid.sum() * bin_size)
    silent = selected & ((rate == 0) if drop_silent else np.zeros(n_units, dtype=bool))
    slow = selected & ~silent & (rate < min_rate_hz)
    keep = selected & ~silent & ~slow
    later = "left out of the state model and of every later stage"
    if silent.any():
        first = recording.unit_ids[int(np.flatnonzero(silent)[0])]
        warn_input(f"{recording.source}: {int(silent.sum())} unit(s) have no spikes inside "
                   f"the analysis windows (first: {first!r}); {later}")
    if slow.any():
        i = int(np.flatnonzero(slow)[0])
        warn_input(f"{recording.source}: {int(slow.sum())} unit(s) fire below min_rate_hz = "
                   f"{min_rate_hz:g} Hz inside the analysis windows (first: "
                   f"{recording.unit_ids[i]!r}, {rate[i]:.3g} Hz); {later}")
    if keep.sum() < 2:
        what = "unit(s)" if selected.all() else "selected unit(s)"
        raise InputError(f"min_rate_hz: only {int(keep.sum())} of {int(selected.sum())} "
                         f"{what} fire inside the analysis windows at {min_rate_hz:g} Hz or "
                         f"more ({int(silent.sum())} without any spike there); expected at "
                         "least 2 units")
    unit_index = np.flatnonzero(keep)
    if not keep.all():
        counts = np.ascontiguousarray(counts[:, :, keep])
    return BinnedCounts(counts=counts, n_valid=n_valid, bin_size=bin_size,
                        unit_ids=[recording.unit_ids[i] for i in unit_index],
                        unit_index=unit_index, trial_index=np.asarray(tidx),
                        window_start=start, labels=labels, window=tuple(window),
                        align=align, pseudo_trials=pseudo,
                        left_out=_left_out(recording.unit_ids, ~selected, silent, slow))


def _selected_units(recording: Recording, units) -> np.ndarray:
    """Mask of the units a metadata selection keeps (all without one); two at least."""
    if not units:
        return np.ones(recording.n_units, dtype=bool)
    if not isinstance(units, dict):
        raise InputError(f"units: expected a dict {{column: [values]}}, got {units!r}")
    mask = recording.match_units(units)
    if mask.sum() < 2:
        rule = "; ".join(f"{c} in {v if isinstance(v, list) else [v]}"
                         for c, v in units.items())
        raise InputError(f"units.keep: {rule} keeps {int(mask.sum())} of "
                         f"{recording.n_units} units of {recording.source}; expected at "
                         "least 2")
    return mask


def _left_out(unit_ids, *masks) -> dict:
    names = ("selection", "silent", "below_min_rate")
    return {n: [unit_ids[i] for i in np.flatnonzero(m)] for n, m in zip(names, masks)
            if np.any(m)}
