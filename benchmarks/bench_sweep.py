"""Sweep on one process, two joblib processes and a two-worker Dask LocalCluster.

Workload (fixed here; change with the options): ``--inputs`` synthetic recordings
(switching among 4 states, gamma spiking) of ``--units`` units and ``--trials`` trials
of 3 s, written as NWB files; ``--states 1:8`` and ``--bootstrap`` replicates, so
inputs x 8 x (bootstrap + 1) tasks, each a Poisson HMM state analysis with 5-fold
held-out likelihood. Every configuration writes into its own fresh folder; the
script prints wall time, CPU time, speed-up over one process (the faster of two
one-process runs, first and last, which also shows the timing noise), and whether
``sweep.csv`` and every task file are byte-identical to the first one-process run.

"cpu workers" is the CPU time of worker processes that have exited (reaped children,
as ``getrusage(RUSAGE_CHILDREN)`` counts them; the Dask scheduler runs in this
process), so "cpu total" is the work done whatever the machine's load, and
"cpu/serial" the parallel overhead (process start, imports, scheduling). The wall
time includes starting the worker processes, which is what a user waits for. The
load average is printed before and after: on a shared machine other work competes
for the cores and lowers the speed-up.

Run: ``python benchmarks/bench_sweep.py [--units 60 --trials 60 --inputs 2 --states 1:8
--bootstrap 1]``
"""

from __future__ import annotations

import argparse
import hashlib
import os
import resource
import shutil
import tempfile
import time

import numpy as np

from attractorfit.io import write_nwb
from attractorfit.sweep import _shutdown_loky, run_sweep
from attractorfit.synthetic import switching_recording


def children_cpu() -> float:
    """User + system CPU seconds of finished (reaped) child processes so far."""
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def digest(folder) -> tuple:
    """(number of files, SHA-256 over every output file's relative path and bytes)."""
    h = hashlib.sha256()
    names = sorted(os.path.relpath(os.path.join(root, f), folder)
                   for root, _, files in os.walk(folder) for f in files
                   if not f.startswith("."))
    for name in names:
        h.update(name.encode() + b"\0")
        with open(os.path.join(folder, name), "rb") as fh:
            h.update(fh.read())
    return len(names), h.hexdigest()


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--units", type=int, default=60)
    ap.add_argument("--trials", type=int, default=60)
    ap.add_argument("--inputs", type=int, default=2)
    ap.add_argument("--states", default="1:8")
    ap.add_argument("--bootstrap", type=int, default=1)
    args = ap.parse_args()
    work = tempfile.mkdtemp(prefix="bench_sweep_")
    try:
        paths = []
        os.makedirs(os.path.join(work, "in"))
        for k in range(args.inputs):
            rec, _ = switching_recording(n_units=args.units, n_states=4, n_trials=args.trials,
                                         trial_duration=3.0, rng=k)
            p = os.path.join(work, "in", f"session{k}.nwb")
            write_nwb(rec, p)
            paths.append(p)
        print(f"cores {os.cpu_count()}, load average before {os.getloadavg()}")
        print(f"workload: {args.inputs} inputs x {args.units} units x {args.trials} trials "
              f"x 3 s, states {args.states}, bootstrap {args.bootstrap}")
        runs = [("1 process", {}), ("2 processes (joblib)", {"jobs": 2}),
                ("LocalCluster 2 workers (Dask)", {"local_cluster": 2}),
                ("1 process (again)", {})]
        results = []
        for label, kw in runs:
            out = os.path.join(work, label.split()[0] + str(len(results)))
            t0, c0, k0 = time.perf_counter(), time.process_time(), children_cpu()
            res = run_sweep(paths, states=args.states, bootstrap=args.bootstrap, out=out,
                            seed=0, **kw)
            wall, cpu = time.perf_counter() - t0, time.process_time() - c0
            _shutdown_loky()
            time.sleep(1.0)  # let the workers exit and be reaped
            kids = children_cpu() - k0
            with open(os.path.join(out, "sweep.csv"), "rb") as fh:
                csv_hash = hashlib.sha256(fh.read()).hexdigest()
            results.append((label, wall, cpu, kids, (csv_hash, digest(out)), len(res.tasks),
                            len(res.failed)))
        ref = results[0]
        serial_wall = min(r[1] for r in results if r[0].startswith("1 process"))
        serial_cpu = min(r[2] + r[3] for r in results if r[0].startswith("1 process"))
        print(f"\n{'configuration':<31}{'tasks':>6}{'wall s':>8}{'cpu main':>9}"
              f"{'cpu workers':>12}{'cpu total':>10}{'speed-up':>9}{'cpu/serial':>11}"
              "  identical to 1 process")
        for label, wall, cpu, kids, files, n, failed in results:
            same = files[1] == ref[4][1]
            csv_same = files[0] == ref[4][0]
            print(f"{label:<31}{n:>6}{wall:>8.1f}{cpu:>9.1f}{kids:>12.1f}{cpu + kids:>10.1f}"
                  f"{serial_wall / wall:>9.2f}{(cpu + kids) / serial_cpu:>11.2f}  "
                  f"sweep.csv {'yes' if csv_same else 'NO'}, all {files[1][0]} files "
                  f"{'yes' if same else 'NO'}" + (f", {failed} failed" if failed else ""))
        print(f"sweep.csv SHA-256 (1 process): {ref[4][0]}")
        print(f"\nload average after {os.getloadavg()}")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
