"""The low-rank LIF network and its simulation result.

Model (all times in seconds)::

    tau_s dy/dt  = -y + tau_s sum_j D[:, j] sum_spikes delta(t - t_j)      (readout, K dims)
    tau_m dV_i   = (I_i - V_i) dt + noise_i sqrt(tau_m) dW_i,  I_i = bias_i + E[i] . (y + u)
    V_i >= threshold_i  ->  spike, V_i = reset_i, silent for ``refractory``

``u(t)`` is an optional latent drive (cue pulses). The recurrent weights are ``W = E D``
but never formed: every step costs O(N K).

References
----------
.. [1] Mastrogiuseppe F, Ostojic S (2018) Linking connectivity, dynamics, and computations
   in low-rank recurrent neural networks. Neuron 99:609-623.
.. [2] Boerlin M et al. (2013) Predictive coding of dynamical variables in balanced
   spiking networks. PLoS Computational Biology 9:e1003258.
.. [3] Dayan P, Abbott LF (2001) Theoretical Neuroscience. MIT Press, chapter 5.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from attractorfit._validation import (
    check_array,
    check_int,
    check_nonnegative,
    check_positive,
    check_rng,
    warn_input,
)
from attractorfit.errors import InputError
from attractorfit.network._random import seed_state
from attractorfit.network._simulate import simulate_trial
from attractorfit.network._transfer import transfer_rate, transfer_slope

__all__ = ["LowRankNetwork", "SimulationResult"]


def _per_neuron(name, value, n, *, nonnegative=False):
    """A scalar or a length-``n`` array as a float64 array of shape (n,)."""
    arr = check_array(name, value, dtype=float)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    elif arr.shape != (n,):
        raise InputError(f"{name}: expected a number or an array of {n} values (one per "
                         f"neuron), got shape {arr.shape}")
    if nonnegative and arr.size and arr.min() < 0:
        i = int(np.argmin(arr))
        raise InputError(f"{name}: element {i} is {float(arr[i])!r}; expected values >= 0")
    return np.ascontiguousarray(arr)


@dataclass
class SimulationResult:
    """Spikes and latent readout of a simulation of :class:`LowRankNetwork`.

    Attributes
    ----------
    trials : list of list of ndarray
        ``trials[k][i]``: spike times (s, from the trial start, sorted) of neuron ``i`` in
        trial ``k``. A spike is stamped at the middle of the step in which the membrane
        crossed threshold, so all times lie in ``(0, duration)``.
    latent : ndarray (n_trials, n_samples, K)
        Readout ``y`` sampled every ``record_every`` steps (before the step).
    latent_times : ndarray (n_samples,)
        Times (s) of the latent samples.
    dt : float
        Time step (s).
    duration : float
        Length of each trial (s), a whole number of steps.
    unit_ids : list of str
        Neuron ids ("0".."N-1" unless given).
    membrane : ndarray (n_trials, N)
        Membrane potentials at the end of each trial.
    """

    trials: list
    latent: np.ndarray
    latent_times: np.ndarray
    dt: float
    duration: float
    unit_ids: list = field(default_factory=list)
    membrane: np.ndarray | None = None

    @property
    def spike_times(self) -> list:
        """Spike times of each neuron in trial 0 (s)."""
        return self.trials[0]

    @property
    def n_trials(self) -> int:
        return len(self.trials)

    @property
    def n_neurons(self) -> int:
        return len(self.trials[0]) if self.trials else 0

    @property
    def rates_hz(self) -> np.ndarray:
        """Mean firing rate of every neuron in every trial (n_trials x N), in Hz."""
        return np.array([[len(t) for t in trial] for trial in self.trials],
                        dtype=float).reshape(self.n_trials, self.n_neurons) / self.duration

    def to_recording(self, *, labels=None, gap=0.0, unit_ids=None):
        """The trials one after another in time, as a :class:`~attractorfit.Recording`.

        Trial ``i`` spans ``[i (duration + gap), i (duration + gap) + duration)``.

        Parameters
        ----------
        labels : dict of str to sequence, optional
            Trial label columns (one value per trial), e.g. ``{"item": [0, 1, 0]}``.
        gap : float
            Silent time (s) between consecutive trials, >= 0.
        unit_ids : sequence of str, optional
            Unit ids (default: ``self.unit_ids``).

        Returns
        -------
        Recording
            With a trials table ``start``, ``stop`` and the label columns, and metadata
            ``source='simulation'``, ``dt``, ``trial_duration``.

        Raises
        ------
        InputError
            Negative gap, labels of the wrong length or a reserved name, wrong number of
            unit ids, or no spike at all.
        """
        from attractorfit.recording import Recording

        gap = check_nonnegative("gap", gap)
        n = self.n_trials
        ids = list(self.unit_ids) if unit_ids is None else [str(u) for u in unit_ids]
        if len(ids) != self.n_neurons:
            raise InputError(f"unit_ids: got {len(ids)} ids for {self.n_neurons} neurons; "
                             "expected one id per neuron")
        period = self.duration + gap
        start = np.arange(n) * period
        table = {"start": start, "stop": start + self.duration}
        for name, col in (labels or {}).items():
            if name in ("start", "stop"):
                raise InputError(f"labels: column name {name!r} is reserved for the trial "
                                 "times; choose another name")
            col = np.asarray(col).ravel()
            if col.size != n:
                raise InputError(f"labels: column {name!r} has {col.size} values; expected "
                                 f"{n} (one per trial)")
            table[str(name)] = col
        spikes = [np.concatenate([trial[i] + start[k] for k, trial in enumerate(self.trials)])
                  if n else np.zeros(0) for i in range(self.n_neurons)]
        rec = Recording(unit_ids=ids, spike_times=spikes, trials=table,
                        metadata={"source": "simulation", "dt": self.dt,
                                  "trial_duration": self.duration,
                                  "t_stop": float(start[-1] + self.duration)})
        return rec.validate(min_units=1)

    def __repr__(self) -> str:
        n_sp = sum(len(t) for trial in self.trials for t in trial)
        return (f"SimulationResult({self.n_neurons} neurons, {self.n_trials} trials of "
                f"{self.duration:g} s, {n_sp} spikes)")


class LowRankNetwork:
    """Leaky integrate-and-fire neurons with rank-K recurrence ``W = E D``.

    Parameters
    ----------
    encoder : array_like (N, K)
        ``E``: how the latent readout drives each neuron.
    decoder : array_like (K, N)
        ``D``: each spike of neuron ``j`` adds ``D[:, j]`` to the readout ``y``.
    bias : float or array_like (N,)
        Constant input to each neuron (threshold units).
    threshold : float or array_like (N,)
        Spike threshold; must exceed ``reset``.
    reset : float or array_like (N,)
        Membrane value after a spike.
    tau_m : float
        Membrane time constant (s).
    tau_s : float
        Readout (synaptic) time constant (s).
    refractory : float
        Absolute refractory period (s), >= 0.
    noise : float or array_like (N,)
        White-noise amplitude in the diffusion convention
        ``tau_m dV = (I - V) dt + noise sqrt(tau_m) dW``: a free membrane fluctuates with
        s.d. ``noise / sqrt(2)``; the Siegert formula applies with ``sigma = noise``.

    Raises
    ------
    InputError
        Shapes that do not match, non-finite values, non-positive time constants,
        negative refractory period or noise, threshold not above reset.

    Notes
    -----
    Memory and time per step are O(N K); the N x N weight matrix is never formed.

    References
    ----------
    .. [1] Mastrogiuseppe F, Ostojic S (2018) Linking connectivity, dynamics, and
       computations in low-rank recurrent neural networks. Neuron 99:609-623.
    .. [2] Amit DJ, Brunel N (1997) Model of global spontaneous activity and local
       structured activity during delay periods in the cerebral cortex. Cerebral Cortex
       7:237-252.

    Examples
    --------
    >>> import numpy as np
    >>> net = LowRankNetwork(np.ones((3, 1)), np.zeros((1, 3)), bias=1.5)
    >>> res = net.simulate(0.1, seed=0)
    >>> len(res.spike_times)
    3
    """

    def __init__(self, encoder, decoder, *, bias, threshold=1.0, reset=0.0, tau_m=0.02,
                 tau_s=0.01, refractory=0.002, noise=0.0):
        enc = check_array("encoder", encoder, ndim=2)
        dec = check_array("decoder", decoder, ndim=2)
        n, k = enc.shape
        if n < 1 or k < 1:
            raise InputError(f"encoder: expected shape (N, K) with N >= 1 neurons and K >= 1 "
                             f"latent dimensions, got {enc.shape}")
        if dec.shape != (k, n):
            raise InputError(f"decoder: expected shape (K, N) = ({k}, {n}) to match the "
                             f"encoder's (N, K) = ({n}, {k}), got {dec.shape}")
        self.encoder = np.ascontiguousarray(enc)
        self.decoder = np.ascontiguousarray(dec)
        self.bias = _per_neuron("bias", bias, n)
        self.threshold = _per_neuron("threshold", threshold, n)
        self.reset = _per_neuron("reset", reset, n)
        bad = self.threshold <= self.reset
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(f"threshold: neuron {i} has threshold {float(self.threshold[i])!r} <= "
                             f"reset {float(self.reset[i])!r}; expected threshold > reset")
        self.noise = _per_neuron("noise", noise, n, nonnegative=True)
        self.tau_m = check_positive("tau_m", tau_m)
        self.tau_s = check_positive("tau_s", tau_s)
        self.refractory = check_nonnegative("refractory", refractory)

    # ------------------------------------------------------------ parameters
    _ARRAYS = ("encoder", "decoder", "bias", "threshold", "reset", "noise")
    _SCALARS = ("tau_m", "tau_s", "refractory")

    def to_dict(self) -> dict:
        """All parameters as a dict of arrays (e.g. for ``numpy.savez``)."""
        out = {name: getattr(self, name).copy() for name in self._ARRAYS}
        out.update({name: np.float64(getattr(self, name)) for name in self._SCALARS})
        return out

    @classmethod
    def from_dict(cls, params) -> "LowRankNetwork":
        """Rebuild (and re-validate) a network from :meth:`to_dict` output or an npz file.

        Raises
        ------
        InputError
            A missing parameter, or any check of the constructor.
        """
        missing = [k for k in cls._ARRAYS + cls._SCALARS if k not in params]
        if missing:
            raise InputError(f"network parameters: missing {missing}; expected the keys "
                             "written by LowRankNetwork.to_dict")
        kw = {k: np.asarray(params[k]) for k in cls._ARRAYS[2:]}
        kw.update({k: float(np.asarray(params[k])) for k in cls._SCALARS})
        return cls(np.asarray(params["encoder"]), np.asarray(params["decoder"]), **kw)

    # ----------------------------------------------------------------- shape
    @property
    def n_neurons(self) -> int:
        return self.encoder.shape[0]

    @property
    def rank(self) -> int:
        return self.encoder.shape[1]

    def __repr__(self) -> str:
        return (f"LowRankNetwork({self.n_neurons} neurons, rank {self.rank}, "
                f"tau_m={self.tau_m:g}, tau_s={self.tau_s:g})")

    # ----------------------------------------------------------- rate picture
    def _neuron_kw(self):
        return dict(tau_m=self.tau_m, threshold=self.threshold, reset=self.reset,
                    refractory=self.refractory)

    def input_at(self, y):
        """Mean input ``E y + bias`` to every neuron at latent position(s) ``y`` (..., K)."""
        y = check_array("y", y)
        if y.shape[-1:] != (self.rank,):
            raise InputError(f"y: expected a last dimension of {self.rank} (the rank), got "
                             f"shape {y.shape}")
        return y @ self.encoder.T + self.bias

    def rates_at(self, y, *, dt=1e-4):
        """Rates (Hz) of every neuron at latent position(s) ``y`` (..., K) -> (..., N).

        Uses :func:`~attractorfit.network.transfer_rate` at step ``dt`` (``None`` for the
        continuous Siegert formula).
        """
        return transfer_rate(self.input_at(y), self.noise, dt=dt, **self._neuron_kw())

    def slopes_at(self, y, *, dt=1e-4):
        """Transfer-function slopes (Hz per unit input) at latent position(s) ``y``."""
        return transfer_slope(self.input_at(y), self.noise, dt=dt, **self._neuron_kw())

    # ------------------------------------------------------------- simulation
    def simulate(self, duration, *, dt=1e-4, n_trials=1, seed=None, y0=None, drive=None,
                 record_every=None, unit_ids=None):
        """Simulate ``n_trials`` independent trials of the spiking network.

        Parameters
        ----------
        duration : float
            Length of each trial (s); must be a whole number of steps.
        dt : float
            Time step (s). Leaks are integrated exactly; at ``dt = 1e-4`` rates sit a few
            per cent below the continuous Siegert rate (use
            :func:`~attractorfit.network.transfer_rate` with the same ``dt`` to predict
            them).
        n_trials : int
            Number of independent trials.
        seed : None, int or numpy.random.Generator
            Randomness. Trial ``k`` draws from the ``k``-th child of the seed's
            ``SeedSequence`` (``Generator.spawn``), so it is the same whatever
            ``n_trials``.
        y0 : array_like (K,) or (n_trials, K), optional
            Initial readout (default 0).
        drive : array_like or callable, optional
            Latent drive ``u``, added to the readout *in the neurons' input*
            (``I = bias + E (y + u)``; it does not enter ``y`` itself, which only sees the
            spikes it causes). An array of shape (n_steps, K) (all trials) or
            (n_trials, n_steps, K), value ``u[n]`` applied during step ``n`` (time
            ``n dt`` to ``(n + 1) dt``); or a callable ``drive(t, trial)`` returning the
            (n_steps, K) array for step start times ``t``.
        record_every : int, optional
            Store the readout every this many steps (default: every millisecond).
        unit_ids : sequence of str, optional
            Neuron ids for the result (default "0".."N-1").

        Returns
        -------
        SimulationResult

        Raises
        ------
        InputError
            Non-positive duration or dt, a duration that is not a whole number of steps,
            bad ``n_trials``, shapes of ``y0`` or ``drive`` that do not match.

        Notes
        -----
        Each trial starts with membranes drawn uniformly in ``[reset, threshold)`` from
        the trial's generator (no synchronous first volley), no neuron refractory, and
        readout ``y0``. The generator then seeds the trial's fast noise streams (16 SIMD
        lanes plus a rejection stream, :func:`attractorfit.network._random.seed_state`),
        which supply N standard normals per step (see
        :mod:`attractorfit.network._simulate` for the step order).
        """
        duration = check_positive("duration", duration)
        dt = check_positive("dt", dt)
        n_trials = check_int("n_trials", n_trials, low=1)
        n_steps = int(round(duration / dt))
        if n_steps < 1 or abs(n_steps * dt - duration) > 1e-6 * dt * max(1, n_steps):
            raise InputError(f"duration: {duration!r} s is not a whole number of steps of "
                             f"dt = {dt!r} s; expected a multiple of dt")
        if dt > 0.1 * min(self.tau_m, self.tau_s):
            warn_input(f"dt: {dt:g} s is more than a tenth of the shortest time constant "
                       f"({min(self.tau_m, self.tau_s):g} s); rates and readout will be "
                       "coarse")
        if record_every is None:
            record_every = max(1, int(round(1e-3 / dt)))
        record_every = check_int("record_every", record_every, low=1)
        n, k = self.n_neurons, self.rank
        if unit_ids is None:
            unit_ids = [str(i) for i in range(n)]
        else:
            unit_ids = [str(u) for u in unit_ids]
            if len(unit_ids) != n:
                raise InputError(f"unit_ids: got {len(unit_ids)} ids for {n} neurons; "
                                 "expected one id per neuron")
        y_init = self._initial_latent(y0, n_trials)
        drive_of = self._drive_source(drive, n_trials, n_steps, dt)
        gens = check_rng(seed).spawn(n_trials)

        a = math.exp(-dt / self.tau_m)
        b = math.exp(-dt / self.tau_s)
        coef = np.ascontiguousarray(self.noise * math.sqrt((1.0 - a * a) / 2.0))
        use_noise = bool(np.any(coef > 0))
        n_ref = int(round(self.refractory / dt))
        enc_t = np.ascontiguousarray(self.encoder.T)
        dec_t = np.ascontiguousarray(self.decoder.T)
        trials, latents, membranes = [], [], []
        for trial, gen in enumerate(gens):
            v = self.reset + (self.threshold - self.reset) * gen.random(n)
            state = seed_state(gen)
            y = y_init[trial].copy()
            ref_left = np.zeros(n, dtype=np.int64)
            u = drive_of(trial)
            neuron, step, lat = simulate_trial(state, enc_t, dec_t, self.bias,
                                               self.threshold, self.reset, coef, a, b,
                                               n_ref, n_steps, v, y, ref_left, u,
                                               record_every, use_noise)
            trials.append(_split_spikes(neuron, step, n, dt))
            latents.append(lat)
            membranes.append(v)
        latent = np.stack(latents)
        times = np.arange(latent.shape[1]) * record_every * dt
        return SimulationResult(trials=trials, latent=latent, latent_times=times, dt=dt,
                                duration=n_steps * dt, unit_ids=unit_ids,
                                membrane=np.stack(membranes))

    def _initial_latent(self, y0, n_trials):
        k = self.rank
        if y0 is None:
            return np.zeros((n_trials, k))
        y0 = check_array("y0", y0, dtype=float)
        if y0.shape == (k,):
            return np.tile(y0, (n_trials, 1))
        if y0.shape == (n_trials, k):
            return y0.copy()
        raise InputError(f"y0: expected shape ({k},) or (n_trials, K) = ({n_trials}, {k}), "
                         f"got {y0.shape}")

    def _drive_source(self, drive, n_trials, n_steps, dt):
        k = self.rank
        empty = np.zeros((0, k))
        if drive is None:
            return lambda trial: empty
        if callable(drive):
            t = np.arange(n_steps) * dt

            def from_callable(trial):
                return self._check_drive(drive(t, trial), n_steps, name="drive(t, trial)")

            return from_callable
        arr = check_array("drive", drive, dtype=float)
        if arr.shape == (n_steps, k):
            arr = np.ascontiguousarray(arr)
            return lambda trial: arr
        if arr.shape == (n_trials, n_steps, k):
            arr = np.ascontiguousarray(arr)
            return lambda trial: arr[trial]
        raise InputError(f"drive: expected shape (n_steps, K) = ({n_steps}, {k}) or "
                         f"(n_trials, n_steps, K) = ({n_trials}, {n_steps}, {k}), got "
                         f"{arr.shape}")

    def _check_drive(self, value, n_steps, *, name):
        arr = check_array(name, value, dtype=float)
        if arr.shape != (n_steps, self.rank):
            raise InputError(f"{name}: expected an array of shape (n_steps, K) = "
                             f"({n_steps}, {self.rank}), got {arr.shape}")
        return np.ascontiguousarray(arr)


def _split_spikes(neuron, step, n, dt):
    """Spike (neuron, step) pairs in time order -> list of per-neuron sorted times (s)."""
    order = np.argsort(neuron, kind="stable")
    times = (step[order] + 0.5) * dt
    bounds = np.concatenate([[0], np.cumsum(np.bincount(neuron, minlength=n))])
    return [times[bounds[i]:bounds[i + 1]] for i in range(n)]
