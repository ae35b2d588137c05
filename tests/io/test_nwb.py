"""NWB reader: files written here with pynwb directly (not with our writer)."""

import datetime
import os

import numpy as np
import pytest
from io_helpers import folder_state

from attractorfit import load
from attractorfit.errors import InputError
from attractorfit.io import read_nwb

# _units_file writes its trials out of order on purpose (sorting is checked below)
pytestmark = pytest.mark.filterwarnings("ignore:.*trials were not in order")

START = datetime.datetime(2021, 3, 4, 5, 6, 7, tzinfo=datetime.timezone.utc)
TRAINS = [np.array([0.1, 0.4, 2.2]), np.array([0.3, 1.7]), np.array([0.05, 2.9, 3.3])]


def _nwb(**kw):
    from pynwb import NWBFile

    return NWBFile(session_description="test session", identifier="id-1",
                   session_start_time=START, **kw)


def _write(nwb, path):
    from pynwb import NWBHDF5IO

    with NWBHDF5IO(str(path), mode="w") as io:
        io.write(nwb)
    return path


def _units_file(path, *, names=None, obs_intervals=False, trials=True, epochs=False,
                extra_unit_column=None):
    nwb = _nwb()
    if names is not None:
        nwb.add_unit_column(name=names[0], description="unit name")
    if extra_unit_column:
        nwb.add_unit_column(name=extra_unit_column, description="quality")
    for k, t in enumerate(TRAINS):
        kw = {}
        if names is not None:
            kw[names[0]] = names[1][k]
        if obs_intervals:
            kw["obs_intervals"] = [[0.0, 4.0]]
        if extra_unit_column:
            kw[extra_unit_column] = "good"
        nwb.add_unit(spike_times=t, id=10 + k, **kw)
    if trials:
        nwb.add_trial_column(name="item", description="cued item")
        nwb.add_trial_column(name="rewarded", description="outcome")
        nwb.add_trial_column(name="reaction", description="s")
        nwb.add_trial_column(name="port", description="int")
        nwb.add_trial(start_time=2.0, stop_time=3.5, item="far", rewarded=False,
                      reaction=0.31, port=np.int64(3))
        nwb.add_trial(start_time=0.0, stop_time=1.5, item="near", rewarded=True,
                      reaction=0.25, port=np.int64(1))
    if epochs:
        nwb.add_epoch(start_time=0.0, stop_time=1.0, tags=["baseline", "dark"])
        nwb.add_epoch(start_time=1.0, stop_time=3.0, tags=["task"])
    return _write(nwb, path)


def test_units_and_trials_with_every_column(tmp_path):
    path = _units_file(tmp_path / "s.nwb")
    rec = load(path)
    assert rec.unit_ids == ["10", "11", "12"]  # table ids without a name column
    for a, b in zip(rec.spike_times, TRAINS):
        np.testing.assert_array_equal(a, b)
    t = rec.trials
    np.testing.assert_array_equal(t["start"], [0.0, 2.0])  # sorted by start
    np.testing.assert_array_equal(t["stop"], [1.5, 3.5])
    np.testing.assert_array_equal(t["item"], ["near", "far"])
    np.testing.assert_array_equal(t["rewarded"], [True, False])
    np.testing.assert_array_equal(t["reaction"], [0.25, 0.31])
    np.testing.assert_array_equal(t["port"], [1, 3])
    assert t["item"].dtype.kind == "U" and t["port"].dtype.kind == "i"
    assert rec.metadata["session_start_time"] == START.isoformat()
    assert rec.metadata["session_description"] == "test session"
    assert len(rec.provenance) == 1 and rec.provenance[0]["size"] == os.path.getsize(path)


@pytest.mark.parametrize("obs", [False, True])
def test_with_and_without_obs_intervals(tmp_path, obs):
    rec = read_nwb(_units_file(tmp_path / "s.nwb", obs_intervals=obs, trials=False))
    assert rec.n_units == 3 and rec.n_spikes == 8 and rec.trials is None


@pytest.mark.filterwarnings("ignore:An attribute 'name' already exists")
@pytest.mark.parametrize("column", ["unit_name", "name", "unit_id"])
def test_unit_names_from_a_name_column(tmp_path, column):
    path = _units_file(tmp_path / "s.nwb", names=(column, ["c", "a", "b"]), trials=False,
                       extra_unit_column="quality")
    rec = load(path)
    assert rec.unit_ids == ["a", "b", "c"]
    np.testing.assert_array_equal(rec.spike_times[2], TRAINS[0])  # 'c' was the first row


def test_unit_column_option_and_its_errors(tmp_path):
    path = _units_file(tmp_path / "s.nwb", names=("label_x", ["x", "y", "z"]), trials=False)
    assert load(path).unit_ids == ["10", "11", "12"]
    assert load(path, unit_column="label_x").unit_ids == ["x", "y", "z"]
    with pytest.raises(InputError, match="unit_column: the units table of s.nwb has no "
                                         "column 'nope'"):
        load(path, unit_column="nope")


def test_repeated_names_fall_back_to_table_ids(tmp_path):
    path = _units_file(tmp_path / "s.nwb", names=("unit_name", ["a", "a", "b"]),
                       trials=False)
    rec = load(path)
    assert rec.unit_ids == ["10", "11", "12"]
    assert any("repeated or empty names" in w for w in rec.warnings)


def test_epochs_are_the_fallback_for_trials(tmp_path):
    rec = load(_units_file(tmp_path / "s.nwb", trials=False, epochs=True))
    np.testing.assert_array_equal(rec.trials["start"], [0.0, 1.0])
    np.testing.assert_array_equal(rec.trials["tags"], ["baseline,dark", "task"])
    assert any("used the 2 epochs as trials" in w for w in rec.warnings)


def test_trials_table_wins_over_epochs(tmp_path):
    rec = load(_units_file(tmp_path / "s.nwb", trials=True, epochs=True))
    assert "item" in rec.trials and "tags" not in rec.trials


def test_units_table_inside_a_processing_module(tmp_path):
    from pynwb.misc import Units

    nwb = _nwb()
    units = Units(name="sorted_units")
    for t in TRAINS:
        units.add_unit(spike_times=t)
    nwb.create_processing_module("ecephys", "sorting").add(units)
    rec = load(_write(nwb, tmp_path / "p.nwb"))
    assert rec.n_units == 3
    assert any("'sorted_units' found in 'ecephys'" in w for w in rec.warnings)


def test_loading_never_changes_the_file(tmp_path):
    path = _units_file(tmp_path / "s.nwb")
    before = folder_state(tmp_path)
    load(path)
    assert folder_state(tmp_path) == before


# ---------------------------------------------------------------- bad input
def test_no_units_table(tmp_path):
    nwb = _nwb()
    nwb.add_trial(start_time=0.0, stop_time=1.0)
    with pytest.raises(InputError, match="e.nwb: the NWB file has no units table"):
        load(_write(nwb, tmp_path / "e.nwb"))


def test_units_without_spike_times(tmp_path):
    nwb = _nwb()
    nwb.add_unit_column(name="depth", description="um")
    nwb.add_unit(depth=1.0)
    nwb.add_unit(depth=2.0)
    with pytest.raises(InputError, match="units table has no 'spike_times' column"):
        load(_write(nwb, tmp_path / "d.nwb"))


def test_one_unit_is_too_few(tmp_path):
    nwb = _nwb()
    nwb.add_unit(spike_times=[0.1, 0.2])
    with pytest.raises(InputError, match="one.nwb: found 1 unit\\(s\\); expected at least 2"):
        load(_write(nwb, tmp_path / "one.nwb"))


def test_units_without_any_spike(tmp_path):
    nwb = _nwb()
    nwb.add_unit(spike_times=[])
    nwb.add_unit(spike_times=[])
    with pytest.raises(InputError, match="z.nwb: the recording contains no spikes"):
        load(_write(nwb, tmp_path / "z.nwb"))


@pytest.mark.parametrize("bad, message", [
    (np.nan, "spike time nan \\(index 1\\) is not a finite number of seconds"),
    (np.inf, "spike time inf \\(index 2\\) is not a finite number of seconds"),
    (-0.5, "spike time -0.5 \\(index 0\\) is negative"),
])
def test_bad_spike_times(tmp_path, bad, message):
    nwb = _nwb()
    nwb.add_unit(spike_times=[0.1, 0.2])
    nwb.add_unit(spike_times=sorted([0.3, bad, 0.1]) if np.isfinite(bad) else [0.1, bad, 0.3]
                 if np.isnan(bad) else [0.1, 0.3, bad])
    with pytest.raises(InputError, match=f"b.nwb: unit '1': {message}"):
        load(_write(nwb, tmp_path / "b.nwb"))


@pytest.mark.parametrize("trials, message", [
    ([(0.0, 1.0), (2.0, 2.0)], "trial 1: stop 2.0 is not after start 2.0"),
    ([(0.0, 1.5), (1.0, 2.0)], "trials 0 \\(0-1.5 s\\) and 1 \\(1-2 s\\) overlap"),
])
def test_bad_trials_in_the_file(tmp_path, trials, message):
    nwb = _nwb()
    nwb.add_unit(spike_times=[0.1, 0.2])
    nwb.add_unit(spike_times=[0.3])
    for a, b in trials:
        nwb.add_trial(start_time=a, stop_time=b)
    with pytest.raises(InputError, match=f"t.nwb: {message}"):
        load(_write(nwb, tmp_path / "t.nwb"))


def test_truncated_nwb_file(tmp_path):
    path = _units_file(tmp_path / "full.nwb")
    data = open(path, "rb").read()
    cut = tmp_path / "cut.nwb"
    cut.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="cut.nwb: could not read the file as an NWB file "
                                         ".*truncated"):
        load(cut)


def test_random_bytes_named_nwb(tmp_path):
    path = tmp_path / "noise.nwb"
    path.write_bytes(np.random.default_rng(1).bytes(4096))
    with pytest.raises(InputError, match="noise.nwb: could not read the file as an NWB file "
                                         ".*signature"):
        read_nwb(path)


def test_hdf5_that_is_not_nwb(tmp_path):
    import h5py

    path = tmp_path / "plain.nwb"
    with h5py.File(path, "w") as f:
        f["x"] = np.arange(3)
    with pytest.raises(InputError, match="plain.nwb: could not read the file as an NWB file"):
        load(path)


def test_absurd_spike_count_is_refused_before_reading(tmp_path, monkeypatch):
    from attractorfit.io import _common

    path = _units_file(tmp_path / "s.nwb", trials=False)
    monkeypatch.setattr(_common, "available_memory", lambda: 100)  # pretend: 100 bytes free
    with pytest.raises(InputError, match="s.nwb: units spike_times: the file claims an "
                                         "array of shape \\(8,\\)"):
        load(path)


def test_inconsistent_spike_index(tmp_path):
    import h5py

    path = _units_file(tmp_path / "s.nwb", trials=False)
    with h5py.File(path, "r+") as f:  # damage the file after pynwb wrote it
        f["units/spike_times_index"][1] = 1
    with pytest.raises(InputError, match="s.nwb: the units table's spike_times_index is "
                                         "inconsistent with its 8 spike times"):
        load(path)


def test_unit_column_that_is_not_one_name_per_unit(tmp_path):
    path = _units_file(tmp_path / "s.nwb", obs_intervals=True, trials=False)
    with pytest.raises(InputError, match="unit_column: column 'obs_intervals' of s.nwb's "
                                         "units table does not hold one name per unit"):
        load(path, unit_column="obs_intervals")
