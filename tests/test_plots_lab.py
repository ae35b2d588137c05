"""Figures of the lab checks (end-of-window decoding, robustness panel, drift): each runs
on small invented inputs, labels its axes, keeps fonts >= 8 pt, and rejects bad input."""

import matplotlib.text
import numpy as np
import pytest

from attractorfit import plots as P
from attractorfit.errors import InputError

RNG = np.random.default_rng(0)
BUILDERS = {
    "decoding": lambda: P.decoding_accuracy(
        ["item", "outcome"], [0.8, 0.45], [RNG.normal(0.25, 0.05, 99), RNG.normal(0.5, 0.05, 99)],
        [0.25, 0.5], [0.01, 0.7]),
    "decoding_many": lambda: P.decoding_accuracy(
        list("abcde"), np.full(5, 0.5), [np.full(9, 0.4)] * 5, np.full(5, 0.3),
        [0.1, np.nan, 0.5, 0.2, 1.0], ylabel="cross-validated accuracy"),
    "robustness": lambda: P.robustness_panel(
        ["chosen", "states_minus_1", "bin_halved"],
        [[0.5, 0.3, 0.2], [0.6, np.nan, 0.4], [0.5, 0.3, 0.2]],
        [[1.0, 0.5, 0.2], [1.2, np.nan, 0.3], [0.9, 0.5, 0.2]],
        {"unassigned": [0.01, 0.02, 0.03], "agreement": [1.0, 0.7, 0.95]},
        state_labels=["LL", "HL", "LH"]),
    "drift": lambda: P.drift_panel(RNG.uniform(-0.5, 0.5, 40), np.arange(40) < 4,
                                   [[0.5, 0.5], [0.4, 0.6], [0.3, 0.7]], p_value=0.02,
                                   note="tested within each 'item'"),
}


@pytest.mark.parametrize("name", sorted(BUILDERS))
def test_lab_figures(name, tmp_path):
    fig = BUILDERS[name]()
    axes = [ax for ax in fig.axes if ax.lines or ax.patches or ax.collections]
    assert axes
    for ax in axes:
        assert ax.get_xlabel().strip() and ax.get_ylabel().strip()
    paths = P.save_figure(fig, tmp_path, name, formats=("png",), dpi=60)
    for t in fig.findobj(matplotlib.text.Text):
        if t.get_visible() and t.get_text().strip():
            assert t.get_fontsize() >= 8.0, (name, t.get_text())
    assert paths[0].endswith(f"{name}.png")


@pytest.mark.parametrize("call, match", [
    (lambda: P.decoding_accuracy([], [], [], [], []), "names: expected at least one"),
    (lambda: P.decoding_accuracy(["a"], [0.5], [], [0.5], [0.1]), "nulls: expected 1"),
    (lambda: P.decoding_accuracy(["a"], [0.5, 0.2], [[0.1]], [0.5], [0.1]),
     "values: expected 1 values"),
    (lambda: P.robustness_panel([], np.zeros((0, 2)), np.zeros((0, 2)), {}),
     "setting_names: expected at least one"),
    (lambda: P.robustness_panel(["a"], [[0.1, 0.2]], [[0.1]], {}), "mean_dwell_s"),
    (lambda: P.robustness_panel(["a"], [[0.1]], [[0.1]], {"x": [1, 2]}),
     r"metrics\['x'\]: expected 1 values"),
    (lambda: P.drift_panel([0.1, 0.2], [True], [[1.0]], p_value=0.5), "drifting: expected 2"),
    (lambda: P.drift_panel([0.1], [True], [1.0], p_value=0.5), "block_occupancy"),
])
def test_lab_figure_bad_input(call, match):
    with pytest.raises(InputError, match=match):
        call()
