"""Calibration and power of the lab checks (DESIGN Amendment 7) on invented data.

Claims under test:
* end-of-window decoding: with labels unrelated to the state, p <= 0.05 in about 5% of
  datasets for balanced accuracy and for plain accuracy, also when one label value is
  common (80/20), while plain accuracy itself then sits far from the majority rate;
* state drift: on stationary sessions whose states last many bins, the trial-permutation
  p-value holds its level, the chi-square p-value that treats bins as independent does
  not (the report's warning);
* unit drift: BH at 5% keeps the chance of any false discovery in a stationary session
  near 5%, and finds units whose rate changes by 30% over the session.

Protocol (fixed here):
* states: 3 states, 60 trials x 60 bins of 50 ms; each trial a semi-Markov sequence with
  geometric dwells of mean 20 bins, state posteriors 0.9 on the true state; decoded with
  attractorfit.states.decode_posteriors (threshold 0.8);
* decoding: end-of-window posterior over the last 10% of the window, 5 stratified folds,
  B = 99 permutations; labels drawn independently (50/50 or 80/20);
* drift: 3 blocks, B = 99 trial permutations; no condition;
* units: 60 trials x 40 units, Poisson counts in 3 s windows at 2-20 Hz; power with 10
  units ramping linearly by +-15% around their mean (30% first to last).

Run: python benchmarks/bench_lab_checks.py [--reps N]   (about a minute on 2 shared cores)
     python benchmarks/bench_lab_checks.py --demo-cost  (added time of each check on the
     bundled demo recording, CPU beside wall, 3 repetitions)
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from attractorfit.states import decode_end_state, state_drift  # noqa: E402
from attractorfit.states._segments import decode_posteriors  # noqa: E402
from attractorfit.stats import unit_drift  # noqa: E402


def _session(rng, n_trials=60, n_bins=60, n_states=3, mean_dwell=20, p=0.9):
    post = []
    for _ in range(n_trials):
        lab = np.empty(n_bins, dtype=int)
        t, s = 0, rng.integers(n_states)
        while t < n_bins:
            d = rng.geometric(1 / mean_dwell)
            lab[t:t + d] = s
            t += d
            s = (s + rng.integers(1, n_states)) % n_states
        x = np.full((n_bins, n_states), (1 - p) / (n_states - 1))
        x[np.arange(n_bins), lab] = p
        post.append(x)
    return decode_posteriors(post, bin_size=0.05)


def _binomial_band(rate, reps):
    sd = np.sqrt(0.05 * 0.95 / reps)
    return f"{rate:.3f} (nominal 0.05, 95% band {0.05 - 2 * sd:.3f}-{0.05 + 2 * sd:.3f})"


def demo_cost(reps=3):
    """Time each lab check (and its figures) on the demo recording's state fit."""
    import importlib.resources as resources

    from attractorfit import pipeline, plots
    from attractorfit._figures import _lab_sections
    from attractorfit.config import load_config
    from attractorfit.io import load

    data = resources.files("attractorfit.sample_data")
    cfg = load_config(str(data / "demo.toml"))
    rec = load(str(data / "ports_session.nwb"))
    off = {k: dict(v) for k, v in cfg.items()}
    for sec in ("decoding", "robustness", "drift"):
        off[sec]["enabled"] = False
    res = pipeline.run_states(rec, off, seed=0, discreteness=False)

    def clock(f):
        w, c = time.perf_counter(), time.process_time()
        f()
        return time.perf_counter() - w, time.process_time() - c

    def only(name):
        c = {k: dict(v) for k, v in cfg.items()}
        for sec in ("decoding", "robustness", "drift"):
            c[sec]["enabled"] = sec == name
        res.config = c
        return lambda: pipeline.run_lab_checks(res, seed=0)

    def add(blocks, fig, name, caption):
        plots.save_figure(fig, "/tmp/bench_lab_checks_figures", name, formats=("png",),
                          dpi=150)

    labels = None
    for rep in range(reps):
        out = {name: clock(only(name)) for name in ("decoding", "robustness", "drift")}
        res.config = cfg
        pipeline.run_lab_checks(res, seed=0)
        labels = [str(i) for i in range(res.state_fit.n_states)]
        out["figures"] = clock(lambda: _lab_sections(res, labels, add))
        total = sum(c for _, c in out.values())
        print(f"rep {rep}: " + "  ".join(f"{k} wall {w:.2f} s CPU {c:.2f} s"
                                         for k, (w, c) in out.items())
              + f"  | total CPU {total:.2f} s | load {os.getloadavg()[0]:.1f}")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=200)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--demo-cost", action="store_true")
    args = ap.parse_args()
    if args.demo_cost:
        demo_cost()
        return
    rng = np.random.default_rng(args.seed)
    t0, c0 = time.perf_counter(), time.process_time()

    rows = {"bal 50/50": [], "acc 50/50": [], "bal 80/20": [], "acc 80/20": []}
    plain_acc = []
    drift_perm, drift_asym = [], []
    for _ in range(args.reps):
        dec = _session(rng)
        for split in (0.5, 0.8):
            y = np.where(rng.uniform(size=60) < split, "a", "b")
            for score, key in (("balanced_accuracy", "bal"), ("accuracy", "acc")):
                r = decode_end_state(dec, {"y": y}, score=score, n_permutations=99,
                                     rng=rng)["y"]
                rows[f"{key} {int(split * 100)}/{100 - int(split * 100)}"].append(r.p_value)
                if split == 0.8 and score == "accuracy":
                    plain_acc.append(r.value)
        d = state_drift(dec, n_permutations=99, rng=rng)
        drift_perm.append(d.p_value)
        drift_asym.append(d.p_asymptotic)
    print(f"end-of-window decoding, labels unrelated to the states ({args.reps} sessions):")
    for k, v in rows.items():
        print(f"  {k:<10} fraction p <= 0.05: {_binomial_band(np.mean(np.array(v) <= 0.05), args.reps)}")
    print(f"  plain accuracy at 80/20: median {np.median(plain_acc):.2f} (majority rate 0.80)")
    print(f"state occupancy across thirds, stationary sessions ({args.reps}):")
    print(f"  trial-permutation p <= 0.05: {_binomial_band(np.mean(np.array(drift_perm) <= 0.05), args.reps)}")
    print(f"  chi-square p (bins independent) <= 0.05: {np.mean(np.array(drift_asym) <= 0.05):.3f}")

    any_false, found = [], []
    for _ in range(args.reps):
        base = rng.uniform(2, 20, size=40)
        f = np.ones((60, 40))
        f[:, :10] += np.linspace(-0.15, 0.15, 60)[:, None]
        null = unit_drift(rng.poisson(base * 3.0, size=(60, 40)) / 3.0)
        any_false.append(null.drifting.any())
        pw = unit_drift(rng.poisson(base * f * 3.0) / 3.0)
        found.append(pw.drifting[:10].mean())
    print(f"unit drift, 40 units x 60 trials ({args.reps} sessions):")
    print(f"  stationary: fraction of sessions with any drifting unit: "
          f"{_binomial_band(np.mean(any_false), args.reps)}")
    print(f"  10 units changing by 30%: fraction found {np.mean(found):.2f}")
    print(f"time: wall {time.perf_counter() - t0:.1f} s, CPU {time.process_time() - c0:.1f} s")


if __name__ == "__main__":
    main()
