"""Readers and writers. Every reader returns a :class:`~attractorfit.recording.Recording`.

``load(path, **options)`` picks the reader from the path (file suffix or folder
contents). Only this package and :mod:`attractorfit.pipeline` touch disk; readers
open their inputs read-only and record the provenance (path, size, SHA-256) of every
file they read.
"""

from attractorfit.io._load import load
from attractorfit.io._neo import read_neo
from attractorfit.io._npz import read_npz
from attractorfit.io._nwb import read_nwb, write_nwb
from attractorfit.io._sorter import read_sorter_folder
from attractorfit.io._table import read_table, read_trials_table, write_csv

__all__ = ["load", "read_nwb", "read_neo", "read_sorter_folder", "read_table", "read_npz",
           "read_trials_table", "write_nwb", "write_csv"]
