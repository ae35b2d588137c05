"""Drift of unit rates across a session: Spearman trend, Benjamini-Hochberg, unit_drift.

References: scipy.stats.spearmanr and scipy.stats.false_discovery_control (reference
library); the family-wise error of BH under the complete null is at most alpha
(Benjamini & Hochberg 1995, Theorem 1 with all hypotheses true)."""

import numpy as np
import pytest
from scipy import stats

from attractorfit.errors import InputError
from attractorfit.stats import benjamini_hochberg, spearman_trend, unit_drift


def test_spearman_trend_matches_scipy():
    rng = np.random.default_rng(0)
    n = 37
    x = rng.poisson(4.0, size=(n, 6)).astype(float)      # many ties
    x[:, 1] += np.arange(n) * 0.2                          # a trend
    x[:, 2] = 3.0                                          # constant: undefined
    rho, p = spearman_trend(x)
    assert np.isnan(rho[2]) and np.isnan(p[2])
    for j in (0, 1, 3, 4, 5):
        ref = stats.spearmanr(np.arange(n), x[:, j])
        # same definition (average ranks, t approximation): agreement to rounding
        assert rho[j] == pytest.approx(ref.statistic, abs=1e-12)
        assert p[j] == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-300)


def test_benjamini_hochberg_matches_scipy():
    rng = np.random.default_rng(1)
    p = np.concatenate([rng.uniform(size=40), rng.uniform(0, 1e-3, size=10), [1.0, 0.0]])
    q = benjamini_hochberg(p)
    np.testing.assert_allclose(q, stats.false_discovery_control(p, method="bh"), rtol=1e-12)
    with_nan = np.concatenate([p, [np.nan]])
    qn = benjamini_hochberg(with_nan)
    assert np.isnan(qn[-1])
    np.testing.assert_allclose(qn[:-1], q, rtol=1e-12)   # NaN does not count in m
    assert np.all(np.isnan(benjamini_hochberg([np.nan, np.nan])))


def test_unit_drift_finds_planted_trends():
    # invented data: 10 of 40 units lose or gain 60% of their rate over 120 trials
    rng = np.random.default_rng(2)
    n_tr, n_u = 120, 40
    base = rng.uniform(5, 20, size=n_u)
    factor = np.ones((n_tr, n_u))
    ramp = np.linspace(-0.3, 0.3, n_tr)
    factor[:, :5] += ramp[:, None]
    factor[:, 5:10] -= ramp[:, None]
    rate = rng.poisson(base * factor * 2.0) / 2.0          # counts in 2 s windows, Hz
    d = unit_drift(rate, unit_ids=[f"u{i}" for i in range(n_u)], alpha=0.05)
    assert d.drifting[:10].sum() >= 9 and d.drifting[10:].sum() <= 1
    assert np.all(d.rho[:5] > 0) and np.all(d.rho[5:10] < 0)
    # fitted first-to-last change about +-60% of the mean
    np.testing.assert_allclose(np.abs(d.relative_change[:10]), 0.6, atol=0.2)
    block = d.summary_block()
    assert block["n_units"] == 40 and block["n_drifting"] == int(d.drifting.sum())
    assert len(d.rows()) == 40 and d.rows()[0][0] == "u0"


def test_unit_drift_family_error_under_null():
    # all units stationary: BH at 0.05 gives any false discovery in at most ~5% of sessions
    rng = np.random.default_rng(3)
    any_false = 0
    reps = 300
    for _ in range(reps):
        rate = rng.poisson(8.0, size=(60, 30)).astype(float)
        any_false += bool(unit_drift(rate).drifting.any())
    # binomial(300, 0.05): mean 15, s.d. 3.8; bound at 0.05 + 4 s.d.
    assert any_false / reps <= 0.05 + 4 * np.sqrt(0.05 * 0.95 / reps)


def test_unit_drift_errors():
    with pytest.raises(InputError, match="at least 3 trials"):
        unit_drift(np.ones((2, 4)))
    with pytest.raises(InputError, match=r"drift.alpha: expected a number in \[0.0, 1.0\]"):
        unit_drift(np.ones((5, 2)), alpha=2.0)
