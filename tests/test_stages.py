"""Stage commands on a run folder (states, fit, simulate, compare, report) and
``run --resume``: our own plumbing. The stages must give the bytes of one ``run``."""

import json
import logging
import os
import shutil

import numpy as np
import pytest

from attractorfit import _stages, pipeline
from attractorfit._output import dumps_json
from attractorfit.cli import main
from attractorfit.config import load_config
from attractorfit.errors import InputError
from attractorfit.io import write_nwb
from attractorfit.states import StateFit
from attractorfit.synthetic import switching_recording

RUN = """
[analysis]
bin_size = 0.05
condition = "item"
[states]
max_states = 4
latent_dims = 2
[discreteness]
n_boot = 3
[network]
rule = "pseudoinverse"
[compare]
n_surrogates = 3
n_null = 2
nulls = ["poisson"]
refit = false
n_boot = 20
[report]
figure_formats = ["png"]
dpi = 50
"""

SAME = ("summary.json", "states.csv")


def _recording(rng):
    rec, _ = switching_recording(n_units=12, n_states=3, n_trials=16, trial_duration=2.0,
                                 mean_dwell_s=0.5, modulation=0.8, rng=rng,
                                 labels={"item": np.array(list("ab") * 8)})
    return rec


def _main(*args):
    return main([str(a) for a in args])


@pytest.fixture(scope="module")
def full(tmp_path_factory):
    """One complete ``run`` (the reference bytes)."""
    d = tmp_path_factory.mktemp("stages")
    write_nwb(_recording(3), d / "rec.nwb")
    (d / "run.toml").write_text(RUN)
    out = d / "full"
    assert _main("run", d / "rec.nwb", "--out", out, "--config", d / "run.toml", "--seed", "1",
                 "--quiet") == 0
    return out


def _one_error_line(capsys):
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip() and "warning" not in ln]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_stage_commands_give_the_bytes_of_one_run(full, tmp_path):
    d = full.parent
    out = tmp_path / "st"
    assert _main("states", d / "rec.nwb", "--out", out, "--config", d / "run.toml", "--seed",
                 "1", "--quiet") == 0
    for command in ("fit", "simulate", "compare"):
        assert _main(command, out, "--quiet") == 0, command
    shutil.rmtree(out / "tables")  # `report` rebuilds them from the folder alone
    assert _main("report", out, "--quiet") == 0
    for name in SAME + ("model.npz", "state_model.npz", "posteriors.npz"):
        assert (out / name).read_bytes() == (full / name).read_bytes(), name
    # the lab checks (decoding, robustness, drift) reach the report rebuilt from disk
    for name in ("robustness.csv", "state_drift.csv", "unit_drift.csv",
                 "end_state_decoding.csv"):
        assert (out / "tables" / name).read_bytes() == \
            (full / "tables" / name).read_bytes(), name
    s = json.loads((out / "summary.json").read_text())
    assert {"states", "discreteness", "model", "comparison", "robustness", "drift",
            "end_state_decoding"} <= set(s)
    html = (out / "report.html").read_text()
    assert "Model vs data" in html and "not proof" in html


def test_run_folders_of_earlier_versions_still_work(full, tmp_path):
    # the extra checks (decoding, robustness, drift) were kept in lab_checks.npz before
    assert (full / "extra_checks.npz").is_file() and not (full / "lab_checks.npz").exists()
    old = tmp_path / "old"
    shutil.copytree(full, old)
    (old / "extra_checks.npz").rename(old / "lab_checks.npz")
    # and its config.toml named network.cue_field cue_drive
    text = (old / "config.toml").read_text()
    assert "\ncue_field = false\n" in text
    (old / "config.toml").write_text(text.replace("\ncue_field =", "\ncue_drive ="))
    shutil.rmtree(old / "tables")
    assert _main("report", old, "--quiet") == 0
    for name in ("robustness.csv", "state_drift.csv", "unit_drift.csv",
                 "end_state_decoding.csv"):
        assert (old / "tables" / name).read_bytes() == \
            (full / "tables" / name).read_bytes(), name
    # a fresh start deletes the old file too (it is a stage file of an earlier run)
    _stages.remove_stage_files(_stages.open_run_folder(old, command="t")[0])
    assert not (old / "lab_checks.npz").exists()


def test_resume_after_an_interrupted_run_skips_finished_stages(full, tmp_path, monkeypatch,
                                                              caplog):
    d = full.parent
    out = tmp_path / "r"
    args = ["run", d / "rec.nwb", "--out", out, "--config", d / "run.toml", "--seed", "1",
            "--quiet"]

    def interrupted(*a, **k):
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "compare_model", interrupted)
    assert _main(*args) == 130
    monkeypatch.undo()
    assert (out / "model.npz").exists() and not (out / "comparison.npz").exists()
    assert "comparison" not in json.loads((out / "summary.json").read_text())
    kept = {n: ((out / n).stat().st_mtime_ns, (out / n).read_bytes())
            for n in ("state_model.npz", "model.npz")}
    assert _main(*args) == 2  # the folder holds a run: --resume or --force needed
    caplog.set_level(logging.INFO, logger="attractorfit")
    assert _main(*args, "--resume") == 0
    for n, before in kept.items():
        assert ((out / n).stat().st_mtime_ns, (out / n).read_bytes()) == before, n
    skipped = [r.getMessage() for r in caplog.records if "skipped" in r.getMessage()]
    assert any(m.startswith("states:") for m in skipped)
    assert any(m.startswith("fit:") for m in skipped)
    assert not any(m.startswith("compare:") for m in skipped)
    for name in SAME:
        assert (out / name).read_bytes() == (full / name).read_bytes(), name


def test_resume_redoes_deleted_later_stages(full, tmp_path, caplog):
    d = full.parent
    out = tmp_path / "r"
    shutil.copytree(full, out)
    for name in ("surrogate.nwb", "comparison.npz", "report.html"):
        (out / name).unlink()
    before = (out / "model.npz").stat().st_mtime_ns
    caplog.set_level(logging.INFO, logger="attractorfit")
    cfg = tmp_path / "sharper.toml"  # [report] settings may change on resume
    cfg.write_text(RUN.replace("dpi = 50", "dpi = 60"))
    assert _main("run", d / "rec.nwb", "--out", out, "--config", cfg, "--seed",
                 "1", "--quiet", "--resume") == 0
    assert (out / "model.npz").stat().st_mtime_ns == before
    assert (out / "surrogate.nwb").exists() and (out / "report.html").exists()
    assert any(r.getMessage().startswith("fit:") for r in caplog.records)
    for name in SAME:
        assert (out / name).read_bytes() == (full / name).read_bytes(), name


def test_resume_refuses_another_seed_config_or_input(full, tmp_path, capsys):
    d = full.parent
    out = tmp_path / "r"
    shutil.copytree(full, out)
    base = ["run", d / "rec.nwb", "--out", out, "--config", d / "run.toml", "--quiet",
            "--resume"]
    assert _main(*base, "--seed", "2") == 2
    assert "seed 2 differs from seed 1" in _one_error_line(capsys)
    other = tmp_path / "other.toml"
    other.write_text(RUN.replace('rule = "pseudoinverse"', 'rule = "hebbian"'))
    args = list(base)
    args[args.index(d / "run.toml")] = other
    assert _main(*args, "--seed", "1") == 2
    assert "network.rule = 'hebbian' differs from 'pseudoinverse'" in _one_error_line(capsys)
    changed = tmp_path / "in" / "rec.nwb"
    changed.parent.mkdir()
    write_nwb(_recording(4), changed)
    args = list(base)
    args[1] = changed
    assert _main(*args, "--seed", "1") == 2
    assert "SHA-256 differs" in _one_error_line(capsys)
    assert _main(*base, "--seed", "1", "--force") == 2
    assert "choose one" in _one_error_line(capsys)
    assert (out / "summary.json").read_bytes() == (full / "summary.json").read_bytes()


def test_stage_commands_check_the_input(full, tmp_path, capsys):
    d = tmp_path / "in"
    d.mkdir()
    shutil.copy(full.parent / "rec.nwb", d / "rec.nwb")
    out = tmp_path / "st"
    assert _main("states", d / "rec.nwb", "--out", out, "--config", full.parent / "run.toml",
                 "--no-test", "--quiet") == 0
    moved = tmp_path / "moved.nwb"
    os.replace(d / "rec.nwb", moved)
    assert _main("fit", out, "--quiet") == 2
    line = _one_error_line(capsys)
    assert str(d / "rec.nwb") in line and "missing" in line and "--input" in line
    write_nwb(_recording(4), d / "rec.nwb")  # another file at the recorded place
    assert _main("report", out, "--quiet") == 2
    assert "SHA-256 differs" in _one_error_line(capsys)
    assert _main("report", out, "--quiet", "--input", d / "rec.nwb") == 2
    assert "SHA-256 differs" in _one_error_line(capsys)
    assert _main("fit", out, "--quiet", "--input", moved) == 0  # moved, same bytes
    assert (out / "model.npz").exists()


@pytest.mark.parametrize("command, remove, match", [
    ("fit", "state_model.npz", "state_model.npz: not found; 'fit' needs it; make it with "
                               "'attractorfit states'"),
    ("simulate", "model.npz", "make it with 'attractorfit fit'"),
    ("compare", "model.npz", "make it with 'attractorfit fit'"),
    ("report", "surrogate.nwb", "make it with 'attractorfit simulate'"),
    ("fit", "config.toml", "config.toml: not found"),
    ("fit", "input.json", "input.json: not found; 'fit' needs it; make it with "
                          "'attractorfit states'"),
])
def test_missing_upstream_file_exits_2(full, tmp_path, capsys, command, remove, match):
    out = tmp_path / "r"
    shutil.copytree(full, out)
    (out / remove).unlink()
    assert _main(command, out, "--quiet") == 2
    assert match in _one_error_line(capsys)


def test_stage_command_bad_usage(full, tmp_path, capsys):
    assert _main("fit", tmp_path / "absent") == 2
    assert "not a folder" in _one_error_line(capsys)
    assert _main("compare", full, "--jobs", "0") == 2
    assert "--jobs: expected a whole number >= 1, got 0" in _one_error_line(capsys)
    assert _main("compare", full, "--local-cluster", "0") == 2
    assert "--local-cluster: expected a whole number >= 1" in _one_error_line(capsys)


def test_state_fit_arrays_round_trip(full):
    cfg = load_config(full / "config.toml")
    rec = _stages.reload_recording(_stages.open_run_folder(full, command="t")[0])
    res = _stages.restore_states(_stages.open_run_folder(full, command="t")[0], rec, cfg)
    sf = res.state_fit
    again = StateFit.from_arrays(sf.to_arrays(), res.binned)
    assert dumps_json(again.summary_block()) == dumps_json(sf.summary_block())
    assert again.segment_rows() == sf.segment_rows()
    summary = json.loads((full / "summary.json").read_text())
    assert json.loads(dumps_json(sf.summary_block())) == summary["states"]
    assert sf.label_to_state == again.label_to_state and sf.choice is not None
    wrong = pipeline.analysed_counts(pipeline.bin_for_analysis(rec, {
        **cfg, "analysis": {**cfg["analysis"], "bin_size": 0.1}}))
    with pytest.raises(InputError, match="the state model was fitted on 12 units"):
        StateFit.from_arrays(sf.to_arrays(), wrong)
    arrays = sf.to_arrays()
    del arrays["hmm_rates"]
    with pytest.raises(InputError, match="missing 'hmm_rates'"):
        StateFit.from_arrays(arrays, res.binned)


def test_pack_result_round_trip_and_refusals(full):
    from attractorfit.states import ConditionTable

    t = ConditionTable(label="item", levels=["a", 2], n_trials=np.array([3, 4]),
                       state_fraction=np.eye(2), unassigned_fraction=np.array([0.1, np.nan]),
                       mapping=np.array([0, 1]), mapping_inferred=True,
                       matching_fraction=np.array([1.0, 1.0]), matching_fraction_overall=1.0,
                       switches_per_trial=np.array([0.5, 0.25]), end_state_accuracy=0.5,
                       chance=np.float64(0.5))
    obj = {"t": t, 3: (np.array(["x", None], dtype=object), np.int64(7))}
    back = _stages.unpack_result(_stages.pack_result(obj))
    assert dumps_json(back["t"].to_dict()) == dumps_json(t.to_dict())
    assert np.array_equal(back["t"].unassigned_fraction, t.unassigned_fraction, equal_nan=True)
    assert back["t"].levels == ["a", 2] and isinstance(back["t"].chance, np.float64)
    assert list(back[3][0]) == ["x", None] and back[3][1] == 7
    with pytest.raises(TypeError, match="cannot store a set"):
        _stages.pack_result({1, 2})
    with pytest.raises(InputError, match="missing '__layout__'"):
        _stages.unpack_result({})
    bad = _stages.pack_result(t)
    bad["__layout__"] = np.asarray(str(bad["__layout__"]).replace(
        "attractorfit.states._segments", "os"))
    with pytest.raises(InputError, match="is not ours"):
        _stages.unpack_result(bad)


def test_state_fit_round_trip_with_given_states_and_mapping():
    from attractorfit.binning import bin_spikes
    from attractorfit.states import analyse_states

    binned = pipeline.analysed_counts(bin_spikes(_recording(5), bin_size=0.05))
    sf = analyse_states(binned, n_states=2, latent_dims=2, label_to_state={"item": {"a": 1}},
                        rng=0)
    assert sf.choice is None and not sf.conditions["item"].mapping_inferred
    again = StateFit.from_arrays(sf.to_arrays(), binned)
    assert again.choice is None and not again.conditions["item"].mapping_inferred
    assert again.label_to_state == sf.label_to_state
    assert dumps_json(again.summary_block()) == dumps_json(sf.summary_block())
    # state_model.npz files written before the keys were renamed (hmm_startprob,
    # hmm_transmat) still load, with the same model
    arrays = sf.to_arrays()
    arrays["hmm_startprob"] = arrays.pop("hmm_initial_probs")
    arrays["hmm_transmat"] = arrays.pop("hmm_transition_probs")
    old = StateFit.from_arrays(arrays, binned)
    assert np.array_equal(old.model.transition_probs_, sf.model.transition_probs_)
    assert np.array_equal(old.model.initial_probs_, sf.model.initial_probs_)
    sur = pipeline.analysed_counts(bin_spikes(_recording(6), bin_size=0.05))
    a, b = sf.decode(sur), again.decode(sur)
    assert np.array_equal(a.occupancy, b.occupancy) and a.segments.rows() == b.segments.rows()
