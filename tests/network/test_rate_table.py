"""The tabulated transfer function behind the rate-picture flows."""

import numpy as np

from attractorfit.network import LowRankNetwork, transfer_rate
from attractorfit.network._stability import _RateTable


def _net():
    rng = np.random.default_rng(0)
    enc = rng.normal(size=(6, 2))
    noise = np.array([0.3, 0.3, 0.5, 0.5, 0.8, 0.8])
    return LowRankNetwork(enc, rng.normal(size=(2, 6)) * 0.01, bias=1.0, noise=noise,
                          tau_s=0.05)


def test_an_extended_table_equals_one_built_wide():
    net = _net()
    grown = _RateTable(net, 1e-4, -0.5, 0.5)
    grown.cover(-3.0, 0.7)
    grown.cover(-3.2, 4.0)
    wide = _RateTable(net, 1e-4, grown.lo, grown.hi)
    assert grown.lo <= -3.2 and grown.hi >= 4.0
    np.testing.assert_array_equal(grown.table, wide.table)  # same cells, same values


def test_table_matches_the_exact_transfer_function():
    net = _net()
    table = _RateTable(net, 1e-4, -1.0, 3.0)
    x = np.linspace(-0.9, 2.9, 37)[:, None] + np.zeros((1, 6))
    exact = transfer_rate(x, net.noise, dt=1e-4, tau_m=net.tau_m, threshold=1.0, reset=0.0,
                          refractory=net.refractory)
    # linear interpolation on a 0.002 grid: error about step^2 |phi''| / 8, well under
    # 0.05 Hz for these noise levels (the class docstring's bound, checked here)
    np.testing.assert_allclose(table.rates(x), exact, atol=0.05)
