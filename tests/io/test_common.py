"""Shared io helpers: file checks, library-error wrapping, column lookup hints."""

import os

import pytest
from io_helpers import write_text

from attractorfit import load
from attractorfit.errors import InputError
from attractorfit.io import _common


def test_unreadable_file(tmp_path, monkeypatch):
    path = write_text(tmp_path / "s.csv", "unit,time\n1,0.5\n")
    monkeypatch.setattr(os, "access", lambda p, mode: False)
    with pytest.raises(InputError, match="s.csv: the file is not readable"):
        load(path)


def test_file_whose_size_cannot_be_read(tmp_path, monkeypatch):
    path = write_text(tmp_path / "s.csv", "unit,time\n1,0.5\n")

    def fail(p):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(os.path, "getsize", fail)
    with pytest.raises(InputError, match="s.csv: cannot read the file \\(Input/output error\\)"):
        _common.check_file(path)


def test_library_errors_wraps_memory_errors_and_keeps_input_errors():
    with pytest.raises(InputError, match="x.nwb: not enough memory to read the file; "
                                         "expected an NWB file"):
        with _common.library_errors("/some/where/x.nwb", "an NWB file"):
            raise MemoryError
    with pytest.raises(InputError, match="^kept$"):
        with _common.library_errors("x.nwb", "an NWB file"):
            raise InputError("kept")
    with pytest.raises(InputError, match="x.nwb: could not read the file as an NWB file "
                                         "\\(KeyError: 'obs_intervals'\\)"):
        with _common.library_errors("x.nwb", "an NWB file"):
            raise KeyError("obs_intervals")


def test_single_field_header_hints_at_the_delimiter(tmp_path):
    path = write_text(tmp_path / "s.csv", "unit\ttime\n1\t0.5\n2\t0.7\n")
    with pytest.raises(InputError, match="the header has a single field: check the "
                                         "delimiter \\(option delimiter=\\)"):
        load(path)
    assert load(path, delimiter="\t").n_units == 2
