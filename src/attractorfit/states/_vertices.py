"""Vertex codes of discrete states on a hypercube, and how additive they are.

Every state gets a code in {-1, +1}^K. For a free Poisson HMM the codes are found by
fitting an *additive binary* model to the states' positions: each state's position
(its log-rates, or its rates projected into the latent space) is an intercept plus a
sum of K axis effects, one per code bit, with distinct codes for distinct states. K is
the smallest dimension whose codes separate the states, ``ceil(log2 S)``, unless given
(DESIGN.md, Amendment 3).

References
----------
.. [1] Ghahramani, Z. & Jordan, M. I. (1997). Factorial hidden Markov models.
   Machine Learning 29:245-273.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from attractorfit._validation import check_array, check_int, check_rng
from attractorfit.errors import InputError
from attractorfit.states._feature import vertex_codes as hypercube_vertices

__all__ = ["VertexCodes", "assign_vertex_codes", "cube_r2", "codes_to_text",
           "codes_from_feature_model"]

#: Largest number of code assignments searched exhaustively.
_EXHAUSTIVE_LIMIT = 200_000


@dataclass
class VertexCodes:
    """Vertex codes of S states.

    Attributes
    ----------
    codes : ndarray of int (S, K)
        Code of each state, entries -1 or +1; distinct rows.
    n_dims : int
        K.
    cube_r2 : float
        How well additive binary features explain the state log-rates
        (see :func:`cube_r2`).
    fit_r2 : float
        The same R^2 in the space the codes were fitted in (``space``).
    space : str
        ``"log_rates"``, ``"latent"`` or ``"feature_model"``.
    axis_effects : ndarray (K, D)
        Effect of each code axis (half the difference between its +1 and -1 sides)
        in the fitted space (D = units for log-rates, latent dimensions otherwise).
    exhaustive : bool
        True when every assignment of states to vertices was tried (exact optimum).
    """

    codes: np.ndarray
    n_dims: int
    cube_r2: float
    fit_r2: float
    space: str
    axis_effects: np.ndarray
    exhaustive: bool

    def text(self) -> list:
        """Codes as text, one letter per axis: ``H`` for +1, ``L`` for -1."""
        return codes_to_text(self.codes)


def codes_to_text(codes) -> list:
    """Text form of codes: one letter per axis, ``H`` for +1 and ``L`` for -1.

    Spreadsheets read ``+-+`` as a formula, hence letters (DESIGN.md, Amendment 6).
    A row of length 0 (no code) gives ``""``.

    Examples
    --------
    >>> codes_to_text([[1, -1, 1], [-1, -1, -1]])
    ['HLH', 'LLL']
    """
    codes = np.asarray(codes)
    if codes.ndim != 2:
        raise InputError(f"codes: expected a 2-dimensional array, got shape {codes.shape}")
    return ["".join("H" if c > 0 else "L" for c in row) for row in codes]


def _floor_log(rates, rel_floor):
    r = np.asarray(rates, dtype=float)
    floor = np.maximum(rel_floor * r.mean(axis=0, keepdims=True), 1e-12)
    return np.log(np.maximum(r, floor))


def _r2(y, codes):
    """R^2 of each column of y (S x D) regressed on [1, codes], pooled over columns."""
    s = y.shape[0]
    d = np.column_stack([np.ones(s), np.asarray(codes, dtype=float)])
    h = d @ np.linalg.pinv(d)
    yc = y - y.mean(axis=0, keepdims=True)
    tot = float(np.sum(yc * yc))
    if tot <= 0:
        return float("nan")
    res = y - h @ y
    return 1.0 - float(np.sum(res * res)) / tot


def cube_r2(state_rates, codes, *, rel_floor: float = 1e-3) -> float:
    """How well additive binary features explain the state log-rates.

    With L the S x N matrix of state log-rates (rates floored at ``rel_floor`` times
    the unit's mean rate over states, and at 1e-12, before the log) and the design
    D = [1, codes] (S x (K + 1)), each unit's log-rates are regressed on D by least
    squares (a per-unit intercept plus one effect per code axis, as in the additive
    log-rate model of a factorial HMM [1]_). The result is pooled over units:

        R^2 = 1 - sum_{s,i} (L - D B)_{si}^2 / sum_{s,i} (L_{si} - mean_s L_{si})^2

    1 means the states sit exactly on a (possibly skewed) hypercube in log-rate
    space. With S <= K + 1 states the fit is exact by counting (R^2 = 1 carries no
    information); NaN when no unit's rate differs between states.

    Parameters
    ----------
    state_rates : ndarray (S, N)
        Rates (any unit: the log's scale is absorbed by the intercept), >= 0.
    codes : ndarray (S, K) of +-1
    rel_floor : float

    Returns
    -------
    float
    """
    r = check_array("state_rates", state_rates, ndim=2)
    if np.any(r < 0):
        raise InputError("state_rates: expected rates >= 0, found a negative value")
    c = np.asarray(codes)
    if c.ndim != 2 or c.shape[0] != r.shape[0]:
        raise InputError(f"codes: expected shape ({r.shape[0]}, K), got {c.shape}")
    return _r2(_floor_log(r, rel_floor), c)


def _residual_ss_batch(yc, vert, assign):
    """Residual sum of squares of yc on [1, codes] for a batch of assignments."""
    c = vert[assign].astype(float)                            # M x S x K
    d = np.concatenate([np.ones(c.shape[:2] + (1,)), c], axis=2)
    h = d @ np.linalg.pinv(d)                                 # M x S x S
    res = yc[None] - h @ yc[None]
    return np.sum(res * res, axis=(1, 2))


def _exhaustive(yc, k):
    s = yc.shape[0]
    vert = hypercube_vertices(k)
    # the cube's symmetries (axis flips) let state 0 sit at vertex 0
    rest = [list(p) for p in itertools.permutations(range(1, 2 ** k), s - 1)]
    assign = np.array([[0] + p for p in rest], dtype=np.int64).reshape(len(rest), s)
    best, best_ss = None, np.inf
    for lo in range(0, len(assign), 20000):
        ss = _residual_ss_batch(yc, vert, assign[lo:lo + 20000])
        j = int(np.argmin(ss))
        if ss[j] < best_ss - 1e-12 * max(1.0, abs(best_ss) if np.isfinite(best_ss) else 1):
            best, best_ss = assign[lo + j], float(ss[j])
    return vert[best]


def _alternating(yc, k, rng, n_restarts=50, max_iter=100):
    from scipy.optimize import linear_sum_assignment

    s = yc.shape[0]
    vert = hypercube_vertices(k).astype(float)
    best, best_ss = None, np.inf
    for _ in range(n_restarts):
        assign = rng.choice(2 ** k, size=s, replace=False)
        for _ in range(max_iter):
            d = np.column_stack([np.ones(s), vert[assign]])
            b = np.linalg.pinv(d) @ yc                      # (K+1) x D
            pred = b[0][None, :] + vert @ b[1:]             # 2^K x D
            cost = ((yc[:, None, :] - pred[None]) ** 2).sum(axis=2)
            _, new = linear_sum_assignment(cost)
            if np.array_equal(new, assign):
                break
            assign = new
        ss = float(_residual_ss_batch(yc, vert.astype(np.int64), assign[None])[0])
        if ss < best_ss - 1e-12:
            best, best_ss = assign.copy(), ss
    return vert[best].astype(np.int64)


def _orient(codes, y):
    """Canonical axes: order by effect size, sign so that +1 raises the mean of y."""
    s = codes.shape[0]
    d = np.column_stack([np.ones(s), codes.astype(float)])
    b = np.linalg.pinv(d) @ y
    eff = b[1:]
    norms = np.sqrt(np.sum(eff * eff, axis=1))
    order = np.argsort(-norms, kind="stable")
    codes, eff = codes[:, order], eff[order]
    sign = np.where(eff.mean(axis=1) < 0, -1, 1)
    return codes * sign[None, :], eff * sign[:, None]


def assign_vertex_codes(state_rates, *, latent=None, n_dims=None, rel_floor: float = 1e-3,
                 rng=None) -> VertexCodes:
    """Assign each state a distinct vertex of {-1,+1}^K.

    The state positions Y (S x D) are either the log-rates (default) or, with
    ``latent``, the state rates projected into the latent space (square-root rates
    through the latent model's projection; ``state_rates`` must then be expected
    counts per bin, as the Poisson HMM's ``rates_``). Codes C minimise the residual
    of Y regressed on [1, C] over all assignments of states to distinct vertices:
    exhaustively (state 0 fixed at a vertex, by the cube's symmetry) when there are
    at most 200,000 assignments, else by alternating least squares and optimal
    assignment (Hungarian method) from 50 random starts.

    Axes are ordered by decreasing effect size and signed so that +1 (``H``) is the
    side with the higher mean position (for log-rates: the higher mean log-rate).

    Parameters
    ----------
    state_rates : ndarray (S, N)
        State rates (>= 0).
    latent : LatentFit, optional
        Fit the codes in this latent space (ignored when it has 0 dimensions).
    n_dims : int, optional
        Code length K (>= ceil(log2 S)). Default: the smallest that separates the
        states, ``max(1, ceil(log2 S))``.
    rel_floor : float
        Rate floor before logs (see :func:`cube_r2`).
    rng : int or Generator, optional
        Starts of the alternating search (unused when exhaustive).

    Returns
    -------
    VertexCodes
    """
    rates = check_array("state_rates", state_rates, ndim=2)
    if np.any(rates < 0):
        raise InputError("state_rates: expected rates >= 0, found a negative value")
    s = rates.shape[0]
    k_min = max(1, math.ceil(math.log2(s))) if s > 1 else 1
    k = k_min if n_dims is None else check_int("n_dims", n_dims, low=k_min, high=8)
    rng = check_rng(rng)
    logr = _floor_log(rates, rel_floor)
    space = "log_rates"
    y = logr
    if latent is not None and latent.n_dims > 0:
        if rates.shape[1] != latent.mean.size:
            raise InputError(f"state_rates: {rates.shape[1]} units, the latent model has "
                             f"{latent.mean.size}")
        y = (np.sqrt(rates) - latent.mean) @ latent._projector()
        space = "latent"
    yc = y - y.mean(axis=0, keepdims=True)
    if s == 1:
        codes = np.ones((1, k), dtype=np.int64)
        exhaustive = True
    else:
        n_assign = math.perm(2 ** k - 1, s - 1)
        exhaustive = n_assign <= _EXHAUSTIVE_LIMIT
        codes = _exhaustive(yc, k) if exhaustive else _alternating(yc, k, rng)
    codes, eff = _orient(codes, yc)
    return VertexCodes(codes=codes.astype(np.int64), n_dims=k, cube_r2=_r2(logr, codes),
                       fit_r2=_r2(y, codes), space=space, axis_effects=eff,
                       exhaustive=bool(exhaustive))


def codes_from_feature_model(model) -> VertexCodes:
    """Vertex codes of a fitted binary-feature model (its states are the vertices).

    Parameters
    ----------
    model : BinaryFeatureHMM
        Fitted; ``codes_`` (2^K x K) and ``rates_`` (2^K x N).
    """
    codes = np.asarray(model.codes_, dtype=np.int64)
    rates = np.asarray(model.rates_, dtype=float)
    logr = _floor_log(rates, 1e-3)
    yc = logr - logr.mean(axis=0, keepdims=True)
    d = np.column_stack([np.ones(codes.shape[0]), codes])
    eff = (np.linalg.pinv(d) @ yc)[1:]
    r2 = _r2(logr, codes)
    return VertexCodes(codes=codes, n_dims=codes.shape[1], cube_r2=r2, fit_r2=r2,
                       space="feature_model", axis_effects=eff, exhaustive=True)
