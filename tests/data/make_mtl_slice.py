"""Cut the test slice ``mtl_wm_slice.nwb`` from the shared real session (run once by hand).

    python tests/data/make_mtl_slice.py PATH/TO/mtl_wm_session_a.nwb tests/data/mtl_wm_slice.nwb

The slice keeps the first 60 trials (every trials-table column), the spikes from 1 s before
the first trial to 1 s after the 60th (inter-trial spikes included), and 20 units: the 14
that fire most in the delay window (0-2.5 s after ``maint_start``) and the 6 that fire
least (so that the analysis drops some, as it does on the whole session), with their
``unit_type`` and ``site`` columns. Nothing else is changed. See README.md beside it for
the source and the licence.
"""

import sys

import numpy as np
import pynwb
from hdmf.common import VectorData, VectorIndex
from pynwb.misc import Units

N_TRIALS, N_TOP, N_LOW = 60, 14, 6


def main(src, dst):
    with pynwb.NWBHDF5IO(src, "r") as io:
        f = io.read()
        trials = f.trials.to_dataframe().iloc[:N_TRIALS]
        units = f.units.to_dataframe()
        t0, t1 = trials.start_time.iloc[0] - 1.0, trials.stop_time.iloc[-1] + 1.0
        delay = [(m, m + 2.5) for m in trials.maint_start]
        rate = np.array([sum(np.sum((t >= a) & (t < b)) for a, b in delay)
                         for t in units.spike_times])
        order = np.argsort(-rate, kind="stable")
        keep = np.sort(np.concatenate([order[:N_TOP], order[-N_LOW:]]))
        out = pynwb.NWBFile(session_description=f.session_description + " (test slice)",
                            identifier=f.identifier + "_slice",
                            session_start_time=f.session_start_time)
        times = [np.asarray(units.spike_times.iloc[i]) for i in keep]
        times = [t[(t >= t0) & (t <= t1)] for t in times]
        st = VectorData(name="spike_times", description="spike times (s)",
                        data=np.concatenate(times))
        idx = VectorIndex(name="spike_times_index", data=np.cumsum([t.size for t in times]),
                          target=st)
        cols = [VectorData(name=c, description=f.units[c].description,
                           data=[str(units[c].iloc[i]) for i in keep])
                for c in ("unit_type", "site")]
        out.units = Units(name="units", id=[int(units.index[i]) for i in keep],
                          columns=[st, idx, *cols], description="units")
        for c in trials.columns:
            if c not in ("start_time", "stop_time"):
                out.add_trial_column(name=c, description=f.trials[c].description)
        for _, row in trials.iterrows():
            out.add_trial(**{c: row[c] for c in trials.columns})
    with pynwb.NWBHDF5IO(dst, "w") as io:
        io.write(out)


if __name__ == "__main__":
    main(*sys.argv[1:3])
