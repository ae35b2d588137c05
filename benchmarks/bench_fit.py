"""Benchmark: fitting a low-rank LIF network to states of switching recordings.

The recordings come from ``synthetic.switching_recording``: a hidden semi-Markov switch
among S discrete states (gamma dwell times, mean 0.3 s, uniform jumps) with gamma-renewal
spiking of order 2 and random log-normal state modulation. This is NOT our network
model, and the state rates are not additive on a hypercube.

For every recording the states are fitted with the true number of states
(``analyse_states(n_states=S)``, so that the figures are about the network fit), then
the network is fitted with several settings, one surrogate recording of the data's size
is simulated, binned like the data and decoded with the data's state model, and we
print:

* ``tvd``       occupancy total variation distance, surrogate vs data (target <= 0.05);
* ``tvd_ref``   the same between two independent surrogates of the fitted network (the
                sampling floor for this recording size, DESIGN Amendment 5);
* ``rate_r2``   per-unit x per-state rates (posterior-weighted, per unit centred),
                surrogate vs data (target >= 0.9);
* ``dwell``     pooled Kaplan-Meier mean dwell time, surrogate / data (target within 10%);
* ``unstable``  vertices that are not stable fixed points; ``spur`` spurious attractors;
* ``t_fit``     seconds to fit, wall clock, and ``t_cpu`` CPU seconds (one thread; the
                wall time grows when other processes share the cores).

Run:  python benchmarks/bench_fit.py [--quick]
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from attractorfit.binning import bin_spikes  # noqa: E402
from attractorfit.fit import _pooled_dwell, _tvd, centred_rate_r2, fit_network  # noqa: E402
from attractorfit.states import analyse_states  # noqa: E402
from attractorfit.synthetic import switching_recording  # noqa: E402

SCENARIOS = [  # (units, states, minutes, seed)
    (64, 3, 7, 1),
    (64, 4, 7, 2),
    (50, 5, 5, 3),
    (80, 6, 8, 4),
    (64, 8, 7, 5),
    (100, 8, 10, 6),
]
SETTINGS = [  # (name, options)
    ("pinv", dict(rule="pseudoinverse")),
    ("opt", dict(rule="optimized")),
    ("opt-full", dict(rule="optimized", rank="full")),
]


def _state_rates(binned, decoding):
    num = 0.0
    den = 0.0
    for p, x in zip(decoding.posteriors, binned.sequences(dtype=np.float64)):
        num = num + np.asarray(p).T @ x
        den = den + np.asarray(p).sum(axis=0)
    return num / den[:, None] / binned.bin_size


def evaluate(fit, binned, sf, seed):
    data = sf.decoding
    sur = [bin_spikes(fit.simulate_recording(rng=seed + i), bin_size=binned.bin_size)
           for i in range(2)]
    dec = [sf.decode(s) for s in sur]
    tvd = _tvd(dec[0].occupancy, data.occupancy)
    ref = _tvd(dec[0].occupancy, dec[1].occupancy)
    r2 = centred_rate_r2(_state_rates(binned, data), _state_rates(sur[0], dec[0]))
    dwell = _pooled_dwell(dec[0]) / _pooled_dwell(data)
    return tvd, ref, r2, dwell, dec[0].unassigned_fraction


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="first two scenarios only")
    args = ap.parse_args(argv)
    scenarios = SCENARIOS[:2] if args.quick else SCENARIOS
    print(f"{'N':>4} {'S':>2} {'min':>3} {'setting':>8} {'K':>2} {'tau_s':>7} {'noise':>6} "
          f"{'tvd':>6} {'tvd_ref':>7} {'rate_r2':>7} {'dwell':>6} {'unas':>5} "
          f"{'unstable':>8} {'spur':>4} {'sims':>4} {'t_fit':>6} {'t_cpu':>6}")
    rows = []
    for n_units, n_states, minutes, seed in scenarios:
        n_trials = int(round(minutes * 60 / 3.0))
        rec, _ = switching_recording(n_units=n_units, n_states=n_states, n_trials=n_trials,
                                     trial_duration=3.0, rng=seed)
        binned = bin_spikes(rec, bin_size=0.02)
        sf = analyse_states(binned, n_states=n_states, rng=seed)
        for name, opts in SETTINGS:
            if name == "opt-full" and n_states * n_states > n_units:
                print(f"{n_units:>4} {n_states:>2} {minutes:>3} {name:>8}  skipped: "
                      f"S (1 + K) = {n_states * n_states} constraints for {n_units} neurons")
                continue
            t0, c0 = time.perf_counter(), time.process_time()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fit = fit_network(binned, sf, recording=rec, rng=seed, **opts)
            t_fit, t_cpu = time.perf_counter() - t0, time.process_time() - c0
            tvd, ref, r2, dwell, unas = evaluate(fit, binned, sf, 1000 + seed)
            rows.append((n_units, n_states, name, tvd, ref, r2, dwell, t_fit,
                         len(fit.unstable_vertices), t_cpu))
            print(f"{n_units:>4} {n_states:>2} {minutes:>3} {name:>8} {fit.rank:>2} "
                  f"{fit.tau_s:7.4f} {fit.noise:6.3f} {tvd:6.3f} {ref:7.3f} {r2:7.3f} "
                  f"{dwell:6.3f} {unas:5.2f} {len(fit.unstable_vertices):>8} "
                  f"{len(fit.spurious_points):>4} {fit.n_simulations:>4} {t_fit:6.1f} "
                  f"{t_cpu:6.1f}",
                  flush=True)
    print()
    for name, _ in SETTINGS:
        sel = [r for r in rows if r[2] == name]
        if not sel:
            continue
        tvd = np.array([r[3] for r in sel])
        r2 = np.array([r[5] for r in sel])
        dw = np.array([r[6] for r in sel])
        print(f"{name:>8}: tvd<=0.05 in {np.sum(tvd <= 0.05)}/{len(sel)} "
              f"(median {np.median(tvd):.3f}); "
              f"rate_r2>=0.9 in {np.sum(r2 >= 0.9)}/{len(sel)} (median {np.median(r2):.3f}); "
              f"dwell within 10% in {np.sum(np.abs(dw - 1) <= 0.1)}/{len(sel)}; "
              f"all vertices stable in {sum(r[8] == 0 for r in sel)}/{len(sel)}")
    t64 = [(r[2], r[7], r[9]) for r in rows if r[0] == 64 and r[1] == 4]
    if t64:
        print("time to fit a 64-unit, 7-minute recording (4 states), wall / CPU: "
              + ", ".join(f"{name} {t:.1f} s / {c:.1f} s" for name, t, c in t64))
    print(f"load average at the end: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
