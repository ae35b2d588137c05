"""The lab checks of DESIGN Amendment 7 wired into the run: configuration, RunResult
fields, summary.json blocks, tables/ CSV files and report sections (our own plumbing;
the numbers are checked in tests/states/test_end_state.py, test_robustness.py and
tests/test_stats_drift.py)."""

import csv
import json

import numpy as np
import pytest

from attractorfit import pipeline
from attractorfit._output import dumps_json
from attractorfit.config import resolve_config
from attractorfit.errors import InputError
from attractorfit.synthetic import switching_recording

CFG = {"analysis": {"bin_size": 0.05, "condition": "item"},
       "states": {"max_states": 4, "latent_dims": 2},
       "decoding": {"n_permutations": 49}, "drift": {"n_permutations": 49},
       "report": {"figure_formats": ["png"], "dpi": 50}}


@pytest.fixture(scope="module")
def recording():
    n = 24
    start = np.arange(n) % 3
    rec, _ = switching_recording(n_units=16, n_states=3, n_trials=n, trial_duration=2.0,
                                 mean_dwell_s=0.5, modulation=0.8, rng=3,
                                 start_states=start,
                                 labels={"item": np.array(list("abc"))[start],
                                         "outcome": np.array(list("xy") * 12)})
    return rec


@pytest.fixture(scope="module")
def result(recording):
    return pipeline.run_states(recording, resolve_config(CFG), seed=2, discreteness=False)


def test_run_states_fills_the_lab_checks(result):
    assert {"item", "outcome"} <= set(result.end_state)
    assert 0 < result.end_state["item"].p_value <= 1
    names = [s.name for s in result.robustness.settings]
    assert names[0] == "chosen" and {"bin_halved", "bin_doubled", "threshold_low",
                                     "threshold_high"} <= set(names)
    assert result.unit_drift.rho.shape == (result.binned.n_units,)
    assert result.state_drift.stratified_by == "item"
    assert result.state_drift.counts.shape == (3, result.state_fit.n_states)


def test_summary_blocks_are_json(result):
    s = pipeline.base_summary(result, seed=2)
    assert s["end_state_decoding"]["item"]["n_permutations"] == 49
    assert "chosen" in s["robustness"]
    assert set(s["drift"]) == {"units", "states"}
    json.loads(dumps_json(s))


def test_same_seed_same_numbers_and_other_stages_untouched(recording, result):
    again = pipeline.run_states(recording, resolve_config(CFG), seed=2, discreteness=False)
    np.testing.assert_array_equal(again.end_state["item"].null, result.end_state["item"].null)
    off = resolve_config({**CFG, "decoding": {"enabled": False},
                          "robustness": {"enabled": False}, "drift": {"enabled": False}})
    plain = pipeline.run_states(recording, off, seed=2, discreteness=False)
    assert plain.end_state is None and plain.robustness is None and plain.unit_drift is None
    # the lab checks draw their own streams: the state fit is the same with or without
    np.testing.assert_array_equal(plain.state_fit.occupancy, result.state_fit.occupancy)
    assert "robustness" not in pipeline.base_summary(plain, seed=2)


def test_report_sections_and_tables(result, tmp_path):
    from attractorfit._figures import write_figures_and_report

    folder = pipeline.RunFolder(tmp_path / "out")
    write_figures_and_report(folder, result)
    tables = tmp_path / "out" / "tables"
    for name in ("end_state_decoding", "robustness", "robustness_states", "state_drift",
                 "unit_drift"):
        with open(tables / f"{name}.csv", newline="") as fh:
            assert list(csv.reader(fh))[1:], name
    for fig in ("end_state_decoding", "robustness", "drift"):
        assert (tmp_path / "out" / "figures" / f"{fig}.png").exists()
    html = (tmp_path / "out" / "report.html").read_text()
    for words in ("Trial labels from the end-of-window state", "Robustness of the state "
                  "analysis", "Drift across the session", "ignores Dale&#x27;s law",
                  "A multi-unit is not a single cell", "should not be used"):
        assert words in html, words


@pytest.mark.parametrize("section, key, value, match", [
    ("robustness", "thresholds", [1.0], r"robustness.thresholds = \[1.0\]; expected a list"),
    ("robustness", "bin_factors", [1.0], "other than 1"),
    ("robustness", "state_steps", [0], "non-zero"),
    ("decoding", "feature", "last", "posterior or state"),
    ("decoding", "score", "f1", "balanced_accuracy or accuracy"),
    ("drift", "n_blocks", 1, "from 2 to 20"),
])
def test_config_checks(section, key, value, match):
    with pytest.raises(InputError, match=match):
        resolve_config({section: {key: value}})


def test_a_failing_check_is_skipped_with_a_warning(recording, monkeypatch):
    """A secondary check the data cannot support warns and leaves the run going."""
    import attractorfit.states as states
    from attractorfit.errors import InputWarning

    def refuse(*args, **kw):
        raise InputError("state_steps: too few states to step down (invented for the test)")

    monkeypatch.setattr(states, "state_robustness", refuse)
    with pytest.warns(InputWarning, match="robustness panel skipped: state_steps"):
        res = pipeline.run_states(recording, resolve_config(CFG), seed=2, discreteness=False)
    assert res.robustness is None and "robustness" not in pipeline.base_summary(res, seed=2)
    assert res.end_state is not None and res.state_drift is not None
