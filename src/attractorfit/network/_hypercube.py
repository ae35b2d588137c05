"""Hypercube attractors: one-axis encoders, vertex codes and the neural patterns of vertices.

The latent space has K axes; a state is a vertex ``y = a x`` with code
``x in {-1, +1}^K`` (vertex scale ``a``, 1 by default). With a one-axis (hypercube)
encoder every neuron listens to a single axis with sign +1 or -1, so a neuron is driven
up on one face of the cube and down on the opposite face.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import product

import numpy as np

from attractorfit._validation import check_array, check_int, check_positive, check_rng
from attractorfit.errors import InputError
from attractorfit.network._transfer import transfer_rate, transfer_slope

__all__ = ["hypercube_encoder", "vertex_codes", "vertex_patterns", "VertexPatterns",
           "encoder_axes"]


def hypercube_encoder(n_neurons, n_dims, *, gain=1.0, rng=None):
    """One-axis encoder: each neuron listens to one latent axis with sign +1 or -1.

    The ``2 K`` faces (axis, sign) get ``n_neurons / (2 K)`` neurons each (the first
    ``n_neurons mod 2K`` faces one more); which neuron goes to which face is a random
    permutation drawn from ``rng``.

    Parameters
    ----------
    n_neurons : int
        N, at least ``2 * n_dims`` so that every face has a neuron.
    n_dims : int
        K, the number of latent axes.
    gain : float or array_like (N,)
        Magnitude of each neuron's single non-zero encoder entry (> 0).
    rng : None, int or numpy.random.Generator

    Returns
    -------
    ndarray (N, K)
        ``E[i, axis_i] = sign_i * gain_i``, zeros elsewhere.

    Raises
    ------
    InputError
        Fewer neurons than faces, non-positive gains, bad sizes.

    Examples
    --------
    >>> E = hypercube_encoder(8, 2, rng=0)
    >>> (np.abs(E) > 0).sum(axis=1).tolist()
    [1, 1, 1, 1, 1, 1, 1, 1]
    """
    k = check_int("n_dims", n_dims, low=1)
    n = check_int("n_neurons", n_neurons, low=1)
    if n < 2 * k:
        raise InputError(f"n_neurons: {n} neurons cannot cover the {2 * k} faces of a "
                         f"{k}-dimensional cube; expected at least {2 * k}")
    gain = check_array("gain", gain)
    if gain.ndim == 0:
        gain = np.full(n, float(gain))
    if gain.shape != (n,):
        raise InputError(f"gain: expected a number or {n} values, got shape {gain.shape}")
    if np.any(gain <= 0):
        i = int(np.argmin(gain))
        raise InputError(f"gain: element {i} is {float(gain[i])!r}; expected gains > 0")
    face = np.arange(n) % (2 * k)
    face = check_rng(rng).permutation(face)
    enc = np.zeros((n, k))
    enc[np.arange(n), face // 2] = np.where(face % 2 == 0, 1.0, -1.0) * gain
    return enc


def encoder_axes(encoder):
    """Axis and sign of each neuron of a one-axis encoder (``axis = -1`` if none)."""
    enc = check_array("encoder", encoder, ndim=2)
    nz = np.abs(enc) > 0
    if np.any(nz.sum(axis=1) > 1):
        i = int(np.flatnonzero(nz.sum(axis=1) > 1)[0])
        raise InputError(f"encoder: neuron {i} has {int(nz[i].sum())} non-zero entries; "
                         "expected a one-axis (hypercube) encoder")
    axis = np.where(nz.any(axis=1), np.argmax(nz, axis=1), -1)
    sign = np.sign(enc[np.arange(enc.shape[0]), np.maximum(axis, 0)]) * (axis >= 0)
    return axis, sign.astype(int)


def vertex_codes(n_dims):
    """All ``2^K`` vertex codes in {-1, +1}^K, shape (2^K, K).

    Order: binary counting with the first axis most significant and -1 before +1, i.e.
    ``itertools.product([-1, 1], repeat=K)``: for K = 2, ``--, -+, +-, ++``.

    Raises
    ------
    InputError
        ``n_dims`` not in 1..20.

    Examples
    --------
    >>> vertex_codes(2).tolist()
    [[-1, -1], [-1, 1], [1, -1], [1, 1]]
    """
    k = check_int("n_dims", n_dims, low=1, high=20)
    return np.array(list(product([-1, 1], repeat=k)), dtype=int).reshape(2 ** k, k)


@dataclass
class VertexPatterns:
    """Neural patterns of a set of hypercube vertices (rate picture).

    Attributes
    ----------
    codes : ndarray (P, K)
        Vertex codes (+-1).
    positions : ndarray (P, K)
        Latent positions ``scale * codes``.
    inputs : ndarray (N, P)
        Mean input ``E y + bias`` of every neuron at every vertex.
    rates : ndarray (N, P)
        Rates (Hz) ``phi(inputs)``: the matrix R of the decoder rules.
    slopes : ndarray (N, P)
        ``phi'(inputs)`` (Hz per unit input), for Jacobians and the optimized rule.
    scale : float
        Vertex scale ``a``.
    """

    codes: np.ndarray
    positions: np.ndarray
    inputs: np.ndarray
    rates: np.ndarray
    slopes: np.ndarray
    scale: float

    @property
    def targets(self) -> np.ndarray:
        """``a X`` (K x P): where the readout of each pattern must land."""
        return self.positions.T


def vertex_patterns(encoder, codes, *, bias, scale=1.0, noise=0.0, tau_m=0.02, threshold=1.0,
                    reset=0.0, refractory=0.002, dt=1e-4):
    """Rates ``r^mu = phi(E a x^mu + bias)`` (and slopes) of the neurons at each vertex.

    Parameters
    ----------
    encoder : array_like (N, K)
    codes : array_like (P, K)
        Vertex codes, one per row (e.g. from :func:`vertex_codes`).
    bias, noise, threshold, reset : float or array_like (N,)
    scale : float
        Vertex scale ``a`` (> 0).
    tau_m, refractory : float
    dt : float or None
        Simulator step for the transfer function (None: continuous Siegert).

    Returns
    -------
    VertexPatterns

    Raises
    ------
    InputError
        Shapes that do not match, codes that are not +-1.
    """
    enc = check_array("encoder", encoder, ndim=2)
    codes = check_array("codes", codes)
    if codes.ndim == 1:
        codes = codes[None, :]
    if codes.ndim != 2 or codes.shape[1] != enc.shape[1]:
        raise InputError(f"codes: expected shape (P, K) with K = {enc.shape[1]} (one code per "
                         f"row), got {codes.shape}")
    if not np.all(np.isin(codes, (-1, 1))):
        raise InputError("codes: expected entries -1 or +1")
    scale = check_positive("scale", scale)
    pos = scale * codes
    inputs = enc @ pos.T + np.asarray(bias, dtype=float).reshape(-1, 1)
    kw = dict(tau_m=tau_m, threshold=_col(threshold), reset=_col(reset),
              refractory=refractory, dt=dt)
    rates = np.asarray(transfer_rate(inputs, _col(noise), **kw), dtype=float)
    slopes = np.asarray(transfer_slope(inputs, _col(noise), **kw), dtype=float)
    return VertexPatterns(codes=codes.astype(int), positions=pos, inputs=inputs, rates=rates,
                          slopes=slopes, scale=scale)


def _col(x):
    x = np.asarray(x, dtype=float)
    return x.reshape(-1, 1) if x.ndim == 1 else x
