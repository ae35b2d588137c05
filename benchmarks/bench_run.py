"""The whole `attractorfit run` on invented switching recordings of three sizes.

Prints wall time, CPU time and peak memory (max RSS of the child process) of the
complete command (states, discreteness test, network fit, surrogates, nulls,
comparison, figures and report), to show how cost grows with units, trials and
recording length. Recordings come from the semi-Markov switching generator
(gamma-renewal spiking), not from the network model.

    python benchmarks/bench_run.py [--sizes small,medium,large] [--field-steps N]

``--field-steps N`` turns on the opt-in occupancy field (``[network] field_steps``).
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

from attractorfit.io import write_nwb
from attractorfit.synthetic import switching_recording

SIZES = {  # name: (units, trials of 3 s, states)
    "small": (32, 60, 3),
    "medium": (64, 140, 4),     # the 64-unit, 7-minute recording
    "large": (128, 280, 5),
}

CONFIG = """
[analysis]
bin_size = 0.05
condition = "item"
[discreteness]
n_boot = 49
[compare]
n_surrogates = 20
n_null = 10
refit = false
"""


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="small,medium,large")
    ap.add_argument("--field-steps", type=int, default=0)
    args = ap.parse_args()
    tmp = tempfile.mkdtemp(prefix="af-bench-run-")
    cfg = os.path.join(tmp, "bench.toml")
    with open(cfg, "w") as fh:
        fh.write(CONFIG)
        if args.field_steps:
            fh.write(f"[network]\nfield_steps = {args.field_steps}\n")
    print(f"{'size':<8}{'units':>6}{'trials':>7}{'minutes':>8}{'spikes':>9}{'wall s':>8}"
          f"{'cpu s':>8}{'peak MB':>9}  states  occupancy_tvd (ref95)  rate_r2")
    for name in args.sizes.split(","):
        n_units, n_trials, n_states = SIZES[name]
        rec, _ = switching_recording(n_units=n_units, n_states=n_states, n_trials=n_trials,
                                     trial_duration=3.0, mean_dwell_s=0.5, modulation=0.6,
                                     gamma_order=2.0, rng=7,
                                     labels={"item": np.array(list("abcd") *
                                                              (n_trials // 4 + 1))[:n_trials]})
        path = os.path.join(tmp, f"{name}.nwb")
        write_nwb(rec, path)
        out = os.path.join(tmp, f"out_{name}")
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "attractorfit.cli", "run", path, "--out",
                               out, "--config", cfg, "--quiet"], capture_output=True, text=True)
        wall = time.perf_counter() - t0
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        if proc.returncode != 0:
            print(f"{name}: failed: {proc.stderr.strip()[-400:]}")
            continue
        cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
        peak = after.ru_maxrss / 1024.0
        import json

        s = json.load(open(os.path.join(out, "summary.json")))
        c = s["comparison"]
        print(f"{name:<8}{n_units:>6}{n_trials:>7}{n_trials * 3 / 60:>8.1f}{rec.n_spikes:>9}"
              f"{wall:>8.1f}{cpu:>8.1f}{peak:>9.0f}  {s['states']['n_states']:>6}  "
              f"{c['occupancy_tvd']:.3f} ({c['occupancy_tvd_ref95']:.3f})          "
              f"{c['rate_r2']:.3f}", flush=True)
    print(f"load average at the end: {os.getloadavg()[0]:.2f} (2 cores)")


if __name__ == "__main__":
    main()
