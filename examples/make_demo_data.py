"""Generate the bundled sample recording (an invented scenario).

A mouse is cued to one of four reward ports (left/right x near/far) and must hold
which one across a 3 s delay before it may respond. About 96 units are recorded at
once from a frontal area. The hidden process is NOT attractorfit's network model: a
semi-Markov switch among four port-related delay states (long dwells in the cued
state, occasional short visits to a wrong state), gamma-renewal spiking (order 2),
a baseline state before the cue and a cue-driven transient. The trial outcome is
"error" when the delay ends in a state other than the cued one (plus a small lapse
rate).

Writes ``sample_data/ports_session.nwb`` and the same data as
``sample_data/ports_spikes.csv`` + ``sample_data/ports_trials.csv``, plus
``sample_data/ports_truth.npz`` (the hidden state sequence, for checks).

Run:  python examples/make_demo_data.py [--out sample_data] [--seed 2026]
"""

from __future__ import annotations

import argparse
import os

import numpy as np

from attractorfit.recording import Recording
from attractorfit.synthetic import gamma_spikes

PORTS = ["left-near", "left-far", "right-near", "right-far"]
FIX, CUE, DELAY, RESP, ITI = 0.5, 0.5, 3.0, 0.5, 1.0


def make_session(*, n_units=96, n_trials=60, seed=2026):
    """Return (Recording, truth dict) for the invented four-port session."""
    rng = np.random.default_rng(seed)
    # delay-state rates: additive in side and distance (a 2-cube) plus a
    # non-additive part, around a log-normal base rate per unit
    base = np.exp(rng.normal(np.log(4.0), 0.6, size=n_units))
    w_side = rng.normal(0.0, 0.45, size=n_units)
    w_dist = rng.normal(0.0, 0.45, size=n_units)
    codes = np.array([[-1, -1], [-1, 1], [1, -1], [1, 1]])  # (side, distance) per port
    extra = rng.normal(0.0, 0.12, size=(4, n_units))
    delay_rates = base * np.exp(codes[:, :1] * w_side + codes[:, 1:] * w_dist + extra)
    baseline = base * np.exp(rng.normal(0.0, 0.15, size=n_units))
    cue_gain = np.exp(rng.normal(0.3, 0.3, size=n_units))

    cued = np.tile(np.arange(4), n_trials // 4 + 1)[:n_trials]
    rng.shuffle(cued)
    trial_len = FIX + CUE + DELAY + RESP
    starts = ITI + np.arange(n_trials) * (trial_len + ITI)
    spikes_t, spikes_u = [], []
    truth_switch, truth_state, outcome = [], [], []
    for k in range(n_trials):
        c = int(cued[k])
        # delay states: semi-Markov, gamma dwells (shape 3)
        t, s = 0.0, c if rng.random() < 0.9 else int(rng.choice([j for j in range(4) if j != c]))
        sw, st = [0.0], [s]
        while True:
            mean = 1.4 if s == c else 0.35
            t += rng.gamma(3.0, mean / 3.0)
            if t >= DELAY:
                break
            if s == c:
                s = int(rng.choice([j for j in range(4) if j != c]))
            else:
                s = c if rng.random() < 0.75 else int(rng.choice([j for j in range(4)
                                                                  if j not in (c, s)]))
            sw.append(t)
            st.append(s)
        truth_switch.append(np.array(sw))
        truth_state.append(np.array(st))
        correct = (st[-1] == c) and rng.random() > 0.05
        outcome.append("correct" if correct else "error")
        t0 = starts[k]
        # segments: fixation (baseline), cue (baseline x cue gain toward the cued
        # state), delay (hidden states), response (baseline)
        edges = [t0, t0 + FIX]
        rates = [baseline, np.sqrt(delay_rates[c] * baseline) * cue_gain]
        for a, state in zip(sw, st):
            edges.append(t0 + FIX + CUE + a)
            rates.append(delay_rates[state])
        edges += [t0 + FIX + CUE + DELAY, t0 + trial_len]
        rates.append(baseline)
        edges = np.array(edges)
        rates = np.array(rates)
        for i in range(n_units):
            tt = gamma_spikes(edges, rates[:, i], order=2.0, rng=rng)
            spikes_t.append(tt)
            spikes_u.append(np.full(tt.size, i))
    trials = {
        "start": starts, "stop": starts + trial_len,
        "cue_on": starts + FIX, "delay_start": starts + FIX + CUE,
        "delay_stop": starts + FIX + CUE + DELAY,
        "port": np.array([PORTS[c] for c in cued]),
        "outcome": np.array(outcome),
    }
    unit_ids = [f"u{i:03d}" for i in range(n_units)]
    times = np.round(np.concatenate(spikes_t), 5)  # 10 us resolution, like a 100 kHz clock
    units = np.array(unit_ids)[np.concatenate(spikes_u)]
    rec = Recording.from_arrays(times, units, unit_ids=unit_ids, trials=trials,
                                metadata={"session": "ports-demo", "subject": "mouse-demo",
                                          "area": "frontal (invented)"},
                                source="ports_session")
    truth = {"delay_rates_hz": delay_rates, "codes": codes, "cued": cued}
    for k in range(n_trials):
        truth[f"switch_{k}"] = truth_switch[k]
        truth[f"state_{k}"] = truth_state[k]
    return rec, truth


def main(argv=None):
    from attractorfit.io import write_csv, write_nwb

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.join(os.path.dirname(__file__), "..",
                                                  "sample_data"))
    ap.add_argument("--seed", type=int, default=2026)
    args = ap.parse_args(argv)
    rec, truth = make_session(seed=args.seed)
    os.makedirs(args.out, exist_ok=True)
    write_nwb(rec, os.path.join(args.out, "ports_session.nwb"))
    write_csv(rec, os.path.join(args.out, "ports_spikes.csv"),
              os.path.join(args.out, "ports_trials.csv"))
    np.savez_compressed(os.path.join(args.out, "ports_truth.npz"), **truth)
    print(f"wrote {rec} to {os.path.abspath(args.out)}")


if __name__ == "__main__":
    main()
