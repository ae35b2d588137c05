"""Cue field on or off: model-vs-data statistics on the demo and on switching recordings.

Runs the whole states + model pipeline (``pipeline.run_states`` without the
discreteness test, then ``pipeline.run_model``) with ``network.cue_field`` false and
true, and prints the held-out comparison statistics that the cue field touches
(``condition_tvd[label]`` and its ref95, occupancy TVD, rate R^2), the number of
statistics judged consistent, the fitted strength and the fit's wall and CPU time.

Recordings: the bundled demo (``ports_session.nwb``), and switching recordings from
:func:`attractorfit.synthetic.switching_recording` whose first state is the trial's
item (``start_states``). That generator has one transition matrix for all trials, so
its state use depends on the condition only through the first state: the data need
no persistent cue, and the calibration should find a small field there (a negative
control). Usage: ``python benchmarks/bench_cue.py [demo] [switching]``.
"""

import copy
import importlib.resources as resources
import sys
import time
import warnings

import numpy as np

from attractorfit import pipeline
from attractorfit.config import load_config, resolve_config
from attractorfit.io import load
from attractorfit.synthetic import switching_recording


def run(rec, cfg, seed, cue):
    cfg = copy.deepcopy(cfg)
    cfg["network"]["cue_field"] = cue
    res = pipeline.run_states(rec, cfg, seed=seed, discreteness=False)
    t, c = time.time(), time.process_time()
    pipeline.run_model(res, seed=seed)
    return res, time.time() - t, time.process_time() - c


def show(name, rec, cfg, seed):
    for cue in (False, True):
        res, wall, cpu = run(rec, cfg, seed, cue)
        c = res.comparison.summary_block()
        keys = [k for k in c if k.startswith("condition_tvd[") and k.endswith("]")]
        nf = res.network_fit
        cons = [k for k in c if k.endswith("_consistent")]
        line = [f"{name:9s} cue={str(cue):5s}"]
        for k in keys + ["occupancy_tvd"]:
            line.append(f"{k} {c[k]:.3f} (ref95 {c[k + '_ref95']:.3f})")
        line.append(f"rate_r2 {c['rate_r2']:.3f} (ref05 {c['rate_r2_ref05']:.3f})")
        line.append(f"consistent {sum(bool(c[k]) for k in cons)}/{len(cons)}")
        line.append(f"g {nf.cue_strength:.3g} tau_s {nf.tau_s:.3g}")
        if nf.cue_unstable is not None:
            line.append(f"lost fixed points under field {int(nf.cue_unstable.sum())}/"
                        f"{nf.cue_unstable.size}")
        line.append(f"model stages wall {wall:.1f} s cpu {cpu:.1f} s")
        print(" | ".join(line), flush=True)


if __name__ == "__main__":
    warnings.simplefilter("ignore")
    what = sys.argv[1:] or ["demo", "switching"]
    if "demo" in what:
        data = resources.files("attractorfit.sample_data")
        cfg = load_config(str(data / "demo.toml"))
        show("demo", load(str(data / "ports_session.nwb")), cfg, int(cfg["run"]["seed"]))
    if "switching" in what:
        for seed, dwell in ((11, 0.4), (12, 0.8)):
            item = np.arange(80) % 4
            rec, _ = switching_recording(n_units=60, n_states=4, n_trials=80,
                                         trial_duration=3.0, mean_dwell_s=dwell,
                                         start_states=item, labels={"item": item}, rng=seed)
            cfg = resolve_config(None)
            cfg["states"]["n_states"] = 4
            show(f"switch{seed}", rec, cfg, seed)
