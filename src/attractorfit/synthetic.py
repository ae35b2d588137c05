"""Invented recordings with a known hidden truth, for the demo, tests and benchmarks.

Nothing here is fitted to data, and none of it is the low-rank network model: the
switching generator is a semi-Markov process among states with fixed rate vectors,
and spikes are gamma-renewal processes driven through time rescaling. Use these only
to check that the analysis recovers what was put in.

References
----------
.. [1] Brown, E. N., Barbieri, R., Ventura, V., Kass, R. E. & Frank, L. M. (2002). The
   time-rescaling theorem and its application to neural spike train data analysis.
   Neural Computation 14:325-346.
.. [2] Nawrot, M. P. et al. (2008). Measurement of variability dynamics in cortical spike
   trains. Journal of Neuroscience Methods 169:374-390.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from attractorfit._validation import check_int, check_positive, check_rng
from attractorfit.recording import Recording

__all__ = ["SyntheticTruth", "gamma_spikes", "switching_recording",
           "continuous_latent_recording", "state_rate_vectors"]


@dataclass
class SyntheticTruth:
    """Hidden truth of an invented recording.

    Attributes
    ----------
    state_rates_hz : ndarray (S, N) or None
        Rate of each unit in each state (switching recordings).
    switch_times : list of ndarray
        Per trial, times (s from trial start) at which a new state segment begins
        (first entry 0).
    states : list of ndarray
        Per trial, the state of each segment.
    trial_duration : float
    latents : list of ndarray
        Per trial, latent trajectories on the fine grid (continuous recordings).
    grid_dt : float
        Step of the fine grid of ``latents``.
    """

    state_rates_hz: np.ndarray | None
    switch_times: list = field(default_factory=list)
    states: list = field(default_factory=list)
    trial_duration: float = 0.0
    latents: list = field(default_factory=list)
    grid_dt: float = 0.0

    def state_at(self, trial: int, times) -> np.ndarray:
        """True state at ``times`` (s from the trial start) in ``trial``."""
        k = np.searchsorted(self.switch_times[trial], np.asarray(times), side="right") - 1
        return self.states[trial][np.clip(k, 0, None)]


def gamma_spikes(edges, rates_hz, *, order: float = 1.0, rng=None) -> np.ndarray:
    """Spike times of a gamma renewal process with a piecewise-constant rate.

    Intervals are gamma distributed with shape ``order`` and mean 1 in operational
    time Lambda(t) = integral of the rate; mapping back through Lambda^-1 gives a
    process with the requested rate (time rescaling, [1]_). ``order`` = 1 is Poisson;
    the stationary ISI CV is 1/sqrt(order) and the long-window Fano factor 1/order [2]_.

    Parameters
    ----------
    edges : ndarray (M + 1,)
        Segment edges in seconds (increasing).
    rates_hz : ndarray (M,)
        Rate in each segment (>= 0).
    order : float
        Gamma shape parameter (> 0).
    rng : int or Generator, optional

    Returns
    -------
    ndarray of spike times (s), sorted.
    """
    rng = check_rng(rng)
    edges = np.asarray(edges, dtype=float)
    rates = np.asarray(rates_hz, dtype=float)
    cum = np.concatenate([[0.0], np.cumsum(rates * np.diff(edges))])
    total = cum[-1]
    if total <= 0:
        return np.zeros(0)
    # random phase: start in equilibrium by drawing the first event from a
    # stretched first interval (approximate stationary start for order != 1)
    n_guess = int(total + 5 * np.sqrt(total) + 10)
    ops = []
    t = -rng.gamma(order, 1.0 / order) * rng.random()
    while t < total:
        steps = rng.gamma(order, 1.0 / order, size=n_guess)
        c = t + np.cumsum(steps)
        ops.append(c)
        t = c[-1]
    op = np.concatenate(ops)
    op = op[(op >= 0) & (op < total)]
    return np.interp(op, cum, edges)


def state_rate_vectors(n_states: int, n_units: int, *, rate_range=(2.0, 25.0),
                       modulation: float = 0.6, rng=None) -> np.ndarray:
    """Random state rate vectors (S x N, Hz): a base rate per unit, modulated per state.

    Each unit's log-rate in state s is log(base) + modulation * z_{s,i}, z standard
    normal, so ``modulation`` is the s.d. of the state modulation in log units.
    """
    rng = check_rng(rng)
    lo, hi = rate_range
    base = np.exp(rng.uniform(np.log(lo), np.log(hi), size=n_units))
    z = rng.standard_normal((n_states, n_units))
    return base[None, :] * np.exp(modulation * z)


def switching_counts(rates_hz, *, n_trials: int, n_bins: int, bin_size: float = 0.02,
                     mean_dwell_s: float = 0.4, switch_weights=None, start=None,
                     level_names=None, rng=None):
    """Binned counts of a semi-Markov switching process, without spike times.

    A cheap count-level stand-in for :func:`switching_recording` when only
    :class:`~attractorfit.binning.BinnedCounts` are needed: each trial starts in
    ``start[k]`` (default ``k mod S``), dwells are gamma (shape 2, mean
    ``mean_dwell_s``, rounded to whole bins, at least one), the next state is drawn
    from ``switch_weights`` (diagonal ignored; default uniform over the other states), and
    counts are Poisson with mean ``rates_hz[state] * bin_size``.

    Parameters
    ----------
    rates_hz : ndarray (S, N)
    n_trials, n_bins : int
    bin_size : float
        Seconds per bin.
    mean_dwell_s : float
    switch_weights : array_like (S, S), optional
        Relative weights of the next state at a switch (row = current state).
    start : array_like of int (n_trials,), optional
    level_names : str or sequence, optional
        Name of each starting state in the ``item`` label (default ``str(state)``).
    rng : None, int or Generator

    Returns
    -------
    BinnedCounts
        With label ``item`` = the starting state's name.
    """
    from attractorfit.binning import BinnedCounts

    rng = check_rng(rng)
    rates_hz = np.asarray(rates_hz, dtype=float)
    n_states, n_units = rates_hz.shape
    tm = (np.ones((n_states, n_states)) if switch_weights is None
          else np.array(switch_weights, float))
    np.fill_diagonal(tm, 0.0)
    tm /= tm.sum(axis=1, keepdims=True)
    start = np.arange(n_trials) % n_states if start is None else np.asarray(start)
    names = [str(i) for i in range(n_states)] if level_names is None else list(level_names)
    counts = np.zeros((n_trials, n_bins, n_units), dtype=np.uint16)
    for k in range(n_trials):
        lab = np.empty(n_bins, dtype=np.int64)
        t, s = 0, int(start[k])
        while t < n_bins:
            d = max(1, int(round(rng.gamma(2.0, mean_dwell_s / bin_size / 2.0))))
            lab[t:t + d] = s
            t += d
            s = int(rng.choice(n_states, p=tm[s]))
        counts[k] = rng.poisson(rates_hz[lab] * bin_size)
    return BinnedCounts(counts=counts, n_valid=np.full(n_trials, n_bins), bin_size=bin_size,
                        unit_ids=[str(i) for i in range(n_units)],
                        unit_index=np.arange(n_units), trial_index=np.arange(n_trials),
                        window_start=np.arange(n_trials) * (n_bins * bin_size + 1.0),
                        labels={"item": np.array([names[i] for i in start])})


def _semi_markov(duration, start_state, n_states, mean_dwell_s, dwell_shape, next_probs, rng):
    times, states = [0.0], [start_state]
    t, s = 0.0, start_state
    while True:
        d = rng.gamma(dwell_shape, mean_dwell_s / dwell_shape)
        t += d
        if t >= duration:
            break
        s = int(rng.choice(n_states, p=next_probs[s]))
        times.append(t)
        states.append(s)
    return np.array(times), np.array(states, dtype=np.int64)


def switching_recording(*, n_units: int = 60, n_states: int = 4, n_trials: int = 100,
                        trial_duration: float = 3.0, mean_dwell_s: float = 0.3,
                        dwell_shape: float = 2.0, modulation: float = 0.6,
                        rate_range=(2.0, 25.0), gamma_order: float = 2.0,
                        state_rates_hz=None, switch_weights=None, start_states=None,
                        labels=None, iti: float = 0.5, rng=None):
    """Trials of a hidden semi-Markov switch among discrete states with gamma spiking.

    Parameters
    ----------
    n_units, n_states, n_trials : int
    trial_duration : float
        Seconds per trial.
    mean_dwell_s : float
        Mean dwell time of a state segment; dwell times are gamma with shape
        ``dwell_shape`` (not exponential, so the process is not a hidden Markov chain).
    modulation : float
        s.d. of per-state log-rate modulation (see :func:`state_rate_vectors`).
    rate_range : tuple
        Range of base rates (Hz).
    gamma_order : float
        Order of the gamma renewal spiking (1 = Poisson; > 1 more regular).
    state_rates_hz : ndarray (S, N), optional
        Use these rates instead of random ones.
    switch_weights : ndarray (S, S), optional
        Relative weights of the next state at a switch (row = current state; diagonal
        ignored, rows normalised). Default: uniform over the other states.
    start_states : array of int (n_trials,), optional
        First state of each trial. Default: uniform.
    labels : dict of arrays, optional
        Extra trial label columns.
    iti : float
        Silence between trials (s), recorded but outside trials.
    rng : int or Generator

    Returns
    -------
    recording : Recording
    truth : SyntheticTruth
    """
    rng = check_rng(rng)
    n_units = check_int("n_units", n_units, low=1)
    n_states = check_int("n_states", n_states, low=1)
    n_trials = check_int("n_trials", n_trials, low=1)
    trial_duration = check_positive("trial_duration", trial_duration)
    mean_dwell_s = check_positive("mean_dwell_s", mean_dwell_s)
    if state_rates_hz is None:
        state_rates_hz = state_rate_vectors(n_states, n_units, rate_range=rate_range,
                                            modulation=modulation, rng=rng)
    rates = np.asarray(state_rates_hz, dtype=float)
    if switch_weights is None:
        switch_weights = np.ones((n_states, n_states))
    switch_weights = np.array(switch_weights, dtype=float)
    if n_states > 1:
        np.fill_diagonal(switch_weights, 0.0)
    switch_weights /= switch_weights.sum(axis=1, keepdims=True)
    if start_states is None:
        start_states = rng.integers(n_states, size=n_trials)
    truth = SyntheticTruth(state_rates_hz=rates, trial_duration=trial_duration)
    all_t, all_u = [], []
    starts = np.arange(n_trials) * (trial_duration + iti) + iti
    for k in range(n_trials):
        sw, st = _semi_markov(trial_duration, int(start_states[k]), n_states, mean_dwell_s,
                              dwell_shape, switch_weights, rng)
        truth.switch_times.append(sw)
        truth.states.append(st)
        edges = np.append(sw, trial_duration) + starts[k]
        for i in range(n_units):
            t = gamma_spikes(edges, rates[st, i], order=gamma_order, rng=rng)
            all_t.append(t)
            all_u.append(np.full(t.size, i))
    trials = {"start": starts, "stop": starts + trial_duration,
              "first_state": np.asarray(start_states)}
    for name, col in (labels or {}).items():
        trials[name] = np.asarray(col)
    rec = Recording.from_arrays(np.concatenate(all_t), np.concatenate(all_u),
                                unit_ids=[str(i) for i in range(n_units)], trials=trials,
                                metadata={"source": "synthetic-switching"},
                                source="synthetic-switching")
    return rec, truth


def continuous_latent_recording(*, n_units: int = 60, n_latents: int = 1, n_trials: int = 100,
                                trial_duration: float = 3.0, timescale_s: float = 0.3,
                                loading_scale: float = 0.6, rate_range=(2.0, 25.0),
                                link: str = "exp", gamma_order: float = 1.0,
                                grid_dt: float = 0.005, latent_dist: str = "gaussian",
                                drift: float = 0.0, iti: float = 0.5, n_conditions: int = 1,
                                psth_modulation: float = 0.0, rng=None):
    """Trials driven by continuous Ornstein-Uhlenbeck latents: no discrete states.

    Rates are ``base_i * f(w_i . z(t))`` with ``f`` = exp (``link="exp"``) or a
    softplus normalised to 1 at 0 (``link="softplus"``). ``latent_dist="bimodal"``
    is NOT offered on purpose: every latent here is unimodal (``gaussian`` or
    ``laplace``-like heavy tails via a cubic map). ``drift`` adds a slow linear
    change of every unit's log-rate across trials (total change in log units).
    ``psth_modulation`` > 0 adds a condition-specific time course to every unit's
    log-rate (three Gaussian bumps of 0.3 s s.d. with random centres and N(0, 1)
    amplitudes, scaled by ``psth_modulation``); trial k has condition
    ``k % n_conditions``, stored in the trials-table column ``item``.

    Returns
    -------
    recording : Recording
    truth : SyntheticTruth (``latents`` filled, ``state_rates_hz`` None)
    """
    rng = check_rng(rng)
    n_steps = int(round(trial_duration / grid_dt))
    lo, hi = rate_range
    base = np.exp(rng.uniform(np.log(lo), np.log(hi), size=n_units))
    w = rng.standard_normal((n_units, n_latents)) * loading_scale / np.sqrt(n_latents)
    unit_drift = rng.standard_normal(n_units) * drift
    n_conditions = check_int("n_conditions", n_conditions, low=1)
    t_grid = (np.arange(n_steps) + 0.5) * grid_dt
    psth = np.zeros((n_conditions, n_steps, n_units))
    if psth_modulation > 0:
        for c in range(n_conditions):
            centres = rng.uniform(0, trial_duration, size=(3, n_units))
            amps = rng.standard_normal((3, n_units))
            bumps = np.exp(-0.5 * ((t_grid[:, None, None] - centres[None]) / 0.3) ** 2)
            psth[c] = psth_modulation * np.sum(amps[None] * bumps, axis=1)
    a = np.exp(-grid_dt / timescale_s)
    truth = SyntheticTruth(state_rates_hz=None, trial_duration=trial_duration,
                           grid_dt=grid_dt)
    all_t, all_u = [], []
    starts = np.arange(n_trials) * (trial_duration + iti) + iti
    edges0 = np.arange(n_steps + 1) * grid_dt
    for k in range(n_trials):
        z = np.empty((n_steps, n_latents))
        z[0] = rng.standard_normal(n_latents)
        xi = rng.standard_normal((n_steps, n_latents)) * np.sqrt(1 - a * a)
        for t in range(1, n_steps):
            z[t] = a * z[t - 1] + xi[t]
        if latent_dist == "heavy":
            z = np.sign(z) * np.abs(z) ** 1.5 / 1.3
        truth.latents.append(z)
        drive = z @ w.T + unit_drift[None, :] * (k / max(n_trials - 1, 1) - 0.5)
        if psth_modulation > 0:
            drive = drive + psth[k % n_conditions]
        if link == "exp":
            lam = base[None, :] * np.exp(drive)
        else:
            lam = base[None, :] * np.log1p(np.exp(2.0 * drive)) / np.log(2.0)
        for i in range(n_units):
            t = gamma_spikes(edges0 + starts[k], lam[:, i], order=gamma_order, rng=rng)
            all_t.append(t)
            all_u.append(np.full(t.size, i))
    trials = {"start": starts, "stop": starts + trial_duration}
    if n_conditions > 1:
        trials["item"] = np.arange(n_trials) % n_conditions
    rec = Recording.from_arrays(np.concatenate(all_t), np.concatenate(all_u),
                                unit_ids=[str(i) for i in range(n_units)], trials=trials,
                                metadata={"source": "synthetic-continuous"},
                                source="synthetic-continuous")
    return rec, truth
