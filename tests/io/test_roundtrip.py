"""Writers and round trips: Recording -> NWB / CSV -> Recording, and two independent
writers (pynwb, neo's NixIO) of the same data loading to the same Recording."""

import datetime
import os

import numpy as np
import pytest
from io_helpers import assert_same_recording, make_recording, sha256

from attractorfit import load
from attractorfit.errors import InputError, InputWarning
from attractorfit.io import write_csv, write_nwb
from attractorfit.recording import Recording


def test_nwb_round_trip_keeps_units_times_and_labels(tmp_path, recording):
    path = tmp_path / "rec.nwb"
    write_nwb(recording, path)
    back = load(path)
    assert_same_recording(recording, back)
    assert os.listdir(tmp_path) == ["rec.nwb"]  # no temporary file left behind
    assert back.provenance[0]["sha256"] == sha256(path)


def test_nwb_round_trip_keeps_silent_units_and_text_ids(tmp_path):
    rec = Recording(unit_ids=["a1", "b7", "quiet"],
                    spike_times=[np.array([0.1]), np.array([0.25, 1.5]), np.zeros(0)],
                    trials=None).validate()
    write_nwb(rec, tmp_path / "r.nwb")
    back = load(tmp_path / "r.nwb")
    assert_same_recording(rec, back)


def test_nwb_writer_is_deterministic(tmp_path, recording):
    write_nwb(recording, tmp_path / "a.nwb")
    write_nwb(recording, tmp_path / "b.nwb")
    a, b = load(tmp_path / "a.nwb"), load(tmp_path / "b.nwb")
    assert a.metadata["identifier"] == b.metadata["identifier"]
    assert a.metadata["session_start_time"] == "1970-01-01T00:00:00+00:00"


def test_nwb_writer_keeps_the_session_start_time(tmp_path, recording):
    recording.metadata["session_start_time"] = "2024-05-06T07:08:09+00:00"
    write_nwb(recording, tmp_path / "a.nwb")
    assert load(tmp_path / "a.nwb").metadata["session_start_time"] == \
        "2024-05-06T07:08:09+00:00"


def test_failed_nwb_write_leaves_the_old_file(tmp_path, recording, monkeypatch):
    path = tmp_path / "rec.nwb"
    write_nwb(recording, path)
    before = sha256(path)
    import pynwb

    def boom(self, *a, **k):
        raise RuntimeError("disk full")

    monkeypatch.setattr(pynwb.NWBHDF5IO, "write", boom)
    with pytest.raises(RuntimeError, match="disk full"):
        write_nwb(make_recording(seed=3), path)
    assert sha256(path) == before
    assert os.listdir(tmp_path) == ["rec.nwb"]


def test_nwb_writer_refuses_reserved_label_names(tmp_path, recording):
    recording.trials["tags"] = np.array(["x"] * recording.n_trials)
    with pytest.raises(InputError, match="'tags' has a name NWB reserves"):
        write_nwb(recording, tmp_path / "r.nwb")
    assert not os.listdir(tmp_path)


def test_nwb_writer_refuses_object_labels(tmp_path, recording):
    recording.trials["odd"] = np.array([{"a": 1}] * recording.n_trials, dtype=object)
    with pytest.raises(InputError, match="'odd' has dtype object; expected numbers"):
        write_nwb(recording, tmp_path / "r.nwb")


def test_csv_round_trip_keeps_units_times_and_labels(tmp_path, recording):
    write_csv(recording, tmp_path / "spikes.csv", tmp_path / "trials.csv")
    back = load(tmp_path / "spikes.csv", trials=tmp_path / "trials.csv")
    assert_same_recording(recording, back)
    assert sorted(os.listdir(tmp_path)) == ["spikes.csv", "trials.csv"]
    assert [os.path.basename(p["path"]) for p in back.provenance] == ["spikes.csv",
                                                                     "trials.csv"]


def test_csv_round_trip_keeps_awkward_floats(tmp_path):
    # times whose shortest decimal form needs all 17 digits must survive exactly
    t = np.array([0.1 + 0.2, 1 / 3, 2.0 ** -30, 12345.678901234567])
    rec = Recording.from_arrays(np.r_[t, t + 1], np.r_[[0] * 4, [1] * 4])
    write_csv(rec, tmp_path / "s.csv")
    assert_same_recording(rec, load(tmp_path / "s.csv"))


def test_csv_writer_warns_about_silent_units(tmp_path):
    rec = Recording(unit_ids=["0", "1", "2"],
                    spike_times=[np.array([0.5]), np.array([0.7]), np.zeros(0)]).validate()
    with pytest.warns(InputWarning, match="1 unit\\(s\\) without spikes"):
        write_csv(rec, tmp_path / "s.csv")
    assert load(tmp_path / "s.csv").unit_ids == ["0", "1"]


def test_csv_writer_refuses_trials_path_without_trials(tmp_path):
    rec = Recording.from_arrays([0.1, 0.2], [0, 1])
    with pytest.raises(InputError, match="has no trials table to write"):
        write_csv(rec, tmp_path / "s.csv", tmp_path / "t.csv")


# ------------------------------------------------- two independent writers agree
def _reference_data():
    rng = np.random.default_rng(42)
    names = ["u3", "u10", "u2"]
    trains = [np.sort(rng.uniform(0, 9, n)) for n in (30, 45, 25)]
    start = np.array([0.5, 3.5, 6.5])
    stop = np.array([3.0, 6.0, 9.0])
    item = np.array(["left", "far", "left"])
    outcome = np.array([1, 0, 1], dtype=np.int64)
    return names, trains, start, stop, item, outcome


def test_pynwb_file_and_neo_nix_file_load_to_the_same_recording(tmp_path):
    """Outside check: files written by pynwb and by neo (no attractorfit writer)."""
    import neo
    import quantities as pq
    from neo.io import NixIO
    from pynwb import NWBHDF5IO, NWBFile

    names, trains, start, stop, item, outcome = _reference_data()
    nwb = NWBFile(session_description="reference", identifier="ref",
                  session_start_time=datetime.datetime(2020, 1, 1,
                                                       tzinfo=datetime.timezone.utc))
    nwb.add_unit_column(name="unit_name", description="name")
    for n, t in zip(names, trains):
        nwb.add_unit(spike_times=t, unit_name=n)
    nwb.add_trial_column(name="item", description="cued port")
    nwb.add_trial_column(name="outcome", description="1 rewarded")
    for i in range(3):
        nwb.add_trial(start_time=start[i], stop_time=stop[i], item=str(item[i]),
                      outcome=outcome[i])
    with NWBHDF5IO(str(tmp_path / "ref.nwb"), mode="w") as io:
        io.write(nwb)

    block = neo.Block()
    seg = neo.Segment()
    block.segments.append(seg)
    for n, t in zip(names, trains):
        seg.spiketrains.append(neo.SpikeTrain(t * 1000.0 * pq.ms, t_stop=9500.0 * pq.ms,
                                              name=n))
    seg.epochs.append(neo.Epoch(times=start * pq.s, durations=(stop - start) * pq.s,
                                name="trials",
                                array_annotations={"item": item, "outcome": outcome}))
    with NixIO(str(tmp_path / "ref.nix"), mode="ow") as io:
        io.write_block(block)

    from_nwb = load(tmp_path / "ref.nwb")
    from_nix = load(tmp_path / "ref.nix")
    assert from_nwb.unit_ids == from_nix.unit_ids == sorted(names)
    for a, b in zip(from_nwb.spike_times, from_nix.spike_times):
        # the NIX file stores milliseconds: 1e-12 s absorbs the ms -> s rescale
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-12)
    for u, t in zip(names, trains):
        np.testing.assert_array_equal(from_nwb.spike_times[from_nwb.unit_ids.index(u)], t)
    for c in ("start", "stop", "item", "outcome"):
        np.testing.assert_array_equal(from_nwb.trials[c], from_nix.trials[c])
    np.testing.assert_array_equal(from_nwb.trials["item"], item)
    assert from_nwb.trials["outcome"].dtype.kind == from_nix.trials["outcome"].dtype.kind == "i"
