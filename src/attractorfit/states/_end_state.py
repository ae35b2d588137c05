"""Decoding a trial label (choice, outcome, remembered item) from the state at the end
of the analysis window.

If the delay activity holds the item in a discrete state, the state occupied when the
delay ends should predict what the animal does next. For each categorical trial label
this module measures the cross-validated accuracy of predicting the label from the
end-of-window state, the chance level, and a permutation p-value.

Features. By default each trial is described by its state posterior averaged over the
last ``end_fraction`` of its analysis window (at least one bin): a point on the
probability simplex that keeps the model's uncertainty. With ``feature="state"`` it is
the one-hot code of the state assigned to the trial's last bin (all zeros when that bin
is unassigned).

Classifier. Nearest class centroid in Euclidean distance [1]_ (the class mean of the
training trials' features; ties go to the first level in sorted order), a classifier
with no tuning parameter, so the cross-validation has nothing to select and the
permutation test needs no nested loop.

Score and p-value. The trials are dealt into ``n_folds`` folds stratified by the
label; the score is the mean over folds (the convention of scikit-learn's
``cross_val_score``) of the balanced accuracy (mean recall over the label's values
present in the test fold; chance 1 / values whatever their frequencies, so a common
outcome such as 80 % correct trials does not pass for decoding) or of the plain
accuracy (chance: the frequency of the most common value). The null
distribution re-evaluates the same folds with the labels randomly permuted across
trials, and p = (1 + b) / (B + 1) with b the permutations whose accuracy reaches the
observed one [2]_ (the same test as ``sklearn.model_selection.permutation_test_score``,
which the tests use as reference).

References
----------
.. [1] Tibshirani, R., Hastie, T., Narasimhan, B. & Chu, G. (2002). Diagnosis of
   multiple cancer types by shrunken centroids of gene expression. PNAS 99:6567-6572.
.. [2] Ojala, M. & Garriga, G. C. (2010). Permutation tests for studying classifier
   performance. Journal of Machine Learning Research 11:1833-1863.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from attractorfit._validation import check_fraction, check_int, check_rng
from attractorfit.errors import InputError

__all__ = ["EndStateDecoding", "end_state_features", "stratified_folds",
           "centroid_permutation_test", "decode_end_state"]


def end_state_features(posteriors, *, end_fraction: float = 0.1, feature: str = "posterior",
                       bin_states=None) -> np.ndarray:
    """One feature vector per trial from the end of its analysis window.

    Parameters
    ----------
    posteriors : list of ndarray (T_i x S)
        Per-bin state posteriors of each trial.
    end_fraction : float
        Fraction of the window, at its end, over which the posterior is averaged
        (``ceil(end_fraction * T_i)`` bins, at least 1). Used with ``feature="posterior"``.
    feature : {"posterior", "state"}
        ``"posterior"``: mean posterior over the end of the window (S values summing
        to 1). ``"state"``: one-hot code of the state assigned to the last bin (needs
        ``bin_states``; zeros when unassigned).
    bin_states : list of ndarray of int, optional
        Assigned state of every bin (-1 unassigned), e.g. ``StateDecoding.bin_states``.

    Returns
    -------
    ndarray (n_trials, S)
        NaN rows for trials without bins.
    """
    end_fraction = check_fraction("decoding.end_fraction", end_fraction, low=0.0, high=1.0)
    if end_fraction <= 0:
        raise InputError("decoding.end_fraction: expected a number in (0, 1], got 0")
    if feature not in ("posterior", "state"):
        raise InputError(f"decoding.feature: expected 'posterior' or 'state', got {feature!r}")
    if feature == "state" and bin_states is None:
        raise InputError("bin_states: needed with feature='state'")
    n_states = posteriors[0].shape[1]
    x = np.full((len(posteriors), n_states), np.nan)
    for i, p in enumerate(posteriors):
        t = len(p)
        if t == 0:
            continue
        if feature == "posterior":
            k = max(1, int(math.ceil(end_fraction * t - 1e-9)))
            x[i] = np.asarray(p[t - k:], dtype=float).mean(axis=0)
        else:
            x[i] = 0.0
            s = int(bin_states[i][-1])
            if s >= 0:
                x[i, s] = 1.0
    return x


def stratified_folds(y, n_folds: int, rng) -> list:
    """Test-set indices of ``n_folds`` folds, each level of ``y`` spread over them.

    The trials of each level are shuffled and dealt to the folds in turn, continuing
    from where the previous level stopped, so fold sizes differ by at most one.
    """
    y = np.asarray(y)
    n_folds = min(int(n_folds), y.size)
    fold = np.empty(y.size, dtype=np.int64)
    start = 0
    for lv in np.unique(y):
        idx = rng.permutation(np.flatnonzero(y == lv))
        fold[idx] = (start + np.arange(idx.size)) % n_folds
        start = (start + idx.size) % n_folds
    return [np.flatnonzero(fold == f) for f in range(n_folds) if np.any(fold == f)]


def _centroid_accuracy(x, labels, folds, n_classes):
    """Mean-over-folds accuracy of nearest-centroid prediction for each label row.

    ``labels`` is (R, n) integer codes (one row per labelling: observed, permuted);
    returns accuracies (R,), balanced accuracies (R,) and the predictions of every
    trial (R, n). The balanced accuracy of a fold is the mean recall over the classes
    present in its test set (scikit-learn's ``balanced_accuracy_score``).
    """
    r, n = labels.shape
    pred = np.empty((r, n), dtype=np.int64)
    acc = np.zeros(r)
    bal = np.zeros(r)
    eye = np.eye(n_classes)
    for test in folds:
        train = np.setdiff1d(np.arange(n), test)
        onehot = eye[labels[:, train]]                       # (R, n_train, C)
        counts = onehot.sum(axis=1)                           # (R, C)
        sums = np.einsum("rnc,nf->rcf", onehot, x[train])     # (R, C, F)
        with np.errstate(invalid="ignore", divide="ignore"):
            cent = sums / counts[:, :, None]
        d = np.sum((x[test][None, :, None, :] - cent[:, None, :, :]) ** 2, axis=-1)
        d = np.where(counts[:, None, :] > 0, d, np.inf)       # classes absent from training
        p = np.argmin(d, axis=-1)                             # (R, n_test)
        pred[:, test] = p
        truth = labels[:, test]
        hit = p == truth
        acc += np.mean(hit, axis=1)
        support = eye[truth].sum(axis=1)                      # (R, C) test trials per class
        correct = (eye[truth] * hit[:, :, None]).sum(axis=1)  # (R, C) correct per class
        with np.errstate(invalid="ignore", divide="ignore"):
            recall = np.where(support > 0, correct / support, 0.0)
        bal += recall.sum(axis=1) / np.maximum((support > 0).sum(axis=1), 1)
    return acc / len(folds), bal / len(folds), pred


def centroid_permutation_test(x, y, *, folds, n_permutations: int = 199,
                              score: str = "accuracy", permutations=None, rng=None) -> tuple:
    """Cross-validated nearest-centroid accuracy and its label-permutation p-value.

    Parameters
    ----------
    x : ndarray (n, F)
        Features of each trial.
    y : array (n,)
        Integer class codes 0 .. C-1.
    folds : list of ndarray of int
        Test-set indices (the training set is every other trial).
    n_permutations : int
        B random permutations of ``y`` across trials; the folds stay the same.
    score : {"accuracy", "balanced_accuracy"}
        Per fold, the fraction of test trials predicted correctly, or the mean recall
        over the classes present in the test fold; averaged over folds.
    permutations : ndarray of int (B, n), optional
        Index permutations to apply to ``y`` (``y[perm]``) instead of drawing
        ``n_permutations`` from ``rng`` (e.g. to reproduce another program's draws).
    rng : int or Generator, optional

    Returns
    -------
    score : float
        The observed score.
    null : ndarray (B,)
        The score under each permutation.
    p_value : float
        (1 + #{null >= score}) / (B + 1) [2]_.
    predictions : ndarray of int (n,)
        Predicted class of every trial (observed labels) when it was in the test fold.
    """
    val, null, p, pred, _, _ = _permutation_scores(x, y, folds=folds,
                                                   n_permutations=n_permutations, score=score,
                                                   permutations=permutations, rng=rng)
    return val, null, p, pred


def _permutation_scores(x, y, *, folds, n_permutations, score, permutations, rng) -> tuple:
    """``centroid_permutation_test`` plus the observed plain and balanced accuracies."""
    rng = check_rng(rng)
    n_permutations = check_int("decoding.n_permutations", n_permutations, low=1)
    if score not in ("accuracy", "balanced_accuracy"):
        raise InputError(f"decoding.score: expected 'accuracy' or 'balanced_accuracy', got "
                         f"{score!r}")
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=np.int64)
    c = int(y.max()) + 1
    if permutations is None:
        idx = [rng.permutation(y.size) for _ in range(n_permutations)]
    else:
        idx = np.asarray(permutations, dtype=np.int64)
        if idx.ndim != 2 or idx.shape[1] != y.size or np.any(
                np.sort(idx, axis=1) != np.arange(y.size)):
            raise InputError(f"permutations: expected (B, {y.size}) rows that each permute "
                             f"0..{y.size - 1}, got shape {idx.shape}")
        n_permutations = idx.shape[0]
    perms = np.stack([y] + [y[i] for i in idx])
    acc, bal, pred = _centroid_accuracy(x, perms, folds, c)
    val = acc if score == "accuracy" else bal
    null = val[1:]
    # a tolerance so that float noise between identical scores does not decide
    b = int(np.sum(null >= val[0] - 1e-12))
    return float(val[0]), null, (1 + b) / (n_permutations + 1), pred[0], acc[0], bal[0]


@dataclass
class EndStateDecoding:
    """How well the end-of-window state predicts one trial label.

    Attributes
    ----------
    label : str
        Trials-table column.
    levels : list
        Its distinct values (trials with a missing value are left out).
    n_trials : int
        Trials used.
    feature : str
        ``"posterior"`` or ``"state"`` (see module notes).
    end_fraction : float
    n_folds : int
    score : str
        ``"balanced_accuracy"`` or ``"accuracy"``: what ``value``, ``null`` and
        ``p_value`` refer to.
    value : float
        The cross-validated score (mean over folds).
    chance : float
        Chance level of ``score`` by guessing without the state: 1 / levels for
        balanced accuracy, the proportion of the most common level for accuracy.
    null_mean : float
        Mean score under label permutations (the chance level of this classifier on
        these folds).
    null : ndarray (B,)
    p_value : float
        (1 + b) / (B + 1).
    accuracy : float
        Plain cross-validated accuracy (mean over folds), whatever ``score`` is.
    majority : float
        Proportion of the most common level.
    balanced_accuracy : float
        Cross-validated balanced accuracy (mean over folds).
    confusion : ndarray of int (L, L)
        Rows: true level, columns: predicted level (test-fold predictions).
    """

    label: str
    levels: list
    n_trials: int
    feature: str
    end_fraction: float
    n_folds: int
    score: str
    value: float
    chance: float
    null_mean: float
    null: np.ndarray
    p_value: float
    accuracy: float
    majority: float
    balanced_accuracy: float
    confusion: np.ndarray

    @property
    def n_permutations(self) -> int:
        return int(self.null.size)

    def to_dict(self) -> dict:
        """Plain numbers for summary.json."""
        return {"label": self.label, "levels": [_plain(v) for v in self.levels],
                "n_trials": int(self.n_trials), "feature": self.feature,
                "end_fraction": float(self.end_fraction), "n_folds": int(self.n_folds),
                "score": self.score, "value": float(self.value), "chance": float(self.chance),
                "null_mean": float(self.null_mean), "p_value": float(self.p_value),
                "n_permutations": self.n_permutations, "accuracy": float(self.accuracy),
                "majority": float(self.majority),
                "balanced_accuracy": float(self.balanced_accuracy),
                "confusion": self.confusion.astype(int).tolist()}

    def text(self) -> str:
        """One plain sentence."""
        what = "balanced accuracy" if self.score == "balanced_accuracy" else "accuracy"
        return (f"'{self.label}' ({len(self.levels)} values) is predicted from the "
                f"end-of-window state with cross-validated {what} {self.value:.0%} (chance "
                f"{self.chance:.0%}; {self.null_mean:.0%} with shuffled labels; p = "
                f"{self.p_value:.3g} from {self.n_permutations} permutations, "
                f"{self.n_trials} trials; plain accuracy {self.accuracy:.0%}, most common "
                f"value {self.majority:.0%}).")


def _plain(v):
    return v.item() if isinstance(v, np.generic) else v


def _missing(v) -> bool:
    return v is None or (isinstance(v, (float, np.floating)) and math.isnan(v))


def decode_end_state(decoding, labels, *, end_fraction: float = 0.1,
                     feature: str = "posterior", score: str = "balanced_accuracy",
                     n_folds: int = 5, n_permutations: int = 199, rng=None) -> dict:
    """Cross-validated decoding of each trial label from the end-of-window state.

    Parameters
    ----------
    decoding : StateDecoding
        Posteriors and assigned states of the trials (``StateFit.decoding``).
    labels : dict of str to array
        Categorical trial labels, one value per trial of ``decoding`` (e.g.
        ``pipeline.categorical_labels(binned.labels)``).
    end_fraction : float
        Fraction of the window at its end over which the posterior is averaged.
    feature : {"posterior", "state"}
    score : {"balanced_accuracy", "accuracy"}
        What the p-value tests. Balanced accuracy (default) is not inflated by a
        common level (e.g. 80 % correct trials); its chance level is 1 / levels.
    n_folds : int
        Folds of the stratified cross-validation (at most the number of trials).
    n_permutations : int
        Label permutations of the p-value.
    rng : int or Generator, optional

    Returns
    -------
    dict of str to EndStateDecoding
        One entry per label with at least two levels and at least four trials.

    Raises
    ------
    InputError
        Bad options, or a label column whose length is not the number of trials.

    Notes
    -----
    The state model was fitted without the labels, so no label information reaches
    the features; the cross-validation guards the centroids only. The trials are
    assumed exchangeable: slow drift that correlates with a label inflates accuracy.
    """
    rng = check_rng(rng)
    n_folds = check_int("decoding.n_folds", n_folds, low=2)
    n_permutations = check_int("decoding.n_permutations", n_permutations, low=1)
    x_all = end_state_features(decoding.posteriors, end_fraction=end_fraction,
                               feature=feature, bin_states=decoding.bin_states)
    n = x_all.shape[0]
    out = {}
    for name, values in labels.items():
        vals = np.asarray(values, dtype=object)
        if vals.shape != (n,):
            raise InputError(f"labels: column {name!r} has {vals.size} values for {n} trials")
        keep = np.array([not _missing(v) for v in vals]) & np.all(np.isfinite(x_all), axis=1)
        text = np.array([str(v) for v in vals[keep]])
        levels_text, y = np.unique(text, return_inverse=True)
        if levels_text.size < 2 or keep.sum() < 4:
            continue
        first = {}
        for v in vals[keep]:
            first.setdefault(str(v), _plain(v))
        levels = [first[t] for t in levels_text]
        x = x_all[keep]
        folds = stratified_folds(y, n_folds, rng)
        # the observed labels are row 0 of the permutation batch: its plain and balanced
        # accuracies come with it
        val, null, p, pred, acc, bal = _permutation_scores(
            x, y, folds=folds, score=score, n_permutations=n_permutations, permutations=None,
            rng=rng)
        conf = np.zeros((levels_text.size, levels_text.size), dtype=np.int64)
        np.add.at(conf, (y, pred), 1)
        majority = float(np.bincount(y).max() / y.size)
        out[name] = EndStateDecoding(
            label=str(name), levels=levels, n_trials=int(keep.sum()), feature=feature,
            end_fraction=float(end_fraction), n_folds=len(folds), score=score, value=val,
            chance=1.0 / levels_text.size if score == "balanced_accuracy" else majority,
            null_mean=float(null.mean()), null=null, p_value=float(p),
            accuracy=float(acc), majority=majority, balanced_accuracy=float(bal),
            confusion=conf)
    return out
