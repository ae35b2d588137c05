"""Spike-sorter output folders: sample indices, clusters, labels, params.py."""

import io
import os

import numpy as np
import pytest
from io_helpers import folder_state, write_text

from attractorfit import load
from attractorfit.errors import InputError
from attractorfit.io import read_sorter_folder

RATE = 30000.0


def _folder(tmp_path, *, samples=(300, 30000, 600, 90000, 45000, 15),
            clusters=(4, 4, 7, 9, 7, 9), params=f"sample_rate = {RATE}\n",
            cluster_group=None, cluster_info=None, templates=False, name="sorted"):
    folder = tmp_path / name
    folder.mkdir()
    np.save(folder / "spike_times.npy", np.asarray(samples, dtype=np.uint64)[:, None])
    np.save(folder / ("spike_templates.npy" if templates else "spike_clusters.npy"),
            np.asarray(clusters, dtype=np.int32))
    if params is not None:
        write_text(folder / "params.py", params)
    if cluster_group is not None:
        write_text(folder / "cluster_group.tsv", cluster_group)
    if cluster_info is not None:
        write_text(folder / "cluster_info.tsv", cluster_info)
    return folder


def test_times_are_samples_over_the_rate(tmp_path):
    folder = _folder(tmp_path)
    rec = load(folder)
    assert rec.unit_ids == ["4", "7", "9"]
    np.testing.assert_array_equal(rec.spike_times[0], np.array([300, 30000]) / RATE)
    np.testing.assert_array_equal(rec.spike_times[1], np.array([600, 45000]) / RATE)
    np.testing.assert_array_equal(rec.spike_times[2], np.array([15, 90000]) / RATE)
    assert rec.metadata["sampling_rate"] == RATE
    assert [os.path.basename(p["path"]) for p in rec.provenance] == [
        "spike_times.npy", "spike_clusters.npy", "params.py"]


def test_params_is_parsed_not_executed(tmp_path):
    marker = tmp_path / "executed"
    params = ("import os\n"
              f"os.mkdir({str(marker)!r})\n"
              "dat_path = r'raw.dat'\n"
              "n_channels_dat = 64\n"
              "dtype = 'int16'\n"
              "sample_rate = 2.5e4\n"
              "hp_filtered = False\n")
    rec = load(_folder(tmp_path, params=params))
    assert not marker.exists()
    assert rec.metadata["sampling_rate"] == 25000.0


def test_sampling_rate_option(tmp_path):
    folder = _folder(tmp_path, params=None)
    rec = read_sorter_folder(folder, sampling_rate=20000)
    np.testing.assert_array_equal(rec.spike_times[0], np.array([300, 30000]) / 20000)
    with pytest.raises(InputError, match="sorted: no sampling rate .*expected the option "
                                         "sampling_rate="):
        load(folder)
    with pytest.raises(InputError, match="sampling_rate: expected a finite number > 0, "
                                         "got -5.0"):
        load(folder, sampling_rate=-5.0)


def test_option_overrides_params_with_a_warning(tmp_path):
    rec = load(_folder(tmp_path), sampling_rate=10000.0)
    assert rec.metadata["sampling_rate"] == 10000.0
    assert any("sampling_rate=10000 overrides params.py sample_rate = 30000" in w
               for w in rec.warnings)


def test_labels_and_good_only(tmp_path):
    info = ("cluster_id\tAmplitude\tKSLabel\tgroup\n"
            "4\t10.0\tgood\t\n7\t12.0\tmua\tgood\n9\t3.0\tgood\tnoise\n")
    group = "cluster_id\tgroup\n9\tgood\n4\tmua\n"
    folder = _folder(tmp_path, cluster_info=info)
    rec = load(folder)
    assert rec.metadata["cluster_labels"] == {"4": "good", "7": "good", "9": "noise"}
    assert any("1 cluster(s) labelled 'noise' were kept" in w for w in rec.warnings)
    assert load(folder, good_only=True).unit_ids == ["4", "7"]
    # cluster_group.tsv (manual curation) overrides cluster_info.tsv
    write_text(folder / "cluster_group.tsv", group)
    rec = load(folder, good_only=True)
    assert rec.unit_ids == ["7", "9"]
    assert "cluster_group.tsv" in [os.path.basename(p["path"]) for p in rec.provenance]
    # the labels are also unit metadata (column group): selectable, and mua is a multi-unit
    rec = load(folder)
    assert rec.unit_info["group"].tolist() == ["mua", "good", "good"]
    assert rec.multi_units() == ("group", ["4"])
    assert rec.match_units({"group": "GOOD"}).tolist() == [False, True, True]
    assert load(_folder(tmp_path, name="bare")).unit_info == {}


def test_templates_when_clusters_are_absent(tmp_path):
    rec = load(_folder(tmp_path, templates=True))
    assert rec.unit_ids == ["4", "7", "9"]
    assert any("spike_templates.npy" in w for w in rec.warnings)


def test_trials_for_a_folder_come_from_the_option(tmp_path):
    folder = _folder(tmp_path)
    trials = write_text(tmp_path / "trials.csv", "start,stop,item\n0,1.2,a\n1.4,3.1,b\n")
    rec = load(folder, trials=trials)
    np.testing.assert_array_equal(rec.trials["item"], ["a", "b"])
    assert os.path.basename(rec.provenance[-1]["path"]) == "trials.csv"


def test_loading_never_writes(tmp_path):
    folder = _folder(tmp_path, cluster_group="cluster_id\tgroup\n4\tgood\n")
    before = folder_state(tmp_path)
    load(folder)
    assert folder_state(tmp_path) == before


# ---------------------------------------------------------------- bad input
def test_good_only_errors(tmp_path):
    folder = _folder(tmp_path)
    with pytest.raises(InputError, match="good_only=True but the folder has no cluster "
                                         "labels"):
        load(folder, good_only=True)
    write_text(folder / "cluster_group.tsv", "cluster_id\tgroup\n4\tgood\n7\tmua\n")
    with pytest.raises(InputError, match="good_only=True keeps 1 of 3 clusters"):
        load(folder, good_only=True)


@pytest.mark.parametrize("params, message", [
    ("sample_rate = 'fast'\n", "params.py line 1: sample_rate 'fast' is not a positive "
                               "number of samples per second"),
    ("x = 1\nsample_rate = -3\n", "params.py line 2: sample_rate -3 is not a positive"),
    ("sample_rate = (\n", "params.py line 1: not valid Python syntax"),
    ("sample_rate = 3\x00\n", "params.py: not a Python text file"),
])
def test_bad_params(tmp_path, params, message):
    with pytest.raises(InputError, match=message):
        load(_folder(tmp_path, params=params))


def test_mismatched_lengths(tmp_path):
    with pytest.raises(InputError, match="sorted: spike_times.npy has 6 spikes but "
                                         "spike_clusters.npy has 5"):
        load(_folder(tmp_path, clusters=(1, 2, 3, 4, 5)))


def test_float_cluster_ids(tmp_path):
    folder = _folder(tmp_path)
    np.save(folder / "spike_clusters.npy", np.ones(6))
    with pytest.raises(InputError, match="sorted/spike_clusters.npy: dtype float64; "
                                         "expected whole-number cluster ids"):
        load(folder)


def test_negative_samples(tmp_path):
    folder = _folder(tmp_path)
    np.save(folder / "spike_times.npy", np.array([1, -2, 3, 4, 5, 6]))
    with pytest.raises(InputError, match="sorted/spike_times.npy: element 1 is -2; "
                                         "expected sample indices >= 0"):
        load(folder)


def test_missing_clusters(tmp_path):
    folder = _folder(tmp_path)
    os.remove(folder / "spike_clusters.npy")
    with pytest.raises(InputError, match="sorted: no spike_clusters.npy or "
                                         "spike_templates.npy"):
        load(folder)


def test_two_dimensional_spike_times(tmp_path):
    folder = _folder(tmp_path)
    np.save(folder / "spike_times.npy", np.ones((3, 2), dtype=np.int64))
    with pytest.raises(InputError, match="sorted/spike_times.npy: shape \\(3, 2\\); expected "
                                         "a 1-dimensional array"):
        load(folder)


def test_npy_claiming_too_much_memory(tmp_path):
    folder = _folder(tmp_path)
    buf = io.BytesIO()
    np.lib.format.write_array_header_2_0(buf, {"descr": "<u8", "fortran_order": False,
                                               "shape": (10 ** 14,)})
    (folder / "spike_times.npy").write_bytes(buf.getvalue())
    with pytest.raises(InputError, match="sorted/spike_times.npy: the file claims an array "
                                         "of shape \\(100000000000000,\\)"):
        load(folder)


def test_pickled_npy_is_refused(tmp_path):
    folder = _folder(tmp_path)
    np.save(folder / "spike_clusters.npy", np.array([object()] * 6), allow_pickle=True)
    with pytest.raises(InputError, match="sorted/spike_clusters.npy: the array holds Python "
                                         "objects"):
        load(folder)


def test_random_bytes_as_npy(tmp_path):
    folder = _folder(tmp_path)
    (folder / "spike_clusters.npy").write_bytes(np.random.default_rng(0).bytes(200))
    with pytest.raises(InputError, match="sorted/spike_clusters.npy: could not read the file "
                                         "as a NumPy .npy array"):
        load(folder)


@pytest.mark.parametrize("text, message", [
    ("cluster\tgroup\n4\tgood\n", "cluster_group.tsv line 1: no column 'cluster_id'"),
    ("cluster_id\tquality\n4\tgood\n", "cluster_group.tsv line 1: no label column in the "
                                       "header"),
    ("cluster_id\tgroup\nfour\tgood\n", "cluster_group.tsv line 2: cluster_id 'four' is not "
                                        "a whole number"),
    ("cluster_id\tgroup\n4\tgood\textra\n", "cluster_group.tsv line 2: 3 field\\(s\\), "
                                            "expected 2"),
])
def test_bad_label_files(tmp_path, text, message):
    with pytest.raises(InputError, match=message):
        load(_folder(tmp_path, cluster_group=text))


def test_text_spike_times(tmp_path):
    folder = _folder(tmp_path)
    np.save(folder / "spike_times.npy", np.array(["1"] * 6))
    with pytest.raises(InputError, match="sorted/spike_times.npy: dtype <U1; expected sample "
                                         "indices"):
        load(folder)
