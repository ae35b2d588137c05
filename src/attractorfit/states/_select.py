"""Choice of the number of states of a Poisson HMM.

RESULTS_PLACEHOLDER
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from sklearn.exceptions import ConvergenceWarning

from attractorfit._validation import check_int, check_nonnegative, check_rng
from attractorfit.errors import InputError
from attractorfit.states._hmm import PoissonHMM, _CountData, check_count_sequences

__all__ = ["StateCountChoice", "choose_n_states", "RULES"]

#: Rules understood by :func:`choose_n_states`.
RULES = ("bic", "icl", "heldout", "heldout_1se")
_NEEDS_FOLDS = ("heldout", "heldout_1se")


def _trial_folds(n_trials: int, n_folds, rng) -> list:
    """Random partition of trial indices into ``n_folds`` test sets (sorted arrays)."""
    if n_trials < 2:
        raise InputError(f"sequences: cross-validation over trials needs at least 2 trials, "
                         f"got {n_trials}")
    n_folds = check_int("n_folds", n_folds, low=2)
    if n_folds > n_trials:
        raise InputError(f"n_folds: {n_folds} folds need at least {n_folds} trials, got "
                         f"{n_trials}")
    perm = rng.permutation(n_trials)
    return [np.sort(perm[f::n_folds]) for f in range(n_folds)]


def _heldout_per_trial(seqs, folds, make_model, seed) -> np.ndarray:
    """Held-out log-likelihood of every trial: fit on the other folds, score the trial.

    ``make_model(seed)`` returns an unfitted estimator; fold f uses the f-th child of
    ``seed`` (a SeedSequence), so the result does not depend on execution order.
    """
    out = np.empty(len(seqs))
    for f, (test, child) in enumerate(zip(folds, seed.spawn(len(folds)))):
        out[test] = _fold_loglik(seqs, test, make_model, child)
    return out


def _fold_loglik(seqs, test, make_model, seed):
    mask = np.ones(len(seqs), dtype=bool)
    mask[test] = False
    train = [x for x, m in zip(seqs, mask) if m]
    model = make_model(seed).fit(train)
    return model._sequence_logliks(_CountData([seqs[i] for i in test]))
