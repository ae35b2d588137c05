"""Spike statistics against closed forms and elephant."""

import numpy as np
import pytest

from attractorfit.stats import count_correlations, fano_factor, isi_cv, unit_summary
from attractorfit.synthetic import gamma_spikes, switching_recording


@pytest.mark.parametrize("order", [1.0, 4.0])
def test_gamma_cv_and_fano_closed_form(order):
    # Gamma renewal of order k: CV = 1/sqrt(k); long-window Fano factor = 1/k
    # (Nawrot et al. 2008, J Neurosci Methods 169:374). Poisson is k = 1.
    rate, dur, win = 20.0, 4000.0, 2.0
    t = gamma_spikes([0.0, dur], [rate], order=order, rng=3)
    assert isi_cv(t) == pytest.approx(1 / np.sqrt(order), rel=0.03)
    counts = np.histogram(t, bins=np.arange(0, dur + win / 2, win))[0]
    # sampling s.e. of a variance ratio over 2000 windows is about 3%; 10% tolerance
    assert fano_factor(counts) == pytest.approx(1 / order, rel=0.10)


def test_cv_and_fano_match_elephant():
    # Reference library: elephant.statistics.cv / isi and fano (same definitions).
    elephant_stats = pytest.importorskip("elephant.statistics")
    import neo
    import quantities as pq

    t = gamma_spikes([0.0, 500.0], [15.0], order=2.0, rng=5)
    st = neo.SpikeTrain(t * pq.s, t_stop=500.0 * pq.s)
    ref_cv = elephant_stats.cv(elephant_stats.isi(st).magnitude, ddof=1)
    assert isi_cv(t) == pytest.approx(float(ref_cv), rel=1e-12)
    trains = []
    counts = []
    for k in range(30):
        s = gamma_spikes([0.0, 1.0], [15.0], order=2.0, rng=100 + k)
        trains.append(neo.SpikeTrain(s * pq.s, t_stop=1.0 * pq.s))
        counts.append(len(s))
    # elephant.statistics.fanofactor uses the plain variance (ddof=0)
    ref = float(elephant_stats.fanofactor(trains))
    assert fano_factor(counts, ddof=0) == pytest.approx(ref, rel=1e-12)


def test_cv_ignores_gaps_between_windows():
    t = np.array([0.0, 0.1, 0.2, 10.0, 10.1, 10.2])
    w = np.array([[0.0, 1.0], [10.0, 11.0]])
    assert isi_cv(t, windows=w) == pytest.approx(0.0, abs=1e-12)
    assert isi_cv(t) > 1.0


def test_count_correlations_match_numpy():
    rng = np.random.default_rng(0)
    x = rng.poisson(3.0, size=(200, 5)).astype(float)
    x[:, 1] += x[:, 0]
    c = count_correlations(x)
    ref = np.corrcoef(x.T)[np.triu_indices(5, 1)]
    np.testing.assert_allclose(c, ref, rtol=1e-12)


def test_unit_summary_on_synthetic():
    rec, _ = switching_recording(n_units=8, n_states=2, n_trials=60, gamma_order=1.0,
                                 modulation=0.0, rate_range=(10, 10), rng=2)
    s = unit_summary(rec)
    # Poisson at 10 Hz: rates near 10 Hz, ISI CV near 1 (textbook, Dayan & Abbott ch. 1)
    np.testing.assert_allclose(s.rate_hz, 10.0, rtol=0.15)
    np.testing.assert_allclose(s.isi_cv, 1.0, atol=0.12)
    # Fano of 60 trial counts per unit has s.e. ~0.18; the mean over 8 units ~0.07
    assert np.mean(s.fano) == pytest.approx(1.0, abs=0.25)
