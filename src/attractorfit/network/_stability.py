"""Rate picture of the network: flow, fixed points, Jacobians, margins, readout noise.

In the rate picture the readout obeys ``tau_s dy/dt = -y + tau_s D phi(E y + bias)``
with ``phi`` the transfer function of the simulator (:func:`transfer_rate` at step
``dt``). A fixed point ``y*`` is stable when every eigenvalue of the Jacobian
``J = -I + tau_s D diag(phi'(E y* + bias)) E`` (in units of ``1 / tau_s``) has a negative
real part; its stability margin is ``-max Re eig(J)``.

References
----------
.. [1] Mastrogiuseppe F, Ostojic S (2018) Linking connectivity, dynamics, and computations
   in low-rank recurrent neural networks. Neuron 99:609-623.
.. [2] Amit DJ, Brunel N (1997) Cerebral Cortex 7:237-252.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import product

import numpy as np
from scipy import optimize

from attractorfit._validation import check_array, check_int, check_positive, check_rng
from attractorfit.errors import InputError
from attractorfit.network._decoders import readout_sd
from attractorfit.network._transfer import transfer_rate, transfer_slope

__all__ = ["jacobian_at", "stability_margin", "fixed_points", "FixedPoints",
           "readout_noise_ratio", "rate_flow"]


def _latent(net, y, name="y"):
    y = check_array(name, y)
    if y.shape[-1:] != (net.rank,) or y.ndim > 2:
        raise InputError(f"{name}: expected shape (K,) or (M, K) with K = {net.rank}, got "
                         f"{y.shape}")
    return y


def jacobian_at(net, y, *, dt=1e-4):
    """Jacobian ``-I + tau_s D diag(phi'(E y + bias)) E`` of the rate picture at ``y``.

    Parameters
    ----------
    net : LowRankNetwork
    y : array_like (K,) or (M, K)
        Latent position(s).
    dt : float or None
        Simulator step of the transfer function (None: continuous Siegert).

    Returns
    -------
    ndarray (K, K) or (M, K, K)
        In units of ``1 / tau_s`` (time measured in readout time constants).
    """
    y = _latent(net, y)
    slopes = np.asarray(net.slopes_at(y, dt=dt), dtype=float)        # (..., N)
    m = np.einsum("kn,...n,nl->...kl", net.decoder, slopes, net.encoder)
    return -np.eye(net.rank) + net.tau_s * m


def stability_margin(jacobian):
    """``-max Re eig(J)`` for one (K, K) Jacobian or a stack (M, K, K)."""
    jac = np.asarray(jacobian, dtype=float)
    lam = np.linalg.eigvals(jac)
    out = -np.max(lam.real, axis=-1)
    return float(out) if np.ndim(out) == 0 else out


def readout_noise_ratio(net, positions, *, dt=1e-4, scale=1.0):
    """Readout shot-noise s.d. divided by the vertex spacing ``2 a``, per position and axis.

    ``sqrt(sum_j D[k, j]^2 r_j tau_s / 2) / (2 a)`` with ``r = phi(E y + bias)`` at each
    position ``y``: near or above 0.5 the readout noise spans the distance between
    neighbouring vertices and states flicker (DESIGN Amendment 2).

    Parameters
    ----------
    net : LowRankNetwork
    positions : array_like (P, K)
        Latent positions (e.g. ``scale * codes``).
    dt : float or None
    scale : float
        Vertex scale ``a``.

    Returns
    -------
    ndarray (P, K)
    """
    pos = np.atleast_2d(_latent(net, positions, "positions"))
    scale = check_positive("scale", scale)
    rates = np.asarray(net.rates_at(pos, dt=dt), dtype=float).T      # (N, P)
    return readout_sd(net.decoder, rates, tau_s=net.tau_s) / (2.0 * scale)


class _RateTable:
    """Tabulated transfer function per group of neurons with identical parameters.

    A uniform grid of inputs (step 0.002 threshold units; linear interpolation error
    about ``step^2 |phi''| / 8``, below 0.01 Hz) vectorised over neurons and starting
    points; used for flows from many starting points, after which fixed points are
    polished with the exact transfer function. The grid points are whole multiples of
    the step, so a table extended to a wider range (:meth:`cover`) keeps its values and
    computes only the new cells. Falls back to exact evaluation when the tables would
    be too large.
    """

    def __init__(self, net, dt, lo, hi, step=2e-3, max_cells=2e7):
        params = np.column_stack([net.noise, net.threshold, net.reset])
        self.uniq, inv = np.unique(params, axis=0, return_inverse=True)
        self.group = inv.ravel()
        self.net, self.dt, self.step, self.max_cells = net, dt, step, max_cells
        self.i_lo, self.i_hi = int(np.floor(lo / step)), int(np.ceil(hi / step))
        self.exact = self._too_large(self.i_lo, self.i_hi)
        self.table = None if self.exact else self._compute(self.i_lo, self.i_hi)

    @property
    def lo(self):
        return self.i_lo * self.step

    @property
    def hi(self):
        return self.i_hi * self.step

    def _too_large(self, i_lo, i_hi):
        return len(self.uniq) * (i_hi - i_lo + 1) > self.max_cells

    def _compute(self, i0, i1):
        """Rates at grid cells ``i0..i1`` (inclusive), one row per neuron group."""
        grid = self.step * np.arange(i0, i1 + 1)
        out = np.empty((len(self.uniq), grid.size))
        for g, (noise, thr, reset) in enumerate(self.uniq):
            out[g] = transfer_rate(grid, noise, tau_m=self.net.tau_m, threshold=thr,
                                   reset=reset, refractory=self.net.refractory, dt=self.dt)
        return out

    def cover(self, lo, hi):
        """Extend the table to hold ``[lo, hi]``; a side that grows grows by at least
        half the present span, so a flow that keeps widening costs few extensions."""
        if self.exact:
            return
        need_lo, need_hi = int(np.floor(lo / self.step)), int(np.ceil(hi / self.step))
        if need_lo >= self.i_lo and need_hi <= self.i_hi:
            return
        half = (self.i_hi - self.i_lo) // 2
        new_lo = min(self.i_lo, need_lo - half) if need_lo < self.i_lo else self.i_lo
        new_hi = max(self.i_hi, need_hi + half) if need_hi > self.i_hi else self.i_hi
        if self._too_large(new_lo, new_hi):
            self.exact, self.table = True, None
            return
        parts = [self.table]
        if new_lo < self.i_lo:
            parts.insert(0, self._compute(new_lo, self.i_lo - 1))
        if new_hi > self.i_hi:
            parts.append(self._compute(self.i_hi + 1, new_hi))
        self.table = np.hstack(parts)
        self.i_lo, self.i_hi = new_lo, new_hi

    def rates(self, inputs):
        if self.exact:
            return np.asarray(transfer_rate(inputs, self.net.noise, dt=self.dt,
                                            **self.net._neuron_kw()), float)
        pos = np.clip((inputs - self.lo) / self.step, 0.0, self.table.shape[1] - 1.000001)
        i0 = pos.astype(np.int64)
        w = pos - i0
        idx = self.group * self.table.shape[1] + i0          # row of each neuron's group
        flat = self.table.ravel()
        return flat[idx] * (1.0 - w) + flat[idx + 1] * w


def rate_flow(net, starts, *, dt=1e-4, duration=40.0, step=0.1, tol=1e-7):
    """Integrate the rate picture from many starting points at once.

    Parameters
    ----------
    net : LowRankNetwork
    starts : array_like (M, K)
        Initial latent positions.
    dt : float or None
        Simulator step of the transfer function.
    duration : float
        Integration time in units of ``tau_s``.
    step : float
        Integration step in units of ``tau_s`` (exponential Euler).
    tol : float
        Stop early once every trajectory moves less than ``tol`` per unit time.

    Returns
    -------
    ndarray (M, K)
        End points.
    """
    y = np.array(np.atleast_2d(_latent(net, starts, "starts")), dtype=float)
    duration = check_positive("duration", duration)
    step = check_positive("step", step)
    inputs = y @ net.encoder.T + net.bias
    table = _RateTable(net, dt, float(inputs.min()) - 1.0, float(inputs.max()) + 1.0)
    decay = np.exp(-step)
    gain = net.tau_s * net.decoder.T                                   # (N, K)
    for _ in range(int(np.ceil(duration / step))):
        inputs = y @ net.encoder.T + net.bias
        if not table.exact and (inputs.min() < table.lo or inputs.max() > table.hi):
            table.cover(float(inputs.min()) - 1.0, float(inputs.max()) + 1.0)
        target = table.rates(inputs) @ gain
        if np.max(np.abs(target - y), initial=0.0) < tol:
            break
        y = target + (y - target) * decay
    return y


def _polish(net, y, dt, tol):
    def field(v):
        return -v + net.tau_s * net.decoder @ np.asarray(net.rates_at(v, dt=dt), float)

    def jac(v):
        return jacobian_at(net, v, dt=dt)

    sol = optimize.root(field, y, jac=jac, method="hybr", tol=1e-12)
    ok = np.max(np.abs(field(sol.x))) < tol
    return sol.x, bool(ok)


@dataclass
class FixedPoints:
    """Fixed points of the rate picture found from a set of starting points.

    Attributes
    ----------
    points : ndarray (M, K)
        Distinct fixed points (polished with the exact transfer function).
    stable : ndarray (M,) bool
    margins : ndarray (M,)
        ``-max Re eig(J)`` at each point (> 0: stable).
    codes : ndarray (M, K)
        Nearest vertex code (sign of each coordinate; 0 where a coordinate is 0).
    vertex_distance : ndarray (M,)
        Distance to that vertex ``a * code``, in units of ``a``.
    at_vertex : ndarray (M,) bool
        ``vertex_distance < vertex_tol``.
    is_pattern : ndarray (M,) bool
        At the vertex of one of the given pattern codes (all vertices count when no
        codes were given).
    spurious : ndarray (M,) bool
        Stable but not at a pattern vertex: an attractor the network was not built for
        (e.g. an unused vertex; DESIGN Amendment 3).
    basin_counts : ndarray (M,) int
        How many starting points flowed to each point.
    n_starts : int
    n_unconverged : int
        Starting points whose flow did not settle on a fixed point.
    scale : float
    """

    points: np.ndarray
    stable: np.ndarray
    margins: np.ndarray
    codes: np.ndarray
    vertex_distance: np.ndarray
    at_vertex: np.ndarray
    is_pattern: np.ndarray
    spurious: np.ndarray
    basin_counts: np.ndarray
    n_starts: int
    n_unconverged: int
    scale: float

    @property
    def stable_points(self) -> np.ndarray:
        return self.points[self.stable]

    @property
    def n_stable(self) -> int:
        return int(np.sum(self.stable))

    def pattern_found(self, codes) -> np.ndarray:
        """For each code (P, K): is there a stable fixed point at its vertex?"""
        codes = np.atleast_2d(np.asarray(codes))
        ok = self.stable & self.at_vertex
        return np.array([bool(np.any(ok & np.all(self.codes == c, axis=1))) for c in codes])


def _default_starts(k, scale, grid, n_random, rng):
    starts = []
    if k <= 12:
        starts.append(scale * np.array(list(product([-1, 1], repeat=k)), dtype=float))
    if grid and grid ** k <= 4096:
        axis = np.linspace(-1.5 * scale, 1.5 * scale, grid)
        starts.append(np.array(list(product(axis, repeat=k)), dtype=float))
    if n_random:
        starts.append(rng.uniform(-1.5 * scale, 1.5 * scale, size=(n_random, k)))
    return np.vstack(starts) if starts else np.zeros((0, k))


def fixed_points(net, *, codes=None, starts=None, scale=1.0, dt=1e-4, grid=5, n_random=0,
                 vertex_tol=0.25, rng=None, tol=1e-8):
    """Stable fixed points of the rate picture, by flowing from a grid of starting points.

    Every starting point is integrated (:func:`rate_flow`); the end points are polished by
    root finding with the exact transfer function, merged when closer than ``1e-5 a``,
    and classified by the eigenvalues of their Jacobian. Points reached only as saddles
    (e.g. a symmetric start) are kept and marked unstable.

    Parameters
    ----------
    net : LowRankNetwork
    codes : array_like (P, K), optional
        Codes of the vertices the network was built for; stable points elsewhere are
        flagged ``spurious``.
    starts : array_like (M, K), optional
        Extra starting points.
    scale : float
        Vertex scale ``a``.
    dt : float or None
        Simulator step of the transfer function.
    grid : int
        Points per axis of a regular grid on ``[-1.5 a, 1.5 a]^K`` (used while
        ``grid^K <= 4096``); all ``2^K`` vertices are always starts for K <= 12.
    n_random : int
        Extra uniformly random starts in the same box.
    vertex_tol : float
        Distance (units of ``a``) within which a point counts as at a vertex.
    rng : None, int or numpy.random.Generator
        For the random starts.
    tol : float
        Largest ``|dy/dt| tau_s`` accepted at a fixed point.

    Returns
    -------
    FixedPoints
    """
    k = net.rank
    scale = check_positive("scale", scale)
    grid = check_int("grid", grid, low=0)
    n_random = check_int("n_random", n_random, low=0)
    vertex_tol = check_positive("vertex_tol", vertex_tol)
    all_starts = _default_starts(k, scale, grid, n_random, check_rng(rng))
    if starts is not None:
        extra = np.atleast_2d(_latent(net, starts, "starts"))
        all_starts = np.vstack([all_starts, extra])
    if codes is not None:
        codes = np.atleast_2d(check_array("codes", codes))
        if codes.shape[1] != k:
            raise InputError(f"codes: expected shape (P, K) with K = {k}, got {codes.shape}")
    if all_starts.shape[0] == 0:
        raise InputError("starts: no starting points (grid=0, n_random=0 and K > 12); "
                         "give starts, grid or n_random")
    ends = rate_flow(net, all_starts, dt=dt)
    points, counts = [], []
    unconverged = 0
    for y in ends:
        if points and np.min(np.linalg.norm(np.array(points) - y, axis=1)) < 1e-4 * scale:
            counts[int(np.argmin(np.linalg.norm(np.array(points) - y, axis=1)))] += 1
            continue
        yp, ok = _polish(net, y, dt, tol)
        if not ok:
            unconverged += 1
            continue
        if points:
            dist = np.linalg.norm(np.array(points) - yp, axis=1)
            if np.min(dist) < 1e-5 * scale:
                counts[int(np.argmin(dist))] += 1
                continue
        points.append(yp)
        counts.append(1)
    pts = np.array(points).reshape(-1, k)
    margins = stability_margin(jacobian_at(net, pts, dt=dt)) if len(pts) else np.zeros(0)
    margins = np.atleast_1d(margins)
    near = np.sign(pts).astype(int)
    dist = np.linalg.norm(pts - scale * near, axis=1) / scale
    at_vertex = (dist < vertex_tol) & np.all(near != 0, axis=1)
    if codes is None:
        is_pattern = at_vertex.copy()
    else:
        is_pattern = at_vertex & np.array([bool(np.any(np.all(codes == c, axis=1)))
                                           for c in near], dtype=bool)
    stable = margins > 0
    return FixedPoints(points=pts, stable=stable, margins=margins, codes=near,
                       vertex_distance=dist, at_vertex=at_vertex, is_pattern=is_pattern,
                       spurious=stable & ~is_pattern, basin_counts=np.array(counts, int),
                       n_starts=int(all_starts.shape[0]), n_unconverged=unconverged,
                       scale=scale)
