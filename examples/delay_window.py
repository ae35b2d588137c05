"""A custom analysis window: only the delay period, from 0.5 s after its start to its end.

The same can be asked of the command line with a configuration file:

    [analysis]
    align = "delay_start"
    window = [0.5, 3.0]

Run from the repository root:  python examples/delay_window.py
"""

import importlib.resources as resources

import numpy as np

import attractorfit as af
from attractorfit.states import analyse_states


def main():
    rec = af.load(str(resources.files("attractorfit.sample_data") / "ports_session.nwb"))
    whole = af.bin_spikes(rec, bin_size=0.05)
    late = af.bin_spikes(rec, bin_size=0.05, align="delay_start", window=(0.5, 3.0))
    print(f"whole trials: {whole.n_bins} bins per trial; late delay: {late.n_bins} bins")
    # the window starts are absolute times: 0.5 s after each trial's delay start
    assert np.allclose(late.window_start, rec.trials["delay_start"] + 0.5)
    states = analyse_states(late, candidates=range(2, 7), latent_dims=3, rng=0)
    print("states in the late delay:", states.n_states, states.vertex_text)
    for row in states.segment_rows()[:5]:
        print("  trial %d  %.2f-%.2f s  state %d  %s" % tuple(row))


if __name__ == "__main__":
    main()
