"""Capacity of the low-rank LIF attractor network for the three decoder rules.

Claim under test (common practice, no published source in the project): with patterns
sharing about half their active neurons, the spiking network stores about 0.3 N patterns
with the pseudo-inverse rule and about 0.5 N with the optimized rule, while a plain
Hebbian decoder does not hold patterns precisely.

Protocol (fixed here; see attractorfit.network.capacity_sweep):
* patterns: P random binary rate patterns, coding level 0.5 (two random patterns share
  about half their active neurons), rates 0.5 Hz / 40 Hz, each at a random vertex of its
  own P-dimensional cube (rank-P network, encoder solved so the rates are exact);
* neurons: LIF, tau_m 20 ms, refractory 2 ms, threshold 1, reset 0, bias 1, membrane
  noise 0.2 (Siegert convention), readout tau_s 50 ms, transfer at dt = 1e-4;
* retrieval: start from the readout of a pattern with 10% of the neurons given a random
  neuron's rate; run 40 tau_s (rate picture) or 0.4 s (spiking, counts of the last 40%);
  overlap = cosine of the end rates with the pattern, both centred on the mean pattern;
  capacity = load P/N where the mean overlap first drops below 0.9 (interpolated);
  rate-picture rows average 3 independent networks where cheap (1 otherwise);
* a second protocol with a fixed rank (K = 8 random Gaussian encoder, random vertices)
  is shown for contrast.

Run: python benchmarks/bench_capacity.py   (a few minutes on 2 shared cores)
"""

import os

os.environ.setdefault("NUMBA_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import time  # noqa: E402

import numpy as np  # noqa: E402

from attractorfit.network import capacity_sweep  # noqa: E402


def show(res, seconds):
    cap = "beyond the loads tried" if np.isnan(res.capacity) else f"{res.capacity:.2f} N"
    print(f"\n{res.rule} ({res.patterns} patterns, {res.method}; {seconds:.0f} s): "
          f"capacity {cap}; shared active fraction {res.shared_active:.2f}")
    print("  load  P    K  overlap recalled held  residual  margin reached noise/spacing")
    for i, load in enumerate(res.loads):
        print(f"  {load:4.2f} {res.n_patterns[i]:3d} {res.n_dims[i]:4d} "
              f"{res.mean_overlap[i]:7.3f} {res.fraction_recalled[i]:8.2f} "
              f"{res.fraction_held[i]:4.2f} {res.residual[i]:9.2e} "
              f"{res.median_margin[i]:7.3f} {str(bool(res.margin_reached[i])):7s} "
              f"{res.noise_ratio[i]:6.3f}")


def run(n, loads, **kw):
    t0 = time.perf_counter()
    res = capacity_sweep(n, loads, rng=kw.pop("rng", 0), **kw)
    show(res, time.perf_counter() - t0)
    return res


def main():
    t_start = time.perf_counter()
    loads = [0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8]
    print("== rate picture, binary patterns, N = 100 ==")
    run(100, loads, rule="hebbian", n_repeats=3)
    run(100, loads, rule="pseudoinverse", n_repeats=3)
    print("\n== rate picture, binary patterns, N = 60 (optimized rule, margin 0.2; its "
          "search grows fast with P) ==")
    run(60, [0.1, 0.2, 0.3, 0.4, 0.5], rule="pseudoinverse", rng=1)
    run(60, [0.1, 0.2, 0.3, 0.4], rule="optimized", rng=1)
    print("\n== spiking network, binary patterns, N = 200, 0.4 s per start ==")
    run(200, [0.1, 0.2, 0.3, 0.35, 0.4, 0.5, 0.6], rule="pseudoinverse", method="spiking",
        n_starts=1, duration=0.4)
    run(200, [0.1, 0.2], rule="hebbian", method="spiking", n_starts=1, duration=0.4)
    print("\n== spiking network, binary patterns, N = 60 (pseudo-inverse and optimized on "
          "the same networks) ==")
    run(60, [0.2, 0.3, 0.4], rule="pseudoinverse", method="spiking", n_starts=1,
        duration=0.4, rng=1)
    run(60, [0.2, 0.3, 0.4], rule="optimized", method="spiking", n_starts=1,
        duration=0.4, rng=1)
    print("\n== contrast: fixed rank K = 8, Gaussian encoder, random vertices, N = 100 ==")
    run(100, [0.05, 0.1, 0.2, 0.3], rule="pseudoinverse", patterns="vertices", n_dims=8,
        gain=0.6, noise=0.5, n_repeats=3)
    run(100, [0.05, 0.1, 0.2], rule="optimized", patterns="vertices", n_dims=8, gain=0.6,
        noise=0.5)
    print(f"\ntotal {time.perf_counter() - t_start:.0f} s")


if __name__ == "__main__":
    main()
