"""Recording construction and validation (our own plumbing)."""

import numpy as np
import pytest

from attractorfit import InputError, Recording
from attractorfit.errors import InputWarning


def _rec(**kw):
    times = np.array([0.5, 0.1, 1.2, 0.3, 2.5, 2.6])
    units = np.array(["a", "b", "a", "b", "c", "a"])
    return Recording.from_arrays(times, units, **kw)


def test_from_arrays_groups_and_sorts():
    rec = _rec()
    assert rec.unit_ids == ["a", "b", "c"]
    np.testing.assert_array_equal(rec.spike_times[0], [0.5, 1.2, 2.6])
    np.testing.assert_array_equal(rec.spike_times[1], [0.1, 0.3])
    assert rec.n_spikes == 6


def test_numeric_unit_ids_sort_naturally():
    rec = Recording.from_arrays([1.0, 2.0, 3.0], [10, 2, 1])
    assert rec.unit_ids == ["1", "2", "10"]


@pytest.mark.parametrize("bad, match", [
    (np.nan, "not a finite number of seconds"),
    (np.inf, "not a finite number of seconds"),
    (-1.0, "is negative"),
])
def test_bad_times(bad, match):
    with pytest.raises(InputError, match=match):
        Recording.from_arrays([0.1, bad, 0.3], ["a", "b", "b"])


def test_too_few_units_and_no_spikes():
    with pytest.raises(InputError, match="expected at least 2"):
        Recording.from_arrays([0.1, 0.2], ["a", "a"])
    with pytest.raises(InputError, match="no spikes"):
        Recording.from_arrays([], [], unit_ids=["a", "b"])


def test_length_mismatch_and_duplicate_ids():
    with pytest.raises(InputError, match="one unit label per spike"):
        Recording.from_arrays([0.1, 0.2], ["a"])
    with pytest.raises(InputError, match="appears more than once"):
        Recording.from_arrays([0.1, 0.2], ["a", "b"], unit_ids=["a", "b", "a"])


def test_trials_checked_and_sorted():
    with pytest.raises(InputError, match="not after start"):
        _rec(trials={"start": [0.0, 2.0], "stop": [1.0, 2.0]})
    with pytest.raises(InputError, match="overlap"):
        _rec(trials={"start": [0.0, 0.5], "stop": [1.0, 2.0]})
    with pytest.raises(InputError, match="lacks column"):
        _rec(trials={"start": [0.0]})
    with pytest.warns(InputWarning, match="not in order"):
        rec = _rec(trials={"start": [2.0, 0.0], "stop": [3.0, 1.0], "item": ["x", "y"]})
    np.testing.assert_array_equal(rec.trials["start"], [0.0, 2.0])
    np.testing.assert_array_equal(rec.trials["item"], ["y", "x"])


def test_quality_warnings():
    t = np.concatenate([np.arange(100) * 1.0, np.arange(100) * 1.0 + 0.0005])
    rec = Recording.from_arrays(np.concatenate([t, [5.0, 6.0]]),
                                ["a"] * 200 + ["b", "b"])
    text = " ".join(rec.warnings)
    assert "fewer than 20 spikes" in text
    assert "1.5 ms" in text
    ms = Recording.from_arrays(np.arange(0, 60000, 50.0), ["a", "b"] * 600)
    assert any("milliseconds" in w for w in ms.warnings)


def test_neo_round_trip():
    rec = _rec(trials={"start": [0.0, 2.0], "stop": [1.5, 3.0], "item": ["x", "y"]})
    back = Recording.from_neo(rec.to_neo())
    assert back.unit_ids == rec.unit_ids
    for a, b in zip(rec.spike_times, back.spike_times):
        np.testing.assert_allclose(a, b)
    np.testing.assert_allclose(back.trials["stop"], rec.trials["stop"])
    np.testing.assert_array_equal(back.trials["item"], ["x", "y"])


def test_trial_spikes_relative():
    rec = _rec(trials={"start": [0.0, 2.0], "stop": [1.0, 3.0]})
    sp = rec.trial_spikes(1)
    np.testing.assert_allclose(sp[2], [0.5])
    np.testing.assert_allclose(sp[0], [0.6])
