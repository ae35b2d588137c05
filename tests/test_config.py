"""Configuration parsing (our own plumbing) and its error messages."""

import tomllib

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from attractorfit import InputError
from attractorfit.config import default_config, dumps_config, load_config, resolve_config


def test_dump_parses_back_to_defaults():
    assert tomllib.loads(dumps_config()) == default_config()


def test_override_and_int_to_float(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text("[analysis]\nbin_size = 1\n[states]\nmax_states = 5\n")
    cfg = load_config(p)
    assert cfg["analysis"]["bin_size"] == 1.0 and cfg["states"]["max_states"] == 5


@pytest.mark.parametrize("text, match", [
    ("[analysis]\nbin_size = 0\n", r"analysis.bin_size = 0.0; expected a number of seconds > 0"),
    ("[analysis]\nbin_size = -1\n", "bin_size"),
    ("[nope]\nx = 1\n", r"unknown section \[nope\]"),
    ("[states]\nfoo = 1\n", "unknown setting states.foo"),
    ("[states]\nn_states = 1\n", "at least 2"),
    ("[states]\nmin_states = 6\nmax_states = 3\n", "larger than"),
    ("[analysis]\nwindow = [2.0, 1.0]\n", "stop > start"),
    ("[analysis\n", "not valid TOML"),
    ("analysis = 3\n", "must be a table"),
])
def test_bad_config(tmp_path, text, match):
    p = tmp_path / "c.toml"
    p.write_text(text)
    with pytest.raises(InputError, match=match):
        load_config(p)


def test_renamed_key_names_the_new_one(tmp_path):
    p = tmp_path / "old.toml"
    p.write_text("[network]\ncue_drive = true\n")
    with pytest.raises(InputError, match=r"^old.toml: network.cue_drive was renamed; write "
                                         r"network.cue_field instead"):
        load_config(p)
    # a run folder's own config.toml written by an earlier version reads with the new name
    assert load_config(p, old_names=True)["network"]["cue_field"] is True
    assert "cue_drive" not in load_config(p, old_names=True)["network"]
    with pytest.raises(InputError, match=r"network.cue_field = 3; expected true or false"):
        resolve_config({"network": {"cue_drive": 3}}, old_names=True)


def test_missing_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_config(tmp_path / "absent.toml")


@settings(max_examples=150, deadline=None)
@given(st.dictionaries(st.sampled_from(["analysis", "states", "discreteness", "x"]),
                       st.dictionaries(st.sampled_from(["bin_size", "n_states", "alpha",
                                                        "window", "align", "y"]),
                                       st.one_of(st.integers(-5, 100), st.floats(allow_nan=True),
                                                 st.text(max_size=5), st.booleans(),
                                                 st.lists(st.floats(), max_size=3)))))
def test_any_config_resolves_or_raises_input_error(data):
    # property: arbitrary settings either resolve or raise InputError, nothing else
    try:
        resolve_config(data)
    except InputError:
        pass
