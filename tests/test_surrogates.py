"""Surrogates: textbook statistics of the Poisson null, dither and shuffle invariants,
binning like the data, determinism and input errors."""

import numpy as np
import pytest

from attractorfit.binning import BinnedCounts, bin_spikes
from attractorfit.errors import InputError
from attractorfit.recording import Recording
from attractorfit.stats import fano_factor, isi_cv
from attractorfit.surrogates import (bin_like, condition_psth, continuous_surrogates,
                                     dither_surrogate, network_surrogates, null_surrogates,
                                     poisson_surrogate, shuffle_surrogate)
from attractorfit.synthetic import switching_recording


@pytest.fixture(scope="module")
def steady():
    """One state, regular (gamma order 4, CV 0.5) spiking: 12 units, 60 trials of 3 s."""
    rec, _ = switching_recording(n_units=12, n_states=1, n_trials=60, trial_duration=3.0,
                                 rate_range=(10.0, 25.0), gamma_order=4.0, rng=11)
    return rec, bin_spikes(rec, bin_size=0.02)


@pytest.fixture(scope="module")
def switching():
    """Three states with a condition label: 10 units, 24 trials of 2 s."""
    labels = {"item": np.repeat(["a", "b", "c"], 8)}
    rec, _ = switching_recording(n_units=10, n_states=3, n_trials=24, trial_duration=2.0,
                                 labels=labels, rng=5)
    return rec, bin_spikes(rec, bin_size=0.02)


def _windows(binned):
    start = np.asarray(binned.window_start)
    return np.column_stack([start, start + binned.n_valid * binned.bin_size])


# ----------------------------------------------------------------------------- poisson
def test_poisson_surrogate_has_cv_and_fano_near_one(steady):
    rec, b = steady
    sur = poisson_surrogate(rec, b, rng=1)
    w = _windows(b)
    cv_data = np.array([isi_cv(t, windows=w) for t in rec.spike_times])
    cv_sur = np.array([isi_cv(t, windows=w) for t in sur.spike_times])
    # Poisson process: ISI CV = 1 (Dayan & Abbott 2001, ch. 1). Per unit there are
    # >= 1500 intervals; by the delta method the s.e. of the CV of exponential
    # intervals is 1/sqrt(n) <= 0.026, so 0.12 per unit is about 5 s.e. (12 units);
    # the mean over 12 units is held to 0.04 (PSTH noise adds a little rate
    # modulation, ~ +0.01 measured over 5 seeds).
    assert np.all(np.abs(cv_sur - 1) < 0.12)
    assert abs(cv_sur.mean() - 1) < 0.04
    assert np.all(cv_data < 0.7)          # gamma order 4: CV 0.5; the surrogate changed it
    # Fano factor of whole-trial counts across trials = 1 for a Poisson process with a
    # trial-locked rate (textbook). s.e. of a variance ratio over 60 trials is
    # sqrt(2/59) = 0.18 per unit, 0.053 for the mean of 12 units: tolerance 0.16 (3 s.e.)
    counts = bin_like(sur, b).counts.sum(axis=1)            # trials x units
    ff = np.array([fano_factor(counts[:, u]) for u in range(b.n_units)])
    assert abs(ff.mean() - 1) < 0.16


def test_poisson_surrogate_keeps_rates_and_structure(switching):
    rec, b = switching
    sur = poisson_surrogate(rec, b, condition="item", rng=2)
    assert sur.unit_ids == b.unit_ids
    assert set(sur.trials) == set(rec.trials)
    np.testing.assert_array_equal(sur.trials["item"], rec.trials["item"])
    n_data = b.counts.sum(axis=(0, 1)).astype(float)
    n_sur = bin_like(sur, b).counts.sum(axis=(0, 1)).astype(float)
    # spike totals are Poisson around the data's: within 4 s.d. (sqrt of the count)
    assert np.all(np.abs(n_sur - n_data) < 4 * np.sqrt(n_data) + 1)
    # every spike sits inside an analysis window
    w = _windows(b)
    for t in sur.spike_times:
        k = np.searchsorted(w[:, 0], t, side="right") - 1
        assert np.all((k >= 0) & (t < w[k, 1]))


def test_condition_psth_of_a_constant_rate_is_flat():
    # A constant-rate train in every trial: the coverage-normalised smoothed PSTH is
    # that rate everywhere, including the window edges (no edge bias).
    trials = {"start": np.array([0.0, 2.0]), "stop": np.array([1.0, 3.0])}
    grid = np.arange(0.0, 1.0, 0.01) + 0.005
    times = np.concatenate([grid, grid + 2.0, grid, grid + 2.0])
    units = np.repeat([0, 1], 200)
    rec = Recording.from_arrays(times, units, trials=trials)
    b = bin_spikes(rec, bin_size=0.1)
    rate, groups, levels = condition_psth(rec, b, smooth_s=0.05, resolution_s=0.01)
    assert levels == ["all"] and rate.shape == (1, 100, 2)
    np.testing.assert_allclose(rate, 100.0, rtol=1e-9)


# ----------------------------------------------------------------------------- dither
def test_dither_keeps_counts_and_moves_no_spike_beyond_d(switching):
    rec, b = switching
    d = 0.025
    sur = dither_surrogate(rec, b, dither_s=d, rng=3)
    moved = []
    for a, s in zip(rec.spike_times, sur.spike_times):
        assert s.size == a.size                              # exact count per unit
        assert np.all(np.diff(s) >= 0)
        # sorted sequences of points each moved by <= d differ by <= d element-wise
        delta = s - a
        assert np.max(np.abs(delta)) <= d + 1e-12
        moved.append(np.abs(delta))
    moved = np.concatenate(moved)
    assert moved.max() > 0.5 * d and np.mean(moved > 0) > 0.99
    # trials keep their spike counts (the dither interval is cut at trial edges)
    for t0, t1 in zip(rec.trials["start"], rec.trials["stop"]):
        for a, s in zip(rec.spike_times, sur.spike_times):
            assert np.sum((a >= t0) & (a < t1)) == np.sum((s >= t0) & (s < t1))


# ----------------------------------------------------------------------------- shuffle
def test_shuffle_keeps_each_units_condition_psth_exactly(switching):
    rec, b = switching
    sur = shuffle_surrogate(rec, b, condition="item", rng=4)
    sb = bin_like(sur, b)
    items = b.labels["item"]
    changed = 0
    for lev in np.unique(items):
        m = items == lev
        # PSTH = sum over the level's trials, bin by bin, unit by unit: unchanged
        np.testing.assert_array_equal(sb.counts[m].sum(axis=0), b.counts[m].sum(axis=0))
        # each unit's per-trial totals are a permutation of the data's
        for u in range(b.n_units):
            a = b.counts[m, :, u].sum(axis=1)
            s = sb.counts[m, :, u].sum(axis=1)
            np.testing.assert_array_equal(np.sort(a), np.sort(s))
            changed += int(np.any(a != s))
    assert changed > b.n_units            # trains really moved between trials


def test_shuffle_destroys_within_trial_coordination():
    # All units share a trial-wise gain (x 0.5 or x 2): their trial counts correlate
    # strongly; shuffling each unit's trains across trials removes that.
    rng = np.random.default_rng(0)
    n_trials, n_units = 80, 8
    gain = rng.choice([0.5, 2.0], size=n_trials)
    times, units = [], []
    for k in range(n_trials):
        for u in range(n_units):
            n = rng.poisson(20 * gain[k])
            times.append(k * 2.0 + rng.random(n))
            units.append(np.full(n, u))
    trials = {"start": np.arange(n_trials) * 2.0, "stop": np.arange(n_trials) * 2.0 + 1.0}
    rec = Recording.from_arrays(np.concatenate(times), np.concatenate(units), trials=trials)
    b = bin_spikes(rec, bin_size=0.1)
    sb = bin_like(shuffle_surrogate(rec, b, rng=1), b)

    def mean_corr(x):
        c = np.corrcoef(x.counts.sum(axis=1).T.astype(float))
        return c[np.triu_indices(n_units, 1)].mean()

    assert mean_corr(b) > 0.6
    # independent permutations: pair correlations ~ N(0, 1/80); mean of 28 pairs
    assert abs(mean_corr(sb)) < 0.15


# ----------------------------------------------------------------------------- continuous
def test_continuous_surrogates_are_binned_like_the_data(switching):
    _, b = switching
    out = continuous_surrogates(b, 2, n_dims=2, rng=5)
    assert len(out) == 2
    for s in out:
        assert isinstance(s, BinnedCounts)
        assert s.unit_ids == b.unit_ids and s.bin_size == b.bin_size
        np.testing.assert_array_equal(s.n_valid, b.n_valid)
        np.testing.assert_array_equal(s.unit_index, b.unit_index)
    assert not np.array_equal(out[0].counts, out[1].counts)


# ----------------------------------------------------------------------------- bin_like
def test_bin_like_reproduces_the_data_binning(switching):
    rec, b = switching
    again = bin_like(rec, b)
    np.testing.assert_array_equal(again.counts, b.counts)
    np.testing.assert_array_equal(again.n_valid, b.n_valid)
    # a sub-window aligned on a column, and a subset of trials and units
    trials = dict(rec.trials)
    trials["cue"] = rec.trials["start"] + 0.5
    rec2 = Recording(rec.unit_ids, rec.spike_times, trials=trials)
    b2 = bin_spikes(rec2, bin_size=0.05, window=(0.1, 1.2), align="cue").subset_trials(
        np.arange(3, 20, 2))
    b2 = BinnedCounts(counts=b2.counts[:, :, 2:7], n_valid=b2.n_valid, bin_size=b2.bin_size,
                      unit_ids=b2.unit_ids[2:7], unit_index=b2.unit_index[2:7],
                      trial_index=b2.trial_index, window_start=b2.window_start,
                      labels=b2.labels, window=b2.window, align=b2.align)
    np.testing.assert_array_equal(bin_like(rec2, b2).counts, b2.counts)


def test_bin_like_errors(switching):
    rec, b = switching
    fewer = rec.select_units(np.arange(1, rec.n_units))
    with pytest.raises(InputError, match="unit '0' of the data is missing"):
        bin_like(fewer, b)
    short = {k: np.array(v) for k, v in rec.trials.items()}
    short["stop"] = short["start"] + 1.0
    with pytest.raises(InputError, match="trial 0 has an analysis window of 1 s"):
        bin_like(Recording(rec.unit_ids, rec.spike_times, trials=short), b)
    few = {k: np.array(v)[:3] for k, v in rec.trials.items()}
    with pytest.raises(InputError, match="has 3 trials"):
        bin_like(Recording(rec.unit_ids, rec.spike_times, trials=few), b)
    with pytest.raises(InputError, match="like: expected a BinnedCounts"):
        bin_like(rec, rec)
    with pytest.raises(InputError, match="recording: expected a Recording"):
        bin_like(b, b)


# ----------------------------------------------------------------------------- determinism
class _StandIn:
    """A tiny object with simulate_recording, for the plumbing of network_surrogates."""

    def simulate_recording(self, *, rng=None):
        rng = np.random.default_rng(rng)
        t = np.sort(rng.random(5))
        return Recording(["0", "1"], [t, t + 1.0], trials={"start": np.array([0.0]),
                                                             "stop": np.array([3.0])})


def test_network_surrogates_streams_do_not_depend_on_jobs():
    a = network_surrogates(_StandIn(), 4, rng=7, n_jobs=1)
    b = network_surrogates(_StandIn(), 4, rng=7, n_jobs=2)
    c = network_surrogates(_StandIn(), 4, rng=8)
    for x, y in zip(a, b):
        np.testing.assert_array_equal(x.spike_times[0], y.spike_times[0])
    assert not np.array_equal(a[0].spike_times[0], a[1].spike_times[0])   # independent
    assert not np.array_equal(a[0].spike_times[0], c[0].spike_times[0])


def test_null_surrogates_deterministic_and_parallel_equal(switching):
    rec, b = switching
    kinds = ["poisson", "dither", "shuffle"]
    a = null_surrogates(rec, b, kinds, 2, condition="item", rng=9)
    c = null_surrogates(rec, b, kinds, 2, condition="item", rng=9, n_jobs=2)
    for k in kinds:
        assert len(a[k]) == 2
        for x, y in zip(a[k], c[k]):
            for s, t in zip(x.spike_times, y.spike_times):
                np.testing.assert_array_equal(s, t)
        assert not np.array_equal(a[k][0].spike_times[0], a[k][1].spike_times[0])
    one = poisson_surrogate(rec, b, rng=3)
    two = poisson_surrogate(rec, b, rng=3)
    np.testing.assert_array_equal(one.spike_times[4], two.spike_times[4])


# ----------------------------------------------------------------------------- errors
def test_surrogate_input_errors(switching):
    rec, b = switching
    with pytest.raises(InputError, match="nulls: unknown null surrogate 'jitter'"):
        null_surrogates(rec, b, ["shuffle", "jitter"], 2)
    with pytest.raises(InputError, match="n: expected a whole number >= 1"):
        null_surrogates(rec, b, "shuffle", 0)
    with pytest.raises(InputError, match="network_fit: expected a fitted network"):
        network_surrogates(object(), 2)

    class Bad:
        def simulate_recording(self, *, rng=None):
            return "spikes"

    with pytest.raises(InputError, match="simulate_recording returned str"):
        network_surrogates(Bad(), 1)
    with pytest.raises(InputError, match="condition: label column 'side' not found"):
        shuffle_surrogate(rec, b, condition="side")
    with pytest.raises(InputError, match="dither_s: expected a finite number > 0"):
        dither_surrogate(rec, b, dither_s=0.0)
    other = rec.select_units(np.arange(2, rec.n_units))
    with pytest.raises(InputError, match="binned: its units"):
        poisson_surrogate(other, b)
    with pytest.raises(InputError, match="binned: expected a BinnedCounts"):
        continuous_surrogates(rec, 2)
    with pytest.raises(InputError, match="resolution_s: expected a finite number > 0"):
        poisson_surrogate(rec, b, resolution_s=-1.0)
