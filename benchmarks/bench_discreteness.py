"""Calibration, power and speed of the discreteness test.

Prints:
1. time of one evaluation of the statistic on 50 units x 100 trials x 3 s (50 ms bins)
   and of fitting the null, single-threaded BLAS;
2. false-positive rate at alpha = 0.05 and a Kolmogorov-Smirnov test of uniformity of
   the p-values over datasets from the nominal null family (condition PSTHs, a 2-D
   Ornstein-Uhlenbeck latent on log-rates, slow drift, Poisson spiking);
3. false-positive rates on continuous truths the null does not describe exactly;
4. power on switching recordings.

Every dataset gets its own full test: the null is fitted to it, B surrogates are
simulated and the statistic (with its choice of the number of states) is rerun on
each. Scenario sizes (stated in the output): 40 units, 60 trials of 2 s, 50 ms bins,
B = 39 surrogates (p-values are multiples of 1/40, so P(p <= 0.05) = 2/40 exactly
under exchangeability).

Usage: python benchmarks/bench_discreteness.py [--quick] [--n-null 200] [--n-other 40]
Run it with one process (BLAS threads pinned to 1 here).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")

import numpy as np  # noqa: E402
from scipy import stats  # noqa: E402

from attractorfit import bin_spikes  # noqa: E402
from attractorfit.states._discreteness import (discreteness_statistic,  # noqa: E402
                                               discreteness_test, fit_continuous_null)
from attractorfit.synthetic import (continuous_latent_recording,  # noqa: E402
                                    switching_recording)

BIN = 0.05
SIZE = dict(n_units=40, n_trials=60, trial_duration=2.0)


def scenario(name, seed):
    """(recording, condition column) of one dataset of a named scenario."""
    if name == "null":
        rec, _ = continuous_latent_recording(**SIZE, n_latents=2, drift=0.3, n_conditions=2,
                                             psth_modulation=0.3, rng=seed)
        return rec, "item"
    if name == "regular_spiking_2d":
        rec, _ = continuous_latent_recording(**SIZE, n_latents=2, gamma_order=2.0, rng=seed)
    elif name == "heavy_latent":
        rec, _ = continuous_latent_recording(**SIZE, latent_dist="heavy", rng=seed)
    elif name == "softplus_link":
        rec, _ = continuous_latent_recording(**SIZE, link="softplus", rng=seed)
    elif name == "overdispersed":
        rec, _ = continuous_latent_recording(**SIZE, gamma_order=0.5, rng=seed)
    elif name == "strong_drift":
        rec, _ = continuous_latent_recording(**SIZE, drift=1.0, rng=seed)
    elif name == "switching":
        rec, _ = switching_recording(**SIZE, n_states=4, mean_dwell_s=0.3, modulation=0.6,
                                     gamma_order=2.0, rng=seed)
    elif name == "switching_weak":
        rec, _ = switching_recording(**SIZE, n_states=4, mean_dwell_s=0.3, modulation=0.3,
                                     gamma_order=2.0, rng=seed)
    else:
        raise ValueError(name)
    return rec, None


DESCRIPTIONS = {
    "null": "nominal null: 2 conditions with PSTHs (log-rate bumps x0.3), 2-D OU latent "
            "(tau 0.3 s, loadings s.d. 0.6), drift 0.3, Poisson spiking",
    "regular_spiking_2d": "2-D OU latent, gamma-2 (regular) spiking",
    "heavy_latent": "1-D heavy-tailed latent (sign(z)|z|^1.5), Poisson spiking",
    "softplus_link": "1-D OU latent through a softplus link, Poisson spiking",
    "overdispersed": "1-D OU latent, gamma-0.5 (bursty, over-dispersed) spiking",
    "strong_drift": "1-D OU latent, drift 1.0 log units across the session",
    "switching": "4 states, 0.3 s mean dwell (gamma-2 dwells), modulation 0.6, "
                 "gamma-2 spiking",
    "switching_weak": "as switching but modulation 0.3",
}


def run(name, n, n_boot, seed0):
    ps, ts = [], []
    t0 = time.time()
    for k in range(n):
        rec, cond = scenario(name, seed0 + k)
        b = bin_spikes(rec, bin_size=BIN)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = discreteness_test(b, n_boot=n_boot, condition=cond, rng=seed0 + k)
        ps.append(r.p_value)
        ts.append(r.verdict)
    ps = np.array(ps)
    rej = float(np.mean(ps <= 0.05))
    ks = stats.kstest(ps, "uniform")
    verdicts = {v: ts.count(v) for v in ("discrete", "not_discrete", "inconclusive")}
    print(f"{name:20s} n={n:4d} B={n_boot}  P(p<=0.05)={rej:.3f}  mean p={ps.mean():.3f}  "
          f"KS vs U(0,1): D={ks.statistic:.3f} p={ks.pvalue:.3g}  verdicts={verdicts}  "
          f"[{time.time() - t0:.0f} s]", flush=True)
    return ps


def timing():
    rec, _ = continuous_latent_recording(n_units=50, n_trials=100, trial_duration=3.0,
                                         n_latents=2, rng=0)
    b = bin_spikes(rec, bin_size=BIN)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        discreteness_statistic(b, n_dims=3, rng=0)   # compile
        t = time.time()
        for i in range(5):
            discreteness_statistic(b, n_dims=3, rng=i)
        stat_s = (time.time() - t) / 5
        t = time.time()
        null = fit_continuous_null(b, n_dims=3)
        fit_s = time.time() - t
        t = time.time()
        for i in range(5):
            null.simulate(i)
        sim_s = (time.time() - t) / 5
    print(f"timing (50 units x 100 trials x 3 s, 50 ms bins, {b.total_bins} bins, K = 3, "
          f"S = 1..8): statistic {stat_s:.3f} s, null fit {fit_s:.3f} s, one surrogate "
          f"{sim_s:.3f} s", flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--n-null", type=int, default=200)
    ap.add_argument("--n-other", type=int, default=40)
    ap.add_argument("--n-boot", type=int, default=39)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    if args.quick:
        args.n_null, args.n_other = 10, 5
    print("discreteness test benchmark; sizes: 40 units, 60 trials x 2 s, 50 ms bins; "
          "alpha = 0.05", flush=True)
    for name, text in DESCRIPTIONS.items():
        print(f"  {name}: {text}")
    timing()
    run("switching", args.n_other, args.n_boot, 10_000)
    run("null", args.n_null, args.n_boot, 20_000)
    for name in ("regular_spiking_2d", "heavy_latent", "softplus_link", "overdispersed",
                 "strong_drift"):
        run(name, args.n_other, args.n_boot, 30_000 + 1000 * len(name))
    run("switching_weak", args.n_other, args.n_boot, 40_000)
    return 0


if __name__ == "__main__":
    sys.exit(main())
