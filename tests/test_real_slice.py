"""Every stage on a slice of a real recording (tests/data/README.md: source and licence).

20 units of a human medial-temporal-lobe session at about 1-18 Hz, 60 trials, the delay
window of the task; 6 of the units fire too little in that window and are left out. Our
code did not make these data: the run must finish, figures and report included, and say
what it left out once.
"""

import json
import pathlib

import pytest

from attractorfit.cli import main

SLICE = pathlib.Path(__file__).parent / "data" / "mtl_wm_slice.nwb"

CONFIG = """
[analysis]
align = "maint_start"
window = [0.0, 2.5]
condition = "probed_item"
bin_size = 0.1
[states]
max_states = 4
[discreteness]
n_boot = 9
[compare]
n_surrogates = 4
n_null = 3
n_boot = 20
[report]
figure_formats = ["png"]
dpi = 50
"""


@pytest.fixture(scope="module")
def slice_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("slice")
    (d / "real.toml").write_text(CONFIG)
    out = d / "out"
    code = main(["run", str(SLICE), "--config", str(d / "real.toml"), "--out", str(out),
                 "--seed", "3", "--quiet"])
    return code, out


def test_every_stage_finishes_on_the_real_slice(slice_run, capsys):
    code, out = slice_run
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    assert {"states", "discreteness", "model", "comparison"} <= set(summary)
    assert summary["recording"]["n_units"] == 20
    assert summary["analysis"]["window"] == [0.0, 2.5]
    assert summary["recording"]["n_trials_analysed"] == 60
    # units firing below min_rate_hz in the delay window are left out of every stage
    kept = summary["analysis"]["unit_ids"]
    assert 10 <= len(kept) < 20
    html = (out / "report.html").read_text()
    assert "Traceback" not in html and "probed_item" in html
    assert summary["discreteness"]["verdict"] in ("discrete", "not_discrete", "inconclusive")


def test_the_input_is_left_unchanged(slice_run):
    # the slice's own checksum, as shipped (a run must never write an input)
    import hashlib

    digest = hashlib.sha256(SLICE.read_bytes()).hexdigest()
    code, out = slice_run
    recorded = json.loads((out / "input.json").read_text())
    assert any(f.get("sha256") == digest for f in recorded["files"])


def test_single_units_only_by_the_units_table(tmp_path, capsys):
    # a quality filter on the NWB units table's own column (SU/MU), then states and report
    (tmp_path / "real.toml").write_text(CONFIG)
    out = tmp_path / "su"
    code = main(["states", str(SLICE), "--config", str(tmp_path / "real.toml"), "--out",
                 str(out), "--units", "unit_type=SU", "--no-test", "--quiet"])
    assert code == 0, capsys.readouterr().err
    summary = json.loads((out / "summary.json").read_text())
    left = summary["recording"]["units_left_out"]
    assert "selection" in json.dumps(left)
    assert (out / "report.html").exists()
    from attractorfit.io import load

    rec = load(SLICE)
    su = {u for u, t in zip(rec.unit_ids, rec.unit_info["unit_type"]) if t == "SU"}
    assert set(summary["analysis"]["unit_ids"]) <= su
