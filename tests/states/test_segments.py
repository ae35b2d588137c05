"""Segments, occupancy, Kaplan-Meier dwell times, transitions and condition tables."""

import numpy as np
import pytest
from scipy import stats

from attractorfit.errors import InputError
from attractorfit.states._segments import (assign_bins, decode_posteriors, find_segments,
                                           kaplan_meier, min_segment_bins)


def _onehot(states, n_states, p=0.95):
    states = np.asarray(states)
    out = np.full((states.size, n_states), (1 - p) / (n_states - 1))
    out[np.arange(states.size), states] = p
    return out


def test_kaplan_meier_textbook_example():
    # Remission times of the 6-MP group (Freireich et al. 1963, as tabulated in
    # Klein & Moeschberger 2003, Table 4.1A; '+' = censored). Hand-computed product
    # limit: S(6) = 18/21, S(7) = S(6) 16/17, S(10) = S(7) 14/15, S(13) = S(10) 11/12,
    # S(16) = S(13) 10/11, S(22) = S(16) 6/7, S(23) = S(22) 5/6; the table values
    # (from memory) are 0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448.
    t = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
    cens = {3, 5, 7, 8, 11, 12, 13, 16, 17, 18, 19, 20}
    obs = [i not in cens for i in range(len(t))]
    km = kaplan_meier(t, obs)
    s6 = 18 / 21
    s7 = s6 * 16 / 17
    s10 = s7 * 14 / 15
    s13 = s10 * 11 / 12
    s16 = s13 * 10 / 11
    s22 = s16 * 6 / 7
    s23 = s22 * 5 / 6
    np.testing.assert_allclose(km.times, [6, 7, 10, 13, 16, 22, 23])
    np.testing.assert_allclose(km.survival, [s6, s7, s10, s13, s16, s22, s23], rtol=1e-12)
    np.testing.assert_allclose(km.survival, [0.857, 0.807, 0.753, 0.690, 0.627, 0.538, 0.448],
                               atol=6e-4)
    # restricted mean up to the longest observation (35): area under the steps
    area = 6 * 1 + 1 * s6 + 3 * s7 + 3 * s10 + 3 * s13 + 6 * s16 + 1 * s22 + 12 * s23
    assert km.restricted_mean == pytest.approx(area, rel=1e-12)
    assert km.max_time == 35 and km.n == 21 and km.n_censored == 12
    assert km(5.9) == 1.0 and km(6.0) == pytest.approx(s6)


def test_kaplan_meier_against_scipy_ecdf():
    # outside check: scipy.stats.ecdf on CensoredData gives the Kaplan-Meier estimate
    # (SciPy >= 1.11); tolerance 1e-12
    rng = np.random.default_rng(0)
    d = np.round(rng.exponential(0.3, 200), 2)
    obs = rng.random(200) > 0.3
    km = kaplan_meier(d, obs)
    ref = stats.ecdf(stats.CensoredData.right_censored(d, ~obs)).sf
    # scipy lists censored times too (with S unchanged): compare the step functions
    grid = np.unique(np.concatenate([d, d + 0.005]))
    np.testing.assert_allclose(km(grid), ref.evaluate(grid), rtol=1e-12)
    # no censoring: restricted mean to the maximum equals the sample mean
    km = kaplan_meier(d, np.ones(200, bool))
    assert km.restricted_mean == pytest.approx(d.mean(), rel=1e-12)


def test_kaplan_meier_edge_cases():
    km = kaplan_meier([], [])
    assert km.n == 0 and np.isnan(km.restricted_mean)
    km = kaplan_meier([0.2, 0.3], [False, False])
    assert km.times.size == 0 and km.restricted_mean == pytest.approx(0.3)
    with pytest.raises(InputError, match=r"observed: expected one flag per duration \(2\)"):
        kaplan_meier([1.0, 2.0], [True])
    with pytest.raises(InputError, match="durations: expected finite numbers >= 0"):
        kaplan_meier([-1.0], [True])


def test_assign_bins_threshold_and_min_run():
    p = np.array([[0.9, 0.1], [0.85, 0.15], [0.5, 0.5], [0.1, 0.9], [0.2, 0.8],
                  [0.05, 0.95], [0.95, 0.05]])
    (lab,) = assign_bins([p], threshold=0.8)
    assert lab.tolist() == [0, 0, -1, 1, -1, 1, 0]
    (lab,) = assign_bins([p], threshold=0.8, min_bins=2)
    assert lab.tolist() == [0, 0, -1, -1, -1, -1, -1]
    assert min_segment_bins(0.05, 0.02) == 3
    assert min_segment_bins(0.05, 0.05) == 1
    assert min_segment_bins(0.0, 0.05) == 1


def test_find_segments_tiles_and_censors():
    seg = find_segments([np.array([0, 0, -1, 1, 1, 1]), np.array([2, 2, 2])], bin_size=0.05,
                        trial_index=[3, 7])
    assert seg.trial.tolist() == [3, 3, 3, 7]
    assert seg.state.tolist() == [0, -1, 1, 2]
    np.testing.assert_allclose(seg.start, [0, 0.1, 0.15, 0])
    np.testing.assert_allclose(seg.stop, [0.1, 0.15, 0.3, 0.15])
    assert seg.censored.tolist() == [True, False, True, True]
    rows = seg.rows(["HL", "LH", "HH"])
    assert rows[0] == (3, 0.0, 0.1, 0, "HL") and rows[1][4] == "" and rows[3][4] == "HH"


def test_decode_posteriors_summary():
    trials = [[0, 0, 0, 1, 1, 0, 0], [1, 1, 1, 1, 0, 0, 0], [0, 0, 2, 2, 2, 2, 2]]
    post = [_onehot(t, 3) for t in trials]
    post[0][3] = [0.4, 0.3, 0.3]   # bin 3 of trial 0 unassigned
    dec = decode_posteriors(post, bin_size=0.1, min_segment_s=0.0,
                            labels={"item": np.array(["a", "b", "a"]),
                                    "outcome": np.array([1.0, np.nan, 0.0])})
    # trial 0: 0 0 0 -1 1 0 0 ; trial 1: 1 1 1 1 0 0 0 ; trial 2: 0 0 2 2 2 2 2
    assert dec.unassigned_fraction == pytest.approx(1 / 21)
    np.testing.assert_allclose(dec.occupancy, np.array([10, 5, 5]) / 20)
    assert dec.transition_counts.tolist() == [[0, 1, 1], [2, 0, 0], [0, 0, 0]]
    assert dec.switches_per_trial.tolist() == [2, 1, 1]
    assert dec.end_state.tolist() == [0, 0, 2]
    # state 0 segments: (0.3, censored), (0.2, censored), (0.3, censored), (0.2, censored)
    # -> every state-0 segment touches an edge: no complete segment
    assert dec.survival[0].n == 4 and dec.survival[0].n_censored == 4
    assert dec.mean_dwell_s[0] == pytest.approx(0.3)
    # state 1: trial 0 bin 4 (complete, 0.1 s), trial 1 bins 0-3 (censored 0.4 s)
    assert dec.mean_dwell_s[1] == pytest.approx(0.1 * 1 + 0.3 * 0.5)
    assert np.isnan(dec.transition_probs[2]).all()
    item = dec.conditions["item"]
    assert item.levels == ["a", "b"]
    np.testing.assert_allclose(item.state_fraction[0], [(5 + 2) / 13, 1 / 13, 5 / 13])
    assert item.mapping.tolist() == [0, 1] and item.mapping_inferred
    np.testing.assert_allclose(item.matching_fraction, [7 / 13, 4 / 7])
    np.testing.assert_allclose(item.switches_per_trial, [1.5, 1.0])
    assert item.chance == pytest.approx(2 / 3)
    out = dec.conditions["outcome"]
    assert out.levels == [0.0, 1.0] and out.n_trials.tolist() == [1, 1]
    given = decode_posteriors(post, bin_size=0.1, min_segment_s=0.0,
                              labels={"item": np.array(["a", "b", "a"])},
                              label_to_state={"item": {"a": 2, "b": 1}})
    g = given.conditions["item"]
    assert not g.mapping_inferred and g.mapping.tolist() == [2, 1]
    assert g.matching_fraction_overall == pytest.approx((5 + 4) / 20)
    d = g.to_dict()
    assert d["levels"] == ["a", "b"] and d["mapping"] == [2, 1]


def test_end_state_decoding_accuracy():
    # items 0/1 end in states 0/1 (5 trials each): perfect leave-one-out decoding
    trials = [[1, 0, 0]] * 5 + [[0, 1, 1]] * 5
    post = [_onehot(t, 2) for t in trials]
    dec = decode_posteriors(post, bin_size=0.05, labels={"item": np.array([0] * 5 + [1] * 5)})
    assert dec.conditions["item"].end_state_accuracy == 1.0
    assert dec.conditions["item"].chance == 0.5


def test_decode_errors():
    good = [_onehot([0, 1], 2)]
    with pytest.raises(InputError, match="posteriors: expected a non-empty list"):
        decode_posteriors([], bin_size=0.1)
    with pytest.raises(InputError, match=r"posteriors: trial 0 has shape \(2,\)"):
        decode_posteriors([np.ones(2)], bin_size=0.1)
    with pytest.raises(InputError, match="posteriors: trial 1 has 3 states, expected 2"):
        decode_posteriors(good + [_onehot([0, 1], 3)], bin_size=0.1)
    with pytest.raises(InputError, match="posteriors: trial 0 is not a probability table"):
        decode_posteriors([np.array([[0.5, 0.6]])], bin_size=0.1)
    with pytest.raises(InputError, match="posterior_threshold: expected a number in"):
        decode_posteriors(good, bin_size=0.1, threshold=0.3)
    with pytest.raises(InputError, match=r"posterior_threshold: expected a number in \[0.5, 1\)"):
        decode_posteriors(good, bin_size=0.1, threshold=1.0)
    with pytest.raises(InputError, match="bin_size: expected a finite number > 0"):
        decode_posteriors(good, bin_size=0.0)
    with pytest.raises(InputError, match="min_segment_s: expected a finite number >= 0"):
        decode_posteriors(good, bin_size=0.1, min_segment_s=-1.0)
    with pytest.raises(InputError, match="labels: column 'x' has 2 values for 1 trials"):
        decode_posteriors(good, bin_size=0.1, labels={"x": np.array([1, 2])})
    with pytest.raises(InputError, match="label 'x' level 1 maps to a state outside 0..1"):
        decode_posteriors(good, bin_size=0.1, labels={"x": np.array([1])},
                          label_to_state={"x": {1: 5}})
    with pytest.raises(InputError, match=r"trial_index: expected 1 entries"):
        find_segments([np.array([0])], bin_size=0.1, trial_index=[1, 2])
    with pytest.raises(InputError, match="n_states: expected a whole number >= 1"):
        decode_posteriors(good, bin_size=0.1, n_states=0)
    with pytest.raises(InputError, match="min_bins: expected a whole number >= 1"):
        assign_bins(good, min_bins=0)
