"""The state analysis of one recording: Poisson HMM with a chosen number of states,
vertex codes, segments, occupancy, dwell times, transitions and condition tables.

:func:`analyse_states` is what the ``states`` and ``run`` commands call; the result,
:class:`StateFit`, carries everything the run folder's ``states`` block and
``states.csv`` hold, and :meth:`StateFit.decode` applies the data's fitted model to
other binned data (e.g. surrogate recordings) through the same code path.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from attractorfit._validation import check_int, check_nonnegative, check_rng
from attractorfit.errors import InputError
from attractorfit.states._segments import StateDecoding, decode_posteriors
from attractorfit.states._vertices import VertexCodes, assign_vertex_codes

__all__ = ["StateFit", "analyse_states"]


@dataclass
class StateFit:
    """Discrete states of one recording.

    Attributes
    ----------
    bin_size : float
        Seconds per bin.
    unit_ids : list of str
    model : PoissonHMM
        The fitted Poisson HMM (``rates_`` in counts per bin).
    choice : StateCountChoice or None
        Candidates and curves the number of states was chosen from (None when
        ``n_states`` was given).
    n_states : int
    rates_hz : ndarray (S, N)
        State rates in Hz (``model.rates_ / bin_size``).
    latent : LatentFit
        Factor-analysis latent space the vertex codes were fitted in.
    codes : VertexCodes
        Vertex codes of the states (``codes.codes`` is S x K of +-1).
    decoding : StateDecoding
        Posteriors, segments, occupancy, dwell times, transitions, condition tables
        of the data.
    trial_index : ndarray of int
        Trials-table row of every analysed trial.
    posterior_threshold : float
    min_segment_s : float
    label_to_state : dict
        ``{label: {level: state}}`` used for the cue-matching tables (given or
        inferred on the data); :meth:`decode` reuses it.
    """

    bin_size: float
    unit_ids: list
    model: object = field(repr=False)
    choice: object = field(repr=False)
    n_states: int
    rates_hz: np.ndarray
    latent: object = field(repr=False)
    codes: VertexCodes
    decoding: StateDecoding = field(repr=False)
    trial_index: np.ndarray
    posterior_threshold: float
    min_segment_s: float
    label_to_state: dict = field(default_factory=dict)

    # ------------------------------------------------------------------ shortcuts
    @property
    def vertices(self) -> np.ndarray:
        """Vertex code of each state (S x K, entries +-1)."""
        return self.codes.codes

    @property
    def vertex_text(self) -> list:
        return self.codes.text()

    @property
    def n_dims(self) -> int:
        return self.codes.n_dims

    @property
    def cube_r2(self) -> float:
        return self.codes.cube_r2

    @property
    def posteriors(self) -> list:
        return self.decoding.posteriors

    @property
    def segments(self):
        return self.decoding.segments

    @property
    def occupancy(self) -> np.ndarray:
        return self.decoding.occupancy

    @property
    def mean_dwell_s(self) -> np.ndarray:
        return self.decoding.mean_dwell_s

    @property
    def survival(self) -> list:
        return self.decoding.survival

    @property
    def transitions(self) -> np.ndarray:
        return self.decoding.transition_counts

    @property
    def unassigned_fraction(self) -> float:
        return self.decoding.unassigned_fraction

    @property
    def conditions(self) -> dict:
        return self.decoding.conditions

    # ------------------------------------------------------------------ outputs
    def summary_block(self) -> dict:
        """The ``states`` block of summary.json (plain lists and numbers)."""
        dec = self.decoding
        out = {
            "n_states": int(self.n_states),
            "vertices": self.vertices.astype(int).tolist(),
            "vertex_text": self.vertex_text,
            "occupancy": dec.occupancy.tolist(),
            "mean_dwell_s": dec.mean_dwell_s.tolist(),
            "cube_r2": float(self.cube_r2),
            "unassigned_fraction": float(dec.unassigned_fraction),
            "n_dims": int(self.n_dims),
            "bin_size_s": float(self.bin_size),
            "posterior_threshold": float(self.posterior_threshold),
            "min_segment_s": float(self.min_segment_s),
            "rates_hz": self.rates_hz.tolist(),
            "transition_counts": dec.transition_counts.tolist(),
            "switches_per_trial_mean": float(np.mean(dec.switches_per_trial))
            if dec.switches_per_trial.size else float("nan"),
            "n_segments": int(len(dec.segments)),
            "latent_dims": int(self.latent.n_dims),
            "conditions": {k: v.to_dict() for k, v in dec.conditions.items()},
        }
        if self.choice is not None:
            ch = self.choice
            out["choice"] = {
                "rule": ch.rule, "candidates": [int(c) for c in ch.candidates],
                "chosen": int(ch.chosen), "loglik": np.asarray(ch.loglik).tolist(),
                "bic": np.asarray(ch.bic).tolist(),
                "heldout_per_bin": np.asarray(ch.heldout_per_bin).tolist(),
                "choices": {k: int(v) for k, v in ch.choices.items()},
            }
        else:
            out["choice"] = {"rule": "given", "chosen": int(self.n_states)}
        return out

    def segment_rows(self) -> list:
        """Rows ``(trial, start, stop, state, vertex)`` of ``states.csv``.

        ``trial`` is the 0-based row of the start-sorted trials table; ``start`` and
        ``stop`` are half-open, in seconds from the start of the trial's analysis
        window; ``state`` is 0-based, -1 for unassigned stretches (empty vertex);
        ``vertex`` is the code with ``H`` for +1 and ``L`` for -1 per axis.
        """
        return self.decoding.segments.rows(self.vertex_text)

    def decode(self, binned) -> StateDecoding:
        """Apply this fit's model to other binned counts (e.g. surrogates).

        The same posterior threshold, minimum segment duration and label-to-state
        mapping as for the data are used, through the same code.

        Parameters
        ----------
        binned : BinnedCounts
            Same units (count and order) and bin size as the data.

        Returns
        -------
        StateDecoding
        """
        from attractorfit.binning import BinnedCounts

        if not isinstance(binned, BinnedCounts):
            raise InputError(f"binned: expected a BinnedCounts, got {type(binned).__name__}")
        if binned.n_units != len(self.unit_ids):
            raise InputError(f"binned: {binned.n_units} units, the state model was fitted on "
                             f"{len(self.unit_ids)}")
        if not np.isclose(binned.bin_size, self.bin_size, rtol=1e-9, atol=0):
            raise InputError(f"binned: bin size {binned.bin_size:g} s, the state model was "
                             f"fitted at {self.bin_size:g} s")
        return _decode(self.model, binned, n_states=self.n_states,
                       threshold=self.posterior_threshold, min_segment_s=self.min_segment_s,
                       label_to_state=self.label_to_state)


def _decode(model, binned, *, n_states, threshold, min_segment_s, label_to_state):
    post = model.predict_proba(binned.sequences(dtype=np.float64))
    return decode_posteriors(post, bin_size=binned.bin_size, n_states=n_states,
                             trial_index=binned.trial_index, labels=binned.labels,
                             threshold=threshold, min_segment_s=min_segment_s,
                             label_to_state=label_to_state)


def analyse_states(binned, *, n_states=None, candidates=range(1, 9), rule=None, sticky=None,
                   n_restarts: int = 3, posterior_threshold: float = 0.8,
                   min_segment_s: float = 0.05, latent_dims=None, label_to_state=None,
                   rng=None, n_jobs: int = 1) -> StateFit:
    """Discrete states of binned counts, with vertex codes and dwell statistics.

    Parameters
    ----------
    binned : BinnedCounts
    n_states : int, optional
        Number of states; None chooses it with
        :func:`~attractorfit.states.choose_n_states` over ``candidates``.
    candidates : iterable of int
    rule : str, optional
        Rule of ``choose_n_states`` (None: its default).
    sticky : float, optional
        Sticky self-transition prior of the HMM (None: its default).
    n_restarts : int
        EM restarts of every HMM fit.
    posterior_threshold : float
        A bin is assigned to a state when its posterior exceeds this (default 0.8).
    min_segment_s : float
        Shorter runs of a state are unassigned (at least one bin; see
        :func:`~attractorfit.states.decode_posteriors`).
    latent_dims : int, optional
        Dimensions of the factor-analysis latent space in which the vertex codes are
        fitted (None: cross-validated).
    label_to_state : dict, optional
        ``{label: {level: state}}`` for the cue-matching tables (default: inferred as
        each level's most occupied state).
    rng : int or Generator, optional
    n_jobs : int
        Parallel HMM fits when choosing the number of states.

    Returns
    -------
    StateFit

    Raises
    ------
    InputError
        Not a BinnedCounts, bad options (the HMM and segment functions name them).
    """
    from attractorfit.binning import BinnedCounts
    from attractorfit.latent import LatentModel
    from attractorfit.states._hmm import PoissonHMM
    from attractorfit.states._select import choose_n_states

    if not isinstance(binned, BinnedCounts):
        raise InputError(f"binned: expected a BinnedCounts, got {type(binned).__name__}")
    rng = check_rng(rng)
    check_nonnegative("min_segment_s", min_segment_s)
    n_jobs = check_int("n_jobs", n_jobs, low=1)
    ss = np.random.SeedSequence(int(rng.integers(2 ** 63 - 1)))
    hmm_seed, latent_seed, code_seed = ss.spawn(3)
    seqs = binned.sequences(dtype=np.float64)
    hmm_opts = {"n_restarts": n_restarts}
    if sticky is not None:
        hmm_opts["sticky"] = sticky
    if n_states is None:
        kw = dict(candidates=candidates, rng=np.random.default_rng(hmm_seed), n_jobs=n_jobs,
                  **hmm_opts)
        if rule is not None:
            kw["rule"] = rule
        choice = choose_n_states(seqs, **kw)
        model = choice.model
        s = int(choice.chosen)
    else:
        s = check_int("n_states", n_states, low=1)
        choice = None
        model = PoissonHMM(s, rng=np.random.default_rng(hmm_seed), **hmm_opts).fit(seqs)
    latent = LatentModel("fa", n_dims=latent_dims, max_dims=min(10, binned.n_units - 1),
                         rng=np.random.default_rng(latent_seed)).fit(binned).result_
    codes = assign_vertex_codes(np.asarray(model.rates_), latent=latent,
                                rng=np.random.default_rng(code_seed))
    dec = _decode(model, binned, n_states=s, threshold=posterior_threshold,
                  min_segment_s=min_segment_s, label_to_state=label_to_state)
    mapping = {name: {lv: int(st) for lv, st in zip(tab.levels, tab.mapping)}
               for name, tab in dec.conditions.items()}
    if label_to_state:
        mapping.update({k: dict(v) for k, v in label_to_state.items()})
    return StateFit(bin_size=binned.bin_size, unit_ids=list(binned.unit_ids), model=model,
                    choice=choice, n_states=s,
                    rates_hz=np.asarray(model.rates_, dtype=float) / binned.bin_size,
                    latent=latent, codes=codes, decoding=dec,
                    trial_index=binned.trial_index.copy(),
                    posterior_threshold=float(posterior_threshold),
                    min_segment_s=float(min_segment_s), label_to_state=mapping)
