"""Walk the Python API end to end on the bundled sample recording.

Run from the repository root:  python examples/api_walkthrough.py
(about a minute on 2 cores; small settings so it stays quick)
"""

import importlib.resources as resources

import attractorfit as af
from attractorfit.compare import compare
from attractorfit.fit import fit_network
from attractorfit.states import analyse_states, discreteness_test
from attractorfit.surrogates import network_surrogates


def main():
    path = resources.files("attractorfit.sample_data") / "ports_session.nwb"
    rec = af.load(str(path))
    print(rec)

    # 1. counts in 50 ms bins over the 3 s delay of every trial
    counts = af.bin_spikes(rec, bin_size=0.05, align="delay_start", window=(0.0, 3.0))
    print("counts:", counts.counts.shape, "(trials x bins x units)")

    # 2. discrete states, chosen from 1..6, with vertex codes on a hypercube
    states = analyse_states(counts, candidates=range(1, 7), latent_dims=3, rng=0)
    print("states:", states.n_states, "vertex codes:", states.vertex_text)
    print("occupancy:", states.decoding.occupancy.round(3))
    print("mean dwell (s):", states.decoding.mean_dwell_s.round(3))

    # 3. are discrete states warranted? (few replicates here; use >= 99 for real)
    test = discreteness_test(counts, n_boot=19, condition="port", max_states=6, rng=1)
    print(test.text())

    # 4. a low-rank spiking network whose attractors sit at the states
    train = [i for i in range(counts.n_trials) if i % 2 == 0]
    held = [i for i in range(counts.n_trials) if i % 2 == 1]
    net = fit_network(counts, states, recording=rec, condition="port", train_trials=train,
                      rng=2)
    print(net)

    # 5. surrogate recordings from it, compared with the held-out trials
    surrogates = network_surrogates(net, 20, rng=3)
    result = compare(counts, surrogates, states, recording=rec, trials=held, refit=False,
                     condition="port", rng=4)
    block = result.summary_block()
    print("occupancy TVD %.3f (reference %.3f), state-modulation R^2 %.3f" % (
        block["occupancy_tvd"], block["occupancy_tvd_ref95"], block["rate_r2"]))


if __name__ == "__main__":
    main()
