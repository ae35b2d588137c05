"""attractorfit.load: dispatch by suffix / folder contents, options, bad files."""

import os

import numpy as np
import pytest
from io_helpers import folder_state, sha256, write_text

import attractorfit
from attractorfit import load
from attractorfit.errors import InputError
from attractorfit.io import write_csv, write_nwb


def _neo_suffixes():
    import neo.io

    return sorted(neo.io.io_by_extension)


OUR_SUFFIXES = ["nwb", "csv", "tsv", "tab", "txt", "npz", "npy", "pkl", "pickle", "xyz", ""]


@pytest.mark.filterwarnings("ignore")
@pytest.mark.parametrize("suffix", sorted(set(OUR_SUFFIXES + _neo_suffixes())))
def test_random_bytes_give_input_error_for_every_suffix(tmp_path, suffix):
    path = tmp_path / (f"noise.{suffix}" if suffix else "noise")
    path.write_bytes(np.random.default_rng(len(suffix)).bytes(4096))
    with pytest.raises(InputError, match="noise"):
        load(path)
    assert os.listdir(tmp_path) == [path.name]  # nothing written beside the input


@pytest.mark.parametrize("name", ["rec.nwb", "spikes.csv", "spikes.npz", "rec.nix", "rec.smr",
                                  "rec.xyz"])
def test_empty_file(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(b"")
    with pytest.raises(InputError, match=f"{name}: the file is empty \\(0 bytes\\)"):
        load(path)


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="nope.nwb: no such file or folder"):
        load(tmp_path / "nope.nwb")


def test_readers_check_their_path_too(tmp_path):
    from attractorfit.io import read_npz, read_sorter_folder, read_table

    with pytest.raises(InputError, match="gone.csv: no such file or folder"):
        read_table(tmp_path / "gone.csv")
    with pytest.raises(InputError, match="x: expected a file, got a folder"):
        (tmp_path / "x").mkdir()
        read_npz(tmp_path / "x")
    write_text(tmp_path / "f.txt", "x")
    with pytest.raises(InputError, match="f.txt: expected a folder, got a file"):
        read_sorter_folder(tmp_path / "f.txt")


@pytest.mark.parametrize("suffix, message", [
    (".pkl", "a pickle file can run arbitrary code"),
    (".npy", "one .npy array cannot hold both spike times and units"),
])
def test_refused_suffixes(tmp_path, suffix, message):
    path = tmp_path / f"data{suffix}"
    np.save(tmp_path / "data.npy", np.arange(3))
    if suffix == ".pkl":
        path.write_bytes(b"\x80\x04K\x01.")
    with pytest.raises(InputError, match=f"data{suffix}: not read: {message}"):
        load(path)


def test_dispatch_by_suffix_and_folder_contents(tmp_path, recording):
    write_nwb(recording, tmp_path / "r.NWB")  # suffix case does not matter
    write_csv(recording, tmp_path / "s.csv")
    np.savez(tmp_path / "a.npz", spike_times=[0.1, 0.2], spike_units=[0, 1])
    folder = tmp_path / "ks"
    folder.mkdir()
    np.save(folder / "spike_times.npy", np.array([10, 20, 30]))
    np.save(folder / "spike_clusters.npy", np.array([0, 1, 1]))
    write_text(folder / "params.py", "sample_rate = 1000.0\n")
    assert load(tmp_path / "r.NWB").metadata["format"] == "nwb"
    assert load(tmp_path / "s.csv").metadata["format"] == "table"
    assert load(tmp_path / "a.npz").metadata["format"] == "npz"
    assert load(folder).metadata["format"] == "sorter_folder"
    assert load(str(folder)).unit_ids == ["0", "1"]


def test_options_must_fit_the_format(tmp_path, recording):
    write_nwb(recording, tmp_path / "r.nwb")
    with pytest.raises(InputError, match="r.nwb: option\\(s\\) \\['good_only', "
                                         "'sampling_rate'\\] do not apply to NWB files; "
                                         "accepted: unit_column, trials, time_unit"):
        load(tmp_path / "r.nwb", sampling_rate=3.0, good_only=True)
    # None means "not given" (the command line passes every option)
    rec = load(tmp_path / "r.nwb", trials=None, sampling_rate=None, time_column=None)
    assert rec.n_units == recording.n_units


def test_trials_option_overrides_file_trials_for_npz(tmp_path):
    np.savez(tmp_path / "a.npz", spike_times=[0.1, 0.2, 1.5], spike_units=[0, 1, 1],
             trial_start=[0.0], trial_stop=[1.0])
    write_text(tmp_path / "t.tsv", "start\tstop\tside\n0\t1\tL\n1\t2\tR\n")
    rec = load(tmp_path / "a.npz", trials=tmp_path / "t.tsv")
    assert rec.n_trials == 2 and rec.trials["side"].tolist() == ["L", "R"]
    assert any("replaced by the 2 trials of t.tsv" in w for w in rec.warnings)
    assert [p["sha256"] for p in rec.provenance] == [sha256(tmp_path / "a.npz"),
                                                    sha256(tmp_path / "t.tsv")]


def test_trials_option_errors_name_the_trials_file(tmp_path):
    np.savez(tmp_path / "a.npz", spike_times=[0.1, 0.2], spike_units=[0, 1])
    write_text(tmp_path / "t.csv", "start,stop\n0,1\n0.5,2\n")
    with pytest.raises(InputError, match="t.csv: trials at line 2 \\(0-1 s\\) and line 3"):
        load(tmp_path / "a.npz", trials=tmp_path / "t.csv")
    with pytest.raises(InputError, match="missing.csv: no such file or folder"):
        load(tmp_path / "a.npz", trials=tmp_path / "missing.csv")


def test_provenance_hashes_every_file_read(tmp_path, recording):
    write_csv(recording, tmp_path / "s.csv", tmp_path / "t.csv")
    rec = load(tmp_path / "s.csv", trials=tmp_path / "t.csv")
    for rec_p in rec.provenance:
        assert rec_p["sha256"] == sha256(rec_p["path"])
        assert rec_p["size"] == os.path.getsize(rec_p["path"])


def test_loading_every_format_writes_nothing(tmp_path, recording):
    write_nwb(recording, tmp_path / "r.nwb")
    write_csv(recording, tmp_path / "s.csv", tmp_path / "t.csv")
    np.savez(tmp_path / "a.npz", spike_times=[0.1, 0.2], spike_units=[0, 1])
    before = folder_state(tmp_path)
    load(tmp_path / "r.nwb")
    load(tmp_path / "s.csv", trials=tmp_path / "t.csv")
    load(tmp_path / "a.npz")
    assert folder_state(tmp_path) == before


def test_top_level_load_is_the_io_load():
    assert attractorfit.load is attractorfit.io.load
    assert set(attractorfit.io.__all__) == {
        "load", "read_nwb", "read_neo", "read_sorter_folder", "read_table", "read_npz",
        "read_trials_table", "write_nwb", "write_csv"}
