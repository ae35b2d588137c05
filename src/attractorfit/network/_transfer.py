"""Rate picture of the LIF neuron: the Siegert transfer function, its slope and inverse.

Conventions (as in the simulator): the membrane obeys
``tau_m dV = (mu - V) dt + sigma * sqrt(tau_m) dW``, so a free membrane fluctuates with
s.d. ``sigma / sqrt(2)``; a spike is emitted when ``V >= threshold``, after which ``V`` is
held at ``reset`` for ``refractory`` seconds. ``sigma`` is the network's ``noise``.

Two transfer functions are provided:

* :func:`siegert_rate` -- the continuous-time stationary rate (first-passage time of the
  diffusion), exact for ``dt -> 0``;
* :func:`transfer_rate` -- the rate of the *simulator* at a finite time step ``dt``: the
  simulator looks at the membrane only once per step, which delays threshold crossings.
  The delay is corrected by shifting the threshold up by ``beta * sigma * sqrt(dt / tau_m)``
  with ``beta = -zeta(1/2) / sqrt(2 pi) = 0.5826`` (continuity correction for discretely
  monitored diffusions, ref. [3]), by adding half a step to the refractory period (the
  mean waiting time for the next look), and by rounding the refractory period to whole
  steps as the simulator does.  The tests check it against open-loop simulations at
  ``dt = 1e-4`` within 3%.

All functions are vectorised: array arguments broadcast against each other (e.g. one
value per neuron).

References
----------
.. [1] Siegert AJF (1951) On the first passage time probability problem. Physical Review
   81:617-623.
.. [2] Amit DJ, Brunel N (1997) Model of global spontaneous activity and local structured
   activity during delay periods in the cerebral cortex. Cerebral Cortex 7:237-252.
.. [3] Broadie M, Glasserman P, Kou S (1997) A continuity correction for discrete barrier
   options. Mathematical Finance 7:325-349.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from attractorfit._validation import check_array, check_positive
from attractorfit.errors import InputError

__all__ = [
    "siegert_rate",
    "siegert_slope",
    "transfer_rate",
    "transfer_slope",
    "transfer_inverse",
    "DISCRETE_THRESHOLD_SHIFT",
]

#: ``-zeta(1/2) / sqrt(2 pi)``: threshold shift, in units of ``sigma * sqrt(dt / tau_m)``,
#: that makes a continuously monitored diffusion cross like a discretely monitored one
#: (Broadie, Glasserman & Kou 1997).
DISCRETE_THRESHOLD_SHIFT = float(-special.zeta(0.5) / np.sqrt(2.0 * np.pi))

_SQRT_PI = float(np.sqrt(np.pi))
# Gauss-Legendre nodes on [0, 1] for the smooth part of the integral (see _erfcx_integral).
_GL_X, _GL_W = np.polynomial.legendre.leggauss(64)
_GL_X = 0.5 * (_GL_X + 1.0)
_GL_W = 0.5 * _GL_W
# Beyond this the integrand exp(u^2) overflows; the rate is then < exp(-700) Hz, i.e. 0.
_U_MAX = 26.0


def _erfcx_integral(p, q):
    """``int_p^q erfcx(v) dv`` for ``0 <= p <= q`` (arrays), by Gauss-Legendre in log scale.

    With ``v = exp(s) - 1`` the integrand ``erfcx(v) exp(s)`` is smooth and bounded on the
    whole half-line (``erfcx(v) ~ 1 / (v sqrt(pi))`` for large ``v``), so 64 nodes give
    near machine precision even for ``q`` of order 1e6 (tiny noise, strong drive).
    """
    s0 = np.log1p(p)[..., None]
    s1 = np.log1p(q)[..., None]
    s = s0 + (s1 - s0) * _GL_X
    v = np.expm1(s)
    return np.sum(special.erfcx(v) * np.exp(s) * _GL_W, axis=-1) * (s1 - s0)[..., 0]


def _siegert_integral(a, b):
    """``int_a^b exp(u^2) (1 + erf(u)) du = int_a^b erfcx(-u) du`` for ``a < b`` (arrays).

    Split at 0. For ``u < 0`` the integrand is ``erfcx(|u|)`` (bounded). For ``u > 0``,
    ``erfcx(-u) = 2 exp(u^2) - erfcx(u)`` and ``int 2 exp(u^2) du = sqrt(pi) erfi(u)``, so
    only bounded integrands are integrated numerically. Returns ``inf`` when ``b`` is so
    large that the integral overflows (rate 0).
    """
    out = np.zeros(np.broadcast(a, b).shape)
    a = np.broadcast_to(a, out.shape)
    b = np.broadcast_to(b, out.shape)
    neg = a < 0
    if np.any(neg):
        hi = -a[neg]
        lo = np.maximum(-b[neg], 0.0)
        out[neg] += _erfcx_integral(lo, hi)
    pos = b > 0
    if np.any(pos):
        lo = np.maximum(a[pos], 0.0)
        hi = b[pos]
        with np.errstate(over="ignore", invalid="ignore"):
            big = _SQRT_PI * (special.erfi(np.minimum(hi, _U_MAX)) - special.erfi(lo))
            part = big - _erfcx_integral(lo, np.minimum(hi, _U_MAX))
        part = np.where(hi >= _U_MAX, np.inf, part)
        out[pos] += part
    return out


def _broadcast(*args):
    return [np.asarray(x, dtype=float) for x in np.broadcast_arrays(*args)]


def siegert_rate(mu, sigma, *, tau_m=0.02, threshold=1.0, reset=0.0, refractory=0.002):
    """Stationary firing rate (Hz) of an LIF neuron with white-noise input (Siegert formula).

    Parameters
    ----------
    mu : array_like
        Mean input (same units as the threshold): the membrane's resting value.
    sigma : array_like
        White-noise amplitude (the network's ``noise``); the free membrane s.d. is
        ``sigma / sqrt(2)``. ``sigma = 0`` gives the deterministic LIF rate.
    tau_m, threshold, reset, refractory : float or array_like
        Membrane time constant (s), threshold, reset value, absolute refractory period (s).

    Returns
    -------
    ndarray
        ``1 / (refractory + tau_m sqrt(pi) int_{(reset-mu)/sigma}^{(threshold-mu)/sigma}
        exp(u^2) (1 + erf(u)) du)``, broadcast over the arguments.

    Notes
    -----
    The integrand is evaluated as ``erfcx(-u)`` (scaled complementary error function) so
    that neither strongly sub- nor strongly supra-threshold inputs overflow or cancel.

    References
    ----------
    .. [1] Siegert AJF (1951) On the first passage time probability problem. Physical
       Review 81:617-623.
    .. [2] Amit DJ, Brunel N (1997) Model of global spontaneous activity and local
       structured activity during delay periods in the cerebral cortex. Cerebral Cortex
       7:237-252.

    Examples
    --------
    >>> round(float(siegert_rate(0.6, 0.5)), 1)
    12.6
    """
    mu, sigma, tau_m, thr, reset, ref = _broadcast(mu, sigma, tau_m, threshold, reset,
                                                   refractory)
    period = np.full(mu.shape, np.inf)
    det = sigma <= 0
    if np.any(det):  # deterministic LIF (Dayan & Abbott 2001, ch. 5)
        m = det & (mu > thr)
        period[m] = ref[m] + tau_m[m] * np.log((mu[m] - reset[m]) / (mu[m] - thr[m]))
    noisy = ~det
    if np.any(noisy):
        s = sigma[noisy]
        a = (reset[noisy] - mu[noisy]) / s
        b = (thr[noisy] - mu[noisy]) / s
        period[noisy] = ref[noisy] + tau_m[noisy] * _SQRT_PI * _siegert_integral(a, b)
    with np.errstate(divide="ignore"):
        rate = 1.0 / period
    return rate if rate.ndim else float(rate)


def siegert_slope(mu, sigma, *, tau_m=0.02, threshold=1.0, reset=0.0, refractory=0.002):
    """Derivative of :func:`siegert_rate` with respect to the mean input ``mu`` (Hz per unit).

    ``d rate / d mu = rate^2 tau_m sqrt(pi) (erfcx(-y_th) - erfcx(-y_r)) / sigma`` with
    ``y_th = (threshold - mu) / sigma`` and ``y_r = (reset - mu) / sigma`` (differentiating
    the integration limits); the deterministic limit ``sigma = 0`` is
    ``rate^2 tau_m (1 / (mu - threshold) - 1 / (mu - reset))`` above threshold, 0 below.

    Parameters and references as in :func:`siegert_rate`.
    """
    mu, sigma, tau_m, thr, reset, ref = _broadcast(mu, sigma, tau_m, threshold, reset,
                                                   refractory)
    rate = np.asarray(siegert_rate(mu, sigma, tau_m=tau_m, threshold=thr, reset=reset,
                                   refractory=ref), dtype=float)
    slope = np.zeros(mu.shape)
    det = sigma <= 0
    m = det & (mu > thr)
    if np.any(m):
        slope[m] = rate[m] ** 2 * tau_m[m] * (1.0 / (mu[m] - thr[m]) - 1.0 / (mu[m] - reset[m]))
    noisy = ~det & (rate > 0)
    if np.any(noisy):
        s = sigma[noisy]
        yt = (thr[noisy] - mu[noisy]) / s
        yr = (reset[noisy] - mu[noisy]) / s
        r = rate[noisy]
        # r^2 * erfcx(-yt) may be inf * 0 far below threshold: take it in logs there.
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            ft = special.erfcx(-yt)
            safe = np.isfinite(ft)
            term_t = np.where(safe, r ** 2 * ft,
                              np.exp(2 * np.log(r) + yt ** 2 + np.log(2.0)))
        slope[noisy] = tau_m[noisy] * _SQRT_PI * (term_t - r ** 2 * special.erfcx(-yr)) / s
    return slope if slope.ndim else float(slope)


def _discrete_params(sigma, tau_m, threshold, refractory, dt):
    """Threshold and refractory period of the continuous model that mimics step ``dt``."""
    if dt is None:
        return threshold, refractory
    sigma, tau_m, threshold, refractory = _broadcast(sigma, tau_m, threshold, refractory)
    thr = threshold + DISCRETE_THRESHOLD_SHIFT * sigma * np.sqrt(dt / tau_m)
    ref = np.round(refractory / dt) * dt + 0.5 * dt
    return thr, ref


def transfer_rate(mu, sigma, *, tau_m=0.02, threshold=1.0, reset=0.0, refractory=0.002,
                  dt=1e-4):
    """Firing rate (Hz) of the simulated LIF neuron at time step ``dt``.

    The Siegert rate of an equivalent continuous model: threshold raised by
    ``0.5826 sigma sqrt(dt / tau_m)``, refractory period rounded to whole steps plus half a
    step (see the module notes). ``dt=None`` gives the continuous :func:`siegert_rate`.

    Parameters
    ----------
    mu, sigma, tau_m, threshold, reset, refractory
        As in :func:`siegert_rate`.
    dt : float or None
        Simulator time step (s).

    References
    ----------
    .. [1] Amit DJ, Brunel N (1997) Cerebral Cortex 7:237-252.
    .. [2] Broadie M, Glasserman P, Kou S (1997) A continuity correction for discrete
       barrier options. Mathematical Finance 7:325-349.
    """
    thr, ref = _discrete_params(sigma, tau_m, threshold, refractory, dt)
    return siegert_rate(mu, sigma, tau_m=tau_m, threshold=thr, reset=reset, refractory=ref)


def transfer_slope(mu, sigma, *, tau_m=0.02, threshold=1.0, reset=0.0, refractory=0.002,
                   dt=1e-4):
    """Derivative of :func:`transfer_rate` with respect to ``mu`` (Hz per unit input)."""
    thr, ref = _discrete_params(sigma, tau_m, threshold, refractory, dt)
    return siegert_slope(mu, sigma, tau_m=tau_m, threshold=thr, reset=reset, refractory=ref)


def transfer_inverse(rate, sigma, *, tau_m=0.02, threshold=1.0, reset=0.0, refractory=0.002,
                     dt=1e-4, min_rate=0.1, tol=1e-10, max_iter=100):
    """Mean input ``mu`` at which :func:`transfer_rate` equals ``rate`` (Hz), per element.

    Rates are first floored at ``min_rate`` (a silent unit has no finite input) and must
    lie below the saturation rate ``1 / refractory``. The root is found by Newton steps on
    the log-rate, kept inside a bracket that shrinks by bisection whenever a step leaves it.

    Parameters
    ----------
    rate : array_like
        Target rates (Hz), >= 0.
    sigma, tau_m, threshold, reset, refractory, dt
        As in :func:`transfer_rate`.
    min_rate : float
        Floor applied to the target rates (Hz), > 0.
    tol : float
        Absolute tolerance on ``mu``.
    max_iter : int
        Most Newton/bisection steps.

    Returns
    -------
    ndarray
        The inputs, broadcast over the arguments.

    Raises
    ------
    InputError
        Negative or non-finite target rates, rates at or above saturation, or
        ``min_rate <= 0``.
    """
    rate = check_array("rate", rate, dtype=float)
    min_rate = check_positive("min_rate", min_rate)
    if rate.size and rate.min() < 0:
        i = np.unravel_index(int(np.argmin(rate)), rate.shape)
        raise InputError(f"rate: element {i if rate.ndim > 1 else i[0]} is "
                         f"{float(rate[i])!r} Hz; expected rates >= 0")
    thr, ref = _discrete_params(sigma, tau_m, threshold, refractory, dt)
    target, sigma, tau_m, thr, reset, ref = _broadcast(np.maximum(rate, min_rate), sigma,
                                                       tau_m, thr, reset, ref)
    sat = 1.0 / ref
    if np.any(target >= sat * (1 - 1e-9)):
        i = np.unravel_index(int(np.argmax(target / sat)), target.shape)
        raise InputError(f"rate: {target[i]:g} Hz is at or above the saturation rate "
                         f"1/refractory = {sat[i]:g} Hz; expected a lower rate")
    kw = dict(tau_m=tau_m, threshold=thr, reset=reset, refractory=ref)

    def f(m):
        return np.asarray(siegert_rate(m, sigma, **kw), dtype=float)

    # Bracket: lo gives a rate below target, hi above.
    span = np.maximum(thr - reset, 1e-12) + 5 * sigma
    lo = thr - span
    hi = thr + span
    for _ in range(200):
        low_bad = f(lo) >= target
        high_bad = f(hi) <= target
        if not (low_bad.any() or high_bad.any()):
            break
        lo = np.where(low_bad, lo - span, lo)
        hi = np.where(high_bad, hi + span, hi)
        span = span * 2
    x = 0.5 * (lo + hi)
    log_target = np.log(target)
    for _ in range(max_iter):
        r = f(x)
        above = r > target
        hi = np.where(above, x, hi)
        lo = np.where(above, lo, x)
        s = np.asarray(siegert_slope(x, sigma, **kw), dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = (np.log(r) - log_target) * r / s
        new = x - step
        bad = ~np.isfinite(new) | (new <= lo) | (new >= hi)
        new = np.where(bad, 0.5 * (lo + hi), new)
        done = np.abs(new - x) < tol
        x = new
        if np.all(done) or np.all(hi - lo < tol):
            break
    return x if x.ndim else float(x)
