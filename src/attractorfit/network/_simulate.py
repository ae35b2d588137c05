"""Compiled time-stepping kernel of the low-rank LIF network (numba).

One call simulates one trial. Per step ``n`` (time ``n dt`` to ``(n + 1) dt``):

1. the latent input seen by the neurons is ``z = y_n + u_n`` (``u`` the drive);
2. every neuron that is not refractory integrates exactly over the step with input
   ``I_i = bias_i + E[i] . z``:
   ``V_i <- I_i + (V_i - I_i) a + c_i xi``, ``a = exp(-dt / tau_m)``,
   ``c_i = noise_i sqrt((1 - a^2) / 2)``, ``xi`` a standard normal from the trial's noise
   streams (one ``fill_normals`` call of N draws per step, padded to a multiple of 16
   lanes, one per neuron in index order, those of refractory neurons and the padding
   discarded; none when the network has no noise); a refractory neuron stays at
   ``reset_i`` and counts down;
3. a neuron with ``V_i >= threshold_i`` spikes: ``V_i <- reset_i``, it is refractory for
   the next ``n_ref`` steps, and ``D[:, i]`` is added to the readout;
4. the readout decays exactly: ``y_{n+1} = b y_n + sum_{spikes} D[:, i]``,
   ``b = exp(-dt / tau_s)`` (the spike contributions are added in neuron order).

Cost per step O(N K); memory O(N K) plus the spikes. Spikes are stored as (neuron, step)
pairs in buffers that double when full.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from attractorfit.network._random import ZIG_F, ZIG_K, ZIG_W, fill_normals, padded

__all__ = ["simulate_trial"]


@njit(cache=True)
def _grow(buf, n, extra):
    out = np.empty(max(2 * buf.shape[0], n + extra), dtype=buf.dtype)
    out[:n] = buf[:n]
    return out


@njit(cache=True)
def simulate_trial(state, encoder_t, decoder_t, bias, threshold, reset, noise_coef, a, b,
                   n_ref, n_steps, v, y, ref_left, drive, record_every, use_noise):
    """Advance one trial by ``n_steps`` steps; ``v``, ``y``, ``ref_left``, ``state`` in place.

    Parameters
    ----------
    state : ndarray (4, LANES + 1) uint64
        The trial's noise generator state (:mod:`attractorfit.network._random`).
    encoder_t : ndarray (K, N), C-contiguous
        Transposed encoder (one contiguous row per latent dimension, for SIMD loops).
    decoder_t : ndarray (N, K), C-contiguous
        Transposed decoder: row ``i`` is added to ``y`` when neuron ``i`` spikes.
    bias, threshold, reset, noise_coef : ndarray (N,)
        ``noise_coef`` is ``noise * sqrt((1 - a^2) / 2)``.
    a, b : float
        Per-step decay factors of the membrane and of the readout.
    n_ref : int
        Refractory period in steps.
    n_steps : int
    v : ndarray (N,)
        Membrane potentials.
    y : ndarray (K,)
        Readout.
    ref_left : ndarray (N,) int64
        Refractory steps left per neuron (in: at the start; out: after the last step).
    drive : ndarray (n_steps, K) or (0, K)
        Latent drive added to ``y`` in the neurons' input; empty for none.
    record_every : int
        The readout is stored before steps ``0, r, 2r, ...`` and after the last step when
        ``n_steps`` is a multiple of ``r``.
    use_noise : bool
        Draw noise: one call of :func:`~attractorfit.network._random.fill_normals` per
        step for N normals (padded to a multiple of ``LANES``), one per neuron in index
        order (refractory neurons' draws and the padding are discarded).

    Returns
    -------
    spike_neuron : ndarray (S,) int64
    spike_step : ndarray (S,) int64
    latent : ndarray (n_steps // record_every + 1, K)
    """
    k, n = encoder_t.shape
    has_drive = drive.shape[0] > 0
    sp_neuron = np.empty(1024, dtype=np.int64)
    sp_step = np.empty(1024, dtype=np.int64)
    n_spikes = 0
    n_samples = n_steps // record_every + 1
    latent = np.empty((n_samples, k))
    z = np.empty(k)
    inp = np.empty(n)
    n_pad = padded(n)
    xi = np.zeros(n_pad)
    bits = np.empty(n_pad, dtype=np.uint64)
    rejected = np.empty(n_pad, dtype=np.int64)
    # free_at[i]: first step at which neuron i integrates again (refractory bookkeeping
    # without branches, so that the membrane loop vectorises).
    free_at = ref_left.copy()
    sample = 0
    for step in range(n_steps):
        if step % record_every == 0:
            for q in range(k):
                latent[sample, q] = y[q]
            sample += 1
        for q in range(k):
            z[q] = y[q]
        if has_drive:
            for q in range(k):
                z[q] += drive[step, q]
        z0 = z[0]
        for i in range(n):
            inp[i] = bias[i] + encoder_t[0, i] * z0
        for q in range(1, k):
            zq = z[q]
            for i in range(n):
                inp[i] += encoder_t[q, i] * zq
        if use_noise:
            fill_normals(state, bits, rejected, xi, ZIG_K, ZIG_W, ZIG_F)
        nxt = step + 1 + n_ref
        count = 0
        for i in range(n):
            vi = inp[i] + (v[i] - inp[i]) * a + noise_coef[i] * xi[i]
            vi = vi if free_at[i] <= step else reset[i]
            spike = vi >= threshold[i]
            v[i] = reset[i] if spike else vi
            free_at[i] = nxt if spike else free_at[i]
            count += spike
        for q in range(k):
            y[q] *= b
        if count:
            if n_spikes + count > sp_neuron.shape[0]:
                sp_neuron = _grow(sp_neuron, n_spikes, count)
                sp_step = _grow(sp_step, n_spikes, count)
            n_spikes = _collect(free_at, nxt, decoder_t, y, sp_neuron, sp_step, n_spikes,
                                step)
    if sample < n_samples:
        for q in range(k):
            latent[sample, q] = y[q]
    for i in range(n):
        ref_left[i] = max(free_at[i] - n_steps, 0)
    return sp_neuron[:n_spikes].copy(), sp_step[:n_spikes].copy(), latent


@njit(cache=True)
def _collect(free_at, nxt, decoder_t, y, sp_neuron, sp_step, n_spikes, step):
    """Store this step's spikes (neurons with ``free_at == nxt``) and add them to ``y``."""
    k = y.shape[0]
    for i in range(free_at.shape[0]):
        if free_at[i] == nxt:
            for q in range(k):
                y[q] += decoder_t[i, q]
            sp_neuron[n_spikes] = i
            sp_step[n_spikes] = step
            n_spikes += 1
    return n_spikes
