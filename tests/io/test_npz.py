"""NPZ archives, including safety (no pickle, sizes checked) and property-based tests."""

import io
import zipfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from attractorfit import load
from attractorfit.errors import InputError
from attractorfit.io import read_npz


def _npz(path, **arrays):
    np.savez(path, **arrays)
    return path


@pytest.mark.filterwarnings("ignore:.*trials were not in order")
def test_spikes_and_trials_with_labels(tmp_path):
    path = _npz(tmp_path / "r.npz", spike_times=np.array([0.5, 0.1, 2.5, 1.2]),
                spike_units=np.array([3, 3, 11, 11]),
                trial_start=np.array([1.0, 0.0]), trial_stop=np.array([2.0, 0.9]),
                trial_item=np.array(["b", "a"]), trial_code=np.array([5, 4]),
                trial_tag=np.array([b"y", b"x"]))
    rec = load(path)
    assert rec.unit_ids == ["3", "11"]
    assert [t.tolist() for t in rec.spike_times] == [[0.1, 0.5], [1.2, 2.5]]
    np.testing.assert_array_equal(rec.trials["start"], [0.0, 1.0])
    np.testing.assert_array_equal(rec.trials["item"], ["a", "b"])
    np.testing.assert_array_equal(rec.trials["code"], [4, 5])
    np.testing.assert_array_equal(rec.trials["tag"], ["x", "y"])
    assert rec.metadata["format"] == "npz"


def test_text_and_float_unit_labels_unit_ids_and_milliseconds(tmp_path):
    path = _npz(tmp_path / "r.npz", spike_times=np.array([500.0, 100.0, 250.0]),
                spike_units=np.array([2.0, 2.0, 1.0]), unit_ids=np.array([2, 1, 9]))
    rec = read_npz(path, time_unit="ms")
    assert rec.unit_ids == ["2", "1", "9"]  # order and silent unit from unit_ids
    assert [t.tolist() for t in rec.spike_times] == [[0.1, 0.5], [0.25], []]
    path = _npz(tmp_path / "s.npz", spike_times=np.array([0.5, 0.1]),
                spike_units=np.array(["x", "y"]), extra=np.arange(3))
    rec = load(path)
    assert rec.unit_ids == ["x", "y"]
    assert any("['extra'] ignored" in w for w in rec.warnings)


def test_object_arrays_are_refused_without_unpickling(tmp_path):
    path = tmp_path / "o.npz"
    np.savez(path, spike_times=np.array([0.1, 0.2]),
             spike_units=np.array([{"unit": 1}, {"unit": 2}], dtype=object))
    with pytest.raises(InputError, match="o.npz: array 'spike_units': the array holds Python "
                                         "objects \\(dtype object\\)"):
        load(path)


def _raw_npy(header: dict) -> bytes:
    """A .npy header (format 1.0) with no data: only the claim of a shape."""
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, header)
    return buf.getvalue()


def test_absurd_claimed_size_is_refused_before_allocating(tmp_path):
    path = tmp_path / "big.npz"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("spike_times.npy", _raw_npy({"descr": "<f8", "fortran_order": False,
                                                 "shape": (10 ** 15,)}))
        zf.writestr("spike_units.npy", _raw_npy({"descr": "<i8", "fortran_order": False,
                                                 "shape": (10 ** 15,)}))
    with pytest.raises(InputError, match="big.npz: array 'spike_times': the file claims an "
                                         "array of shape \\(1000000000000000,\\) \\(8e\\+06 GB"):
        load(path)


def test_truncated_array_data(tmp_path):
    path = tmp_path / "cut.npz"
    with zipfile.ZipFile(path, "w") as zf:
        zf.writestr("spike_times.npy", _raw_npy({"descr": "<f8", "fortran_order": False,
                                                 "shape": (100,)}) + b"\0" * 80)
    with pytest.raises(InputError, match="cut.npz: could not read the file as an NPZ archive "
                                         "\\(member 'spike_times.npy'\\)"):
        load(path)


@pytest.mark.parametrize("arrays, message", [
    ({"spike_times": [0.1, 0.2]}, "r.npz: no array\\(s\\) \\['spike_units'\\] in the archive"),
    ({"spike_times": [0.1, np.nan], "spike_units": [1, 2]},
     "r.npz: array 'spike_times': element 1 is nan, expected a finite number"),
    ({"spike_times": [0.1, np.inf], "spike_units": [1, 2]},
     "r.npz: array 'spike_times': element 1 is inf, expected a finite number"),
    ({"spike_times": [0.1, -2.0], "spike_units": [1, 2]},
     "r.npz: array 'spike_times' element 1 is -2.0; expected spike times >= 0"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 2, 3]},
     "r.npz: 2 spike_times but 3 spike_units"),
    ({"spike_times": [[0.1, 0.2], [0.3, 0.4]], "spike_units": [1, 2]},
     "array 'spike_times' has shape \\(2, 2\\); expected a 1-dimensional array"),
    ({"spike_times": ["a", "b"], "spike_units": [1, 2]},
     "array 'spike_times' has dtype <U1; expected real numbers"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1.5, 2]},
     "array 'spike_units' element 0 is 1.5; expected unit labels"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 1]}, "found 1 unit\\(s\\)"),
    ({"spike_times": np.zeros(0), "spike_units": np.zeros(0, int), "unit_ids": [1, 2]},
     "r.npz: the recording contains no spikes"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 2], "unit_ids": [1, 3]},
     "spike_units has label '2' that is not in unit_ids"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 2], "trial_start": [0.0]},
     "has 'trial_start' without 'trial_stop'"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 2], "trial_start": [0.0, 1.0],
      "trial_stop": [1.0, 1.0]}, "r.npz: trial 1: stop 1.0 is not after start 1.0"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 2], "trial_start": [0.0, 0.5],
      "trial_stop": [1.0, 2.0]}, "r.npz: trials 0 \\(0-1 s\\) and 1 \\(0.5-2 s\\) overlap"),
    ({"spike_times": [0.1, 0.2], "spike_units": [1, 2], "trial_start": [0.0],
      "trial_stop": [1.0], "trial_x": [1, 2]},
     "r.npz: trials column 'x' has 2 rows; expected 1"),
])
def test_bad_archives(tmp_path, arrays, message):
    path = _npz(tmp_path / "r.npz", **{k: np.asarray(v) for k, v in arrays.items()})
    with pytest.raises(InputError, match=message):
        load(path)


def test_not_a_zip(tmp_path):
    path = tmp_path / "r.npz"
    path.write_bytes(b"this is not a zip archive at all")
    with pytest.raises(InputError, match="r.npz: could not read the file as an NPZ archive"):
        load(path)


def test_empty_zip(tmp_path):
    path = tmp_path / "r.npz"
    zipfile.ZipFile(path, "w").close()
    with pytest.raises(InputError, match="r.npz: the archive holds no arrays"):
        load(path)


# ------------------------------------------------------------ property-based tests
_KEYS = st.sampled_from(["spike_times", "spike_units", "trial_start", "trial_stop",
                         "trial_item", "unit_ids", "other"])
_DTYPES = st.one_of(hnp.floating_dtypes(), hnp.integer_dtypes(), hnp.unsigned_integer_dtypes(),
                    hnp.boolean_dtypes(), hnp.unicode_string_dtypes(max_len=3),
                    hnp.byte_string_dtypes(max_len=3), hnp.complex_number_dtypes(),
                    hnp.datetime64_dtypes(), st.just(np.dtype([("a", "<f8"), ("b", "<i4")])))
_ARRAYS = hnp.arrays(dtype=_DTYPES, shape=hnp.array_shapes(min_dims=0, max_dims=2,
                                                            min_side=0, max_side=6))
_SETTINGS = settings(max_examples=150, deadline=None, database=None,
                     suppress_health_check=[HealthCheck.function_scoped_fixture,
                                            HealthCheck.too_slow])


def _loads_or_input_error(path):
    try:
        rec = load(path)
    except InputError:
        return
    assert rec.n_units >= 2 and rec.n_spikes > 0
    for t in rec.spike_times:
        assert t.dtype == np.float64 and np.all(np.isfinite(t)) and np.all(t >= 0)


@st.composite
def _archives(draw):
    """Arrays under the expected names, mostly of a common length, random dtypes."""
    n = draw(st.integers(0, 8))
    out = {}
    keys = ["spike_times", "spike_units"] + draw(st.lists(_KEYS, unique=True, max_size=4))
    for key in dict.fromkeys(keys):
        shape = draw(st.one_of(st.just((n,)), st.just((n,)),
                               hnp.array_shapes(min_dims=0, max_dims=2, min_side=0,
                                                max_side=6)))
        if draw(st.booleans()):  # well-formed values
            out[key] = draw(hnp.arrays(dtype=float, shape=(n,), elements=st.floats(0, 100))
                            if key != "spike_units" else
                            hnp.arrays(dtype=int, shape=(n,), elements=st.integers(0, 3)))
            continue
        dtype = draw(st.one_of(st.just(np.dtype(float)), st.just(np.dtype(int)), _DTYPES))
        out[key] = draw(hnp.arrays(dtype=dtype, shape=shape))
    return out


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@_SETTINGS
@given(arrays=st.one_of(st.dictionaries(_KEYS, _ARRAYS, max_size=6), _archives()))
def test_any_arrays_load_or_raise_input_error(tmp_path, arrays):
    path = tmp_path / "r.npz"
    np.savez(path, **arrays)
    _loads_or_input_error(path)


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@_SETTINGS
@given(n=st.integers(2, 20), seed=st.integers(0, 2 ** 32 - 1),
       descr=st.sampled_from(["<f8", "<i8", "|O", "<U3", "|b1", "<c16", "|V8", "<f2"]),
       shape=st.lists(st.integers(0, 10 ** 12), max_size=3), fortran=st.booleans(),
       with_data=st.booleans())
def test_any_npy_header_loads_or_raises_input_error(tmp_path, n, seed, descr, shape,
                                                    fortran, with_data):
    """Random headers: a valid spike_units array and a spike_times with a random claim."""
    rng = np.random.default_rng(seed)
    path = tmp_path / "r.npz"
    with zipfile.ZipFile(path, "w") as zf:
        data = rng.uniform(0, 10, n).tobytes() if with_data else b""
        zf.writestr("spike_times.npy", _raw_npy({"descr": descr, "fortran_order": fortran,
                                                 "shape": tuple(shape)}) + data)
        buf = io.BytesIO()
        np.save(buf, rng.integers(0, 3, n))
        zf.writestr("spike_units.npy", buf.getvalue())
    _loads_or_input_error(path)


@pytest.mark.filterwarnings("ignore::attractorfit.errors.InputWarning")
@_SETTINGS
@given(seed=st.integers(0, 2 ** 32 - 1), n_flips=st.integers(1, 20),
       compressed=st.booleans())
def test_corrupted_archives_load_or_raise_input_error(tmp_path, seed, n_flips, compressed):
    rng = np.random.default_rng(seed)
    buf = io.BytesIO()
    (np.savez_compressed if compressed else np.savez)(
        buf, spike_times=rng.uniform(0, 5, 30), spike_units=rng.integers(0, 4, 30),
        trial_start=np.array([0.0, 2.0]), trial_stop=np.array([1.0, 3.0]))
    data = bytearray(buf.getvalue())
    for pos in rng.integers(0, len(data), n_flips):
        data[pos] = int(rng.integers(0, 256))
    path = tmp_path / "r.npz"
    path.write_bytes(bytes(data))
    _loads_or_input_error(path)


def test_duplicate_member_names(tmp_path):
    path = tmp_path / "d.npz"
    buf = io.BytesIO()
    np.save(buf, np.array([0.1, 0.2]))
    with pytest.warns(UserWarning, match="Duplicate name"):
        with zipfile.ZipFile(path, "w") as zf:
            zf.writestr("spike_times.npy", buf.getvalue())
            zf.writestr("spike_times.npy", buf.getvalue())
    with pytest.raises(InputError, match="d.npz: array 'spike_times' appears twice"):
        load(path)


@pytest.mark.parametrize("arrays, message", [
    ({"spike_units": np.array([b"\xff", b"a"])},
     "array 'spike_units' holds bytes that are not UTF-8 text"),
    ({"spike_units": np.array([1j, 2j])},
     "array 'spike_units' has dtype complex128; expected unit labels"),
    ({"trial_start": [0.0], "trial_stop": [1.0], "trial_x": np.array([1j])},
     "array 'trial_x' has dtype complex128; expected numbers or text trial labels"),
])
def test_bad_label_arrays(tmp_path, arrays, message):
    full = {"spike_times": np.array([0.1, 0.2]), "spike_units": np.array([1, 2])}
    full.update(arrays)
    with pytest.raises(InputError, match=message):
        load(_npz(tmp_path / "r.npz", **full))


def test_trial_labels_without_trial_times_are_ignored_with_a_warning(tmp_path):
    rec = load(_npz(tmp_path / "r.npz", spike_times=np.array([0.1, 0.2]),
                    spike_units=np.array([1, 2]), trial_item=np.array(["a"])))
    assert rec.trials is None
    assert any("['trial_item'] ignored: trial labels need 'trial_start'" in w
               for w in rec.warnings)
