"""The state analysis of a recording: StateFit, summary block, states.csv rows, decode."""

import itertools
import json

import numpy as np
import pytest

from attractorfit import bin_spikes
from attractorfit._output import dumps_json
from attractorfit.errors import InputError
from attractorfit.states import StateFit, analyse_states
from attractorfit.synthetic import switching_recording


@pytest.fixture(scope="module")
def recording():
    # our own generator: 3 states, gamma-2 spiking, labels (item) on each trial
    rec, truth = switching_recording(n_units=20, n_states=3, n_trials=20, trial_duration=2.0,
                                     mean_dwell_s=0.4, modulation=0.8, rng=3,
                                     labels={"item": np.arange(20) % 2})
    return bin_spikes(rec, bin_size=0.05), truth


@pytest.fixture(scope="module")
def chosen(recording):
    b, _ = recording
    return analyse_states(b, candidates=range(1, 5), rng=0)


def _accuracy(fit, binned, truth):
    est = np.concatenate(fit.decoding.bin_states)
    tru = np.concatenate([truth.state_at(i, binned.bin_times()[: binned.n_valid[i]]
                                         + binned.bin_size / 2)
                          for i in range(binned.n_trials)])
    return max(np.mean((est >= 0) & (np.array(p)[np.maximum(est, 0)] == tru))
               for p in itertools.permutations(range(fit.n_states)))


def test_recovers_states_and_bins(recording, chosen):
    b, truth = recording
    assert isinstance(chosen, StateFit)
    assert chosen.n_states == 3
    assert chosen.choice is not None and chosen.choice.chosen == 3
    assert _accuracy(chosen, b, truth) >= 0.9
    np.testing.assert_allclose(chosen.rates_hz, chosen.model.rates_ / 0.05)
    assert chosen.vertices.shape == (3, 2)
    assert len({tuple(v) for v in chosen.vertices}) == 3
    assert chosen.cube_r2 == pytest.approx(1.0)   # S = K + 1: exact by counting
    assert len(chosen.posteriors) == b.n_trials


def test_summary_block_contract(chosen):
    block = chosen.summary_block()
    for key in ("n_states", "vertices", "occupancy", "mean_dwell_s", "cube_r2",
                "unassigned_fraction"):
        assert key in block
    assert block["n_states"] == 3
    assert all(v in (-1, 1) for row in block["vertices"] for v in row)
    assert sum(block["occupancy"]) == pytest.approx(1.0)
    assert len(block["mean_dwell_s"]) == 3
    assert 0.0 <= block["unassigned_fraction"] < 0.2
    assert block["choice"]["chosen"] == 3
    assert "item" in block["conditions"]
    json.loads(dumps_json(block))  # serialisable, NaN-safe


def test_segment_rows(recording, chosen):
    b, _ = recording
    rows = chosen.segment_rows()
    assert rows[0][0] == 0 and rows[0][1] == 0.0
    for trial, start, stop, state, vertex in rows:
        assert stop > start
        assert -1 <= state < 3
        assert (vertex == "") == (state < 0)
        assert set(vertex) <= {"H", "L"}
    # segments tile every trial: total duration = analysed time
    total = sum(r[2] - r[1] for r in rows)
    assert total == pytest.approx(b.total_bins * b.bin_size)


def test_decode_same_code_path(recording, chosen):
    b, _ = recording
    again = chosen.decode(b)
    np.testing.assert_allclose(again.occupancy, chosen.occupancy)
    np.testing.assert_allclose(again.mean_dwell_s, chosen.mean_dwell_s)
    assert again.conditions["item"].mapping.tolist() == \
        chosen.conditions["item"].mapping.tolist()
    half = b.subset_trials(np.arange(10))
    dec = chosen.decode(half)
    assert len(dec.posteriors) == 10


def test_fixed_n_states_and_determinism(recording):
    b, _ = recording
    a = analyse_states(b, n_states=2, latent_dims=2, rng=5)
    c = analyse_states(b, n_states=2, latent_dims=2, rng=5)
    assert a.choice is None and a.n_states == 2
    assert a.summary_block()["choice"] == {"rule": "given", "chosen": 2}
    np.testing.assert_array_equal(a.model.rates_, c.model.rates_)
    assert a.segment_rows() == c.segment_rows()


def test_errors(recording, chosen):
    b, _ = recording
    with pytest.raises(InputError, match="binned: expected a BinnedCounts, got list"):
        analyse_states([np.zeros((3, 2))])
    with pytest.raises(InputError, match="n_states: expected a whole number >= 1"):
        analyse_states(b, n_states=0)
    with pytest.raises(InputError, match="min_segment_s: expected a finite number >= 0"):
        analyse_states(b, n_states=2, min_segment_s=-0.1)
    with pytest.raises(InputError, match="n_jobs: expected a whole number >= 1"):
        analyse_states(b, n_states=2, n_jobs=0)
    with pytest.raises(InputError, match="binned: expected a BinnedCounts, got ndarray"):
        chosen.decode(np.zeros((2, 3, 4)))
    with pytest.raises(InputError, match="binned: bin size 0.1 s, the state model was "
                                         "fitted at 0.05 s"):
        rec, _ = switching_recording(n_units=20, n_trials=3, rng=1)
        chosen.decode(bin_spikes(rec, bin_size=0.1))
    other = b.subset_trials(np.arange(3))
    other.counts = other.counts[:, :, :5]
    other.unit_ids = other.unit_ids[:5]
    with pytest.raises(InputError, match="binned: 5 units, the state model was fitted on 20"):
        chosen.decode(other)
