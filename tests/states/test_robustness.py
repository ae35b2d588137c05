"""Robustness panel (refits around the chosen settings, state matching) and drift of
state occupancy across blocks of trials.

References: scipy.stats.chi2_contingency (chi-square of homogeneity); exhaustive search
over assignments (the optimum the Hungarian method must reach). Invented recordings
only test our plumbing."""

import itertools

import numpy as np
import pytest
from scipy import stats

from attractorfit import bin_spikes
from attractorfit.errors import InputError
from attractorfit.states import (analyse_states, chi_square_homogeneity, match_states,
                                 state_drift, state_robustness)
from attractorfit.states._segments import decode_posteriors


def test_match_states_is_the_optimal_assignment():
    rng = np.random.default_rng(0)
    ref = rng.uniform(1, 30, size=(4, 12))
    perm = np.array([2, 0, 3, 1])
    other = ref[perm] + rng.normal(0, 0.5, size=(4, 12))
    match, r = match_states(ref, other)
    np.testing.assert_array_equal(match, perm)
    assert np.all(r > 0.95)
    # rectangular: 5 states against 4; the optimum of an exhaustive search
    other5 = np.vstack([other, rng.uniform(1, 30, size=(1, 12))])
    m5, r5 = match_states(ref, other5)
    cost = np.linalg.norm(other5[:, None, :] - ref[None], axis=2)
    best = min(sum(cost[i, j] for i, j in zip(rows, range(4)))
               for rows in itertools.permutations(range(5), 4))
    got = sum(cost[i, m5[i]] for i in range(5) if m5[i] >= 0)
    assert got == pytest.approx(best, rel=1e-12)
    assert np.sum(m5 < 0) == 1 and np.isnan(r5[m5 < 0]).all()
    with pytest.raises(InputError, match="same units"):
        match_states(ref, other[:, :5])


@pytest.mark.parametrize("table", [
    [[30, 10, 5], [20, 25, 9]],
    [[12, 0, 7, 3], [9, 0, 11, 8], [4, 0, 16, 2]],   # an empty column is dropped
])
def test_chi_square_matches_scipy(table):
    stat, dof, p = chi_square_homogeneity(table)
    t = np.asarray(table)
    t = t[:, t.sum(axis=0) > 0]
    ref = stats.chi2_contingency(t, correction=False)
    assert stat == pytest.approx(ref.statistic, rel=1e-12)
    assert dof == ref.dof and p == pytest.approx(ref.pvalue, rel=1e-9)


def _decoding(states_per_trial, n_states=3, n_bins=40, p=0.95):
    post = []
    for s in states_per_trial:
        lab = np.asarray(s)
        x = np.full((lab.size, n_states), (1 - p) / (n_states - 1))
        x[np.arange(lab.size), lab] = p
        post.append(x)
    return decode_posteriors(post, bin_size=0.05)


def _trial_states(rng, n_trials, weights, n_bins=40):
    """Each trial: a few long dwells drawn from ``weights[i]`` (one row per trial)."""
    out = []
    for w in weights:
        seq = np.repeat(rng.choice(len(w), size=4, p=w), n_bins // 4)
        out.append(seq)
    return out


def test_state_drift_detects_a_trend_and_not_a_stationary_session():
    rng = np.random.default_rng(1)
    n = 60
    early, late = np.array([0.7, 0.2, 0.1]), np.array([0.1, 0.2, 0.7])
    drifting = [early * (1 - f) + late * f for f in np.linspace(0, 1, n)]
    d = state_drift(_decoding(_trial_states(rng, n, drifting)), n_permutations=199, rng=0)
    assert d.p_value == pytest.approx(1 / 200) and d.counts.sum() == n * 40
    assert d.occupancy[0, 0] > d.occupancy[2, 0] and d.occupancy[2, 2] > d.occupancy[0, 2]
    assert [b.size for b in d.block_trials] == [20, 20, 20]
    flat = state_drift(_decoding(_trial_states(rng, n, [np.ones(3) / 3] * n)),
                       n_permutations=199, rng=0)
    assert flat.p_value > 0.01
    # the bin-wise asymptotic p-value is far smaller than the trial-permutation one
    assert flat.p_asymptotic < flat.p_value
    block = d.summary_block()
    assert block["n_blocks"] == 3 and block["stratified_by"] is None
    h, rows = d.table()
    assert len(rows) == 3 and len(h) == 5 + 3


def test_state_drift_stratified_by_condition_ignores_a_changing_mix():
    # the condition sets the state; its mix changes across the session but, within each
    # condition, occupancy is constant: drift only without stratification
    rng = np.random.default_rng(2)
    n = 60
    cond = np.where(rng.uniform(size=n) < np.linspace(0.1, 0.9, n), "b", "a")
    w = [np.array([0.8, 0.1, 0.1]) if c == "a" else np.array([0.1, 0.1, 0.8]) for c in cond]
    dec = _decoding(_trial_states(rng, n, w))
    plain = state_drift(dec, n_permutations=199, rng=0)
    strat = state_drift(dec, n_permutations=199, condition=cond, rng=0)
    assert plain.p_value <= 0.02 and strat.p_value > 0.05


def test_state_drift_errors():
    dec = _decoding([[0] * 10, [1] * 10])
    with pytest.raises(InputError, match="drift.n_blocks = 3: only 2 trials"):
        state_drift(dec)
    with pytest.raises(InputError, match="condition: expected 2 values"):
        state_drift(dec, n_blocks=2, condition=["a"])


@pytest.fixture(scope="module")
def fitted():
    from attractorfit.synthetic import switching_recording

    rec, _ = switching_recording(n_units=20, n_states=3, n_trials=20, trial_duration=2.0,
                                 mean_dwell_s=0.4, modulation=0.8, rng=3)
    b = bin_spikes(rec, bin_size=0.05)
    sf = analyse_states(b, n_states=3, latent_dims=2, rng=0)
    rebinned = {"bin_halved": bin_spikes(rec, bin_size=0.025),
                "bin_doubled": bin_spikes(rec, bin_size=0.1)}
    return b, sf, rebinned


def test_robustness_panel_on_a_three_state_recording(fitted):
    b, sf, rebinned = fitted
    panel = state_robustness(b, sf, rebinned=rebinned, thresholds=(0.6, 0.95), rng=1)
    names = [s.name for s in panel.settings]
    assert names == ["chosen", "states_minus_1", "states_plus_1", "bin_halved", "bin_doubled",
                     "threshold_low", "threshold_high"]
    by = {s.name: s for s in panel.settings}
    ch = by["chosen"]
    np.testing.assert_array_equal(ch.match, [0, 1, 2])
    assert ch.occupancy_tvd == 0 and ch.agreement == 1
    # clear states survive halving/doubling the bin and one extra state
    for name in ("bin_halved", "bin_doubled", "states_plus_1"):
        assert by[name].n_matched_similar == 3, name
        assert by[name].agreement > 0.85, name
    assert by["states_plus_1"].n_states == 4 and np.sum(by["states_plus_1"].match < 0) == 1
    assert by["states_minus_1"].n_states == 2 and by["states_minus_1"].n_matched_similar <= 2
    # a lower threshold assigns more, a higher one fewer bins (same model)
    assert by["threshold_low"].unassigned_fraction <= ch.unassigned_fraction \
        <= by["threshold_high"].unassigned_fraction
    np.testing.assert_array_equal(by["threshold_high"].rates_hz, sf.rates_hz)
    h, rows = panel.table()
    assert len(rows) == 7 and h[0] == "setting"
    h, rows = panel.state_table()
    assert len(rows) == 3 + 2 + 4 + 3 + 3 + 3 + 3
    occ = panel.by_chosen_state("occupancy")
    assert occ.shape == (7, 3) and np.allclose(occ[0], ch.occupancy)
    assert set(panel.summary_block()) == set(names)


def test_robustness_errors(fitted):
    b, sf, rebinned = fitted
    with pytest.raises(InputError, match=r"robustness.thresholds: expected numbers in \(0.5, 1\)"):
        state_robustness(b, sf, state_steps=(), thresholds=(1.0,))
    other = rebinned["bin_doubled"].subset_trials(np.arange(10))
    with pytest.raises(InputError, match="holds other trials"):
        state_robustness(b, sf, state_steps=(), rebinned={"x": other}, thresholds=())
