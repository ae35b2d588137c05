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

    # ------------------------------------------------------------------ persistence
    def to_arrays(self) -> dict:
        """Plain numpy arrays (no objects) for ``state_model.npz``; see :meth:`from_arrays`.

        Holds the fitted Poisson HMM (``hmm_*``), the vertex codes (``code_*``), the
        factor-analysis latent space with its trajectories (``latent_*``), the
        state-count curves (``choice_*``), the label-to-state mapping (``l2s_*``), the
        decoding settings and what the model was fitted on (unit ids, bin size, trials).
        The data's decoding (posteriors, segments, dwell times) is not stored: it is a
        deterministic function of the model and the binned counts, and
        :meth:`from_arrays` recomputes it.
        """
        m = self.model
        lat = self.latent
        c = self.codes
        traj = list(lat.trajectories)
        k = int(lat.loadings.shape[1]) if np.ndim(lat.loadings) == 2 else 0
        out = {
            "bin_size": np.float64(self.bin_size),
            "unit_ids": np.asarray(self.unit_ids, dtype=str).reshape(-1),
            "n_states": np.int64(self.n_states), "rates_hz": np.asarray(self.rates_hz, float),
            "trial_index": np.asarray(self.trial_index, np.int64),
            "posterior_threshold": np.float64(self.posterior_threshold),
            "min_segment_s": np.float64(self.min_segment_s),
            "hmm_initial_probs": np.asarray(m.initial_probs_, float),
            "hmm_transition_probs": np.asarray(m.transition_probs_, float),
            "hmm_rates": np.asarray(m.rates_, float),
            "hmm_sticky": np.float64(m.sticky), "hmm_n_restarts": np.int64(m.n_restarts),
            "hmm_max_iter": np.int64(m.max_iter), "hmm_tol": np.float64(m.tol),
            "hmm_init": np.str_(m.init),
            "hmm_loglik_history": np.asarray(getattr(m, "loglik_history_", []), float),
            "hmm_objective_history": np.asarray(getattr(m, "objective_history_", []), float),
            "hmm_n_iter": np.int64(getattr(m, "n_iter_", 0)),
            "hmm_converged": np.bool_(getattr(m, "converged_", True)),
            "hmm_restart_objectives": np.asarray(getattr(m, "restart_objectives_", []), float),
            "code_codes": np.asarray(c.codes, np.int64), "code_n_dims": np.int64(c.n_dims),
            "code_cube_r2": np.float64(c.cube_r2), "code_fit_r2": np.float64(c.fit_r2),
            "code_space": np.str_(c.space), "code_axis_effects": np.asarray(c.axis_effects, float),
            "code_exhaustive": np.bool_(c.exhaustive),
            "latent_method": np.str_(lat.method), "latent_n_dims": np.int64(lat.n_dims),
            "latent_loadings": np.asarray(lat.loadings, float),
            "latent_mean": np.asarray(lat.mean, float),
            "latent_noise_variance": np.asarray(lat.noise_variance, float),
            "latent_explained_variance": np.asarray(lat.explained_variance, float),
            "latent_explained_variance_ratio": np.asarray(lat.explained_variance_ratio, float),
            "latent_rotation": np.str_(lat.rotation or ""),
            "latent_rotation_matrix": np.asarray(lat.rotation_matrix, float),
            "latent_trajectories": (np.concatenate(traj).astype(float) if traj
                                    else np.zeros((0, k))),
            "latent_lengths": np.asarray([len(t) for t in traj], np.int64),
            "latent_dims_tested": np.asarray(lat.dims_tested, np.int64),
            "latent_cv_loglik": np.asarray(lat.cv_loglik, float),
            "latent_loo_error": np.asarray(lat.loo_error, float),
            "latent_criterion": np.str_(lat.criterion), "latent_sqrt": np.bool_(lat.sqrt),
            "latent_smooth_s": np.float64(lat.smooth_s),
            "has_choice": np.bool_(self.choice is not None),
        }
        ch = self.choice
        if ch is not None:
            out.update({
                "choice_candidates": np.asarray(ch.candidates, np.int64),
                "choice_chosen": np.int64(ch.chosen), "choice_rule": np.str_(ch.rule),
                "choice_rule_names": np.asarray(list(ch.choices), dtype=str).reshape(-1),
                "choice_rule_values": np.asarray(list(ch.choices.values()), np.int64),
                "choice_n_folds": np.int64(-1 if ch.n_folds is None else ch.n_folds),
                "choice_n_bins": np.int64(ch.n_bins), "choice_n_trials": np.int64(ch.n_trials),
                "choice_sticky": np.float64(ch.sticky),
                "choice_n_parameters": np.asarray(ch.n_parameters, np.int64)})
            for key in ("loglik", "bic", "icl", "heldout_loglik", "heldout_per_bin",
                        "heldout_per_trial", "heldout_se"):
                out[f"choice_{key}"] = np.asarray(getattr(ch, key), float)
        given = [not (name in self.decoding.conditions
                      and self.decoding.conditions[name].mapping_inferred)
                 for name in self.label_to_state]
        out["l2s_labels"] = np.asarray(list(self.label_to_state), dtype=str).reshape(-1)
        out["l2s_given"] = np.asarray(given, bool).reshape(-1)
        for i, mapping in enumerate(self.label_to_state.values()):
            out[f"l2s_levels__{i}"] = np.asarray(list(mapping)).reshape(-1)
            out[f"l2s_states__{i}"] = np.asarray(list(mapping.values()), np.int64).reshape(-1)
        return out

    @classmethod
    def from_arrays(cls, d, binned) -> "StateFit":
        """Rebuild a fit from :meth:`to_arrays` output (or a loaded ``state_model.npz``).

        Parameters
        ----------
        d : mapping of str to ndarray
        binned : BinnedCounts
            The counts the model was fitted on (same units, bin size and trials);
            the data's decoding is recomputed from them with the stored model.

        Returns
        -------
        StateFit

        Raises
        ------
        InputError
            A key is missing, or ``binned`` is not the data the model was fitted on.
        """
        from attractorfit.binning import BinnedCounts
        from attractorfit.latent import LatentFit
        from attractorfit.states._hmm import PoissonHMM
        from attractorfit.states._select import StateCountChoice

        def get(key, old_key=None):
            if key not in d and old_key in d:   # files written before the key was renamed
                key = old_key
            if key not in d:
                raise InputError(f"state model arrays: missing {key!r}; expected the output "
                                 "of StateFit.to_arrays")
            return np.asarray(d[key])

        if not isinstance(binned, BinnedCounts):
            raise InputError(f"binned: expected a BinnedCounts, got {type(binned).__name__}")
        unit_ids = [str(x) for x in get("unit_ids")]
        bin_size = float(get("bin_size"))
        trial_index = get("trial_index").astype(np.int64)
        if ([str(u) for u in binned.unit_ids] != unit_ids or binned.bin_size != bin_size
                or not np.array_equal(binned.trial_index, trial_index)):
            raise InputError(f"binned: {binned.n_units} units, {binned.n_trials} trials at "
                             f"{binned.bin_size:g} s; the state model was fitted on "
                             f"{len(unit_ids)} units, {trial_index.size} trials at "
                             f"{bin_size:g} s (same units, trials and bin size expected)")
        model = PoissonHMM(int(get("n_states")), sticky=float(get("hmm_sticky")),
                           n_restarts=int(get("hmm_n_restarts")),
                           max_iter=int(get("hmm_max_iter")), tol=float(get("hmm_tol")),
                           init=str(get("hmm_init")))
        model.initial_probs_ = get("hmm_initial_probs", "hmm_startprob").astype(float)
        model.transition_probs_ = get("hmm_transition_probs", "hmm_transmat").astype(float)
        model.rates_ = get("hmm_rates").astype(float)
        model.loglik_history_ = get("hmm_loglik_history").astype(float)
        model.objective_history_ = get("hmm_objective_history").astype(float)
        model.n_iter_ = int(get("hmm_n_iter"))
        model.converged_ = bool(get("hmm_converged"))
        model.restart_objectives_ = get("hmm_restart_objectives").astype(float)
        model.n_units_ = model.rates_.shape[1]
        codes = VertexCodes(codes=get("code_codes").astype(np.int64),
                            n_dims=int(get("code_n_dims")), cube_r2=float(get("code_cube_r2")),
                            fit_r2=float(get("code_fit_r2")), space=str(get("code_space")),
                            axis_effects=get("code_axis_effects").astype(float),
                            exhaustive=bool(get("code_exhaustive")))
        lengths = get("latent_lengths").astype(np.int64)
        traj = np.split(get("latent_trajectories").astype(float), np.cumsum(lengths)[:-1])
        latent = LatentFit(
            method=str(get("latent_method")), n_dims=int(get("latent_n_dims")),
            loadings=get("latent_loadings").astype(float), mean=get("latent_mean").astype(float),
            noise_variance=get("latent_noise_variance").astype(float),
            explained_variance=get("latent_explained_variance").astype(float),
            explained_variance_ratio=get("latent_explained_variance_ratio").astype(float),
            rotation=str(get("latent_rotation")) or None,
            rotation_matrix=get("latent_rotation_matrix").astype(float),
            trajectories=list(traj) if lengths.size else [],
            dims_tested=get("latent_dims_tested").astype(np.int64),
            cv_loglik=get("latent_cv_loglik").astype(float),
            loo_error=get("latent_loo_error").astype(float),
            criterion=str(get("latent_criterion")), sqrt=bool(get("latent_sqrt")),
            smooth_s=float(get("latent_smooth_s")))
        choice = None
        if bool(get("has_choice")):
            n_folds = int(get("choice_n_folds"))
            curves = {key: get(f"choice_{key}").astype(float) for key in
                      ("loglik", "bic", "icl", "heldout_loglik", "heldout_per_bin",
                       "heldout_per_trial", "heldout_se")}
            chosen = int(get("choice_chosen"))
            choice = StateCountChoice(
                candidates=get("choice_candidates").astype(np.int64), chosen=chosen,
                rule=str(get("choice_rule")),
                choices={str(k): int(v) for k, v in zip(get("choice_rule_names"),
                                                        get("choice_rule_values"))},
                n_parameters=get("choice_n_parameters").astype(np.int64),
                n_bins=int(get("choice_n_bins")), n_trials=int(get("choice_n_trials")),
                n_folds=None if n_folds < 0 else n_folds, sticky=float(get("choice_sticky")),
                model=model, models={chosen: model}, **curves)
        label_to_state, given = {}, {}
        for i, (name, was_given) in enumerate(zip(get("l2s_labels"), get("l2s_given"))):
            levels = get(f"l2s_levels__{i}").tolist()
            mapping = {lv: int(st) for lv, st in zip(levels, get(f"l2s_states__{i}"))}
            label_to_state[str(name)] = mapping
            if bool(was_given):
                given[str(name)] = mapping
        n_states = int(get("n_states"))
        threshold = float(get("posterior_threshold"))
        min_segment_s = float(get("min_segment_s"))
        dec = _decode(model, binned, n_states=n_states, threshold=threshold,
                      min_segment_s=min_segment_s, label_to_state=given or None)
        return cls(bin_size=bin_size, unit_ids=unit_ids, model=model, choice=choice,
                   n_states=n_states, rates_hz=get("rates_hz").astype(float), latent=latent,
                   codes=codes, decoding=dec, trial_index=trial_index,
                   posterior_threshold=threshold, min_segment_s=min_segment_s,
                   label_to_state=label_to_state)

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
