"""Spike tables and trials tables (CSV / TSV / text), including property-based tests."""

import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from io_helpers import write_text

from attractorfit import load
from attractorfit.errors import InputError, InputWarning
from attractorfit.io import read_table, read_trials_table

SPIKES = "unit,time,amplitude\n2,0.5,1\n1,0.25,2\n10,0.125,3\n1,0.0625,4\n2,0.375,5\n"


def test_csv_spike_table(tmp_path):
    rec = load(write_text(tmp_path / "spikes.csv", SPIKES))
    assert rec.unit_ids == ["1", "2", "10"]  # integer-looking ids in numeric order
    np.testing.assert_array_equal(rec.spike_times[0], [0.0625, 0.25])
    np.testing.assert_array_equal(rec.spike_times[1], [0.375, 0.5])
    np.testing.assert_array_equal(rec.spike_times[2], [0.125])
    assert rec.trials is None and rec.metadata["format"] == "table"


def test_times_agree_with_numpy_loadtxt(tmp_path):
    """Outside check: numpy's own text parser reads the same numbers."""
    rng = np.random.default_rng(7)
    times = rng.uniform(0, 100, 500)
    units = rng.integers(0, 6, 500)
    path = tmp_path / "s.csv"
    np.savetxt(path, np.c_[units, times], delimiter=",", header="unit,time", comments="",
               fmt=["%d", "%.17g"])
    rec = load(path)
    ref = np.loadtxt(path, delimiter=",", skiprows=1)
    for uid, t in zip(rec.unit_ids, rec.spike_times):
        np.testing.assert_array_equal(t, np.sort(ref[ref[:, 0] == int(uid), 1]))


@pytest.mark.parametrize("name, text", [
    ("s.tsv", "unit\ttime\na\t0.5\nb\t0.25\n"),
    ("s.tab", "unit\ttime\na\t0.5\nb\t0.25\n"),
    ("s.txt", "unit\ttime\na\t0.5\nb\t0.25\n"),
    ("s.txt", "unit;time\na;0.5\nb;0.25\n"),
    ("s.txt", "unit time\na   0.5\nb 0.25\n"),
    ("s.txt", "unit,time\na,0.5\nb,0.25\n"),
    ("s.dat.csv", "\ufeffunit,time\r\n\r\na, 0.5\r\nb,0.25\r\n"),  # BOM, CRLF, blank line
])
def test_delimiters_from_suffix_or_sniffed(tmp_path, name, text):
    rec = load(write_text(tmp_path / name, text))
    assert rec.unit_ids == ["a", "b"]
    assert [t.tolist() for t in rec.spike_times] == [[0.5], [0.25]]


def test_delimiter_option(tmp_path):
    path = write_text(tmp_path / "s.csv", "unit|time\na|0.5\nb|0.25\n")
    assert read_table(path, delimiter="|").n_spikes == 2
    with pytest.raises(InputError, match="delimiter: expected one character"):
        read_table(path, delimiter="||")


def test_column_options_and_case(tmp_path):
    path = write_text(tmp_path / "s.csv", "Cluster,Spike_Time_ms\n3,1500\n4,250\n")
    rec = load(path, unit_column="cluster", time_column="spike_time_ms", time_unit="ms")
    assert rec.unit_ids == ["3", "4"]
    assert [t.tolist() for t in rec.spike_times] == [[1.5], [0.25]]


def test_millisecond_times_without_the_option_give_a_warning(tmp_path):
    rng = np.random.default_rng(0)
    rows = "".join(f"{u},{t:.3f}\n" for u, t in zip(rng.integers(0, 3, 300),
                                                      np.sort(rng.uniform(0, 6e5, 300))))
    rec = load(write_text(tmp_path / "s.csv", "unit,time\n" + rows))
    assert any("look like milliseconds" in w for w in rec.warnings)


# ------------------------------------------------------------ spike table errors
@pytest.mark.parametrize("text, message", [
    ("unit,time\n1,0.5\n2,nan\n",
     "spikes.csv line 3: spike time 'nan' is not a finite number of seconds"),
    ("unit,time\n1,0.5\n2,inf\n",
     "spikes.csv line 3: spike time 'inf' is not a finite number of seconds"),
    ("unit,time\n1,0.5\n2,-1e-3\n",
     "spikes.csv line 3: spike time '-1e-3' is negative; expected seconds >= 0"),
    ("unit,time\n1,0.5\n\n2,abc\n",
     "spikes.csv line 4: spike time 'abc' is not a number of seconds"),
    ("unit,time\n1,0.5\n2,\n", "spikes.csv line 3: spike time '' is not a number"),
    ("unit,time\n1,0.5\n,0.7\n", "spikes.csv line 3: empty unit label in column 'unit'"),
    ("unit,time\n1,0.5\n2,0.7,9\n",
     "spikes.csv line 3: 3 field\\(s\\), expected 2 like the header \\(delimiter ','\\)"),
    ("unit,t\n1,0.5\n", "spikes.csv line 1: no column 'time' in the header \\('unit', 't'\\); "
                        "expected a 'time' column \\(set its name with time_column=\\)"),
    ("id,time\n1,0.5\n", "spikes.csv line 1: no column 'unit' in the header"),
    ("unit,time,unit\n1,0.5,1\n", "spikes.csv line 1: column 'unit' appears twice"),
    ("unit,time\n", "spikes.csv: the spike table has a header but no rows"),
    ("\n \n\n", "spikes.csv: no header row; expected a spike table with columns 'unit' "
                "and 'time'"),
    ("unit,time\n1,0.5\n1,0.7\n", "spikes.csv: found 1 unit\\(s\\); expected at least 2"),
    ('unit,time\n1,"0.5\n', "spikes.csv line 2: not a readable table row"),
    ('unit,time\n1,"0"5\n', "spikes.csv line 2: not a readable table row"),
])
def test_spike_table_errors_name_file_and_line(tmp_path, text, message):
    with pytest.raises(InputError, match=message):
        load(write_text(tmp_path / "spikes.csv", text))


def test_millisecond_error_wording(tmp_path):
    path = write_text(tmp_path / "spikes.csv", "unit,time\n1,5\n2,-3\n")
    with pytest.raises(InputError, match="line 3: spike time '-3' is negative; expected "
                                         "milliseconds >= 0"):
        load(path, time_unit="ms")


def test_bad_options(tmp_path):
    path = write_text(tmp_path / "spikes.csv", SPIKES)
    with pytest.raises(InputError, match="time_unit: expected 's' or 'ms', got 'us'"):
        load(path, time_unit="us")
    with pytest.raises(InputError, match="unit_column and time_column: both name column "
                                         "'unit'"):
        load(path, time_column="unit")
    with pytest.raises(InputError, match="unit_column: expected a column name, got 3"):
        load(path, unit_column=3)


def test_not_utf8(tmp_path):
    path = tmp_path / "spikes.csv"
    path.write_bytes(b"unit,time\n1,0.5\n2,\xff\xfe0.5\n")
    with pytest.raises(InputError, match="spikes.csv line 3: the file is not UTF-8 text"):
        load(path)


def test_not_utf8_in_sniffed_text(tmp_path):
    path = tmp_path / "spikes.txt"
    path.write_bytes(b"unit time\n\xff\xfe\x00\x01" * 3)
    with pytest.raises(InputError, match="spikes.txt: the file is not UTF-8 text"):
        load(path)


# ------------------------------------------------------------------ trials tables
TRIALS = ("start,stop,item,correct,code,reaction\n"
          "3.0,4.5,far,true,2,0.4\n"
          "0.5,2.0,near,False,-1,\n"
          "5,6,near,TRUE,7,0.35\n")


def test_trials_table_types_and_order(tmp_path):
    with pytest.warns(InputWarning, match="trials were not in order"):
        t = read_trials_table(write_text(tmp_path / "trials.csv", TRIALS))
    assert list(t) == ["start", "stop", "item", "correct", "code", "reaction"]
    np.testing.assert_array_equal(t["start"], [0.5, 3.0, 5.0])
    np.testing.assert_array_equal(t["stop"], [2.0, 4.5, 6.0])
    np.testing.assert_array_equal(t["item"], ["near", "far", "near"])
    np.testing.assert_array_equal(t["correct"], [False, True, True])
    np.testing.assert_array_equal(t["code"], [-1, 2, 7])
    np.testing.assert_array_equal(t["reaction"], [np.nan, 0.4, 0.35])
    assert t["item"].dtype.kind == "U" and t["correct"].dtype == bool
    assert t["code"].dtype == np.int64 and t["reaction"].dtype == np.float64


def test_trials_table_aliases_units_and_big_integers(tmp_path):
    path = write_text(tmp_path / "t.tsv", "start_time\tstop_time\tbig\n500\t1500\t"
                                          "99999999999999999999\n")
    t = read_trials_table(path, time_unit="ms")
    np.testing.assert_array_equal(t["start"], [0.5])
    np.testing.assert_array_equal(t["stop"], [1.5])
    assert t["big"].dtype == np.float64  # beyond int64: kept as a number, not an error


def test_trials_table_column_options(tmp_path):
    path = write_text(tmp_path / "t.csv", "begin,end,start\n0,1,x\n")
    with pytest.raises(InputError, match="t.csv line 1: label column 'start' clashes"):
        read_trials_table(path, start_column="begin", stop_column="end")
    path = write_text(tmp_path / "u.csv", "begin,end,cue\n0,1,x\n")
    t = read_trials_table(path, start_column="begin", stop_column="end")
    assert list(t) == ["start", "stop", "cue"]


@pytest.mark.parametrize("text, message", [
    ("start,stop\n0,1\n1,1\n", "trials.csv line 3: stop 1.0 is not after start 1.0; "
                               "expected stop > start"),
    ("start,stop\n0,1\n2,3\n0.5,1.5\n",
     "trials.csv: trials at line 2 \\(0-1 s\\) and line 4 \\(0.5-1.5 s\\) overlap"),
    ("start,stop\n0,1\nnan,3\n", "trials.csv line 3: start 'nan' is not a finite number"),
    ("start,stop\n0,1\n2,x\n", "trials.csv line 3: stop 'x' is not a number of seconds"),
    ("start,stop\n-1,1\n", "trials.csv line 2: start '-1' is negative"),
    ("start,end\n0,1\n", "trials.csv line 1: no column 'stop' in the header"),
    ("start,stop\n", "trials.csv: the trials table has a header but no rows"),
    ("start,stop\n0,1,2\n", "trials.csv line 2: 3 field\\(s\\), expected 2"),
])
@pytest.mark.filterwarnings("ignore:.*trials were not in order")
def test_trials_table_errors_name_file_and_line(tmp_path, text, message):
    with pytest.raises(InputError, match=message):
        read_trials_table(write_text(tmp_path / "trials.csv", text))


def test_trials_option_on_a_spike_table(tmp_path):
    spikes = write_text(tmp_path / "spikes.csv", SPIKES)
    trials = write_text(tmp_path / "trials.csv", "start,stop,item\n0,0.3,a\n0.3,0.6,b\n")
    rec = load(spikes, trials=trials)
    np.testing.assert_array_equal(rec.trials["item"], ["a", "b"])
    assert [os.path.basename(p["path"]) for p in rec.provenance] == ["spikes.csv",
                                                                     "trials.csv"]


# ------------------------------------------------------------ property-based tests
_TOKENS = st.sampled_from(["unit", "time", "1", "2", "0.5", "-1", "nan", "inf", "1e308",
                           "1e999", "", " ", "abc", '"', '"x,y"', "\t", ";", "0x10",
                           "1_0", "\x00", "é", "9" * 30])


_VALID = st.sampled_from(["1", "2", "3", "0.5", "0.25", "12.75", "7", "1e-3", "0"])


@st.composite
def _tables(draw):
    """Delimited text near the valid format: mostly well-formed, with random damage."""
    header = draw(st.lists(_TOKENS, min_size=0, max_size=2))
    if draw(st.integers(0, 3)):
        header = ["unit", "time"] + header
    width = len(header)
    n_rows = draw(st.integers(0, 8))
    rows = []
    for _ in range(n_rows):
        if width and draw(st.integers(0, 4)):
            rows.append(draw(st.lists(st.one_of(_VALID, _VALID, _TOKENS), min_size=width,
                                      max_size=width)))
        else:
            rows.append(draw(st.lists(_TOKENS, max_size=4)))
    delim = draw(st.sampled_from([",", "\t", ";", " "]))
    end = draw(st.sampled_from(["\n", "\r\n"]))
    return end.join(delim.join(r) for r in [header] + rows) + end


def _loads_or_input_error(path, **kw):
    try:
        rec = load(path, **kw)
    except InputError:
        return None
    # whatever loads obeys the Recording rules
    assert rec.n_units >= 2 and rec.n_spikes > 0
    for t in rec.spike_times:
        assert t.dtype == np.float64 and np.all(np.isfinite(t)) and np.all(t >= 0)
        assert np.all(np.diff(t) >= 0)
    return rec


_SETTINGS = settings(max_examples=150, deadline=None, database=None,
                     suppress_health_check=[HealthCheck.function_scoped_fixture])


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@_SETTINGS
@given(text=_tables())
def test_any_table_loads_or_raises_input_error(tmp_path, text):
    path = tmp_path / "spikes.txt"  # delimiter sniffed
    path.write_text(text, encoding="utf-8")
    _loads_or_input_error(path)


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@_SETTINGS
@given(text=st.text(alphabet=st.characters(codec="utf-8"), max_size=300),
       suffix=st.sampled_from([".csv", ".txt"]), as_trials=st.booleans())
def test_any_text_loads_or_raises_input_error(tmp_path, text, suffix, as_trials):
    """Random text as the spike table, or as the trials table of a valid spike table."""
    spikes = tmp_path / f"spikes{suffix}"
    kw = {}
    if as_trials:
        spikes.write_text("unit,time\n1,0.5\n2,0.25\n", encoding="utf-8")
        kw["trials"] = tmp_path / f"trials{suffix}"
        kw["trials"].write_text(text, encoding="utf-8")
    else:
        spikes.write_text(text, encoding="utf-8")
    _loads_or_input_error(spikes, **kw)


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@_SETTINGS
@given(data=st.binary(min_size=1, max_size=300), suffix=st.sampled_from([".csv", ".txt"]))
def test_any_bytes_load_or_raise_input_error(tmp_path, data, suffix):
    path = tmp_path / f"spikes{suffix}"
    path.write_bytes(data)
    _loads_or_input_error(path)


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@settings(max_examples=100, deadline=None, database=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(times=st.lists(st.floats(min_value=0, max_value=1e6, allow_nan=False), min_size=2,
                      max_size=30),
       units=st.lists(st.sampled_from(["a", "b", "7", "c d"]), min_size=2, max_size=30))
def test_valid_tables_load_exactly(tmp_path, times, units):
    n = min(len(times), len(units))
    times, units = times[:n], units[:n]
    path = tmp_path / "spikes.csv"
    path.write_text("unit,time\n" + "".join(f"{u},{t!r}\n" for u, t in zip(units, times)))
    if len(set(units)) < 2:
        with pytest.raises(InputError, match="expected at least 2"):
            load(path)
        return
    rec = load(path)
    for uid, t in zip(rec.unit_ids, rec.spike_times):
        expected = sorted(x for u, x in zip(units, times) if u == uid)
        assert t.tolist() == expected
