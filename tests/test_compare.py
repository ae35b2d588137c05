"""Model-vs-data comparison: log-rank and KS against textbook values and SciPy, metrics
at their bounds, same-process consistency, different-process detection, nulls,
determinism and input errors."""

import warnings

import numpy as np
import pytest
from scipy import stats as sps

from attractorfit._output import dumps_json
from attractorfit.binning import bin_spikes
from attractorfit.compare import (centred_rate_r2, compare, ks_statistic, logrank_test,
                                  total_variation)
from attractorfit.errors import InputError, InputWarning
from attractorfit.states import analyse_states
from attractorfit.surrogates import shuffle_surrogate
from attractorfit.synthetic import state_rate_vectors, switching_recording
from attractorfit.synthetic import switching_counts as _switching_counts

S, N, T, BINS, DT = 3, 16, 40, 100, 0.02


# ----------------------------------------------------------------------------- helpers
def switching_counts(rates_hz, *, seed, n_trials=T, n_bins=BINS, **kw):
    return _switching_counts(rates_hz, n_trials=n_trials, n_bins=n_bins, bin_size=DT,
                             level_names="abc", rng=seed, **kw)


@pytest.fixture(scope="module")
def world():
    rates = state_rate_vectors(S, N, rate_range=(5.0, 30.0), modulation=0.8, rng=1)
    data = switching_counts(rates, seed=0)
    fit = analyse_states(data, n_states=S, latent_dims=2, rng=0)
    model = [switching_counts(rates, seed=100 + i) for i in range(20)]
    return rates, data, fit, model


def quiet_compare(*args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return compare(*args, **kw)


# ----------------------------------------------------------------------------- log-rank
def test_logrank_hand_computed():
    # Hand computation with the textbook log-rank formulas (Mantel 1966; e.g. Klein &
    # Moeschberger 2003, section 7.3): A = {1, 3, 4+}, B = {2, 5}.
    # t=1: n=5, n_A=3, d=1, d_A=1 -> E 3/5, V (3/5)(2/5) = 6/25
    # t=2: n=4, n_A=2, d=1, d_A=0 -> E 1/2, V 1/4
    # t=3: n=3, n_A=2, d=1, d_A=1 -> E 2/3, V 2/9
    # t=5: n=1, n_A=0 -> E 0, V 0.  O - E = 2 - 53/30 = 7/30, V = 641/900,
    # chi^2 = (7/30)^2 / (641/900) = 49/641.
    r = logrank_test([1, 3, 4], [1, 1, 0], [2, 5], [1, 1])
    assert r.observed_minus_expected == pytest.approx(7 / 30, rel=1e-12)
    assert r.variance == pytest.approx(641 / 900, rel=1e-12)
    assert r.statistic == pytest.approx(49 / 641, rel=1e-12)
    assert r.p_value == pytest.approx(sps.chi2.sf(49 / 641, 1), rel=1e-12)
    # with ties: A = {2, 2, 3}, B = {2, 4+}. t=2: n=5, n_A=3, d=3, d_A=2 -> E 9/5,
    # V = 3 (3/5)(2/5)(2/4) = 0.36; t=3: n=2, n_A=1, d=1 -> E 1/2, V 1/4.
    # O - E = 3 - 2.3 = 0.7, V = 0.61, chi^2 = 0.49 / 0.61 = 49/61.
    r = logrank_test([2, 2, 3], [1, 1, 1], [2, 4], [1, 0])
    assert r.statistic == pytest.approx(49 / 61, rel=1e-12)


def test_logrank_textbook_leukaemia():
    # Remission times (weeks) of the 6-MP and placebo groups of Freireich et al. (1963),
    # as tabulated in Kleinbaum & Klein, Survival Analysis (from memory): log-rank
    # chi^2 = 16.79, placebo O - E = 10.25, variance 6.257.
    mp_events = [6, 6, 6, 7, 10, 13, 16, 22, 23]
    mp_censored = [6, 9, 10, 11, 17, 19, 20, 25, 32, 32, 34, 35]
    placebo = [1, 1, 2, 2, 3, 4, 4, 5, 5, 8, 8, 8, 8, 11, 11, 12, 12, 15, 17, 22, 23]
    r = logrank_test(placebo, np.ones(21, bool), mp_events + mp_censored,
                     np.r_[np.ones(9, bool), np.zeros(12, bool)])
    assert r.statistic == pytest.approx(16.79, abs=0.005)
    assert r.observed_minus_expected == pytest.approx(10.25, abs=0.005)
    assert r.variance == pytest.approx(6.257, abs=0.0005)


def test_logrank_matches_scipy():
    # scipy.stats.logrank (SciPy >= 1.11): its statistic is the signed square root.
    rng = np.random.default_rng(4)
    for k in range(5):
        a = np.round(rng.exponential(1.0, 40), 1) + 0.1          # ties on purpose
        b = np.round(rng.exponential(1.3 + 0.2 * k, 30), 1) + 0.1
        ca, cb = rng.random(40) < 0.3, rng.random(30) < 0.2       # censored
        ours = logrank_test(a, ~ca, b, ~cb)
        ref = sps.logrank(sps.CensoredData(uncensored=a[~ca], right=a[ca]),
                          sps.CensoredData(uncensored=b[~cb], right=b[cb]))
        assert ours.statistic == pytest.approx(float(ref.statistic) ** 2, rel=1e-10)
        assert ours.p_value == pytest.approx(float(ref.pvalue), rel=1e-8)


def test_ks_statistic_matches_scipy():
    rng = np.random.default_rng(2)
    for _ in range(5):
        a = np.round(rng.normal(size=37), 1)
        b = np.round(rng.normal(0.3, 1.2, size=81), 1)
        assert ks_statistic(a, b) == pytest.approx(sps.ks_2samp(a, b).statistic, abs=1e-12)
    assert np.isnan(ks_statistic([], [1.0]))


def test_metrics_at_their_bounds(world):
    p = np.array([0.2, 0.5, 0.3])
    assert total_variation(p, p) == 0.0
    assert total_variation([1, 0, 0], [0, 0.5, 0.5]) == pytest.approx(1.0)
    r = np.random.default_rng(0).gamma(2.0, 5.0, size=(4, 9))
    assert centred_rate_r2(r, r) == pytest.approx(1.0, abs=1e-12)
    # adding a per-unit offset changes nothing: the statistic is centred per unit
    assert centred_rate_r2(r, r + np.arange(9)[None, :]) == pytest.approx(1.0, abs=1e-12)
    # predicting no state modulation at all gives R^2 = 0
    assert centred_rate_r2(r, np.zeros_like(r)) == pytest.approx(0.0, abs=1e-12)

    _, data, fit, _ = world
    c = quiet_compare(data, [data, data, data], fit, refit=False, n_boot=20, rng=0)
    m = c.metrics
    for name in ("occupancy_tvd", "dwell_logratio", "transition_distance", "fano_ks",
                 "correlation_ks", "condition_tvd[item]"):
        assert m[name].value == pytest.approx(0.0, abs=1e-12), name
        assert m[name].consistent
    assert m["dwell_logrank"].value == pytest.approx(0.0, abs=1e-12)
    assert m["rate_r2"].value == pytest.approx(1.0, abs=1e-12)
    assert m["mean_rate_r2"].value == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(c.occupancy_model, c.occupancy_data)
    assert not c.held_out


# ----------------------------------------------------------------------------- judgements
def test_same_process_is_consistent(world):
    _, data, fit, model = world
    held = np.arange(1, T, 2)
    c = quiet_compare(data, model, fit, trials=held, refit=False, n_boot=100, rng=1)
    assert c.held_out and c.n_trials == held.size and c.n_surrogates == 20
    occ = c.metrics["occupancy_tvd"]
    # one seed, with margin: the data sit well inside the model-vs-model spread
    assert occ.value < 0.8 * occ.ref
    assert occ.consistent and occ.p_value > 0.1
    assert c.metrics["rate_r2"].consistent
    assert c.metrics["dwell_logratio"].consistent
    assert c.metrics["rate_r2"].value > 0.9
    lo, hi = occ.ci
    assert lo <= occ.value <= hi
    blk = c.summary_block()
    for key in ("occupancy_tvd", "occupancy_tvd_ref95", "rate_r2", "rate_r2_ref05",
                "dwell_logrank_p_per_state", "n_surrogates", "nulls", "caution"):
        assert key in blk
    assert blk["n_surrogates"] == 20
    assert "not proof about the brain" in blk["caution"]
    text = dumps_json({"comparison": blk})          # the run folder's writer accepts it
    assert '"occupancy_tvd_ref95"' in text and "NaN" not in text


@pytest.mark.parametrize("change", ["dwell", "rates", "occupancy"])
def test_different_process_is_flagged(world, change):
    rates, data, fit, _ = world
    if change == "dwell":          # the same states, switching four times faster
        model = [switching_counts(rates, seed=200 + i, mean_dwell_s=0.1) for i in range(20)]
        flagged = ["dwell_logratio", "dwell_logrank"]
    elif change == "rates":        # other state modulation of the same units
        other = state_rate_vectors(S, N, rate_range=(5.0, 30.0), modulation=0.8, rng=2)
        other = other / other.mean(axis=0) * rates.mean(axis=0)
        model = [switching_counts(other, seed=300 + i) for i in range(20)]
        flagged = ["rate_r2"]
    else:                          # state 0 entered far more often than the others
        tm = [[0, 1, 1], [8, 0, 1], [8, 1, 0]]
        model = [switching_counts(rates, seed=400 + i, switch_weights=tm) for i in range(20)]
        flagged = ["occupancy_tvd"]
    c = quiet_compare(data, model, fit, refit=False, n_boot=50, rng=2)
    for name in flagged:
        m = c.metrics[name]
        assert m.consistent is False, (name, m.value, m.ref)
        assert m.p_value == pytest.approx(1 / 21)
        assert "NOT consistent" in m.text


def test_dwell_logrank_per_state_and_figure_arrays(world):
    rates, data, fit, _ = world
    model = [switching_counts(rates, seed=500 + i, mean_dwell_s=0.1) for i in range(20)]
    c = quiet_compare(data, model, fit, refit=False, n_boot=20, rng=3)
    assert np.all(c.dwell_logrank_p < 1e-3)
    assert np.all(c.dwell_ratio > 1.5)                  # data dwell longer than the model's
    d, m = c.survival_for_plot()
    assert set(d) == set(m) == {0, 1, 2}
    x, y, states = c.centred_rates()
    assert x.shape == y.shape == states.shape == (S * N,)
    assert c.occupancy_data_ci.shape == (S, 2) and c.occupancy_model_ci.shape == (S, 2)
    assert c.fano_model.shape == (20, N) and c.correlation_model.shape == (20, N * (N - 1) // 2)
    tab = c.conditions["item"]
    assert tab["levels"] == ["a", "b", "c"] and tab["fraction_data"].shape == (3, S)
    given = {str(k): v for k, v in fit.label_to_state["item"].items()}
    assert tab["matching_state"].tolist() == [given[lv] for lv in tab["levels"]]
    j = np.arange(3)
    np.testing.assert_allclose(tab["matching_data"],
                               tab["fraction_data"][j, tab["matching_state"]])
    assert c.summary_block()["conditions"]["item"]["levels"] == ["a", "b", "c"]


def test_fano_of_poisson_counts_is_one(world):
    # Poisson counts with a trial-locked, time-varying rate: across-trial Fano factor 1
    # (textbook). 40 trials, 20 windows of 100 ms, 16 units: the s.e. of the mean ratio
    # is below 0.02; tolerance 0.06.
    _, _, fit, _ = world
    rng = np.random.default_rng(8)
    rate = 5.0 + 20.0 * rng.random((1, BINS, N)) * np.sin(np.linspace(0, 3, BINS))[None, :,
                                                                                    None] ** 2

    def poisson_counts():
        c = rng.poisson(np.broadcast_to(rate * DT, (T, BINS, N))).astype(np.uint16)
        w = switching_counts(np.ones((S, N)), seed=0)
        w.counts = c
        return w

    data = poisson_counts()
    c = quiet_compare(data, [poisson_counts() for _ in range(3)], fit, refit=False,
                      n_boot=10, rng=0)
    assert abs(np.nanmean(c.fano_data) - 1.0) < 0.06
    # pair correlations of the 100 ms window counts equal numpy's corrcoef
    w = data.counts.astype(float).reshape(T, BINS // 5, 5, N).sum(axis=2).reshape(-1, N)
    ref = np.corrcoef(w.T)[np.triu_indices(N, 1)]
    np.testing.assert_allclose(c.correlation_data, ref, rtol=1e-10, atol=1e-12)


# ----------------------------------------------------------------------------- refit
class _Permuted:
    """The data's state fit with its states renamed: a refit whose matching is known."""

    def __init__(self, fit, perm):
        self.fit, self.perm = fit, np.asarray(perm)
        self.rates_hz = np.empty_like(fit.rates_hz)
        self.rates_hz[self.perm] = fit.rates_hz

    def decode(self, binned):
        from dataclasses import replace

        dec = self.fit.decode(binned)
        lut = np.concatenate([self.perm, [-1]])
        seg = replace(dec.segments, state=lut[dec.segments.state])
        tc = np.zeros_like(dec.transition_counts)
        tc[np.ix_(self.perm, self.perm)] = dec.transition_counts
        return replace(dec, bin_states=[lut[b] for b in dec.bin_states], segments=seg,
                       transition_counts=tc)


def test_refit_states_are_matched_back(world):
    _, data, fit, model = world

    def refit(binned, n_states, rng):
        return _Permuted(fit, [2, 0, 1])

    c = quiet_compare(data, model[:5], fit, refit=refit, n_boot=10, rng=4)
    for name in ("occupancy_tvd", "dwell_logratio", "transition_distance", "rate_r2"):
        assert c.refit_metrics[name].value == pytest.approx(c.metrics[name].value,
                                                            abs=1e-12)
    np.testing.assert_allclose(c.occupancy_refit_data, c.occupancy_data)


def test_refit_with_analyse_states(world):
    _, data, fit, model = world
    c = quiet_compare(data, model[:3], fit, refit=True, trials=np.arange(20), n_boot=10,
                      rng=5)
    # a refit on 20 trials of the same process finds the same states
    assert c.refit_metrics["rate_r2"].value > 0.9
    assert c.summary_block()["refit"]["occupancy_tvd"] < 0.1


# ----------------------------------------------------------------------------- nulls
@pytest.fixture(scope="module")
def spikes():
    rates = state_rate_vectors(S, 12, rate_range=(5.0, 30.0), modulation=1.0, rng=3)
    kw = dict(n_units=12, n_states=S, n_trials=24, trial_duration=2.0, state_rates_hz=rates,
              start_states=np.arange(24) % S, mean_dwell_s=0.4)
    rec, _ = switching_recording(rng=1, **kw)
    b = bin_spikes(rec, bin_size=DT)
    fit = analyse_states(b, n_states=S, latent_dims=2, rng=0)
    model = [switching_recording(rng=10 + i, **kw)[0] for i in range(20)]
    fast = [switching_recording(rng=40 + i, **dict(kw, mean_dwell_s=0.08))[0]
            for i in range(20)]
    return rec, b, fit, model, fast


def test_network_better_than_trial_shuffle(spikes):
    rec, b, fit, model, _ = spikes
    shuffled = [shuffle_surrogate(rec, b, rng=i) for i in range(20)]
    c = quiet_compare(b, model, fit, recording=rec, nulls={"shuffle": shuffled},
                      refit=False, n_boot=20, rng=6)
    res = c.nulls["shuffle"]
    assert res.verdict == "network_better", res.text
    assert res.p_network_better == pytest.approx(1 / 21)
    assert "better than trial-shuffled surrogates" in res.text
    assert "not proof about the brain" in res.text
    assert "isi_cv_ks" in res.skipped and "fano_ks" in res.skipped
    assert "isi_cv_ks" in c.metrics                      # spike times given on both sides
    blk = c.summary_block()["nulls"]["shuffle"]
    assert blk["verdict"] == "network_better"
    assert res.occupancy.shape == (S,) and res.occupancy_ci.shape == (S, 2)
    assert res.samples["fano"].shape == (20, 12) and res.samples["isi_cv"].shape == (20, 12)


def test_null_better_when_the_network_is_wrong(spikes):
    rec, b, fit, model, fast = spikes
    # the "network" switches five times too fast; the "null" is the true process
    c = quiet_compare(b, fast, fit, nulls={"truth": model}, refit=False, n_boot=20, rng=7)
    assert c.nulls["truth"].verdict == "null_better", c.nulls["truth"].text
    few = quiet_compare(b, model, fit, nulls={"truth": fast[:5]}, refit=False, n_boot=10,
                        rng=7)
    assert few.nulls["truth"].verdict == "inconclusive"
    assert "too few surrogates" in few.nulls["truth"].text


# ----------------------------------------------------------------------------- determinism
def test_same_seed_same_result_and_jobs(world):
    _, data, fit, model = world
    nulls = {"other": model[10:13]}
    a = quiet_compare(data, model[:6], fit, nulls=nulls, refit=False, n_boot=30, rng=9)
    b = quiet_compare(data, model[:6], fit, nulls=nulls, refit=False, n_boot=30, rng=9)
    c = quiet_compare(data, model[:6], fit, nulls=nulls, refit=False, n_boot=30, rng=9,
                      n_jobs=2)
    for other in (b, c):
        assert repr(a.summary_block()) == repr(other.summary_block())


# ----------------------------------------------------------------------------- errors
def test_compare_input_errors(world, spikes):
    _, data, fit, model = world
    rec, b, sfit, smodel, _ = spikes
    with pytest.raises(InputError, match="surrogates: expected at least 2 surrogates, got 1"):
        compare(data, model[:1], fit)
    with pytest.raises(InputError, match="surrogates: expected a list"):
        compare(data, model[0], fit)
    with pytest.warns(InputWarning, match="surrogates: 2 surrogates"):
        compare(data, model[:2], fit, refit=False, n_boot=2)
    renamed = switching_counts(np.ones((S, N)), seed=1)
    renamed.unit_ids = ["u" + u for u in renamed.unit_ids]
    with pytest.raises(InputError, match=r"surrogates\[1\]: unit ids differ .*column 0"):
        compare(data, [model[0], renamed], fit)
    coarse = switching_counts(np.ones((S, N)), seed=1)
    coarse.bin_size = 0.04
    with pytest.raises(InputError, match=r"surrogates\[0\]: bin_size 0.04 s differs"):
        compare(data, [coarse, model[0]], fit)
    fewer = model[0].subset_trials(np.arange(10))
    with pytest.raises(InputError, match="has 10 trials, the data 40"):
        compare(data, [model[0], fewer], fit)
    shorter = switching_counts(np.ones((S, N)), seed=1)
    shorter.n_valid = shorter.n_valid.copy()
    shorter.n_valid[3] = 50
    with pytest.raises(InputError, match="trial 3 has 50 bins, the data 100"):
        compare(data, [model[0], shorter], fit)
    with pytest.raises(InputError, match=r"nulls\['shuffle'\]: expected at least 2"):
        compare(data, model[:2], fit, nulls={"shuffle": model[:1]})
    with pytest.raises(InputError, match="nulls: expected a dict"):
        compare(data, model[:2], fit, nulls=model[:2])
    with pytest.raises(InputError, match="trials: position 40 is outside 0..39"):
        compare(data, model[:2], fit, trials=[1, 40])
    with pytest.raises(InputError, match="trials: positions repeat"):
        compare(data, model[:2], fit, trials=[1, 1, 2])
    with pytest.raises(InputError, match="trials: expected at least 2 held-out trials"):
        compare(data, model[:2], fit, trials=[3])
    with pytest.raises(InputError, match="trials: a boolean mask needs 40 entries"):
        compare(data, model[:2], fit, trials=np.ones(5, bool))
    with pytest.raises(InputError, match="state_fit: expected a fitted state model"):
        compare(data, model[:2], object())
    with pytest.raises(InputError, match=r"state_fit: rates_hz has shape \(3, 12\)"):
        compare(data, model[:2], sfit)
    with pytest.raises(InputError, match="refit: expected True, False or a callable"):
        compare(data, model[:2], fit, refit="yes")
    with pytest.raises(InputError, match="condition: label column 'side' not found"):
        compare(data, model[:2], fit, condition="side")
    with pytest.raises(InputError, match="data: expected the data's BinnedCounts"):
        compare(rec, smodel[:2], sfit)
    with pytest.raises(InputError, match="recording: expected the data's Recording"):
        compare(b, smodel[:2], sfit, recording=b)
    with pytest.raises(InputError, match=r"surrogates\[0\]: .*unit '0' of the data is "
                                         "missing"):
        compare(b, [smodel[0].select_units(np.arange(1, 12)), smodel[1]], sfit)
    with pytest.raises(InputError, match=r"surrogates\[1\]: expected a Recording or "
                                         "BinnedCounts, got str"):
        compare(b, [smodel[0], "x"], sfit)
    with pytest.raises(InputError, match="alpha: expected a number strictly between"):
        compare(data, model[:2], fit, alpha=0.0)
    with pytest.raises(InputError, match="n_boot: expected a whole number >= 1"):
        compare(data, model[:2], fit, n_boot=0)
    with pytest.raises(InputError, match="count_window_s: expected a finite number > 0"):
        compare(data, model[:2], fit, count_window_s=0)
    with pytest.raises(InputError, match="observed: expected one flag per duration"):
        logrank_test([1, 2], [1], [1], [1])


def test_reference_quantile_is_the_monte_carlo_critical_value():
    # Monte Carlo test (Davison & Hinkley 1997, section 4.2): with B exchangeable values
    # the k-th smallest, k = ceil(0.95 (B + 1)), is exceeded with probability
    # (B + 1 - k) / (B + 1) <= 0.05. B = 19 or 20 -> the largest; B = 99 -> the 95th.
    from attractorfit.compare import reference_quantile

    r = np.arange(1.0, 21.0)
    assert reference_quantile(r) == 20.0
    assert reference_quantile(r[:19]) == 19.0
    assert reference_quantile(np.arange(1.0, 100.0)) == 95.0
    assert reference_quantile(np.arange(1.0, 100.0), upper=False) == 5.0
    assert reference_quantile(r[:5]) == 5.0                       # clipped to B
    assert np.isnan(reference_quantile([np.nan]))
    # exchangeable draws: the data exceed the critical value in <= 5% of repetitions
    rng = np.random.default_rng(0)
    x = rng.standard_normal((4000, 21))
    crit = np.array([reference_quantile(row[1:]) for row in x])
    rate = np.mean(x[:, 0] > crit)
    # exact rate 1/21 = 0.0476; binomial s.e. over 4000 repetitions 0.0034
    assert abs(rate - 1 / 21) < 0.012


def test_weighted_pools_equal_explicit_pooling():
    # The fast pooled KS and log-rank (cumulative counts x weights) against the plain
    # functions on explicitly concatenated samples (ks_statistic and logrank_test are
    # checked against SciPy above).
    from attractorfit.compare import _PooledDurations, _PooledValues

    rng = np.random.default_rng(3)
    vals = [np.round(rng.normal(size=rng.integers(5, 30)), 1) for _ in range(6)]
    durs = [np.round(rng.exponential(1.0, rng.integers(3, 20)), 1) + 0.1 for _ in range(6)]
    obs = [rng.random(d.size) < 0.7 for d in durs]
    pv, pd = _PooledValues(vals), _PooledDurations(durs, obs)
    target = np.round(rng.normal(0.2, 1.0, size=25), 1)
    t_d = np.round(rng.exponential(1.2, 15), 1) + 0.1
    t_o = rng.random(15) < 0.8
    for w in (np.ones(6, int), np.array([0, 2, 1, 0, 3, 0]), np.array([1, 0, 0, 0, 0, 5])):
        pooled = np.concatenate([np.tile(v, k) for v, k in zip(vals, w)])
        assert pv.ks(w, target) == pytest.approx(ks_statistic(target, pooled), abs=1e-12)
        d = np.concatenate([np.tile(x, k) for x, k in zip(durs, w)])
        o = np.concatenate([np.tile(x, k) for x, k in zip(obs, w)])
        assert pd.logrank(w, t_d, t_o).statistic == pytest.approx(
            logrank_test(t_d, t_o, d, o).statistic, rel=1e-12)
        np.testing.assert_array_equal(np.sort(pd.arrays(w)[0]), np.sort(d))
