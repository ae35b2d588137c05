"""Decoder rules: choose D so that the readout of each pattern lands on its vertex.

For P patterns with rates R (N x P, Hz) and codes X (K x P), a fixed point of the rate
picture ``tau_s dy/dt = -y + tau_s D phi(E y + bias)`` at vertex ``a x^mu`` requires

    tau_s D r^mu = a x^mu        (all mu),   i.e.   tau_s D R = a X.

Rules:

* :func:`decoder_hebbian` -- outer product ``D = c X (R - mean)^T`` (Hopfield's rule
  transposed to rates); inexact; ``c`` is the least-squares scalar.
* :func:`decoder_pseudoinverse` -- projection rule ``D = a X R^+ / tau_s``: the
  minimum-norm solution, exact when ``a X`` lies in the row space of R (always when R
  has full column rank), else the least-squares solution.
* :func:`decoder_optimized` -- minimises the predicted readout shot-noise variance
  ``sum_mu sum_{k,j} D[k, j]^2 r_j^mu`` subject to the same (least-squares-achievable)
  fixed points and to stability margins as inequalities,
  ``max Re eig(J_mu) <= -margin`` with ``J_mu = -I + tau_s D diag(phi'_mu) E``.

References
----------
.. [1] Hopfield JJ (1982) Neural networks and physical systems with emergent collective
   computational abilities. PNAS 79:2554-2558.
.. [2] Personnaz L, Guyon I, Dreyfus G (1985) Information storage and retrieval in
   spin-glass like neural networks. Journal de Physique Lettres 46:L359-L365.
.. [3] Kanter I, Sompolinsky H (1987) Associative recall of memory without errors.
   Physical Review A 35:380-392.
.. [4] Nocedal J, Wright SJ (2006) Numerical Optimization, 2nd ed. Springer, ch. 17
   (penalty methods) and ch. 18 (sequential quadratic programming).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import linalg, optimize

from attractorfit._threads import single_threaded
from attractorfit._validation import check_array, check_nonnegative, check_positive
from attractorfit.errors import InputError, InputWarning

__all__ = ["DecoderResult", "decoder_hebbian", "decoder_pseudoinverse", "decoder_optimized",
           "vertex_margins", "readout_sd"]


@dataclass
class DecoderResult:
    """A decoder and how well it meets the fixed-point constraints.

    Attributes
    ----------
    decoder : ndarray (K, N)
    rule : str
        ``'hebbian'``, ``'pseudoinverse'`` or ``'optimized'``.
    residual : float
        ``||tau_s D R - a X||_F / ||a X||_F``.
    max_residual : float
        Largest ``|tau_s D r^mu - a x^mu|`` entry divided by ``a``.
    exact : bool
        ``residual < 1e-8``. False in the least-squares case (the codes are not reachable
        from the rates' row space) and for the Hebbian rule.
    readout_sd : ndarray (P, K)
        Predicted shot-noise s.d. of the readout at each pattern,
        ``sqrt(sum_j D[k, j]^2 r_j^mu tau_s / 2)`` (Poisson spiking, Campbell's theorem).
    margins : ndarray (P,) or None
        ``-max Re eig(J_mu)`` at each pattern (when slopes and encoder were given).
    success : bool
        Constraints met (optimized rule: margins reached; others: True).
    message : str
    """

    decoder: np.ndarray
    rule: str
    residual: float
    max_residual: float
    exact: bool
    readout_sd: np.ndarray
    margins: np.ndarray | None = None
    success: bool = True
    message: str = ""


def _check_patterns(rates, codes, tau_s, scale):
    r = check_array("rates", rates, ndim=2)
    x = check_array("codes", codes, ndim=2)
    if x.shape[1] != r.shape[1]:
        hint = " (pass codes as K x P, e.g. vertex_codes(K).T)" if x.shape[0] == r.shape[1] \
            else ""
        raise InputError(f"codes: expected shape (K, P) with P = {r.shape[1]} patterns like "
                         f"rates (N x P), got {x.shape}{hint}")
    if r.size == 0:
        raise InputError(f"rates: expected at least one neuron and one pattern, got shape "
                         f"{r.shape}")
    if r.min() < 0:
        j, m = np.unravel_index(int(np.argmin(r)), r.shape)
        raise InputError(f"rates: neuron {j}, pattern {m} has rate {float(r[j, m])!r} Hz; "
                         "expected rates >= 0")
    if not np.any(r > 0):
        raise InputError(f"rates: all {r.size} rates are 0 Hz (the pattern matrix is zero); "
                         "expected at least one active neuron: no decoder reads a vertex "
                         "out of silence")
    return r, x, check_positive("tau_s", tau_s), check_positive("scale", scale)


def _warn_if_least_squares(res, r, x, rcond):
    """InputWarning when the fixed points hold only in the least-squares sense.

    Happens when the pattern matrix R is rank-deficient and the codes are not in its
    row space (e.g. two patterns with the same rates but different codes, or more
    patterns than K + 1 with a hypercube encoder). The decoder returned is then the
    minimum-norm least-squares one (the limit of ridge regularisation as the ridge
    goes to 0); ``residual`` says how far the fixed points are missed.
    """
    if res.residual <= 1e-6:
        return
    sv = linalg.svdvals(r)
    rank = int(np.sum(sv > rcond * sv[0]))
    p = r.shape[1]
    tol = 1e-9 * float(np.max(np.abs(r)))
    pair = next(((a, b) for a in range(p) for b in range(a + 1, p)
                 if np.all(np.abs(r[:, a] - r[:, b]) <= tol) and np.any(x[:, a] != x[:, b])),
                None)
    same = "" if pair is None else (f"; patterns {pair[0]} and {pair[1]} have the same rates "
                                    "but different codes, so no decoder can tell them apart")
    warnings.warn(f"decoder_{res.rule}: the {p} patterns' rates have rank {rank}, and the "
                  f"codes are not reachable from them{same}; used the least-squares "
                  f"(minimum-norm) decoder, relative residual {res.residual:.3g}",
                  InputWarning, stacklevel=3)


def readout_sd(decoder, rates, *, tau_s):
    """Predicted shot-noise s.d. of each readout dimension at each pattern, (P, K).

    ``sqrt(sum_j D[k, j]^2 r_j^mu tau_s / 2)``: the variance of filtered Poisson spike
    trains (Campbell's theorem); divide by the vertex spacing ``2 a`` to compare with the
    distance between states.
    """
    d = np.asarray(decoder, dtype=float)
    r = np.asarray(rates, dtype=float)
    return np.sqrt((r.T @ (d ** 2).T) * tau_s / 2.0)


def vertex_margins(decoder, encoder, slopes, *, tau_s):
    """Stability margins ``-max Re eig(-I + tau_s D diag(phi'_mu) E)`` per pattern, (P,)."""
    d = np.asarray(decoder, dtype=float)
    e = np.asarray(encoder, dtype=float)
    s = np.asarray(slopes, dtype=float)
    k = d.shape[0]
    out = np.empty(s.shape[1])
    for m in range(s.shape[1]):
        jac = -np.eye(k) + tau_s * (d * s[:, m]) @ e
        out[m] = -np.max(np.linalg.eigvals(jac).real)
    return out


def _result(decoder, rule, rates, x, tau_s, scale, *, encoder=None, slopes=None,
            success=True, message=""):
    target = scale * x
    err = tau_s * decoder @ rates - target
    resid = float(np.linalg.norm(err) / max(np.linalg.norm(target), 1e-300))
    margins = None
    if encoder is not None and slopes is not None:
        margins = vertex_margins(decoder, encoder, slopes, tau_s=tau_s)
    return DecoderResult(decoder=decoder, rule=rule, residual=resid,
                         max_residual=float(np.max(np.abs(err)) / scale) if err.size else 0.0,
                         exact=resid < 1e-8, readout_sd=readout_sd(decoder, rates,
                                                                   tau_s=tau_s),
                         margins=margins, success=success, message=message)


def _check_dynamics(encoder, slopes, n, k, p):
    if (encoder is None) != (slopes is None):
        raise InputError("encoder, slopes: give both (to report stability margins) or "
                         "neither")
    if encoder is None:
        return None, None
    e = check_array("encoder", encoder, ndim=2)
    s = check_array("slopes", slopes, ndim=2)
    if e.shape != (n, k):
        raise InputError(f"encoder: expected shape (N, K) = ({n}, {k}), got {e.shape}")
    if s.shape != (n, p):
        raise InputError(f"slopes: expected shape (N, P) = ({n}, {p}) like rates, got "
                         f"{s.shape}")
    return e, s


def decoder_hebbian(rates, codes, *, tau_s, scale=1.0, center=True, encoder=None,
                    slopes=None):
    """Outer-product (Hebbian) decoder ``D = c X (R - mean)^T``.

    Parameters
    ----------
    rates : array_like (N, P)
        Pattern rates (Hz).
    codes : array_like (K, P)
        Latent codes of the patterns (one column per pattern).
    tau_s : float
        Readout time constant (s).
    scale : float
        Vertex scale ``a``.
    center : bool
        Subtract each neuron's mean rate over the patterns (default). ``False`` gives
        Hopfield's ``X R^T`` (used with +-1 "rates" in the binary limit).
    encoder, slopes : array_like, optional
        (N, K) and (N, P): if given, the stability margins are reported.

    Returns
    -------
    DecoderResult
        ``c`` is the scalar minimising ``||tau_s D R - a X||``; the rule is inexact in
        general (``exact`` False).

    References
    ----------
    .. [1] Hopfield JJ (1982) PNAS 79:2554-2558.
    """
    r, x, tau_s, scale = _check_patterns(rates, codes, tau_s, scale)
    e, s = _check_dynamics(encoder, slopes, r.shape[0], x.shape[0], r.shape[1])
    return _result(hebbian_matrix(r, x, tau_s=tau_s, scale=scale, center=center), "hebbian",
                   r, x, tau_s, scale, encoder=e, slopes=s)


def hebbian_matrix(r, x, *, tau_s, scale=1.0, center=True):
    """The Hebbian decoder matrix for clean arrays (no checks; any sign of ``r``)."""
    rc = r - r.mean(axis=1, keepdims=True) if center else r
    base = x @ rc.T
    readout = tau_s * base @ r
    target = scale * x
    denom = float(np.sum(readout * readout))
    c = float(np.sum(readout * target) / denom) if denom > 0 else 0.0
    return c * base


def decoder_pseudoinverse(rates, codes, *, tau_s, scale=1.0, rcond=1e-10, encoder=None,
                          slopes=None):
    """Projection (pseudo-inverse) decoder ``D = a X R^+ / tau_s`` (minimum norm).

    Exact when ``a X`` lies in the row space of R (always if R has full column rank);
    otherwise it is the least-squares solution and ``residual`` says how far it is.

    Parameters
    ----------
    rates, codes, tau_s, scale, encoder, slopes
        As in :func:`decoder_hebbian`.
    rcond : float
        Relative cut-off for small singular values of R.

    Returns
    -------
    DecoderResult

    Raises
    ------
    InputError
        Bad shapes, negative rates, or a pattern matrix that is all zero.

    Warns
    -----
    InputWarning
        A rank-deficient pattern matrix whose codes cannot be reached (e.g. two
        patterns with equal rates and different codes): the decoder is the
        least-squares, minimum-norm one (the ridge limit), and ``residual`` > 1e-6.

    References
    ----------
    .. [1] Personnaz L, Guyon I, Dreyfus G (1985) J Physique Lettres 46:L359-L365.
    .. [2] Kanter I, Sompolinsky H (1987) Physical Review A 35:380-392.
    """
    r, x, tau_s, scale = _check_patterns(rates, codes, tau_s, scale)
    e, s = _check_dynamics(encoder, slopes, r.shape[0], x.shape[0], r.shape[1])
    rcond = check_positive("rcond", rcond)
    res = _result(pseudoinverse_matrix(r, x, tau_s=tau_s, scale=scale, rcond=rcond),
                  "pseudoinverse", r, x, tau_s, scale, encoder=e, slopes=s)
    _warn_if_least_squares(res, r, x, rcond)
    return res


def pseudoinverse_matrix(r, x, *, tau_s, scale=1.0, rcond=1e-10):
    """The pseudo-inverse decoder matrix for clean arrays (no checks; any sign of ``r``)."""
    return scale * x @ linalg.pinv(r, rtol=rcond) / tau_s


@single_threaded
def decoder_optimized(rates, codes, *, tau_s, encoder, slopes, scale=1.0, margin=0.2,
                      pattern_weights=None, weight_floor=1e-3, rcond=1e-10, max_iter=300,
                      max_slsqp=600, init=None, stability="symmetric"):
    """Minimum readout-noise decoder with exact fixed points and stability margins.

    Minimises ``sum_mu sum_{k,j} D[k, j]^2 r_j^mu`` (the predicted readout shot-noise
    variance summed over patterns) subject to

    * ``tau_s D R = a X P_R`` (``P_R`` the projector on the row space of R: exactly
      ``a X`` whenever that is reachable, the least-squares readout otherwise), and
    * ``max Re eig(J_mu) <= -margin`` for every pattern, ``J_mu = -I + tau_s D diag(phi'_mu) E``.

    Method: in the variables ``D~ = D W^{1/2}`` (``W = diag(sum_mu r^mu)``) the objective
    is ``||D~||^2`` and every constraint depends on ``D~`` only through its projection on
    the span of ``W^{-1/2} [R, diag(phi'_1) E, ..., diag(phi'_P) E]``, so the problem
    lives in at most ``K P (1 + K)`` variables whatever N. The equalities are solved
    exactly (weighted minimum norm). If that optimum misses the margins, the remaining
    null space is searched with analytic eigenvalue gradients: SLSQP with the largest
    real part per pattern as the constraint, then with every eigenvalue (up to
    ``max_slsqp`` variables), else a quadratic penalty on every eigenvalue with L-BFGS. Because these solvers tend to stop just short of a
    non-smooth boundary, the request is raised by 5%, 15% and 40% until the result meets
    the margin asked for. The decoder may be asymmetric.

    Parameters
    ----------
    rates : array_like (N, P)
        Pattern rates (Hz).
    codes : array_like (K, P)
        Latent codes (columns).
    tau_s : float
        Readout time constant (s).
    encoder : array_like (N, K)
    slopes : array_like (N, P)
        Transfer-function slopes at each pattern (Hz per unit input), e.g.
        :attr:`VertexPatterns.slopes`.
    scale : float
        Vertex scale ``a``.
    margin : float
        Required stability margin (in units of ``1 / tau_s``), >= 0.
    pattern_weights : array_like (P,), optional
        Weight ``c_mu > 0`` of each pattern's readout variance in the objective,
        ``sum_mu c_mu sum_{k,j} D[k, j]^2 r_j^mu`` (default all 1). A larger weight buys a
        quieter readout, hence longer dwells, at that pattern at the expense of the others.
    weight_floor : float
        Neurons' noise weights ``sum_mu r_j^mu`` are floored at this fraction of their
        mean (a silent neuron would otherwise get an unbounded decoder entry for free).
    rcond : float
        Relative cut-off for singular values.
    max_iter : int
        Iterations of SLSQP.
    max_slsqp : int
        Largest number of free variables handed to SLSQP (its cost grows as the cube).
    stability : {"symmetric", "spectral"}
        What the margin constrains (default ``"symmetric"``, the one with a unique
        answer on every machine). ``"spectral"``: the largest real part of the
        eigenvalues of every ``J_mu`` (the margin itself; a non-convex constraint, so the
        solver's answer can depend on where it starts). ``"symmetric"``: the largest
        eigenvalue of the symmetric part ``(J_mu + J_mu^T) / 2`` (the numerical
        abscissa), which bounds the real parts from above (ref. [3]), so the margin is met
        with room to spare; the constraint is convex in D (an eigenvalue bound on an
        affine symmetric matrix), so with the strictly convex objective the optimum is
        unique and moves continuously with the rates, weights and margins.
    init : array_like (K, N), optional
        A decoder to start the search from (its part in the free subspace), e.g. the
        solution of a nearby problem. The stability constraints make the problem
        non-convex, and from the minimum-norm start a tiny change of the inputs can land
        on another local optimum (measured: weights changed by 1e-6 moved the decoder by
        10%); starting from the previous solution follows one branch instead.

    Returns
    -------
    DecoderResult
        With ``margins`` and ``success`` (False, with a warning, if the margins could not
        be reached).

    Raises
    ------
    InputError
        Bad shapes, negative rates, or a pattern matrix that is all zero.

    Warns
    -----
    RuntimeWarning
        The margins could not be reached.
    InputWarning
        A rank-deficient pattern matrix whose codes cannot be reached: the fixed points
        hold in the least-squares sense only (as for :func:`decoder_pseudoinverse`).

    References
    ----------
    .. [1] Nocedal J, Wright SJ (2006) Numerical Optimization, 2nd ed. Springer, ch. 17-18.
    .. [2] Magnus JR (1985) On differentiating eigenvalues and eigenvectors. Econometric
       Theory 1:179-191.
    .. [3] Trefethen LN, Embree M (2005) Spectra and Pseudospectra. Princeton University
       Press, ch. 17 (numerical abscissa and the spectral abscissa).
    """
    if stability not in ("spectral", "symmetric"):
        raise InputError(f"stability: expected 'spectral' or 'symmetric', got {stability!r}")
    r, x, tau_s, scale = _check_patterns(rates, codes, tau_s, scale)
    n, p = r.shape
    k = x.shape[0]
    e, s = _check_dynamics(encoder, slopes, n, k, p)
    if e is None:
        raise InputError("encoder, slopes: the optimized rule needs both")
    margin = check_nonnegative("margin", margin)
    weight_floor = check_positive("weight_floor", weight_floor)

    if pattern_weights is None:
        c = np.ones(p)
    else:
        c = check_array("pattern_weights", pattern_weights, ndim=1)
        if c.shape != (p,) or not np.all(np.isfinite(c) & (c > 0)):
            raise InputError(f"pattern_weights: expected {p} finite numbers > 0 (one per "
                             f"pattern), got {np.asarray(pattern_weights).tolist()!r}")
    w = r @ c
    w = np.maximum(w, weight_floor * (w.mean() if w.mean() > 0 else 1.0))
    sw = np.sqrt(w)
    blocks = [r] + [s[:, m:m + 1] * e for m in range(p)]
    a_t = np.hstack(blocks) / sw[:, None]                          # N x (P + P K)
    u, sv, vt = linalg.svd(a_t, full_matrices=False)
    keep = sv > rcond * (sv[0] if sv.size else 0.0)
    u, t = u[:, keep], sv[keep, None] * vt[keep]                   # T = U^T A~
    t_r = t[:, :p]
    t_mu = [t[:, p + m * k:p + (m + 1) * k] for m in range(p)]
    # Achievable readout (least squares in the row space of R) and its minimum-norm Y.
    target = scale * x @ linalg.pinv(r, rtol=rcond) @ r
    ur, svr, _ = linalg.svd(t_r, full_matrices=True)
    rank_r = int(np.sum(svr > rcond * (svr[0] if svr.size else 0.0)))
    y0 = (target / tau_s) @ linalg.pinv(t_r, rtol=rcond)
    nb = ur[:, rank_r:]                                            # null space of T_R^T
    b_mu = [nb.T @ tm for tm in t_mu]                              # n_free x K
    j0 = [-np.eye(k) + tau_s * y0 @ tm for tm in t_mu]

    def decoder_of(z):
        y = y0 + z @ nb.T
        return (y @ u.T) / sw

    nf = nb.shape[1]
    z = np.zeros((k, nf))
    z_start = None
    if init is not None:
        d0 = check_array("init", init, ndim=2)
        if d0.shape != (k, n) or not np.all(np.isfinite(d0)):
            raise InputError(f"init: expected a finite decoder of shape {(k, n)}, got "
                             f"shape {d0.shape}")
        z_start = ((d0 * sw) @ u - y0) @ nb
    sym = stability == "symmetric"
    absc = _numerical_abscissae if sym else _abscissae
    message = "the minimum-noise exact decoder already meets the margins"
    success = bool(np.all(absc(j0, b_mu, z, tau_s) <= -margin))
    norm0 = float(np.sum(y0 ** 2)) or 1.0
    tol = 1e-3 * margin + 1e-9  # accept margins within 0.1% of the request
    if not success and nf == 0:
        message = "no freedom left beyond the fixed-point constraints"
    elif not success:
        # The spectral constraint functions are not smooth where eigenvalues meet, and
        # local solvers tend to stop just short of the boundary: ask for a little more
        # margin each time until a solution meets the requested one. The symmetric form
        # is convex: one request, and a second a hair higher if the first falls short.
        candidates = []
        for extra in ((0.0, 0.05) if sym else (0.0, 0.05, 0.15, 0.4)):
            want = margin * (1 + extra) + tol / 2
            if k * nf > max_slsqp:
                tries = [("quadratic penalty", None)]
            elif sym:
                tries = [("SLSQP on the symmetric parts", dict(symmetric=True))]
            else:
                tries = [("SLSQP on the largest eigenvalue", dict(all_eigs=False)),
                         ("SLSQP on all eigenvalues", dict(all_eigs=True))]
            for name, opts in tries:
                if opts is None:
                    zc = _penalty_solve(j0, b_mu, tau_s, want * 1.02 + 1e-6, norm0=norm0,
                                        z0=z_start, symmetric=sym)
                else:
                    zc = _slsqp_solve(j0, b_mu, tau_s, want, norm0=norm0,
                                      max_iter=max_iter, z0=z_start, **opts)
                gap = float(np.max(absc(j0, b_mu, zc, tau_s))) + margin
                candidates.append((f"{name}, asking {want:.3g}", zc, gap))
                if gap <= tol:
                    break
            if candidates[-1][2] <= tol:
                break
        feasible = [c for c in candidates if c[2] <= tol]
        if feasible:
            name, z, _ = min(feasible, key=lambda c: float(np.sum(c[1] ** 2)))
            success = True
            message = f"margins reached ({name})"
        else:
            name, z, _ = min(candidates, key=lambda c: c[2])
            message = (f"margins not reached (best: {name}; {len(candidates)} attempts)")
    dec = decoder_of(z)
    res = _result(dec, "optimized", r, x, tau_s, scale, encoder=e, slopes=s,
                  success=success, message=message)
    _warn_if_least_squares(res, r, x, rcond)
    if not success:
        worst = int(np.argmin(res.margins))
        warnings.warn(f"decoder_optimized: could not reach margin {margin:g} at every "
                      f"pattern (worst: pattern {worst}, margin "
                      f"{res.margins[worst]:.3g}); {message}", RuntimeWarning,
                      stacklevel=2)
    return res


def _numerical_abscissae(j0, b_mu, z, tau_s):
    """Largest eigenvalue of the symmetric part of every ``J0_mu + tau_s Z B_mu``."""
    out = []
    for j, b in zip(j0, b_mu):
        jac = j + tau_s * z @ b
        out.append(np.linalg.eigvalsh(0.5 * (jac + jac.T))[-1])
    return np.array(out)


def _abscissae(j0, b_mu, z, tau_s):
    """Spectral abscissa of every pattern's Jacobian ``J0_mu + tau_s Z B_mu``."""
    return np.array([np.max(np.linalg.eigvals(j + tau_s * z @ b).real)
                     for j, b in zip(j0, b_mu)])


def _eig_grads(j0, b, z, tau_s, *, full=False):
    """Real parts (or, with ``full``, the values) of all eigenvalues of ``J0 + tau_s Z B``
    and the gradients of the real parts in Z.

    For a simple eigenvalue with right and left eigenvectors v, u:
    ``d lambda = u^H dJ v / (u^H v)`` with ``dJ = tau_s dZ B`` (ref. [2] of
    :func:`decoder_optimized`).
    """
    jac = j0 + tau_s * z @ b
    lam, vl, vr = linalg.eig(jac, left=True, right=True)
    grads = []
    for i in range(lam.size):
        v, uu = vr[:, i], vl[:, i]
        den = np.conj(uu) @ v
        if abs(den) < 1e-12:
            den = 1e-12
        grads.append(tau_s * np.real(np.outer(np.conj(uu), b @ v) / den))
    return (lam if full else lam.real), grads


def _sym_grads(j0, b, z, tau_s):
    """Eigenvalues of the symmetric part of ``J0 + tau_s Z B`` and their gradients in Z
    (``d lambda = v^T dS v`` for a unit eigenvector v; ``dS`` the symmetric part of
    ``tau_s dZ B``, so the gradient is ``tau_s v (B v)^T``)."""
    jac = j0 + tau_s * z @ b
    lam, vec = np.linalg.eigh(0.5 * (jac + jac.T))
    return lam, [tau_s * np.outer(vec[:, i], b @ vec[:, i]) for i in range(lam.size)]


def _slsqp_solve(j0, b_mu, tau_s, margin, *, norm0, max_iter, all_eigs=True, z0=None,
                 symmetric=False):
    """min ||Z||^2 / norm0 s.t. Re eig(J_mu(Z)) <= -margin, by SLSQP (small problems).

    With ``symmetric`` the constraints are the eigenvalues of the symmetric parts
    (``all_eigs`` unused). Every eigenvalue is a constraint (real parts sorted in
    decreasing order), not only the largest: near the optimum several eigenvalues sit on the boundary, and listing
    them all keeps the linearised constraints faithful where real parts cross.
    """
    p = len(j0)
    k, nf = j0[0].shape[0], b_mu[0].shape[0]
    cache = {}

    def parts(flat):
        key = flat.tobytes()
        if key not in cache:
            zz = flat.reshape(k, nf)
            vals, rows = [], []
            for m in range(p):
                if symmetric:
                    lam, grads = _sym_grads(j0[m], b_mu[m], zz, tau_s)
                    vals.extend(lam)
                    rows.extend(g.ravel() for g in grads)
                    continue
                lam, grads = _eig_grads(j0[m], b_mu[m], zz, tau_s, full=True)
                re = lam.real.copy()
                # one constraint per complex-conjugate pair (the partner is a duplicate that
                # makes the linearised problem degenerate): give it a slack value instead
                dup = lam.imag < -1e-12
                order = np.argsort(-np.where(dup, -np.inf, re), kind="stable")
                for i in (order if all_eigs else order[:1]):
                    if dup[i]:
                        vals.append(-margin - 1.0)
                        rows.append(np.zeros(k * nf))
                    else:
                        vals.append(re[i])
                        rows.append(grads[i].ravel())
            cache.clear()
            cache[key] = (np.array(vals), np.array(rows))
        return cache[key]

    start = np.zeros(k * nf) if z0 is None else np.asarray(z0, float).ravel()
    sol = optimize.minimize(lambda f: (f @ f / norm0, 2 * f / norm0), start,
                            jac=True, method="SLSQP",
                            constraints=[{"type": "ineq",
                                          "fun": lambda f: -(parts(f)[0] + margin),
                                          "jac": lambda f: -parts(f)[1]}],
                            options={"maxiter": max_iter, "ftol": 1e-10})
    return sol.x.reshape(k, nf)


def _penalty_solve(j0, b_mu, tau_s, margin, *, norm0, z0=None, max_rounds=12,
                   symmetric=False):
    """min ||Z||^2 / norm0 + rho sum_mu sum_i max(0, Re lambda_i(J_mu) + margin)^2.

    Quadratic penalty on every eigenvalue (not only the largest, which keeps the penalty
    smooth where real parts cross), L-BFGS inner solves, ``rho`` raised tenfold per
    round until the margins hold (ref. [1] of :func:`decoder_optimized`, ch. 17.1).
    ``symmetric``: the eigenvalues of the symmetric parts instead.
    """
    p = len(j0)
    k, nf = j0[0].shape[0], b_mu[0].shape[0]
    z = np.zeros(k * nf) if z0 is None else z0.ravel().copy()
    rho = 1.0
    for _ in range(max_rounds):
        def fun(flat, rho=rho):
            zz = flat.reshape(k, nf)
            val = float(flat @ flat) / norm0
            grad = 2.0 * flat / norm0
            for m in range(p):
                re, grads = (_sym_grads if symmetric else _eig_grads)(j0[m], b_mu[m],
                                                                      zz, tau_s)
                for lam_re, g in zip(re, grads):
                    viol = lam_re + margin
                    if viol > 0:
                        val += rho * viol * viol
                        grad = grad + 2 * rho * viol * g.ravel()
            return val, grad

        z = optimize.minimize(fun, z, jac=True, method="L-BFGS-B",
                              options={"maxiter": 1000}).x
        absc = _numerical_abscissae if symmetric else _abscissae
        if np.all(absc(j0, b_mu, z.reshape(k, nf), tau_s) + margin <= 0):
            break
        rho *= 10.0
    return z.reshape(k, nf)
