"""Retrieval measures: overlaps, pattern completion, capacity (rate picture and binary limit).

Binary limit: with +-1 units ``s_i = sign(h_i)``, patterns xi (N x P), latent codes the
identity (K = P), encoder ``E = xi`` and a decoder from the rules of
:mod:`attractorfit.network._decoders`, the weights ``W = E D`` are Hopfield's rule
(Hebbian decoder ``D ~ xi^T``) or the projection rule (``D = xi^+``). Their known
capacities are the outside checks of the decoder rules and of the retrieval measures.

References
----------
.. [1] Amit DJ, Gutfreund H, Sompolinsky H (1985) Storing infinite numbers of patterns in
   a spin-glass model of neural networks. Physical Review Letters 55:1530-1533.
.. [2] Kanter I, Sompolinsky H (1987) Associative recall of memory without errors.
   Physical Review A 35:380-392.
.. [3] Hopfield JJ (1982) PNAS 79:2554-2558.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from attractorfit._validation import (
    check_array,
    check_fraction,
    check_int,
    check_positive,
    check_rng,
)
from attractorfit.errors import InputError
from attractorfit.network._decoders import (
    decoder_hebbian,
    decoder_optimized,
    decoder_pseudoinverse,
    hebbian_matrix,
    pseudoinverse_matrix,
)
from attractorfit.network._hypercube import vertex_patterns
from attractorfit.network._model import LowRankNetwork
from attractorfit.network._stability import rate_flow, readout_noise_ratio

__all__ = ["overlaps", "pattern_completion", "CompletionResult", "capacity_sweep",
           "CapacityResult", "binary_recall", "binary_capacity", "BinaryCapacity"]

_RULES = ("hebbian", "pseudoinverse", "optimized")


def overlaps(states, patterns, *, center=False):
    """Cosine similarity of each state with each pattern.

    Parameters
    ----------
    states : array_like (..., M)
        Rate vectors (M = N neurons) or latent positions (M = K).
    patterns : array_like (P, M)
        One pattern per row.
    center : bool
        Subtract the mean pattern (over the P patterns) from states and patterns first,
        so that rates shared by all patterns do not count as overlap.

    Returns
    -------
    ndarray (..., P)
        Values in [-1, 1]; 0 where a vector is all zeros.
    """
    s = check_array("states", states)
    p = check_array("patterns", patterns, ndim=2)
    if s.shape[-1] != p.shape[1]:
        raise InputError(f"states: last dimension {s.shape[-1]} does not match the "
                         f"patterns' {p.shape[1]} (patterns are rows of shape (P, M))")
    if center:
        mean = p.mean(axis=0)
        s, p = s - mean, p - mean
    ns = np.linalg.norm(s, axis=-1, keepdims=True)
    npn = np.linalg.norm(p, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (s @ p.T) / (ns * npn)
    return np.nan_to_num(out, nan=0.0, posinf=0.0, neginf=0.0)


def _corrupt(rates, fraction, n_starts, rng):
    """Copies of a rate pattern with a fraction of neurons given other neurons' rates."""
    n = rates.size
    n_bad = int(round(fraction * n))
    out = np.tile(rates, (n_starts, 1))
    for s in range(n_starts):
        idx = rng.choice(n, size=n_bad, replace=False)
        out[s, idx] = rates[rng.integers(0, n, size=n_bad)]
    return out


@dataclass
class CompletionResult:
    """Pattern completion from corrupted patterns.

    Attributes
    ----------
    corruption : ndarray (L,)
        Fraction of neurons whose rate was replaced by a random neuron's rate from the
        same pattern (so about half of them change for two-level patterns).
    fraction_recalled : ndarray (L,)
        Fraction of starts that ended at the pattern's vertex (same code, within
        ``vertex_tol``).
    per_pattern : ndarray (L, P)
        The same per pattern.
    mean_overlap : ndarray (L,)
        Mean cosine similarity of the end point with the pattern's vertex (latent).
    method : str
        ``'rate'`` (rate-picture flow) or ``'spiking'`` (simulation).
    """

    corruption: np.ndarray
    fraction_recalled: np.ndarray
    per_pattern: np.ndarray
    mean_overlap: np.ndarray
    method: str


def pattern_completion(net, codes, *, corruption=(0.0, 0.1, 0.2, 0.3, 0.4, 0.5),
                       n_starts=10, scale=1.0, dt=1e-4, vertex_tol=0.25, method="rate",
                       duration=0.5, rng=None):
    """Fraction of corrupted patterns the network completes, per corruption level.

    Each start is the readout ``tau_s D r~`` of a corrupted pattern ``r~`` (a fraction of
    the neurons take the rate of a randomly chosen neuron of the same pattern). The
    network then runs from there: in the rate picture (:func:`rate_flow`, 40 ``tau_s``)
    or as the spiking network (``duration`` s; the end point is the mean readout over its
    last quarter).

    Parameters
    ----------
    net : LowRankNetwork
    codes : array_like (P, K)
        Codes of the stored patterns (rows).
    corruption : sequence of float
        Corruption levels in [0, 1].
    n_starts : int
        Corrupted copies per pattern and level.
    scale : float
        Vertex scale ``a``.
    dt : float
        Simulator step (also the step of the transfer function in the rate picture).
    vertex_tol : float
        Distance (units of ``a``) within which an end point counts as at the vertex.
    method : {'rate', 'spiking'}
    duration : float
        Simulated time per start for ``method='spiking'`` (s).
    rng : None, int or numpy.random.Generator

    Returns
    -------
    CompletionResult
    """
    codes = np.atleast_2d(check_array("codes", codes))
    if codes.shape[1] != net.rank:
        raise InputError(f"codes: expected shape (P, K) with K = {net.rank}, got "
                         f"{codes.shape}")
    levels = np.atleast_1d(check_array("corruption", corruption))
    for c in levels:
        check_fraction("corruption", float(c))
    n_starts = check_int("n_starts", n_starts, low=1)
    scale = check_positive("scale", scale)
    if method not in ("rate", "spiking"):
        raise InputError(f"method: expected 'rate' or 'spiking', got {method!r}")
    rng = check_rng(rng)
    pos = scale * codes
    rates = np.asarray(net.rates_at(pos, dt=dt), dtype=float)          # (P, N)
    per = np.zeros((levels.size, codes.shape[0]))
    ovl = np.zeros((levels.size, codes.shape[0]))
    for li, c in enumerate(levels):
        starts, owner = [], []
        for m in range(codes.shape[0]):
            bad = _corrupt(rates[m], float(c), n_starts, rng)
            starts.append(net.tau_s * bad @ net.decoder.T)
            owner.append(np.full(n_starts, m))
        starts, owner = np.vstack(starts), np.concatenate(owner)
        if method == "rate":
            ends = rate_flow(net, starts, dt=dt)
        else:
            sim = net.simulate(duration, dt=dt, n_trials=starts.shape[0], y0=starts,
                               seed=rng)
            tail = max(1, sim.latent.shape[1] // 4)
            ends = sim.latent[:, -tail:, :].mean(axis=1)
        target = pos[owner]
        ok = np.all(np.sign(ends) == codes[owner], axis=1) & (
            np.linalg.norm(ends - target, axis=1) / scale < vertex_tol)
        cos = np.sum(ends * target, axis=1) / np.maximum(
            np.linalg.norm(ends, axis=1) * np.linalg.norm(target, axis=1), 1e-300)
        for m in range(codes.shape[0]):
            per[li, m] = ok[owner == m].mean()
            ovl[li, m] = cos[owner == m].mean()
    return CompletionResult(corruption=levels, fraction_recalled=per.mean(axis=1),
                            per_pattern=per, mean_overlap=ovl.mean(axis=1), method=method)


def _crossing(loads, values, threshold):
    """Load at which ``values`` first drops below ``threshold`` (linear interpolation).

    ``nan`` if it never drops (capacity beyond the largest load) and the first load if
    it starts below.
    """
    below = np.flatnonzero(values < threshold)
    if below.size == 0:
        return float("nan")
    i = int(below[0])
    if i == 0:
        return float(loads[0])
    x0, x1, v0, v1 = loads[i - 1], loads[i], values[i - 1], values[i]
    return float(x0 + (v0 - threshold) * (x1 - x0) / (v0 - v1))


@dataclass
class CapacityResult:
    """Retrieval versus load P/N for one decoder rule.

    Attributes
    ----------
    rule : str
    patterns : str
        ``'binary'`` or ``'vertices'`` (see :func:`capacity_sweep`).
    method : str
        ``'rate'`` (rate picture) or ``'spiking'``.
    loads : ndarray (L,)
        P / N.
    n_patterns : ndarray (L,) int
    n_dims : ndarray (L,) int
        Rank K of each network.
    mean_overlap : ndarray (L,)
        Mean overlap of the end state with the pattern started from: cosine similarity of
        the rates with the pattern's rates, both centred on the mean pattern (1: perfect
        retrieval, about 0: unrelated).
    fraction_recalled : ndarray (L,)
        Fraction of starts whose end state is closer (by that overlap) to the target
        pattern than to any other and has overlap >= ``threshold``.
    fraction_held : ndarray (L,)
        The same as ``fraction_recalled`` for starts at the vertices themselves (rate
        picture: nudged by about 0.01 a in a random direction): does each pattern hold?
    residual : ndarray (L,)
        Relative constraint residual of the decoder.
    median_margin : ndarray (L,)
        Median stability margin of the Jacobians at the vertices (rate picture).
    margin_reached : ndarray (L,) bool
        For the optimized rule: the requested margin was reached (else always True).
    noise_ratio : ndarray (L,)
        Median predicted readout shot-noise s.d. / vertex spacing at the vertices.
    shared_active : float
        Mean fraction of a pattern's active neurons (rate above the median rate) that are
        also active in another pattern, at the largest load.
    capacity : float
        Load where ``mean_overlap`` first drops below ``threshold`` (linear
        interpolation; nan: not within the loads tried).
    threshold : float
    """

    rule: str
    patterns: str
    method: str
    loads: np.ndarray
    n_patterns: np.ndarray
    n_dims: np.ndarray
    mean_overlap: np.ndarray
    fraction_recalled: np.ndarray
    fraction_held: np.ndarray
    residual: np.ndarray
    median_margin: np.ndarray
    margin_reached: np.ndarray
    noise_ratio: np.ndarray
    shared_active: float
    capacity: float
    threshold: float


def _binary_network(n, p, rng, *, coding, pattern_rates, bias, noise, dt):
    """Rank-P network whose P random binary rate patterns sit at random cube vertices."""
    from attractorfit.network._transfer import transfer_inverse

    h_lo, h_hi = transfer_inverse(np.asarray(pattern_rates, float), noise, dt=dt)
    active = rng.random((n, p)) < coding
    inputs = np.where(active, h_hi, h_lo)
    while True:  # random +-1 codes, one latent axis per pattern, invertible
        codes = rng.choice([-1.0, 1.0], size=(p, p))
        if p == 1 or np.linalg.matrix_rank(codes) == p:
            break
    enc = np.linalg.solve(codes, (inputs - bias).T).T      # E a x^mu + bias = inputs[:, mu]
    return enc, codes.astype(int)


def _vertex_network(n, p, k, rng, *, gain):
    enc = rng.normal(0.0, gain / np.sqrt(k), size=(n, k))
    idx = rng.choice(2 ** k, size=p, replace=False)
    codes = ((idx[:, None] >> np.arange(k)[::-1]) & 1) * 2 - 1
    return enc, codes


def _decode(rule, pats, enc, tau_s, margin):
    x = pats.codes.T.astype(float)
    if rule == "hebbian":
        return decoder_hebbian(pats.rates, x, tau_s=tau_s, encoder=enc, slopes=pats.slopes)
    if rule == "pseudoinverse":
        return decoder_pseudoinverse(pats.rates, x, tau_s=tau_s, encoder=enc,
                                     slopes=pats.slopes)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return decoder_optimized(pats.rates, x, tau_s=tau_s, encoder=enc, slopes=pats.slopes,
                                 margin=margin)


def capacity_sweep(n_neurons, loads, *, rule="pseudoinverse", patterns="binary",
                   method="rate", n_dims=None, coding=0.5, pattern_rates=(0.5, 40.0),
                   gain=0.6, bias=1.0, noise=0.2, tau_s=0.05, margin=0.2, corruption=0.1,
                   n_starts=2, n_repeats=1, threshold=0.9, dt=1e-4, duration=0.5,
                   rng=None):
    """Retrieval overlap versus load P/N, and the capacity.

    For each load, ``P = round(load N)`` patterns are stored in a network of N neurons,
    with the decoder from ``rule``; each pattern is then started from the readout
    ``tau_s D r~`` of ``n_starts`` corrupted copies ``r~`` (a fraction ``corruption`` of
    the neurons take the rate of a random neuron of the same pattern) and the network
    runs, in the rate picture (40 ``tau_s``) or spiking (``duration`` s, end state = the
    spike counts of the last 40%).

    Two ways of making patterns:

    * ``patterns='binary'`` -- P random binary rate patterns (each neuron active with
      probability ``coding``; two rate levels ``pattern_rates`` in Hz; with coding 0.5
      two patterns share about half their active neurons), each at a random vertex of
      its own K = P dimensional cube: the encoder is solved so that
      ``phi(E a x^mu + bias) = r^mu`` exactly (rank-P network, as in associative memory
      models with one latent direction per pattern);
    * ``patterns='vertices'`` -- P random distinct vertices of a fixed K-dimensional cube
      (``n_dims``), random Gaussian encoder (entries N(0, gain^2 / K)); the rates follow.

    Parameters
    ----------
    n_neurons : int
    loads : sequence of float
        P / N values (> 0).
    rule : {'hebbian', 'pseudoinverse', 'optimized'}
    patterns : {'binary', 'vertices'}
    method : {'rate', 'spiking'}
    n_dims : int, optional
        K for ``patterns='vertices'`` (default: enough for four times the largest P,
        between 4 and 16).
    coding : float
        Fraction of active neurons per binary pattern.
    pattern_rates : (float, float)
        Inactive and active rates (Hz) of binary patterns.
    gain : float
        Encoder scale for ``patterns='vertices'``.
    bias, noise : float
        Constant input and membrane noise of every neuron.
    tau_s : float
        Readout time constant (s).
    margin : float
        Margin of the optimized rule.
    corruption : float
        Corruption level of the starts.
    n_starts : int
        Corrupted starts per pattern.
    n_repeats : int
        Independent networks per load (scores are averaged).
    threshold : float
        Overlap below which retrieval counts as lost (defines ``capacity``).
    dt : float
        Simulator step (and step of the transfer function).
    duration : float
        Simulated time per start for ``method='spiking'`` (s).
    rng : None, int or numpy.random.Generator

    Returns
    -------
    CapacityResult

    References
    ----------
    .. [1] Personnaz L, Guyon I, Dreyfus G (1985) J Physique Lettres 46:L359-L365.
    .. [2] Kanter I, Sompolinsky H (1987) Physical Review A 35:380-392.
    """
    n = check_int("n_neurons", n_neurons, low=2)
    loads = np.atleast_1d(check_array("loads", loads))
    if np.any(loads <= 0):
        raise InputError(f"loads: expected P/N values > 0, got {float(loads.min())!r}")
    if rule not in _RULES:
        raise InputError(f"rule: expected one of {_RULES}, got {rule!r}")
    if patterns not in ("binary", "vertices"):
        raise InputError(f"patterns: expected 'binary' or 'vertices', got {patterns!r}")
    if method not in ("rate", "spiking"):
        raise InputError(f"method: expected 'rate' or 'spiking', got {method!r}")
    threshold = check_fraction("threshold", threshold)
    coding = check_fraction("coding", coding)
    corruption = check_fraction("corruption", corruption)
    n_starts = check_int("n_starts", n_starts, low=1)
    n_repeats = check_int("n_repeats", n_repeats, low=1)
    rng = check_rng(rng)
    n_pat = np.maximum(1, np.round(loads * n).astype(int))
    k = None
    if patterns == "vertices":
        if n_dims is None:
            n_dims = int(min(16, max(4, np.ceil(np.log2(4 * n_pat.max())))))
        k = check_int("n_dims", n_dims, low=1, high=20)
        if n_pat.max() > 2 ** k:
            raise InputError(f"loads: {int(n_pat.max())} patterns do not fit on the "
                             f"{2 ** k} vertices of a {k}-dimensional cube; raise n_dims")
    keys = ("overlap", "recalled", "held", "resid", "margin", "reached", "noise")
    out = {key: [] for key in keys}
    shared = float("nan")
    for p in n_pat:
        acc = {key: [] for key in keys}
        for _ in range(n_repeats):
            if patterns == "binary":
                enc, codes = _binary_network(n, p, rng, coding=coding,
                                             pattern_rates=pattern_rates, bias=bias,
                                             noise=noise, dt=dt)
            else:
                enc, codes = _vertex_network(n, p, k, rng, gain=gain)
            pats = vertex_patterns(enc, codes, bias=bias, noise=noise, dt=dt)
            res = _decode(rule, pats, enc, tau_s, margin)
            net = LowRankNetwork(enc, res.decoder, bias=bias, noise=noise, tau_s=tau_s)
            _retrieve(net, pats, res, acc, rng, method=method, corruption=corruption,
                      n_starts=n_starts, threshold=threshold, dt=dt, duration=duration)
            if p > 1:
                shared = _shared_active(pats.rates)
        for key in keys:
            out[key].append(bool(np.all(acc[key])) if key == "reached"
                            else float(np.mean(acc[key])))
    overlap = np.array(out["overlap"])
    return CapacityResult(rule=rule, patterns=patterns, method=method, loads=loads,
                          n_patterns=n_pat,
                          n_dims=n_pat.copy() if patterns == "binary" else np.full(n_pat.size,
                                                                                   k),
                          mean_overlap=overlap,
                          fraction_recalled=np.array(out["recalled"]),
                          fraction_held=np.array(out["held"]),
                          residual=np.array(out["resid"]),
                          median_margin=np.array(out["margin"]),
                          margin_reached=np.array(out["reached"]),
                          noise_ratio=np.array(out["noise"]), shared_active=shared,
                          capacity=_crossing(loads, overlap, threshold),
                          threshold=threshold)


def _shared_active(rates):
    """Mean fraction of active neurons shared by two patterns (active: above the median)."""
    a = (rates > np.median(rates)).astype(float)
    both = a.T @ a
    count = a.sum(axis=0)
    iu = np.triu_indices(rates.shape[1], 1)
    return float(np.mean(both[iu] / np.maximum(np.minimum.outer(count, count)[iu], 1)))


def _retrieve(net, pats, res, acc, rng, *, method, corruption, n_starts, threshold, dt,
              duration):
    """Run one network from corrupted patterns and from its vertices; append the scores."""
    p = pats.codes.shape[0]
    codes = pats.codes.astype(float)
    starts, owner = [], []
    for m in range(p):
        bad = _corrupt(pats.rates[:, m], corruption, n_starts, rng)
        starts.append(net.tau_s * bad @ res.decoder.T)
        owner.append(np.full(n_starts, m))
    starts, owner = np.vstack(starts), np.concatenate(owner)
    if method == "rate":
        nudged = codes + rng.normal(0.0, 0.01 / np.sqrt(codes.shape[1]), size=codes.shape)
        ends = rate_flow(net, np.vstack([starts, nudged]), dt=dt)
        end_rates = np.asarray(net.rates_at(ends, dt=dt), dtype=float)
    else:
        sim = net.simulate(duration, dt=dt, n_trials=starts.shape[0] + p,
                           y0=np.vstack([starts, codes]), seed=rng)
        t0 = 0.6 * duration
        end_rates = np.array([[np.sum(t >= t0) for t in trial] for trial in sim.trials],
                             dtype=float) / (duration - t0)
    ov = overlaps(end_rates, pats.rates.T, center=True)
    target = np.concatenate([owner, np.arange(p)])
    own = ov[np.arange(target.size), target]
    ok = (np.argmax(ov, axis=1) == target) & (own >= threshold)
    n_c = owner.size
    acc["overlap"].append(float(own[:n_c].mean()))
    acc["recalled"].append(float(ok[:n_c].mean()))
    acc["held"].append(float(ok[n_c:].mean()))
    acc["resid"].append(res.residual)
    acc["margin"].append(float(np.median(res.margins)))
    acc["reached"].append(bool(res.success))
    acc["noise"].append(float(np.median(readout_noise_ratio(net, pats.codes, dt=dt))))


# ------------------------------------------------------------- binary limit
def binary_recall(encoder, decoder, states, *, max_iter=100, zero_diagonal=True):
    """Synchronous sign dynamics ``s <- sign(E D s - diag(E D) s)`` of +-1 units.

    Parameters
    ----------
    encoder : array_like (N, K)
    decoder : array_like (K, N)
    states : array_like (N,) or (N, M)
        Initial +-1 states (M runs at once).
    max_iter : int
        Most synchronous updates.
    zero_diagonal : bool
        Remove self-coupling ``W_ii = E[i] . D[:, i]`` (computed in O(N K)).

    Returns
    -------
    ndarray
        Final states, same shape as ``states``. Units with zero field keep their sign.
    """
    e = check_array("encoder", encoder, ndim=2)
    d = check_array("decoder", decoder, ndim=2)
    s = check_array("states", states)
    one = s.ndim == 1
    s = s.reshape(s.shape[0], -1).copy()
    if d.shape != (e.shape[1], e.shape[0]) or s.shape[0] != e.shape[0]:
        raise InputError(f"states: encoder {e.shape}, decoder {d.shape} and states "
                         f"{s.shape} do not fit (N x K, K x N, N x M)")
    diag = np.einsum("ik,ki->i", e, d) if zero_diagonal else np.zeros(e.shape[0])
    for _ in range(check_int("max_iter", max_iter, low=1)):
        h = e @ (d @ s) - diag[:, None] * s
        new = np.where(h > 0, 1.0, np.where(h < 0, -1.0, s))
        if np.array_equal(new, s):
            break
        s = new
    return s[:, 0] if one else s


@dataclass
class BinaryCapacity:
    """Retrieval of +-1 patterns versus load (binary limit).

    Attributes
    ----------
    rule : str
    loads : ndarray (L,)
    mean_overlap : ndarray (L,)
        Mean final overlap ``m = xi . s / N`` with the pattern started from.
    error_fraction : ndarray (L,)
        Mean fraction of wrong units at the end, ``(1 - m) / 2``.
    capacity : float
        Load where the mean overlap first drops below ``threshold``.
    threshold : float
    """

    rule: str
    loads: np.ndarray
    mean_overlap: np.ndarray
    error_fraction: np.ndarray
    capacity: float
    threshold: float


def binary_capacity(n_neurons, loads, *, rule="hebbian", flip=0.0, n_repeats=1,
                    threshold=0.9, max_iter=100, rng=None):
    """Retrieval versus load of random +-1 patterns stored with a decoder rule.

    Encoder ``E = xi`` (N x P), codes the identity (K = P), decoder from
    :func:`decoder_hebbian` (``center=False``: Hopfield's rule) or
    :func:`decoder_pseudoinverse` (projection rule); zero self-coupling; synchronous
    dynamics from each pattern with a fraction ``flip`` of its units flipped.

    Parameters
    ----------
    n_neurons : int
    loads : sequence of float
        P / N values.
    rule : {'hebbian', 'pseudoinverse'}
    flip : float
        Fraction of units flipped in the starting states.
    n_repeats : int
        Independent pattern sets per load.
    threshold : float
        Overlap defining the capacity.
    max_iter : int
    rng : None, int or numpy.random.Generator

    Returns
    -------
    BinaryCapacity

    References
    ----------
    .. [1] Amit DJ, Gutfreund H, Sompolinsky H (1985) Phys Rev Lett 55:1530-1533.
    .. [2] Kanter I, Sompolinsky H (1987) Phys Rev A 35:380-392.
    """
    n = check_int("n_neurons", n_neurons, low=2)
    loads = np.atleast_1d(check_array("loads", loads))
    if np.any(loads <= 0):
        raise InputError(f"loads: expected P/N values > 0, got {loads.min()!r}")
    if rule not in ("hebbian", "pseudoinverse"):
        raise InputError(f"rule: expected 'hebbian' or 'pseudoinverse', got {rule!r}")
    flip = check_fraction("flip", flip)
    n_repeats = check_int("n_repeats", n_repeats, low=1)
    threshold = check_fraction("threshold", threshold)
    rng = check_rng(rng)
    means = []
    for load in loads:
        p = max(1, int(round(load * n)))
        vals = []
        for _ in range(n_repeats):
            xi = rng.choice([-1.0, 1.0], size=(n, p))
            eye = np.eye(p)
            if rule == "hebbian":
                dec = hebbian_matrix(xi, eye, tau_s=1.0, center=False)
            else:
                dec = pseudoinverse_matrix(xi, eye, tau_s=1.0)
            start = xi.copy()
            n_flip = int(round(flip * n))
            for m in range(p):
                idx = rng.choice(n, size=n_flip, replace=False)
                start[idx, m] *= -1
            end = binary_recall(xi, dec, start, max_iter=max_iter)
            vals.append(np.mean(np.sum(end * xi, axis=0) / n))
        means.append(float(np.mean(vals)))
    means = np.array(means)
    return BinaryCapacity(rule=rule, loads=loads, mean_overlap=means,
                          error_fraction=(1 - means) / 2,
                          capacity=_crossing(loads, means, threshold), threshold=threshold)
