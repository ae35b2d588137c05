"""Decoding trial labels from the end-of-window state.

Reference library: scikit-learn (NearestCentroid, permutation_test_score with the same
folds, features and permutations). Invented posteriors only test our plumbing."""

import numpy as np
import pytest

from attractorfit.errors import InputError
from attractorfit.states import (centroid_permutation_test, decode_end_state,
                                 end_state_features, stratified_folds)
from attractorfit.states._segments import decode_posteriors


def _features(n, n_states, signal, rng):
    """Invented end-of-window posteriors: level y puts extra mass on state y."""
    y = np.arange(n) % n_states
    raw = rng.dirichlet(np.ones(n_states), size=n)
    raw[np.arange(n), y] += signal
    return raw / raw.sum(axis=1, keepdims=True), y


def _posteriors_ending_in(states, n_states, n_bins, rng, p=0.9):
    """Per-trial posteriors: random state early, ``states[i]`` over the last third."""
    out = []
    for s in states:
        lab = rng.integers(0, n_states, size=n_bins)
        lab[2 * n_bins // 3:] = s
        post = np.full((n_bins, n_states), (1 - p) / (n_states - 1))
        post[np.arange(n_bins), lab] = p
        out.append(post)
    return out


@pytest.mark.filterwarnings("ignore:y_pred contains classes not in y_true")
@pytest.mark.parametrize("score, signal", [("accuracy", 0.0), ("balanced_accuracy", 0.0),
                                           ("balanced_accuracy", 0.35)])
def test_matches_sklearn_permutation_test_score(score, signal):
    # Reference: sklearn.model_selection.permutation_test_score(NearestCentroid()) on the
    # same features and folds. It draws random_state.permutation(n) once per permutation
    # (scikit-learn 1.x, sklearn/model_selection/_validation.py, _shuffle with groups=None),
    # so handing our function the same index permutations must reproduce its score, its
    # null distribution and its p-value exactly.
    from sklearn.model_selection import permutation_test_score
    from sklearn.neighbors import NearestCentroid

    rng = np.random.default_rng(4)
    x, y = _features(46, 3, signal, rng)
    y = np.where(np.arange(46) < 6, 0, y)          # unequal levels: accuracy != balanced
    folds = stratified_folds(y, 5, rng)
    cv = [(np.setdiff1d(np.arange(y.size), f), f) for f in folds]
    b = 24                                             # scikit-learn's loop is slow
    rs = np.random.RandomState(7)
    perms = np.stack([rs.permutation(y.size) for _ in range(b)])
    val, null, p, _ = centroid_permutation_test(x, y, folds=folds, score=score,
                                                permutations=perms)
    ref, ref_null, ref_p = permutation_test_score(NearestCentroid(), x, y, cv=cv,
                                                  n_permutations=b, random_state=7,
                                                  scoring=score)
    assert val == pytest.approx(ref, abs=1e-12)
    np.testing.assert_allclose(null, ref_null, atol=1e-12)
    # p = (1 + b) / (B + 1) in both; we also count shuffled scores equal to the observed
    # one up to float rounding (summation order differs), scikit-learn only exact ones
    ties = int(np.sum(np.abs(ref_null - ref) <= 1e-12))
    assert ref_p - 1e-12 <= p <= ref_p + ties / (b + 1) + 1e-12
    assert p == pytest.approx((1 + np.sum(ref_null >= ref - 1e-12)) / (b + 1), abs=1e-12)
    if signal > 0:
        assert p == pytest.approx(1 / (b + 1))       # far above every shuffled labelling


def test_p_value_is_calibrated_under_null():
    # labels independent of the features: P(p <= 0.04) = 2/50 exactly for B = 49 by
    # exchangeability of the observed and permuted labellings (ties aside).
    rng = np.random.default_rng(5)
    small = 0
    reps = 300
    for _ in range(reps):
        x, _ = _features(30, 3, 0.0, rng)
        y = rng.integers(0, 2, size=30)
        folds = stratified_folds(y, 5, rng)
        small += centroid_permutation_test(x, y, folds=folds, n_permutations=49,
                                           rng=rng)[2] <= 0.04
    # binomial(300, 0.04): mean 12, s.d. 3.4; four s.d. either side
    assert 12 - 4 * 3.4 <= small <= 12 + 4 * 3.4


def test_stratified_folds_partition_and_spread():
    rng = np.random.default_rng(6)
    y = np.array([0] * 13 + [1] * 7 + [2] * 3)
    folds = stratified_folds(y, 5, rng)
    allidx = np.sort(np.concatenate(folds))
    np.testing.assert_array_equal(allidx, np.arange(y.size))
    sizes = [f.size for f in folds]
    assert max(sizes) - min(sizes) <= 1
    for lv in range(3):
        per = [np.sum(y[f] == lv) for f in folds]
        assert max(per) - min(per) <= 1
    assert len(stratified_folds(np.array([0, 1, 0]), 5, rng)) == 3


def test_end_state_features():
    p = [np.tile([[0.2, 0.8]], (20, 1)), np.vstack([np.tile([[0.9, 0.1]], (9, 1)),
                                                     [[0.3, 0.7]]])]
    p[0][-2:] = [[0.6, 0.4], [1.0, 0.0]]
    x = end_state_features(p, end_fraction=0.1)
    np.testing.assert_allclose(x[0], [0.8, 0.2])     # mean of the last ceil(2.0) = 2 bins
    np.testing.assert_allclose(x[1], [0.3, 0.7])     # ceil(1.0) = 1 bin
    x1 = end_state_features(p, end_fraction=1.0)
    np.testing.assert_allclose(x1[1], np.mean(p[1], axis=0))
    xs = end_state_features(p, feature="state", bin_states=[np.array([1, 0]),
                                                            np.array([0, -1])])
    np.testing.assert_array_equal(xs, [[1.0, 0.0], [0.0, 0.0]])


def test_decode_end_state_on_decoded_trials():
    rng = np.random.default_rng(8)
    n = 40
    item = np.array(list("abcd") * 10)
    noise = rng.integers(0, 2, size=n).astype(str)   # unrelated label
    ends = np.array([{"a": 0, "b": 1, "c": 2, "d": 3}[v] for v in item])
    dec = decode_posteriors(_posteriors_ending_in(ends, 4, 30, rng), bin_size=0.05)
    labels = {"item": item, "noise": noise, "constant": np.array(["x"] * n),
              "with_missing": np.where(np.arange(n) < 5, None, item).astype(object)}
    out = decode_end_state(dec, labels, n_permutations=99, rng=1)
    assert set(out) == {"item", "noise", "with_missing"}   # one level: not decodable
    r = out["item"]
    assert r.value == pytest.approx(1.0) and r.p_value == pytest.approx(0.01)
    assert r.chance == pytest.approx(0.25) and r.levels == list("abcd")
    np.testing.assert_array_equal(r.confusion, np.diag([10] * 4))
    assert out["noise"].p_value > 0.05 or out["noise"].value < 0.7
    assert out["with_missing"].n_trials == 35
    d = r.to_dict()
    assert d["score"] == "balanced_accuracy" and d["n_permutations"] == 99
    assert "predicted from the end-of-window state" in r.text()
    # same seed, same result
    again = decode_end_state(dec, labels, n_permutations=99, rng=1)["noise"]
    np.testing.assert_array_equal(again.null, out["noise"].null)
    # the assigned state of the last bin gives the same answer here
    st = decode_end_state(dec, {"item": item}, feature="state", score="accuracy",
                          n_permutations=19, rng=2)["item"]
    assert st.value == pytest.approx(1.0) and st.chance == pytest.approx(0.25)


def test_errors():
    rng = np.random.default_rng(0)
    dec = decode_posteriors(_posteriors_ending_in([0, 1, 0, 1], 2, 10, rng), bin_size=0.05)
    with pytest.raises(InputError, match="decoding.feature: expected 'posterior' or 'state'"):
        decode_end_state(dec, {}, feature="last")
    with pytest.raises(InputError, match=r"decoding.end_fraction: expected a number in \(0, 1\]"):
        decode_end_state(dec, {}, end_fraction=0.0)
    with pytest.raises(InputError, match="decoding.n_folds"):
        decode_end_state(dec, {}, n_folds=1)
    with pytest.raises(InputError, match="column 'x' has 3 values for 4 trials"):
        decode_end_state(dec, {"x": ["a", "b", "a"]})
    with pytest.raises(InputError, match="decoding.score: expected 'accuracy' or"):
        centroid_permutation_test(np.eye(4), [0, 1, 0, 1], folds=[[0, 1], [2, 3]],
                                  score="f1")
    with pytest.raises(InputError, match=r"permutations: expected \(B, 4\) rows"):
        centroid_permutation_test(np.eye(4), [0, 1, 0, 1], folds=[[0, 1], [2, 3]],
                                  permutations=[[0, 0, 1, 2]])
    with pytest.raises(InputError, match="bin_states: needed"):
        end_state_features([np.ones((2, 1))], feature="state")
