"""Hardening (issue #7): bad and hostile input gets a clear error or a warning that says
what happens, numerical dead ends are handled as documented, and the source never
unpickles, evaluates or shells out. Our own plumbing; see DEVELOPERS.md, "Hardening
checklist", for the map from each item to its tests."""

from __future__ import annotations

import ast
import os
import pathlib
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import attractorfit
from attractorfit import InputError, Recording, bin_spikes, load
from attractorfit.cli import main
from attractorfit.config import check_config_for_data, resolve_config
from attractorfit.errors import InputWarning
from attractorfit.io import write_csv, write_nwb
from attractorfit.network import decoder_hebbian, decoder_optimized, decoder_pseudoinverse
from attractorfit.states import PoissonHMM

SRC = pathlib.Path(attractorfit.__file__).parent


def _poisson(rng, rate, t0, t1):
    n = rng.poisson(rate * (t1 - t0))
    return np.sort(rng.uniform(t0, t1, n))


def _trials_rec(n_units=4, n_trials=8, rate=20.0, seed=0, silent_unit=False):
    """Spikes only inside 2 s trials separated by 1 s gaps (seconds)."""
    rng = np.random.default_rng(seed)
    start = np.arange(n_trials) * 3.0 + 1.0
    stop = start + 2.0
    times, units = [], []
    for u in range(n_units):
        if silent_unit and u == n_units - 1:
            t = np.array([0.2])  # one spike before the first trial: silent in every window
        else:
            t = np.concatenate([_poisson(rng, rate, a, b) for a, b in zip(start, stop)])
        times.append(t)
        units.append(np.full(t.size, u))
    return np.concatenate(times), np.concatenate(units), {"start": start, "stop": stop}


def _write_table(path, times, units):
    lines = ["unit,time"] + [f"{u},{float(t)!r}" for u, t in zip(units, times)]
    path.write_text("\n".join(lines) + "\n")
    return path


def _write_trials(path, start, stop):
    rows = "".join(f"{float(a)!r},{float(b)!r}\n" for a, b in zip(start, stop))
    path.write_text("start,stop\n" + rows)
    return path


# ------------------------------------------------------------------ unit ids, spike times
def test_duplicate_unit_ids_are_refused_everywhere(tmp_path):
    rec = Recording(unit_ids=["a", "b", "a"], spike_times=[np.ones(3), np.ones(3), np.ones(3)])
    with pytest.raises(InputError, match="unit id 'a' appears more than once"):
        rec.validate()
    p = tmp_path / "dup.npz"
    np.savez(p, spike_times=np.array([0.1, 0.2]), spike_units=np.array([1, 2]),
             unit_ids=np.array([1, 2, 1]))
    with pytest.raises(InputError, match=r"dup.npz: unit id '1' appears more than once"):
        load(p)


def test_unsorted_spike_times_are_sorted_with_a_warning():
    rec = Recording(unit_ids=["a", "b"], spike_times=[np.array([0.3, 0.1, 0.2]),
                                                      np.array([0.5])])
    with pytest.warns(InputWarning, match="unit 'a': spike times were not in order; sorted"):
        rec.validate()
    np.testing.assert_array_equal(rec.spike_times[0], [0.1, 0.2, 0.3])


def test_duplicated_spike_times_are_kept_with_a_warning():
    with pytest.warns(InputWarning, match=r"duplicated spike times \(2 repeats; first: "
                                          r"unit 'a'\); kept"):
        rec = Recording.from_arrays([0.1, 0.1, 0.1, 0.4], ["a", "a", "a", "b"])
    assert rec.n_spikes == 4
    assert any("duplicated" in w for w in rec.warnings)  # also reaches summary.json


# ------------------------------------------------------------------ trials
def test_trials_out_of_order_are_sorted_and_overlaps_refused(tmp_path):
    times, units, trials = _trials_rec(n_trials=3)
    p = _write_trials(tmp_path / "t.csv", trials["stop"][::-1] - 2.0, trials["stop"][::-1])
    with pytest.warns(InputWarning, match="trials were not in order of start time; sorted"):
        rec = Recording.from_arrays(times, units, trials={"start": trials["start"][::-1],
                                                          "stop": trials["stop"][::-1]})
    np.testing.assert_array_equal(rec.trials["start"], trials["start"])
    with pytest.warns(InputWarning, match="not in order"):
        assert load(_write_table(tmp_path / "s.csv", times, units), trials=p).n_trials == 3
    q = _write_trials(tmp_path / "o.csv", [1.0, 2.0], [3.0, 4.0])
    with pytest.raises(InputError, match=r"o.csv: trials at line 2 \(1-3 s\) and line 3 "
                                         r"\(2-4 s\) overlap; expected disjoint trials"):
        load(_write_table(tmp_path / "s2.csv", times, units), trials=q)


@pytest.mark.parametrize("start, stop, bad", [(1.0, 1.0, "stop 1.0"), (2.0, 1.5, "stop 1.5")])
def test_empty_or_negative_trials_name_the_row(tmp_path, start, stop, bad):
    p = _write_trials(tmp_path / "t.csv", [0.0, start], [0.5, stop])
    with pytest.raises(InputError, match=f"t.csv line 3: {bad} is not after start"):
        load(_write_table(tmp_path / "s.csv", *_trials_rec()[:2]), trials=p)


def test_trial_without_spikes_warns_and_is_kept():
    times, units, trials = _trials_rec(n_trials=4)
    keep = ~((times >= 7.0) & (times < 9.0))  # trial 2 (7-9 s) loses every spike
    with pytest.warns(InputWarning, match=r"1 of 4 trial\(s\) hold no spike from any unit "
                                          r"\(first: trial 2 .*7-9 s\); kept"):
        rec = Recording.from_arrays(times[keep], units[keep], trials=trials)
    assert rec.n_trials == 4
    b = bin_spikes(rec, bin_size=0.1)
    assert b.n_trials == 4 and b.counts[2].sum() == 0


def test_spikes_outside_trials_warn_with_the_fraction():
    times, units, trials = _trials_rec(n_trials=4)
    extra = np.full(10, 30.0) + np.arange(10) * 0.01  # 10 spikes after the last trial
    all_t = np.concatenate([times, extra])
    with pytest.warns(InputWarning, match=r"10 of \d+ spikes \(\d+\.\d%\) fall outside all "
                                          "trials; they are left out of the analysis"):
        Recording.from_arrays(all_t, np.concatenate([units, np.zeros(10, int)]),
                              trials=trials)


def test_trials_that_cover_no_spike_are_refused():
    times, units, _ = _trials_rec(n_trials=4)
    with pytest.raises(InputError, match=r"none of the \d+ spikes .* falls inside any of the 2 "
                                         "trials .*expected a trials table that covers"):
        Recording.from_arrays(times, units, trials={"start": [100.0, 200.0],
                                                    "stop": [150.0, 250.0]})


# ------------------------------------------------------------------ mixed time units
def test_spikes_in_ms_with_trials_in_s_stop_with_a_time_unit_hint(tmp_path):
    times, units, trials = _trials_rec()
    spikes = _write_table(tmp_path / "spikes.csv", times * 1000.0, units)  # milliseconds
    tr = _write_trials(tmp_path / "trials.csv", trials["start"], trials["stop"])  # seconds
    with pytest.raises(InputError, match=r"spikes.csv: spike times run to .* about 1000 "
                                         r"times apart: the spike times look like "
                                         r"milliseconds and the trial times like seconds .*"
                                         r"time_unit"):
        load(spikes, trials=tr)
    # the same files in one unit load
    ok = _write_trials(tmp_path / "trials_ms.csv", trials["start"] * 1e3, trials["stop"] * 1e3)
    assert load(spikes, trials=ok, time_unit="ms").n_trials == len(trials["start"])


def test_spikes_in_s_with_trials_in_ms_stop_with_a_time_unit_hint(tmp_path):
    times, units, trials = _trials_rec()
    p = tmp_path / "rec.npz"
    np.savez(p, spike_times=times, spike_units=units)
    tr = _write_trials(tmp_path / "trials.csv", trials["start"] * 1e3, trials["stop"] * 1e3)
    with pytest.raises(InputError, match="the spike times look like seconds and the trial "
                                         "times like milliseconds .*time_unit"):
        load(p, trials=tr)
    nwb = tmp_path / "rec.nwb"
    write_nwb(Recording.from_arrays(times, units), nwb)
    with pytest.raises(InputError, match="look like seconds and the trial times like "
                                         "milliseconds"):
        load(nwb, trials=tr)
    assert load(nwb, trials=tr, time_unit="ms").n_trials == len(trials["start"])


def test_mixed_units_exit_2_with_one_line_on_the_command_line(tmp_path, capsys):
    times, units, trials = _trials_rec()
    spikes = _write_table(tmp_path / "spikes.csv", times * 1000.0, units)
    tr = _write_trials(tmp_path / "trials.csv", trials["start"], trials["stop"])
    code = main(["inspect", str(spikes), "--trials", str(tr)])
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip() and "warning" not in ln]
    assert code == 2 and len(lines) == 1 and "--time-unit" in lines[0]


# ------------------------------------------------------------------ silent units
def test_units_silent_in_the_windows_are_dropped_everywhere_downstream():
    from attractorfit.pipeline import run_states

    times, units, trials = _trials_rec(n_units=5, n_trials=12, silent_unit=True)
    with pytest.warns(InputWarning, match="fewer than 20 spikes"):
        rec = Recording.from_arrays(times, units, trials=trials)
    for min_rate in (0.0, 0.5):
        with pytest.warns(InputWarning, match=r"1 unit\(s\) have no spikes inside the "
                                              r"analysis windows \(first: '4'\); left out of "
                                              "the state model and of every later stage"):
            b = bin_spikes(rec, bin_size=0.1, min_rate_hz=min_rate)
        assert b.unit_ids == ["0", "1", "2", "3"] and b.counts.shape[2] == 4
        np.testing.assert_array_equal(b.unit_index, [0, 1, 2, 3])
    cfg = resolve_config({"analysis": {"bin_size": 0.1, "min_rate_hz": 0.0},
                          "states": {"n_states": 2, "latent_dims": 1}})
    with pytest.warns(InputWarning, match="left out of the state model"):
        res = run_states(rec, cfg, seed=0, discreteness=False)
    assert res.state_fit.unit_ids == ["0", "1", "2", "3"]
    assert res.state_fit.rates_hz.shape == (2, 4)


def test_slow_units_are_dropped_with_a_warning_and_two_must_remain():
    times, units, trials = _trials_rec(n_units=3)
    rec = Recording.from_arrays(times, units, trials=trials)
    with pytest.warns(InputWarning, match=r"3 unit\(s\) fire below min_rate_hz = 100 Hz"):
        with pytest.raises(InputError, match=r"min_rate_hz: only 0 of 3 unit\(s\) fire inside "
                                             "the analysis windows at 100 Hz or more.*expected "
                                             "at least 2 units"):
            bin_spikes(rec, bin_size=0.1, min_rate_hz=100.0)


# ------------------------------------------------------------------ absurd sizes
@pytest.fixture
def tiny_memory(monkeypatch):
    """Pretend only 2 kB of memory are free: every size check must refuse."""
    import attractorfit.io._common as common

    monkeypatch.setattr(common, "available_memory", lambda: 4096)


def test_text_tables_too_large_for_memory_are_refused_before_reading(tmp_path, tiny_memory):
    times, units, trials = _trials_rec()
    spikes = _write_table(tmp_path / "s.csv", times, units)
    with pytest.raises(InputError, match=r"s.csv: the file claims about .* rows of text .* "
                                         "memory.*can be allocated now"):
        load(spikes)
    from attractorfit.io import read_trials_table

    tr = _write_trials(tmp_path / "t.csv", np.arange(200.0), np.arange(200.0) + 0.5)
    with pytest.raises(InputError, match="t.csv: the file claims about .* rows of text"):
        read_trials_table(tr)


def test_nwb_trials_table_too_large_is_refused(tmp_path, monkeypatch):
    import attractorfit.io._common as common
    import attractorfit.io._nwb as nwbmod

    times, units, trials = _trials_rec()
    p = tmp_path / "r.nwb"
    write_nwb(Recording.from_arrays(times, units, trials=trials), p)
    real = common.check_claimed_size

    def no_memory_for_trials(where, shape, itemsize, **kw):
        if "trials table" in where:  # the spike arrays fit; the trials table does not
            monkeypatch.setattr(common, "available_memory", lambda: 16)
        return real(where, shape, itemsize, **kw)

    monkeypatch.setattr(nwbmod, "check_claimed_size", no_memory_for_trials)
    with pytest.raises(InputError, match=r"r.nwb: trials table: the file claims 8 rows of 2 "
                                         "columns"):
        load(p)


def test_nix_file_too_large_is_refused_before_neo_reads_it(tmp_path, tiny_memory):
    import neo  # noqa: F401

    from attractorfit.io._neo import _check_hdf5_size

    times, units, trials = _trials_rec()
    rec = Recording.from_arrays(times, units, trials=trials)
    p = tmp_path / "r.nix"
    from neo.io import NixIO

    with NixIO(str(p), mode="ow") as io:
        io.write_block(rec.to_neo())
    with pytest.raises(InputError, match=r"r.nix: the file claims HDF5 datasets of \d+ bytes"):
        _check_hdf5_size(str(p))
    with pytest.raises(InputError, match="r.nix: the file claims HDF5 datasets"):
        load(p)


# ------------------------------------------------------------------ configuration
@pytest.mark.parametrize("section, key, value, expected", [
    ("analysis", "bin_size", 0, "a number of seconds > 0"),
    ("analysis", "bin_size", -0.02, "a number of seconds > 0"),
    ("analysis", "window", [1.0, 1.0], r"\[\] or \[start, stop\] with stop > start"),
    ("states", "n_states", 1, "at least 2 states"),
    ("states", "max_states", 1, "a whole number from 2 to 64"),
    ("states", "min_states", 0, "a whole number >= 1"),
    ("states", "posterior_threshold", 0.4, r"a number in \(0.5, 1\]"),
    ("states", "latent_dims", -1, "a whole number from 0 to 64"),
    ("network", "dt", 0.01, "a number of seconds from 1e-6 to 1e-3"),
    ("network", "rank", 2.5, r"0, a whole number up to 64, \"auto\" or \"full\""),
    ("compare", "n_surrogates", 1, "a whole number >= 2"),
    ("discreteness", "alpha", 0.7, r"a number in \(0, 0.5\]"),
])
def test_config_values_out_of_range_name_option_value_and_expectation(section, key, value,
                                                                      expected):
    with pytest.raises(InputError, match=rf"{section}\.{key} = .*expected.*{expected}"):
        resolve_config({section: {key: value}})


def test_config_values_checked_against_the_data():
    cfg = resolve_config({"states": {"latent_dims": 5}, "network": {"rank": 7}})
    check_config_for_data(cfg, n_units=7)
    with pytest.raises(InputError, match=r"states.latent_dims = 5; expected fewer latent "
                                         r"dimensions than the 5 units analysed"):
        check_config_for_data(cfg, n_units=5)
    cfg["states"]["latent_dims"] = 0
    with pytest.raises(InputError, match=r"network.rank = 7; expected at most the 6 units"):
        check_config_for_data(cfg, n_units=6)
    cfg["network"]["rank"] = "full"
    check_config_for_data(cfg, n_units=2)


def test_run_states_refuses_more_latent_dimensions_than_units():
    from attractorfit.pipeline import run_states

    times, units, trials = _trials_rec(n_units=3)
    rec = Recording.from_arrays(times, units, trials=trials)
    cfg = resolve_config({"analysis": {"bin_size": 0.1}, "states": {"latent_dims": 3}})
    with pytest.raises(InputError, match="states.latent_dims = 3; expected fewer"):
        run_states(rec, cfg, discreteness=False)


# ------------------------------------------------------------------ numerical dead ends
def test_zero_pattern_matrix_is_refused_by_every_decoder_rule():
    r = np.zeros((6, 3))
    x = np.array([[1.0, -1.0, 1.0]])
    for rule in (decoder_hebbian, decoder_pseudoinverse):
        with pytest.raises(InputError, match="rates: all 18 rates are 0 Hz"):
            rule(r, x, tau_s=0.02)
    with pytest.raises(InputError, match="all 18 rates are 0 Hz"):
        decoder_optimized(r, x, tau_s=0.02, encoder=np.ones((6, 1)), slopes=np.ones((6, 3)))


def test_rank_deficient_pattern_matrix_gives_least_squares_with_a_warning():
    rng = np.random.default_rng(0)
    r = rng.uniform(1, 30, size=(20, 3))
    r = np.column_stack([r, r[:, 1]])             # patterns 1 and 3 identical
    x = np.array([[1.0, -1.0, 1.0, 1.0]])         # ... but with different codes
    with pytest.warns(InputWarning, match="rank 3.*patterns 1 and 3 have the same rates but "
                                          "different codes.*least-squares"):
        res = decoder_pseudoinverse(r, x, tau_s=0.02)
    # Reference: numpy.linalg.lstsq gives the minimum-norm least-squares decoder.
    ref = np.linalg.lstsq(r.T, (x / 0.02).T, rcond=None)[0].T
    np.testing.assert_allclose(res.decoder, ref, rtol=1e-7, atol=1e-10)
    assert not res.exact and np.all(np.isfinite(res.decoder))
    enc = rng.normal(size=(20, 1))
    with pytest.warns(InputWarning, match="least-squares"):
        opt = decoder_optimized(r, x, tau_s=0.02, encoder=enc, slopes=np.ones((20, 4)),
                                margin=0.0)
    assert np.all(np.isfinite(opt.decoder))
    # reachable codes with a rank-deficient R: exact, no warning
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert decoder_pseudoinverse(r, np.ones((1, 4)), tau_s=0.02).exact


def test_hmm_state_collapsing_to_zero_rates_is_floored_and_usable():
    from sklearn.exceptions import ConvergenceWarning

    from attractorfit.states._hmm import RATE_FLOOR

    rng = np.random.default_rng(1)
    seqs = [np.vstack([np.zeros((15, 3)), rng.poisson(2.0, (15, 3))]) for _ in range(6)]
    with pytest.warns(ConvergenceWarning, match="zero counts in every unit; their rates are "
                                                "the floor"):
        m = PoissonHMM(2, rng=0).fit(seqs)
    assert m.rates_.min() >= RATE_FLOOR
    assert np.isfinite(m.score(seqs))
    post = m.predict_proba(seqs[0])
    assert np.all(np.isfinite(post)) and np.allclose(post.sum(axis=1), 1.0)


# ------------------------------------------------------------------ nothing runs from input
_FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__"}
_FORBIDDEN_ATTRS = {("os", "system"), ("os", "popen"), ("pickle", "load"),
                    ("pickle", "loads"), ("marshal", "loads"), ("shelve", "open"),
                    ("subprocess", "getoutput"), ("subprocess", "getstatusoutput")}


def _dotted(node) -> tuple:
    if isinstance(node, ast.Attribute):
        return _dotted(node.value) + (node.attr,)
    if isinstance(node, ast.Name):
        return (node.id,)
    return ()


def test_source_never_unpickles_evaluates_or_shells_out():
    """A cheap static guard over every module of the package."""
    problems = []
    for path in sorted(SRC.rglob("*.py")):
        text = path.read_text(encoding="utf-8")
        rel = path.relative_to(SRC.parent)
        for needle in ("allow_pickle=True", "shell=True", "os.system", "pickle.load"):
            if needle in text:
                problems.append(f"{rel}: contains {needle!r}")
        for node in ast.walk(ast.parse(text)):
            if not isinstance(node, ast.Call):
                continue
            name = _dotted(node.func)
            kw = {k.arg: k.value for k in node.keywords}
            if len(name) == 1 and name[0] in _FORBIDDEN_CALLS:
                problems.append(f"{rel}:{node.lineno}: calls {name[0]}()")
            if name[-2:] in _FORBIDDEN_ATTRS:
                problems.append(f"{rel}:{node.lineno}: calls {'.'.join(name)}()")
            if name[-1:] == ("load",) and name[:-1] in (("np",), ("numpy",)):
                ok = isinstance(kw.get("allow_pickle"), ast.Constant) and \
                    kw["allow_pickle"].value is False
                if not ok:
                    problems.append(f"{rel}:{node.lineno}: np.load without allow_pickle=False")
            if name[-1:] == ("read_array",) and not (
                    isinstance(kw.get("allow_pickle"), ast.Constant)
                    and kw["allow_pickle"].value is False):
                problems.append(f"{rel}:{node.lineno}: read_array without allow_pickle=False")
            if name[-1:] == ("File",) and name[:-1] == ("h5py",):
                mode = kw.get("mode", node.args[1] if len(node.args) > 1 else None)
                if not (isinstance(mode, ast.Constant) and mode.value == "r"):
                    problems.append(f"{rel}:{node.lineno}: h5py.File not opened with mode 'r'")
    assert not problems, "\n".join(problems)


def test_nwb_readers_open_read_only():
    """Every NWBHDF5IO opened outside a writer uses mode 'r' (static check)."""
    tree = ast.parse((SRC / "io" / "_nwb.py").read_text(encoding="utf-8"))
    for fn in [n for n in ast.walk(tree) if isinstance(n, ast.FunctionDef)]:
        for node in ast.walk(fn):
            if isinstance(node, ast.Call) and _dotted(node.func)[-1:] == ("NWBHDF5IO",):
                mode = {k.arg: k.value for k in node.keywords}.get("mode")
                assert isinstance(mode, ast.Constant)
                assert mode.value == "r" or fn.name.startswith("write_"), fn.name


# ------------------------------------------------------------------ fuzzing the other loaders
_FUZZ = settings(max_examples=25, deadline=None, database=None,
                 suppress_health_check=list(HealthCheck))


@pytest.fixture(scope="module")
def nwb_bytes(tmp_path_factory):
    times, units, trials = _trials_rec(n_units=3, n_trials=3)
    p = tmp_path_factory.mktemp("nwb") / "good.nwb"
    write_nwb(Recording.from_arrays(times, units, trials=trials), p)
    return p.read_bytes()


def _load_or_input_error(path, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            load(path, **kw)
        except InputError:
            pass


def _load_mutated(data, base: bytes, path) -> None:
    """Overwrite a few bytes of ``base`` (and maybe cut it), write it to ``path``, load."""
    b = bytearray(base)
    for i in data.draw(st.lists(st.integers(0, len(b) - 1), min_size=1, max_size=6)):
        b[i] = data.draw(st.integers(0, 255))
    cut = data.draw(st.one_of(st.none(), st.integers(0, len(b))))
    path.write_bytes(bytes(b if cut is None else b[:cut]))
    _load_or_input_error(path)


# each HDF5 file is first walked in a child process (~0.3 s): few examples here, many in
# benchmarks/bench_fuzz.py
_FUZZ_FILES = settings(max_examples=8, deadline=None, database=None,
                       suppress_health_check=list(HealthCheck))


@_FUZZ_FILES
@given(data=st.data())
def test_any_mutated_nwb_loads_or_raises_input_error(tmp_path_factory, nwb_bytes, data):
    _load_mutated(data, nwb_bytes, tmp_path_factory.mktemp("mut") / "m.nwb")


_PARAMS = st.one_of(
    st.sampled_from(["sample_rate = 30000.0", "sample_rate = 0", "sample_rate = -5",
                     "sample_rate = 'fast'", "sample_rate = float('nan')",
                     "sample_rate = __import__('os').system('false')", "sample_rate = [1, 2]",
                     "import os\nsample_rate = 1e3", "sample_rate = 1e400",
                     "sample_rate = (", "\x00", "sample_rate = 1j", "sample_rate = True"]),
    st.text(max_size=40))
_ARRAYS = st.one_of(
    st.lists(st.integers(-5, 10**12), max_size=12).map(lambda v: np.array(v, dtype=np.int64)),
    st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=12).map(np.array),
    st.lists(st.text(max_size=3), max_size=5).map(np.array),
    st.just(np.zeros((2, 3))), st.just(np.array(5)))


@_FUZZ
@given(params=_PARAMS, times=_ARRAYS, clusters=_ARRAYS,
       group=st.one_of(st.none(), st.text(max_size=30)))
def test_any_sorter_folder_loads_or_raises_input_error(tmp_path_factory, params, times,
                                                       clusters, group):
    d = tmp_path_factory.mktemp("sorter")
    (d / "params.py").write_text(params, encoding="utf-8", errors="surrogatepass")
    np.save(d / "spike_times.npy", times)
    np.save(d / "spike_clusters.npy", clusters)
    if group is not None:
        (d / "cluster_group.tsv").write_text("cluster_id\tgroup\n" + group, encoding="utf-8",
                                             errors="surrogatepass")
    _load_or_input_error(d, good_only=bool(group))
    assert not os.path.exists(d / "params.pyc")


@_FUZZ
@given(data=st.data())
def test_any_recording_with_trials_loads_or_raises_input_error(tmp_path_factory, data):
    """Spike and trial times of arbitrary scales and overlaps (the new coverage and
    time-unit checks included) give a Recording or an InputError."""
    n = data.draw(st.integers(0, 40))
    scale = data.draw(st.sampled_from([1e-3, 1.0, 1e3]))
    times = np.array(data.draw(st.lists(st.floats(0, 100), min_size=n, max_size=n))) * scale
    units = np.array(data.draw(st.lists(st.integers(0, 3), min_size=n, max_size=n)))
    k = data.draw(st.integers(1, 5))
    start = np.array(data.draw(st.lists(st.floats(0, 100), min_size=k, max_size=k)))
    dur = np.array(data.draw(st.lists(st.floats(0, 20), min_size=k, max_size=k)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            rec = Recording.from_arrays(times, units, trials={"start": start,
                                                              "stop": start + dur})
            bin_spikes(rec, bin_size=data.draw(st.sampled_from([0.01, 0.5, 5.0])))
        except InputError:
            pass


@pytest.fixture(scope="module")
def nix_bytes(tmp_path_factory):
    from neo.io import NixIO

    times, units, trials = _trials_rec(n_units=3, n_trials=3)
    p = tmp_path_factory.mktemp("nix") / "good.nix"
    with NixIO(str(p), mode="ow") as io:
        io.write_block(Recording.from_arrays(times, units, trials=trials).to_neo())
    return p.read_bytes()


@_FUZZ_FILES
@given(data=st.data())
def test_any_mutated_nix_file_loads_or_raises_input_error(tmp_path_factory, nix_bytes, data):
    _load_mutated(data, nix_bytes, tmp_path_factory.mktemp("mutnix") / "m.nix")


# ------------------------------------------------------------------ atomic outputs
@pytest.mark.parametrize("exc", [RuntimeError, KeyboardInterrupt])
def test_interrupted_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path, exc):
    from attractorfit._output import atomic_writer

    target = tmp_path / "summary.json"
    target.write_text("old")
    with pytest.raises(exc):
        with atomic_writer(target, "w") as fh:
            fh.write("half of the new conte")
            raise exc()
    assert target.read_text() == "old"
    assert sorted(os.listdir(tmp_path)) == ["summary.json"]


def test_sorting_warnings_reach_the_recording_warnings_once(tmp_path):
    times, units, trials = _trials_rec(n_trials=3)
    p = _write_trials(tmp_path / "t.csv", trials["start"][::-1], trials["stop"][::-1])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rec = load(_write_table(tmp_path / "s.csv", times, units), trials=p)
    texts = [str(w.message) for w in caught if issubclass(w.category, InputWarning)]
    assert sum("t.csv: trials were not in order" in t for t in texts) == 1
    assert any("t.csv: trials were not in order" in w for w in rec.warnings)
    unsorted = Recording(unit_ids=["a", "b"], spike_times=[np.array([0.3, 0.1]), np.ones(1)])
    with pytest.warns(InputWarning, match="not in order"):
        unsorted.validate()
    assert any("unit 'a': spike times were not in order" in w for w in unsorted.warnings)


# ------------------------------------------------------------------ HDF5 library crashes
_CRASH_CHILD = """
import sys
import numpy as np
from attractorfit import InputError, load
from attractorfit.io import write_nwb
from attractorfit.synthetic import switching_recording
rec, _ = switching_recording(n_units=4, n_states=2, n_trials=3, rng=0)
write_nwb(rec, sys.argv[1])
data = bytearray(open(sys.argv[1], "rb").read())
data[39449] = 200  # found by benchmarks/bench_fuzz.py: crashed HDF5 1.14 in attrs reads
open(sys.argv[1], "wb").write(bytes(data))
try:
    load(sys.argv[1])
    print("loaded")
except InputError as exc:
    print("InputError", exc)
"""


def test_nwb_that_crashes_the_hdf5_library_is_refused_not_fatal(tmp_path):
    import subprocess
    import sys

    env = dict(os.environ, PYTHONPATH=str(SRC.parent))
    proc = subprocess.run([sys.executable, "-c", _CRASH_CHILD, str(tmp_path / "c.nwb")],
                          capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr[-2000:]  # -11 was a segmentation fault
    assert proc.stdout.startswith(("InputError", "loaded"))


def test_hdf5_walk_killed_by_a_signal_or_hanging_gives_input_error(tmp_path, monkeypatch):
    import subprocess

    import attractorfit.io._common as common

    p = tmp_path / "x.nwb"
    p.write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(100))
    monkeypatch.setattr(subprocess, "run", lambda *a, **k: subprocess.CompletedProcess(
        a, -11, b"", b""))
    with pytest.raises(InputError, match=r"x.nwb: reading the file's HDF5 structure crashed "
                                         r"the HDF5 library \(signal 11\)"):
        common.hdf5_preflight(p)

    def hang(*a, **k):
        raise subprocess.TimeoutExpired(a, 1.0)

    monkeypatch.setattr(subprocess, "run", hang)
    with pytest.raises(InputError, match="did not finish in"):
        common.hdf5_preflight(p)


def test_trials_time_unit_resolves_a_mix_of_units(tmp_path, capsys):
    times, units, trials = _trials_rec()
    spikes = _write_table(tmp_path / "spikes.csv", times * 1000.0, units)  # milliseconds
    tr = _write_trials(tmp_path / "trials.csv", trials["start"], trials["stop"])  # seconds
    rec = load(spikes, trials=tr, time_unit="ms", trials_time_unit="s")
    np.testing.assert_allclose(rec.trials["stop"], trials["stop"])
    np.testing.assert_allclose(np.concatenate(rec.spike_times).max(), times.max())
    with pytest.raises(InputError, match="trials_time_unit: expected 's' or 'ms', got 'h'"):
        load(spikes, trials=tr, time_unit="ms", trials_time_unit="h")
    with pytest.raises(InputError, match="trials_time_unit: given .* without a trials table"):
        load(spikes, time_unit="ms", trials_time_unit="s")
    code = main(["inspect", str(spikes), "--trials", str(tr), "--time-unit", "ms",
                 "--trials-time-unit", "s", "--json"])
    assert code == 0 and '"n_trials": 8' in capsys.readouterr().out


def test_sorter_folder_side_files_are_size_checked(tmp_path, monkeypatch):
    import attractorfit.io._common as common

    np.save(tmp_path / "spike_times.npy", np.arange(40, dtype=np.int64) * 100)
    np.save(tmp_path / "spike_clusters.npy", np.arange(40, dtype=np.int64) % 2)
    (tmp_path / "params.py").write_text("sample_rate = 1000.0\n" + "#" * (1 << 20))
    with pytest.raises(InputError, match=r"params.py: \d+ bytes; expected a small settings "
                                         "file"):
        load(tmp_path)
    (tmp_path / "params.py").write_text("sample_rate = 1000.0\n")
    (tmp_path / "cluster_group.tsv").write_text("cluster_id\tgroup\n0\tgood\n1\tgood\n" * 50)
    monkeypatch.setattr(common, "available_memory", lambda: 4096)
    with pytest.raises(InputError, match="cluster_group.tsv: the file claims about .* rows"):
        load(tmp_path)
