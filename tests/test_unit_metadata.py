"""Unit metadata (units-table columns) from the file to the comparison: read, shown by
``inspect``, used to select units (config and command line) and to name multi-units
in the ISI caution. Our own plumbing; the NWB file is written here with pynwb itself."""

import dataclasses
import datetime
import json
import warnings

import numpy as np
import pytest

from attractorfit import InputError, InputWarning, load
from attractorfit.binning import bin_spikes
from attractorfit.cli import main
from attractorfit.compare import compare
from attractorfit.config import resolve_config
from attractorfit.io import write_nwb
from attractorfit.pipeline import bin_for_analysis
from attractorfit.states import analyse_states
from attractorfit.synthetic import switching_recording

N_UNITS = 10
#: Written in this order; the reader sorts units by id (1, 2, ..., 10).
NAMES = ["3", "1", "2", "10", "4", "5", "6", "7", "8", "9"]
TYPE = {"1": "SU", "2": "MU", "3": "SU", "4": "SU", "5": "mua", "6": "SU", "7": "SU",
        "8": "SU", "9": "Multi-Unit", "10": "SU"}
SITE = {u: ("A" if int(u) <= 5 else "B") for u in NAMES}
MULTI = ["2", "5", "9"]

RUN = """
[analysis]
bin_size = 0.05
condition = "item"
[states]
max_states = 3
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


def _recording():
    rec, _ = switching_recording(n_units=N_UNITS, n_states=3, n_trials=16,
                                 trial_duration=2.0, mean_dwell_s=0.5, modulation=0.8,
                                 rng=5, labels={"item": np.array(list("ab") * 8)})
    return rec


def _write_with_pynwb(rec, path):
    """Units table with text, number, ragged and 2-D columns, as other writers make."""
    from pynwb import NWBHDF5IO, NWBFile

    start = datetime.datetime(2020, 1, 1, tzinfo=datetime.timezone.utc)
    nwb = NWBFile(session_description="unit metadata test", identifier="units-test",
                  session_start_time=start)
    nwb.add_unit_column(name="unit_name", description="unit id")
    nwb.add_unit_column(name="unit_type", description="SU single unit, MU multi-unit")
    nwb.add_unit_column(name="site", description="recording site")
    nwb.add_unit_column(name="depth_um", description="depth")
    nwb.add_unit_column(name="peak_shape", description="a 2-D column, not one value per unit")
    for k, name in enumerate(NAMES):
        t = rec.spike_times[rec.unit_ids.index(str(int(name) - 1))]
        nwb.add_unit(spike_times=t, obs_intervals=[[0.0, rec.t_stop + 1.0]], unit_name=name,
                     unit_type=TYPE[name], site=SITE[name], depth_um=100.0 * int(name),
                     peak_shape=np.full(3, float(k)))
    nwb.add_trial_column(name="item", description="remembered item")
    for i in range(rec.n_trials):
        nwb.add_trial(start_time=float(rec.trials["start"][i]),
                      stop_time=float(rec.trials["stop"][i]), item=str(rec.trials["item"][i]))
    with NWBHDF5IO(str(path), mode="w") as io:
        io.write(nwb)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("unitmeta")
    _write_with_pynwb(_recording(), d / "rec.nwb")
    (d / "run.toml").write_text(RUN)
    return d


def _load(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return load(path)


def _main(capsys, *args):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def _one_error_line(err):
    lines = [ln for ln in err.splitlines() if ln.strip() and "warning" not in ln]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


# ---------------------------------------------------------------------------- reading
def test_nwb_unit_columns_are_read_one_value_per_unit(files):
    rec = _load(files / "rec.nwb")
    assert rec.unit_ids == [str(i) for i in range(1, 11)]
    # ragged (obs_intervals) and 2-D (peak_shape) columns are not unit metadata
    assert set(rec.unit_info) == {"unit_type", "site", "depth_um"}
    # each value follows its unit through the reader's reordering
    assert rec.unit_info["unit_type"].tolist() == [TYPE[u] for u in rec.unit_ids]
    assert rec.unit_info["site"].tolist() == [SITE[u] for u in rec.unit_ids]
    np.testing.assert_array_equal(rec.unit_info["depth_um"],
                                  [100.0 * int(u) for u in rec.unit_ids])
    assert any("peak_shape" in w and "left out of the unit metadata" in w
               for w in rec.warnings)
    assert rec.unit_info_counts()["site"] == {"A": 5, "B": 5}
    assert rec.multi_units() == ("unit_type", MULTI)
    # kept by unit selection and by our own writer
    sub = rec.select_units([0, 1, 4])
    assert sub.unit_info["unit_type"].tolist() == ["SU", "MU", "mua"]


def test_unit_metadata_survives_our_nwb_writer(files, tmp_path):
    rec = _load(files / "rec.nwb")
    write_nwb(rec, tmp_path / "copy.nwb")
    back = _load(tmp_path / "copy.nwb")
    assert set(back.unit_info) == set(rec.unit_info)
    for c in rec.unit_info:
        np.testing.assert_array_equal(back.unit_info[c], rec.unit_info[c])
    bad = dataclasses.replace(rec, unit_info={"electrodes": np.arange(N_UNITS)})
    with pytest.raises(InputError, match="unit metadata column 'electrodes' has a name"):
        write_nwb(bad, tmp_path / "bad.nwb")


def test_multi_unit_rule():
    rec = _recording()
    info = {"quality": np.array(["good", "MUA", "multi unit", "noise", "mu", "su", "",
                                 "multiunit", "good", "Multi_Unit"])}
    rec = dataclasses.replace(rec, unit_info=info)
    assert rec.multi_units() == ("quality", ["1", "2", "4", "7", "9"])
    assert rec.multi_units("") == (None, [])
    numbers = dataclasses.replace(rec, unit_info={"channel": np.arange(N_UNITS)})
    assert numbers.multi_units() == (None, [])      # nothing marks a multi-unit
    with pytest.raises(InputError, match=r"units.multi_unit_column: .* has no unit column "
                                         r"'type'; unit columns there: \['quality'\]"):
        rec.multi_units("type")


def test_unit_info_of_the_wrong_length_is_refused():
    rec = _recording()
    with pytest.raises(InputError, match=r"unit column 'site' has shape \(3,\); expected one "
                                         r"value per unit \(10\)"):
        dataclasses.replace(rec, unit_info={"site": np.array(["a", "b", "c"])}).validate()


# ---------------------------------------------------------------------------- inspect
def test_inspect_shows_the_unit_columns(files, capsys):
    code, out, _ = _main(capsys, "inspect", files / "rec.nwb")
    assert code == 0
    assert "unit_type   MU (1), Multi-Unit (1), SU (7), mua (1)" in out
    assert "site        A (5), B (5)" in out
    assert "depth_um    10 distinct values" not in out            # 10 values are listed
    assert "multi-units 3 by unit_type" in out
    row = next(ln for ln in out.splitlines() if ln.startswith(" 9 "))
    assert row.split()[-3:] == ["Multi-Unit", "B", "900"]
    code, out, _ = _main(capsys, "inspect", files / "rec.nwb", "--json",
                         "--units", "site=b")
    doc = json.loads(out)
    assert code == 0 and doc["n_units"] == 5
    assert doc["unit_columns"]["unit_type"] == {"Multi-Unit": 1, "SU": 4}
    assert doc["units_selected"] == {"keep": {"site": ["b"]}, "n_units": 5, "of": 10}
    assert doc["multi_units"] == {"column": "unit_type", "units": ["9"]}
    assert doc["units"][0]["metadata"] == {"unit_type": "SU", "site": "B",
                                           "depth_um": "600"}


# ---------------------------------------------------------------------------- selection
def test_selection_from_the_configuration(files):
    rec = _load(files / "rec.nwb")
    cfg = resolve_config({"analysis": {"bin_size": 0.05},
                          "units": {"keep": {"unit_type": ["su", "MU"], "site": "A"}}})
    b = bin_for_analysis(rec, cfg)
    assert b.unit_ids == ["1", "2", "3", "4"]                  # SU or MU, and at site A
    assert b.left_out == {"selection": ["5", "6", "7", "8", "9", "10"]}
    assert [rec.unit_ids[i] for i in b.unit_index] == b.unit_ids
    numeric = bin_for_analysis(rec, resolve_config({"units": {"keep": {"depth_um": [200,
                                                                                    "300"]}}}))
    assert numeric.unit_ids == ["2", "3"]                      # 200 matches 200.0


@pytest.mark.parametrize("keep, match", [
    ({"kind": ["SU"]}, r"units.keep \(--units\): rec.nwb has no unit column 'kind'; unit "
                       r"columns there: \['depth_um', 'site', 'unit_type'\]"),
    ({"unit_type": ["SU", "XU"]}, r"unit_type = 'XU' matches no unit of rec.nwb; values of "
                                  r"unit_type there: MU \(1\), Multi-Unit \(1\)"),
    ({"unit_type": "MU"}, r"units.keep: unit_type in \['MU'\] keeps 1 of 10 units of rec.nwb; "
                          "expected at least 2"),
])
def test_bad_selection_names_the_column_or_value(files, keep, match):
    rec = _load(files / "rec.nwb")
    with pytest.raises(InputError, match=match):
        bin_spikes(rec, bin_size=0.05, units=keep)


def test_bad_selection_in_a_config_file(tmp_path):
    from attractorfit.config import load_config

    (tmp_path / "c.toml").write_text('[units]\nkeep = {unit_type = []}\n')
    with pytest.raises(InputError, match=r"c.toml: units.keep = \{'unit_type': \[\]\}; "
                                         r"expected a table \{column = \[values\]\}"):
        load_config(tmp_path / "c.toml")


@pytest.mark.parametrize("option, match", [
    ("site=C", "site = 'C' matches no unit of rec.nwb; values of site there: A (5), B (5)"),
    ("region=A", "has no unit column 'region'"),
    ("site", "--units: 'site'; expected COLUMN=VALUE[,VALUE]"),
    ("site=", "--units: 'site='; expected COLUMN=VALUE[,VALUE]"),
])
def test_bad_selection_on_the_command_line_exits_2(files, tmp_path, capsys, option, match):
    code, _, err = _main(capsys, "states", files / "rec.nwb", "--units", option, "--out",
                         tmp_path / "o", "--no-test", "--quiet")
    assert code == 2
    assert match in _one_error_line(err)
    code, _, err = _main(capsys, "inspect", files / "rec.nwb", "--units", option)
    assert code == 2 and match.replace("units.keep", "--units") in _one_error_line(err)


# ------------------------------------------------------------- run, summary, comparison
@pytest.fixture(scope="module")
def selected_run(files):
    out = files / "run"
    assert main(["run", str(files / "rec.nwb"), "--out", str(out), "--config",
                 str(files / "run.toml"), "--seed", "2", "--quiet", "--units",
                 "unit_type=SU,MU,Multi-Unit"]) == 0
    return out


def test_command_line_selection_reaches_the_run(selected_run):
    s = json.loads((selected_run / "summary.json").read_text())
    assert s["analysis"]["unit_ids"] == ["1", "2", "3", "4", "6", "7", "8", "9", "10"]
    left = s["recording"]["units_left_out"]["selection"]
    assert left["n_units"] == 1 and left["units"] == ["5"]
    assert "unit_type" in left["reason"] and "Multi-Unit" in left["reason"]
    # recorded in the run's configuration, so stage commands and --resume select alike
    assert 'keep = {unit_type = ["SU", "MU", "Multi-Unit"]}' in \
        (selected_run / "config.toml").read_text()


def test_multi_units_are_named_in_the_isi_caution(selected_run):
    c = json.loads((selected_run / "summary.json").read_text())["comparison"]
    assert c["multi_unit_column"] == "unit_type"
    assert c["isi_cv_multi_units"] == ["2", "9"]               # unit 5 was left out
    assert ("2 of the 9 units compared are multi-units by their unit_type ('2', '9'); "
            "their ISI statistics are compared with caution") in c["text"]


def test_comparison_isi_caution_per_unit():
    rec = _recording()
    b = bin_spikes(rec, bin_size=0.05)
    fit = analyse_states(b, n_states=3, latent_dims=2, rng=0)
    kw = dict(n_units=N_UNITS, n_states=3, n_trials=16, trial_duration=2.0,
              mean_dwell_s=0.5, modulation=0.8, labels={"item": np.array(list("ab") * 8)})
    model = [switching_recording(rng=20 + i, **kw)[0] for i in range(3)]

    def run(rec_, **opt):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", InputWarning)
            return compare(b, model, fit, recording=rec_, refit=False, n_boot=10, rng=1,
                           **opt)

    plain = run(rec)
    generic = "ISI statistics of multi-units are compared with caution."
    assert plain.multi_units == [] and generic in plain.metrics["isi_cv_ks"].text
    marked = dataclasses.replace(rec, unit_info={"kind": np.array(
        ["su"] * 3 + ["mu"] * 2 + ["su"] * 5)})
    c = run(marked)
    assert c.multi_units == ["3", "4"] and c.multi_unit_column == "kind"
    text = c.metrics["isi_cv_ks"].text
    assert "2 of the 10 units compared are multi-units by their kind ('3', '4')" in text
    assert text in " ".join(c.text) and c.summary_block()["isi_cv_multi_units"] == ["3", "4"]
    # the numbers do not change, only the words
    assert c.metrics["isi_cv_ks"].value == plain.metrics["isi_cv_ks"].value
    none = run(marked, multi_unit_column="")
    assert none.multi_units == [] and generic in none.metrics["isi_cv_ks"].text
    single = run(dataclasses.replace(rec, unit_info={"kind": np.array(["su"] * 10)}),
                 multi_unit_column="kind")
    assert "None of the 10 units compared is a multi-unit by its kind" in \
        single.metrics["isi_cv_ks"].text
