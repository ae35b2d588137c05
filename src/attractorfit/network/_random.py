"""Fast Gaussian noise for the compiled simulator: xoshiro256++ bits, 256-layer ziggurat.

A call through numpy's ``Generator`` from numba costs about 3.5 ns per normal on our
machines, more than the rest of a neuron's step. One inline xoshiro stream with the
ziggurat costs about 3 ns: the stream is a serial chain of dependent operations. Sixteen
independent lanes advanced together run in SIMD registers (0.35 ns per 64-bit output),
and the ziggurat transform, free of that chain, adds about 1 ns. The streams are seeded
per trial from the trial's ``SeedSequence`` child (see :func:`seed_state`), so results
stay reproducible and independent across trials.

References
----------
.. [1] Blackman D, Vigna S (2021) Scrambled linear pseudorandom number generators. ACM
   Transactions on Mathematical Software 47(4):36.
.. [2] Marsaglia G, Tsang WW (2000) The ziggurat method for generating random variables.
   Journal of Statistical Software 5(8):1-7.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

__all__ = ["seed_state", "padded", "normals", "fill_normals", "LANES", "ZIG_K", "ZIG_W",
           "ZIG_F"]

LANES = 16  # independent xoshiro streams per trial, advanced together in SIMD registers

_R = 3.6541528853610088  # right edge of the base layer (256 layers)
_V = 0.00492867323399    # area of each layer under exp(-x^2 / 2)


def _ziggurat_tables(n=256, r=_R, v=_V):
    """Layer tables (Marsaglia & Tsang 2000) for 52-bit magnitudes.

    Layer 0 is the base (rectangle plus tail); for layer ``i >= 1`` a sample with
    magnitude below ``k[i]`` lies under the curve for sure.
    """
    m1 = 2.0 ** 52
    f = lambda x: math.exp(-0.5 * x * x)  # noqa: E731
    k = np.zeros(n, dtype=np.int64)
    w = np.zeros(n)
    fi = np.zeros(n)
    q = v / f(r)
    k[0] = int((r / q) * m1)
    w[0] = q / m1
    w[n - 1] = r / m1
    fi[0] = 1.0
    fi[n - 1] = f(r)
    dn = tn = r
    for i in range(n - 2, 0, -1):
        dn = math.sqrt(-2.0 * math.log(v / dn + f(dn)))
        k[i + 1] = int((dn / tn) * m1)
        tn = dn
        fi[i] = f(dn)
        w[i] = dn / m1
    return k, w, fi


ZIG_K, ZIG_W, ZIG_F = _ziggurat_tables()


def seed_state(gen: np.random.Generator) -> np.ndarray:
    """Generator state for :func:`fill_normals`, drawn from ``gen``.

    Returns an array (4, LANES + 1) of uint64: column ``j < LANES`` holds the four words
    of lane ``j``'s xoshiro256++ stream, the last column those of the stream that serves
    the ziggurat's rare rejections. No column is all zero (a fixed point of xoshiro).
    """
    state = gen.integers(0, 2 ** 64, size=(4, LANES + 1), dtype=np.uint64, endpoint=False)
    for j in range(LANES + 1):
        if not np.any(state[:, j]):
            state[0, j] = np.uint64(0x9E3779B97F4A7C15)
    return state


@njit(cache=True)
def padded(n):
    """Length of the buffers :func:`fill_normals` needs for ``n`` normals (a multiple of
    ``LANES``; compiled, so the simulator's kernel calls it too)."""
    return -(-n // LANES) * LANES


@njit(cache=True)
def _rotl(x, k):
    return (x << np.uint64(k)) | (x >> np.uint64(64 - k))


@njit(cache=True, inline="always")
def _step(s0, s1, s2, s3):
    """One xoshiro256++ step on the four state words: (output, new words)."""
    result = _rotl(s0 + s3, 23) + s0
    t = s1 << np.uint64(17)
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    return result, s0, s1, s2, _rotl(s3, 45)


@njit(cache=True)
def next_u64(s):
    """xoshiro256++: next 64-bit output; advances the state array ``s`` in place."""
    result, s[0], s[1], s[2], s[3] = _step(s[0], s[1], s[2], s[3])
    return result


@njit(cache=True)
def next_double(s):
    """Uniform double in [0, 1) from the top 53 bits."""
    return float(next_u64(s) >> np.uint64(11)) * (1.0 / 9007199254740992.0)


@njit(cache=True)
def _draw(s, zw):
    """One ziggurat candidate: layer index, sign, 52-bit magnitude and the value."""
    r = next_u64(s)
    idx = np.intp(r & np.uint64(0xFF))
    r >>= np.uint64(8)
    neg = (r & np.uint64(1)) != np.uint64(0)
    rabs = np.int64((r >> np.uint64(1)) & np.uint64(0x000FFFFFFFFFFFFF))
    x = rabs * zw[idx]
    if neg:
        x = -x
    return idx, neg, rabs, x


@njit(cache=True)
def normal_slow(s, idx, x, neg, zk, zw, zf):
    """Rejection branches of the ziggurat, entered for about 1.5% of the draws."""
    while True:
        if idx == 0:  # tail beyond R
            while True:
                xx = -math.log1p(-next_double(s)) / _R
                yy = -math.log1p(-next_double(s))
                if yy + yy > xx * xx:
                    return -(_R + xx) if neg else _R + xx
        if (zf[idx - 1] - zf[idx]) * next_double(s) + zf[idx] < math.exp(-0.5 * x * x):
            return x
        idx, neg, rabs, x = _draw(s, zw)
        if rabs < zk[idx]:
            return x


@njit(cache=True)
def _lane_bits(s, bits):
    """``bits.size // LANES`` outputs of each lane, interleaved: ``bits[b * LANES + j]`` is
    output ``b`` of lane ``j``. The lanes are independent, so the loop over them runs in
    SIMD registers (the serial dependency of one xoshiro stream is what limits a scalar
    generator)."""
    for blk in range(bits.shape[0] // LANES):
        base = blk * LANES
        for j in range(LANES):
            bits[base + j], s[0, j], s[1, j], s[2, j], s[3, j] = _step(
                s[0, j], s[1, j], s[2, j], s[3, j])


@njit(cache=True)
def fill_normals(s, bits, rejected, out, zk, zw, zf):
    """Fill ``out`` with standard normals (256-layer ziggurat).

    Each candidate comes from one 64-bit output of a lane stream: 8 bits choose the
    layer, 1 bit the sign, 52 bits the magnitude. The about 1% of candidates that the
    fast test does not accept are finished by :func:`normal_slow`, which draws from the
    state's last column (the rejection stream), in index order.

    Parameters
    ----------
    s : ndarray (4, LANES + 1) uint64
        State from :func:`seed_state`, advanced in place: every lane by
        ``out.size // LANES`` outputs, the rejection stream by what the rejections used.
    bits : ndarray uint64, rejected : ndarray int64
        Scratch, at least ``out.size`` long.
    out : ndarray float64
        Length a multiple of ``LANES`` (:func:`padded`).
    zk, zw, zf : ndarray
        Ziggurat tables ``ZIG_K, ZIG_W, ZIG_F``.

    Notes
    -----
    All integer work in the transform is signed 64-bit after masking (mixing unsigned and
    signed integers makes numba fall back to floating point, several times slower).
    """
    n = out.shape[0]
    _lane_bits(s, bits[:n])
    n_rej = 0
    for i in range(n):
        r = np.int64(bits[i])
        idx = r & 0xFF
        rabs = (r >> 9) & 0x000FFFFFFFFFFFFF
        out[i] = np.float64(1 - 2 * ((r >> 8) & 1)) * (np.float64(rabs) * zw[idx])
        rejected[n_rej] = i
        n_rej += np.int64(rabs >= zk[idx])
    if n_rej:
        extra = s[:, s.shape[1] - 1]
        for m in range(n_rej):
            i = rejected[m]
            r = np.int64(bits[i])
            idx = r & 0xFF
            neg = ((r >> 8) & 1) != 0
            out[i] = normal_slow(extra, idx, out[i], neg, zk, zw, zf)


def normals(state: np.ndarray, n: int) -> np.ndarray:
    """``n`` standard normals from ``state`` (advanced in place), as the simulator draws
    them for ``n`` neurons in one step (every lane advances ``padded(n) / LANES``
    outputs)."""
    m = padded(int(n))
    out = np.empty(m)
    fill_normals(state, np.empty(m, dtype=np.uint64), np.empty(m, dtype=np.int64), out,
                 ZIG_K, ZIG_W, ZIG_F)
    return out[:int(n)]
