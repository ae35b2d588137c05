"""Format dispatch for :func:`attractorfit.load`."""

from __future__ import annotations

import inspect
import os

from attractorfit.errors import InputError
from attractorfit.io._common import SUPPORTED_FORMATS, check_file, source_name
from attractorfit.io._neo import read_neo
from attractorfit.io._npz import read_npz
from attractorfit.io._nwb import read_nwb
from attractorfit.io._sorter import read_sorter_folder
from attractorfit.io._table import read_table
from attractorfit.recording import Recording

__all__ = ["load"]

_BY_SUFFIX = {
    ".nwb": (read_nwb, "NWB files"),
    ".csv": (read_table, "spike tables"),
    ".tsv": (read_table, "spike tables"),
    ".tab": (read_table, "spike tables"),
    ".txt": (read_table, "spike tables"),
    ".npz": (read_npz, "NPZ archives"),
}
_REFUSED_SUFFIXES = {
    ".pkl": "a pickle file can run arbitrary code when it is read",
    ".pickle": "a pickle file can run arbitrary code when it is read",
    ".npy": "one .npy array cannot hold both spike times and units; pass the sorter "
            "folder holding spike_times.npy and spike_clusters.npy, or an .npz archive",
}


def _reader_for(path):
    if os.path.isdir(path):
        if os.path.isfile(os.path.join(path, "spike_times.npy")):
            return read_sorter_folder, "spike-sorter folders"
        return read_neo, "folders read by neo"
    suffix = os.path.splitext(path)[1].lower()
    if suffix in _REFUSED_SUFFIXES:
        raise InputError(f"{source_name(path)}: not read: {_REFUSED_SUFFIXES[suffix]}; "
                         f"supported: {SUPPORTED_FORMATS}")
    return _BY_SUFFIX.get(suffix, (read_neo, "files read by neo"))


def load(path, **options) -> Recording:
    """Load a recording from a file or folder, choosing the reader from the path.

    Parameters
    ----------
    path : str or path-like
        - ``.nwb``: NWB file, read with pynwb (:func:`read_nwb`);
        - ``.csv``, ``.tsv``, ``.tab``, ``.txt``: spike table with a header row, one
          row per spike (:func:`read_table`);
        - ``.npz``: archive with ``spike_times`` and ``spike_units`` arrays
          (:func:`read_npz`);
        - a folder holding ``spike_times.npy``: spike-sorter output
          (:func:`read_sorter_folder`);
        - anything else (``.nix``, ``.h5``, ``.smr``, ``.plx``, ``.nev``, ``.mat``...,
          or another folder): through neo's IO classes (:func:`read_neo`).
    **options
        Passed to the reader; an option the chosen reader does not take raises
        InputError (``None`` values are ignored). Options:

        trials : str or path-like, optional
            CSV/TSV trials table (``start``, ``stop``, label columns), for every
            format; replaces trials found in the recording, with a warning.
        time_unit : {'s', 'ms'}, default 's'
            Unit of plain numbers: spike tables, NPZ arrays and the trials table.
            NWB times are seconds; neo files carry their units; sorter folders
            count samples.
        trials_time_unit : {'s', 'ms'}, optional
            Unit of the ``trials`` table when it differs from ``time_unit`` (e.g.
            spikes in milliseconds, trials in seconds). Spike and trial times about
            1000 times apart are refused with a message naming these options.
        unit_column : str
            Spike tables: name of the unit column (default ``unit``). NWB: units-table
            column holding the unit names (default: ``unit_name``, ``name``,
            ``unit_id`` or ``cluster_id`` when present, else the table ids).
        time_column : str, default 'time'
            Spike tables: name of the spike time column.
        delimiter : str, optional
            Spike tables: field delimiter (default from the suffix, else sniffed).
        sampling_rate : float, optional
            Sorter folders: samples per second; default ``sample_rate`` from
            ``params.py`` (parsed, never executed).
        good_only : bool, default False
            Sorter folders: keep only clusters labelled ``good`` in
            ``cluster_group.tsv`` / ``cluster_info.tsv``.

    Returns
    -------
    Recording
        Unit ids, sorted float64 spike times in seconds, trials table, metadata,
        provenance (path, size, SHA-256 of every file read) and warnings.

    Raises
    ------
    InputError
        Missing, empty, unreadable or corrupt input, an unsupported format, an option
        the format does not take, and every rule of the chosen reader.

    Notes
    -----
    Inputs are only ever opened for reading (HDF5 in mode ``'r'``, NIX read-only);
    nothing is written anywhere.

    Examples
    --------
    >>> import numpy as np, os, tempfile
    >>> import attractorfit
    >>> folder = tempfile.mkdtemp()
    >>> path = os.path.join(folder, "spikes.npz")
    >>> np.savez(path, spike_times=np.array([0.1, 0.5, 0.2]),
    ...          spike_units=np.array([1, 1, 2]))
    >>> rec = attractorfit.load(path)
    >>> rec.unit_ids, rec.spike_times[0].tolist()
    (['1', '2'], [0.1, 0.5])
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file or folder")
    if not os.path.isdir(path):
        check_file(path)
    reader, what = _reader_for(path)
    accepted = [p.name for p in inspect.signature(reader).parameters.values()
                if p.kind is inspect.Parameter.KEYWORD_ONLY]
    unknown = sorted(k for k, v in options.items() if k not in accepted and v is not None)
    if unknown:
        raise InputError(f"{source_name(path)}: option(s) {unknown} do not apply to "
                         f"{what}; accepted: {', '.join(accepted)}")
    kwargs = {k: v for k, v in options.items() if k in accepted}
    return reader(path, **kwargs)
