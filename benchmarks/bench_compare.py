"""Benchmark of the model-vs-data comparison: calibration, power and run time.

Calibration: data and 20 "model" surrogates drawn from one hidden switching process
(count-level semi-Markov switching among states with Poisson counts; not our network).
The state model is fitted on the data, the comparison runs on the held-out half of the
trials. Under this null each statistic should be flagged ("not consistent with the
model") in about 5% of datasets (the rule is the 95th / 5th percentile of the
leave-one-out reference).

Power: the same, with the surrogates from a different process (dwell times 3x shorter;
other state rate modulation; one state entered far more often).

Run time: a 64-unit, 7-minute recording (140 trials of 3 s, 20 ms bins, 5 states) with
20 spike-level surrogates, decoded, and with refitted states.

Usage: python benchmarks/bench_compare.py [n_datasets]   (default 40)
"""

import sys
import time
import warnings

import numpy as np

from attractorfit.binning import bin_spikes
from attractorfit.compare import compare
from attractorfit.errors import InputWarning
from attractorfit.states import analyse_states
from attractorfit.synthetic import state_rate_vectors, switching_recording
from attractorfit.synthetic import switching_counts as _switching_counts

DT = 0.02


def switching_counts(rates_hz, *, seed, n_trials, n_bins, **kw):
    return _switching_counts(rates_hz, n_trials=n_trials, n_bins=n_bins, bin_size=DT,
                             rng=seed, **kw)


def run_scenarios(n_datasets):
    S, N, T, BINS, B = 3, 30, 60, 100, 20
    names = None
    flags = {k: [] for k in ("same", "dwell", "rates", "occupancy")}
    t0 = time.perf_counter()
    for seed in range(n_datasets):
        rates = state_rate_vectors(S, N, rate_range=(5.0, 30.0), modulation=0.6,
                                   rng=1000 + seed)
        other = state_rate_vectors(S, N, rate_range=(5.0, 30.0), modulation=0.6,
                                   rng=5000 + seed)
        other = other / other.mean(axis=0) * rates.mean(axis=0)
        data = switching_counts(rates, seed=seed, n_trials=T, n_bins=BINS)
        fit = analyse_states(data, n_states=S, latent_dims=2, rng=seed)
        held = np.arange(1, T, 2)
        variants = {
            "same": dict(rates_hz=rates),
            "dwell": dict(rates_hz=rates, mean_dwell_s=0.4 / 3),
            "rates": dict(rates_hz=other),
            "occupancy": dict(rates_hz=rates, switch_weights=[[0, 1, 1], [4, 0, 1], [4, 1, 0]]),
        }
        for key, kw in variants.items():
            model = [switching_counts(seed=10_000 * (seed + 1) + 100 * len(key) + b,
                                      n_trials=T, n_bins=BINS, **kw) for b in range(B)]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", InputWarning)
                c = compare(data, model, fit, trials=held, refit=False, n_boot=50,
                            rng=seed)
            names = list(c.metrics)
            flags[key].append([c.metrics[n].consistent is False for n in names])
    dt = time.perf_counter() - t0
    print(f"{n_datasets} datasets x 4 scenarios ({S} states, {N} units, {T} trials of "
          f"{BINS * DT:g} s, held-out half, {B} surrogates): {dt:.0f} s")
    print(f"{'statistic':28s}" + "".join(f"{k:>11s}" for k in flags))
    for j, n in enumerate(names):
        row = "".join(f"{np.mean([f[j] for f in flags[k]]):11.3f}" for k in flags)
        print(f"{n:28s}{row}")
    print("(fraction of datasets flagged 'not consistent with the model'; column 'same' "
          "is the false-alarm rate, nominal 0.05)")


def run_timing():
    S, N, T = 5, 64, 140
    rates = state_rate_vectors(S, N, rate_range=(2.0, 25.0), modulation=0.6, rng=1)
    kw = dict(n_units=N, n_states=S, n_trials=T, trial_duration=3.0, state_rates_hz=rates,
              start_states=np.arange(T) % S, labels={"item": np.arange(T) % S})
    t0 = time.perf_counter()
    rec, _ = switching_recording(rng=0, **kw)
    sur = [switching_recording(rng=1 + i, **kw)[0] for i in range(20)]
    t_gen = time.perf_counter() - t0
    b = bin_spikes(rec, bin_size=DT)
    t0 = time.perf_counter()
    fit = analyse_states(b, n_states=S, rng=0)
    t_fit = time.perf_counter() - t0
    held = np.arange(1, T, 2)
    for refit in (False, True):
        t0 = time.perf_counter()
        c = compare(b, sur, fit, recording=rec, trials=held, refit=refit, n_boot=500,
                    condition="item", rng=0)
        dt = time.perf_counter() - t0
        print(f"64 units, 7 min (140 x 3 s), 20 spike-level surrogates, refit={refit}: "
              f"compare {dt:.1f} s (surrogate generation {t_gen:.1f} s, state fit "
              f"{t_fit:.1f} s, not included); occupancy_tvd "
              f"{c.metrics['occupancy_tvd'].value:.3f} (ref95 "
              f"{c.metrics['occupancy_tvd'].ref:.3f}), rate_r2 "
              f"{c.metrics['rate_r2'].value:.3f} (ref05 {c.metrics['rate_r2'].ref:.3f})")


if __name__ == "__main__":
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 40
    run_scenarios(n)
    run_timing()
