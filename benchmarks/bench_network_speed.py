"""Speed and memory of the compiled low-rank LIF simulator.

Prints:
1. neuron-steps per second on one core, with noise, N >= 1000, K <= 16 (per wall second
   and per CPU second: on a shared machine the CPU figure is the work rate of one core);
2. the same model simulated by a straightforward dense-weight numpy loop (W = E D formed
   as an N x N matrix), measured in the same run, and the speed ratio;
3. peak memory of a 100,000-neuron rank-8 network (measured in a fresh subprocess with
   resource.getrusage; a dense W would need 80 GB);
4. cost per step at three sizes (linear growth in N).

Run: python benchmarks/bench_network_speed.py   (about a minute)
"""

import os

os.environ.setdefault("NUMBA_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import math  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from attractorfit.network import LowRankNetwork  # noqa: E402


def make_network(n, k, seed=0):
    """Random rank-k network firing irregularly at about 10-15 Hz."""
    rng = np.random.default_rng(seed)
    enc = rng.normal(0, 0.3, size=(n, k))
    dec = rng.normal(0, 1.0 / n, size=(k, n))
    return LowRankNetwork(enc, dec, bias=0.7, noise=0.5, tau_s=0.01)


def time_compiled(net, duration, dt=1e-4, repeats=3):
    """Best wall time and best CPU time (process_time) of ``repeats`` runs."""
    net.simulate(0.01, dt=dt, seed=0)  # compile (or load the cache)
    best, best_cpu = np.inf, np.inf
    for r in range(repeats):
        t0, c0 = time.perf_counter(), time.process_time()
        res = net.simulate(duration, dt=dt, seed=r)
        best = min(best, time.perf_counter() - t0)
        best_cpu = min(best_cpu, time.process_time() - c0)
    steps = int(round(duration / dt))
    return best, best_cpu, steps, res


def dense_numpy(net, duration, dt=1e-4, seed=0):
    """The same model with the dense weight matrix W = E D (baseline)."""
    rng = np.random.default_rng(seed)
    n = net.n_neurons
    w = net.encoder @ net.decoder                      # N x N
    a = math.exp(-dt / net.tau_m)
    b = math.exp(-dt / net.tau_s)
    coef = net.noise * math.sqrt((1 - a * a) / 2)
    n_ref = int(round(net.refractory / dt))
    v = net.reset + (net.threshold - net.reset) * rng.random(n)
    trace = np.zeros(n)                                # per-neuron filtered spikes: y = D trace
    refr = np.zeros(n, dtype=int)
    steps = int(round(duration / dt))
    count = 0
    t0, c0 = time.perf_counter(), time.process_time()
    for _ in range(steps):
        inp = net.bias + w @ trace
        new_v = inp + (v - inp) * a + coef * rng.standard_normal(n)
        free = refr == 0
        refr[~free] -= 1
        v = np.where(free, new_v, net.reset)
        fired = free & (v >= net.threshold)
        v[fired] = net.reset[fired]
        refr[fired] = n_ref
        trace *= b
        trace[fired] += 1.0
        count += int(fired.sum())
    return (time.perf_counter() - t0, time.process_time() - c0, steps,
            count / (n * steps * dt))


MEMORY_CHILD = r"""
import os, resource, sys, time
os.environ["NUMBA_NUM_THREADS"] = "1"
import numpy as np
from attractorfit.network import LowRankNetwork
n, k = 100_000, 8
rng = np.random.default_rng(0)
net = LowRankNetwork(rng.normal(0, 0.3, (n, k)), rng.normal(0, 1.0 / n, (k, n)), bias=0.7,
                     noise=0.5, tau_s=0.01)
LowRankNetwork(np.zeros((2, 1)), np.zeros((1, 2)), bias=0.7, noise=0.5).simulate(0.01, seed=0)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
t0 = time.perf_counter()
res = net.simulate(0.2, seed=1)
el = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
spikes = sum(len(t) for t in res.spike_times)
print(f"{before:.0f} {peak:.0f} {el:.2f} {spikes}")
"""


def main():
    print(f"machine load average (1 min) at start: {os.getloadavg()[0]:.1f} on "
          f"{os.cpu_count()} cores (other jobs slow every figure below)")
    print("== one core (NUMBA_NUM_THREADS=1), dt = 1e-4 s, noise 0.5 ==")
    for n, k, dur in ((2000, 8, 2.0), (1000, 16, 2.0)):
        net = make_network(n, k)
        el, cpu, steps, res = time_compiled(net, dur)
        rate = np.mean(res.rates_hz)
        nps, nps_cpu = n * steps / el, n * steps / cpu
        print(f"compiled    N={n:6d} K={k:2d}: {nps:.3g} neuron-steps per wall second, "
              f"{nps_cpu:.3g} per CPU second ({steps} steps; mean rate {rate:.1f} Hz)")
        d_el, d_cpu, d_steps, d_rate = dense_numpy(net, 0.2)
        d_nps, d_nps_cpu = n * d_steps / d_el, n * d_steps / d_cpu
        print(f"dense numpy N={n:6d} K={k:2d}: {d_nps:.3g} neuron-steps per wall second, "
              f"{d_nps_cpu:.3g} per CPU second (W = E D as {n}x{n}; mean rate "
              f"{d_rate:.1f} Hz)")
        print(f"  -> compiled is {nps / d_nps:.1f}x faster (wall), "
              f"{nps_cpu / d_nps_cpu:.1f}x (CPU)")

    print("\n== 100,000 neurons, rank 8, 0.2 s (fresh subprocess) ==")
    out = subprocess.run([sys.executable, "-c", MEMORY_CHILD], capture_output=True, text=True,
                         check=True).stdout.split()
    before, peak, el, spikes = float(out[0]), float(out[1]), float(out[2]), int(out[3])
    print(f"peak RSS {peak:.0f} MB (after import and compilation: {before:.0f} MB); "
          f"{el:.2f} s, {spikes} spikes; a dense W would need "
          f"{100_000 ** 2 * 8 / 1e9:.0f} GB")

    print("\n== cost per step vs N (K = 8) ==")
    for n in (10_000, 30_000, 100_000):
        net = make_network(n, 8)
        el, cpu, steps, _ = time_compiled(net, 0.1, repeats=2)
        print(f"N={n:7d}: {el / steps * 1e6:8.1f} us per step (wall), "
              f"{cpu / steps * 1e6:8.1f} us (CPU); {cpu / steps / n * 1e9:5.2f} ns per "
              "neuron-step (CPU)")
    print(f"machine load average (1 min) at end: {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
