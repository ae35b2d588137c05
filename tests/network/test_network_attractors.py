"""Hypercube attractors: codes, decoder rules, fixed points, stability, measures, capacity."""

import warnings

import numpy as np
import pytest
from scipy import optimize
from sklearn.metrics.pairwise import cosine_similarity
from threadpoolctl import threadpool_limits

from attractorfit.errors import InputError
from attractorfit.network import (
    LowRankNetwork,
    binary_capacity,
    binary_recall,
    capacity_sweep,
    decoder_hebbian,
    decoder_optimized,
    decoder_pseudoinverse,
    encoder_axes,
    fixed_points,
    hypercube_encoder,
    jacobian_at,
    overlaps,
    pattern_completion,
    readout_noise_ratio,
    stability_margin,
    vertex_codes,
    vertex_margins,
    vertex_patterns,
)
from attractorfit.network._decoders import _eig_grads


@pytest.fixture(autouse=True)
def _one_blas_thread():
    # Small matrix products: a busy-waiting BLAS thread pool only slows them down on a
    # shared 2-core machine.
    with threadpool_limits(1):
        yield


def _square_network(n=200, bias=0.8, gain=0.8, tau_s=0.05, noise=0.5, codes=None,
                    hetero=False, rule="pseudoinverse"):
    """K = 2 one-axis network storing ``codes`` (default: all four vertices)."""
    rng = np.random.default_rng(0)
    g = gain * rng.uniform(0.8, 1.2, n) if hetero else gain
    enc = hypercube_encoder(n, 2, gain=g, rng=0)
    codes = vertex_codes(2) if codes is None else codes
    pats = vertex_patterns(enc, codes, bias=bias, noise=noise)
    if rule == "pseudoinverse":
        res = decoder_pseudoinverse(pats.rates, codes.T, tau_s=tau_s, encoder=enc,
                                    slopes=pats.slopes)
    else:
        res = decoder_optimized(pats.rates, codes.T, tau_s=tau_s, encoder=enc,
                                slopes=pats.slopes, margin=0.1)
    net = LowRankNetwork(enc, res.decoder, bias=bias, noise=noise, tau_s=tau_s)
    return net, pats, res


# ------------------------------------------------------------------ hypercube
def test_vertex_codes_order():
    codes = vertex_codes(3)
    assert codes.shape == (8, 3)
    assert codes[0].tolist() == [-1, -1, -1] and codes[1].tolist() == [-1, -1, 1]
    assert codes[-1].tolist() == [1, 1, 1]
    assert len({tuple(c) for c in codes}) == 8


def test_hypercube_encoder_faces():
    enc = hypercube_encoder(30, 3, gain=0.5, rng=1)
    axis, sign = encoder_axes(enc)
    assert np.all((np.abs(enc) > 0).sum(axis=1) == 1)
    counts = np.zeros((3, 2), int)
    for a, s in zip(axis, sign):
        counts[a, (s + 1) // 2] += 1
    assert counts.min() == 5 and counts.max() == 5  # 30 neurons on 6 faces
    np.testing.assert_array_equal(enc, hypercube_encoder(30, 3, gain=0.5, rng=1))
    assert np.allclose(np.abs(enc[enc != 0]), 0.5)


def test_vertex_patterns_match_network_rates():
    net, pats, _ = _square_network(n=40)
    np.testing.assert_allclose(pats.rates, net.rates_at(pats.positions).T, rtol=1e-12)
    np.testing.assert_allclose(pats.slopes, net.slopes_at(pats.positions).T, rtol=1e-12)
    np.testing.assert_array_equal(pats.targets, pats.codes.T)


# ------------------------------------------------------------------ decoders
def test_pseudoinverse_is_minimum_norm_least_squares():
    # Reference: numpy.linalg.lstsq returns the minimum-norm least-squares solution of
    # R^T D^T = (a X / tau_s)^T.
    rng = np.random.default_rng(2)
    r = rng.uniform(0, 40, size=(50, 6))
    x = rng.choice([-1.0, 1.0], size=(3, 6))
    res = decoder_pseudoinverse(r, x, tau_s=0.02, scale=1.5)
    ref = np.linalg.lstsq(r.T, (1.5 * x / 0.02).T, rcond=None)[0].T
    np.testing.assert_allclose(res.decoder, ref, rtol=1e-8, atol=1e-12)
    assert res.exact and res.residual < 1e-10
    # least-squares case: two identical rate patterns with different codes
    r2 = np.column_stack([r, r[:, 0]])
    x2 = np.column_stack([x, -x[:, 0]])
    ls = decoder_pseudoinverse(r2, x2, tau_s=0.02)
    ref2 = np.linalg.lstsq(r2.T, (x2 / 0.02).T, rcond=None)[0].T
    np.testing.assert_allclose(ls.decoder, ref2, rtol=1e-7, atol=1e-10)
    assert not ls.exact
    # the two conflicting columns land halfway: residual sqrt(2 * 3) / ||X||
    assert ls.residual == pytest.approx(np.sqrt(6) / np.linalg.norm(x2), rel=1e-6)


def test_hebbian_is_scaled_outer_product_and_inexact():
    rng = np.random.default_rng(3)
    r = rng.uniform(0, 40, size=(60, 4))
    x = vertex_codes(2).T.astype(float)
    res = decoder_hebbian(r, x, tau_s=0.05)
    base = x @ (r - r.mean(axis=1, keepdims=True)).T
    c = res.decoder[0, 0] / base[0, 0]
    np.testing.assert_allclose(res.decoder, c * base, rtol=1e-10)
    # c minimises the residual (scalar minimisation by SciPy as reference)
    f = lambda cc: np.linalg.norm(0.05 * cc * base @ r - x)  # noqa: E731
    best = optimize.minimize_scalar(f, bracket=(0, 2 * abs(c) + 1e-6)).x
    assert c == pytest.approx(best, rel=1e-5)
    assert res.residual > 0.05 and not res.exact


def test_eigenvalue_gradients_match_finite_differences():
    rng = np.random.default_rng(4)
    j0 = rng.normal(size=(3, 3))
    b = rng.normal(size=(5, 3))
    z = rng.normal(size=(3, 5)) * 0.1
    re, grads = _eig_grads(j0, b, z, 0.05)
    order = np.argsort(re)
    for i in order[-1:]:
        def top(flat):
            return np.sort(np.linalg.eigvals(j0 + 0.05 * flat.reshape(3, 5) @ b).real)[-1]
        num = optimize.approx_fprime(z.ravel(), top, 1e-7)
        np.testing.assert_allclose(grads[i].ravel(), num, rtol=1e-4, atol=1e-7)


def _random_cube(*, seed, n, k):
    """Random Gaussian encoder (N x K), the 2^K vertex codes and their patterns."""
    rng = np.random.default_rng(seed)
    enc = rng.normal(0, 0.6 / np.sqrt(k), size=(n, k))
    codes = vertex_codes(k)
    return n, k, enc, codes, vertex_patterns(enc, codes, bias=1.0, noise=0.5)


def test_optimized_decoder_constraints_and_variance():
    # Equalities exact, margins met as inequalities, and the predicted readout variance
    # no larger than the pseudo-inverse decoder's (the latter is one feasible point of
    # the equality constraints).
    n, k, enc, codes, pats = _random_cube(seed=3, n=120, k=3)
    pinv = decoder_pseudoinverse(pats.rates, codes.T, tau_s=0.05, encoder=enc,
                                 slopes=pats.slopes)
    assert pinv.margins.min() < 0.05  # the minimum-norm decoder is barely stable here
    opt = decoder_optimized(pats.rates, codes.T, tau_s=0.05, encoder=enc,
                            slopes=pats.slopes, margin=0.3)
    assert opt.success and opt.residual < 1e-10
    assert opt.margins.min() >= 0.3 * (1 - 1e-3)
    np.testing.assert_allclose(opt.margins, vertex_margins(opt.decoder, enc, pats.slopes,
                                                           tau_s=0.05))
    # margins from the Jacobians computed by the network itself
    net = LowRankNetwork(enc, opt.decoder, bias=1.0, noise=0.5, tau_s=0.05)
    np.testing.assert_allclose(stability_margin(jacobian_at(net, pats.positions)),
                               opt.margins, rtol=1e-8)


def test_optimized_decoder_warm_start():
    # Properties that hold on every machine (DESIGN Amendment 10), not one solver path.
    # Default ("symmetric"): a convex program with a strictly convex objective has one
    # optimum, so a start from its own answer or from the pseudo-inverse decoder (another
    # feasible point of the equalities) ends at the same decoder and variance.
    # "spectral": non-convex; where in its flat valley the solver stops moves with
    # rounding, so only feasibility is asserted (exact fixed points, margins met).
    # A decoder of the wrong shape is refused.
    n, k, enc, codes, pats = _random_cube(seed=3, n=120, k=3)
    kw = dict(tau_s=0.05, encoder=enc, slopes=pats.slopes, margin=0.3)
    pinv = decoder_pseudoinverse(pats.rates, codes.T, tau_s=0.05)
    opt = decoder_optimized(pats.rates, codes.T, **kw)
    assert opt.success and opt.residual < 1e-10 and opt.margins.min() >= 0.3 * (1 - 1e-3)
    for start in (opt.decoder, pinv.decoder):
        warm = decoder_optimized(pats.rates, codes.T, init=start, **kw)
        assert warm.success and warm.residual < 1e-10
        assert np.sum(warm.readout_sd ** 2) == pytest.approx(np.sum(opt.readout_sd ** 2),
                                                             rel=1e-5)
        assert np.linalg.norm(warm.decoder - opt.decoder) <= 1e-3 * np.linalg.norm(
            opt.decoder)
    for start in (None, pinv.decoder):
        spec = decoder_optimized(pats.rates, codes.T, init=start, stability="spectral", **kw)
        assert spec.success and spec.residual < 1e-10
        assert spec.margins.min() >= 0.3 * (1 - 1e-3)
    with pytest.raises(InputError, match="init"):
        decoder_optimized(pats.rates, codes.T, init=np.ones((2, n)), **kw)


def test_optimized_symmetric_matches_a_full_space_solve_and_is_continuous():
    # stability="symmetric": the same convex program solved by SciPy's SLSQP directly
    # over all K x N decoder entries (no null-space reduction; constraints written from
    # the definitions: tau_s D R = X and the eigenvalues of sym(J_mu) <= -margin) reaches
    # the same objective (1e-4) and decoder (1e-2), and the answer moves continuously:
    # pattern weights changed by 1e-6 move it by < 1e-4 (a convex problem with a strictly
    # convex objective has one optimum; the spectral form moved 24% here).
    n, k, enc, codes, pats = _random_cube(seed=5, n=40, k=2)
    tau, m = 0.05, 0.3
    r, x, sl = pats.rates, codes.T.astype(float), pats.slopes
    ours = decoder_optimized(r, x, tau_s=tau, encoder=enc, slopes=sl, margin=m,
                             stability="symmetric")
    assert ours.success and ours.residual < 1e-10 and ours.margins.min() >= m * (1 - 1e-3)
    w = r.sum(axis=1)
    a = np.kron(np.eye(k), tau * r.T)
    ask = m * (1 + 0.5e-3)          # the request decoder_optimized makes (tol / 2 more)
    mats = [sl[:, mu:mu + 1] * enc for mu in range(r.shape[1])]

    def obj(f):
        d = f.reshape(k, n)
        return float(np.sum(d * d * w)), (2 * d * w).ravel()

    def ineq(f):
        d = f.reshape(k, n)
        vals, rows = [], []
        for mm in mats:
            jac = -np.eye(k) + tau * d @ mm
            lam, vec = np.linalg.eigh(0.5 * (jac + jac.T))
            for i in range(k):
                vals.append(-ask - lam[i])
                rows.append(-(tau * np.outer(vec[:, i], mm @ vec[:, i])).ravel())
        return np.array(vals), np.array(rows)

    start = np.linalg.lstsq(tau * r.T, x.T, rcond=None)[0].T.ravel()
    ref = optimize.minimize(obj, start, jac=True, method="SLSQP", options={
        "maxiter": 500, "ftol": 1e-14}, constraints=[
        {"type": "eq", "fun": lambda f: a @ f - x.ravel(), "jac": lambda f: a},
        {"type": "ineq", "fun": lambda f: ineq(f)[0], "jac": lambda f: ineq(f)[1]}])
    assert np.all(ineq(ref.x)[0] >= -1e-8)
    assert obj(ours.decoder.ravel())[0] == pytest.approx(obj(ref.x)[0], rel=1e-4)
    d_ref = ref.x.reshape(k, n)
    assert np.linalg.norm(ours.decoder - d_ref) <= 1e-2 * np.linalg.norm(d_ref)
    c = np.exp(1e-6 * np.random.default_rng(1).normal(size=codes.shape[0]))
    moved = decoder_optimized(r, x, tau_s=tau, encoder=enc, slopes=sl, margin=m,
                              stability="symmetric", pattern_weights=c)
    assert np.linalg.norm(moved.decoder - ours.decoder) <= 1e-4 * np.linalg.norm(
        ours.decoder)
    with pytest.raises(InputError, match="stability"):
        decoder_optimized(r, x, tau_s=tau, encoder=enc, slopes=sl, stability="lyapunov")


def test_optimized_without_active_margins_is_weighted_minimum_norm():
    # With margins already met, the optimum is the weighted minimum-norm solution
    # D = a X (R^T W^-1 R)^-1 R^T W^-1 / tau_s, W = diag(sum_mu r^mu) (closed form of a
    # quadratic program with linear equalities).
    net, pats, _ = _square_network(n=60, hetero=True)
    r, x = pats.rates, pats.codes.T.astype(float)
    opt = decoder_optimized(r, x, tau_s=0.05, encoder=net.encoder, slopes=pats.slopes,
                            margin=0.05)
    assert opt.success and "already meets" in opt.message
    winv = 1.0 / r.sum(axis=1)
    # R has rank 3 < P = 4 (one-axis encoder): use the pseudo-inverse of the Gram matrix.
    gram = r.T @ (winv[:, None] * r)
    closed = x @ np.linalg.pinv(gram) @ (r.T * winv) / 0.05
    np.testing.assert_allclose(opt.decoder, closed, rtol=1e-6, atol=1e-9)
    var_opt = np.sum(opt.readout_sd ** 2)
    pinv = decoder_pseudoinverse(r, x, tau_s=0.05)
    assert var_opt <= np.sum(pinv.readout_sd ** 2) * (1 + 1e-9)


def test_optimized_reports_unreachable_margins():
    # Identical neurons per face leave too little freedom for a margin of 0.9.
    net, pats, _ = _square_network(n=40)
    with pytest.warns(RuntimeWarning, match="could not reach margin 0.9"):
        res = decoder_optimized(pats.rates, pats.codes.T, tau_s=0.05, encoder=net.encoder,
                                slopes=pats.slopes, margin=0.9)
    assert not res.success and res.residual < 1e-10


# --------------------------------------------------------- fixed points, spiking
def test_square_network_has_four_stable_vertices_and_spiking_holds_them():
    net, pats, res = _square_network()
    assert res.exact
    fp = fixed_points(net, codes=pats.codes)
    assert fp.n_stable == 4
    assert fp.pattern_found(pats.codes).all()
    assert not fp.spurious.any()
    np.testing.assert_allclose(np.sort(fp.margins[fp.stable]), np.sort(res.margins),
                               rtol=1e-4)
    # Jacobian against a numerical derivative of the rate-picture vector field
    def field(y):
        return -y + net.tau_s * net.decoder @ net.rates_at(y)
    y = fp.stable_points[0]
    num = np.array([optimize.approx_fprime(y, lambda v, i=i: field(v)[i], 1e-7)
                    for i in range(2)])
    np.testing.assert_allclose(jacobian_at(net, y), num, rtol=1e-4, atol=1e-6)
    # Spiking network started at each vertex stays near it (tau_s = 50 ms, N = 200:
    # readout noise / spacing about 0.03, DESIGN Amendment 2).
    assert readout_noise_ratio(net, pats.positions).max() < 0.1
    sim = net.simulate(0.3, n_trials=4, y0=pats.positions, seed=1)
    late = sim.latent[:, sim.latent_times > 0.1, :]
    for m in range(4):
        assert np.all(np.sign(late[m]) == pats.codes[m])
        assert np.abs(late[m].mean(axis=0) - pats.positions[m]).max() < 0.2


def test_unused_vertex_is_flagged_spurious():
    # Built for three vertices only; with a one-axis encoder the rates are additive in
    # the axes, so the fourth vertex is a fixed point too (DESIGN Amendment 3).
    codes = vertex_codes(2)[:3]
    net, _, _ = _square_network(n=60, codes=codes)
    fp = fixed_points(net, codes=codes)
    assert fp.spurious.sum() == 1
    assert fp.codes[fp.spurious][0].tolist() == [1, 1]
    assert fp.pattern_found(codes).all()


def test_readout_variance_matches_campbell():
    # Readout of independent, irregular spike trains: variance sum_j D^2 r_j tau_s / 2
    # (Campbell's theorem for filtered Poisson processes; closed form). Open loop (E = 0),
    # firing driven by noise well below threshold, about 6 Hz with ISI CV near 1 (more
    # regular trains, e.g. CV 0.8, give 20% less); tolerance 15% for non-Poisson
    # spiking and sampling.
    n = 400
    rng = np.random.default_rng(5)
    dec = rng.normal(0, 0.05, size=(1, n))
    net = LowRankNetwork(np.zeros((n, 1)), dec, bias=-0.3, noise=1.0, tau_s=0.02)
    sim = net.simulate(20.0, seed=3, record_every=50)
    y = sim.latent[0, sim.latent_times > 0.2, 0]
    rates = sim.rates_hz[0]
    predicted = np.sum(dec[0] ** 2 * rates) * 0.02 / 2
    assert y.var() == pytest.approx(predicted, rel=0.15)
    ratio = readout_noise_ratio(net, np.zeros((1, 1)))[0, 0]
    assert ratio == pytest.approx(np.sqrt(np.sum(dec[0] ** 2 * net.rates_at(np.zeros(1)))
                                          * 0.02 / 2) / 2, rel=1e-12)


# ------------------------------------------------------------------ measures
def test_overlaps_match_scikit_learn():
    rng = np.random.default_rng(6)
    s, p = rng.normal(size=(7, 12)), rng.normal(size=(3, 12))
    np.testing.assert_allclose(overlaps(s, p), cosine_similarity(s, p), rtol=1e-12)
    m = p.mean(axis=0)
    np.testing.assert_allclose(overlaps(s, p, center=True), cosine_similarity(s - m, p - m),
                               rtol=1e-12)
    assert overlaps(np.zeros(12), p).tolist() == [0.0, 0.0, 0.0]


def test_pattern_completion_rate_and_spiking():
    net, pats, _ = _square_network()
    res = pattern_completion(net, pats.codes, corruption=[0.0, 0.3], n_starts=3, rng=0)
    assert res.fraction_recalled[0] == 1.0 and res.mean_overlap[0] > 0.99
    assert res.per_pattern.shape == (2, 4)
    spk = pattern_completion(net, pats.codes, corruption=[0.0], n_starts=1, method="spiking",
                             duration=0.2, rng=0)
    assert spk.fraction_recalled[0] == 1.0


def test_capacity_sweep_rate_picture():
    # Binary patterns (coding level 0.5, one latent axis each): the pseudo-inverse rule
    # stores them exactly and retrieves them at low load; the Hebbian rule is inexact and
    # does not hold them (its fixed points are not at the vertices).
    res = capacity_sweep(60, [0.05, 0.1], rule="pseudoinverse", rng=0)
    assert res.n_patterns.tolist() == [3, 6] and res.n_dims.tolist() == [3, 6]
    assert np.all(res.residual < 1e-8)
    assert np.all(res.mean_overlap > 0.99) and np.all(res.fraction_held == 1.0)
    assert np.isnan(res.capacity)  # never below the threshold at these loads
    assert 0.35 < res.shared_active < 0.65  # patterns share about half their active units
    heb = capacity_sweep(60, [0.1], rule="hebbian", rng=0)
    assert heb.residual[0] > 0.1 and heb.fraction_held[0] < 0.5
    vert = capacity_sweep(40, [0.1], rule="pseudoinverse", patterns="vertices", n_dims=4,
                          corruption=0.0, rng=0)
    assert vert.n_dims.tolist() == [4] and vert.residual[0] < 1e-8


def test_capacity_sweep_spiking_smoke():
    res = capacity_sweep(60, [0.05], rule="pseudoinverse", method="spiking", n_starts=1,
                         duration=0.2, rng=0)
    assert res.method == "spiking" and res.fraction_held[0] == 1.0
    assert res.mean_overlap[0] > 0.8


# ----------------------------------------------------------- binary limit
def test_hebbian_binary_capacity_near_0138():
    # Hopfield network: retrieval is lost near P/N = 0.138 (Amit, Gutfreund &
    # Sompolinsky 1985, Phys Rev Lett 55:1530). At N = 400 the transition is smeared by
    # finite size; we require near-perfect retrieval at 0.08, its loss by 0.25 and the
    # 0.9-overlap crossing within [0.11, 0.19].
    res = binary_capacity(400, [0.04, 0.08, 0.12, 0.16, 0.2, 0.25], rule="hebbian",
                          n_repeats=2, rng=1)
    assert res.mean_overlap[1] > 0.97
    assert res.mean_overlap[-1] < 0.6
    assert 0.11 <= res.capacity <= 0.19


def test_projection_rule_recalls_without_error_below_one():
    # Projection (pseudo-inverse) rule: linearly independent patterns are fixed points
    # without error for P/N < 1 (Kanter & Sompolinsky 1987, Phys Rev A 35:380); the
    # Hebbian rule fails at the same loads.
    res = binary_capacity(300, [0.3, 0.6, 0.9], rule="pseudoinverse", rng=2)
    np.testing.assert_array_equal(res.error_fraction, 0.0)
    heb = binary_capacity(300, [0.3], rule="hebbian", rng=2)
    assert heb.error_fraction[0] > 0.1


def test_binary_recall_corrects_flipped_units():
    rng = np.random.default_rng(0)
    xi = rng.choice([-1.0, 1.0], size=(200, 10))
    dec = xi.T / 200
    start = xi[:, 0].copy()
    start[:20] *= -1
    end = binary_recall(xi, dec, start)
    np.testing.assert_array_equal(end, xi[:, 0])


# ------------------------------------------------------------------ errors
def test_attractor_input_errors():
    with pytest.raises(InputError, match="cannot cover the 6 faces"):
        hypercube_encoder(5, 3)
    with pytest.raises(InputError, match="gain: element 0 is -1.0"):
        hypercube_encoder(6, 1, gain=[-1.0, 1, 1, 1, 1, 1])
    with pytest.raises(InputError, match="n_dims: expected a whole number >= 1"):
        vertex_codes(0)
    with pytest.raises(InputError, match="neuron 0 has 2 non-zero entries"):
        encoder_axes(np.ones((3, 2)))
    enc = hypercube_encoder(8, 2, rng=0)
    with pytest.raises(InputError, match=r"codes: expected shape \(P, K\) with K = 2"):
        vertex_patterns(enc, np.ones((4, 3)), bias=1.0)
    with pytest.raises(InputError, match="codes: expected entries -1 or \\+1"):
        vertex_patterns(enc, np.zeros((1, 2)), bias=1.0)
    r = np.ones((8, 4))
    with pytest.raises(InputError, match=r"pass codes as K x P"):
        decoder_pseudoinverse(r, np.ones((4, 2)), tau_s=0.01)
    with pytest.raises(InputError, match="rates: neuron 0, pattern 1 has rate -1.0 Hz"):
        decoder_hebbian(np.array([[1.0, -1.0]]), np.ones((1, 2)), tau_s=0.01)
    with pytest.raises(InputError, match="tau_s: expected a finite number > 0"):
        decoder_pseudoinverse(r, np.ones((2, 4)), tau_s=-1.0)
    with pytest.raises(InputError, match="give both"):
        decoder_pseudoinverse(r, np.ones((2, 4)), tau_s=0.01, encoder=enc)
    with pytest.raises(InputError, match=r"slopes: expected shape \(N, P\) = \(8, 4\)"):
        decoder_optimized(r, np.ones((2, 4)), tau_s=0.01, encoder=enc, slopes=np.ones((8, 3)))
    with pytest.raises(InputError, match="margin: expected a finite number >= 0"):
        decoder_optimized(r, np.ones((2, 4)), tau_s=0.01, encoder=enc, slopes=r, margin=-1)
    with pytest.raises(InputError, match=r"encoder: expected shape \(N, K\) = \(8, 2\)"):
        decoder_optimized(r, np.ones((2, 4)), tau_s=0.01, encoder=np.ones((8, 3)), slopes=r)
    net = LowRankNetwork(enc, np.zeros((2, 8)), bias=1.0)
    with pytest.raises(InputError, match=r"y: expected shape \(K,\) or \(M, K\) with K = 2"):
        jacobian_at(net, np.zeros(3))
    with pytest.raises(InputError, match=r"codes: expected shape \(P, K\) with K = 2"):
        fixed_points(net, codes=np.ones((2, 3)))
    with pytest.raises(InputError, match=r"starts: expected shape \(K,\) or \(M, K\)"):
        fixed_points(net, starts=np.ones((2, 3)))
    with pytest.raises(InputError, match="states: last dimension 3 does not match"):
        overlaps(np.ones(3), np.ones((2, 4)))
    with pytest.raises(InputError, match="method: expected 'rate' or 'spiking'"):
        pattern_completion(net, vertex_codes(2), method="other")
    with pytest.raises(InputError, match=r"corruption: expected a number in \[0.0, 1.0\]"):
        pattern_completion(net, vertex_codes(2), corruption=[1.5])
    with pytest.raises(InputError, match="rule: expected one of"):
        capacity_sweep(20, [0.1], rule="other")
    with pytest.raises(InputError, match="loads: expected P/N values > 0"):
        capacity_sweep(20, [0.0])
    with pytest.raises(InputError, match="do not fit on the 4 vertices"):
        capacity_sweep(20, [0.5], patterns="vertices", n_dims=2)
    with pytest.raises(InputError, match="patterns: expected 'binary' or 'vertices'"):
        capacity_sweep(20, [0.1], patterns="other")
    with pytest.raises(InputError, match="method: expected 'rate' or 'spiking'"):
        capacity_sweep(20, [0.1], method="other")
    with pytest.raises(InputError, match="rule: expected 'hebbian' or 'pseudoinverse'"):
        binary_capacity(20, [0.1], rule="optimized")
    with pytest.raises(InputError, match="do not fit"):
        binary_recall(np.ones((4, 2)), np.ones((2, 4)), np.ones(3))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        decoder_pseudoinverse(r, np.ones((2, 4)), tau_s=0.01)  # rank-deficient: no warning


def test_more_input_errors():
    enc = hypercube_encoder(8, 2, rng=0)
    net = LowRankNetwork(enc, np.zeros((2, 8)), bias=1.0)
    with pytest.raises(InputError, match=r"y: expected a last dimension of 2"):
        net.rates_at(np.zeros(3))
    with pytest.raises(InputError, match="gain: expected a number or 6 values"):
        hypercube_encoder(6, 1, gain=[1.0, 2.0])
    r = np.ones((8, 4))
    with pytest.raises(InputError, match="the optimized rule needs both"):
        decoder_optimized(r, np.ones((2, 4)), tau_s=0.01, encoder=None, slopes=None)
    big = LowRankNetwork(np.zeros((4, 13)), np.zeros((13, 4)), bias=1.0)
    with pytest.raises(InputError, match="starts: no starting points"):
        fixed_points(big, grid=0)
    with pytest.raises(InputError, match=r"codes: expected shape \(P, K\) with K = 2"):
        pattern_completion(net, np.ones((2, 3)))
    with pytest.raises(InputError, match="loads: expected P/N values > 0"):
        binary_capacity(20, [-0.1])
    silent = LowRankNetwork(np.zeros((3, 1)), np.zeros((1, 3)), bias=0.0)
    with pytest.raises(InputError, match="contains no spikes"):
        silent.simulate(0.01, seed=0).to_recording()
