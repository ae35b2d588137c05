"""Binning against a direct numpy.histogram reference."""

import numpy as np
import pytest

from attractorfit import InputError, Recording, bin_spikes
from attractorfit.errors import InputWarning
from attractorfit.synthetic import switching_recording


def test_counts_match_numpy_histogram():
    rec, _ = switching_recording(n_units=6, n_states=2, n_trials=5, rng=0)
    b = bin_spikes(rec, bin_size=0.05)
    assert b.counts.shape == (5, 60, 6)
    assert b.counts.dtype == np.uint8
    for i in range(5):
        t0 = rec.trials["start"][i]
        edges = t0 + np.arange(61) * 0.05
        for u in range(6):
            ref = np.histogram(rec.spike_times[u], bins=edges)[0]
            # numpy.histogram's last bin is closed; ours are half-open: compare the
            # first 59 bins exactly and the total within one spike
            np.testing.assert_array_equal(b.counts[i, :59, u], ref[:59])
            assert abs(int(b.counts[i, 59, u]) - int(ref[59])) <= 1


def test_window_relative_to_column_and_labels():
    rec, _ = switching_recording(n_units=4, n_states=2, n_trials=4, rng=1,
                                 labels={"item": np.array(["a", "b", "a", "b"])})
    rec.trials["delay_start"] = rec.trials["start"] + 0.5
    b = bin_spikes(rec, bin_size=0.1, window=(0.0, 2.0), align="delay_start")
    assert b.n_bins == 20
    np.testing.assert_allclose(b.window_start, rec.trials["start"] + 0.5)
    np.testing.assert_array_equal(b.labels["item"], ["a", "b", "a", "b"])
    with pytest.raises(InputError, match="align column 'cue'"):
        bin_spikes(rec, align="cue")


def test_variable_trial_lengths_padded():
    times = np.array([0.05, 0.15, 1.05, 1.25, 1.35, 1.45])
    rec = Recording.from_arrays(times, ["a", "b", "a", "b", "a", "b"],
                                trials={"start": [0.0, 1.0], "stop": [0.2, 1.5]})
    b = bin_spikes(rec, bin_size=0.1)
    np.testing.assert_array_equal(b.n_valid, [2, 5])
    assert [s.shape[0] for s in b.sequences()] == [2, 5]
    assert b.stacked().shape == (7, 2)


def test_no_trials_gives_windows_with_warning():
    rec = Recording.from_arrays(np.linspace(0, 30, 300), ["a", "b"] * 150)
    with pytest.warns(InputWarning, match="continuous"):
        b = bin_spikes(rec, bin_size=0.5, continuous_window_s=10.0)
    assert b.pseudo_trials and b.n_trials == 3


def test_bad_options():
    rec, _ = switching_recording(n_units=3, n_states=1, n_trials=2, rng=2)
    with pytest.raises(InputError, match="bin_size"):
        bin_spikes(rec, bin_size=0)
    with pytest.raises(InputError, match="longer than every analysis window"):
        bin_spikes(rec, bin_size=10.0)
    with pytest.raises(InputError, match="min_rate_hz"):
        bin_spikes(rec, min_rate_hz=1e6)


def test_large_counts_upcast():
    times = np.concatenate([np.linspace(0, 0.999, 600), [0.5]])
    rec = Recording.from_arrays(times, ["a"] * 600 + ["b"], trials={"start": [0.0],
                                                                    "stop": [1.0]})
    b = bin_spikes(rec, bin_size=1.0)
    assert b.counts.dtype == np.uint16 and int(b.counts[0, 0, 0]) == 600


def test_transform_sqrt_and_smooth():
    rec, _ = switching_recording(n_units=3, n_states=1, n_trials=2, rng=3)
    b = bin_spikes(rec, bin_size=0.05)
    raw = b.sequences(dtype=float)
    sq = b.transformed(sqrt=True)
    np.testing.assert_allclose(sq[0], np.sqrt(raw[0]))
    sm = b.transformed(sqrt=False, smooth_s=0.1)
    # Gaussian smoothing with mode 'nearest' preserves the mean only approximately;
    # it must reduce the variance of each unit's counts
    assert np.all(sm[0].var(axis=0) <= raw[0].var(axis=0) + 1e-12)
