"""The whole run on a small invented recording: the run-folder contract of DESIGN.md.

Our own plumbing check (the numbers are checked stage by stage elsewhere)."""

import csv
import json

import numpy as np
import pytest

from attractorfit.cli import main
from attractorfit.io import load, write_nwb
from attractorfit.pipeline import categorical_labels, split_trials
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
nulls = ["poisson", "shuffle"]
refit = false
n_boot = 20
[report]
figure_formats = ["png"]
dpi = 60
"""


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory):
    d = tmp_path_factory.mktemp("run")
    rec, _ = switching_recording(n_units=16, n_states=3, n_trials=24, trial_duration=2.0,
                                 mean_dwell_s=0.5, modulation=0.8, rng=3,
                                 labels={"item": np.array(list("ab") * 12)})
    write_nwb(rec, d / "rec.nwb")
    (d / "run.toml").write_text(RUN)
    out = d / "out"
    code = main(["run", str(d / "rec.nwb"), "--out", str(out), "--config", str(d / "run.toml"),
                 "--seed", "1", "--quiet"])
    assert code == 0
    return out


def test_run_folder_contract(run_folder):
    names = {p.name for p in run_folder.iterdir()}
    assert {"summary.json", "states.csv", "posteriors.npz", "config.toml", "model.npz",
            "surrogate.nwb", "report.html", "figures", "tables"} <= names
    # one row per state in tables/, not named like the run folder's states.csv (segments)
    assert (run_folder / "tables" / "state_summary.csv").is_file()
    assert not (run_folder / "tables" / "states.csv").exists()
    s = json.loads((run_folder / "summary.json").read_text())
    assert s["recording"]["n_units"] == 16 and s["recording"]["n_trials"] == 24
    st = s["states"]
    assert st["n_states"] == len(st["vertices"]) == len(st["occupancy"]) == len(
        st["mean_dwell_s"])
    assert all(v in (-1, 1) for row in st["vertices"] for v in row)
    assert abs(sum(st["occupancy"]) - 1) < 1e-6 and 0 <= st["unassigned_fraction"] <= 1
    assert "cube_r2" in st
    assert s["discreteness"]["verdict"] in ("discrete", "not_discrete", "inconclusive")
    assert 0 < s["discreteness"]["p_value"] <= 1
    assert s["model"]["rank"] >= 1 and s["model"]["decoder_rule"] == "pseudoinverse"
    for key in ("occupancy_tvd", "occupancy_tvd_ref95", "rate_r2"):
        assert key in s["comparison"]
    assert s["input"]["sha256"] and s["seed"] == 1 and "numpy" in s["versions"]


def _keys(obj):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield k
            yield from _keys(v)
    elif isinstance(obj, list):
        for v in obj:
            yield from _keys(v)


def test_json_keys_are_plain_words(run_folder):
    # keys are read by other tools with dotted paths or as identifiers: no dots or
    # operators (the robustness settings were once "bin/2", "bin*2", "states+1")
    summary = json.loads((run_folder / "summary.json").read_text())
    assert {"chosen", "bin_halved", "bin_doubled", "states_minus_1", "states_plus_1",
            "threshold_low", "threshold_high"} == set(summary["robustness"])
    for name in ("summary.json", "input.json"):
        keys = set(_keys(json.loads((run_folder / name).read_text())))
        bad = sorted(k for k in keys if set(k) & set(".*/<>=+"))
        assert not bad, (name, bad)


def test_states_csv_rows(run_folder):
    with open(run_folder / "states.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows and list(rows[0]) == ["trial", "start", "stop", "state", "vertex"]
    for r in rows:
        assert float(r["stop"]) > float(r["start"]) >= 0
        assert int(r["state"]) >= -1
        assert set(r["vertex"]) <= {"H", "L"} and (r["vertex"] == "") == (r["state"] == "-1")


def test_surrogate_nwb_loads_and_model_npz_plain(run_folder):
    rec = load(run_folder / "surrogate.nwb")
    assert rec.n_units == 16 and rec.n_trials == 24
    with np.load(run_folder / "model.npz", allow_pickle=False) as z:
        assert len(z.files) > 0


def test_report_is_self_contained(run_folder):
    html = (run_folder / "report.html").read_text()
    assert "not proof" in html and "Dale" in html
    assert "http://" not in html and "https://" not in html


def test_local_cluster_gives_identical_outputs(run_folder, tmp_path):
    # the surrogates simulated on a 2-worker Dask LocalCluster (127.0.0.1) must give the
    # same bytes as the local run of the fixture
    pytest.importorskip("distributed")
    d = run_folder.parent
    out = tmp_path / "dask"
    code = main(["run", str(d / "rec.nwb"), "--out", str(out), "--config", str(d / "run.toml"),
                 "--seed", "1", "--quiet", "--local-cluster", "2"])
    assert code == 0
    for name in ("summary.json", "states.csv"):
        assert (out / name).read_bytes() == (run_folder / name).read_bytes()


def test_split_trials_stratified():
    class B:
        n_trials = 10
        labels = {"item": np.array(list("aabbbbcccc"))}
    train, held = split_trials(B, "item", 0.5, np.random.default_rng(0))
    assert np.intersect1d(train, held).size == 0 and train.size + held.size == 10
    items = B.labels["item"]
    for lv in "abc":
        assert np.sum(items[held] == lv) >= 1 and np.sum(items[train] == lv) >= 1


def test_categorical_labels_drop_event_times():
    labels = {"cue_on": np.arange(20) * 3.5, "item": np.array(list("ab") * 10),
              "outcome": np.array([1, 0] * 10)}
    assert set(categorical_labels(labels)) == {"item", "outcome"}
