"""NIX and other neo formats, written in the tests with neo's own writers."""

import os

import numpy as np
import pytest
from io_helpers import assert_same_recording, folder_state, write_text

from attractorfit import load
from attractorfit.errors import InputError
from attractorfit.io import read_neo
from attractorfit.io._common import track_reads


def _nix(path, block):
    from neo.io import NixIO

    with NixIO(str(path), mode="ow") as io:
        io.write_block(block)
    return path


def test_nix_file_keeps_units_trials_and_labels(tmp_path, recording):
    path = _nix(tmp_path / "rec.nix", recording.to_neo())
    rec = load(path)
    assert_same_recording(recording, rec)
    assert rec.metadata["format"] == "neo:NixIO"
    assert len(rec.provenance) == 1 and os.path.basename(rec.provenance[0]["path"]) == "rec.nix"


def test_nix_file_is_opened_read_only(tmp_path, recording):
    path = _nix(tmp_path / "rec.nix", recording.to_neo())
    before = folder_state(tmp_path)
    load(path)
    load(tmp_path / "rec.nix")
    assert folder_state(tmp_path) == before
    os.chmod(path, 0o444)  # a read-only file must still load
    try:
        assert load(path).n_units == recording.n_units
    finally:
        os.chmod(path, 0o644)


def test_segments_become_trials_without_a_trials_epoch(tmp_path):
    import neo
    import quantities as pq

    rng = np.random.default_rng(5)
    block = neo.Block()
    for k in range(3):
        seg = neo.Segment()
        for u in range(2):
            t = np.sort(rng.uniform(2 * k, 2 * k + 1.5, 15))
            seg.spiketrains.append(neo.SpikeTrain(t * pq.s, t_start=2 * k * pq.s,
                                                  t_stop=(2 * k + 1.5) * pq.s, name=f"n{u}"))
        block.segments.append(seg)
    rec = load(_nix(tmp_path / "seg.nix", block))
    assert rec.unit_ids == ["n0", "n1"] and rec.n_spikes == 90
    np.testing.assert_array_equal(rec.trials["start"], [0.0, 2.0, 4.0])
    np.testing.assert_array_equal(rec.trials["stop"], [1.5, 3.5, 5.5])
    np.testing.assert_array_equal(rec.trials["segment"], [0, 1, 2])
    assert any("each of the 3 segments became a trial" in w for w in rec.warnings)


def test_matlab_file_written_by_neo(tmp_path, recording):
    from neo.io import NeoMatlabIO

    NeoMatlabIO(str(tmp_path / "rec.mat")).write_block(recording.to_neo())
    rec = load(tmp_path / "rec.mat")
    assert_same_recording(recording, rec, labels=False)  # neo's .mat drops annotations
    assert rec.metadata["format"] == "neo:NeoMatlabIO"


def test_trials_option_replaces_the_file_trials_with_a_warning(tmp_path, recording):
    path = _nix(tmp_path / "rec.nix", recording.to_neo())
    trials = write_text(tmp_path / "t.csv", "start,stop,cue\n0,2,x\n2,4,y\n")
    rec = read_neo(path, trials=trials)
    np.testing.assert_array_equal(rec.trials["cue"], ["x", "y"])
    assert "item" not in rec.trials
    assert any("its own trials table (6 trials) was replaced by the 2 trials of t.csv" in w
               for w in rec.warnings)
    assert [os.path.basename(p["path"]) for p in rec.provenance] == ["rec.nix", "t.csv"]


def test_one_unit_in_a_nix_file(tmp_path, recording):
    path = _nix(tmp_path / "one.nix", recording.select_units([0]).to_neo())
    with pytest.raises(InputError, match="one.nix: found 1 unit\\(s\\); expected at least 2"):
        load(path)


def test_negative_times_in_a_nix_file(tmp_path):
    import neo
    import quantities as pq

    block = neo.Block()
    seg = neo.Segment()
    block.segments.append(seg)
    for u, t in enumerate(([-0.5, 0.2], [0.1, 0.3])):
        seg.spiketrains.append(neo.SpikeTrain(np.array(t) * pq.s, t_start=-1 * pq.s,
                                              t_stop=1 * pq.s, name=f"u{u}"))
    with pytest.raises(InputError, match="neg.nix: unit 'u0': spike time -0.5 \\(index 0\\) "
                                         "is negative"):
        load(_nix(tmp_path / "neg.nix", block))


@pytest.mark.parametrize("suffix, message", [
    (".fake", "neo's example IO makes up data instead of reading the file"),
    (".xyz", "no reader for this file type"),
])
def test_refused_and_unknown_suffixes(tmp_path, suffix, message):
    path = tmp_path / f"r{suffix}"
    path.write_bytes(b"0123456789")
    with pytest.raises(InputError, match=f"r{suffix}: .*{message}.*supported: NWB files"):
        read_neo(path)


def test_folder_neo_cannot_read(tmp_path):
    folder = tmp_path / "session"
    folder.mkdir()
    write_text(folder / "notes.md", "nothing here")
    with pytest.raises(InputError, match="session: no reader for this folder"):
        load(folder)


def test_nwb_is_never_read_through_neo(tmp_path):
    path = tmp_path / "x.nwb"
    path.write_bytes(b"not really")
    with pytest.raises(InputError, match="NWB files are read with pynwb"):
        read_neo(path)


def test_track_reads_sees_files_opened_from_python_inside_the_folder(tmp_path):
    inside = write_text(tmp_path / "a.dat", "a")
    other = tmp_path.parent / f"{tmp_path.name}-outside.txt"
    write_text(other, "b")
    try:
        with track_reads(tmp_path) as found:
            open(inside, "rb").close()
            np.memmap(inside, dtype=np.uint8, mode="r")
            open(other, "rb").close()
        assert found == [str(inside)]
        open(inside, "rb").close()  # after the block: not recorded
        assert found == [str(inside)]
    finally:
        os.remove(other)
