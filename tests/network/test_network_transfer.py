"""Siegert transfer function, its slope and inverse, against SciPy and closed forms."""

import numpy as np
import pytest
from scipy import integrate, optimize, special

from attractorfit.errors import InputError
from attractorfit.network import (
    siegert_rate,
    siegert_slope,
    transfer_inverse,
    transfer_rate,
    transfer_slope,
)


def _textbook_rate(mu, sigma, tau_m=0.02, theta=1.0, v_r=0.0, t_ref=0.002):
    # Siegert formula in its textbook erf form (Amit & Brunel 1997, Cereb Cortex 7:237,
    # eq. for the mean first-passage time), integrated directly with scipy.integrate.quad.
    f = lambda u: np.exp(u * u) * (1.0 + special.erf(u))  # noqa: E731
    val, _ = integrate.quad(f, (v_r - mu) / sigma, (theta - mu) / sigma, epsabs=0,
                            epsrel=1e-11, limit=200)
    return 1.0 / (t_ref + tau_m * np.sqrt(np.pi) * val)


@pytest.mark.parametrize("mu,sigma", [(0.6, 0.5), (1.2, 0.5), (0.2, 0.3), (0.9, 1.0),
                                      (-0.5, 0.8), (1.3, 0.4)])
def test_siegert_matches_quad_of_textbook_integral(mu, sigma):
    # Moderate parameters where the erf form is numerically safe; rel. tol. 1e-8.
    assert siegert_rate(mu, sigma) == pytest.approx(_textbook_rate(mu, sigma), rel=1e-8)


def test_siegert_other_neuron_parameters_and_vectorisation():
    mu = np.array([0.3, 0.8, 1.4])
    got = siegert_rate(mu, 0.4, tau_m=0.01, threshold=1.2, reset=0.2, refractory=0.004)
    ref = [_textbook_rate(m, 0.4, tau_m=0.01, theta=1.2, v_r=0.2, t_ref=0.004) for m in mu]
    np.testing.assert_allclose(got, ref, rtol=1e-8)
    assert got.shape == (3,)


def test_siegert_deterministic_limit():
    # sigma -> 0: the closed-form LIF rate (Dayan & Abbott 2001, ch. 5), and 0 below
    # threshold; tiny sigma through the quadrature agrees to 1e-6.
    mu = np.array([0.5, 1.5, 3.0])
    closed = np.where(mu > 1, 1 / (0.002 + 0.02 * np.log(mu / np.maximum(mu - 1, 1e-300))),
                      0.0)
    np.testing.assert_allclose(siegert_rate(mu, 0.0), closed, rtol=1e-12)
    np.testing.assert_allclose(siegert_rate(mu[1:], 1e-6), closed[1:], rtol=1e-5)
    assert siegert_rate(-30.0, 0.5) == 0.0  # far below threshold: no overflow


def test_slopes_match_numerical_derivative():
    # Reference: scipy.optimize.approx_fprime (central differences are ours otherwise).
    mu = np.array([-0.5, 0.3, 0.8, 1.0, 1.6, 3.0])
    for sigma in (0.4, 0.0):
        for fun, dfun in ((siegert_rate, siegert_slope), (transfer_rate, transfer_slope)):
            keep = mu > 1.05 if sigma == 0 else np.ones(mu.size, bool)
            num = [optimize.approx_fprime([m], lambda x: float(fun(x[0], sigma)), 1e-7)[0]
                   for m in mu[keep]]
            np.testing.assert_allclose(dfun(mu[keep], sigma), num, rtol=1e-5)
    assert siegert_slope(0.5, 0.0) == 0.0


def test_inverse_round_trip_and_floor():
    rates = np.array([0.0, 0.5, 5.0, 20.0, 100.0, 300.0])
    for dt in (1e-4, None):
        mu = transfer_inverse(rates, 0.5, dt=dt)
        np.testing.assert_allclose(transfer_rate(mu, 0.5, dt=dt), np.maximum(rates, 0.1),
                                   rtol=1e-8)
    # per-neuron parameters broadcast
    mu = transfer_inverse([10.0, 10.0], [0.3, 0.9], threshold=[1.0, 1.5])
    np.testing.assert_allclose(transfer_rate(mu, [0.3, 0.9], threshold=[1.0, 1.5]), 10.0,
                               rtol=1e-8)
    assert mu[1] > mu[0] - 1  # sanity: both finite numbers
    # agrees with a scalar root finder from SciPy
    ref = optimize.brentq(lambda m: transfer_rate(m, 0.5) - 12.0, -5, 5, xtol=1e-13)
    assert transfer_inverse(12.0, 0.5) == pytest.approx(ref, abs=1e-9)


def test_transfer_is_below_siegert_and_converges():
    # The discrete-step correction lowers the rate and vanishes as dt -> 0.
    base = siegert_rate(0.8, 0.5)
    assert transfer_rate(0.8, 0.5, dt=1e-4) < transfer_rate(0.8, 0.5, dt=1e-5) < base
    assert transfer_rate(0.8, 0.5, dt=None) == base
    assert transfer_rate(0.8, 0.5, dt=1e-9) == pytest.approx(base, rel=1e-3)


def test_inverse_input_errors():
    with pytest.raises(InputError, match="rate: element 1 is -2.0 Hz; expected rates >= 0"):
        transfer_inverse([1.0, -2.0], 0.5)
    with pytest.raises(InputError, match="at or above the saturation rate"):
        transfer_inverse(600.0, 0.5)
    with pytest.raises(InputError, match="min_rate: expected a finite number > 0"):
        transfer_inverse(5.0, 0.5, min_rate=0.0)
    with pytest.raises(InputError, match="rate: element 0 is nan"):
        transfer_inverse([np.nan], 0.5)
